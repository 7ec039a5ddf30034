"""Per-generation wall time of ``pretrial evolve`` for every shipped config, against an earlier checkout.

Run: ``python benchmarks/evolve_configs.py --baseline-src DIR [--generations N] [--rounds R] [--workers W]``

``DIR`` is an earlier checkout of this repository (e.g. ``git worktree add /tmp/base 4637a5e``).
For each config both versions run the same command on the baseline's copy of the config (the
config as it was then, so the work per generation is the same),
``python -m pretrial evolve CONFIG --generations N --workers W --quiet``, in subprocesses that
alternate (baseline, this tree, baseline, ...) so that a busy machine slows both alike; the
figure is the median over ``R`` rounds of the seconds per generation (the run's own
``timing.csv``, so start-up and the champion's re-test are left out). Both versions are
checked to write the same ``history.csv`` (results must not change with speed work) unless a
stream version was deliberately bumped, which the row then says.

Prints one row per config: baseline and current s/generation, their ratio, and whether the
histories agree; the last line is ``median ratio: R`` over the configs.

``--engine compiled`` runs this tree with ``--engine compiled`` (give ``--baseline-src .`` to
compare the two engines of one tree): histories must then agree to rounding (``rounding``: every
column within 1e-9 relative), and configs the compiled engine refuses are listed with its reason.
"""

from __future__ import annotations

import argparse
import csv
import os
import statistics
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
CONFIGS = ("cartpole", "gantry", "double-pole", "double-pole-positions", "drone-pair", "drone-pair-wide")


class Refused(Exception):
    """The command refused the config (exit 2): the message is its one line."""


def _run(src: Path, config: Path, out: Path, generations: int, workers: int,
         engine: str | None = None) -> tuple[float, bytes]:
    env = dict(os.environ, PYTHONPATH=f"{src / 'src'}{os.pathsep}{src / 'envs'}", MPLBACKEND="Agg")
    cmd = [sys.executable, "-m", "pretrial", "evolve", str(config), "--generations", str(generations),
           "--workers", str(workers), "--out", str(out), "--quiet", *(["--engine", engine] if engine else [])]
    done = subprocess.run(cmd, env=env, capture_output=True, text=True)
    if done.returncode == 2 and engine:
        raise Refused(done.stderr.strip().splitlines()[-1])
    if done.returncode != 0:
        raise SystemExit(f"{src}: {' '.join(cmd)} failed:\n{done.stderr}")
    with open(out / "timing.csv", newline="") as f:
        seconds = [float(r["seconds"]) for r in csv.DictReader(f)]
    return statistics.median(seconds), (out / "history.csv").read_bytes()


def _close(a: bytes, b: bytes) -> bool:
    """Two history.csv files with the same rows and numbers within 1e-9 relative."""
    rows_a, rows_b = (list(csv.reader(t.decode().splitlines())) for t in (a, b))
    if len(rows_a) != len(rows_b) or rows_a[0] != rows_b[0]:
        return False
    for ra, rb in zip(rows_a[1:], rows_b[1:], strict=True):
        for x, y in zip(ra, rb, strict=True):
            if x != y and abs(float(x) - float(y)) > 1e-9 * max(abs(float(x)), abs(float(y))):
                return False
    return True


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--baseline-src", required=True, type=Path, help="an earlier checkout of this repository")
    ap.add_argument("--generations", type=int, default=3)
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--configs", nargs="*", default=list(CONFIGS))
    ap.add_argument("--engine", choices=("numpy", "compiled"), help="the engine of this tree's runs")
    args = ap.parse_args()
    ratios = []
    print(f"{'config':24s} {'baseline s/gen':>14s} {'current s/gen':>14s} {'ratio':>6s}  history")
    with tempfile.TemporaryDirectory() as tmp:
        for name in args.configs:
            config = args.baseline_src / "configs" / f"{name}.toml"
            if not config.is_file():
                print(f"{name:24s} (not in the baseline)")
                continue
            base, cur = [], []
            same: str | None = "same"
            try:
                for r in range(args.rounds):
                    b, hb = _run(args.baseline_src, config, Path(tmp) / f"{name}-b{r}", args.generations,
                                 args.workers)
                    c, hc = _run(ROOT, config, Path(tmp) / f"{name}-c{r}", args.generations, args.workers,
                                 args.engine)
                    base.append(b)
                    cur.append(c)
                    if hb != hc:
                        same = "rounding" if same != "DIFFERS" and _close(hb, hc) else "DIFFERS"
            except Refused as exc:
                print(f"{name:24s} (refused: {exc})")
                continue
            ratio = statistics.median(base) / statistics.median(cur)
            ratios.append(ratio)
            print(f"{name:24s} {statistics.median(base):14.3f} {statistics.median(cur):14.3f} {ratio:6.2f}  "
                  f"{same}", flush=True)
    print(f"median ratio: {statistics.median(ratios):.2f}")


if __name__ == "__main__":
    main()
