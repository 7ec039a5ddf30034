"""Sweep plans: TOML in, a validated :class:`Plan` out; every error names file and key.

A plan has these tables (see configs/sweeps/ for one per task)::

    [scenario]          env (defaults to the policy's), episodes per point, horizon, seed
    [scenario.options]  env keyword arguments (poles, hoist, ...; a policy's own win)
    [scenario.params]   physics overrides applied at every point
    [scenario.start]    start-state half-ranges by state name
    [[vary]]            name, range, units ("physical" | "ratio"), distribution
    [analysis]          which analyses, with their budgets
    [require]           success rate, margins, linear margins the engineer needs; on a hybrid plant the
                        share of simulated time allowed outside its residual's data (max_outside_envelope)
    [baseline]          LQR weights (q by state name, r by action name)

Values of ``[[vary]]`` are in physical units, or with ``units = "ratio"`` as
multiples of the nominal (refused where the nominal is 0).
"""

from __future__ import annotations

import difflib
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from pretrial.analysis.stats import Z2
from pretrial.analysis.trust import DEFAULT_MAX_OUTSIDE
from pretrial.errors import InputError
from pretrial.files import sha256_hex
from pretrial.limits import CONTROL_PERIOD as PERIOD_LIMIT
from pretrial.limits import EPISODES, HORIZON, SEED, START_SPREAD, check_horizon, check_total
from pretrial.sim.hybrid import resolve_residual_path
from pretrial.sim.perturb import (
    CONTROL_PERIOD,
    PERTURBATIONS,
    plant_refusal,
    setting_names,
    spec_of,
    with_control_period,
)
from pretrial.sim.quality import QualityLimits
from pretrial.tomlfile import TableReader, kind_name, read_toml
from pretrial_envs.core import Physics

ANALYSES = ("margins", "montecarlo", "worstcase", "sensitivity", "map", "linear", "linear_sampled",
            "integrator_check")
DISTRIBUTIONS = ("uniform", "loguniform", "normal")
UNITS = ("physical", "ratio")
#: requirement defaults for linear margins (MIL-F-9490D, flight control systems)
DEFAULT_GAIN_MARGIN_DB = 6.0
DEFAULT_PHASE_MARGIN_DEG = 45.0
#: default worst-case requirement, as a share of the required success rate (our choice: the worst point
#: found inside the dispersion may fall a little below the average requirement, not to a coin toss)
DEFAULT_WORSTCASE_SHARE = 0.8


def episodes_needed(rate: float) -> int:
    """Fewest episodes K whose all-success Wilson 95% lower bound reaches ``rate``.

    With all K succeeding the lower bound is K / (K + z^2), so K >= z^2 p / (1 - p)
    (Wilson 1927): 381 for p = 0.99.
    """
    if rate <= 0:
        return 1
    return max(1, math.ceil(Z2 * rate / (1.0 - rate) - 1e-9))


@dataclass(frozen=True)
class Vary:
    """One varied name: its range in physical units and how Monte Carlo draws it."""

    name: str
    unit: str
    nominal: float
    low: float
    high: float
    distribution: str = "uniform"
    mean: float | None = None
    std: float | None = None
    given_as: str = "physical"
    #: the box Monte Carlo, worst case and sensitivity draw from (default: the range; the map spans the range)
    box_low: float = math.nan
    box_high: float = math.nan

    def __post_init__(self) -> None:
        if math.isnan(self.box_low):
            object.__setattr__(self, "box_low", self.low)
        if math.isnan(self.box_high):
            object.__setattr__(self, "box_high", self.high)

    def ratio(self, value: float) -> float | None:
        """``value`` as a multiple of nominal (None where the nominal is 0)."""
        return None if self.nominal == 0 else value / self.nominal


