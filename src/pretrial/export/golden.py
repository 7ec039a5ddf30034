"""Golden files: observation sequences and the actions and fault codes pretrial gives for them.

An exported controller is checked on its own toolchain by replaying the golden
file through its step function. The format is plain whitespace-separated text
that C's ``fscanf`` reads; the file states it in its own header::

    # ... header lines, each starting with '#'
    pretrial-golden 2 inputs I outputs O sequences Q
    steps T
    <I observation values> <O action values> <fault code>      (T lines)
    steps T
    ...
    end

The state is reset before every sequence. Numbers are Python ``repr`` (the
shortest text that reads back as exactly the same double), ``nan``/``inf``/
``-inf`` for the non-finite ones; the fault code is a whole number.

Expected values (:func:`golden_steps`): the numpy policy's actions
(:meth:`pretrial.controller.policy.Policy.act`) and code 0; where an observation value is
NaN or infinite, the safe action and code 1; where a network output is, the
safe action and code 2. A fault leaves the recurrent state as it was, so the
later actions of a sequence are those of the sequence without its fault steps.

Observations are seeded draws of typical magnitude: per sequence a stationary
AR(1) process ``z[t] = rho z[t-1] + sqrt(1 - rho^2) e[t]`` with standard
normal ``e`` and ``z[0]`` (so every ``z[t]`` is standard normal, and
consecutive steps are correlated as a trajectory's are), mapped through the
inverse of the policy's input scaling, ``obs = offset + z / scale``, so the
network sees inputs of unit spread. After them come three fault sequences
(:func:`fault_observations`): NaN, +inf and -inf put into each observation
element in turn, then into all of them, between finite steps.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from pretrial.errors import FileFormatError
from pretrial.files import atomic_write_text

MAGIC = "pretrial-golden"
VERSION = 2
#: step-to-step correlation of the observation draws
RHO = 0.8
#: the non-finite values of the fault sequences, in file order
FAULT_VALUES = (np.nan, np.inf, -np.inf)


def golden_observations(policy: Any, sequences: int, steps: int, seed: int, float32: bool = False) -> np.ndarray:
    """Observations (sequences, steps, obs_dim) as the module docstring describes.

    ``float32=True`` rounds them to float first, so that a float export and the
    numpy policy see the same inputs.
    """
    return _draws(policy, np.random.default_rng(seed), sequences, steps, float32)


def _draws(policy: Any, rng: np.random.Generator, sequences: int, steps: int, float32: bool) -> np.ndarray:
    io = policy.io
    z = np.empty((sequences, steps, io.obs_dim))
    if steps:
        z[:, 0] = rng.standard_normal((sequences, io.obs_dim))
    for t in range(1, steps):
        z[:, t] = RHO * z[:, t - 1] + np.sqrt(1.0 - RHO**2) * rng.standard_normal((sequences, io.obs_dim))
    scale = np.array(io.obs_scale)
    spread = 1.0 / np.where(scale == 0.0, 1.0, np.abs(scale))  # an input scaled by 0: unit spread
    obs = np.array(io.obs_offset) + z * spread
    return obs.astype(np.float32).astype(float) if float32 else obs


def fault_observations(policy: Any, seed: int, float32: bool = False) -> list[np.ndarray]:
    """One sequence (2 obs_dim + 3, obs_dim) per value of :data:`FAULT_VALUES`.

    Finite AR(1) draws as :func:`golden_observations` (their own stream of
    ``seed``); odd step 2i + 1 has element i replaced by the value, step
    2 obs_dim + 1 every element; the even steps stay finite, so each fault
    is followed by a step that shows whether the state was kept.
    """
    n = policy.io.obs_dim
    draws = _draws(policy, np.random.default_rng([seed, 1]), len(FAULT_VALUES), 2 * n + 3, float32)
    rows = np.arange(n)
    for seq, value in zip(draws, FAULT_VALUES, strict=True):
        seq[2 * rows + 1, rows] = value
        seq[2 * n + 1] = value
    return list(draws)


def _fresh(policy: Any, batch: int) -> Any:
    from pretrial.controller.policy import Policy

    fresh = Policy.from_dict(policy.to_dict())  # leave the caller's recurrent state alone
    fresh.reset(batch)
    return fresh


def _raw_step(policy: Any, obs: np.ndarray) -> np.ndarray:
    """Raw network outputs (B, blocks * num_outputs) for observations (B, obs_dim); advances the state."""
    with np.errstate(all="ignore"):  # NaN and inf are expected here: they are what the guard reports
        raw = policy.network.activate(policy.io.network_inputs(obs))
    return raw.reshape(obs.shape[0], -1)


def _replayed(policy: Any, kept: list[np.ndarray]) -> Any:
    """A policy of batch 1 whose state is that after the steps ``kept`` (the state a fault keeps)."""
    fresh = _fresh(policy, 1)
    for row in kept:
        _raw_step(fresh, row[None])
    return fresh


def _one_sequence(policy: Any, obs: np.ndarray, safe: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Actions and codes of one sequence (T, obs_dim), restoring the state after every fault."""
    t = obs.shape[0]
    actions, codes = np.empty((t, policy.io.action_dim)), np.zeros(t, dtype=np.int64)
    current, kept = _fresh(policy, 1), []
    for k, row in enumerate(obs):
        if not np.isfinite(row).all():
            actions[k], codes[k] = safe, 1
            continue
        raw = _raw_step(current, row[None])
        if not np.isfinite(raw).all():
            actions[k], codes[k] = safe, 2
            current = _replayed(policy, kept)
            continue
        kept.append(row)
        actions[k] = current.io.actions(raw.reshape(policy.io.blocks, -1))[0]
    return actions, codes


