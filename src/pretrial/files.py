"""Output files and directories: atomic writes, content hashes, and the checks made before any work.

No reader ever sees half a file; a command refuses an output it could not write (or would
replace) before it starts, and builds a directory in a hidden sibling renamed into place.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import secrets
import shutil
import tempfile
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import Any

from pretrial.errors import InputError, PretrialError

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


@contextmanager
def staged(out: Path) -> Iterator[Path]:
    """A hidden sibling of ``out`` (``.NAME.partial-*``) to write an output directory into.

    The caller renames it into place when everything is written (:func:`move_into_place`); on
    any error or Ctrl-C before that it is removed, so no partial directory is ever left behind
    (only ``kill -9`` can leave the hidden one).
    """
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.partial-", dir=out.parent))
    try:
        tmp.chmod(0o777 & ~_umask())  # mkdtemp makes it 0700; the output follows the umask like mkdir
        yield tmp
    finally:
        shutil.rmtree(tmp, ignore_errors=True)  # gone already once renamed into place


def _umask() -> int:
    """The process umask (read by setting it, then restoring it at once)."""
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def move_into_place(stage: Path, out: Path) -> None:
    """Rename the finished ``stage`` (:func:`staged`) to ``out``, which is absent or an empty directory."""
    if out.exists():
        out.rmdir()  # empty (checked before the work started)
    os.replace(stage, out)


def check_new_dir(out: Path, label: str = "--out") -> None:
    """Refuse, before any work, an output directory that exists with content or cannot be written."""
    if out.exists() and (not out.is_dir() or any(out.iterdir())):
        what = "a file" if not out.is_dir() else "a directory that is not empty"
        raise InputError(f"{label} {out}: is {what}; choose a new directory (nothing is overwritten)")
    check_writable_dir(out, label=f"{label} {out}")  # found out now, not after the work


def same_file(a: Path, b: Path) -> bool:
    """Whether two paths name one file: the same path once symlinks are resolved, or the same inode (a hard link)."""
    if a.resolve() == b.resolve():
        return True
    try:
        return a.samefile(b)
    except OSError:  # one of them does not exist
        return False


def check_output_file(path: str, flag: str, inputs: Sequence[Path] = (), force: bool = False) -> None:
    """Refuse, before any work, an output path that cannot be written or would replace a file.

    An input (the policy, the plan) is never replaced; another existing file only with ``force``.
    """
    p = Path(path)
    for source in inputs:
        if same_file(p, source):
            raise InputError(f"{flag} {path}: is an input of this command ({source}); write the output elsewhere")
    if p.is_dir():
        raise InputError(f"{flag} {path}: is a directory")
    if (p.exists() or p.is_symlink()) and not force:
        raise InputError(f"{flag} {path}: already exists; pick another name or add --force to replace it")
    parent = p.parent if str(p.parent) else Path(".")
    if not parent.is_dir():
        raise InputError(f"{flag} {path}: directory {parent} does not exist")
    if not os.access(parent, os.W_OK | os.X_OK):
        raise InputError(f"{flag} {path}: directory {parent} is not writable")