@dataclass(frozen=True)
class Calibrated:
    """A calibration's fitted names, estimates and bootstrap set, as a plan draws from them.

    Monte Carlo draws one bootstrap row per sample, so the names move together
    and their correlations are kept; the estimates are the nominal values
    every other analysis runs at.
    """

    path: str
    content_sha256: str
    names: tuple[str, ...]
    units: tuple[str, ...]
    estimates: tuple[float, ...]
    bootstrap: tuple[tuple[float, ...], ...]

    def rows(self) -> Any:
        import numpy as np

        return np.array(self.bootstrap, dtype=float)

    def to_dict(self) -> dict[str, Any]:
        return {"path": self.path, "content_sha256": self.content_sha256, "names": list(self.names),
                "estimates": dict(zip(self.names, self.estimates, strict=True)), "replicates": len(self.bootstrap)}


@dataclass(frozen=True)
class Plan:
    """A resolved sweep plan."""

    path: str
    env: str | None
    options: dict[str, Any]
    params: dict[str, float]
    start: dict[str, float]
    episodes: int
    horizon: float | None
    seed: int
    vary: tuple[Vary, ...]
    analyses: tuple[str, ...]
    budgets: dict[str, Any]
    required_success_rate: float
    required_margins: dict[str, dict[str, float]]
    gain_margin_db: float | None
    phase_margin_deg: float | None
    lqr_q: dict[str, float] = field(default_factory=dict)
    lqr_r: dict[str, float] = field(default_factory=dict)
    source_text: str = ""
    #: what a surviving episode must also meet to count as a success (``[require.quality]``)
    quality: QualityLimits = field(default_factory=QualityLimits)
    #: the least success rate accepted at the worst case found inside the dispersion
    worstcase_success_rate: float | None = None
    #: ``[scenario] calibration``: parameters Monte Carlo draws jointly from a calibration's bootstrap set
    calibration: Calibrated | None = None
    #: ``[require] max_outside_envelope``: share of simulated time a hybrid plant may run outside its residual's
    #: data (default :data:`~pretrial.analysis.trust.DEFAULT_MAX_OUTSIDE` there; None on a plain plant)
    max_outside_envelope: float | None = None

    @property
    def name(self) -> str:
        return Path(self.path).stem

    def content_hash(self) -> str:
        return sha256_hex(self.source_text)

    def to_dict(self) -> dict[str, Any]:
        """The resolved plan as plain data (what results.json records)."""
        return {
            "scenario": {"env": self.env, "options": dict(self.options), "params": dict(self.params),
                         "start": dict(self.start), "episodes": self.episodes, "horizon": self.horizon,
                         "seed": self.seed},
            "vary": [{"name": v.name, "unit": v.unit, "nominal": v.nominal, "low": v.low, "high": v.high,
                      "distribution": v.distribution, "mean": v.mean, "std": v.std, "given_as": v.given_as,
                      "dispersion": [v.box_low, v.box_high]}
                     for v in self.vary],
            "analysis": {"run": list(self.analyses), **self.budgets},
            "require": {"success_rate": self.required_success_rate, "margins": self.required_margins,
                        "gain_margin_db": self.gain_margin_db, "phase_margin_deg": self.phase_margin_deg,
                        "worstcase_success_rate": self.worstcase_success_rate,
                        "quality": self.quality.to_dict(),
                        **({"max_outside_envelope": self.max_outside_envelope}
                           if self.max_outside_envelope is not None else {})},
            "baseline": {"q": dict(self.lqr_q), "r": dict(self.lqr_r)},
            **({"calibration": self.calibration.to_dict()} if self.calibration is not None else {}),
        }


