"""Evaluating a NEAT population on the cart-pole: the hand-written loop beside pretrial's batched rollout.

Run: ``python benchmarks/evolution_throughput.py [--genomes 150] [--episodes 16] [--seed 0]``

Both paths evaluate the same neat-python genomes (a population made from
pretrial's shipped neat-python defaults, then mutated so that most genomes
carry a hidden node or more), each on the same number of episodes of at most
500 steps, in this one process, on one core:

(a) by hand, as users write it: per genome ``neat.nn.FeedForwardNetwork.create``,
    per episode ``gymnasium.make("CartPole-v1")`` stepped one step at a time with
    ``action = 1 if net.activate(obs)[0] > 0 else 0`` until terminated or truncated;
(b) pretrial: ``stack_genomes`` -> ``PopulationPolicy`` (``IOMap(4, 1)``) ->
    ``pretrial.sim.rollout.run_episodes`` on ``pretrial/CartPole-v0`` set up as
    gymnasium's (forward Euler, dt 0.02 s, one substep, 10 s, gravity 9.8,
    frictionless). Its action is the tanh output times ``max_force`` rather than
    a bang-bang push, so episode lengths differ a little between the paths;
(c) pretrial's compiled engine (``[run] engine = "compiled"``, numba; printed when numba is
    installed): ``NetworkStack.of_genomes`` -> ``pretrial.sim.compiled.run_compiled`` on the
    same plant and scenarios, each row run alone to its end in compiled code. Its episodes
    end where (b)'s do (printed: share of equal outcomes, largest return difference).

Random genomes mostly fail within a few dozen steps, so the figure of merit is
useful env-steps per second: steps actually simulated while the episode was
alive (a: ``env.step`` calls; b: the sum of ``Outcome.steps``). pretrial also
steps some rows that have already ended: it drops them from the plant's batch in
groups (``rollout.DROP_ROWS`` rows or a quarter of the batch at once), and
whole genomes from the networks once most genomes have no row left; the row-steps
the plant computed are counted in one more, untimed run and printed with their
rate. Each timing covers the whole evaluation
(compiling the networks, making the environments, drawing start states). If (a)
would take longer than ``--hand-seconds``, it stops after a whole genome once
that budget is spent (genomes taken in a seeded random order), and the
comparison uses per-step rates, never totals. ``--profile`` prints where (b)
spends its time.

The ratio depends on the population, not only on the code: one genome that
survives long keeps all finished rows of (b) stepping, so a population of
random genomes (most episodes over in ~15 steps) is (b)'s hardest case, and
one whose genomes all balance for 500 steps its easiest.

The same comparison is printed for 1 and ``--episodes`` episodes per genome,
with (b) on gymnasium's physics and on pretrial's cart-pole defaults (RK4, 2
substeps, Florian friction: 8 derivative evaluations per step against (a)'s
one Euler step); (a) is gymnasium's CartPole-v1 in every row. Then (b)'s time
per control step is split into a fixed part and a part per row (two batch
sizes of 40 steps with no row ending): the fixed part is what small batches pay.

The last lines are the ratio of each engine, then ``ratio: N``: over (a) in useful env-steps
per second, for ``--episodes`` episodes per genome on gymnasium's physics, of (c) when numba is
installed, else of (b). Target: N >= 30; the product's bar (DESIGN.md) is 100.

Measured 2026-12-05, session 25 (2 cores, defaults, numpy engine only): ``ratio:`` 41.4-43.1 in
3 runs with the other core idle (40.3-42.1 in 5 runs beside other work); 1 episode per genome
5.4-5.6 on gymnasium's physics (5.0-5.4 beside other work), 1.5-1.7 at pretrial's defaults;
16 episodes at the defaults 15.1-15.8; per control step 73-77 us fixed + 49-51 ns per row
(gymnasium's physics), 154-165 us + 224-230 ns (defaults). Compiling the 150 genomes takes 1.2 ms
(``controller/genome_arrays.py``; 2.9 ms genome by genome).

Measured 2026-12-05, session 26, with the compiled engine (3 runs, machine slower and noisier
than the day before: (b)'s fixed cost per step 84-168 us): ``ratio:`` (c) 129.6, 168.4, 131.5;
(b) 44.4, 31.0, 46.5 in the same runs. 1 episode per genome: (c) 35.8-42.7 on gymnasium's
physics, 22.3-26.7 at the defaults. 16 episodes at the defaults: (c) 31.3-50.4, (b) 15.4-20.8.
Every episode of (c) ended at the same step with the same outcome as (b)'s; returns within
6e-13 (numpy's ``tanh`` against the C library's). (c) costs about 150 ns per useful step on
gymnasium's physics and 500-650 ns at the defaults (8 derivative evaluations, each a ``sin``,
``cos`` and ``tanh`` of the C library, scalar), against (b)'s 224-240 ns per row at large
batches: so (c) wins where batches are small or episodes short (this population), and
numpy wins once a whole population balances for long episodes at the defaults (see README).

Why 100 is out of reach for this numpy path (same figures): the headline run steps 151 control
periods (one genome balances long after the others fell) for 35,750 row-steps, and must take
at most 7.2 ms for N = 100 against (a)'s ~46,500 env-steps/s. The stacked networks of this
population take 58 numpy calls per step (6 levels: a gather, a product, one add per input
position so that sums run in neat-python's order, the bias, then ``tanh(2.5 z)`` as three calls),
about 25 us; the cart-pole derivative alone about 13 us. With every other per-step cost at
zero (episode rules, failure codes, bookkeeping), 151 x 38 us + 1.8 ms of per-row work + 1.2 ms
of compiling is 8.7 ms: N ~ 83. Fewer calls per step means either a different summation order
(``np.add.reduceat`` sums pairwise, so results would no longer equal neat-python's or earlier
runs') or a compiled kernel, whose ``tanh`` and ``exp`` differ from numpy's in the last bit
(measured: 27 % and 4.6 % of values), so that outputs would agree to ~1e-12, not bit for bit.
"""