def golden_steps(policy: Any, obs: np.ndarray, safe_action: Any = None) -> tuple[np.ndarray, np.ndarray]:
    """Actions (Q, T, action_dim) and fault codes (Q, T) for observations (Q, T, obs_dim), each sequence from a reset.

    The numpy policy's actions and code 0; the safe action (default zeros)
    and code 1 where an observation value is NaN or infinite, code 2 where a
    network output is; a fault leaves the recurrent state as it was.
    Sequences run side by side; a recurrent policy's sequences with a fault
    are run again one by one, with the state restored after each fault.
    """
    q, t, _ = obs.shape
    io = policy.io
    safe = np.zeros(io.action_dim) if safe_action is None else np.asarray(safe_action, dtype=float)
    fresh = _fresh(policy, q)
    actions, raw_ok = np.empty((q, t, io.action_dim)), np.ones((q, t), dtype=bool)
    for k in range(t):
        raw = _raw_step(fresh, obs[:, k])
        raw_ok[:, k] = np.isfinite(raw).all(axis=1)
        actions[:, k] = io.actions(raw.reshape(q * io.blocks, -1))
    obs_ok = np.isfinite(obs).all(axis=2)
    codes = np.where(obs_ok, np.where(raw_ok, 0, 2), 1)
    actions[codes != 0] = safe
    if not policy.feed_forward:  # a fault's state was advanced above: redo those sequences exactly
        for s in np.flatnonzero((codes != 0).any(axis=1)).tolist():
            actions[s], codes[s] = _one_sequence(policy, obs[s], safe)
    return actions, codes


def golden_actions(policy: Any, obs: np.ndarray, safe_action: Any = None) -> np.ndarray:
    """The actions of :func:`golden_steps` alone (finite observations: what ``policy.act`` gives)."""
    return golden_steps(policy, obs, safe_action)[0]


def _fmt(row: list[float]) -> str:
    return " ".join(map(repr, row))


def write_golden(path: str | os.PathLike[str], obs: Any, actions: Any, codes: Any, about: list[str]) -> None:
    """Write a golden file atomically; ``about`` lines go into the header after the format description."""
    atomic_write_text(path, golden_text(obs, actions, codes, about))


def golden_text(obs: Any, actions: Any, codes: Any, about: list[str]) -> str:
    """A golden file's text: per sequence (T, I) observations, (T, O) actions and (T,) codes (see the module)."""
    n_in, n_out = obs[0].shape[1], actions[0].shape[1]
    head = [
        "pretrial golden file: observations and the actions and fault codes pretrial computes for them.",
        *about,
        "Format (whitespace separated, readable with fscanf; lines starting with '#' are this header):",
        f"  '{MAGIC} {VERSION} inputs I outputs O sequences Q', then per sequence 'steps T' and T lines of",
        "  I observation values, O action values and the fault code; the last line is 'end'.",
        "  Reset the policy state before each sequence. Numbers read back exactly (shortest round-trip text).",
        "Expected: the numpy policy's actions (Policy.act) and code 0; the safe action and code 1 where an",
        "  observation value is NaN or infinite, code 2 where a network output is; a fault keeps the state.",
        f"Observations: per sequence a stationary AR(1) process z[t] = {RHO} z[t-1] + sqrt(1 - {RHO}^2) e[t],",
        "  e and z[0] standard normal, mapped to obs = offset + z / scale (the policy's input scaling),",
        "  so the network sees inputs of unit spread; the fault sequences put NaN, inf and -inf into them.",
    ]
    lines = [f"# {line}".rstrip() for line in head]
    lines.append(f"{MAGIC} {VERSION} inputs {n_in} outputs {n_out} sequences {len(obs)}")
    for o, a, c in zip(obs, actions, codes, strict=True):
        lines.append(f"steps {len(o)}")
        lines.extend(f"{_fmt(row)} {int(code)}" for row, code in
                     zip(np.concatenate([o, a], axis=1).tolist(), np.asarray(c).tolist(), strict=True))
    lines.append("end")
    return "\n".join(lines) + "\n"


@dataclass(frozen=True)
class Golden:
    """A golden file's content: per sequence (steps, inputs) observations, (steps, outputs) actions, (steps,) codes."""

    observations: list[np.ndarray]
    actions: list[np.ndarray]
    codes: list[np.ndarray]


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
        width = n_in + n_out + 1
        at, obs, act, codes = 8, [], [], []
        for _ in range(q):
            if words[at] != "steps":
                raise ValueError("missing 'steps' line")
            t = int(words[at + 1])
            at += 2
            block = np.array(words[at : at + t * width], dtype=object).reshape(t, width)
            at += t * width
            obs.append(block[:, :n_in].astype(float))
            act.append(block[:, n_in:-1].astype(float))
            codes.append(np.array([int(c) for c in block[:, -1]], dtype=np.int64))
        if words[at:] != ["end"]:
            raise ValueError("missing 'end' line or extra data")
    except (IndexError, ValueError) as exc:
        raise FileFormatError(f"{name}: not a usable golden file ({exc}); truncated or damaged") from None
    return Golden(obs, act, codes)