def load_plan(path: str | Path, physics: Any, policy_env: str | None = None) -> Plan:
    """Read and validate a plan against ``physics`` (the plant it will run on).

    Parameters
    ----------
    path : path-like
    physics : Physics
        The plant the sweep runs on (names and ranges are checked against it).
    policy_env : str, optional
        The env id of the policy under test (a plan naming another env is refused).

    Raises
    ------
    InputError
        ``FILE: KEY: what is wrong``: unknown keys (with the nearest valid
        one), wrong types, unknown names, empty or reversed ranges, ranges
        outside a parameter's valid range, too few episodes per point for the
        required success rate (with the K that would do).
    """
    data, text = read_toml(path)
    path = str(path)
    top = TableReader(path, "", data)
    scen_t = top.table_of("scenario")
    vary_l = top.table.pop("vary", [])
    top.known.append("vary")
    analysis_t = top.table_of("analysis")
    require_t = top.table_of("require")
    baseline_t = top.table_of("baseline")
    top.finish()

    s = TableReader(path, "scenario", scen_t)
    env = s.take("env", str, None)
    episodes = s.take("episodes", int, 60, limit=EPISODES)
    horizon = s.take("horizon", float, None, limit=HORIZON)
    seed = s.take("seed", int, 0, limit=SEED)
    options = resolve_residual_path(s.table_of("options"), Path(path).parent)  # relative to the plan
    params_t = s.table_of("params")
    start_t = s.table_of("start")
    cal_path = s.take("calibration", str, None, lambda v: bool(v.strip()), "the path of a calibration.json")
    s.finish()
    calibrated = None
    if cal_path is not None:
        calibrated, cal_params = _read_calibration(path, cal_path, physics)
        params_t = {**cal_params, **params_t}  # the plan's own [scenario.params] still win
    if horizon is not None:
        try:
            check_horizon(horizon, physics, "scenario.horizon")
        except ValueError as exc:
            raise InputError(f"{path}: {exc}") from None
    params: dict[str, float] = {}
    for name, value in params_t.items():
        key = f"scenario.params.{name}"
        if name not in physics.param_table:
            near = difflib.get_close_matches(name, physics.param_table.names, n=1)
            hint = f" (did you mean {near[0]!r}?)" if near else ""
            raise InputError(f"{path}: {key}: unknown parameter{hint}; valid: {', '.join(physics.param_table.names)}")
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise InputError(f"{path}: {key}: expected a number, got {kind_name(value)} {value!r}")
        try:
            params[name] = physics.param_table.check_value(name, value)
        except ValueError as exc:
            raise InputError(f"{path}: {key}: {exc}") from None
    start: dict[str, float] = {}
    for name, value in start_t.items():
        key = f"scenario.start.{name}"
        if name not in physics.state_names:
            near = difflib.get_close_matches(name, physics.state_names, n=1)
            hint = f" (did you mean {near[0]!r}?)" if near else ""
            raise InputError(f"{path}: {key}: unknown state{hint}; valid: {', '.join(physics.state_names)}")
        try:
            start[name] = START_SPREAD.check(value, key)
        except ValueError as exc:
            raise InputError(f"{path}: {exc} ({_state_unit(physics, name)}, a half-range)") from None

    if not isinstance(vary_l, list) or not all(isinstance(v, dict) for v in vary_l):
        raise InputError(f"{path}: vary: expected [[vary]] tables, got {kind_name(vary_l)}")
    vary: list[Vary] = []
    seen: set[str] = set()
    for i, item in enumerate(vary_l):
        v = _read_vary(path, f"vary[{i}]", item, physics, params)
        if v.name in seen:
            raise InputError(f"{path}: vary[{i}].name: {v.name!r} is varied twice")
        if calibrated is not None and v.name in calibrated.names:
            raise InputError(f"{path}: vary[{i}].name: {v.name!r} is drawn from the calibration's bootstrap set "
                             "([scenario] calibration); vary it there or drop this entry")
        seen.add(v.name)
        vary.append(v)

    a = TableReader(path, "analysis", analysis_t)
    run = a.take("run", list, ["margins", "montecarlo", "linear", "linear_sampled", "integrator_check"])
    budgets = {
        "tolerance": a.take("tolerance", float, 0.02, lambda v: 0 < v < 0.5, "a fraction of the range, 0 < t < 0.5"),
        "montecarlo_samples": a.take("montecarlo_samples", int, 2000, lambda v: 1 <= v <= 10_000_000,
                                     "a whole number from 1 to 10000000"),
        "montecarlo_sampler": a.take("montecarlo_sampler", str, "sobol", lambda v: v in ("sobol", "random", "lhs"),
                                     "sobol, lhs or random"),
        "worstcase_iterations": a.take("worstcase_iterations", int, 20, lambda v: 1 <= v <= 10_000,
                                       "a whole number from 1 to 10000"),
        "worstcase_population": a.take("worstcase_population", int, 10, lambda v: 2 <= v <= 1000,
                                       "a whole number from 2 to 1000 (times the number of varied names)"),
        "worstcase_episodes": a.take("worstcase_episodes", int, 8, lambda v: 1 <= v <= 100_000,
                                     "a whole number from 1 to 100000"),
        "sensitivity_samples": a.take("sensitivity_samples", int, 256, lambda v: v >= 8 and (v & (v - 1)) == 0,
                                      "a power of two >= 8 (Saltelli sampling)"),
        "sensitivity_episodes": a.take("sensitivity_episodes", int, 4, lambda v: 1 <= v <= 10_000,
                                       "a whole number from 1 to 10000"),
        "map": a.take("map", list, None),
        "map_points": a.take("map_points", int, 8, lambda v: 2 <= v <= 100, "a whole number from 2 to 100"),
        "map_episodes": a.take("map_episodes", int, None, lambda v: 1 <= v <= 100_000, "a whole number >= 1"),
        "delay_steps": a.take("delay_steps", int, 0, lambda v: 0 <= v <= 1000, "whole control periods >= 0"),
    }
    a.finish()
    for j, name in enumerate(run):
        if name not in ANALYSES:
            near = difflib.get_close_matches(str(name), ANALYSES, n=1)
            hint = f" (did you mean {near[0]!r}?)" if near else ""
            raise InputError(f"{path}: analysis.run[{j}]: unknown analysis {name!r}{hint}; "
                             f"valid: {', '.join(ANALYSES)}")
    needs_vary = [n for n in run if n in ("margins", "montecarlo", "worstcase", "sensitivity", "map")]
    if needs_vary and not vary:
        raise InputError(f"{path}: analysis.run: {needs_vary[0]} needs at least one [[vary]] entry")
    if "sensitivity" in run and len(vary) < 2:
        raise InputError(f"{path}: analysis.run: sensitivity needs at least two [[vary]] entries")
    if "map" in run:
        pair = budgets["map"]
        names = [v.name for v in vary]
        if pair is None:
            if len(vary) < 2:
                raise InputError(f"{path}: analysis.run: map needs two [[vary]] entries")
            pair = names[:2]
        if (len(pair) != 2 or not all(isinstance(p, str) for p in pair) or len(set(pair)) != 2
                or any(p not in names for p in pair)):
            raise InputError(f"{path}: analysis.map: {pair!r} must name two different [[vary]] names "
                             f"(varied: {', '.join(names)})")
        budgets["map"] = list(pair)
    if budgets["map"] is None:
        budgets.pop("map")
    if budgets["map_episodes"] is None:
        budgets.pop("map_episodes")

    q = TableReader(path, "require", require_t)
    rate = q.take("success_rate", float, 0.95, lambda v: 0 < v < 1, "a fraction, 0 < p < 1")
    gm = q.take("gain_margin_db", float, DEFAULT_GAIN_MARGIN_DB, lambda v: v >= 0, "dB >= 0")
    pm = q.take("phase_margin_deg", float, DEFAULT_PHASE_MARGIN_DEG, lambda v: 0 <= v <= 180, "degrees 0..180")
    worst_rate = q.take("worstcase_success_rate", float, None, lambda v: 0 <= v < 1, "a fraction, 0 <= p < 1")
    max_outside = q.take("max_outside_envelope", float, None, lambda v: 0 <= v <= 1,
                         "a share of the simulated time, 0 to 1")
    margins_t = q.table_of("margins")
    quality_t = q.table_of("quality")
    q.finish()
    quality = read_quality(path, "require.quality", quality_t, physics)
    required_margins: dict[str, dict[str, float]] = {}
    varied = {v.name: v for v in vary}
    for name, req in margins_t.items():
        key = f"require.margins.{name}"
        if name not in varied:
            raise InputError(f"{path}: {key}: {name!r} is not varied in this plan (varied: {', '.join(varied)})")
        r = TableReader(path, key, req)
        entry = {k: r.take(k, float, None) for k in ("low", "high", "low_ratio", "high_ratio")}
        r.finish()
        entry = {k: v for k, v in entry.items() if v is not None}
        if not entry:
            raise InputError(f"{path}: {key}: give at least one of low, high, low_ratio, high_ratio")
        v = varied[name]
        if v.nominal == 0 and ("low_ratio" in entry or "high_ratio" in entry):
            raise InputError(f"{path}: {key}: the nominal of {name} is 0, so a ratio means nothing; give low/high")
        for k, x in entry.items():
            physical = x * v.nominal if k.endswith("_ratio") else x
            side_ok = physical <= v.nominal if k.startswith("low") else physical >= v.nominal
            if k.endswith("_ratio") and x <= 0:
                raise InputError(f"{path}: {key}.{k}: {x!r} not allowed (a multiple of the nominal, > 0)")
            if not side_ok:
                raise InputError(f"{path}: {key}.{k}: {x!r} is on the wrong side of the nominal {v.nominal:g} "
                                 f"{v.unit} (low <= nominal <= high)")
            if not v.low <= physical <= v.high:
                raise InputError(f"{path}: {key}.{k}: {x!r} lies outside the searched range [{v.low:g}, {v.high:g}] "
                                 f"{v.unit} of {name}, so no sweep could show it; widen [[vary]] range")
        required_margins[name] = entry

    if episodes < episodes_needed(rate) and any(n in run for n in ("margins", "map", "worstcase")):
        k = episodes_needed(rate)
        raise InputError(
            f"{path}: scenario.episodes: {episodes} episodes per point cannot show a success rate of {rate:g}: "
            f"even with all succeeding, the Wilson 95% lower bound is {episodes / (episodes + Z2):.4f}; "
            f"K >= 3.84 p / (1 - p) needs episodes = {k} or more")

    b = TableReader(path, "baseline", baseline_t)
    lqr_q = {k: _positive(path, f"baseline.q.{k}", v) for k, v in b.table_of("q").items()}
    lqr_r = {k: _positive(path, f"baseline.r.{k}", v) for k, v in b.table_of("r").items()}
    b.finish()
    for k in lqr_q:
        if k not in physics.state_names:
            raise InputError(f"{path}: baseline.q.{k}: unknown state; valid: {', '.join(physics.state_names)}")
    for k in lqr_r:
        if k not in physics.action_names:
            raise InputError(f"{path}: baseline.r.{k}: unknown action; valid: {', '.join(physics.action_names)}")

    if env is not None and policy_env is not None and env != policy_env:
        raise InputError(f"{path}: scenario.env: the plan is for {env}, the policy for {policy_env}")
    if worst_rate is None and "worstcase" in run:
        worst_rate = DEFAULT_WORSTCASE_SHARE * rate
    if max_outside is None and getattr(physics, "residual", None) is not None:
        max_outside = DEFAULT_MAX_OUTSIDE
    plan = Plan(path, env, dict(options), params, start, episodes, horizon, seed, tuple(vary),
                tuple(dict.fromkeys(run)), budgets, rate, required_margins, gm, pm, lqr_q, lqr_r, text, quality,
                worst_rate, calibrated, max_outside)
    check_plan_budget(plan, physics)
    return plan


