"""The ``pretrial replay`` command line that reproduces an episode: one builder for replays, sweeps and reports."""

from __future__ import annotations

import shlex
from collections.abc import Mapping
from typing import Any


def replay_command(policy: str, *, plan: str | None = None, env: str | None = None,
                   options: Mapping[str, Any] | None = None, settings: Mapping[str, Any] | None = None,
                   seed: int = 0, episodes: int = 1, start: str | None = None, stream_version: int = 1) -> str:
    """The ``pretrial replay`` line for these words.

    ``pretrial replay POLICY [--plan P] [--env E] [--option k=v ...] [--set k=v ...] --seed S --episodes K
    [--start X] [--stream-version V]``.

    Every word is shell-quoted (:func:`shlex.join`), so the line pastes into a shell as it is
    whatever the paths hold; numbers are written exactly (``repr``), so the replay runs at the
    very values reported.
    """
    words = ["pretrial", "replay", str(policy)]
    if plan:
        words += ["--plan", str(plan)]
    if env:
        words += ["--env", env]
    for k, v in (options or {}).items():
        words += ["--option", f"{k}={v}"]
    for k, v in (settings or {}).items():
        words += ["--set", f"{k}={float(v)!r}" if isinstance(v, (int, float)) and not isinstance(v, bool)
                  else f"{k}={v!r}"]
    words += ["--seed", str(int(seed)), "--episodes", str(int(episodes))]
    if start is not None:
        words += ["--start", start]
    if stream_version != 1:  # a command without it replays version 1's draws
        words += ["--stream-version", str(int(stream_version))]
    return shlex.join(words)
