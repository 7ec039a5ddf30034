"""Observers of an evolution run, in the manner of neat-python's reporters.

The loop tells a :class:`ReporterSet` what happens (a generation done, the fitness target
reached, a note such as "resumed", a warning); each :class:`Reporter` decides what to do with it.
The command line prints one line per generation (:class:`LineReporter`); warnings go to the
``pretrial`` logger (:class:`WarningReporter`); a program adds its own reporter to collect rows
or stop a dashboard, without touching the loop.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any

from pretrial.log import warn as log_warning


class Reporter:
    """Base observer: every hook does nothing; override the ones you need."""

    def generation_done(self, row: dict[str, Any], seconds: float, eta_s: float | None, best_success: float) -> None:
        """A generation was evaluated: its ``history.csv`` row, its wall time, the estimated time left (None
        when the run ends now) and the best genome's success rate."""

    def target_reached(self, target: float, generation: int) -> None:
        """The best fitness reached ``[run] fitness_target`` at ``generation``."""

    def note(self, text: str) -> None:
        """A line about the run itself (resumed, interrupted)."""

    def warning(self, text: str) -> None:
        """Something the user should know (e.g. episodes whose simulation blew up)."""


class ReporterSet(Reporter):
    """Passes every event to each reporter, in order."""

    def __init__(self, reporters: Sequence[Reporter] = ()):
        self.reporters = list(reporters)

    def generation_done(self, row: dict[str, Any], seconds: float, eta_s: float | None, best_success: float) -> None:
        for r in self.reporters:
            r.generation_done(row, seconds, eta_s, best_success)

    def target_reached(self, target: float, generation: int) -> None:
        for r in self.reporters:
            r.target_reached(target, generation)

    def note(self, text: str) -> None:
        for r in self.reporters:
            r.note(text)

    def warning(self, text: str) -> None:
        for r in self.reporters:
            r.warning(text)


def clock(seconds: float) -> str:
    """``m:ss`` or ``h:mm:ss``."""
    seconds = int(round(seconds))
    h, rem = divmod(seconds, 3600)
    m, s = divmod(rem, 60)
    return f"{h}:{m:02d}:{s:02d}" if h else f"{m}:{s:02d}"


class LineReporter(Reporter):
    """One line per generation (best and mean fitness, species, size, evaluations, time) to ``log``."""

    def __init__(self, log: Callable[[str], None]):
        self.log = log

    def generation_done(self, row: dict[str, Any], seconds: float, eta_s: float | None, best_success: float) -> None:
        eta = "" if eta_s is None else f"  eta {clock(eta_s)}"
        self.log(
            f"gen {row['generation']:4d}  best {row['best']:10.4g} ({best_success:4.0%} ok)  "
            f"mean {row['mean']:10.4g}  "
            f"species {row['species']:3d}  size {row['best_nodes']}n/{row['best_connections']}c  "
            f"evals {row['evaluations']:8d}  {seconds:6.2f} s/gen{eta}"
        )

    def target_reached(self, target: float, generation: int) -> None:
        self.log(f"fitness target {target:g} reached at generation {generation}")

    def note(self, text: str) -> None:
        self.log(text)


class WarningReporter(Reporter):
    """Warnings to ``warn`` (default: the ``pretrial`` logger, which the command line prints on stderr)."""

    def __init__(self, warn: Callable[[str], None] | None = None):
        self.warn = warn or log_warning

    def warning(self, text: str) -> None:
        self.warn(text)
