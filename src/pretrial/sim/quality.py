"""Loop quality: whether an episode that survived also *behaved*.

A plant that stays inside its failure limits can still be badly controlled: an
actuator banging between its limits, a limit cycle that never settles, a
steady offset, or a slow divergence that has not yet reached a limit when the
horizon ends. :class:`QualityLimits` states what a plan (``[require.quality]``)
accepts, and :class:`QualityTracker` measures it on every episode as it runs,
with a few running sums per row (no trace is kept), so Monte Carlo over
thousands of episodes costs little more than before.

The measures, per episode:

* ``saturated_fraction``: share of control periods with any command at
  ``>= SATURATION_LEVEL`` of full scale (the command entering the plant, in
  [-1, 1]);
* ``chatter_hz``: reversals per second of the busiest command channel, a
  reversal being a swing from beyond ``+chatter_level`` to beyond
  ``-chatter_level`` of full scale or back (hysteresis, so sensor noise around
  zero is not counted);
* ``settled``: every regulated quantity (:meth:`Physics.regulated`) inside its
  band over the *window*: the last ``settle_window`` of the horizon for a
  survival task, the goal hold for a reach task;
* ``steady_state_error``: the magnitude of each regulated quantity's mean error
  over the window, against ``offset`` (default half the band);
* ``offset_share``: the largest ``steady_state_error`` over its ``offset``
  limit (above 1 fails ``offset``; 0 without a window);
* ``growth_ratio``: over the last ``growth_span`` of a survival episode (half
  the horizon by default), the largest normalized error (``|error| / band``,
  the largest over the regulated quantities) in the span's last third divided
  by the largest in its first two thirds. A stable loop's error decays, so
  the late peak is lower; an unstable mode still under way at the horizon
  (a slow divergence that has not reached a failure limit yet) makes it
  higher. The loop is *growing* when the ratio exceeds ``growth_ratio`` and the
  late peak reaches ``growth_floor`` of the band. Random inputs (sensor noise,
  control jitter, gusts) move a window's peak by tens of percent on their own,
  so rows that have them need ``noisy_growth_ratio`` (2: the error doubled)
  and ``noisy_growth_floor`` (half the band): the test is then coarse, and the
  linear analyses are the sharper judge of stability.

An episode that broke a failure limit keeps its own failure word; one that
survived but violates a limit here fails with the first of
:data:`QUALITY_WORDS` that applies.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np

from pretrial_envs.core import SATURATION_LEVEL, EpisodeMetric, Physics

#: failure words for quality, in the order they are named when several apply
QUALITY_WORDS = ("chatter", "saturated", "not_settled", "growing", "offset")

#: defaults (our choices, documented in the README; common practice for a first hardware trial)
#: "not saturated most of the time": a point-to-point move saturates while it accelerates
DEFAULT_SATURATED_FRACTION = 0.5
DEFAULT_CHATTER_HZ = 5.0
DEFAULT_CHATTER_LEVEL = 0.5
DEFAULT_SETTLE_WINDOW = 0.25
DEFAULT_OFFSET_SHARE = 0.5
DEFAULT_GROWTH_SPAN = 0.5
DEFAULT_GROWTH_RATIO = 1.01
DEFAULT_GROWTH_FLOOR = 0.1
DEFAULT_NOISY_GROWTH_RATIO = 2.0
DEFAULT_NOISY_GROWTH_FLOOR = 0.5


@dataclass(frozen=True)
class QualityLimits:
    """What a plan accepts of a surviving episode (``[require.quality]``).

    Attributes
    ----------
    settled : bool
        Regulated quantities must stay inside their bands over the window.
    settle_window : float
        Survival tasks: the window is this last share of the horizon (0..1).
        Reach tasks use the goal hold instead.
    band : dict of str to float
        Band half-width per regulated name (physical units), over the plant's defaults.
    offset : dict of str to float
        Largest accepted ``|mean error|`` over the window per regulated name
        (default: ``DEFAULT_OFFSET_SHARE`` of the band).
    saturated_fraction : float or None
        Largest accepted share of saturated periods (None: not checked).
    chatter_hz : float or None
        Largest accepted command reversals per second (None: not checked).
    chatter_level : float
        Full-scale share a command must pass on each side for a reversal to count.
    growth : bool
        Apply the growth test (survival tasks).
    growth_span, growth_ratio, growth_floor, noisy_growth_ratio, noisy_growth_floor : float
        See the module docstring.
    """

    settled: bool = True
    settle_window: float = DEFAULT_SETTLE_WINDOW
    band: dict[str, float] = field(default_factory=dict)
    offset: dict[str, float] = field(default_factory=dict)
    saturated_fraction: float | None = DEFAULT_SATURATED_FRACTION
    chatter_hz: float | None = DEFAULT_CHATTER_HZ
    chatter_level: float = DEFAULT_CHATTER_LEVEL
    growth: bool = True
    growth_span: float = DEFAULT_GROWTH_SPAN
    growth_ratio: float = DEFAULT_GROWTH_RATIO
    growth_floor: float = DEFAULT_GROWTH_FLOOR
    noisy_growth_ratio: float = DEFAULT_NOISY_GROWTH_RATIO
    noisy_growth_floor: float = DEFAULT_NOISY_GROWTH_FLOOR

    def to_dict(self) -> dict[str, Any]:
        """Plain data, as results.json records it."""
        return asdict(self)

    def check_names(self, physics: Physics) -> None:
        """Raise ValueError naming a band/offset key that is not a regulated quantity of ``physics``."""
        names = list(physics.regulated())
        for kind, table in (("band", self.band), ("offset", self.offset)):
            for name in table:
                if name not in names:
                    valid = ", ".join(names) or "none (this plant declares no regulated quantities)"
                    raise ValueError(f"{kind}.{name}: not a regulated quantity of {physics.env_id}; valid: {valid}")

    def bands(self, physics: Physics, params: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(band, offset limit), each (N, R), for parameter rows ``params``."""
        names = list(physics.regulated())
        band = np.array(physics.regulation_band(params), dtype=float)
        for j, name in enumerate(names):
            if name in self.band:
                band[:, j] = self.band[name]
        offset = DEFAULT_OFFSET_SHARE * band  # of the band in force, the plan's where it gives one
        for j, name in enumerate(names):
            if name in self.offset:
                offset[:, j] = self.offset[name]
        return band, offset


