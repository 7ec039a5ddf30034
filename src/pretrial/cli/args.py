"""Argument types and parsers shared by the commands (argparse only; no domain logic)."""

from __future__ import annotations

import argparse
from collections.abc import Callable, Sequence
from typing import Any

from pretrial.errors import InputError


def parse_literal(text: str) -> Any:
    """Value of a ``NAME=VALUE`` option: bool, int, float or string."""
    low = text.strip().lower()
    if low in ("true", "false"):
        return low == "true"
    for cast in (int, float):
        try:
            return cast(text)
        except ValueError:
            pass
    return text


def parse_assignments(items: Sequence[str] | None, flag: str) -> dict[str, Any]:
    """``["a=1", "b=x"]`` -> ``{"a": 1, "b": "x"}``; InputError naming the flag otherwise."""
    out: dict[str, Any] = {}
    for item in items or ():
        name, sep, value = item.partition("=")
        if not sep or not name.strip() or not value.strip():
            raise InputError(f"{flag} {item!r}: expected NAME=VALUE")
        if name.strip() in out:  # the later one would win without a word
            raise InputError(f"{flag} {item!r}: {name.strip()} is given twice")
        out[name.strip()] = parse_literal(value.strip())
    return out


def whole(text: str, minimum: int) -> int:
    try:
        n = int(text)
    except ValueError:
        n = minimum - 1
    if n < minimum:
        raise argparse.ArgumentTypeError(f"{text!r}: expected a whole number >= {minimum}")
    return n


def workers_arg(text: str) -> int | str:
    try:
        return text if text == "auto" else whole(text, 1)
    except argparse.ArgumentTypeError:
        raise argparse.ArgumentTypeError(f"{text!r}: expected 'auto' or a whole number >= 1") from None


def limit_arg(name: str) -> Callable[[str], Any]:
    """An argparse ``type`` for the quantity ``name`` of :mod:`pretrial.limits` (the same range as in files).

    The table is looked up when a value is parsed: it imports the env core, which ``--help`` does not need.
    """

    def parse(text: str) -> Any:
        from pretrial import limits
        limit = getattr(limits, name)
        try:
            value: Any = int(text) if limit.whole else float(text)
        except ValueError:
            value = text
        try:
            return limit.check(value)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{text!r}: expected {limit.allowed()}") from None

    return parse
