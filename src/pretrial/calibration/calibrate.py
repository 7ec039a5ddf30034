"""Calibration: plant parameters from bench logs, with their uncertainty (what ``pretrial calibrate`` runs).

Reads the logs (:mod:`pretrial.calibration.benchlog`), fits the named parameters by multiple shooting with a
block bootstrap (:mod:`pretrial.calibration.fit`), checks the fit on held-out data, and writes the
calibration directory (:mod:`pretrial.calibration.report`) through a hidden sibling renamed into
place, so a failed or interrupted run leaves nothing behind.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np

from pretrial.calibration.benchlog import SAVGOL_WINDOW, BenchLog, Segment, read_logs
from pretrial.calibration.fit import (
    FITTABLE_ACTUATOR,
    FLAT_LOADING,
    FLAT_RANGE_SHARE,
    FLAT_RELATIVE,
    SCALE_FLOOR,
    SINGULAR_RATIO,
    Estimate,
    Model,
    Windows,
    calibrate,
    check_actuation,
    make_windows,
    rmse,
)
from pretrial.calibration.report import SCHEMA, VERSION, with_hash, write_directory
from pretrial.console import jsonable
from pretrial.errors import InputError
from pretrial.files import check_new_dir, move_into_place, sha256_hex, staged
from pretrial.log import warn as log_warning
from pretrial.sim.perturb import PERTURBATIONS
from pretrial.sim.plant import resolve_env_id

#: default held-out share of segments for validation (every fifth segment; a tail of each when fewer than 5)
HOLDOUT = 0.2
WINDOW_S = 0.5
REPLICATES = 100


@dataclass
class CalibrationRequest:
    """What a calibration is asked for (the command's flags; the API's arguments).

    Attributes
    ----------
    env : str
        Environment id (full or short, or ``module:id``).
    logs : list of path
        Bench logs: ``t``, the env's states by name, its actions.
    fit : list of str
        Names to estimate (``"a,b"`` items are split): physics parameters, ``actuator_gain``,
        ``actuator_lag_s``, ``actuator_delay_s``.
    options, fixed, guess : dict
        Env keyword options; known values held fixed; where the fit of a name starts.
    window : float
        Multiple-shooting window, seconds.
    bootstrap, seed : int
        Bootstrap replicates (0: none) and the seed of their draws.
    validate : list of path
        Held-out logs (default: ``holdout`` of the segments).
    holdout : float
        Share of segments held out when no ``validate`` logs are given.
    out : path, optional
        The calibration directory (default ``calibrations/<env>-<UTC time>``).
    residual : bool
        Also fit a residual of the derivatives (``residual.json``), of ``residual_degree`` with the
        trust region widened by ``residual_margin``.
    """

    env: str
    logs: list[str]
    fit: list[str]
    options: dict[str, Any] = field(default_factory=dict)
    fixed: dict[str, Any] = field(default_factory=dict)
    guess: dict[str, Any] = field(default_factory=dict)
    window: float = WINDOW_S
    bootstrap: int = REPLICATES
    seed: int = 0
    validate: list[str] = field(default_factory=list)
    holdout: float = HOLDOUT
    out: str | None = None
    residual: bool = False
    residual_degree: int = 2
    residual_margin: float = 0.1


def run_calibration(req: CalibrationRequest, started: Callable[..., None] | None = None) -> tuple[dict[str, Any], Path]:
    """Fit, validate and write the calibration directory; returns the summary (calibration.json) and the directory.

    ``started(env_id, logs, log, fit_segments, names)`` is called once the logs are read, before the fit.
    The directory is written into a hidden sibling renamed into place, so a failed or interrupted run
    leaves nothing behind.
    """
    env_id = resolve_env_id(req.env)
    options = dict(req.options)
    _check_numbers(req)
    if req.residual:
        from pretrial.calibration.residual import check_options

        check_options(req.residual_degree, req.residual_margin)
    physics = _physics(env_id, options)
    names = _fit_names(physics, req.fit, req.fixed)
    log = read_logs(req.logs, physics, options.get("dt"))
    if "dt" not in options:
        physics = _physics(env_id, {**options, "dt": log.dt})
    model = _model(physics, names, req.fixed, req.guess)
    fit_segs, val_segs, source = _validation(req, physics, log)
    refusal = check_actuation(model, fit_segs + val_segs)
    if refusal:
        raise InputError(refusal)
    out = Path(req.out) if req.out else _default_out(env_id)
    check_new_dir(out)
    steps = max(1, int(round(req.window / physics.dt)))
    try:
        win = make_windows(fit_segs, steps)
    except ValueError as exc:
        raise InputError(f"{req.logs[0]}: {exc}") from None
    if started is not None:
        started(env_id, req.logs, log, fit_segs, names)
    est = calibrate(model, win, req.bootstrap, req.seed)
    val = make_windows(val_segs, steps) if any(len(s.t) > 1 for s in val_segs) else None
    residual_doc = None
    if req.residual:
        from pretrial.calibration.residual import residual_step, summary_entry

        residual_doc = residual_step(model, est, fit_segs, win, val, req.residual_degree, req.residual_margin)
    summary, plots = _summary(env_id, physics, model, req, log, win, val, source, est, fit_segs, val_segs,
                              None if residual_doc is None else summary_entry(residual_doc))
    for w in summary["warnings"]:
        log_warning(w)
    with staged(out) as stage:
        write_directory(stage, summary, set(physics.param_table.names),
                        {n: (model.spec(n).low, model.spec(n).high) for n in names}, plots)
        if residual_doc is not None:
            from pretrial.calibration.residual import write_residual

            write_residual(stage, residual_doc)
        move_into_place(stage, out)
    return summary, out


# --------------------------------------------------------------------------- #
# inputs
# --------------------------------------------------------------------------- #
def _check_numbers(args: CalibrationRequest) -> None:
    if not (np.isfinite(args.window) and args.window > 0):
        raise InputError(f"--window {args.window!r}: must be a positive number of seconds")
    if not (0.0 <= args.holdout < 1.0):
        raise InputError(f"--holdout {args.holdout!r}: must be a share from 0 to below 1")
    if args.bootstrap == 1:
        raise InputError("--bootstrap 1: needs 0 (none) or at least 2 replicates for a spread")


def _physics(env_id: str, options: dict[str, Any]):
    import pretrial_envs

    try:
        return pretrial_envs.make_physics(env_id, **options)
    except (TypeError, ValueError) as exc:
        raise InputError(f"{env_id}: --option: {exc}") from None


def _fit_names(physics, items: list[str], fixed: dict[str, Any]) -> tuple[str, ...]:
    """The ``--fit`` names, checked: known, fittable, not twice, not also fixed by ``--set``."""
    from pretrial_envs.core import unknown_name_message

    valid = [*physics.param_table.names, *FITTABLE_ACTUATOR]
    names: list[str] = []
    for item in items:
        for name in (n.strip() for n in item.split(",")):
            if not name:
                raise InputError(f"--fit {item!r}: an empty name")
            if name not in valid:
                if name.split(".")[0] in PERTURBATIONS.names:
                    raise InputError(f"--fit {name}: a log of states and actions cannot tell it; the generic "
                                     f"names it can: {', '.join(FITTABLE_ACTUATOR)}")
                raise InputError(f"--fit {name}: {unknown_name_message('parameter', name, valid)}")
            if name in names:
                raise InputError(f"--fit {name}: named twice")
            if name in fixed:
                raise InputError(f"--fit {name}: also fixed by --set {name}={fixed[name]!r}; fit it or fix it")
            names.append(name)
    return tuple(names)


def _model(physics, names: tuple[str, ...], fixed: dict[str, Any], guess: dict[str, Any]) -> Model:
    """The plant with ``--set`` applied and the fit's start (each value checked against its valid range)."""
    from pretrial_envs.core import ParamTable, unknown_name_message

    table = physics.param_table
    params: dict[str, float] = {}
    actuator = {n: PERTURBATIONS[n].nominal for n in FITTABLE_ACTUATOR}
    for name, value in fixed.items():
        try:
            if name in table:
                params[name] = table.check_value(name, value)
            elif name in FITTABLE_ACTUATOR:
                actuator[name] = PERTURBATIONS.check_value(name, value)
            else:
                valid = [*table.names, *FITTABLE_ACTUATOR]
                raise ValueError(unknown_name_message("parameter", name, valid))
        except ValueError as exc:
            raise InputError(f"--set {name}={value!r}: {exc}") from None
    start = []
    for name in names:
        spec = table[name] if name in table else PERTURBATIONS[name]
        value = guess.get(name, spec.nominal)
        try:
            start.append(ParamTable([spec]).check_value(name, value))
        except ValueError as exc:
            raise InputError(f"--guess {name}={value!r}: {exc}") from None
    for name in guess:
        if name not in names:
            raise InputError(f"--guess {name}: not a --fit name ({', '.join(names)})")
    physical = np.array([u not in ("-", "", "1") for u in physics.action_units])
    return Model(physics, table.resolve(params), names, actuator, physical, np.array(start))


