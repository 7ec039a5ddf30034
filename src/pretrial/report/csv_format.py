"""CSV text the way every pretrial CSV is written: exact floats, true/false, empty for none."""

from __future__ import annotations

import csv
import io
import math
from collections.abc import Sequence
from typing import Any


def csv_value(v: Any, digits: int | None = None) -> str:
    """One CSV cell: floats exactly (``repr``) or to ``digits`` significant digits; None empty."""
    if hasattr(v, "item"):
        v = v.item()
    if v is None:
        return ""
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, float):
        if not math.isfinite(v):
            return "" if math.isnan(v) else ("inf" if v > 0 else "-inf")
        return repr(v) if digits is None else f"{v:.{digits}g}"
    return str(v)


def csv_text(headers: Sequence[str] | None, rows: Sequence[Sequence[Any]], digits: int | None = None) -> str:
    """CSV lines: the headers (None: no header line), then the rows."""
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    if headers is not None:
        writer.writerow(headers)
    writer.writerows([csv_value(v, digits) for v in row] for row in rows)
    return buf.getvalue()
