"""``pretrial sweep``: a controller and a plan in, a sweep directory out, the verdict as exit status."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any

from pretrial.analysis.sweep import LQR, run_sweep
from pretrial.cli.args import workers_arg
from pretrial.console import CAUTIONS, emit_json, fmt_number, print_cautions, table

#: exit status of ``pretrial sweep`` by verdict, so a pipeline can gate on it
EXIT_PASS = 0


EXIT_FAIL = 1


EPILOG = """exit status:
  0  verdict PASS (every requirement of the plan met)
  1  verdict FAIL (the sweep directory is written all the same)
  2  bad input (one-line error; nothing written)
  130  interrupted (Ctrl-C; no partial sweep directory)
  143  terminated (SIGTERM, e.g. from timeout or a batch scheduler; no partial sweep directory)"""


def configure(p: argparse.ArgumentParser) -> None:
    """Arguments of ``pretrial sweep``."""
    p.epilog = EPILOG
    p.formatter_class = argparse.RawDescriptionHelpFormatter  # keep the exit-status lines as written
    p.add_argument("policy", metavar="POLICY", help="policy file, run directory (its champion.json), or 'lqr'")
    p.add_argument("--plan", required=True, metavar="PLAN.toml", help="sweep plan, e.g. configs/sweeps/cartpole.toml")
    p.add_argument("--out", metavar="DIR", help="sweep directory (default sweeps/<plan>-<policy>-<UTC time>/)")
    p.add_argument("--workers", type=workers_arg, default="auto", help="worker processes: N or auto (default auto)")
    p.add_argument("--dask", metavar="ADDRESS", help="run on a Dask scheduler; 'local' starts a LocalCluster")
    p.add_argument("--baseline", choices=[LQR], help="also run the plan on the LQR baseline, side by side")
    p.add_argument("--json", action="store_true", help="print the results as one JSON object instead of text")


def run(args: argparse.Namespace) -> int:
    """Run ``pretrial sweep``."""
    quiet = args.json
    res, files = run_sweep(args.policy, args.plan, args.out, baseline=args.baseline == LQR, workers=args.workers,
                           dask=args.dask, log=None if quiet else (lambda line: print(line, flush=True)),
                           progress=not quiet and sys.stderr.isatty(), command=["pretrial", *getattr(args, "argv", [])])
    assert res.directory is not None
    if args.json:
        emit_json({**res.doc, "directory": str(res.directory), "files": [str(f) for f in files]})
    else:
        print_results(res.doc, res.directory)
    return exit_code(res.doc)


def exit_code(results: dict[str, Any]) -> int:
    """The verdict as an exit status: 0 pass, 1 fail (bad input is 2, Ctrl-C 130 and SIGTERM 143, from the CLI)."""
    return EXIT_PASS if results.get("verdict") == "pass" else EXIT_FAIL


def _with_interval(req: dict[str, Any]) -> str:
    """A requirement's measured value, with its Wilson 95% interval where it is a rate."""
    text = fmt_number(req["measured"])
    ci = req.get("interval")
    return f"{text} (95% {fmt_number(ci[0])} to {fmt_number(ci[1])})" if ci else text


def print_results(results: dict[str, Any], out: Path) -> None:
    """The text summary: verdict first, then requirements and the main evidence."""
    v = results["verdict"].upper()
    failed = [r["name"] for r in results["requirements"] if r["pass"] is False]
    print(f"\nverdict: {v}" + (f"  (failing: {'; '.join(failed)})" if failed else ""))
    table(["requirement", "required", "measured", "pass"],
          [[r["name"], fmt_number(r["required"]), _with_interval(r), {True: "yes", False: "NO"}.get(r["pass"], "n/a")]
           for r in results["requirements"]])
    if results.get("margins"):
        print("\nmargins (one at a time; edge = last value meeting the required rate)")
        table(["name", "unit", "nominal", "low", "high", "low ratio", "high ratio", "failure past low",
               "failure past high"],
              [[m["name"], m["unit"], fmt_number(m["nominal"]),
                fmt_number(m["low"]) + (" (range end)" if m["low_limit_reached"] else ""),
                fmt_number(m["high"]) + (" (range end)" if m["high_limit_reached"] else ""),
                fmt_number(m["low_ratio"]) if m["low_ratio"] is not None else "-",
                fmt_number(m["high_ratio"]) if m["high_ratio"] is not None else "-",
                m["low_failure"] or "-", m["high_failure"] or "-"] for m in results["margins"]])
    mc = results.get("montecarlo")
    if mc:
        modes = ", ".join(f"{k} {n}" for k, n in mc["failure_modes"].items()) or "none"
        print(f"\nMonte Carlo: {mc['successes']}/{mc['samples']} succeeded ({mc['success_rate']:.2%}, "
              f"95% interval {mc['ci95'][0]:.2%} to {mc['ci95'][1]:.2%}); failures: {modes}")
        if mc["worst"]:
            print(f"  worst sample: {mc['worst'][0]['replay']}")
    wc = results.get("worstcase")
    if wc:
        vals = ", ".join(f"{k}={fmt_number(x)}" for k, x in wc["values"].items())
        print(f"\nworst case found: score {fmt_number(wc['score'])} at {vals} "
              f"(success {_rate_text(wc['success_rate'], wc['episodes'])}, {wc['failure'] or 'no failure'})"
              f"\n  {wc['replay']}")
    for key, title in (("linear", "linear (continuous)"), ("linear_sampled", "linear (sampled)")):
        if results.get(key) is None:
            continue
        det = results["linear_details"]["continuous" if key == "linear" else "sampled"]
        if not det["linearizable"]:
            print(f"\n{title}: not linearizable: {det['reason']}")
            continue
        print(f"\n{title}")
        table(["channel", "gain margin low", "gain margin high", "gain margin dB", "phase margin deg",
               "delay margin s", "disk margin"],
              [[c["channel"], fmt_number(c["gain_margin_low"]),
                "none" if c["gain_margin_high"] is None else fmt_number(c["gain_margin_high"]),
                fmt_number(c["gain_margin_db"]), fmt_number(c["phase_margin_deg"]), fmt_number(c["delay_margin_s"]),
                fmt_number(c["disk_margin"])] for c in results[key]])
    base = results.get("baseline")
    if base:
        print(f"\nLQR baseline, same plan: verdict {base['verdict'].upper()}")
        bmc = base.get("montecarlo")
        if bmc and mc:
            print(f"  Monte Carlo success: policy {_rate_text(mc['success_rate'], mc['samples'])}, "
                  f"LQR {_rate_text(bmc['success_rate'], bmc['samples'])}")
    env = results.get("envelope")
    if env:  # a hybrid plant: how much of the sweep its residual's data covered
        print(f"\noutside the residual's data envelope: {env['share']:.1%} of the simulated time ({env['judged_on']})")
    for caution in results.get("cautions") or []:
        if caution not in CAUTIONS:  # this sweep's own (extrapolation, trained on the plan)
            print(f"\ncaution: {caution}")
    print(f"\nsweep directory: {out}  (report.html, report.md, results.json)")
    print_cautions()


def _rate_text(rate: float, n: int) -> str:
    """``"97.50% (39 of 40; 95% interval 87.12% to 99.56%)"``: a rate with its Wilson interval."""
    from pretrial.analysis.stats import wilson_interval

    k = round(rate * n)  # the rates stored are k / n exactly
    lo, hi = wilson_interval(k, n)
    return f"{rate:.2%} ({k} of {n}; 95% interval {float(lo):.2%} to {float(hi):.2%})"
