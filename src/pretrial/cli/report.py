"""``pretrial report``: rebuild a sweep's report from ``results.json``, or compare sweeps of one plan."""

from __future__ import annotations

import argparse
import time
from pathlib import Path

from pretrial.console import emit_json, print_cautions, table
from pretrial.errors import InputError
from pretrial.files import check_new_dir, move_into_place, staged


def configure(p: argparse.ArgumentParser) -> None:
    """Arguments of ``pretrial report``."""
    p.add_argument("results", nargs="+", metavar="RESULTS",
                   help="a sweep directory or its results.json; two or more (of the same plan) are compared")
    p.add_argument("--out", metavar="DIR",
                   help="one sweep: where to rebuild (default the sweep directory); several: a new directory for "
                   "comparison.md/html (default comparisons/<plan>-<UTC time>/)")
    p.add_argument("--label", action="append", metavar="NAME",
                   help="column name of each compared sweep, in order (default their directory names)")
    p.add_argument("--json", action="store_true", help="print one JSON object instead of text")


def run(args: argparse.Namespace) -> int:
    """Run ``pretrial report``."""
    from pretrial.analysis.results import SweepResults

    sweeps = [SweepResults.read(_results_file(p)) for p in args.results]
    if len(sweeps) == 1:
        if args.label:
            raise InputError("--label: names the columns of a comparison; give two or more sweeps")
        from pretrial.report.sweep_report import rebuild_report

        files = rebuild_report(args.results[0], args.out)
        return _done(args, files, sweeps, [])
    from pretrial.report.compare import check_same_plan, default_labels, summary_rows, write_comparison

    labels = args.label or default_labels(args.results)
    if len(labels) != len(sweeps):
        raise InputError(f"--label: {len(labels)} given for {len(sweeps)} sweeps; give one per sweep or none")
    if len(set(labels)) != len(labels):
        raise InputError(f"--label: {', '.join(labels)}: each sweep needs its own name")
    check_same_plan(sweeps, labels)  # refused before anything is written
    plan = Path(str(sweeps[0]["plan"].get("path") or "plan")).stem
    stamp = time.strftime("%Y%m%d-%H%M%S", time.gmtime())
    out = Path(args.out) if args.out else Path("comparisons") / f"{plan}-{stamp}"
    check_new_dir(out)
    with staged(out) as stage:
        write_comparison(sweeps, labels, stage)
        move_into_place(stage, out)
    files = sorted(out.iterdir())
    return _done(args, files, sweeps, summary_rows(sweeps, labels))


def _results_file(arg: str) -> Path:
    p = Path(arg)
    if p.is_dir():
        if not (p / "results.json").is_file():
            raise InputError(f"{arg}: no results.json in this directory (is it a sweep directory?)")
        return p / "results.json"
    return p


def _done(args: argparse.Namespace, files: list[Path], sweeps: list, rows: list[dict]) -> int:
    if args.json:
        emit_json({"files": [str(f) for f in files], "sweeps": rows or [
            {"verdict": s.verdict, "failing": s.failing, "directory": str(s.directory)} for s in sweeps]})
        return 0
    if rows:
        table(["sweep", "verdict", "failing", "Monte Carlo success"],
              [[r["label"], r["verdict"].upper(), "; ".join(r["failing"]) or "-",
                "-" if r["montecarlo_success_rate"] is None else f"{r['montecarlo_success_rate']:.2%}"] for r in rows])
        print()
    for f in files:
        print(f"wrote {f}")
    print_cautions()
    return 0
