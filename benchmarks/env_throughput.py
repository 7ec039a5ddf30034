"""Batched env-steps per second of every environment, and the cart-pole beside gymnasium's.

Run: ``python benchmarks/env_throughput.py [--num-envs 10000] [--steps 300]``

Prints steps/s of each environment's VectorEnv at its defaults, then the
cart-pole in gymnasium's own configuration (forward Euler, dt 0.02 s, one
substep, frictionless, gymnasium's constants) next to gymnasium's
``CartPoleVectorEnv`` timed in the same process, alternating the two so
machine noise hits both alike. The last line is ``ratio: R`` (pretrial over
gymnasium); the target is R >= 0.7.
"""

from __future__ import annotations

import os

# one core: set before numpy loads its BLAS / OpenMP runtime
for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_var] = "1"

import argparse  # noqa: E402
import time  # noqa: E402

import gymnasium as gym  # noqa: E402
import numpy as np  # noqa: E402
from gymnasium.envs.classic_control.cartpole import CartPoleVectorEnv  # noqa: E402

import pretrial_envs  # noqa: E402, F401  (registers the pretrial/ ids with gymnasium)


def steps_per_second(env, actions, steps: int, repeats: int = 3) -> float:
    """Best of ``repeats`` timings of ``steps`` vector steps, in env-steps per second."""
    best = float("inf")
    for _ in range(repeats):
        env.reset(seed=0)
        t0 = time.perf_counter()
        for _ in range(steps):
            env.step(actions)
        best = min(best, time.perf_counter() - t0)
    return steps * env.num_envs / best


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--num-envs", type=int, default=10_000)
    ap.add_argument("--steps", type=int, default=300)
    args = ap.parse_args()
    n, steps = args.num_envs, args.steps
    rng = np.random.default_rng(0)

    print(f"batched env-steps per second at N = {n} (VectorEnv.step, defaults of each env)")
    for env_id, kwargs in [
        ("pretrial/CartPole-v0", {}),
        ("pretrial/CartPole-v0", {"poles": 2}),
        ("pretrial/DronePair-v0", {}),
        ("pretrial/GantryCrane-v0", {}),
        ("pretrial/GantryCrane-v0", {"hoist": True}),
    ]:
        env = gym.make_vec(env_id, num_envs=n, vectorization_mode="vector_entry_point", **kwargs)
        phys = env.unwrapped.physics
        a = rng.uniform(-1, 1, (n, phys.action_dim))
        rate = steps_per_second(env, a, steps)
        label = f"{env_id} {kwargs or ''}".strip()
        print(f"  {label:45s} {phys.integrator} x{phys.substeps}  {rate:14,.0f} steps/s")

    # Like for like: gymnasium's configuration; both envs ~never terminate on these actions
    # within the window (alternating pushes), and both autoreset the ones that do.
    ours = gym.make_vec(
        "pretrial/CartPole-v0",
        num_envs=n,
        vectorization_mode="vector_entry_point",
        integrator="euler",
        dt=0.02,
        substeps=1,
        max_episode_steps=500,
        params={"gravity": 9.8, "cart_friction": 0.0, "pole_friction": 0.0},
    )
    theirs = CartPoleVectorEnv(num_envs=n, max_episode_steps=500)
    ours_rates, theirs_rates = [], []
    ours_a = rng.choice([-1.0, 1.0], size=(n, 1))
    theirs_a = (ours_a[:, 0] > 0).astype(np.int64)
    for _ in range(3):
        ours_rates.append(steps_per_second(ours, ours_a, steps, repeats=1))
        theirs_rates.append(steps_per_second(theirs, theirs_a, steps, repeats=1))
    r_ours, r_theirs = max(ours_rates), max(theirs_rates)
    print("\ncart-pole in gymnasium's configuration (euler, dt 0.02, 1 substep, frictionless)")
    print(f"  gymnasium CartPoleVectorEnv              {r_theirs:14,.0f} steps/s")
    print(f"  pretrial  CartPole-v0 VectorEnv          {r_ours:14,.0f} steps/s")
    print(f"ratio: {r_ours / r_theirs:.2f}")


if __name__ == "__main__":
    main()
