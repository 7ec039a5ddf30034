"""TOML files: read with one-line errors naming the file and key, written with tomli-w.

Run configs and sweep plans share the reader (:class:`TableReader` pops typed keys and names
the leftovers); everything pretrial writes as TOML goes through :func:`dump_toml`.
"""

from __future__ import annotations

import difflib
import math
import tomllib
from pathlib import Path
from typing import Any

import tomli_w

from pretrial.errors import InputError
from pretrial_envs.core import Limit


class TableReader:
    """Pops typed keys from one TOML table and reports the leftovers."""

    def __init__(self, path: str, prefix: str, table: Any):
        self.path = path
        self.prefix = prefix
        if not isinstance(table, dict):
            self.fail(prefix, f"expected a table, got {kind_name(table)}")
        self.table = dict(table)
        self.known: list[str] = []

    def fail(self, key: str, message: str) -> None:
        raise InputError(f"{self.path}: {key}: {message}")

    def key(self, name: str) -> str:
        return f"{self.prefix}.{name}" if self.prefix else name

    def take(self, name: str, kind: type | tuple[type, ...], default: Any = ..., check=None, allowed: str = "",
             limit: Limit | None = None) -> Any:
        """Pop ``name`` as ``kind``; ``check``/``allowed`` or a ``limit`` row (:mod:`pretrial.limits`) bound it."""
        self.known.append(name)
        if name not in self.table:
            if default is ...:
                # a misspelt required key is more likely than a forgotten one: name it
                close = difflib.get_close_matches(name, [str(k) for k in self.table], n=1)
                if close:
                    self.fail(self.key(close[0]), f"unknown key (did you mean {name!r}?)")
                self.fail(self.key(name), f"missing ({allowed or 'required'})")
            return default
        value = self.table.pop(name)
        kinds = kind if isinstance(kind, tuple) else (kind,)
        ok = isinstance(value, kinds) and not (isinstance(value, bool) and bool not in kinds)
        if float in kinds and isinstance(value, int) and not isinstance(value, bool):
            value, ok = float(value), True
        if not ok:
            names = " or ".join(TYPE_NAMES.get(k, k.__name__) for k in kinds)
            self.fail(self.key(name), f"expected {names}, got {kind_name(value)} {value!r}")
        if isinstance(value, float) and not math.isfinite(value):
            self.fail(self.key(name), f"{value!r} is not a finite number")
        if check is not None and not check(value):
            self.fail(self.key(name), f"{value!r} not allowed ({allowed})")
        if limit is not None:
            try:
                value = limit.check(value, self.key(name))
            except ValueError as exc:
                raise InputError(f"{self.path}: {exc}") from None
        return value

    def table_of(self, name: str) -> dict[str, Any]:
        self.known.append(name)
        value = self.table.pop(name, {})
        if not isinstance(value, dict):
            self.fail(self.key(name), f"expected a table, got {kind_name(value)}")
        return value

    def finish(self) -> None:
        for extra in self.table:
            near = difflib.get_close_matches(extra, self.known, n=1)
            hint = f" (did you mean {self.key(near[0])!r}?)" if near else ""
            valid = ", ".join(self.known)
            self.fail(self.key(extra), f"unknown key{hint}; valid keys here: {valid}")


TYPE_NAMES = {
    int: "an integer", float: "a number", str: "a string", bool: "true/false", list: "a list", dict: "a table",
}


def channel_items(table: dict[str, Any]) -> list[tuple[str, Any]]:
    """``(name, value)`` pairs of a table of varied names, ``NAME.CHANNEL`` forms flattened.

    A quoted key ``"sensor_noise_std.theta"`` arrives as one name; written
    unquoted, TOML reads it as a table ``sensor_noise_std = {theta = ...}``,
    which is taken to mean the same.
    """
    out: list[tuple[str, Any]] = []
    for name, value in table.items():
        if isinstance(value, dict):
            out.extend((f"{name}.{channel}", v) for channel, v in value.items())
        else:
            out.append((name, value))
    return out


def kind_name(value: Any) -> str:
    return {bool: "boolean", int: "integer", float: "number", str: "string", list: "list", dict: "table"}.get(
        type(value), type(value).__name__
    )


def read_toml(path: str | Path) -> tuple[dict[str, Any], str]:
    """Parse a TOML file; InputError naming the file for anything unreadable."""
    p = Path(path)
    if not p.exists():
        raise InputError(f"{p}: no such file")
    if p.is_dir():
        raise InputError(f"{p}: is a directory, expected a TOML file")
    try:
        raw = p.read_bytes()
        text = raw.decode("utf-8")
    except UnicodeDecodeError:
        raise InputError(f"{p}: not a text file (expected UTF-8 TOML)") from None
    except OSError as exc:
        raise InputError(f"{p}: cannot read ({exc.strerror})") from None
    if not text.strip():
        raise InputError(f"{p}: file is empty (expected a TOML config)")
    try:
        return tomllib.loads(text), text
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{p}: malformed TOML: {exc}") from None
    except RecursionError:  # Python 3.11's tomllib recurses once per nested array or inline table
        raise InputError(f"{p}: malformed TOML: arrays or inline tables nested too deeply") from None


def _plain(value: Any) -> Any:
    """``value`` as tomli-w writes it: tuples as lists, None-valued keys left out (TOML has no null)."""
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items() if v is not None}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    return value


def dump_toml(data: dict[str, Any]) -> str:
    """``data`` (nested tables of scalars and lists) as TOML text; keys whose value is None are left out."""
    return tomli_w.dumps(_plain(data))
