"""The ``pretrial`` command line: one module per command, arguments and printing only."""
