"""Atomic file writes and content hashes: no reader ever sees half a file."""

from __future__ import annotations

import hashlib
import json
import os
import tempfile
from pathlib import Path
from typing import Any

from .errors import PretrialError


def atomic_write_bytes(path: str | Path, data: bytes) -> None:
    """Write ``data`` to ``path`` through a temporary file in the same directory, then rename."""
    path = Path(path)
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    except OSError as exc:
        raise PretrialError(f"{path.parent}: cannot write here ({exc.strerror})") from None
    try:
        with os.fdopen(fd, "wb") as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except OSError as exc:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise PretrialError(f"{path}: write failed ({exc.strerror}); the previous version, if any, is intact") from None


def atomic_write_text(path: str | Path, text: str) -> None:
    atomic_write_bytes(path, text.encode("utf-8"))


def canonical_json(obj: Any) -> str:
    """The one serialization that content hashes are taken over."""
    return json.dumps(obj, sort_keys=True, separators=(",", ":"), allow_nan=False)


def sha256_hex(data: bytes | str) -> str:
    return hashlib.sha256(data.encode("utf-8") if isinstance(data, str) else data).hexdigest()


def write_json(path: str | Path, obj: Any) -> None:
    """Pretty JSON, atomically (strict: NaN and infinities are refused)."""
    atomic_write_text(path, json.dumps(obj, indent=2, sort_keys=False, allow_nan=False) + "\n")


def check_writable_dir(path: str | Path) -> None:
    """Fail before any work starts if ``path`` (or its nearest existing parent) is not writable."""
    p = Path(path).resolve()
    probe = p
    while not probe.exists():
        probe = probe.parent
    if not probe.is_dir():
        raise PretrialError(f"{probe}: is a file, cannot create the output directory {p} under it")
    if not os.access(probe, os.W_OK | os.X_OK):
        raise PretrialError(f"{probe}: not writable, cannot create the output directory {p}")