from __future__ import annotations

import os

# one core: set before numpy loads its BLAS / OpenMP runtime
for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_var] = "1"

import argparse  # noqa: E402
import cProfile  # noqa: E402
import pstats  # noqa: E402
import statistics  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
from typing import Any  # noqa: E402

import gymnasium  # noqa: E402
import neat  # noqa: E402
import numpy as np  # noqa: E402

from pretrial.controller.network import NetworkStack, stack_genomes  # noqa: E402
from pretrial.controller.policy import IOMap, PopulationPolicy  # noqa: E402
from pretrial.evolution.config import neat_defaults  # noqa: E402
from pretrial.sim.compiled import available, run_compiled  # noqa: E402
from pretrial.sim.rollout import Outcome, draw_scenarios, run_episodes  # noqa: E402
from pretrial_envs.cartpole import CartPolePhysics  # noqa: E402

HORIZON = 500  # CartPole-v1's max_episode_steps; pretrial: 10 s at dt 0.02
GYM_PARAMS = {"gravity": 9.8, "cart_friction": 0.0, "pole_friction": 0.0}


def neat_config(genomes: int) -> neat.Config:
    """neat-python config from pretrial's shipped defaults, for 4 inputs and 1 output."""
    cp = neat_defaults()
    cp["DefaultGenome"]["num_inputs"] = "4"
    cp["DefaultGenome"]["num_outputs"] = "1"
    cp["NEAT"]["pop_size"] = str(genomes)
    fd, path = tempfile.mkstemp(suffix=".ini")
    try:
        with os.fdopen(fd, "w") as f:
            cp.write(f)
        return neat.Config(neat.DefaultGenome, neat.DefaultReproduction, neat.DefaultSpeciesSet,
                           neat.DefaultStagnation, path)
    finally:
        os.unlink(path)


def make_genomes(config: neat.Config, seed: int, mutations: int) -> list[Any]:
    """A fresh population, each genome then mutated ``mutations`` times by neat-python's own operators."""
    population = neat.Population(config, seed=seed)  # seeds Python's random, which neat-python draws from
    genomes = list(population.population.values())
    for _ in range(mutations):
        for genome in genomes:
            genome.mutate(config.genome_config)
    return genomes


def by_hand(genomes: list[Any], config: neat.Config, episodes: int, seed: int,
            budget: float) -> tuple[int, float, float, int]:
    """The hand-written loop. Returns (env.step calls, seconds, seconds in make + reset, genomes done)."""
    order = np.random.default_rng(seed).permutation(len(genomes))
    steps, setup, done = 0, 0.0, 0
    t0 = time.perf_counter()
    for i in order:
        net = neat.nn.FeedForwardNetwork.create(genomes[i], config)
        for ep in range(episodes):
            t_setup = time.perf_counter()
            env = gymnasium.make("CartPole-v1")
            obs, _ = env.reset(seed=seed + ep)  # every genome sees the same start states
            setup += time.perf_counter() - t_setup
            while True:
                obs, _, terminated, truncated, _ = env.step(1 if net.activate(obs)[0] > 0 else 0)
                steps += 1
                if terminated or truncated:
                    break
            env.close()
        done += 1
        if time.perf_counter() - t0 > budget:
            break
    return steps, time.perf_counter() - t0, setup, done