class QualityTracker:
    """Running loop-quality sums for the rows of one batch of episodes.

    Parameters
    ----------
    physics : Physics
    limits : QualityLimits
    params : (N, P) array
        The rows' physics parameters (bands may depend on them).
    limit : int
        The episode horizon in control periods.
    noisy : (N,) bool array, optional
        Rows driven by random inputs (sensor noise, jitter, gusts): their growth
        test asks for more (``noisy_growth_ratio``, ``noisy_growth_floor``).
    """

    def __init__(self, physics: Physics, limits: QualityLimits, params: np.ndarray, limit: int,
                 noisy: np.ndarray | None = None):
        self.physics = physics
        self.limits = limits
        n = params.shape[0]
        self.names = list(physics.regulated())
        self.reach = physics.success_mode == "reach"
        self.limit = int(limit)
        r, a = len(self.names), physics.action_dim
        self.band, self.offset_limit = limits.bands(physics, params)
        self.inv_band = 1.0 / self.band
        self.saturated = np.zeros(n, dtype=np.int64)
        self.reversals = np.zeros((n, a), dtype=np.int64)
        self.side = np.zeros((n, a), dtype=np.int8)  # last side beyond the chatter level: -1, 0 (none yet), +1
        self.err_sum = np.zeros((n, r))
        self.err_count = np.zeros(n, dtype=np.int64)
        self.outside = np.zeros(n, dtype=bool)
        self.peak = np.zeros((n, 2))  # largest normalized error: early and late part of the growth span
        self.noisy = np.zeros(n, dtype=bool) if noisy is None else np.asarray(noisy, dtype=bool).copy()
        window = min(max(1, math.ceil(limits.settle_window * self.limit - 1e-9)), self.limit)
        self.window_start = self.limit - window  # survival: states after step k count from k + 1 > this
        span = int(limits.growth_span * self.limit)
        # the span's last third is "late": at least half an oscillation period for modes slower than 1/3 of
        # the span's length, so its peak does not depend on where in the cycle the horizon falls
        self.growth_edges = (self.limit - span, self.limit - span // 3) if span >= 6 else None
        self._full: dict[str, np.ndarray] | None = None

    # -------------------------------------------------------------- per step
    def update(self, k: int, state: np.ndarray, action: np.ndarray, hold: np.ndarray,
               params: np.ndarray, active: np.ndarray | None) -> None:
        """Count control period ``k`` (its applied ``action`` and the ``state`` it ended in)."""
        lim = self.limits
        act = active if active is not None else True
        sat = (np.abs(action) >= SATURATION_LEVEL).any(axis=1)
        np.add(self.saturated, sat, out=self.saturated, where=act)
        up = action > lim.chatter_level
        down = action < -lim.chatter_level
        flipped = (up & (self.side < 0)) | (down & (self.side > 0))
        if active is not None:
            flipped &= active[:, None]
            up &= active[:, None]
            down &= active[:, None]
        self.reversals += flipped
        self.side[up] = 1
        self.side[down] = -1
        if not self.names:
            return
        if self.reach:
            window = hold > 0
        elif k + 1 > self.window_start:
            window = np.ones(len(hold), dtype=bool)
        else:
            window = None
        growth = None
        if not self.reach and lim.growth and self.growth_edges is not None:
            start, late = self.growth_edges  # the state after step k is at step k + 1
            growth = None if k < start else (1 if k >= late else 0)
        if window is None and growth is None:
            return
        with np.errstate(invalid="ignore", over="ignore"):
            err = self.physics.regulation_error(state, params)
            norm = np.abs(err) * self.inv_band
            if window is not None:
                if active is not None:
                    window = window & active
                if self.reach:  # the window is the current goal hold: leaving the goal starts it again
                    left = ~window if active is None else (~window & active)
                    self.err_sum[left] = 0.0
                    self.err_count[left] = 0
                    self.outside[left] = False
                self.err_sum += np.where(window[:, None], err, 0.0)
                self.err_count += window
                self.outside |= window & (norm > 1.0).any(axis=1)
            if growth is not None:
                worst = norm.max(axis=1) if norm.shape[1] else np.zeros(len(norm))
                if active is not None:
                    worst = np.where(active, worst, 0.0)
                np.maximum(self.peak[:, growth], worst, out=self.peak[:, growth])

    # -------------------------------------------------------------- batch shape
    def take(self, keep: np.ndarray) -> None:
        """Keep only rows ``keep`` (the rollout dropped finished policies)."""
        for name in ("saturated", "reversals", "side", "err_sum", "err_count", "outside", "peak", "noisy", "band",
                     "offset_limit", "inv_band"):
            setattr(self, name, getattr(self, name)[keep])

    def store(self, where: np.ndarray, total: int) -> None:
        """Write the current rows' sums into the full arrays at original rows ``where``."""
        if self._full is None:
            self._full = {name: np.zeros((total, *getattr(self, name).shape[1:]), dtype=getattr(self, name).dtype)
                          for name in ("saturated", "reversals", "err_sum", "err_count", "outside", "peak", "noisy",
                                       "band", "offset_limit")}
        for name, arr in self._full.items():
            arr[where] = getattr(self, name)

    # -------------------------------------------------------------- verdict
    def finish(self, steps: np.ndarray, success: np.ndarray) -> tuple[np.ndarray, dict[str, np.ndarray]]:
        """Per original row: the first violated quality word's index into QUALITY_WORDS (-1: none) and the measures.

        ``store`` must have been called with every original row. Only rows in
        ``success`` can be judged (the others already failed).
        """
        f = self._full
        assert f is not None
        lim = self.limits
        dt = self.physics.dt
        periods = np.maximum(steps, 1)
        measures: dict[str, np.ndarray] = {}
        measures["saturated_fraction"] = f["saturated"] / periods
        measures["chatter_hz"] = f["reversals"].max(axis=1, initial=0) / (periods * dt)
        checks: list[np.ndarray] = []
        checks.append(measures["chatter_hz"] > lim.chatter_hz if lim.chatter_hz is not None else None)
        checks.append(measures["saturated_fraction"] > lim.saturated_fraction
                      if lim.saturated_fraction is not None else None)
        n = len(steps)
        if self.names:
            count = np.maximum(f["err_count"], 1)
            mean = f["err_sum"] / count[:, None]
            for j, name in enumerate(self.names):
                measures[f"steady_state_error.{name}"] = np.abs(mean[:, j])
            offset = (np.abs(mean) > f["offset_limit"]).any(axis=1) & (f["err_count"] > 0)
            with np.errstate(divide="ignore", invalid="ignore"):
                share = (np.abs(mean) / f["offset_limit"]).max(axis=1)
            measures["offset_share"] = np.where(f["err_count"] > 0, share, 0.0)
            settled = ~f["outside"] & (f["err_count"] > 0)
            measures["settled"] = settled
            growing = np.zeros(n, dtype=bool)
            if not self.reach and lim.growth and self.growth_edges is not None:
                pk = f["peak"]
                measures["growth_ratio"] = np.divide(pk[:, 1], pk[:, 0], out=np.ones(n), where=pk[:, 0] > 0)
                ratio = np.where(f["noisy"], lim.noisy_growth_ratio, lim.growth_ratio)
                floor = np.where(f["noisy"], lim.noisy_growth_floor, lim.growth_floor)
                growing = (pk[:, 1] > ratio * pk[:, 0]) & (pk[:, 1] >= floor)
            checks.append(~settled if lim.settled else None)
            # after not_settled: a limit cycle slower than the growth span's parts can look like growth, and
            # "not settled" names it truly; growth is the word for a divergence still inside its band
            checks.append(growing if lim.growth else None)
            checks.append(offset)
        else:
            checks += [None, None, None]
        word = np.full(n, -1, dtype=np.int64)
        for i in range(len(checks) - 1, -1, -1):  # the first word that applies wins
            if checks[i] is not None:
                word = np.where(success & checks[i], i, word)
        return word, measures


def merge_words(physics_words: tuple[str, ...]) -> tuple[str, ...]:
    """The env's failure words followed by the quality words (codes continue after the env's)."""
    return tuple(physics_words) + QUALITY_WORDS


def quality_metrics(physics: Physics, measures: Mapping[str, np.ndarray]) -> dict[str, EpisodeMetric]:
    """The quality measures of one policy's episodes ((1, S) arrays) as replay metrics.

    ``saturated_fraction`` is left out: the generic replay metrics carry it, with the same definition.
    """
    units = {n: u for n, (u, _) in physics.regulated().items()}
    out: dict[str, EpisodeMetric] = {}
    for name, v in measures.items():
        v = np.asarray(v, dtype=float).reshape(-1)
        if name == "chatter_hz":
            out[name] = EpisodeMetric(v, "1/s", "command reversals per second (busiest channel, swings past the "
                                      "chatter level on both sides)")
        elif name == "settled":
            out[name] = EpisodeMetric(v, "-", "1 if every regulated quantity stayed in its band over the window",
                                      "min")
        elif name == "growth_ratio":
            out[name] = EpisodeMetric(v, "-", "peak error in the last third of the growth span over the peak before "
                                      "it (> 1: still growing at the horizon)")
        elif name == "offset_share":
            out[name] = EpisodeMetric(v, "-", "largest |mean error| over its offset limit (> 1: a steady offset)")
        elif name.startswith("steady_state_error."):
            q = name.split(".", 1)[1]
            out[name] = EpisodeMetric(v, units.get(q, ""), f"|mean error| of {q} over the window (steady offset)")
    return out
