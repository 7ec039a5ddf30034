"""Generated code for the target: dependency-free C99 or Python, with golden files and fault behaviour."""
