"""The task as workers see it: plant, episodes, network I/O, training distribution and objective.

A :class:`Task` is small and picklable; :func:`evaluate_chunk` runs in a worker and turns a
chunk of networks and the generation's scenarios into fitness. Scenarios come from the run's
seed on numbered streams (:data:`SCENARIO_STREAM` per generation, :data:`VALIDATION_STREAM` for
the finalists' re-test, :data:`VERDICT_STREAM` for their short verdict), never the plan's own.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from pretrial.controller.network import NetworkStack, PopulationNetwork
from pretrial.controller.policy import IOMap, PopulationPolicy
from pretrial.errors import InputError
from pretrial.evolution.config import Config
from pretrial.evolution.plan_training import (
    Objective,
    PlanDistribution,
    objective_fitness,
    parse_objective,
    quality_score,
)
from pretrial.sim.perturb import nominal_value
from pretrial.sim.quality import QualityLimits
from pretrial.sim.rollout import Scenarios, draw_scenarios, run_episodes

#: spawn keys of the run's random streams (``SeedSequence(seed, spawn_key=(STREAM, ...))``)
SCENARIO_STREAM, NEAT_STREAM, VALIDATION_STREAM, VERDICT_STREAM = 1, 2, 3, 4


@dataclass(frozen=True)
class Task:
    """Everything a worker needs to evaluate networks (picklable, small)."""

    env_id: str
    options: dict[str, Any]
    params: dict[str, float]
    max_steps: int
    io: IOMap
    randomize: dict[str, tuple[float, float]] = field(default_factory=dict)
    randomize_ramp: int = 0
    nominal: dict[str, float] = field(default_factory=dict)  # of each randomized name
    #: with a plan: its dispersions (the training distribution) and its loop-quality limits
    distribution: PlanDistribution | None = None
    quality: QualityLimits | None = None
    objective: Objective = field(default_factory=lambda: Objective("mean"))
    engine: str = "numpy"  # "compiled": episodes by pretrial.sim.compiled (checked by make_task)

    def ramp_fraction(self, generation: int | None) -> float:
        """How far the training distribution has widened at ``generation`` (1: fully; None: validation)."""
        if generation is None or generation >= self.randomize_ramp:
            return 1.0
        return generation / self.randomize_ramp

    def ranges(self, generation: int | None) -> dict[str, tuple[float, float]]:
        """The randomized ranges a generation draws from (``None``: the full ranges, for validation).

        Over the first ``randomize_ramp`` generations each range widens linearly
        from the nominal value (or the range's nearest end) to its full width: a
        curriculum, so the task is learnt before it is made hard.
        """
        if generation is None or generation >= self.randomize_ramp:
            return self.randomize
        f = generation / self.randomize_ramp
        out = {}
        for name, (lo, hi) in self.randomize.items():
            c = min(max(self.nominal[name], lo), hi)
            out[name] = (c + f * (lo - c), c + f * (hi - c))
        return out

    def physics(self):
        key = (self.env_id, json.dumps(self.options, sort_keys=True))
        phys = _PHYSICS_CACHE.get(key)
        if phys is None:
            from pretrial.sim.plant import make_plant

            phys = _PHYSICS_CACHE[key] = make_plant(self.env_id, **self.options)
        return phys


_PHYSICS_CACHE: dict[tuple[str, str], Any] = {}


def evaluate_chunk(item: tuple[Task, NetworkStack, Scenarios]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Fitness (the task's objective) and success rate per network, and diverged episodes per scenario.

    Runs in a worker. With the default objective the fitness is the mean return.
    """
    task, networks, scenarios = item
    physics = task.physics()
    if task.engine == "compiled":
        from pretrial.sim.compiled import run_compiled

        out = run_compiled(physics, networks, task.io, scenarios, task.max_steps, score=task.objective.needs_score)
    else:
        policy = PopulationPolicy(PopulationNetwork.of_stack(networks), task.io)
        out = run_episodes(physics, policy, scenarios, task.max_steps, score=task.objective.needs_score,
                           quality=task.quality)
    diverged = (out.failure == physics.diverged_code).sum(axis=0)  # failure is 0 on success
    score = out.score
    if score is not None and task.quality is not None and out.quality is not None:
        score = quality_score(score, out.success, out.quality, task.quality)
    fitness = objective_fitness(task.objective, out.returns, out.success, score)
    return fitness, out.success.mean(axis=1), diverged


def make_task(cfg: Config, training_plan: tuple | None = None) -> Task:
    """Derive the network's inputs, outputs and scaling from the env (and the plan, when training against one).

    ``training_plan`` is :func:`load_training_plan`'s result when the caller already has it.
    """
    from pretrial.sim.plant import make_plant

    if cfg.task.plan is not None:
        if cfg.run.engine == "compiled":
            raise InputError(f"{cfg.path}: run.engine: 'compiled' cannot train against a plan (its dispersions "
                             "perturb the loop and it judges loop quality); use engine = 'numpy'")
        return _plan_task(cfg, training_plan or load_training_plan(cfg))
    physics = make_plant(cfg.task.env, **cfg.task.env_options)
    io_map = _io_map(cfg, physics)
    steps = physics.max_steps if cfg.task.horizon is None else max(1, round(cfg.task.horizon / physics.dt))
    opts, params = dict(cfg.task.env_options), dict(cfg.task.params)
    nominal = {name: nominal_value(physics, params, name) for name in cfg.task.randomize}
    if cfg.run.engine == "compiled":
        from pretrial.sim.compiled import unsupported

        loop_names = [n for n in cfg.task.randomize if n.split(".")[0] not in physics.param_table]
        why = unsupported(physics, io_map, loop_names)
        if why is not None:
            raise InputError(f"{cfg.path}: run.engine: 'compiled' cannot run this config: {why}; "
                             "use engine = 'numpy'")
    return Task(cfg.task.env, opts, params, steps, io_map, dict(cfg.task.randomize), cfg.task.randomize_ramp, nominal,
                objective=parse_objective(cfg.task.objective), engine=cfg.run.engine)


def _io_map(cfg: Config, physics: Any) -> IOMap:
    blocks = physics.obs_blocks if cfg.task.network == "shared" else 1
    n_in, n_out = physics.obs_dim // blocks, physics.action_dim // blocks
    scale = physics.obs_scale
    obs_scale = [1.0 / s for s in scale] if scale else None
    act = str(cfg.neat.get("activation_default", "tanh"))
    # sigmoid outputs live in [0, 1]; map them onto the actuator range [-1, 1]
    a_scale, a_offset = ((2.0, -1.0) if act == "sigmoid" else (1.0, 0.0))
    return IOMap(n_in, n_out, blocks, obs_scale=obs_scale, action_scale=[a_scale] * physics.action_dim,
                 action_offset=[a_offset] * physics.action_dim)


def load_training_plan(cfg: Config) -> tuple[Any, Any, dict[str, Any], dict[str, float]]:
    """(plan, physics, env options, physics overrides) for a config that trains against ``cfg.task.plan``.

    The plan's scenario wins where both speak (options, start ranges, params,
    horizon), as the sweep will run it; the structural options (poles,
    observe, hoist) must agree.
    """
    from pretrial.analysis.plan import load_plan, scenario_head
    from pretrial.sim.plant import make_plant

    path = cfg.task.plan
    plan_env, plan_options, plan_start = scenario_head(path)
    if plan_env is not None and plan_env != cfg.task.env:
        raise InputError(f"{path}: scenario.env: the plan is for {plan_env}, the config trains {cfg.task.env}")
    options = dict(cfg.task.env_options)
    for k, v in plan_options.items():
        if k in ("poles", "observe", "hoist", "integral") and options.get(k, v) != v:
            raise InputError(f"{path}: scenario.options.{k}: {v!r} does not fit the config ({k}={options[k]!r})")
        options[k] = v
    if plan_start:
        options["start_spread"] = {**dict(options.get("start_spread") or {}), **plan_start}
    try:
        physics = make_plant(cfg.task.env, **options)
    except (TypeError, ValueError) as exc:
        raise InputError(f"{path}: scenario.options: {exc}") from None
    plan = load_plan(path, physics, cfg.task.env)
    params = {**cfg.task.params, **plan.params}
    return plan, physics, options, params


def _plan_task(cfg: Config, training_plan: tuple) -> Task:
    plan, physics, options, params = training_plan
    horizon = plan.horizon if plan.horizon is not None else cfg.task.horizon
    steps = physics.max_steps if horizon is None else max(1, round(horizon / physics.dt))
    dist = PlanDistribution.from_plan(plan.vary, physics, params, plan.calibration, cfg.task.corner_share)
    return Task(cfg.task.env, options, params, steps, _io_map(cfg, physics), {}, cfg.task.randomize_ramp,
                dict(dist.nominal), dist, plan.quality, parse_objective(cfg.task.objective))


def seed_int(seed: int, *key: int) -> int:
    return int(np.random.SeedSequence(seed, spawn_key=key).generate_state(1, dtype=np.uint64)[0])


def training_scenarios(task: Task, n: int, seed: int, *key: int, generation: int | None = None) -> Scenarios:
    ss = np.random.SeedSequence(seed, spawn_key=key)
    if task.distribution is not None:  # the plan's dispersions, on the run's own streams (never the plan's)
        physics = task.physics()
        base = physics.param_table.resolve_batch(task.params, n)
        seed64 = int(ss.generate_state(1, dtype=np.uint64)[0])
        return task.distribution.draw(physics, n, seed64, base, task.ramp_fraction(generation))
    return draw_scenarios(task.physics(), n, ss, task.params, task.ranges(generation))


def with_plan(cfg: Config, plan: str | Path, label: str = "--plan") -> Config:
    """``cfg`` training against the plan at ``plan`` (a path from the working directory).

    Every plan error is raised now (InputError naming ``label`` or the plan), before anything is written.
    """
    import dataclasses

    if not Path(plan).is_file():
        raise InputError(f"{label} {plan}: no such file")
    if cfg.task.randomize:
        raise InputError(f"{label} {plan}: {cfg.path} has [task.randomize]; with a plan its [[vary]] dispersions are "
                         "the training distribution: move those ranges into the plan")
    task = dataclasses.replace(cfg.task, plan=str(Path(plan).resolve()))
    new = dataclasses.replace(cfg, task=task)

    load_training_plan(new)  # every plan error now, before anything is written
    return new