def _read_calibration(path: str, cal_path: str, physics: Any) -> tuple[Calibrated, dict[str, float]]:
    """``[scenario] calibration`` -> the draws, and the physics values (fitted and fixed) as nominal overrides."""
    from pretrial.calibration.report import load_calibration

    full = Path(cal_path) if Path(cal_path).is_absolute() else Path(path).parent / cal_path
    try:
        data = load_calibration(full)
    except InputError as exc:
        raise InputError(f"{path}: scenario.calibration: {exc.message}") from None
    env = (data.get("env") or {}).get("id")
    if env != physics.env_id:
        raise InputError(f"{path}: scenario.calibration: {full} calibrates {env}, the plan runs {physics.env_id}")
    names = tuple(data.get("names") or data["params"])
    try:
        units = tuple(spec_of(physics, n).unit for n in names)
    except ValueError as exc:
        raise InputError(f"{path}: scenario.calibration: {full}: {exc}") from None
    estimates = tuple(float(data["params"][n]["estimate"]) for n in names)
    boot = tuple(tuple(float(x) for x in row) for row in data["bootstrap"])
    if not boot:
        raise InputError(f"{path}: scenario.calibration: {full} has no bootstrap set (run pretrial calibrate with "
                         "--bootstrap > 0)")
    fixed = {k: float(v) for k, v in (data.get("fixed") or {}).items() if k in physics.param_table}
    nominal = {**fixed, **{n: e for n, e in zip(names, estimates, strict=True) if n in physics.param_table}}
    return Calibrated(str(full), data["content_sha256"], names, units, estimates, boot), nominal


