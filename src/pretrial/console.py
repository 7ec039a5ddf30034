"""Terminal output shared by every command: aligned tables, JSON, cautions."""

from __future__ import annotations

import json
import math
import sys
from collections.abc import Sequence
from typing import Any, TextIO

#: The cautions every report, replay and README carries.
CAUTIONS: tuple[str, ...] = (
    "Simulation margins do not certify safety: the plant model, its parameters and the disturbances "
    "are assumptions.",
    "Make first hardware trials restrained: tether or net, travel limits, reduced power and a tested "
    "emergency stop within reach.",
    "Drones and cranes can hurt people: follow local aviation and lifting regulations and licensed practice.",
)


def fmt_number(value: Any, digits: int = 4) -> str:
    """Compact human form of a number (``inf`` and ``nan`` spelled out)."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return str(value)
    if isinstance(value, int):
        return str(value)
    if math.isinf(value):
        return "inf" if value > 0 else "-inf"
    if math.isnan(value):
        return "nan"
    return f"{value:.{digits}g}"


def table(headers: Sequence[str], rows: Sequence[Sequence[Any]], out: TextIO | None = None) -> None:
    """Print a left-aligned text table with a rule under the header."""
    out = out or sys.stdout
    cells = [[fmt_number(c) for c in row] for row in rows]
    widths = [max(len(h), *(len(r[i]) for r in cells)) if cells else len(h) for i, h in enumerate(headers)]
    line = "  ".join(h.ljust(w) for h, w in zip(headers, widths))
    print(line.rstrip(), file=out)
    print("  ".join("-" * w for w in widths), file=out)
    for r in cells:
        print("  ".join(c.ljust(w) for c, w in zip(r, widths)).rstrip(), file=out)


def emit_json(obj: Any, out: TextIO | None = None) -> None:
    """Print one JSON document (strict: no NaN; infinities become null)."""
    print(json.dumps(jsonable(obj), indent=2, allow_nan=False), file=out or sys.stdout)


def jsonable(obj: Any) -> Any:
    """Convert numpy scalars/arrays and non-finite floats into plain JSON values."""
    if isinstance(obj, dict):
        return {str(k): jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [jsonable(v) for v in obj]
    if hasattr(obj, "tolist"):
        return jsonable(obj.tolist())
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    return obj


def print_cautions(out: TextIO | None = None) -> None:
    out = out or sys.stdout
    print("\nCautions:", file=out)
    for c in CAUTIONS:
        print(f"  - {c}", file=out)


class Progress:
    """A one-line progress bar on stderr: ``[#####-----] 50%  1,200/2,400 episodes  12 s left``.

    Redrawn at most a few times a second; nothing is printed when stderr is
    not a terminal (logs and pipes stay clean).
    """

    def __init__(self, total: int, unit: str, out: TextIO | None = None, width: int = 28):
        import time

        self.total = max(1, int(total))
        self.unit = unit
        self.out = out or sys.stderr
        self.width = width
        self.done = 0
        self._t0 = time.monotonic()
        self._last = 0.0
        self._shown = False

    def advance(self, n: int) -> None:
        import time

        self.done += int(n)
        now = time.monotonic()
        if now - self._last < 0.2:
            return
        self._last = now
        frac = min(self.done / self.total, 1.0)
        filled = int(frac * self.width)
        rate = self.done / max(now - self._t0, 1e-9)
        left = max(self.total - self.done, 0) / rate if rate > 0 else float("inf")
        eta = f"{left:.0f} s left" if math.isfinite(left) else ""
        bar = "#" * filled + "-" * (self.width - filled)
        self.out.write(f"\r[{bar}] {frac:4.0%}  {self.done:,}/{self.total:,} {self.unit}  {eta}   ")
        self.out.flush()
        self._shown = True

    def close(self) -> None:
        if self._shown:
            self.out.write("\n")
            self.out.flush()
