"""The run directory: its files written and read back, each checked, with one line naming what is wrong.

What a run keeps: ``config.resolved.toml``, ``neat.ini``, ``manifest.json`` (versions, seed,
command, checkpoint hashes), ``history.csv``, ``timing.csv``, ``checkpoints/``, ``plots/`` and
``champion.json``. On ``--resume`` every file is read and checked before anything is written.
"""

from __future__ import annotations

import csv
import json
import math
from dataclasses import dataclass, fields
from pathlib import Path
from typing import Any

from pretrial.errors import FileFormatError
from pretrial.evolution import checkpoint
from pretrial.version import __version__

HISTORY_FIELDS = ("generation", "evaluations", "best", "mean", "stdev", "species", "best_nodes", "best_connections")


def neat_config_at(path: Path):
    import neat

    return neat.Config(neat.DefaultGenome, neat.DefaultReproduction, neat.DefaultSpeciesSet,
                       neat.DefaultStagnation, str(path))


@dataclass
class RunState:
    """What a checkpoint holds: enough to continue exactly where the run was."""

    generation: int
    population: dict
    species: Any
    reproduction: Any
    node_indexer_next: int | None
    history: list[dict[str, Any]]
    species_sizes: list[dict[int, int]]
    hall: list[Any]  # best genomes ever seen (deep copies), best first
    evaluations: int
    finished: bool = False


def _one_line(exc: BaseException) -> str:
    return " ".join(str(exc).split()) or type(exc).__name__


def read_manifest(path: Path, checkpoints: Path) -> dict[str, Any]:
    """The run's manifest.json: a JSON object whose ``checkpoints`` maps ``generation-N.pkl`` to a SHA-256."""
    try:
        manifest = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError, RecursionError) as exc:  # ValueError: bad JSON or UTF-8
        raise FileFormatError(f"{path}: unreadable ({_one_line(exc)})") from None
    if not isinstance(manifest, dict):
        raise FileFormatError(f"{path}: not a run manifest (a JSON object is expected, not "
                              f"{type(manifest).__name__})")
    recorded = manifest.setdefault("checkpoints", {})
    if not isinstance(recorded, dict):
        raise FileFormatError(f"{path}: 'checkpoints' must map checkpoint file names to SHA-256 hashes")
    for name, digest in recorded.items():
        checkpoint.recorded_path(checkpoints, name, path)
        if not (isinstance(digest, str) and len(digest) == 64 and all(c in "0123456789abcdef" for c in digest)):
            raise FileFormatError(f"{path}: checkpoints: {name}: {digest!r} is not a SHA-256 hash (64 hex digits)")
    return manifest


def read_neat_ini(path: Path) -> Any:
    """The run's neat.ini as a ``neat.Config``."""
    try:
        return neat_config_at(path)
    except Exception as exc:  # neat-python raises bare Exception, RuntimeError, configparser and value errors
        raise FileFormatError(f"{path}: damaged neat-python settings ({_one_line(exc)})") from None


def run_state_from(state: Any, path: Path) -> RunState:
    """A loaded checkpoint's state as a RunState (refusing one written by another pretrial version)."""
    names = {f.name for f in fields(RunState)}
    if not isinstance(state, dict) or not set(state) <= names or "generation" not in state:
        raise FileFormatError(f"{path}: not a checkpoint of this pretrial version ({__version__})")
    try:
        return RunState(**state)
    except TypeError as exc:
        raise FileFormatError(f"{path}: not a checkpoint of this pretrial version ({_one_line(exc)})") from None


def read_timing(path: Path, generation: int) -> list[dict[str, str]]:
    """timing.csv rows of the generations before ``generation`` (those the checkpoint holds); none if absent."""
    if not path.exists():
        return []
    hint = "it only records seconds per generation: delete it to resume without the earlier timings"
    try:
        with open(path, newline="", encoding="utf-8") as f:
            reader = csv.DictReader(f)
            if reader.fieldnames != ["generation", "seconds"]:
                raise ValueError(f"header {reader.fieldnames} is not generation,seconds")
            rows = [_timing_row(r, reader.line_num) for r in reader]
    except (OSError, ValueError, csv.Error) as exc:  # ValueError: bad UTF-8 or a bad row
        raise FileFormatError(f"{path}: damaged ({_one_line(exc)}); {hint}") from None
    return [r for r in rows if int(r["generation"]) < generation]


def _timing_row(row: dict[Any, Any], line: int) -> dict[str, str]:
    if None in row or None in row.values():
        raise ValueError(f"line {line}: expected 2 fields")
    if not (row["generation"].isascii() and row["generation"].isdigit()):
        raise ValueError(f"line {line}: generation {row['generation']!r} is not a whole number")
    try:
        seconds = float(row["seconds"])
    except ValueError:
        seconds = float("nan")
    if not (math.isfinite(seconds) and seconds >= 0):
        raise ValueError(f"line {line}: seconds {row['seconds']!r} is not a duration")
    return row


#: config keys a resume may change: they decide how long and where, not what the run computes
RESUME_MAY_CHANGE = frozenset({"run.generations", "run.checkpoint_every", "run.workers", "run.dask"})


def flat_keys(table: dict[str, Any], prefix: str = "") -> dict[str, Any]:
    out: dict[str, Any] = {}
    for k, v in table.items():
        if isinstance(v, dict):
            out.update(flat_keys(v, f"{prefix}{k}."))
        else:
            out[f"{prefix}{k}"] = v
    return out
