"""The tool's own error types: one line for the user, never a traceback.

The command line prints ``pretrial: error: <message>`` and exits with
:attr:`PretrialError.exit_code`; ``--debug`` shows the traceback as well.
"""

from __future__ import annotations


class PretrialError(Exception):
    """An error whose message is a complete one-line explanation for the user."""

    exit_code = 2

    def __init__(self, message: str):
        super().__init__(" ".join(str(message).split()))  # keep it on one line

    @property
    def message(self) -> str:
        return str(self.args[0])


class InputError(PretrialError):
    """Bad user input: a file, key or value that cannot be used as given."""


class FileFormatError(InputError):
    """A file that is missing, unreadable, damaged, edited or of the wrong kind."""