def check_plan_budget(plan: Plan, physics: Any) -> int:
    """Integration steps the plan asks for (roughly, as the progress bar counts episodes).

    The episodes are counted at the shortest control period the plan varies to.
    Raises InputError naming the factors when they pass :data:`pretrial.limits.COMMAND_STEPS`.
    """

    plant = physics
    for v in plan.vary:
        if v.name == CONTROL_PERIOD:
            plant = with_control_period(physics, v.low)
    periods = plant.max_steps if plan.horizon is None else max(1, round(plan.horizon / plant.dt))
    factors = [(planned_episodes(plan, physics), "episodes"), (periods, "control periods"),
               (plant.substeps, "substeps")]
    try:
        return check_total("sweep", factors)
    except ValueError as exc:
        raise InputError(f"{plan.path}: {exc}") from None


def read_quality(path: str, key: str, table: dict[str, Any], physics: Any) -> QualityLimits:
    """``[require.quality]`` -> :class:`QualityLimits` (defaults for what is not given).

    Keys: ``settled`` (true/false), ``settle_window`` (share of the horizon),
    ``band`` and ``offset`` (tables by regulated name, physical units),
    ``saturated_fraction`` and ``chatter_hz`` (a number, or false for no
    limit), ``chatter_level``, ``growth`` (true/false), ``growth_span``,
    ``growth_ratio``, ``growth_floor``, ``noisy_growth_ratio``,
    ``noisy_growth_floor`` (see :mod:`pretrial.sim.quality`).
    """
    r = TableReader(path, key, table)
    base = QualityLimits()

    def limit_or_off(name: str, default: float | None, check, allowed: str) -> float | None:
        value = r.take(name, (float, bool), default if default is not None else False)
        if value is False:
            return None
        if value is True:
            return default
        if not check(value):
            r.fail(r.key(name), f"{value!r} not allowed ({allowed})")
        return float(value)

    settled = r.take("settled", bool, base.settled)
    window = r.take("settle_window", float, base.settle_window, lambda v: 0 < v <= 1,
                    "a share of the horizon, 0 < w <= 1")
    sat = limit_or_off("saturated_fraction", base.saturated_fraction, lambda v: 0 <= v <= 1,
                       "a fraction 0..1, or false")
    chat = limit_or_off("chatter_hz", base.chatter_hz, lambda v: v >= 0, "reversals per second >= 0, or false")
    level = r.take("chatter_level", float, base.chatter_level, lambda v: 0 < v < 1, "a share of full scale, 0 < l < 1")
    growth = r.take("growth", bool, base.growth)
    span = r.take("growth_span", float, base.growth_span, lambda v: 0 < v <= 1, "a share of the horizon, 0 < s <= 1")
    ratio = r.take("growth_ratio", float, base.growth_ratio, lambda v: v >= 1, ">= 1")
    floor = r.take("growth_floor", float, base.growth_floor, lambda v: v >= 0, "a share of the band >= 0")
    noisy_ratio = r.take("noisy_growth_ratio", float, base.noisy_growth_ratio, lambda v: v >= 1, ">= 1")
    noisy_floor = r.take("noisy_growth_floor", float, base.noisy_growth_floor, lambda v: v >= 0,
                         "a share of the band >= 0")
    bands: dict[str, dict[str, float]] = {}
    for kind in ("band", "offset"):
        sub = r.table_of(kind)
        bands[kind] = {}
        for name, value in sub.items():
            if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value) or value <= 0:
                raise InputError(f"{path}: {key}.{kind}.{name}: {value!r} must be a number > 0 (physical units)")
            bands[kind][name] = float(value)
    r.finish()
    limits = QualityLimits(settled=settled, settle_window=window, band=bands["band"], offset=bands["offset"],
                           saturated_fraction=sat, chatter_hz=chat, chatter_level=level, growth=growth,
                           growth_span=span, growth_ratio=ratio, growth_floor=floor, noisy_growth_ratio=noisy_ratio,
                           noisy_growth_floor=noisy_floor)
    try:
        limits.check_names(physics)
    except ValueError as exc:
        raise InputError(f"{path}: {key}.{exc}") from None
    return limits


