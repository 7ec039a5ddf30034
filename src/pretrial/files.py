"""Atomic file writes and content hashes: no reader ever sees half a file."""

from __future__ import annotations

import hashlib
import json
import os
import re
import secrets
import shutil
from pathlib import Path
from typing import Any

from pretrial.errors import PretrialError

#: Free space an output directory must have before a command starts writing into it. Measured: a checkpoint
#: holds about 0.5 kB per genome (10 kB for 20 small genomes), so a 150-genome run checkpointed 20 times stays
#: near 10 MB with its plots; the sweep directory of the shipped cart-pole plan is 1.6 MB. 64 MiB covers
#: several times either, plus the second copy an atomic write holds until its rename, and still passes on a
#: nearly full disk: it is a guard against starting with no room at all, not a size estimate.
MIN_FREE_BYTES = 64 * 2**20

#: the temporary files atomic_write_bytes creates next to their target (".NAME.RANDOM.tmp")
_TEMP_NAME = re.compile(r"\..+\.[A-Za-z0-9_]{8}\.tmp")


def _open_temp(path: Path) -> tuple[Path, int]:
    """Create a new temporary file next to ``path``, mode 0o666 less the umask (as ``open()`` would)."""
    flags = os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_CLOEXEC", 0)
    for _ in range(100):  # 32 random bits per name: a clash is already unlikely once
        tmp = path.parent / f".{path.name}.{secrets.token_hex(4)}.tmp"
        try:
            return tmp, os.open(tmp, flags, 0o666)
        except FileExistsError:
            continue
        except OSError as exc:
            raise PretrialError(f"{path.parent}: cannot write here ({exc.strerror})") from None
    raise PretrialError(f"{path.parent}: cannot create a temporary file to write {path.name}")  # pragma: no cover


def atomic_write_bytes(path: str | Path, data: bytes) -> None:
    """Write ``data`` to ``path`` through a temporary file in the same directory, then rename.

    On any failure (disk full, Ctrl-C, ...) the temporary file is removed and ``path`` keeps its
    previous content; an ``OSError`` becomes a one-line :class:`~pretrial.errors.PretrialError`.
    The new file's mode follows the umask, like a file written with ``open()``.
    """
    path = Path(path)
    tmp, fd = _open_temp(path)
    try:
        with os.fdopen(fd, "wb") as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException as exc:  # KeyboardInterrupt too: never leave the temporary file behind
        try:
            os.unlink(tmp)
        except OSError:
            pass
        if isinstance(exc, OSError):
            raise PretrialError(
                f"{path}: write failed ({exc.strerror}); the previous version, if any, is intact"
            ) from None
        raise


def remove_partial_writes(directory: str | Path) -> list[Path]:
    """Delete temporary files that an interrupted :func:`atomic_write_bytes` left in ``directory``.

    Only a process killed outright (``kill -9``, power loss) leaves one; the target file next to
    it is whole (its previous version). Returns the files removed.
    """
    removed = []
    d = Path(directory)
    if not d.is_dir():
        return removed
    for p in d.iterdir():
        if _TEMP_NAME.fullmatch(p.name) and p.is_file():
            try:
                p.unlink()
            except OSError:
                continue
            removed.append(p)
    return removed


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


def _nearest_existing(p: Path) -> Path:
    while not p.exists():
        p = p.parent
    return p


def check_creatable(path: str | Path, label: str | None = None) -> None:
    """Fail unless the directory ``path`` exists or can be created: its nearest existing ancestor
    must be a writable directory. ``label`` starts the message (default: the path)."""
    p = Path(path).resolve()
    probe = _nearest_existing(p)
    head = label or str(p)
    if not probe.is_dir():
        raise PretrialError(f"{head}: {probe} is a file, so the directory cannot be created")
    if not os.access(probe, os.W_OK | os.X_OK):
        raise PretrialError(f"{head}: {probe} is not writable")


def check_free_space(path: str | Path, minimum: int = MIN_FREE_BYTES) -> None:
    """Fail before any work starts if the disk holding ``path`` has less than ``minimum`` bytes free."""
    p = Path(path).resolve()
    probe = _nearest_existing(p)
    try:
        free = shutil.disk_usage(probe).free
    except OSError:  # pragma: no cover - a filesystem that cannot tell: let the writes decide
        return
    if free < minimum:
        raise PretrialError(
            f"{probe}: only {free / 2**20:.1f} MiB free, {minimum / 2**20:.0f} MiB needed before writing {p}; "
            "free some space or choose another directory"
        )


def check_writable_dir(path: str | Path, min_free: int = MIN_FREE_BYTES, label: str | None = None) -> None:
    """Fail before any work starts if ``path`` cannot be created or written, or the disk is (nearly) full."""
    check_creatable(path, label)
    check_free_space(path, min_free)
