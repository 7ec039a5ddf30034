"""pretrial: evolve neural controllers with NEAT and stress them before a hardware trial."""

__version__ = "0.1.0"
