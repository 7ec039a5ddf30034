"""Stopping a command on SIGINT (Ctrl-C) and SIGTERM (``kill``, ``timeout``, systemd, batch schedulers).

Both become exceptions in the main thread, so a command stops the same way on either: the
evolution checkpoints, the sweep removes its partial directory, the workers are ended. SIGTERM
raises :class:`Terminated`, a KeyboardInterrupt, so every clean-up written for Ctrl-C runs for it.

Python runs a signal handler between any two bytecodes of the main thread, including inside a gc
callback, ``__del__`` or a weakref callback, where an exception is discarded ("Exception ignored
in ...", e.g. dask's gc callback runs at every collection): the command would then run on as if
never signalled. Such a discarded interrupt is delivered again a moment later.
"""

from __future__ import annotations

import contextlib
import signal
import sys
import threading
import time
from collections.abc import Iterator
from typing import Any

#: exit status after SIGINT / SIGTERM: 128 + the signal's number, as a shell reports it (common practice)
EXIT_INTERRUPTED = 128 + signal.SIGINT
EXIT_TERMINATED = 128 + signal.SIGTERM

#: seconds before a discarded interrupt is delivered again (out of the frame that discarded it)
_REDELIVER_AFTER_S = 0.01


class Terminated(KeyboardInterrupt):
    """Raised in the main thread on SIGTERM, within :func:`stop_on_signals`."""


class _Handlers:
    """The handlers in force within :func:`stop_on_signals`."""

    def __init__(self) -> None:
        self.terminated = False  # a Terminated was raised and not discarded
        self.in_hook = False

    def on_signal(self, signum: int, frame: object) -> None:
        if self.in_hook:  # raised in the unraisable hook, it would be discarded as well
            _deliver_later(signum)
            return
        if signum != signal.SIGTERM:
            raise KeyboardInterrupt
        # ``timeout`` signals the command and then its whole process group: a second SIGTERM must
        # not interrupt the clean-up of the first
        if not self.terminated:
            self.terminated = True
            raise Terminated

    def unraisable(self, info: Any, default: Any) -> None:
        if not isinstance(info.exc_value, KeyboardInterrupt):
            default(info)
            return
        self.in_hook = True
        try:
            if isinstance(info.exc_value, Terminated):
                self.terminated = False
                _deliver_later(signal.SIGTERM)
            else:
                _deliver_later(signal.SIGINT)
        finally:
            self.in_hook = False


def _deliver_later(signum: int) -> None:
    """Send ``signum`` to the main thread from a short-lived thread, after this frame has returned."""
    main = threading.main_thread().ident

    def send() -> None:
        time.sleep(_REDELIVER_AFTER_S)
        with contextlib.suppress(ProcessLookupError, OSError):
            signal.pthread_kill(main, signum)

    threading.Thread(target=send, name="pretrial-redeliver-signal", daemon=True).start()


@contextlib.contextmanager
def stop_on_signals() -> Iterator[None]:
    """Within the block, SIGTERM raises :class:`Terminated` (once) and SIGINT KeyboardInterrupt (as usual).

    A SIGINT that is ignored (a shell's ``cmd &``) stays ignored. Outside the main thread, where
    handlers cannot be set, the block runs unchanged.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    handlers = _Handlers()
    old_term = signal.signal(signal.SIGTERM, handlers.on_signal)
    old_int = signal.getsignal(signal.SIGINT)
    if old_int is signal.default_int_handler:
        signal.signal(signal.SIGINT, handlers.on_signal)
    old_hook = sys.unraisablehook
    sys.unraisablehook = lambda info: handlers.unraisable(info, old_hook)
    try:
        yield
    finally:
        sys.unraisablehook = old_hook
        signal.signal(signal.SIGTERM, old_term)
        if old_int is signal.default_int_handler:
            signal.signal(signal.SIGINT, old_int)