def _validation(args: CalibrationRequest, physics, log: BenchLog) -> tuple[list[Segment], list[Segment], str]:
    """Fit segments, validation segments and where the latter come from."""
    segs = list(log.segments)
    if args.validate:
        val = read_logs(args.validate, physics, physics.dt)
        return segs, list(val.segments), f"--validate {' '.join(Path(v).name for v in args.validate)}"
    if args.holdout == 0:
        return segs, [], "none"
    every = max(2, int(round(1.0 / args.holdout)))
    if len(segs) >= every:
        held = [s for i, s in enumerate(segs) if i % every == every - 1]
        kept = [s for i, s in enumerate(segs) if i % every != every - 1]
        return kept, held, f"every {every}th segment held out (share {args.holdout:g})"
    kept, held = [], []
    for s in segs:  # too few segments: the last share of each
        cut = max(1, int(round(len(s.t) * (1.0 - args.holdout))))
        kept.append(_slice(s, 0, cut))
        if len(s.t) - cut >= 2:
            held.append(_slice(s, cut, len(s.t)))
    return kept, held, f"the last {args.holdout:.0%} of each segment held out"


def _slice(s: Segment, a: int, b: int) -> Segment:
    return replace(s, first_row=s.first_row + a, t=s.t[a:b], states=s.states[a:b], actions=s.actions[a:b])


