"""Monte Carlo sweep throughput: one cart-pole champion on 10,000 perturbed scenarios, beside a hand-written loop.

Run: ``python benchmarks/sweep_throughput.py [--rows 10000] [--hand-episodes 40] [--repeats 3]``

The policy is a fixed-topology neat-python genome of the size evolution
typically finds for the one-pole cart-pole: 4 inputs (x, x_dot, theta,
theta_dot, scaled by pretrial's usual ``1 / obs_scale``), 1 tanh output, 2
tanh hidden nodes (an "angle" node fed by theta and theta_dot, a "cart" node
fed by x and x_dot) and a direct theta -> output connection: 7 enabled
connections. It balances every nominal episode on both plants below.

Both paths run in this one process, on one core (BLAS/OpenMP threads are set
to 1 before numpy loads):

(a) by hand, as users write a Monte Carlo loop: ``neat.nn.FeedForwardNetwork.create``
    once, one ``gymnasium.make("CartPole-v1")`` reset per episode and stepped one
    step at a time with ``action = 1 if net.activate(obs * scale)[0] > 0 else 0``.
    It is timed on ``--hand-episodes`` episodes and scaled to steps/s. It applies
    no perturbation (CartPole-v1's actions are a discrete push, so an actuator
    gain or lag cannot be expressed), so it does less work per step than (b).
(b) pretrial, as a sweep runs it: ``draw_scenarios(..., fixed=...)`` with sensor
    noise, actuator gain and actuator lag set per row (10 x 10 grid of gain and
    lag, noise rising over the rows), then ``run_episodes(..., score=True)`` on
    ``pretrial/CartPole-v0`` at its defaults (RK4, 2 substeps per 0.02 s period,
    Florian friction): 8 derivative evaluations per step against (a)'s one
    forward-Euler step. The timing covers drawing the scenarios too.

The figure of merit is useful env-steps per second: steps simulated while an
episode was alive ((a): ``env.step`` calls; (b): the sum of ``Outcome.steps``).
Rows that fail early leave (b)'s batch in groups (``rollout.DROP_ROWS`` rows or a
quarter of the batch at once), so until their group goes the edge of the sweep
(about 16 % of rows fail) costs it some work the count does not credit.

Prints ``steps/s:`` (pretrial, useful env-steps per second; target >= 2,000,000)
and last ``ratio: N`` ((b) over (a) in useful env-steps per second; target >= 30).
"""

from __future__ import annotations

import os

# one core: set before numpy loads its BLAS / OpenMP runtime
for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_var] = "1"

import argparse  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
from typing import Any  # noqa: E402

import gymnasium  # noqa: E402
import neat  # noqa: E402
import numpy as np  # noqa: E402
from neat.genes import DefaultConnectionGene, DefaultNodeGene  # noqa: E402

from pretrial.controller.policy import IOMap, Policy, policy_from_genome  # noqa: E402
from pretrial.evolution.config import neat_defaults  # noqa: E402
from pretrial.sim.rollout import Outcome, draw_scenarios, run_episodes  # noqa: E402
from pretrial_envs.cartpole import CartPolePhysics  # noqa: E402

ENV_ID = "pretrial/CartPole-v0"
#: gymnasium CartPole-v1's plant: its gravity, no friction (with forward Euler, dt 0.02 s, one substep)
GYM_PARAMS = {"gravity": 9.8, "cart_friction": 0.0, "pole_friction": 0.0}
#: (source, destination, weight); pins -1..-4 are x, x_dot, theta, theta_dot, node 0 the output
CONNECTIONS = ((-3, 1, 0.6), (-4, 1, 0.5), (-1, 2, 0.4), (-2, 2, 0.3), (1, 0, 1.0), (2, 0, 0.5), (-3, 0, 0.2))
#: the sweep's ranges: sensor noise std (obs units), actuator gain, actuator lag (s)
NOISE_MAX, GAINS, LAG_MAX = 0.1, (0.3, 1.7), 0.1


def neat_config() -> neat.Config:
    """neat-python config from pretrial's shipped defaults, for 4 inputs and 1 output."""
    cp = neat_defaults()
    cp["DefaultGenome"]["num_inputs"] = "4"
    cp["DefaultGenome"]["num_outputs"] = "1"
    with tempfile.NamedTemporaryFile("w", suffix=".ini", delete=False) as f:
        cp.write(f)
    try:
        return neat.Config(neat.DefaultGenome, neat.DefaultReproduction, neat.DefaultSpeciesSet,
                           neat.DefaultStagnation, f.name)
    finally:
        os.unlink(f.name)


def champion() -> neat.DefaultGenome:
    """The fixed-topology champion (see the module docstring)."""
    genome = neat.DefaultGenome(1)
    for key in (0, 1, 2):
        node = DefaultNodeGene(key)
        node.bias, node.response, node.activation, node.aggregation = 0.0, 1.0, "tanh", "sum"
        genome.nodes[key] = node
    for i, (src, dst, weight) in enumerate(CONNECTIONS):
        conn = DefaultConnectionGene((src, dst), innovation=i)
        conn.weight, conn.enabled = weight, True
        genome.connections[(src, dst)] = conn
    return genome


def sweep_settings(rows: int) -> dict[str, np.ndarray]:
    """Per-row perturbations as a sweep sets them: a 10 x 10 gain x lag grid, noise rising over the rows."""
    grid = np.linspace(0.0, 1.0, 10)
    return {
        "sensor_noise_std": np.linspace(0.0, NOISE_MAX, rows),
        "actuator_gain": np.resize(GAINS[0] + (GAINS[1] - GAINS[0]) * grid, rows),
        "actuator_lag_s": np.resize(np.repeat(LAG_MAX * grid, 10), rows),
    }


