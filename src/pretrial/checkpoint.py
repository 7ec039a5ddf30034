"""Checkpoints of an evolution run: neat-python's objects, pickled, hashed.

neat-python's genomes, species and innovation tracker are plain Python objects
with no other serialization, so checkpoints are pickles. A pickle can run code
when loaded, so checkpoints are trusted local files only: each one's SHA-256 is
recorded in the run's ``manifest.json`` when written, and :func:`load` refuses a
file whose hash does not match. They are only ever loaded from a run directory
the user names with ``--resume``; nothing shareable (policies, results) is a
pickle.
"""

from __future__ import annotations

import copyreg
import io
import itertools
import pickle
from pathlib import Path
from typing import Any

from .errors import FileFormatError
from .files import atomic_write_bytes, sha256_hex

FORMAT = "pretrial-checkpoint-1"


def _reduce_count(c: itertools.count) -> tuple[Any, tuple[int]]:
    # itertools.count pickling is deprecated (removed in Python 3.14); store its next value.
    return itertools.count, (int(repr(c)[len("count(") : -1]),)


_DISPATCH = copyreg.dispatch_table.copy()
_DISPATCH[itertools.count] = _reduce_count


def dumps(state: dict[str, Any]) -> bytes:
    buf = io.BytesIO()
    p = pickle.Pickler(buf, protocol=pickle.HIGHEST_PROTOCOL)
    p.dispatch_table = _DISPATCH
    p.dump({"format": FORMAT, "state": state})
    return buf.getvalue()


def save(path: str | Path, state: dict[str, Any]) -> str:
    """Write ``state`` atomically; return its SHA-256 (to record in the manifest)."""
    data = dumps(state)
    atomic_write_bytes(path, data)
    return sha256_hex(data)


def load(path: str | Path, expected_sha256: str | None) -> dict[str, Any]:
    """Load a checkpoint whose hash must equal ``expected_sha256`` (from the manifest)."""
    path = Path(path)
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise FileFormatError(f"{path}: cannot read checkpoint ({exc.strerror})") from None
    digest = sha256_hex(data)
    if expected_sha256 is None:
        raise FileFormatError(f"{path}: not recorded in the run's manifest.json; refusing to load an unknown pickle")
    if digest != expected_sha256:
        raise FileFormatError(
            f"{path}: checkpoint hash {digest[:12]}... does not match manifest.json ({expected_sha256[:12]}...); "
            "the file was changed or damaged"
        )
    try:
        obj = pickle.loads(data)
    except Exception as exc:
        raise FileFormatError(f"{path}: damaged checkpoint ({type(exc).__name__})") from None
    if not isinstance(obj, dict) or obj.get("format") != FORMAT:
        raise FileFormatError(f"{path}: not a {FORMAT} file")
    return obj["state"]
