"""What can be perturbed, and how each perturbation acts on the control loop.

Two kinds of names can be varied in a config's ``[task.randomize]`` or a sweep
plan: any physics parameter from the environment's own table, and the generic
perturbations below, which act on any environment between the policy and the
plant. They are declared once, in :data:`PERTURBATIONS`, with the same
:class:`~pretrial_envs.core.ParamSpec` rows the environments use; the nominal
value of each is "no perturbation".

Per-channel forms. ``sensor_noise_std``, ``sensor_bias`` and
``sensor_quantization`` given alone are one number for every observation, each
in that observation's own unit (so 0.01 means 0.01 m on a position and 0.01
rad on an angle at once); ``NAME.OBS`` (e.g. ``sensor_noise_std.theta``) sets
the observation ``OBS`` alone, in its unit from the env's ``obs_units``, and
is what a sensor data sheet is matched to. ``actuator_gain`` alone multiplies
every actuator; ``actuator_gain.ACTION`` (e.g. ``actuator_gain.d0_rotor_left``)
one of them. A channel form overrides the plain form for its channel. See
:func:`channel_names` (and ``pretrial envs ID``) for the forms of an env.

:class:`Loop` applies them vectorized over a batch of rows (one row = one
scenario, possibly repeated for many genomes):

* sensor path: ``measured = quantize(obs(t - sensor_delay_s) + bias + noise_std * n)``
  per observation. The policy samples at the control steps, so a delay that is
  a whole number of periods returns a stored observation exactly; a fraction
  of a period is *linearly interpolated* between the two stored observations
  around ``t - d`` (an approximation: the signal between samples is taken as
  a straight line, an error of order ``dt^2`` times its curvature);
* actuator path: the policy's command is clipped to [-1, 1], delayed by the
  whole periods of ``actuator_delay_s``, passed through a deadband,
  slew-limited by ``actuator_rate_limit`` (full scale per second), lagged by a
  first-order ``actuator_lag_s`` and clipped to [-1, 1] again. The slew limit
  and the lag act once per period: the lag's exact response to the held
  command at the period's end, and the slewed value, are held over the period
  (a staircase of the continuous element, stated in reports); this normalized command is what the plant's
  actuator map (``Physics.actuate``) turns into physical inputs, and
  ``actuator_gain`` multiplies those physical inputs (force, thrust, speed),
  not the command: a gain of 0 means no force or thrust at all, and saturation
  still means the command reached its limit;
* exact fractional delays: the plant integrates each control period in two
  phases (per-row step lengths), the older applied command for the first
  ``s dt`` and the newer for the rest (:meth:`Physics.transition`,
  ``earlier``/``switch``). An actuator delay ``(m + f) dt`` gives
  ``s = f``: the plant sees exactly the command sequence shifted by the
  delay, as a continuous transport delay would give it (the
  modified-z-transform loop of sampled-data control). A batch that holds
  such a row integrates twice per period (the first phase is masked out on
  the other rows);
* timing: with ``control_jitter_s`` each new command reaches the plant
  ``tau ~ U(0, min(jitter, dt))`` seconds late, the previous one acting until
  then: the same two-phase switch, ``s = min(f + tau / dt, 1)`` (a command
  never arrives later than the end of its period; exact while
  ``f dt + jitter <= dt``, otherwise the arrival is held at the period's end).

Nothing is rounded to whole periods: a delay within ``1e-9`` of a whole number
of periods counts as that whole number (float noise in ``d / dt``), and rows
whose delays are whole periods integrate the period in one piece, bit for bit
as before. Rows are independent: a row's results never depend on what the
other rows of the batch carry (a sweep sample replays alone bit for bit).

A plant without the physics core's ``transition`` (a plain gymnasium env)
steps whole periods and maps its own actuators: it refuses ``actuator_gain``,
``control_jitter_s`` and fractional actuator delays (:func:`plant_refusal`).
:data:`SIMULATION_NOTES` words every rounding and approximation for reports.

``control_period_s`` (see :func:`apply_settings`) is the control period
itself: the plant is rebuilt with that ``dt`` and enough integration substeps
that the integration step never grows.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from pretrial import limits
from pretrial.sim import streams
from pretrial_envs.core import ParamSpec, ParamTable, Physics, unknown_name_message

PERTURBATIONS = ParamTable(
    [
        ParamSpec("actuator_gain", "-", 1.0, 0.0, 100.0,
                  "multiplier on every actuator's physical output (force, thrust); .ACTION for one", "actuator"),
        ParamSpec("actuator_lag_s", "s", 0.0, 0.0, 10.0, "first-order actuator time constant", "actuator"),
        ParamSpec("actuator_delay_s", "s", 0.0, 0.0, 10.0, "transport delay of commands (exact, any fraction of a "
                  "period)", "actuator"),
        ParamSpec("actuator_deadband", "-", 0.0, 0.0, 1.0, "commands below this (full scale) give zero", "actuator"),
        ParamSpec(
            "actuator_rate_limit", "1/s", float("inf"), 0.0, float("inf"), "slew limit, full scale per second",
            "actuator",
        ),
        ParamSpec("sensor_noise_std", "obs unit", 0.0, 0.0, 1e6,
                  "white noise std added to each observation, in its own unit; .OBS for one", "sensor"),
        ParamSpec("sensor_bias", "obs unit", 0.0, -1e6, 1e6,
                  "constant offset added to every observation, in its own unit; .OBS for one", "sensor"),
        ParamSpec("sensor_delay_s", "s", 0.0, 0.0, 10.0,
                  "age of the observation the policy sees (fractions of a period interpolated)", "sensor"),
        ParamSpec("sensor_quantization", "obs unit", 0.0, 0.0, 1e6,
                  "observation resolution in its own unit (0 = exact); .OBS for one", "sensor"),
        ParamSpec(
            "control_jitter_s", "s", 0.0, 0.0, 10.0, "late arrival of each new command, uniform in [0, value]",
            "timing",
        ),
        ParamSpec("start_scale", "-", 1.0, 0.0, 100.0, "multiplier on the start-state ranges", "start"),
        ParamSpec("residual_scale", "-", 1.0, 0.0, 100.0, "multiplier on the plant's learned residual (option "
                  "residual): 1 as fitted, 0 the physics alone", "model"),
    ]
)

#: perturbations with a per-channel form ``NAME.CHANNEL``, and what their channels are
CHANNELLED = {"sensor_noise_std": "observation", "sensor_bias": "observation",
              "sensor_quantization": "observation", "actuator_gain": "action"}

#: a delay within this many periods of a whole number of periods is that whole number (float noise in d / dt)
WHOLE_PERIOD_TOL = 1e-9

#: the control period as a varied name: the plant is rebuilt with this ``dt`` (not a per-row value)
CONTROL_PERIOD = "control_period_s"

#: the :class:`Loop`'s per-row settings and masks (what :meth:`Loop.take` keeps for the rows it keeps)
_SETTING_ARRAYS = ("gain", "deadband", "max_slew", "lag_alpha", "noise_std", "bias", "quantum", "act_delay",
                   "act_frac", "obs_delay", "obs_frac", "start_scale", "residual_scale", "_sensor_rows",
                   "_dead_rows", "_slew_rows", "_lag_rows", "_safe_quantum", "jitter_frac", "_jitter_rows")

#: counter offsets so the streams of one scenario never overlap
_SENSOR_STREAM, _PLANT_STREAM = 0, 1
_STREAMS = 2


def _channels(physics: Physics, base: str) -> tuple[tuple[str, ...], tuple[str, ...]]:
    """Channel names and units of a channelled perturbation: the observations or the actions."""
    if CHANNELLED[base] == "observation":
        return tuple(physics.obs_names), tuple(physics.obs_units)
    return tuple(physics.action_names), tuple(physics.action_units)


def channel_names(physics: Physics, base: str | None = None) -> list[str]:
    """Every per-channel form ``NAME.CHANNEL`` valid on ``physics`` (of ``base`` only, when given)."""
    bases = CHANNELLED if base is None else (base,)
    return [f"{b}.{ch}" for b in bases for ch in _channels(physics, b)[0]]


def channel_of(physics: Physics, name: str) -> tuple[str, int] | None:
    """``(perturbation, column)`` of a per-channel name such as ``sensor_noise_std.theta``.

    None when ``name`` is not of the form ``NAME.CHANNEL`` for a perturbation
    in :data:`CHANNELLED`. Raises ValueError, listing the valid channel
    names, for an unknown channel of such a perturbation.
    """
    base, dot, channel = str(name).partition(".")
    if not dot or base not in CHANNELLED:
        return None
    names = _channels(physics, base)[0]
    if channel not in names:
        raise ValueError(unknown_name_message(f"{CHANNELLED[base]} channel of {base} on {physics.env_id}", name,
                                              channel_names(physics, base)))
    return base, names.index(channel)


def _channel_spec(physics: Physics, base: str, column: int) -> ParamSpec:
    """The table row of one channel: the plain form's range, the channel's own unit."""
    spec = PERTURBATIONS[base]
    names, units = _channels(physics, base)
    name, unit = names[column], units[column]
    if base == "actuator_gain":  # a multiplier: no unit of its own
        output = f" ({unit})" if unit not in ("-", "1", "") else ""
        return ParamSpec(f"{base}.{name}", "-", spec.nominal, spec.low, spec.high,
                         f"multiplier on the physical output{output} of actuator {name}", spec.role)
    doc = _CHANNEL_DOCS[base].format(name=name)
    return ParamSpec(f"{base}.{name}", unit, spec.nominal, spec.low, spec.high, doc, spec.role)


_CHANNEL_DOCS = {"sensor_noise_std": "white noise std added to observation {name}",
                 "sensor_bias": "constant offset added to observation {name}",
                 "sensor_quantization": "resolution of observation {name} (0 = exact)"}


def perturbation_specs(physics: Physics) -> list[ParamSpec]:
    """Every generic perturbation valid on ``physics``: the plain forms, then the channel forms (their units)."""
    return [*PERTURBATIONS, *(spec_of(physics, name) for name in channel_names(physics))]


def is_perturbation(physics: Physics, name: str) -> bool:
    """Whether ``name`` is a generic perturbation or one of its channel forms (ValueError for an unknown channel)."""
    return name in PERTURBATIONS or channel_of(physics, name) is not None


def split_names(physics: Physics, names: list[str]) -> tuple[list[str], list[str]]:
    """Split varied names into (physics parameters, generic perturbations with their channel forms).

    Raises ValueError for a name that is neither, suggesting the nearest.
    """
    phys, pert = [], []
    for name in names:
        if name in physics.param_table:
            phys.append(name)
        elif is_perturbation(physics, name):
            pert.append(name)
        else:
            valid = [*physics.param_table.names, *PERTURBATIONS.names, *channel_names(physics)]
            raise ValueError(unknown_name_message("parameter or perturbation", name, valid))
    return phys, pert


def setting_names(physics: Physics) -> list[str]:
    """Every name a replay ``--set`` or a sweep plan may vary on ``physics`` (channel forms included)."""
    return [*physics.param_table.names, *PERTURBATIONS.names, *channel_names(physics), CONTROL_PERIOD]


def with_control_period(physics: Physics, period: float) -> Physics:
    """``physics`` rebuilt with control period ``period`` s and an integration step no longer than before.

    Raises ValueError for a period outside :data:`pretrial.limits.CONTROL_PERIOD`
    or longer than the episode, a rebuilt plant past its own limits (substeps,
    steps per episode), or a plant that cannot be rebuilt (a plain gymnasium env
    has its own period).
    """
    period = limits.CONTROL_PERIOD.check(period)
    if period > physics.time_limit:
        raise ValueError(f"{CONTROL_PERIOD}: {period!r} is longer than the episode ({physics.time_limit:g} s)")
    options = physics.options()
    if "dt" not in options:  # a plain gymnasium env fixes its own period
        raise ValueError(f"{CONTROL_PERIOD}: {physics.env_id} sets its own control period; it cannot be varied")
    h = physics.dt / physics.substeps
    options.update(dt=period, substeps=max(1, math.ceil(period / h - 1e-9)))
    try:
        return type(physics)(**options)
    except ValueError as exc:  # e.g. the substeps that keep the integration step, or the steps per episode
        raise ValueError(f"{CONTROL_PERIOD}: {period!r}: {exc}") from None


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
        (:data:`PERTURBATIONS`, or a channel form such as
        ``sensor_noise_std.theta``) or ``control_period_s``.

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
        if name in physics.param_table:
            params[name] = given[name] = physics.param_table.check_value(name, value)
            continue
        if not is_perturbation(physics, name):  # an unknown channel has raised already, naming the channels
            raise ValueError(unknown_name_message("parameter or perturbation", name, setting_names(physics)))
        perturb[name] = given[name] = ParamTable([spec_of(physics, name)]).check_value(name, value)
        refused = plant_refusal(physics, name, given[name])
        if refused:
            raise ValueError(refused)
    physics.param_table.resolve(params)  # the combination must be valid too
    return Setup(physics, params, perturb, given)


def nominal_value(physics: Physics, base_params: Mapping[str, float] | None, name: str) -> float:
    """Nominal value of a physics parameter (``base_params`` overrides first) or a generic perturbation."""
    if name in physics.param_table:
        return float((base_params or {}).get(name, physics.param_table[name].nominal))
    return float(spec_of(physics, name).nominal)


def spec_of(physics: Physics, name: str) -> ParamSpec:
    """The table row for a physics parameter, a generic perturbation or one channel of it (its unit)."""
    if name in physics.param_table:
        return physics.param_table[name]
    if name in PERTURBATIONS:
        return PERTURBATIONS[name]
    found = channel_of(physics, name)  # an unknown channel raises, naming the valid ones
    if found is not None:
        return _channel_spec(physics, *found)
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


#: how each perturbation is simulated: every rounding and approximation, for reports (keyed by plain name)
SIMULATION_NOTES = {
    "actuator_delay_s": "exact at any fraction of a control period: the plant integrates each period in two "
                        "phases, the older command then the newer (delays within 1e-9 periods of a whole "
                        "number of periods count as whole)",
    "sensor_delay_s": "whole control periods exact; a fraction of a period is linearly interpolated between "
                      "the two observations sampled around t - delay (an approximation of order dt^2)",
    "control_jitter_s": "each command arrives U(0, min(value, dt)) s late, simulated exactly (two phases per "
                        "period); with a fractional actuator delay too, an arrival past the period's end is "
                        "held at the end",
    "actuator_lag_s": "the first-order lag's exact response at each period's end, held over that period (a "
                      "staircase of the continuous response)",
    "actuator_rate_limit": "applied once per control period: the command moves at most rate x dt per period "
                           "and is held (a staircase, not a continuous ramp)",
    "actuator_gain": "multiplies the physical actuator output (force, thrust), not the command; the command "
                     "is clipped to [-1, 1] before the plant",
    "sensor_noise_std": "the plain form is one number for every observation, each in its own unit; "
                        "NAME.OBS is one observation in its unit (as tabled)",
    "sensor_bias": "the plain form is one number for every observation, each in its own unit; NAME.OBS is "
                   "one observation in its unit (as tabled)",
    "sensor_quantization": "the plain form is one resolution for every observation, each in its own unit; "
                           "NAME.OBS is one observation in its unit (as tabled)",
    CONTROL_PERIOD: "the plant is rebuilt with that control period, its integration step no longer than before",
    "residual_scale": "multiplies the learned residual added to the plant's derivatives at every integration "
                      "stage (0: the physics alone, exactly)",
}


def simulation_notes(names: Iterable[str]) -> list[str]:
    """``name: how it is simulated`` for each varied name that has a rounding or approximation to state."""
    out: dict[str, str] = {}
    for name in names:
        base = str(name).split(".")[0]
        if base in SIMULATION_NOTES and base not in out:
            out[base] = f"{base}: {SIMULATION_NOTES[base]}"
    return list(out.values())


#: what needs the physics core's two-phase transition and physical actuator map
_WITHIN_PERIOD = ("actuator_gain", "control_jitter_s", "actuator_delay_s")


def within_period_ok(physics: Physics) -> bool:
    """Whether the plant's ``transition`` takes within-period inputs (a plain gymnasium env steps itself)."""
    import inspect

    return "switch" in inspect.signature(physics.transition).parameters