def with_pretrial(genomes: list[Any], config: neat.Config, physics: CartPolePhysics, episodes: int,
                  seed: int, base_params: dict[str, float] | None = GYM_PARAMS,
                  engine: str = "numpy") -> tuple[Outcome, float]:
    """pretrial's evaluation of all genomes (physics overrides ``base_params``). Returns (outcome, seconds)."""
    t0 = time.perf_counter()
    scenarios = draw_scenarios(physics, episodes, seed, base_params=base_params)
    if engine == "compiled":
        outcome = run_compiled(physics, NetworkStack.of_genomes(genomes, config), IOMap(4, 1), scenarios, HORIZON)
    else:
        policy = PopulationPolicy(stack_genomes(genomes, config), IOMap(4, 1))
        outcome = run_episodes(physics, policy, scenarios, max_steps=HORIZON)
    return outcome, time.perf_counter() - t0


def plant_row_steps(genomes: list[Any], config: neat.Config, physics: CartPolePhysics, episodes: int, seed: int,
                    base_params: dict[str, float] | None) -> int:
    """Row-steps the plant computed in one (untimed) run of (b): the rows of every ``transition`` call."""
    count = 0
    transition = physics.transition

    def counted(state: np.ndarray, *args: Any, **kwargs: Any) -> Any:
        nonlocal count
        count += len(state)
        return transition(state, *args, **kwargs)

    physics.transition = counted  # an instance attribute over the method, removed below
    try:
        with_pretrial(genomes, config, physics, episodes, seed, base_params)
    finally:
        del physics.transition
    return count


def per_step_costs(genomes: list[Any], config: neat.Config, physics: CartPolePhysics, seed: int,
                   steps: int = 40, scenarios: tuple[int, int] = (1, 16)) -> tuple[float, float]:
    """(b)'s time per control step split into a fixed part and a part per row: (seconds, seconds per row).

    Runs the population for ``steps`` control periods on two batch sizes (``len(genomes)``
    times each of ``scenarios``) with gravity and force at 0, so that no row ends and every step
    carries the whole batch; the straight line through the two per-step times gives both parts.
    """
    still = {**GYM_PARAMS, "gravity": 0.0, "max_force": 0.0}
    policy = PopulationPolicy(stack_genomes(genomes, config), IOMap(4, 1))
    per_step = []
    for s in scenarios:
        batch = draw_scenarios(physics, s, seed, base_params=still)
        run_episodes(physics, policy, batch, max_steps=steps)  # warm-up
        times = []
        for _ in range(5):
            t0 = time.perf_counter()
            out = run_episodes(physics, policy, batch, max_steps=steps)
            times.append(time.perf_counter() - t0)
        if int(out.steps.min()) != steps:
            raise RuntimeError("per_step_costs: a row ended early, the split would be wrong")
        per_step.append(min(times) / steps)
    rows = [len(genomes) * s for s in scenarios]
    per_row = (per_step[1] - per_step[0]) / (rows[1] - rows[0])
    return per_step[0] - per_row * rows[0], per_row


