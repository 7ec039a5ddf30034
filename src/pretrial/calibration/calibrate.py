"""``pretrial calibrate``: plant parameters from bench logs, with their uncertainty.

Reads the logs (:mod:`pretrial.calibration.benchlog`), fits the named parameters by multiple shooting with a
block bootstrap (:mod:`pretrial.calibration.fit`), checks the fit on held-out data, and writes the
calibration directory (:mod:`pretrial.calibration.report`) through a hidden sibling renamed into
place, so a failed or interrupted run leaves nothing behind.
"""

from __future__ import annotations

import argparse
import sys
import time
from dataclasses import replace
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
from pretrial.console import emit_json, jsonable, table
from pretrial.errors import InputError
from pretrial.files import check_new_dir, move_into_place, sha256_hex, staged
from pretrial.sim.perturb import PERTURBATIONS

#: default held-out share of segments for validation (every fifth segment; a tail of each when fewer than 5)
HOLDOUT = 0.2
WINDOW_S = 0.5
REPLICATES = 100


def configure_cli(p: argparse.ArgumentParser) -> None:
    """Arguments of ``pretrial calibrate``."""
    from pretrial.cli.args import whole as whole_at_least

    def whole(text: str) -> int:
        return whole_at_least(text, 0)

    p.add_argument("logs", nargs="+", metavar="LOG.csv", help="bench logs: t, the env's states, its actions")
    p.add_argument("--env", required=True, metavar="ID", help="environment id (full or short)")
    p.add_argument("--option", action="append", metavar="NAME=VALUE", help="env keyword argument (repeatable)")
    p.add_argument("--set", action="append", metavar="NAME=VALUE",
                   help="fix a known parameter (physics, or actuator_gain/lag_s/delay_s) (repeatable)")
    p.add_argument("--fit", action="append", required=True, metavar="NAME[,NAME...]",
                   help="names to estimate: physics parameters, actuator_gain, actuator_lag_s, actuator_delay_s")
    p.add_argument("--guess", action="append", metavar="NAME=VALUE",
                   help="where the fit of a --fit name starts (default its nominal value) (repeatable)")
    p.add_argument("--window", type=float, default=WINDOW_S, metavar="S",
                   help=f"multiple-shooting window, seconds (default {WINDOW_S:g})")
    p.add_argument("--bootstrap", type=whole, default=REPLICATES, metavar="N",
                   help=f"bootstrap replicates (default {REPLICATES})")
    p.add_argument("--seed", type=whole, default=0, help="seed of the bootstrap draws (default 0)")
    p.add_argument("--validate", action="append", metavar="LOG.csv",
                   help="held-out logs to report the simulation error on (default: a share of the segments)")
    p.add_argument("--holdout", type=float, default=HOLDOUT, metavar="SHARE",
                   help=f"share of segments held out for validation when no --validate (default {HOLDOUT:g}; 0: none)")
    p.add_argument("--out", metavar="DIR", help="calibration directory (default calibrations/<env>-<UTC time>/)")
    p.add_argument("--residual", action="store_true",
                   help="also fit a residual of the derivatives the physics misses (writes residual.json)")
    p.add_argument("--residual-degree", type=whole, default=2, metavar="D",
                   help="highest degree of the residual's feature products (default 2)")
    p.add_argument("--residual-margin", type=float, default=0.1, metavar="SHARE",
                   help="trust region: the fitted envelope widened by this share of each span (default 0.1)")
    p.add_argument("--json", action="store_true", help="print the summary as one JSON object instead of text")


