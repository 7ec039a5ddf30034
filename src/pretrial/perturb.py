"""What can be perturbed, and how each perturbation acts on the control loop.

Two kinds of names can be varied in a config's ``[task.randomize]`` or a sweep
plan: any physics parameter from the environment's own table, and the generic
perturbations below, which act on any environment between the policy and the
plant. They are declared once, in :data:`PERTURBATIONS`, with the same
:class:`~pretrial_envs.core.ParamSpec` rows the environments use; the nominal
value of each is "no perturbation".

:class:`Loop` applies them vectorized over a batch of rows (one row = one
scenario, possibly repeated for many genomes):

* sensor path: ``measured = quantize(obs + bias + noise_std * n)``, delayed by
  ``sensor_delay_s`` (rounded to whole control periods);
* actuator path: the policy's command is delayed by ``actuator_delay_s``,
  passed through a deadband, multiplied by ``actuator_gain``, slew-limited by
  ``actuator_rate_limit`` (full scale per second), lagged by a first-order
  ``actuator_lag_s`` and clipped to the actuator range [-1, 1];
* timing: with ``control_jitter_s`` each new command reaches the plant
  ``tau ~ U(0, jitter)`` seconds late (at most one period), the previous one
  acting until then. The plant sees the time average of the two over the
  period, ``prev + (1 - tau/dt) (new - prev)``: exact for the impulse the
  period delivers, a first-order approximation of the path within it.

``control_period_s`` (see :func:`apply_settings`) is the control period
itself: the plant is rebuilt with that ``dt`` and enough integration substeps
that the integration step never grows.

Delays are whole control periods because the plant only sees a new action at
a control step; a delay below half a period rounds to none (stated in reports).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from pretrial_envs.core import ParamSpec, ParamTable, Physics, unknown_name_message

from . import streams

PERTURBATIONS = ParamTable(
    [
        ParamSpec("actuator_gain", "-", 1.0, 0.0, 100.0, "multiplier on every actuator command", "actuator"),
        ParamSpec("actuator_lag_s", "s", 0.0, 0.0, 10.0, "first-order actuator time constant", "actuator"),
        ParamSpec("actuator_delay_s", "s", 0.0, 0.0, 10.0, "transport delay of commands", "actuator"),
        ParamSpec("actuator_deadband", "-", 0.0, 0.0, 1.0, "commands below this (full scale) give zero", "actuator"),
        ParamSpec(
            "actuator_rate_limit", "1/s", float("inf"), 0.0, float("inf"), "slew limit, full scale per second",
            "actuator",
        ),
        ParamSpec("sensor_noise_std", "obs unit", 0.0, 0.0, 1e6, "white noise std added to each observation", "sensor"),
        ParamSpec("sensor_bias", "obs unit", 0.0, -1e6, 1e6, "constant offset added to every observation", "sensor"),
        ParamSpec("sensor_delay_s", "s", 0.0, 0.0, 10.0, "age of the observation the policy sees", "sensor"),
        ParamSpec("sensor_quantization", "obs unit", 0.0, 0.0, 1e6, "observation resolution (0 = exact)", "sensor"),
        ParamSpec(
            "control_jitter_s", "s", 0.0, 0.0, 10.0, "late arrival of each new command, uniform in [0, value]",
            "timing",
        ),
        ParamSpec("start_scale", "-", 1.0, 0.0, 100.0, "multiplier on the start-state ranges", "start"),
    ]
)

#: the control period as a varied name: the plant is rebuilt with this ``dt`` (not a per-row value)
CONTROL_PERIOD = "control_period_s"

#: counter offsets so the streams of one scenario never overlap
_SENSOR_STREAM, _PLANT_STREAM = 0, 1
_STREAMS = 2


def split_names(physics: Physics, names: list[str]) -> tuple[list[str], list[str]]:
    """Split varied names into (physics parameters, generic perturbations).

    Raises ValueError for a name that is neither, suggesting the nearest.
    """
    phys, pert = [], []
    valid = list(physics.param_table.names) + list(PERTURBATIONS.names)
    for name in names:
        if name in physics.param_table:
            phys.append(name)
        elif name in PERTURBATIONS:
            pert.append(name)
        else:
            raise ValueError(unknown_name_message("parameter or perturbation", name, valid))
    return phys, pert


def setting_names(physics: Physics) -> list[str]:
    """Every name a replay ``--set`` or a sweep plan may vary on ``physics``."""
    return [*physics.param_table.names, *PERTURBATIONS.names, CONTROL_PERIOD]


def with_control_period(physics: Physics, period: float) -> Physics:
    """``physics`` rebuilt with control period ``period`` s and an integration step no longer than before.

    Raises ValueError for a period that is not a positive finite number or a
    plant that cannot be rebuilt (a plain gymnasium env has its own period).
    """
    if not (isinstance(period, (int, float)) and math.isfinite(period) and period > 0):
        raise ValueError(f"{CONTROL_PERIOD}: {period!r} must be a finite number > 0")
    if period > physics.time_limit:
        raise ValueError(f"{CONTROL_PERIOD}: {period!r} is longer than the episode ({physics.time_limit:g} s)")
    options = physics.options()
    if "dt" not in options:  # a plain gymnasium env fixes its own period
        raise ValueError(f"{CONTROL_PERIOD}: {physics.env_id} sets its own control period; it cannot be varied")
    h = physics.dt / physics.substeps
    options.update(dt=float(period), substeps=max(1, math.ceil(period / h - 1e-9)))
    return type(physics)(**options)


@dataclass
class Setup:
    """A plant with named values set: what a replay ``--set`` or one sweep point runs.

    Attributes
    ----------
    physics : Physics
        The plant (rebuilt when the control period is set).
    params : dict of str to float
        Physics parameter overrides (the policy's own, then the settings).
    perturb : dict of str to float
        Generic perturbation values (only the ones set).
    settings : dict of str to float
        The settings as given, in the order given.
    """

    physics: Physics
    params: dict[str, float]
    perturb: dict[str, float] = field(default_factory=dict)
    settings: dict[str, float] = field(default_factory=dict)

    def words(self) -> str:
        """``name=value`` words of the settings, as ``--set`` takes them (empty for nominal)."""
        return " ".join(f"{k}={v!r}" for k, v in self.settings.items())


def apply_settings(physics: Physics, base_params: Mapping[str, float] | None,
                   settings: Mapping[str, Any] | None) -> Setup:
    """Resolve named settings into physics overrides, perturbations and the control period.

    Parameters
    ----------
    physics : Physics
        The plant as configured (e.g. as the policy was trained).
    base_params : mapping, optional
        Physics overrides already in force (e.g. the policy's ``env.params``).
    settings : mapping, optional
        Name -> value for physics parameters, generic perturbations
        (:data:`PERTURBATIONS`) or ``control_period_s``.

    Raises
    ------
    ValueError
        Naming the setting: unknown (with the nearest valid name), not a
        number, or outside its valid range.
    """
    params = {k: float(v) for k, v in (base_params or {}).items()}
    perturb: dict[str, float] = {}
    given: dict[str, float] = {}
    for name, value in (settings or {}).items():
        if isinstance(value, bool):
            raise ValueError(f"{name}: {value!r} is not a number")
        if name == CONTROL_PERIOD:
            try:
                period = float(value)
            except (TypeError, ValueError):
                raise ValueError(f"{name}: {value!r} is not a number") from None
            physics = with_control_period(physics, period)
            given[name] = period
            continue
        spec = spec_of(physics, name) if name in physics.param_table or name in PERTURBATIONS else None
        if spec is None:
            raise ValueError(unknown_name_message("parameter or perturbation", name, setting_names(physics)))
        table = physics.param_table if name in physics.param_table else PERTURBATIONS
        v = table.check_value(name, value)
        given[name] = v
        (params if table is physics.param_table else perturb)[name] = v
    physics.param_table.resolve(params)  # the combination must be valid too
    return Setup(physics, params, perturb, given)


def nominal_value(physics: Physics, base_params: Mapping[str, float] | None, name: str) -> float:
    """Nominal value of a physics parameter (``base_params`` overrides first) or a generic perturbation."""
    if name in physics.param_table:
        return float((base_params or {}).get(name, physics.param_table[name].nominal))
    return float(spec_of(physics, name).nominal)


def spec_of(physics: Physics, name: str) -> ParamSpec:
    """The table row for a physics parameter or a generic perturbation."""
    if name in physics.param_table:
        return physics.param_table[name]
    if name in PERTURBATIONS:
        return PERTURBATIONS[name]
    split_names(physics, [name])  # raises with the nearest-name hint
    raise AssertionError  # pragma: no cover


def describe_values(physics: Physics, values: Mapping[str, np.ndarray]) -> str:
    """``name=v unit`` per name (``name in [lo, hi] unit`` where the values differ), comma separated.

    How warnings name where something happened, e.g. the parameters of diverged episodes.
    """
    parts = []
    for name, v in values.items():
        v = np.asarray(v, dtype=float).ravel()
        if v.size == 0:
            continue
        unit = "s" if name == CONTROL_PERIOD else spec_of(physics, name).unit
        unit = f" {unit}" if unit and unit not in ("-", "1", "obs unit") else ""
        lo, hi = float(np.min(v)), float(np.max(v))
        parts.append(f"{name}={lo:.4g}{unit}" if lo == hi else f"{name} in [{lo:.4g}, {hi:.4g}]{unit}")
    return ", ".join(parts)


def diverged_warning(count: int, where: str, total: int | None = None, context: str = "") -> str:
    """The one-line warning for ``count`` episodes whose simulation blew up (they count as failures)."""
    of = f" of {total}" if total is not None else ""
    ctx = f"{context}: " if context else ""
    return (f"pretrial: warning: {ctx}{count}{of} episodes diverged (the simulation blew up; counted as "
            f"failures) at {where}")


class Loop:
    """The perturbed control loop around a plant, for a batch of ``n`` rows.

    Parameters
    ----------
    physics : Physics
        The plant (its ``dt`` sets the control period).
    values : mapping of str to array
        Generic perturbation values per row (missing names take their nominal).
    keys : (n,) uint64 array
        Scenario keys for the random streams (see :mod:`pretrial.streams`).
    """

    def __init__(self, physics: Physics, values: Mapping[str, np.ndarray], keys: np.ndarray):
        self.physics = physics
        n = len(keys)
        self.n = n
        self.keys = keys
        for name in values:
            PERTURBATIONS.index(name)  # unknown names fail loudly
        v = {s.name: np.broadcast_to(np.asarray(values.get(s.name, s.nominal), float), (n,)) for s in PERTURBATIONS}
        dt = physics.dt
        self.gain = v["actuator_gain"][:, None]
        self.deadband = v["actuator_deadband"][:, None]
        self.max_slew = (v["actuator_rate_limit"] * dt)[:, None]
        lag = v["actuator_lag_s"]
        # exact first-order response to a command held over one period
        with np.errstate(over="ignore"):  # a lag far below dt is no lag: alpha = 1
            self.lag_alpha = np.where(lag > 0, -np.expm1(-dt / np.where(lag > 0, lag, 1.0)), 1.0)[:, None]
        self.noise_std = v["sensor_noise_std"][:, None]
        self.bias = v["sensor_bias"][:, None]
        self.quantum = v["sensor_quantization"][:, None]
        self.act_delay = np.rint(v["actuator_delay_s"] / dt).astype(np.int64)
        self.obs_delay = np.rint(v["sensor_delay_s"] / dt).astype(np.int64)
        self.start_scale = v["start_scale"].copy()
        self.jitter_frac = np.minimum(v["control_jitter_s"] / dt, 1.0)[:, None]
        self._jitter_rows = self.jitter_frac > 0
        # Per-row masks: a row whose element is nominal passes values through exactly, so its results never
        # depend on what the other rows of the batch carry (a sweep sample replays alone bit for bit).
        self._sensor_rows = (self.noise_std != 0) | (self.bias != 0) | (self.quantum > 0)
        self._dead_rows = self.deadband > 0
        self._slew_rows = np.isfinite(self.max_slew)
        self._lag_rows = self.lag_alpha != 1.0
        self._safe_quantum = np.where(self.quantum > 0, self.quantum, 1.0)
        self._batch_flags()
        self._obs_buf: np.ndarray | None = None
        self._act_buf: np.ndarray | None = None
        self._applied: np.ndarray | None = None
        self._held: np.ndarray | None = None
        self._rows = np.arange(n)

    def _batch_flags(self) -> None:
        # Which elements act on some row (the others are skipped: nominal passes values through) and
        # which on every row (their masks are all true, so the np.where that applies them is skipped).
        self._any_sensor = bool(self._sensor_rows.any())
        # rows the sensor path leaves alone, when few: copied back by index instead of a full np.where
        nominal = np.flatnonzero(~self._sensor_rows[:, 0])
        self._nominal_sensor = nominal if 4 * len(nominal) < self.n else None
        self._any_quantum = bool(np.any(self.quantum > 0))
        self._tiny_quantum = bool(np.any((self.quantum > 0) & (self.quantum < 1e-280)))
        self._any_jitter = bool(self._jitter_rows.any())
        self._any_gain = bool(np.any(self.gain != 1.0))
        self._any_dead = bool(self._dead_rows.any())
        self._any_slew, self._all_slew = bool(self._slew_rows.any()), bool(self._slew_rows.all())
        self._any_lag, self._all_lag = bool(self._lag_rows.any()), bool(self._lag_rows.all())
        self._any_act_shape = (self._any_gain or self._any_dead or self._any_slew or self._any_lag
                               or self._any_jitter)

    def reset(self, obs0: np.ndarray) -> None:
        """Start of an episode: delay lines hold the first observation and zero commands."""
        a = self.physics.action_dim
        dmax = int(self.obs_delay.max(initial=0))
        self._obs_buf = np.repeat(obs0[None], dmax + 1, axis=0) if dmax else None
        amax = int(self.act_delay.max(initial=0))
        self._act_buf = np.zeros((amax + 1, self.n, a)) if amax else None
        self._applied = np.zeros((self.n, a))
        self._held = np.zeros((self.n, a))

    def sense(self, obs: np.ndarray, step: int) -> np.ndarray:
        """What the policy measures at control step ``step`` from the true ``obs``."""
        if self._obs_buf is not None:
            depth = self._obs_buf.shape[0]
            self._obs_buf[step % depth] = obs
            obs = self._obs_buf[(step - self.obs_delay) % depth, self._rows]
            # before the line has filled, the oldest entry is the first observation
        if not self._any_sensor:
            return obs
        counter = _STREAMS * step + _SENSOR_STREAM
        out = obs + self.bias + self.noise_std * streams.normal(self.keys, counter, obs.shape[1])
        if self._any_quantum:
            with np.errstate(over="ignore", invalid="ignore"):
                rounded = np.round(out / self._safe_quantum) * self._safe_quantum
            if self._tiny_quantum:  # out / q can overflow: such a quantum is below the float spacing anyway
                rounded = np.where(np.isfinite(rounded), rounded, out)
            out = np.where(self.quantum > 0, rounded, out)
        if self._nominal_sensor is not None:  # out is this call's own array
            out[self._nominal_sensor] = obs[self._nominal_sensor]
            return out
        return np.where(self._sensor_rows, out, obs)

    def actuate(self, command: np.ndarray, step: int) -> np.ndarray:
        """Action applied to the plant at ``step`` for the policy's ``command``."""
        command = np.maximum(command, -1.0)  # np.clip, at half its call overhead (same values, NaN kept)
        np.minimum(command, 1.0, out=command)
        if self._act_buf is not None:
            depth = self._act_buf.shape[0]
            self._act_buf[step % depth] = command
            lagged = (step - self.act_delay) % depth
            command = np.where((step >= self.act_delay)[:, None], self._act_buf[lagged, self._rows], 0.0)
        if not self._any_act_shape:
            self._applied = command
            return command
        u = command
        if self._any_dead:
            u = np.where(self._dead_rows & (np.abs(u) <= self.deadband), 0.0, u)
        if self._any_gain:
            u = u * self.gain
        prev = self._applied
        # prev + (u - prev) is not always u in floating point: rows without a slew limit or lag skip them
        if self._any_slew:
            slewed = prev + np.clip(u - prev, -self.max_slew, self.max_slew)
            u = slewed if self._all_slew else np.where(self._slew_rows, slewed, u)
        if self._any_lag:
            lagged = prev + self.lag_alpha * (u - prev)
            u = lagged if self._all_lag else np.where(self._lag_rows, lagged, u)
        u = np.maximum(u, -1.0)  # np.clip, at half its call overhead (same values, NaN kept)
        np.minimum(u, 1.0, out=u)
        self._applied = u
        if self._any_jitter:
            late = self.jitter_frac * self._jitter_draw(step)
            u = np.where(self._jitter_rows, self._held + (1.0 - late) * (u - self._held), u)
            self._held = u
        return u

    def _jitter_draw(self, step: int) -> np.ndarray:
        # the lane after the plant's noise lanes of the plant stream: no other draw changes
        k = self.physics.noise_dim
        return streams.uniform(self.keys, _STREAMS * step + _PLANT_STREAM, 2 * k + 1)[:, -1:]

    def take(self, rows: np.ndarray) -> None:
        """Keep only ``rows`` (indices), with their delay lines and actuator state."""
        for name in ("keys", "gain", "deadband", "max_slew", "lag_alpha", "noise_std", "bias", "quantum",
                     "act_delay", "obs_delay", "start_scale", "_applied", "_sensor_rows", "_dead_rows", "_slew_rows",
                     "_lag_rows", "_safe_quantum", "jitter_frac", "_jitter_rows", "_held"):
            setattr(self, name, getattr(self, name)[rows])
        if self._obs_buf is not None:
            self._obs_buf = self._obs_buf[:, rows]
        if self._act_buf is not None:
            self._act_buf = self._act_buf[:, rows]
        self.n = len(rows)
        self._rows = np.arange(self.n)
        self._batch_flags()

    def plant_noise(self, step: int) -> np.ndarray | None:
        """Standard normal draws for the plant's disturbance processes, or None."""
        k = self.physics.noise_dim
        return streams.normal(self.keys, _STREAMS * step + _PLANT_STREAM, k) if k else None
