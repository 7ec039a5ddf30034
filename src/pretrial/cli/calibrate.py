"""``pretrial calibrate``: plant parameters from bench logs, with their uncertainty.

Arguments and printing only; the work is :func:`pretrial.calibration.calibrate.run_calibration`.
"""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import Any

from pretrial.calibration.benchlog import SAVGOL_WINDOW
from pretrial.calibration.calibrate import HOLDOUT, REPLICATES, WINDOW_S, CalibrationRequest, run_calibration
from pretrial.cli.args import parse_assignments
from pretrial.cli.args import whole as whole_at_least
from pretrial.console import emit_json, table


def configure(p: argparse.ArgumentParser) -> None:
    """Arguments of ``pretrial calibrate``."""
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


def run(args: argparse.Namespace) -> int:
    """Run ``pretrial calibrate``; returns the exit status."""
    req = CalibrationRequest(
        env=args.env, logs=list(args.logs), fit=list(args.fit), options=parse_assignments(args.option, "--option"),
        fixed=parse_assignments(args.set, "--set"), guess=parse_assignments(args.guess, "--guess"),
        window=args.window, bootstrap=args.bootstrap, seed=args.seed, validate=list(args.validate or []),
        holdout=args.holdout, out=args.out, residual=args.residual, residual_degree=args.residual_degree,
        residual_margin=args.residual_margin)
    summary, out = run_calibration(req, started=None if args.json else _say_start)
    if args.json:
        emit_json(summary)
    else:
        _say_result(summary, out)
    return 0


def _say_start(env_id: str, logs: list[str], log: Any, fit_segs: list[Any], names: tuple[str, ...]) -> None:
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
