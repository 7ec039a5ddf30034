"""The version of pretrial, in one place (pyproject reads it from here)."""

__version__ = "0.1.0"
