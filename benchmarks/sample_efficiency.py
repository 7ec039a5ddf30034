"""Evaluations NEAT needs to solve the two-pole cart with velocities, beside the NEAT paper's figure.

Run: ``python benchmarks/sample_efficiency.py [--seeds 10] [--workers 1] [--config configs/double-pole.toml]``

Each seed 1..N is one whole evolution run through pretrial's API
(``load_config``, the run seed replaced, ``Evolution(...).create()`` then
``run(generations)``), in a temporary run directory removed afterwards. A seed
counts as solved when the run reaches the config's fitness target; its
evaluations are the run's evaluation count at that generation (genomes
evaluated times episodes per genome; the config uses one episode, so genomes
evaluated). A seed that has not reached the target within the config's
``[run].generations`` is a failure and is left out of the median and mean.

Published figure: NEAT solved double pole balancing with velocities in 3,600
evaluations on average (Stanley & Miikkulainen 2002, "Evolving Neural Networks
through Augmenting Topologies", Evolutionary Computation 10(2)).

The success criteria differ, so the figures are comparable in spirit only: the
paper's network had to balance both poles for 100,000 time steps; here a run is
solved when its champion reaches the config's fitness target over a 20 s
episode (1,000 decisions) from the same fixed start (long pole tilted 0.07 rad).
A 20 s episode is the easier test.

Seconds per seed are the time spent in the generation loop (the run's own
timing), not counting the closing champion re-test and plots.

The last line is ``median evaluations: N``.
"""

from __future__ import annotations

import argparse
import dataclasses
import statistics
import tempfile
import time
from pathlib import Path

from pretrial.evolution.config import load_config
from pretrial.evolution.loop import Evolution
from pretrial.sim.execution import make_executor

PAPER_MEAN = 3600  # Stanley & Miikkulainen 2002, double pole balancing with velocities
CRITERIA = ("our criterion differs from the paper's: the paper balanced 100,000 steps; ours is the config's "
            "fitness target over a {horizon} episode ({steps:,} decisions) from the same fixed start, "
            "so the figures are comparable in spirit only")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", type=int, default=10, help="runs with seeds 1..N (default 10)")
    ap.add_argument("--workers", type=int, default=1, help="worker processes per run (default 1: in this process)")
    ap.add_argument("--config", default="configs/double-pole.toml")
    args = ap.parse_args()
    base = load_config(args.config)
    generations = base.run.generations
    print(f"{base.path}: {base.task.env} {base.task.env_options}, population {base.neat.get('pop_size')}, "
          f"{base.task.episodes} episode(s) per genome, fitness target {base.run.fitness_target}, "
          f"at most {generations} generations, workers {args.workers}")
    print(f"{'seed':>4s}  {'solved':>6s}  {'evaluations':>11s}  {'generations':>11s}  {'seconds':>8s}")

    solved: list[int] = []
    failures: list[int] = []
    steps = horizon = None
    with make_executor(args.workers) as executor, tempfile.TemporaryDirectory(prefix="pretrial-sample-") as tmp:
        for seed in range(1, args.seeds + 1):
            cfg = dataclasses.replace(base, run=dataclasses.replace(base.run, seed=seed))
            evo = Evolution(cfg, Path(tmp) / f"seed-{seed}", executor, log=lambda _line: None)
            evo.create()
            t0 = time.perf_counter()
            summary = evo.run(generations)
            wall = time.perf_counter() - t0
            steps = evo.task.max_steps
            horizon = f"{steps * evo.task.physics().dt:g} s"
            ok = summary["target_reached"]
            if ok:
                solved.append(summary["evaluations"])
            else:
                failures.append(seed)
            print(f"{seed:4d}  {'yes' if ok else 'NO':>6s}  {summary['evaluations']:11,d}  "
                  f"{summary['generations']:11d}  {summary['seconds']:8.1f}   (wall with re-test {wall:.1f} s)")

    print()
    if solved:
        print(f"solved {len(solved)} of {args.seeds}: evaluations median {statistics.median(solved):,.0f}, "
              f"mean {statistics.mean(solved):,.0f}, min {min(solved):,d}, max {max(solved):,d}"
              + (f", stdev {statistics.stdev(solved):,.0f}" if len(solved) > 1 else ""))
    print(f"failures (target not reached within {generations} generations): {len(failures)}"
          + (f" (seeds {', '.join(map(str, failures))})" if failures else ""))
    print(f"NEAT paper (Stanley & Miikkulainen 2002): {PAPER_MEAN:,d} evaluations on average")
    print(CRITERIA.format(horizon=horizon, steps=steps))
    print(f"median evaluations: {statistics.median(solved):.0f}" if solved else "median evaluations: none solved")


if __name__ == "__main__":
    main()