def plant_refusal(physics: Physics, name: str, value: float | None = None) -> str | None:
    """Why ``name`` (at ``value``, or varied over a range when None) cannot act on ``physics``; None if it can.

    A plant without the physics core's transition (a plain gymnasium env)
    steps whole control periods and maps its own actuators: it takes no
    actuator gain, no jitter and only whole-period actuator delays.
    """
    base = str(name).split(".")[0]
    if base == "residual_scale":
        if getattr(physics, "residual", None) is not None or value == 1.0:
            return None
        return (f"{name}: {physics.env_id} has no learned residual to scale (give it the option residual = "
                "PATH to a residual.json from pretrial calibrate --residual)")
    if base not in _WITHIN_PERIOD or within_period_ok(physics):
        return None
    if value is not None:
        nominal = PERTURBATIONS[base].nominal
        if value == nominal or (base == "actuator_delay_s" and split_delay(np.array(value), physics.dt)[1] == 0):
            return None
    whole = " (whole periods only)" if base == "actuator_delay_s" else ""
    return (f"{name}: {physics.env_id} steps whole control periods of {physics.dt:g} s and maps its own "
            f"actuators, so {base} cannot act on it{whole}")


def split_delay(seconds: np.ndarray, dt: float) -> tuple[np.ndarray, np.ndarray]:
    """A delay as ``(m, f)``: ``seconds = (m + f) dt`` with whole ``m >= 0`` and ``0 <= f < 1``.

    A delay within :data:`WHOLE_PERIOD_TOL` periods of a whole number of
    periods is that whole number, ``f = 0`` (``0.06 / 0.02`` is 2.9999999999999996).
    """
    ratio = np.asarray(seconds, dtype=float) / dt
    whole = np.rint(ratio)
    snap = np.abs(ratio - whole) <= WHOLE_PERIOD_TOL * np.maximum(1.0, ratio)
    floor = np.where(snap, whole, np.floor(ratio))
    return floor.astype(np.int64), np.where(snap, 0.0, ratio - floor)


