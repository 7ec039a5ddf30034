"""Cost of a learned residual per env-step: the hybrid cart-pole beside the physics-only one.

Run: ``python benchmarks/residual_cost.py [--num-envs 10000] [--steps 200] [--degree 2]``

Builds a residual of the given degree (random coefficients: the cost does not depend on their
values) for pretrial's cart-pole, writes it as a residual.json, and times the VectorEnv with
``residual=`` beside the same env without it, alternating the two in this process so machine noise
hits both alike. Prints steps/s of each; the last line is ``ratio: R`` (hybrid time per step over
physics-only time per step: 1 is free).
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

import gymnasium as gym  # noqa: E402
import numpy as np  # noqa: E402

import pretrial_envs  # noqa: E402
from pretrial_envs.residual import Envelope, Library, Residual, residual_document  # noqa: E402

ENV = "pretrial/CartPole-v0"


def residual_file(directory: Path, degree: int) -> str:
    physics = pretrial_envs.make_physics(ENV)
    lib = Library(physics.state_names, physics.state_units, physics.action_names, degree)
    coef = np.random.default_rng(0).normal(0.0, 1e-3, (2, lib.size))
    names = physics.state_names + physics.action_names
    res = Residual(lib, (1, 3), coef, Envelope(names, -np.ones(len(names)), np.ones(len(names))))
    path = directory / "residual.json"
    path.write_text(json.dumps(residual_document(res, physics)))
    return str(path)


def seconds(env, actions, steps: int) -> float:
    env.reset(seed=0)
    t0 = time.perf_counter()
    for _ in range(steps):
        env.step(actions)
    return time.perf_counter() - t0


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--num-envs", type=int, default=10_000)
    ap.add_argument("--steps", type=int, default=200)
    ap.add_argument("--degree", type=int, default=2)
    ap.add_argument("--repeats", type=int, default=3)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        path = residual_file(Path(tmp), args.degree)
        plain = gym.make_vec(ENV, num_envs=args.num_envs, vectorization_mode="vector_entry_point")
        hybrid = gym.make_vec(ENV, num_envs=args.num_envs, vectorization_mode="vector_entry_point", residual=path)
        # small commands keep the poles up over the timed steps (no resets)
        actions = np.random.default_rng(1).uniform(-0.05, 0.05, (args.num_envs, 1))
        best_p, best_h = float("inf"), float("inf")
        for _ in range(args.repeats):  # alternate: machine noise hits both alike
            best_p = min(best_p, seconds(plain, actions, args.steps))
            best_h = min(best_h, seconds(hybrid, actions, args.steps))
        n = hybrid.unwrapped.physics.residual.library.size if hasattr(hybrid, "unwrapped") else "?"
    steps = args.steps * args.num_envs
    print(f"physics only: {steps / best_p:,.0f} env-steps/s")
    print(f"hybrid (degree {args.degree}, {n} features x 2 states): {steps / best_h:,.0f} env-steps/s")
    print(f"ratio: {best_h / best_p:.2f}")


if __name__ == "__main__":
    main()