def with_pretrial(policy: Policy, physics: CartPolePhysics, rows: int, seed: int,
                  base_params: dict[str, float]) -> tuple[Outcome, float]:
    """The sweep's batch: draw the scenarios, run them scored. Returns (outcome, seconds)."""
    t0 = time.perf_counter()
    scenarios = draw_scenarios(physics, rows, seed, base_params=base_params, fixed=sweep_settings(rows))
    outcome = run_episodes(physics, policy, scenarios, score=True)
    return outcome, time.perf_counter() - t0


def by_hand(genome: Any, config: neat.Config, scale: np.ndarray, episodes: int, seed: int,
            perturbed: bool) -> tuple[int, float]:
    """The hand-written loop, with the sweep's sensor noise and actuator gain or bare. Returns (steps, seconds)."""
    t0 = time.perf_counter()
    net = neat.nn.FeedForwardNetwork.create(genome, config)
    env = gymnasium.make("CartPole-v1")
    settings = sweep_settings(episodes)
    rng = np.random.default_rng(seed)
    steps = 0
    for ep in range(episodes):
        obs, _ = env.reset(seed=seed + ep)
        noise = settings["sensor_noise_std"][ep] if perturbed else 0.0
        env.unwrapped.force_mag = 10.0 * (settings["actuator_gain"][ep] if perturbed else 1.0)
        while True:
            measured = obs + noise * rng.standard_normal(4) if perturbed else obs
            obs, _, terminated, truncated, _ = env.step(1 if net.activate(measured * scale)[0] > 0 else 0)
            steps += 1
            if terminated or truncated:
                break
    env.close()
    return steps, time.perf_counter() - t0


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=10_000, help="scenarios in the batch (default 10,000)")
    ap.add_argument("--hand-episodes", type=int, default=40, help="episodes timed by hand (default 40)")
    ap.add_argument("--repeats", type=int, default=3, help="timed runs of each path; the best is reported")
    ap.add_argument("--seed", type=int, default=0)
    args = ap.parse_args()

    config = neat_config()
    genome = champion()
    physics = CartPolePhysics(integrator="euler", dt=0.02, substeps=1, time_limit=10.0)  # gymnasium's set-up
    default = CartPolePhysics()
    scale = np.array([1.0 / s for s in physics.obs_scale])
    policy = policy_from_genome(genome, config, env_id=ENV_ID, io=IOMap(4, 1, obs_scale=scale.tolist()))
    print(f"champion: 4 inputs, 2 hidden, 1 output, {len(CONNECTIONS)} connections (tanh); "
          f"{args.rows:,} scenarios: sensor noise 0..{NOISE_MAX}, actuator gain {GAINS[0]}..{GAINS[1]}, "
          f"actuator lag 0..{LAG_MAX} s")

    with_pretrial(policy, physics, min(args.rows, 500), args.seed, GYM_PARAMS)  # warm-up
    runs_b, runs_a, runs_bare = [], [], []
    for _ in range(max(1, args.repeats)):  # alternate, so machine noise hits both alike
        runs_b.append(with_pretrial(policy, physics, args.rows, args.seed, GYM_PARAMS))
        runs_a.append(by_hand(genome, config, scale, args.hand_episodes, args.seed, perturbed=True))
        runs_bare.append(by_hand(genome, config, scale, args.hand_episodes, args.seed, perturbed=False))
    rate_b, outcome = useful_rate(runs_b)
    rate_a = runs_a[0][0] / min(t for _, t in runs_a)
    rate_bare = runs_bare[0][0] / min(t for _, t in runs_bare)
    rate_rk4, out_rk4 = useful_rate([with_pretrial(policy, default, args.rows, args.seed, {})])

    steps_a = runs_a[0][0]
    print(f"\n(a) by hand, neat-python + gymnasium CartPole-v1: {args.hand_episodes} episodes, {steps_a:,} steps "
          f"(mean {steps_a / args.hand_episodes:.0f}), best of {len(runs_a)}")
    print(f"    {rate_a:12,.0f} env-steps/s with the sweep's sensor noise and actuator gain")
    print(f"    {rate_bare:12,.0f} env-steps/s bare (no perturbation)")
    computed = outcome.steps.size * int(outcome.steps.max())
    print(f"(b) pretrial run_episodes(score=True), one core, gymnasium's set-up: {outcome.steps.size:,} episodes, "
          f"{int(outcome.steps.sum()):,} useful steps ({outcome.success.mean():.0%} survive the 500 steps), "
          f"best of {len(runs_b)}")
    print(f"    {rate_b:12,.0f} env-steps/s useful ({int(outcome.steps.sum()) / computed:.0%} of the row-steps "
          "computed)")
    print(f"    {rate_rk4:12,.0f} env-steps/s useful on CartPole-v0's defaults (RK4 x2, friction; "
          f"{out_rk4.success.mean():.0%} survive), one run")
    print(f"ratio against the bare loop: {rate_b / rate_bare:.1f}")
    print(f"steps/s: {rate_b:,.0f}")
    print(f"ratio: {rate_b / rate_a:.1f}")


def useful_rate(runs: list[tuple[Outcome, float]]) -> tuple[float, Outcome]:
    """Useful env-steps per second of the fastest run, and its outcome."""
    outcome, seconds = min(runs, key=lambda r: r[1])
    return int(outcome.steps.sum()) / seconds, outcome


if __name__ == "__main__":
    main()