def _default_out(env_id: str) -> Path:
    stamp = time.strftime("%Y%m%d-%H%M%S", time.gmtime())
    return Path("calibrations") / f"{env_id.split('/')[-1]}-{stamp}"


# --------------------------------------------------------------------------- #
# the summary
# --------------------------------------------------------------------------- #
def _rmse_table(physics, values: np.ndarray) -> dict[str, float]:
    return {n: float(v) for n, v in zip(physics.state_names, values)}


def _summary(env_id: str, physics, model: Model, args: CalibrationRequest, log: BenchLog,
             win: Windows, val: Windows | None, source: str, est: Estimate, fit_segs: list[Segment],
             val_segs: list[Segment], residual: dict[str, Any] | None = None) -> tuple[dict[str, Any], dict[str, Any]]:
    pred, fit_rmse = rmse(model, win, est.estimate)
    shown = val if val is not None else win
    shown_pred, val_rmse = rmse(model, val, est.estimate) if val is not None else (pred, None)
    names = list(est.names)
    units = {n: model.spec(n).unit for n in names}
    summary: dict[str, Any] = {
        "schema": SCHEMA,
        "version": VERSION,
        "env": {"id": env_id, "options": physics.options()},
        "fixed": {k: float(v) for k, v in args.fixed.items()},
        "params": {n: {"estimate": float(est.estimate[k]), "std": float(est.std[k]),
                       "ci95": [float(est.ci95[k, 0]), float(est.ci95[k, 1])]} for k, n in enumerate(names)},
        "names": names,
        "units": units,
        "state_units": dict(zip(physics.state_names, physics.state_units)),
        "correlation": est.correlation.tolist(),
        "bootstrap": est.boot.tolist(),
        "fit": {"rmse": _rmse_table(physics, fit_rmse), "segments": len(fit_segs),
                "samples": int(sum(len(s.t) for s in fit_segs)), "windows": win.count,
                "converged": est.converged, "solver": est.message},
        "validation": None if val is None else {
            "rmse": _rmse_table(physics, val_rmse), "segments": len(val_segs),
            "samples": int(sum(len(s.t) for s in val_segs)), "source": source},
        "identifiability": {"flags": est.flags, "singular_values": est.singular.tolist()},
        "warnings": _warnings(model, est),
        "method": {
            "window_s": float(args.window), "window_steps": win.length,
            "residual_scale": _rmse_table(physics, est.scale),
            "estimated_velocities": list(log.estimated), "savgol_window": SAVGOL_WINDOW,
            "bootstrap": {"replicates": int(args.bootstrap), "seed": int(args.seed), "units": est.units,
                          "unit_kind": est.unit_kind},
            "thresholds": {"flat_range_share": FLAT_RANGE_SHARE, "flat_relative": FLAT_RELATIVE,
                           "singular_ratio": SINGULAR_RATIO, "flat_loading": FLAT_LOADING,
                           "scale_floor": SCALE_FLOOR},
        },
        "logs": [_log_entry(p) for p in args.logs],
        **({"residual": residual} if residual is not None else {}),
    }
    summary = with_hash(jsonable(summary))
    first = shown.seg == shown.seg[0]
    t0 = shown.time[first][:, 0] - physics.dt
    names_s, units_s = list(physics.state_names), list(physics.state_units)
    where = "held-out" if val is not None else "fitted (none held out)"
    label = f"{where} segment {fit_or_val_label(val_segs if val is not None else fit_segs)}"
    plots = {
        "windows": dict(names=names_s, units=units_s, time=shown.time[first], target=shown.target[first],
                        pred=shown_pred[first], mask=shown.mask[first], t0=t0, x0=shown.x0[first],
                        title=f"{env_id}: measured and simulated windows (starts fitted near the measured states), "
                              f"{label}"),
        "residuals": dict(names=names_s, units=units_s, time=shown.time[first],
                          resid=shown_pred[first] - shown.target[first], mask=shown.mask[first],
                          title=f"simulated - measured, {label}"),
        "bootstrap": dict(names=names, units=[units[n] for n in names], boot=est.boot, estimate=est.estimate),
    }
    return summary, plots


def fit_or_val_label(segs: list[Segment]) -> str:
    """Where the plotted segment starts: ``file:row``."""
    s = next(s for s in segs if len(s.t) > 1)
    return f"{Path(s.source).name}:{s.first_row}"


def _warnings(model: Model, est: Estimate) -> list[str]:
    out = [f"{name} is not identifiable from these logs: {why}" for name, why in est.flags.items()]
    if not est.converged:
        out.append(f"the fit did not converge ({est.message}); the estimates are where it stopped")
    return out


def _log_entry(path: str) -> dict[str, Any]:
    data = Path(path).read_bytes()
    return {"name": Path(path).name, "sha256": sha256_hex(data), "rows": data.count(b"\n")}


# --------------------------------------------------------------------------- #
# text output
# --------------------------------------------------------------------------- #


