"""Readable outputs: report documents (Markdown and self-contained HTML), plots, CSV files and sweep comparisons."""