class Loop:
    """The perturbed control loop around a plant, for a batch of ``n`` rows.

    Parameters
    ----------
    physics : Physics
        The plant (its ``dt`` sets the control period).
    values : mapping of str to array
        Generic perturbation values per row, plain or per channel
        (``sensor_bias.theta``); missing names take their nominal.
    keys : (n,) uint64 array
        Scenario keys for the random streams (see :mod:`pretrial.sim.streams`).
    stream_version : int
        Version of the normal draws (:data:`pretrial.sim.streams.STREAM_VERSIONS`): 1, what results
        recorded without a version were made with, unless the caller names another.

    Raises
    ------
    ValueError
        An unknown name or channel; or a fractional delay, jitter or gain on a
        plant whose ``transition`` cannot take them (a plain gymnasium env
        steps whole periods and maps its own actuators).

    Notes
    -----
    Per control step: :meth:`sense`, the policy, :meth:`actuate`, then the
    plant's ``transition(..., **loop.plant_inputs())``.
    """

    def __init__(self, physics: Physics, values: Mapping[str, np.ndarray], keys: np.ndarray,
                 stream_version: int = 1):
        self.physics = physics
        self.stream_version = streams.check_version(stream_version)
        n = len(keys)
        self.n = n
        self.keys = keys
        for name in values:
            if not is_perturbation(physics, name):  # unknown names fail loudly
                PERTURBATIONS.index(name)
        v = {s.name: np.broadcast_to(np.asarray(values.get(s.name, s.nominal), float), (n,)) for s in PERTURBATIONS}
        dt = physics.dt
        self.gain = self._per_channel(values, v, "actuator_gain")
        self.deadband = v["actuator_deadband"][:, None]
        self.max_slew = (v["actuator_rate_limit"] * dt)[:, None]
        lag = v["actuator_lag_s"]
        # exact first-order response to a command held over one period
        with np.errstate(over="ignore"):  # a lag far below dt is no lag: alpha = 1
            self.lag_alpha = np.where(lag > 0, -np.expm1(-dt / np.where(lag > 0, lag, 1.0)), 1.0)[:, None]
        self.noise_std = self._per_channel(values, v, "sensor_noise_std")
        self.bias = self._per_channel(values, v, "sensor_bias")
        self.quantum = self._per_channel(values, v, "sensor_quantization")
        self.act_delay, act_frac = split_delay(v["actuator_delay_s"], dt)
        self.act_frac = act_frac[:, None]
        self.obs_delay, obs_frac = split_delay(v["sensor_delay_s"], dt)
        self.obs_frac = obs_frac[:, None]
        self.start_scale = v["start_scale"].copy()
        self.residual_scale = v["residual_scale"][:, None]
        self.jitter_frac = np.minimum(v["control_jitter_s"] / dt, 1.0)[:, None]
        self._jitter_rows = self.jitter_frac > 0
        # Per-row (and per-channel) masks: an element that is nominal passes values through exactly, so a row's
        # results never depend on what the other rows of the batch carry (a sweep sample replays alone bit for bit).
        self._sensor_rows = (self.noise_std != 0) | (self.bias != 0) | (self.quantum > 0)
        self._dead_rows = self.deadband > 0
        self._slew_rows = np.isfinite(self.max_slew)
        self._lag_rows = self.lag_alpha != 1.0
        self._safe_quantum = np.where(self.quantum > 0, self.quantum, 1.0)
        self._batch_flags()
        self._check_plant()
        self._obs_buf: np.ndarray | None = None
        self._act_buf: np.ndarray | None = None
        self._applied: np.ndarray | None = None
        self._inputs: dict[str, np.ndarray] = {}
        self._rows = np.arange(n)

    def _per_channel(self, values: Mapping[str, np.ndarray], plain: Mapping[str, np.ndarray], base: str) -> np.ndarray:
        """(n, 1) from the plain form, or (n, C) when a channel form is given (it overrides its channel)."""
        col = plain[base][:, None]
        given = [(j, name) for j, name in enumerate(channel_names(self.physics, base)) if name in values]
        if not given:
            return col
        width = len(_channels(self.physics, base)[0])
        out = np.repeat(col, width, axis=1)
        for j, name in given:
            out[:, j] = np.broadcast_to(np.asarray(values[name], float), (self.n,))
        return out

    def _check_plant(self) -> None:
        # the within-period inputs need the physics core's transition (a gymnasium env steps itself)
        if (self._any_switch or self._any_gain) and not within_period_ok(self.physics):
            name = ("actuator_gain" if self._any_gain else "control_jitter_s" if self._any_jitter
                    else "actuator_delay_s")
            raise ValueError(plant_refusal(self.physics, name))
        if self._any_residual and getattr(self.physics, "residual", None) is None:
            raise ValueError(plant_refusal(self.physics, "residual_scale"))

    def _batch_flags(self) -> None:
        # Which elements act on some row (the others are skipped: nominal passes values through) and
        # which on every row (their masks are all true, so the np.where that applies them is skipped).
        # (np.count_nonzero: a fraction of the call overhead of .any(); a Loop is made per batch.)
        def some(mask: np.ndarray) -> bool:
            return np.count_nonzero(mask) > 0

        def every(mask: np.ndarray) -> bool:
            return np.count_nonzero(mask) == mask.size

        self._any_sensor = some(self._sensor_rows)
        # rows the sensor path leaves alone, when few: copied back by index instead of a full np.where
        nominal = ((~self._sensor_rows.any(axis=1)).nonzero()[0] if self._any_sensor
                   else np.arange(self.n))
        self._nominal_sensor = nominal if 4 * len(nominal) < self.n else None
        self._any_quantum = some(self.quantum > 0)
        self._tiny_quantum = self._any_quantum and some((self.quantum > 0) & (self.quantum < 1e-280))
        self._any_jitter = some(self._jitter_rows)
        self._any_obs_frac = some(self.obs_frac > 0)
        self._any_switch = self._any_jitter or some(self.act_frac > 0)
        self._any_gain = some(self.gain != 1.0)
        self._any_residual = some(self.residual_scale != 1.0)
        self._any_dead = some(self._dead_rows)
        self._any_slew, self._all_slew = some(self._slew_rows), every(self._slew_rows)
        self._any_lag, self._all_lag = some(self._lag_rows), every(self._lag_rows)
        self._any_act_shape = self._any_dead or self._any_slew or self._any_lag
        # nothing acts on any row: the loop passes observations and commands through
        self._nominal = not (self._any_sensor or self._any_jitter or self._any_obs_frac or self._any_switch
                             or self._any_gain or self._any_residual or self._any_act_shape
                             or np.count_nonzero(self.obs_delay) or np.count_nonzero(self.act_delay)
                             or np.count_nonzero(self.start_scale != 1.0))

    def reset(self, obs0: np.ndarray) -> None:
        """Start of an episode: delay lines hold the first observation and zero commands."""
        a = self.physics.action_dim
        # a fractional sensor delay reads one observation further back
        dmax = int((self.obs_delay + (self.obs_frac[:, 0] > 0)).max(initial=0))
        self._obs_buf = np.repeat(obs0[None], dmax + 1, axis=0) if dmax else None
        amax = int(self.act_delay.max(initial=0))
        self._act_buf = np.zeros((amax + 1, self.n, a)) if amax else None
        self._applied = np.zeros((self.n, a))
        self._inputs = {}

    def sense(self, obs: np.ndarray, step: int) -> np.ndarray:
        """What the policy measures at control step ``step`` from the true ``obs``."""
        if self._obs_buf is not None:
            depth = self._obs_buf.shape[0]
            self._obs_buf[step % depth] = obs
            # before the line has filled, the oldest entries are the first observation
            obs = self._obs_buf[(step - self.obs_delay) % depth, self._rows]
            if self._any_obs_frac:  # t - d between two samples: linear interpolation between them
                older = self._obs_buf[(step - self.obs_delay - 1) % depth, self._rows]
                obs = np.where(self.obs_frac > 0, obs + self.obs_frac * (older - obs), obs)
        if not self._any_sensor:
            return obs
        counter = _STREAMS * step + _SENSOR_STREAM
        noise = streams.normal(self.keys, counter, obs.shape[1], version=self.stream_version)
        noise *= self.noise_std
        out = obs + self.bias
        out += noise  # (obs + bias) + noise_std n, without a third temporary
        if self._any_quantum:
            with np.errstate(over="ignore", invalid="ignore"):
                rounded = np.round(out / self._safe_quantum) * self._safe_quantum
            if self._tiny_quantum:  # out / q can overflow: such a quantum is below the float spacing anyway
                rounded = np.where(np.isfinite(rounded), rounded, out)
            out = np.where(self.quantum > 0, rounded, out)
        if self._nominal_sensor is not None and self._sensor_rows.shape[1] == 1:  # out is this call's own array
            out[self._nominal_sensor] = obs[self._nominal_sensor]
            return out
        return np.where(self._sensor_rows, out, obs)

    def actuate(self, command: np.ndarray, step: int, clipped: bool = False) -> np.ndarray:
        """Normalized command in [-1, 1] applied to the plant at ``step`` for the policy's ``command``.

        The plant sees it from ``switch`` of the period on, the previous period's
        before; both, and the gain on the physical output, are in :meth:`plant_inputs`.
        ``clipped``: ``command`` is already within [-1, 1] and is this step's own array
        (the loop may keep it), so the clip, which would change nothing, is skipped.
        """
        if not clipped:
            command = np.maximum(command, -1.0)  # np.clip, at half its call overhead (same values, NaN kept)
            np.minimum(command, 1.0, out=command)
        if self._act_buf is not None:
            depth = self._act_buf.shape[0]
            self._act_buf[step % depth] = command
            lagged = (step - self.act_delay) % depth
            command = np.where((step >= self.act_delay)[:, None], self._act_buf[lagged, self._rows], 0.0)
        prev = self._applied
        u = command
        if self._any_act_shape:
            if self._any_dead:
                u = np.where(self._dead_rows & (np.abs(u) <= self.deadband), 0.0, u)
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
        inputs: dict[str, np.ndarray] = {}
        if self._any_switch:
            # the previous period's command acts until the new one arrives: f of the period for an
            # actuator delay of (m + f) periods, plus the jitter's late arrival, at most the whole period
            switch = self.act_frac
            if self._any_jitter:
                late = np.minimum(self.act_frac + self.jitter_frac * self._jitter_draw(step), 1.0)
                switch = np.where(self._jitter_rows, late, switch)
            inputs.update(earlier=prev, switch=switch)
        if self._any_gain:
            inputs["gain"] = self.gain
        if self._any_residual:
            inputs["residual_scale"] = self.residual_scale
        self._inputs = inputs
        return u

    def plant_inputs(self) -> dict[str, np.ndarray]:
        """Keyword arguments of ``Physics.transition`` for the step just actuated (empty when nominal).

        ``earlier`` and ``switch``: the previous command acts over the first
        ``switch`` (N, 1) of the period; ``gain``: multiplier on the physical
        actuator output.
        """
        return self._inputs

    def physical(self, action: np.ndarray, params: np.ndarray) -> np.ndarray:
        """The plant's physical inputs for ``action`` this step: ``Physics.actuate`` times the actuator gain."""
        force = self.physics.actuate(action, params)
        gain = self._inputs.get("gain")
        return force if gain is None else force * gain

    def _jitter_draw(self, step: int) -> np.ndarray:
        # the lane after the plant's noise lanes of the plant stream: no other draw changes
        k = self.physics.noise_dim
        return streams.uniform(self.keys, _STREAMS * step + _PLANT_STREAM, 2 * k + 1)[:, -1:]

    def take(self, rows: np.ndarray) -> None:
        """Keep only ``rows`` (indices), with their delay lines and actuator state."""
        if self._nominal:
            # every per-row setting is its nominal: any n of them are as good as the rows' own, and the
            # flags stay as they are (the rollout drops rows often; indexing them all would cost more)
            n = len(rows)
            for name in _SETTING_ARRAYS:
                setattr(self, name, getattr(self, name)[:n])
            self.keys, self._applied, self.n, self._rows = self.keys[rows], self._applied[rows], n, np.arange(n)
            return
        for name in ("keys", "_applied", *_SETTING_ARRAYS):
            setattr(self, name, getattr(self, name)[rows])
        if self._obs_buf is not None:
            self._obs_buf = self._obs_buf[:, rows]
        if self._act_buf is not None:
            self._act_buf = self._act_buf[:, rows]
        self._inputs = {k: v[rows] for k, v in self._inputs.items()}
        self.n = len(rows)
        self._rows = np.arange(self.n)
        self._batch_flags()

    def plant_noise(self, step: int) -> np.ndarray | None:
        """Standard normal draws for the plant's disturbance processes, or None."""
        k = self.physics.noise_dim
        return (streams.normal(self.keys, _STREAMS * step + _PLANT_STREAM, k, version=self.stream_version)
                if k else None)
