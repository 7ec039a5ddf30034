"""Sweep results: the ``results.json`` document (schema "pretrial.sweep" version 1), typed, read and written.

The document is plain JSON (no clock times or paths, so a rerun gives an equal file) with a
content hash over the rest; :func:`read_results` refuses an edited, damaged or foreign file.
:class:`SweepResults` is the typed view the Python API returns.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from pretrial.errors import InputError
from pretrial.files import canonical_json, sha256_hex, write_json

SCHEMA = "pretrial.sweep"


SCHEMA_VERSION = 1


def _no_constant(text: str) -> Any:
    raise ValueError(f"{text} is not a number a results file may hold (written with allow_nan=False)")


def _is_int(v: Any) -> bool:
    return isinstance(v, int) and not isinstance(v, bool)


def _is_number(v: Any) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool)


def _is_dict_or_none(v: Any) -> bool:
    return v is None or isinstance(v, dict)


def _is_list_or_none(v: Any) -> bool:
    return v is None or isinstance(v, list)


#: top-level keys of results.json (schema version 1, README "results.json") -> (check, what it must be)
_RESULTS_KEYS: dict[str, tuple[Any, str]] = {
    "policy": (lambda v: isinstance(v, dict), "an object"),
    "env": (lambda v: isinstance(v, dict), "an object"),
    "plan": (lambda v: isinstance(v, dict), "an object"),
    "seed": (_is_int, "a whole number"),
    "required_success_rate": (_is_number, "a number"),
    "episodes_per_point": (_is_int, "a whole number"),
    "margins": (_is_list_or_none, "a list or null"),
    "montecarlo": (_is_dict_or_none, "an object or null"),
    "worstcase": (_is_dict_or_none, "an object or null"),
    "sensitivity": (_is_dict_or_none, "an object or null"),
    "success_map": (_is_dict_or_none, "an object or null"),
    "linear": (_is_list_or_none, "a list or null"),
    "linear_sampled": (_is_list_or_none, "a list or null"),
    "linear_details": (_is_dict_or_none, "an object or null"),
    "integrator_check": (_is_dict_or_none, "an object or null"),
    "diverged": (_is_dict_or_none, "an object or null"),
    "requirements": (lambda v: isinstance(v, list), "a list"),
    "verdict": (lambda v: v in ("pass", "fail"), '"pass" or "fail"'),
    "baseline": (_is_dict_or_none, "an object or null"),
    "cautions": (lambda v: isinstance(v, list) and all(isinstance(c, str) for c in v), "a list of text"),
    "content_sha256": (lambda v: isinstance(v, str), "text (a SHA-256)"),
}


def stream_version(doc: dict[str, Any]) -> int:
    """The noise-stream version a results document was made with (1 when it does not say: older files)."""
    return int(doc.get("stream_version", 1))


def _check_results_schema(p: Path, doc: dict[str, Any]) -> None:
    """Refuse a results document of another schema version, or missing a top-level key or of the wrong type."""
    from pretrial.sim.streams import STREAM_VERSIONS

    version = doc.get("schema_version")
    if not _is_int(version) or version != SCHEMA_VERSION:
        raise InputError(f"{p}: schema_version {version!r} is not one this pretrial reads ({SCHEMA_VERSION})")
    streams = doc.get("stream_version", 1)  # optional: files made before it was recorded used version 1
    if not _is_int(streams) or streams not in STREAM_VERSIONS:
        raise InputError(f"{p}: 'stream_version' {streams!r} is not one this pretrial knows "
                         f"({', '.join(map(str, STREAM_VERSIONS))})")
    for key, (ok, what) in _RESULTS_KEYS.items():
        if key not in doc:
            raise InputError(f"{p}: not a complete sweep results file ('{key}' is missing)")
        if not ok(doc[key]):
            raise InputError(f"{p}: '{key}' must be {what}, not {type(doc[key]).__name__}")


def read_results(path: str | Path) -> dict[str, Any]:
    """Read a results.json back, refusing an edited or damaged file."""
    p = Path(path)
    try:
        doc = json.loads(p.read_text(encoding="utf-8"), parse_constant=_no_constant)
    except FileNotFoundError:
        raise InputError(f"{p}: no such file") from None
    except (OSError, UnicodeDecodeError, ValueError, RecursionError) as exc:  # ValueError: bad JSON, NaN, huge ints
        raise InputError(f"{p}: not a readable results file ({exc})") from None
    if not isinstance(doc, dict) or doc.get("schema") != SCHEMA:
        raise InputError(f"{p}: not a pretrial sweep results file")
    _check_results_schema(p, doc)  # before the hash: anyone can compute a hash over a made-up file
    stored = doc.pop("content_sha256", None)
    if stored != sha256_hex(canonical_json(doc)):
        raise InputError(f"{p}: content hash mismatch: the file was edited or damaged")
    doc["content_sha256"] = stored
    return doc


def seal(doc: dict[str, Any]) -> dict[str, Any]:
    """``doc`` as plain JSON values with its ``content_sha256`` over the rest (what :func:`read_results` checks)."""
    from pretrial.console import jsonable

    plain = jsonable({k: v for k, v in doc.items() if k != "content_sha256"})
    plain["content_sha256"] = sha256_hex(canonical_json(plain))
    return plain


def write_results(path: str | Path, doc: dict[str, Any]) -> None:
    """Write a sealed results document atomically (the pair of :func:`read_results`)."""
    stored = doc.get("content_sha256")
    if stored is None or stored != sha256_hex(canonical_json({k: v for k, v in doc.items() if k != "content_sha256"})):
        raise ValueError("results document is not sealed (see seal())")
    write_json(path, doc)


@dataclass(frozen=True)
class Requirement:
    """One requirement of the plan as the verdict judged it.

    ``passed`` is None for a row that does not apply (a linear check on a recurrent controller);
    ``interval`` is the Wilson 95% interval of a rate.
    """

    name: str
    required: Any
    measured: Any
    passed: bool | None
    interval: tuple[float, float] | None = None

    @classmethod
    def from_dict(cls, row: dict[str, Any]) -> Requirement:
        ci = row.get("interval")
        return cls(row["name"], row.get("required"), row.get("measured"), row.get("pass"),
                   tuple(ci) if ci else None)  # type: ignore[arg-type]


@dataclass
class SweepResults:
    """A sweep's results: the ``results.json`` document with typed access to what is read most.

    Attributes
    ----------
    doc : dict
        The whole document (schema "pretrial.sweep" version 1; README "results.json").
    directory : Path or None
        The sweep directory, when the results were written to one.
    """

    doc: dict[str, Any]
    directory: Path | None = None

    @classmethod
    def read(cls, path: str | Path) -> SweepResults:
        """Read ``results.json`` (or the sweep directory holding it), refusing an edited or foreign file."""
        p = Path(path)
        file = p / "results.json" if p.is_dir() else p
        return cls(read_results(file), file.parent)

    @property
    def verdict(self) -> str:
        """``"pass"`` or ``"fail"``."""
        return str(self.doc["verdict"])

    @property
    def passed(self) -> bool:
        """Whether every requirement of the plan was met."""
        return self.verdict == "pass"

    @property
    def requirements(self) -> list[Requirement]:
        """Every requirement row, in the plan's order."""
        return [Requirement.from_dict(r) for r in self.doc.get("requirements") or []]

    @property
    def failing(self) -> list[str]:
        """Names of the requirements not met."""
        return [r.name for r in self.requirements if r.passed is False]

    @property
    def plan_hash(self) -> str:
        """SHA-256 of the plan as resolved: sweeps with equal hashes ran the same plan."""
        return str(self.doc["plan"]["content_sha256"])

    @property
    def montecarlo_success_rate(self) -> float | None:
        """The Monte Carlo success rate, or None when the plan ran no Monte Carlo."""
        mc = self.doc.get("montecarlo")
        return None if not mc else float(mc["success_rate"])

    @property
    def baseline(self) -> dict[str, Any] | None:
        """The LQR baseline's part of the document, when the sweep ran it."""
        return self.doc.get("baseline")

    def __getitem__(self, key: str) -> Any:
        return self.doc[key]