def _positive(path: str, key: str, value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value) or value < 0:
        raise InputError(f"{path}: {key}: {value!r} must be a weight >= 0")
    return float(value)


def _state_unit(physics: Any, name: str) -> str:
    return physics.state_units[physics.state_names.index(name)]


def _read_vary(path: str, key: str, item: dict[str, Any], physics: Any, params: dict[str, float]) -> Vary:
    r = TableReader(path, key, item)
    name = r.take("name", str, allowed="a physics parameter or perturbation name")
    rng = r.take("range", list, allowed="[low, high]")
    units = r.take("units", str, "physical", lambda v: v in UNITS, " or ".join(UNITS))
    dist = r.take("distribution", str, "uniform", lambda v: v in DISTRIBUTIONS, ", ".join(DISTRIBUTIONS))
    box = r.take("dispersion", list, None)
    mean = r.take("mean", float, None)
    std = r.take("std", float, None, lambda v: v > 0, "> 0")
    r.finish()
    if name == CONTROL_PERIOD:
        unit, nominal = "s", physics.dt
        low_ok, high_ok = PERIOD_LIMIT.low, min(PERIOD_LIMIT.high, physics.time_limit)
    else:
        try:
            spec = spec_of(physics, name)
        except ValueError as exc:
            if "." in name:  # NAME.CHANNEL: the message already lists the valid forms
                raise InputError(f"{path}: {key}.name: {exc}") from None
            valid = ", ".join(setting_names(physics))
            raise InputError(f"{path}: {key}.name: {exc}".split("; valid:")[0] + f"; valid: {valid}") from None
        unit, low_ok, high_ok = spec.unit, spec.low, spec.high
        nominal = params.get(name, spec.nominal) if name in physics.param_table else spec.nominal
        if plant_refusal(physics, name):
            raise InputError(f"{path}: {key}.name: {plant_refusal(physics, name)}")
        if name in PERTURBATIONS and not math.isfinite(nominal):
            nominal = math.inf
    if len(rng) != 2 or not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in rng):
        raise InputError(f"{path}: {key}.range: expected [low, high] numbers, got {rng!r}")
    lo, hi = float(rng[0]), float(rng[1])
    if units == "ratio":
        if nominal == 0 or not math.isfinite(nominal):
            raise InputError(f"{path}: {key}.units: the nominal of {name} is {nominal:g}, so a ratio means nothing; "
                             "give the range in physical units")
        lo, hi = lo * nominal, hi * nominal
    if not (math.isfinite(lo) and math.isfinite(hi)):
        raise InputError(f"{path}: {key}.range: [{lo:g}, {hi:g}] is not finite")
    if lo >= hi:
        raise InputError(f"{path}: {key}.range: [{lo:g}, {hi:g}] is empty or reversed (need low < high)")
    if lo < low_ok or hi > high_ok:
        raise InputError(f"{path}: {key}.range: [{lo:g}, {hi:g}] {unit} leaves the valid range of {name} "
                         f"[{low_ok:g}, {high_ok:g}]")
    if name == CONTROL_PERIOD:
        try:
            for end in (lo, hi):  # the plant rebuilt at either end must be within its own limits
                with_control_period(physics, end)
        except ValueError as exc:
            raise InputError(f"{path}: {key}: {exc}") from None
    blo, bhi = lo, hi
    if box is not None:
        if len(box) != 2 or not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in box):
            raise InputError(f"{path}: {key}.dispersion: expected [low, high] numbers, got {box!r}")
        blo, bhi = (float(box[0]) * nominal, float(box[1]) * nominal) if units == "ratio" else map(float, box)
        if not (lo <= blo < bhi <= hi):
            raise InputError(f"{path}: {key}.dispersion: [{blo:g}, {bhi:g}] must be a non-empty part of the range "
                             f"[{lo:g}, {hi:g}]")
    if dist == "loguniform" and blo <= 0:
        raise InputError(f"{path}: {key}.distribution: loguniform needs a range above 0, got [{lo:g}, {hi:g}]")
    if dist == "normal":
        if std is None:
            raise InputError(f"{path}: {key}.std: a normal distribution needs std (in the range's units)")
        if units == "ratio":
            std = std * nominal
            mean = None if mean is None else mean * nominal
        mean = nominal if mean is None else mean
        if not (blo <= mean <= bhi):
            raise InputError(f"{path}: {key}.mean: {mean:g} outside the dispersion [{blo:g}, {bhi:g}]")
    elif mean is not None or std is not None:
        raise InputError(f"{path}: {key}: mean/std only apply to distribution = \"normal\"")
    return Vary(name, unit, float(nominal), lo, hi, dist, mean, std, units, blo, bhi)