def run_cli(args: argparse.Namespace) -> int:
    """Run ``pretrial calibrate``; returns the exit status."""
    from pretrial.cli.args import parse_assignments
    from pretrial.sim.plant import resolve_env_id

    env_id = resolve_env_id(args.env)
    options = parse_assignments(args.option, "--option")
    _check_numbers(args)
    if args.residual:
        from pretrial.calibration.residual import check_options

        check_options(args.residual_degree, args.residual_margin)
    physics = _physics(env_id, options)
    fixed = parse_assignments(args.set, "--set")
    names = _fit_names(physics, args.fit, fixed)
    log = read_logs(args.logs, physics, options.get("dt"))
    if "dt" not in options:
        physics = _physics(env_id, {**options, "dt": log.dt})
    model = _model(physics, names, fixed, parse_assignments(args.guess, "--guess"))
    fit_segs, val_segs, source = _validation(args, physics, log)
    refusal = check_actuation(model, fit_segs + val_segs)
    if refusal:
        raise InputError(refusal)
    out = Path(args.out) if args.out else _default_out(env_id)
    check_new_dir(out)
    steps = max(1, int(round(args.window / physics.dt)))
    try:
        win = make_windows(fit_segs, steps)
    except ValueError as exc:
        raise InputError(f"{args.logs[0]}: {exc}") from None
    if not args.json:
        _say_start(env_id, args.logs, log, fit_segs, names)
    est = calibrate(model, win, args.bootstrap, args.seed)
    val = make_windows(val_segs, steps) if any(len(s.t) > 1 for s in val_segs) else None
    residual_doc = None
    if args.residual:
        from pretrial.calibration.residual import residual_step, summary_entry

        residual_doc = residual_step(model, est, fit_segs, win, val, args.residual_degree, args.residual_margin)
    summary, plots = _summary(env_id, physics, model, fixed, args, log, win, val, source, est, fit_segs, val_segs,
                              None if residual_doc is None else summary_entry(residual_doc))
    for w in summary["warnings"]:
        print(f"pretrial: warning: {w}", file=sys.stderr)
    with staged(out) as stage:
        write_directory(stage, summary, set(physics.param_table.names),
                        {n: (model.spec(n).low, model.spec(n).high) for n in names}, plots)
        if residual_doc is not None:
            from pretrial.calibration.residual import write_residual

            write_residual(stage, residual_doc)
        move_into_place(stage, out)
    if args.json:
        emit_json(summary)
    else:
        _say_result(summary, out)
    return 0


# --------------------------------------------------------------------------- #
# inputs
# --------------------------------------------------------------------------- #
def _check_numbers(args: argparse.Namespace) -> None:
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


def _validation(args: argparse.Namespace, physics, log: BenchLog) -> tuple[list[Segment], list[Segment], str]:
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


def _summary(env_id: str, physics, model: Model, fixed: dict[str, Any], args: argparse.Namespace, log: BenchLog,
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
        "fixed": {k: float(v) for k, v in fixed.items()},
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
def _say_start(env_id: str, logs: list[str], log: BenchLog, fit_segs: list[Segment], names: tuple[str, ...]) -> None:
    print(f"calibrating {env_id} ({', '.join(names)}) from {len(logs)} log(s): {len(log.segments)} segments, "
          f"{log.samples} samples at {log.dt:g} s; fitting on {len(fit_segs)} segments", flush=True)
    if log.estimated:
        print(f"estimated from positions (Savitzky-Golay derivative, {SAVGOL_WINDOW} samples): "
              f"{', '.join(log.estimated)}", flush=True)


def _say_result(summary: dict[str, Any], out: Path) -> None:
    rows = [[n, summary["units"][n], v["estimate"], v["std"], f"[{v['ci95'][0]:.5g}, {v['ci95'][1]:.5g}]"]
            for n, v in summary["params"].items()]
    print()
    table(["name", "unit", "estimate", "std", "95% interval"], rows)
    val = summary["validation"]
    print()
    table(["state", "unit", "fit RMSE", "validation RMSE"],
          [[n, summary["state_units"][n], v, "n/a" if val is None else val["rmse"][n]]
           for n, v in summary["fit"]["rmse"].items()])
    if val:
        print(f"validation: {val['source']} ({val['segments']} segments, {val['samples']} samples)")
    if summary.get("residual"):
        from pretrial.calibration.residual import say

        print("\n" + "\n".join(say(summary["residual"])))
    print(f"\ncalibration directory: {out}")
    print(f"next: paste {out}/params.toml into a run config's [task.params]; {out}/dispersion.toml holds "
          "[[vary]] blocks for its sweep plan")
