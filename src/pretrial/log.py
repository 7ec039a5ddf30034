"""Warnings from library code go through :mod:`logging` (logger ``"pretrial"``), never ``print``.

The command line shows them as ``pretrial: warning: ...`` lines on stderr (:func:`install_cli_handler`);
a program using the Python API sees them through its own logging set-up (or Python's last-resort
handler on stderr when it has none).
"""

from __future__ import annotations

import logging
import sys

logger = logging.getLogger("pretrial")

PREFIX = "pretrial: warning: "


def warn(text: str) -> None:
    """Log a warning; a leading ``pretrial: warning:`` (how the CLI words them) is not repeated."""
    logger.warning(text.removeprefix(PREFIX))


class _StderrHandler(logging.Handler):
    """Writes each record as one ``pretrial: warning: ...`` line to the *current* ``sys.stderr``."""

    def emit(self, record: logging.LogRecord) -> None:
        try:
            print(f"{PREFIX}{record.getMessage()}", file=sys.stderr, flush=True)
        except Exception:  # a closed stderr must not turn a warning into a crash
            self.handleError(record)


def install_cli_handler() -> None:
    """Route the ``pretrial`` logger to stderr as the command line words it (once per process)."""
    if not any(isinstance(h, _StderrHandler) for h in logger.handlers):
        logger.addHandler(_StderrHandler(logging.WARNING))
    logger.propagate = False  # shown once, not again by a root handler