def compare(genomes: list[Any], config: neat.Config, physics: CartPolePhysics, base: dict[str, float] | None,
            episodes: int, seed: int, hand: tuple[int, float, float, int], repeats: int, label: str,
            detail: bool, engine: str = "numpy") -> float:
    """(b) beside the already-timed hand loop ``hand``; prints a summary, returns the ratio of useful steps/s."""
    g = len(genomes)
    # warm-up: first-call allocations and caches (the compiled engine: numba compiles here)
    with_pretrial(genomes, config, physics, episodes, seed, base, engine)
    runs = [with_pretrial(genomes, config, physics, episodes, seed, base, engine) for _ in range(max(1, repeats))]
    outcome = runs[0][0]
    t_b = statistics.median(t for _, t in runs)
    useful_b = int(outcome.steps.sum())
    computed_b = plant_row_steps(genomes, config, physics, episodes, seed, base) if detail and engine == "numpy" else 0
    steps_a, t_a, setup_a, done_a = hand
    rate_a = steps_a / t_a
    rate_b = useful_b / t_b
    if detail and engine != "numpy":
        print(f"(c) pretrial run_compiled (engine = \"compiled\"), one core, {label}: {g * episodes} episodes, "
              f"{useful_b:,} useful steps in {t_b:.4f} s (median of {len(runs)})")
        print(f"    {rate_b:12,.0f} env-steps/s useful (each row runs alone to its end: no step is wasted)")
    elif detail:
        rate_a_no_setup = steps_a / (t_a - setup_a)
        print(f"(a) by hand, neat-python + gymnasium: {done_a} of {g} genomes, {done_a * episodes} episodes, "
              f"{steps_a:,} steps (mean {steps_a / (done_a * episodes):.1f} per episode) in {t_a:.3f} s")
        print(f"    {rate_a:12,.0f} env-steps/s   ({setup_a / t_a:.0%} of the time in gymnasium.make + reset; "
              f"without it {rate_a_no_setup:,.0f} env-steps/s)")
        print(f"(b) pretrial run_episodes, one core, {label}: {g} genomes, {g * episodes} episodes, "
              f"{useful_b:,} useful steps (mean {useful_b / (g * episodes):.1f} per episode, "
              f"{outcome.success.mean():.0%} reach the horizon) in {t_b:.4f} s (median of {len(runs)})")
        print(f"    {rate_b:12,.0f} env-steps/s useful")
        print(f"    {computed_b / t_b:12,.0f} row-steps/s computed ({computed_b:,} row-steps, "
              f"{useful_b / computed_b:.0%} of them useful)")
        print(f"ratio without make + reset in (a): {rate_b / rate_a_no_setup:.1f}")
    return rate_b / rate_a


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--genomes", type=int, default=150, help="population size (default 150)")
    ap.add_argument("--episodes", type=int, default=16, help="episodes per genome of the last line (default 16)")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--mutations", type=int, default=30, help="mutation rounds applied to the new population")
    ap.add_argument("--hand-seconds", type=float, default=30.0,
                    help="time budget of the hand-written loop; past it, (a) stops after the current genome")
    ap.add_argument("--repeats", type=int, default=5, help="timed runs of (b); the median is reported")
    ap.add_argument("--hand-repeats", type=int, default=3,
                    help="timed runs of (a) per episode count; the one with the median rate is used")
    ap.add_argument("--profile", action="store_true", help="print cProfile's top entries for (b)")
    args = ap.parse_args()

    config = neat_config(args.genomes)
    genomes = make_genomes(config, args.seed, args.mutations)
    hidden = [sum(1 for k in g.nodes if k not in config.genome_config.output_keys) for g in genomes]
    enabled = [sum(1 for c in g.connections.values() if c.enabled) for g in genomes]
    gym_physics = CartPolePhysics(integrator="euler", dt=0.02, substeps=1, time_limit=10.0)
    default_physics = CartPolePhysics(time_limit=10.0)
    plants = (("gymnasium's physics", gym_physics, GYM_PARAMS),
              (f"pretrial's defaults ({default_physics.integrator}, {default_physics.substeps} substeps, friction)",
               default_physics, None))
    g, e = len(genomes), args.episodes
    print(f"{g} genomes (hidden nodes: mean {np.mean(hidden):.1f}, max {max(hidden)}; enabled connections: "
          f"mean {np.mean(enabled):.1f}), horizon {HORIZON} steps; (a) is gymnasium's CartPole-v1 throughout")

    engines = ["numpy", "compiled"] if available() else ["numpy"]
    ratios: dict[tuple[str, str, int], float] = {}
    for episodes in sorted({1, e}):
        hands = [by_hand(genomes, config, episodes, args.seed, args.hand_seconds)
                 for _ in range(max(1, args.hand_repeats))]
        hand = sorted(hands, key=lambda h: h[0] / h[1])[len(hands) // 2]
        for engine in engines:
            for label, physics, base in plants:
                detail = episodes == e and physics is gym_physics
                if detail:
                    print()
                ratios[engine, label, episodes] = compare(genomes, config, physics, base, episodes, args.seed, hand,
                                                          args.repeats, label, detail, engine)
    if "compiled" in engines:
        for label, physics, base in plants:
            a = with_pretrial(genomes, config, physics, e, args.seed, base)[0]
            c = with_pretrial(genomes, config, physics, e, args.seed, base, "compiled")[0]
            same = np.mean((a.steps == c.steps) & (a.failure == c.failure))
            print(f"(b) and (c), {label}: {same:.2%} of episodes end at the same step with the same outcome, "
                  f"returns within {np.max(np.abs(a.returns - c.returns)):.1e}")

    print("\nratio of useful env-steps/s over (a), by engine, plant set-up and episodes per genome:")
    for (engine, label, episodes), r in ratios.items():
        print(f"  {engine:8s} {label}, {episodes:2d} episode{'s' if episodes > 1 else ' '} per genome: {r:6.1f}")
    print("\n(b) per control step with no row ending (40 steps at 150 and 2,400 rows):")
    for label, physics, _ in plants:
        fixed, per_row = per_step_costs(genomes, config, physics, args.seed, scenarios=(1, 16))
        print(f"  {label}: {fixed * 1e6:6.1f} us per step + {per_row * 1e9:6.1f} ns per row")

    if args.profile:
        prof = cProfile.Profile()
        prof.enable()
        with_pretrial(genomes, config, gym_physics, e, args.seed)
        prof.disable()
        print("\n(b) profile, top entries by own time:")
        pstats.Stats(prof).sort_stats("tottime").print_stats(15)

    for engine in engines:
        print(f"ratio, {engine} engine: {ratios[engine, plants[0][0], e]:.1f}")
    print(f"ratio: {ratios[engines[-1], plants[0][0], e]:.1f}")


if __name__ == "__main__":
    main()
