"""Evolving controllers.

Run configs, the generation loop around neat-python, the run directory, checkpoints and
reporters.
"""
