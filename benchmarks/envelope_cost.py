"""Cost of the trust-region check in the rollout: a hybrid cart-pole's episodes with and without it.

Run: ``python benchmarks/envelope_cost.py [--scenarios 10000] [--steps 200]``

Runs the LQR baseline on the hybrid cart-pole (a residual of degree 2 with random coefficients,
its envelope the upright region) through ``run_episodes``, alternately with the envelope check
(the rollout's own) and with it switched off (its tracker replaced by None, what a plant without a
residual gets), in this process so machine noise hits both alike. The last line is ``ratio: R``
(time with the check over time without: 1 is free). A plant without a residual never builds the
tracker, so for it the check is one ``is None`` test per step.
"""

from __future__ import annotations

import os

# one core: set before numpy loads its BLAS / OpenMP runtime
for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_var] = "1"

import argparse  # noqa: E402
import json  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

import pretrial_envs  # noqa: E402
from pretrial.analysis.lqr import design_lqr  # noqa: E402
from pretrial.sim import rollout  # noqa: E402
from pretrial_envs.residual import Envelope, Library, Residual, residual_document  # noqa: E402

ENV = "pretrial/CartPole-v0"


def hybrid_plant(directory: Path) -> pretrial_envs.core.Physics:
    physics = pretrial_envs.make_physics(ENV)
    lib = Library(physics.state_names, physics.state_units, physics.action_names, 2)
    coef = np.random.default_rng(0).normal(0.0, 1e-3, (2, lib.size))
    names = physics.state_names + physics.action_names
    env = Envelope(names, np.array([-1.0, -1.0, -0.1, -1.0, -5.0]), np.array([1.0, 1.0, 0.1, 1.0, 5.0]))
    path = directory / "residual.json"
    path.write_text(json.dumps(residual_document(Residual(lib, (1, 3), coef, env), physics)))
    return pretrial_envs.make_physics(ENV, residual=str(path))


def seconds(physics, policy, scenarios, steps: int) -> float:
    t0 = time.perf_counter()
    rollout.run_episodes(physics, policy, scenarios, max_steps=steps)
    return time.perf_counter() - t0


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--scenarios", type=int, default=10_000)
    ap.add_argument("--steps", type=int, default=200)
    ap.add_argument("--repeats", type=int, default=3)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        physics = hybrid_plant(Path(tmp))
        policy = design_lqr(pretrial_envs.make_physics(ENV))
        scenarios = rollout.draw_scenarios(physics, args.scenarios, 0)
        checked = rollout.envelope_tracker
        best_on, best_off = float("inf"), float("inf")
        for _ in range(args.repeats):  # alternate: machine noise hits both alike
            rollout.envelope_tracker = checked
            best_on = min(best_on, seconds(physics, policy, scenarios, args.steps))
            rollout.envelope_tracker = lambda physics, rows: None
            best_off = min(best_off, seconds(physics, policy, scenarios, args.steps))
        rollout.envelope_tracker = checked
    steps = args.steps * args.scenarios
    print(f"hybrid, envelope checked: {steps / best_on:,.0f} env-steps/s")
    print(f"hybrid, not checked: {steps / best_off:,.0f} env-steps/s")
    print(f"ratio: {best_on / best_off:.3f}")


if __name__ == "__main__":
    main()
