"""Golden files: observation sequences and the actions the numpy policy gives for them.

An exported controller is checked on its own toolchain by replaying the golden
file through its step function. The format is plain whitespace-separated text
that C's ``fscanf`` reads; the file states it in its own header::

    # ... header lines, each starting with '#'
    pretrial-golden 1 inputs I outputs O sequences Q
    steps T
    <I observation values> <O action values>      (T lines)
    steps T
    ...
    end

The state is reset before every sequence. Numbers are Python ``repr`` (the
shortest text that reads back as exactly the same double), ``nan`` for NaN.

Observations are seeded draws of typical magnitude: per sequence a stationary
AR(1) process ``z[t] = rho z[t-1] + sqrt(1 - rho^2) e[t]`` with standard
normal ``e`` and ``z[0]`` (so every ``z[t]`` is standard normal, and
consecutive steps are correlated as a trajectory's are), mapped through the
inverse of the policy's input scaling, ``obs = offset + z / scale``, so the
network sees inputs of unit spread.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from .errors import FileFormatError
from .files import atomic_write_text

MAGIC = "pretrial-golden"
VERSION = 1
#: step-to-step correlation of the observation draws
RHO = 0.8


def golden_observations(policy: Any, sequences: int, steps: int, seed: int, float32: bool = False) -> np.ndarray:
    """Observations (sequences, steps, obs_dim) as the module docstring describes.

    ``float32=True`` rounds them to float first, so that a float export and the
    numpy policy see the same inputs.
    """
    io = policy.io
    rng = np.random.default_rng(seed)
    z = np.empty((sequences, steps, io.obs_dim))
    if steps:
        z[:, 0] = rng.standard_normal((sequences, io.obs_dim))
    for t in range(1, steps):
        z[:, t] = RHO * z[:, t - 1] + np.sqrt(1.0 - RHO**2) * rng.standard_normal((sequences, io.obs_dim))
    scale = np.array(io.obs_scale)
    spread = 1.0 / np.where(scale == 0.0, 1.0, np.abs(scale))  # an input scaled by 0: unit spread
    obs = np.array(io.obs_offset) + z * spread
    return obs.astype(np.float32).astype(float) if float32 else obs


def golden_actions(policy: Any, obs: np.ndarray) -> np.ndarray:
    """The actions (sequences, steps, action_dim) ``policy.act`` gives, sequences side by side from a reset."""
    from .policy import Policy

    fresh = Policy.from_dict(policy.to_dict())  # leave the caller's recurrent state alone
    q, t, _ = obs.shape
    out = np.empty((q, t, policy.io.action_dim))
    fresh.reset(q)
    for k in range(t):
        out[:, k] = fresh.act(obs[:, k])
    return out


def _fmt(row: list[float]) -> str:
    return " ".join(map(repr, row))


def write_golden(path: str | os.PathLike[str], obs: np.ndarray, actions: np.ndarray, about: list[str]) -> None:
    """Write a golden file atomically; ``about`` lines go into the header after the format description."""
    atomic_write_text(path, golden_text(obs, actions, about))


def golden_text(obs: np.ndarray, actions: np.ndarray, about: list[str]) -> str:
    """A golden file's text (see :func:`write_golden`)."""
    q, t, n_in = obs.shape
    n_out = actions.shape[2]
    head = [
        "pretrial golden file: observations and the actions pretrial's numpy policy (Policy.act) gives for them.",
        *about,
        "Format (whitespace separated, readable with fscanf; lines starting with '#' are this header):",
        f"  '{MAGIC} {VERSION} inputs I outputs O sequences Q', then per sequence 'steps T' and T lines of",
        "  I observation values followed by O action values; the last line is 'end'.",
        "  Reset the policy state before each sequence. Numbers read back exactly (shortest round-trip text).",
        f"Observations: per sequence a stationary AR(1) process z[t] = {RHO} z[t-1] + sqrt(1 - {RHO}^2) e[t],",
        "  e and z[0] standard normal, mapped to obs = offset + z / scale (the policy's input scaling),",
        "  so the network sees inputs of unit spread.",
    ]
    lines = [f"# {line}".rstrip() for line in head]
    lines.append(f"{MAGIC} {VERSION} inputs {n_in} outputs {n_out} sequences {q}")
    rows = np.concatenate([obs, actions], axis=2).tolist()
    for seq in rows:
        lines.append(f"steps {t}")
        lines.extend(_fmt(r) for r in seq)
    lines.append("end")
    return "\n".join(lines) + "\n"


@dataclass(frozen=True)
class Golden:
    """A golden file's content: per sequence (steps, inputs) observations and (steps, outputs) actions."""

    observations: list[np.ndarray]
    actions: list[np.ndarray]


def read_golden(path: str | os.PathLike[str]) -> Golden:
    """Read a golden file (FileFormatError naming the file if it is not one)."""
    name = str(path)
    try:
        text = Path(path).read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise FileFormatError(f"{name}: cannot read ({exc})") from None
    words = [w for line in text.splitlines() if not line.startswith("#") for w in line.split()]
    try:
        if words[:2] != [MAGIC, str(VERSION)] or words[2] != "inputs" or words[4] != "outputs" \
                or words[6] != "sequences":
            raise ValueError("bad first data line")
        n_in, n_out, q = int(words[3]), int(words[5]), int(words[7])
        at, obs, act = 8, [], []
        for _ in range(q):
            if words[at] != "steps":
                raise ValueError("missing 'steps' line")
            t = int(words[at + 1])
            at += 2
            block = np.array([float(v) for v in words[at : at + t * (n_in + n_out)]]).reshape(t, n_in + n_out)
            at += t * (n_in + n_out)
            obs.append(block[:, :n_in])
            act.append(block[:, n_in:])
        if words[at:] != ["end"]:
            raise ValueError("missing 'end' line or extra data")
    except (IndexError, ValueError) as exc:
        raise FileFormatError(f"{name}: not a usable golden file ({exc}); truncated or damaged") from None
    return Golden(obs, act)