def scenario_head(plan_path: str) -> tuple[str | None, dict[str, Any], dict[str, Any]]:
    """The plan's env, options and start ranges, read before the plant exists."""
    from pretrial.tomlfile import read_toml

    data, _ = read_toml(plan_path)
    if "task" in data and "scenario" not in data:
        raise InputError(f"{plan_path}: is a run config (it has [task]), not a sweep plan (see configs/sweeps/)")
    scen = data.get("scenario", {})
    if not isinstance(scen, dict):
        raise InputError(f"{plan_path}: scenario: expected a table")
    env = scen.get("env")
    if env is not None and not isinstance(env, str):
        raise InputError(f"{plan_path}: scenario.env: expected an environment id string, got {env!r}")
    options = scen.get("options", {})
    start = scen.get("start", {})
    if not isinstance(options, dict):
        raise InputError(f"{plan_path}: scenario.options: expected a table")
    if not isinstance(start, dict):
        raise InputError(f"{plan_path}: scenario.start: expected a table of state name = half-range")
    return env, resolve_residual_path(options, Path(plan_path).parent), start


def unit_to_value(v: Vary, u: np.ndarray) -> np.ndarray:
    """Map uniform draws ``u`` in [0, 1) onto ``v``'s dispersion with its distribution (as the sweep draws)."""
    lo, hi = v.box_low, v.box_high
    if v.distribution == "loguniform":
        return np.exp(np.log(lo) + u * (np.log(hi) - np.log(lo)))
    if v.distribution == "normal":
        from scipy.stats import truncnorm

        a, b = (lo - v.mean) / v.std, (hi - v.mean) / v.std
        return truncnorm.ppf(u, a, b, loc=v.mean, scale=v.std)
    return lo + u * (hi - lo)


#: outward bracketing steps, as fractions of the way from the nominal to the range end
MARGIN_BRACKET = (1 / 16, 1 / 8, 1 / 4, 1 / 2, 1.0)


def planned_episodes(plan: Plan, physics: Physics) -> int:
    """A rough count of the episodes a plan runs (for the progress bar)."""
    b = plan.budgets
    d = len(plan.vary)
    n = 0
    run = set(plan.analyses)
    if "margins" in run:
        rounds = len(MARGIN_BRACKET) + max(1, math.ceil(math.log2(1 / (16 * b["tolerance"]))) + 1)
        n += plan.episodes * d * (1 + 2 * rounds)
    if "montecarlo" in run:
        n += b["montecarlo_samples"]
    if "worstcase" in run:
        n += b["worstcase_episodes"] * b["worstcase_population"] * d * (b["worstcase_iterations"] + 1)
    if "sensitivity" in run:
        n += b["sensitivity_samples"] * (d + 2) * b["sensitivity_episodes"]
    if "map" in run:
        n += b["map_points"] ** 2 * b.get("map_episodes", plan.episodes)
    if "integrator_check" in run:
        n += 3 * plan.episodes
    return max(n, 1)
