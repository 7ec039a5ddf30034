"""The trust region of a hybrid plant, per episode: how long each one runs outside its residual's data.

A learned residual (:mod:`pretrial_envs.residual`) is fitted on bench data that covered some range of
each state and action; outside that range (widened by the residual file's margin) its correction is
an extrapolation. :class:`EnvelopeTracker` counts, per episode of a batch, the control steps that
started outside the range (the state the step starts from and the physical input held over it, which
is where the integrator first evaluates the residual), with the first such step and the first
variable out. Rows whose ``residual_scale`` is 0 run the physics alone: they never count.

The rollout creates one only for a plant with a residual (:func:`envelope_tracker` returns None
otherwise), so the check costs nothing on a plain plant.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from pretrial_envs.core import Physics


class EnvelopeTracker:
    """Steps outside the residual's envelope, per original row of a rollout.

    Parameters
    ----------
    physics : Physics
        A plant with a residual (``physics.residual`` not None).
    rows : int
        Rows of the rollout (policies x scenarios).
    """

    def __init__(self, physics: Physics, rows: int):
        self.envelope = physics.residual.envelope
        self.outside = np.zeros(rows, dtype=np.int64)
        self.first_step = np.full(rows, -1, dtype=np.int64)
        self.first_var = np.full(rows, -1, dtype=np.int64)

    def update(self, step: int, where: np.ndarray, state: np.ndarray, force: np.ndarray,
               scale: np.ndarray | None, active: np.ndarray | None) -> None:
        """Count control step ``step`` for the rows still stepped (``where``: their original rows).

        ``state`` (n, S) and ``force`` (n, A) are where the step starts; ``scale`` (n, 1) the rows'
        residual scales (None: 1); ``active`` (n,) the rows still running (None: all).
        """
        with np.errstate(invalid="ignore"):
            by = self.envelope.outside_by(state, force)
        out = by.any(axis=1)
        if scale is not None:
            out &= scale[:, 0] != 0.0
        if active is not None:
            out &= active
        if not out.any():
            return
        idx = np.flatnonzero(out)
        rows = where[idx]  # distinct: each original row is stepped once
        self.outside[rows] += 1
        new = self.first_step[rows] < 0
        if new.any():
            self.first_step[rows[new]] = step
            self.first_var[rows[new]] = by[idx[new]].argmax(axis=1)

    def finish(self, steps: np.ndarray, shape: tuple[int, int]) -> dict[str, np.ndarray]:
        """Per row (``shape``): ``share`` of its steps outside, ``outside_steps``, ``first_step`` and
        ``first_var`` (index into the envelope's names; -1: never outside)."""
        share = self.outside / np.maximum(steps, 1)
        return {"share": share.reshape(shape), "outside_steps": self.outside.reshape(shape),
                "first_step": self.first_step.reshape(shape), "first_var": self.first_var.reshape(shape)}


def envelope_tracker(physics: Physics, rows: int) -> EnvelopeTracker | None:
    """A tracker for a plant with a learned residual; None for any other (nothing to check)."""
    if getattr(physics, "residual", None) is None:
        return None
    return EnvelopeTracker(physics, rows)


def describe_episode(physics: Any, envelope: dict[str, np.ndarray], row: int) -> dict[str, Any]:
    """One episode's figures from :meth:`EnvelopeTracker.finish` (row of the first policy), JSON-friendly."""
    names = physics.residual.envelope.names
    first = int(envelope["first_step"].reshape(-1)[row])
    var = int(envelope["first_var"].reshape(-1)[row])
    return {"share": float(envelope["share"].reshape(-1)[row]),
            "first_time_s": None if first < 0 else first * physics.dt,
            "first_variable": None if var < 0 else names[var]}
