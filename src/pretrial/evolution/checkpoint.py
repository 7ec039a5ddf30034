"""Checkpoints of an evolution run: neat-python's objects, pickled, hashed.

neat-python's genomes, species and innovation tracker are plain Python objects
with no other serialization, so checkpoints are pickles. A pickle can run code
when loaded, so checkpoints are trusted local files only: each one's SHA-256 is
recorded in the run's ``manifest.json`` when written, and :func:`load` refuses a
file whose hash does not match. They are only ever loaded from a run directory
the user names with ``--resume``, by a name of the form ``generation-N.pkl``
inside its ``checkpoints/`` (:func:`recorded_path`: a manifest cannot point
elsewhere), and only as a plain file (no symlink); nothing shareable
(policies, results) is a pickle.
"""

from __future__ import annotations

import copyreg
import io
import itertools
import os
import pickle
import re
import stat
from pathlib import Path
from typing import Any

from pretrial.errors import FileFormatError
from pretrial.files import atomic_write_bytes, sha256_hex

FORMAT = "pretrial-checkpoint-1"
#: the only checkpoint file names: a manifest key of any other form is refused (``../x.pkl``, ``/tmp/x``)
_NAME = re.compile(r"generation-(0|[1-9][0-9]{0,17})\.pkl")


def file_name(generation: int) -> str:
    """The checkpoint file name of a generation (``generation-N.pkl``)."""
    return f"generation-{generation}.pkl"


def generation_of(name: object) -> int:
    """The generation a checkpoint file name records (ValueError for any other name)."""
    m = _NAME.fullmatch(name) if isinstance(name, str) else None
    if m is None:
        raise ValueError(f"{name!r} is not a checkpoint file name (generation-N.pkl)")
    return int(m.group(1))


def recorded_path(directory: str | Path, name: object, manifest: str | Path) -> Path:
    """The file in ``directory`` that a manifest key names, refusing any name but ``generation-N.pkl``.

    Raises
    ------
    FileFormatError
        Naming the manifest and the key: a path, a name with a directory part, or any other name.
    """
    try:
        generation_of(name)
    except ValueError:
        raise FileFormatError(
            f"{manifest}: checkpoint key {name!r} is not a file name of the form generation-N.pkl; refusing to "
            "load a checkpoint from anywhere but the run's checkpoints/ directory"
        ) from None
    return Path(directory) / str(name)


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
    data = _read_plain_file(path)
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


def _read_plain_file(path: Path) -> bytes:
    """The bytes of a regular file, refusing a symlink (not followed) or a device, pipe or directory."""
    try:
        fd = os.open(path, os.O_RDONLY | getattr(os, "O_NOFOLLOW", 0) | getattr(os, "O_NONBLOCK", 0))
    except OSError as exc:
        if path.is_symlink():  # O_NOFOLLOW on a symlink: ELOOP
            raise FileFormatError(f"{path}: a symlink; a checkpoint is loaded only from a plain file") from None
        raise FileFormatError(f"{path}: cannot read checkpoint ({exc.strerror})") from None
    with os.fdopen(fd, "rb") as f:
        if not stat.S_ISREG(os.fstat(f.fileno()).st_mode):
            raise FileFormatError(f"{path}: not a plain file; a checkpoint is loaded only from a plain file")
        try:
            return f.read()
        except OSError as exc:
            raise FileFormatError(f"{path}: cannot read checkpoint ({exc.strerror})") from None
