"""Seconds per generation with one worker and with two local worker processes, and that both agree.

Run: ``python benchmarks/scaling.py [--generations 3] [--config configs/gantry.toml] [--seed 1]``

The same config and seed are evolved twice in this one process, each in its
own temporary run directory: once with the serial ``Executor`` (work in this
process) and once with ``ProcessExecutor(2)`` (two spawned local workers). The
two runs advance in turn, one generation each, so machine noise hits both
alike (each ``run(k)`` call also re-tests the champion and draws the plots,
which the per-generation timings leave out). Pool start-up is kept out of the
timing twice over: the pool's workers are started and have imported pretrial
before the first generation, and generation 0 (first-call costs in every
process: physics caches, allocations) is not counted for either executor.
Seconds per generation are the mean of the run's own per-generation timings
over generations 1.. (so ``--generations`` must be at least 2).

Rows are independent, so results do not depend on how the population is cut
into work items: the two ``history.csv`` files must be byte-identical; the
script says whether they are and exits with status 1 if not.

The last line is ``speedup: N`` (serial seconds per generation over two
workers'). The ceiling on two free cores is below 2: each worker gets one item
(half the genomes, ``evolution.loop.chunk_size``), so the per-row work halves
but each worker still pays the rollout's fixed cost per control step for as
long as its longest episode runs. Measured (2026-12-05, 2 cores, load average
below 1, ``--generations 5``): ``configs/gantry.toml`` (200 genomes x 16 episodes
against its plan) serial 1.65 s, two processes 1.27 s per generation, speedup
1.30; the earlier gantry config (150 x 8, no plan) 1.36. Again later that day
(``--generations 4``, after faster network compiling): 1.50 s and 1.15 s, 1.30.
Where the ceiling comes from (same day, generation 3's population evaluated in one
process): the whole population takes 1.67 s, its two halves 0.95 s and 1.14 s, so
each half costs about 0.41 s of fixed per-step work whatever its size and the slower
half is 0.68 of the whole (configs/cartpole.toml: 0.39 s whole, 0.25 s each half, 0.65).
"""

from __future__ import annotations

import argparse
import dataclasses
import os
import statistics
import sys
import tempfile
import time
from pathlib import Path

from pretrial.evolution.config import load_config
from pretrial.evolution.loop import Evolution
from pretrial.sim.execution import Executor, ProcessExecutor

WORKERS = 2


def _warm(_item: int) -> int:
    """Import the evaluation code in a worker; the short nap lets every worker take an item."""
    import pretrial.evolution.loop  # noqa: F401

    time.sleep(0.2)
    return os.getpid()


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--generations", type=int, default=3, help="generations per run, >= 2 (default 3)")
    ap.add_argument("--config", default="configs/gantry.toml")
    ap.add_argument("--seed", type=int, default=None, help="run seed (default: the config's)")
    args = ap.parse_args()
    if args.generations < 2:
        ap.error("--generations must be >= 2: generation 0 is not timed")
    cfg = load_config(args.config)
    if args.seed is not None:
        cfg = dataclasses.replace(cfg, run=dataclasses.replace(cfg.run, seed=args.seed))
    options = f" {cfg.task.env_options}" if cfg.task.env_options else ""
    print(f"{cfg.path}: {cfg.task.env}{options}, population {cfg.neat.get('pop_size')}, "
          f"{cfg.task.episodes} episodes per genome, seed {cfg.run.seed}, {args.generations} generations")

    load_before = os.getloadavg()[0]
    serial, pool = Executor(), ProcessExecutor(WORKERS)
    with serial, pool, tempfile.TemporaryDirectory(prefix="pretrial-scaling-") as tmp:
        # Start both workers and import the evaluation code in them before any timing.
        started = len(set(pool.map(_warm, range(2 * WORKERS))))
        runs = {}
        for label, executor in (("serial", serial), (f"{WORKERS} processes", pool)):
            evo = Evolution(cfg, Path(tmp) / label.replace(" ", "-"), executor, log=lambda _line: None)
            evo.create()
            runs[label] = evo
        for k in range(1, args.generations + 1):
            for evo in runs.values():
                evo.run(k)
        histories = {label: (evo.run_dir / "history.csv").read_bytes() for label, evo in runs.items()}
        per_gen = {label: statistics.mean(evo.timing[1:]) for label, evo in runs.items()}

    timed = args.generations - 1
    print(f"pool warmed before timing: {started} of {WORKERS} workers answered")
    for label, seconds in per_gen.items():
        print(f"  {label:12s} {seconds:8.2f} s/generation (mean of generations 1..{timed})")
    first, second = histories.values()
    identical = first == second
    print(f"history.csv identical between the two: {'yes' if identical else 'NO'} "
          f"({len(first.splitlines()) - 1} generations, {len(first)} bytes)")
    print(f"cores: {os.cpu_count()}, 1-minute load average before {load_before:.2f}, after {os.getloadavg()[0]:.2f} "
          "(other work on the same cores lowers the speed-up)")
    speedup = per_gen["serial"] / per_gen[f"{WORKERS} processes"]
    print(f"speedup: {speedup:.2f}")
    if not identical:
        sys.exit(1)


if __name__ == "__main__":
    main()
