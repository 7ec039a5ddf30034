"""Run configs: TOML in, validated dataclasses out; every error names file and key.

A config has four tables::

    [task]              env, episodes, horizon, network layout
    [task.options]      the env's keyword arguments (poles, hoist, dt, substeps, ...)
    [task.params]       physics overrides (names from the env's parameter table)
    [task.randomize]    NAME = [low, high]: drawn afresh each generation ("NAME.CHANNEL" for one channel)
    [neat]              neat-python settings by name, merged onto the shipped defaults
    [run]               generations, seed, fitness_target, checkpoint_every, workers, dask, engine

Unknown keys, wrong types and impossible values raise :class:`InputError` with
one line: ``FILE: KEY: what is wrong (what is allowed)``, suggesting the nearest
valid key.
"""

from __future__ import annotations

import configparser
import difflib
import math
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path
from typing import Any

from pretrial.errors import InputError
from pretrial.files import canonical_json, sha256_hex
from pretrial.limits import EPISODES, GENERATIONS, HORIZON, NEAT, SEED, check_horizon, check_total
from pretrial.sim.compiled import ENGINES
from pretrial.sim.hybrid import resolve_residual_path
from pretrial.tomlfile import TableReader, channel_items, kind_name, read_toml

NETWORK_LAYOUTS = ("whole", "shared")


@dataclass(frozen=True)
class TaskConfig:
    """What is evolved against: the env, its options and the scenarios per genome."""

    env: str
    env_options: dict[str, Any] = field(default_factory=dict)
    params: dict[str, float] = field(default_factory=dict)
    episodes: int = 8
    horizon: float | None = None  # seconds of simulated time; None = the env's time limit
    network: str = "whole"  # "shared": one network per repeated observation block (drones)
    randomize: dict[str, tuple[float, float]] = field(default_factory=dict)
    randomize_ramp: int = 0  # generations over which the ranges widen from nominal; 0 = full at once
    plan: str | None = None  # a sweep plan whose scenario and dispersions are the training distribution
    objective: str = "mean"  # "mean", "cvar:A" or "success_lower_bound" (see pretrial.evolution.plan_training)
    corner_share: float = 0.0  # with a plan: share of training scenarios on corners of the dispersion box


@dataclass(frozen=True)
class RunConfig:
    """How long, how reproducible and where to run."""

    generations: int = 100
    seed: int = 0
    fitness_target: float | None = None
    checkpoint_every: int = 10
    workers: int | str = "auto"
    dask: str | None = None
    finalists: int = 5
    validation_episodes: int = 32
    linear_every: int = 0  # with a plan: every N generations the best genomes' linear loops are checked (0: never)
    linear_top: int = 3  # how many of the best genomes are linearized
    verdict_samples: int = 256  # with a plan: Monte Carlo samples of each finalist's short verdict
    engine: str = "numpy"  # what runs the episodes: numpy (the reference) or compiled (numba; pretrial.sim.compiled)


@dataclass(frozen=True)
class Config:
    """A whole run config, as loaded from ``path``."""

    path: str
    task: TaskConfig
    neat: dict[str, Any]
    run: RunConfig
    source_text: str = ""

    @property
    def name(self) -> str:
        return Path(self.path).stem

    def content_hash(self) -> str:
        """SHA-256 of what decides the results (where the work runs is left out)."""
        data = self.to_dict()
        for key in ("workers", "dask"):
            data["run"].pop(key, None)
        return sha256_hex(canonical_json(data))  # independent of how any TOML writer formats it

    def to_dict(self) -> dict[str, Any]:
        """The resolved config as plain TOML-able data (what config.resolved.toml holds)."""
        task: dict[str, Any] = {"env": self.task.env, "episodes": self.task.episodes, "network": self.task.network}
        if self.task.horizon is not None:
            task["horizon"] = self.task.horizon
        out: dict[str, Any] = {"task": task}
        if self.task.env_options:
            task["options"] = dict(self.task.env_options)
        if self.task.params:
            task["params"] = dict(self.task.params)
        if self.task.randomize:
            task["randomize"] = {k: list(v) for k, v in self.task.randomize.items()}
        if self.task.randomize_ramp:
            task["randomize_ramp"] = self.task.randomize_ramp
        if self.task.plan is not None:
            task["plan"] = self.task.plan
        if self.task.objective != "mean":
            task["objective"] = self.task.objective
        if self.task.corner_share:
            task["corner_share"] = self.task.corner_share
        out["neat"] = dict(self.neat)
        run = {k: v for k, v in self.run.__dict__.items() if v is not None}
        if run.get("engine") == "numpy":  # the default: configs from before the key keep their hash
            del run["engine"]
        out["run"] = run
        return out


# --------------------------------------------------------------------------- #
# reading
# --------------------------------------------------------------------------- #


def neat_defaults() -> configparser.ConfigParser:
    """The shipped neat-python defaults (src/pretrial/data/neat-defaults.ini)."""
    cp = configparser.ConfigParser()
    cp.read_string(resources.files("pretrial").joinpath("data/neat-defaults.ini").read_text())
    return cp


def neat_key_sections() -> dict[str, str]:
    """neat-python setting name -> section in its config file."""
    cp = neat_defaults()
    keys = {k: s for s in cp.sections() for k in cp[s]}
    # settings neat-python accepts that our defaults leave to the library
    for extra in ("seed",):
        keys[extra] = "NEAT"
    for attr in ("time_constant",):
        for item in ("init_mean", "init_stdev", "init_type", "replace_rate", "mutate_rate", "mutate_power",
                     "max_value", "min_value"):
            keys[f"{attr}_{item}"] = "DefaultGenome"
    return keys


#: [neat] keys the run sets itself
_DERIVED_NEAT = {
    "num_inputs": "derived from the environment",
    "num_outputs": "derived from the environment",
    "fitness_threshold": "set [run].fitness_target instead",
    "no_fitness_termination": "set [run].fitness_target instead",
    "seed": "set [run].seed instead",
}


def load_config(path: str | Path) -> Config:
    """Read and validate a run config; raises :class:`InputError` on any problem."""
    data, text = read_toml(path)
    path = str(path)
    top = TableReader(path, "", data)
    task_t = top.table_of("task")
    neat_t = top.table_of("neat")
    run_t = top.table_of("run")
    top.finish()

    t = TableReader(path, "task", task_t)
    env = t.take("env", str, allowed="an environment id, e.g. 'pretrial/CartPole-v0'")
    episodes = t.take("episodes", int, 8, limit=EPISODES)
    horizon = t.take("horizon", float, None, limit=HORIZON)
    network = t.take("network", str, "whole", lambda v: v in NETWORK_LAYOUTS, " or ".join(NETWORK_LAYOUTS))
    env_options = resolve_residual_path(t.table_of("options"), Path(path).parent)  # relative to the config
    params = t.table_of("params")
    randomize_t = t.table_of("randomize")
    ramp = t.take("randomize_ramp", int, 0, lambda v: 0 <= v <= 1_000_000,
                  "generations over which the [task.randomize] ranges widen from the nominal values, "
                  "a whole number from 0 (full ranges at once) to 1000000")
    plan_path = t.take("plan", str, None, lambda v: bool(v.strip()), "the path of a sweep plan")
    objective = t.take("objective", str, "mean")
    corner_share = t.take("corner_share", float, 0.0, lambda v: 0 <= v <= 1, "a share of the episodes, 0 to 1")
    t.finish()
    from pretrial.evolution.plan_training import parse_objective

    try:
        parse_objective(objective)
    except ValueError as exc:
        raise InputError(f"{path}: task.objective: {exc}") from None
    if plan_path is not None:  # relative to the config file, so a config and its plan move together
        plan_path = str((Path(path).parent / plan_path).resolve())
        if not Path(plan_path).is_file():
            raise InputError(f"{path}: task.plan: {plan_path}: no such file")

    from pretrial.sim.plant import make_plant

    spread = env_options.get("start_spread", {})
    if not isinstance(spread, dict):  # named by its key here; the core's ValueError names the option only
        t.fail("task.options.start_spread",
               f"expected a table of state name = spread, got {kind_name(spread)} {spread!r}")
    try:
        physics = make_plant(env, **env_options)
    except InputError as exc:
        raise InputError(f"{path}: task.env: {exc.message}") from None
    except (TypeError, ValueError) as exc:
        raise InputError(f"{path}: task.options: {exc}") from None
    if horizon is not None:
        try:
            check_horizon(horizon, physics, "task.horizon")
        except ValueError as exc:
            raise InputError(f"{path}: {exc}") from None
    for name, value in params.items():
        try:
            physics.param_table.index(name)
            if isinstance(value, bool) or not isinstance(value, (int, float)):
                raise ValueError(f"{value!r} is not a number")
            physics.param_table.check_value(name, value)
        except ValueError as exc:
            raise InputError(f"{path}: task.params.{name}: {exc}") from None
    params = {k: float(v) for k, v in params.items()}

    from pretrial.sim.perturb import plant_refusal, spec_of

    randomize: dict[str, tuple[float, float]] = {}
    for name, rng in channel_items(randomize_t):
        key = f"task.randomize.{name}"
        try:
            spec = spec_of(physics, name)
        except ValueError as exc:
            raise InputError(f"{path}: {key}: {exc}") from None
        if (
            not isinstance(rng, list)
            or len(rng) != 2
            or not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in rng)
        ):
            raise InputError(f"{path}: {key}: expected [low, high] numbers, got {rng!r}")
        lo, hi = float(rng[0]), float(rng[1])
        if not (math.isfinite(lo) and math.isfinite(hi)) or lo > hi:
            raise InputError(f"{path}: {key}: range [{lo:g}, {hi:g}] is reversed or not finite")
        if lo < spec.low or hi > spec.high:
            raise InputError(
                f"{path}: {key}: range [{lo:g}, {hi:g}] leaves the valid range "
                f"[{spec.low:g}, {spec.high:g}] {spec.unit}"
            )
        if plant_refusal(physics, name):
            raise InputError(f"{path}: {key}: {plant_refusal(physics, name)}")
        randomize[name] = (lo, hi)
    if ramp and not randomize and plan_path is None:
        raise InputError(f"{path}: task.randomize_ramp: {ramp} needs ranges to widen: add [task.randomize]")
    if plan_path is not None and randomize:
        raise InputError(f"{path}: task.randomize: with task.plan the plan's [[vary]] dispersions are the training "
                         "distribution; move these ranges into the plan")
    if network == "shared" and not getattr(physics, "obs_blocks", 0):
        raise InputError(
            f"{path}: task.network: 'shared' needs an env with repeated observation blocks; {env} has none"
        )

    sections = neat_key_sections()
    neat: dict[str, Any] = {}
    for name, value in neat_t.items():
        key = f"neat.{name}"
        if name in _DERIVED_NEAT:
            raise InputError(f"{path}: {key}: not settable here ({_DERIVED_NEAT[name]})")
        if name not in sections:
            near = difflib.get_close_matches(name, list(sections), n=1)
            hint = f" (did you mean 'neat.{near[0]}'?)" if near else ""
            raise InputError(f"{path}: {key}: unknown neat-python setting{hint}")
        if isinstance(value, dict):
            raise InputError(f"{path}: {key}: expected a value, got a table")
        if isinstance(value, float) and not math.isfinite(value):
            raise InputError(f"{path}: {key}: {value!r} is not a finite number")
        if isinstance(value, list) and any(isinstance(v, (list, dict)) for v in value):
            raise InputError(f"{path}: {key}: {value!r}: expected a value or a flat list of values")
        # configparser would read '%' as interpolation and a line break as a new setting
        if any(isinstance(v, str) and ("%" in v or not v.isprintable()) for v in (value if isinstance(value, list)
                                                                                  else [value])):
            raise InputError(f"{path}: {key}: {value!r} must be one line of printable text without '%'")
        try:
            _check_neat_value(name, value)
        except ValueError as exc:
            raise InputError(f"{path}: {exc}") from None
        neat[name] = value

    r = TableReader(path, "run", run_t)
    generations = r.take("generations", int, 100, limit=GENERATIONS)
    seed = r.take("seed", int, 0, limit=SEED)
    target = r.take("fitness_target", float, None)
    every = r.take("checkpoint_every", int, 10, lambda v: v >= 1, "a whole number >= 1")
    workers = r.take(
        "workers", (int, str), "auto", lambda v: v == "auto" or (isinstance(v, int) and v >= 1), "'auto' or >= 1"
    )
    dask = r.take("dask", str, None, lambda v: bool(v.strip()), "'local' or a scheduler address like tcp://host:8786")
    finalists = r.take("finalists", int, 5, lambda v: v >= 1, "a whole number >= 1")
    validation = r.take("validation_episodes", int, 32, limit=EPISODES)
    linear_every = r.take("linear_every", int, 0, lambda v: 0 <= v <= 1_000_000,
                          "generations between linear-loop checks of the best genomes, 0 for none")
    linear_top = r.take("linear_top", int, 3, lambda v: 1 <= v <= 1000, "a whole number from 1 to 1000")
    verdict_samples = r.take("verdict_samples", int, 256, lambda v: 16 <= v <= 1_000_000,
                             "Monte Carlo samples per finalist, 16 to 1000000")
    engine = r.take("engine", str, "numpy", lambda v: v in ENGINES, " or ".join(repr(e) for e in ENGINES))
    r.finish()

    cfg = Config(
        path=path,
        task=TaskConfig(env, dict(env_options), params, episodes, horizon, network, randomize, ramp, plan_path,
                        objective, corner_share),
        neat=neat,
        run=RunConfig(generations, seed, target, every, workers, dask, finalists, validation, linear_every,
                      linear_top, verdict_samples, engine),
        source_text=text,
    )
    # surface neat-python's own objections now, naming the key when one alone upsets it
    reason = _neat_refusal(_neat_text(neat, 1, 1))
    if reason is not None:
        for name, value in neat.items():
            one = _neat_refusal(_neat_text({name: value}, 1, 1))
            if one is not None:
                hint = _neat_hint(name)
                # the whole set's words when they are the same objection (its numbers are the user's)
                said = reason if reason.split(":")[0] == one.split(":")[0] else one
                raise InputError(f"{path}: neat.{name}: {value!r} refused by neat-python: {said}{hint}")
        # only a combination fails (e.g. a min above a max): drop every key the refusal does not need
        culprits = dict(neat)
        for name in list(culprits):
            rest = {k: v for k, v in culprits.items() if k != name}
            if _neat_refusal(_neat_text(rest, 1, 1)) is not None:
                culprits = rest
        keys = ", ".join(f"neat.{k}" for k in culprits)
        raise InputError(f"{path}: {keys}: neat-python refuses these settings together: {reason}")
    return cfg


def _check_neat_value(name: str, value: Any) -> None:
    """ValueError for a ``[neat]`` value neat-python would take without a check of its own."""
    if name in NEAT:
        NEAT[name].check(value)
    if name in ("activation_options", "aggregation_options"):
        from pretrial.controller.network import ACTIVATIONS, AGGREGATIONS

        allowed = ACTIVATIONS if name.startswith("activation") else AGGREGATIONS
        words = " ".join(str(v) for v in (value if isinstance(value, list) else [value])).split()
        for word in words:
            if word not in allowed:
                raise ValueError(f"neat.{name}: {word!r} is not a neat-python built-in {name.split('_')[0]} "
                                 f"(allowed: {', '.join(allowed)})")


def _neat_hint(name: str) -> str:
    """What neat-python allows for ``name`` where its own refusal does not say."""
    if name in ("pop_size", "elitism", "min_species_size"):
        # neat.reproduction: each species breeds at least max(min_species_size, elitism) genomes
        return (" (each species keeps at least max(min_species_size, elitism) genomes, so pop_size must be "
                "at least that times the number of species)")
    if name != "initial_connection":
        return ""
    from neat.genome import DefaultGenomeConfig

    allowed = ", ".join(DefaultGenomeConfig.allowed_connectivity)
    return f" (allowed: {allowed}; the partial ones take a fraction, e.g. 'partial_direct 0.5')"


def build_neat_ini(cfg: Config, num_inputs: int, num_outputs: int) -> str:
    """The merged neat-python config file text for this run."""
    text = _neat_text(cfg.neat, num_inputs, num_outputs)
    reason = _neat_refusal(text)
    if reason is not None:
        raise InputError(f"{cfg.path}: [neat]: neat-python refuses the merged settings: {reason}")
    return text


def check_budget(cfg: Config, task: Any, ini: str) -> int:
    """Integration steps the run asks for; InputError naming the factors past :data:`~pretrial.limits.COMMAND_STEPS`.

    Parameters
    ----------
    cfg : Config
        With the command line's overrides applied.
    task : Task
        From :func:`pretrial.evolution.loop.make_task` (episode length, plant).
    ini : str
        The merged neat-python file (its ``pop_size``).
    """
    cp = configparser.ConfigParser()
    cp.read_string(ini)
    factors = [(cfg.run.generations, "generations"), (cp["NEAT"].getint("pop_size"), "genomes"),
               (cfg.task.episodes, "episodes"), (task.max_steps, "control periods"),
               (task.physics().substeps, "substeps")]
    try:
        return check_total("evolve", factors)
    except ValueError as exc:
        raise InputError(f"{cfg.path}: {exc}") from None


def _neat_text(settings: dict[str, Any], num_inputs: int, num_outputs: int) -> str:
    cp = neat_defaults()
    sections = neat_key_sections()
    for name, value in settings.items():
        if isinstance(value, bool):
            text = "true" if value else "false"
        elif isinstance(value, list):
            text = " ".join(str(v) for v in value)
        else:
            text = str(value)
        cp[sections[name]][name] = text
    cp["DefaultGenome"]["num_inputs"] = str(num_inputs)
    cp["DefaultGenome"]["num_outputs"] = str(num_outputs)
    lines = []
    for s in cp.sections():
        lines.append(f"[{s}]")
        lines.extend(f"{k} = {v}" for k, v in cp[s].items())
        lines.append("")
    return "\n".join(lines)


def _neat_refusal(text: str) -> str | None:
    """neat-python's objection to a config file text, or None if it accepts it.

    A dry run in a temporary file and in memory: neat-python reads the config,
    makes a generation-0 population, sorts it into species and breeds it once
    (every genome at fitness 0), which is where it checks population size against
    elitism and species minima. The caller's random state is left as it was.
    """
    import os
    import random
    import tempfile

    import neat

    fd, tmp = tempfile.mkstemp(suffix=".ini")
    state = random.getstate()
    try:
        with os.fdopen(fd, "w") as f:
            f.write(text)
        config = neat.Config(
            neat.DefaultGenome, neat.DefaultReproduction, neat.DefaultSpeciesSet, neat.DefaultStagnation, tmp
        )
        _, population, species, reproduction = neat_generation_zero(config)
        for genome in population.values():
            genome.fitness = 0.0
        reproduction.reproduce(config, species, config.pop_size, 0)
    except Exception as exc:  # neat-python raises bare Exception/RuntimeError/AssertionError
        return " ".join(str(exc).split()) or type(exc).__name__
    finally:
        random.setstate(state)
        os.unlink(tmp)
    return None


def neat_generation_zero(config: Any) -> tuple[Any, dict[int, Any], Any, Any]:
    """A first population of a ``neat.Config``, sorted into species, as a run starts it.

    Uses the global ``random`` module as neat-python does (seed it first for a run).

    Returns
    -------
    reporters, population, species, reproduction
        neat-python's ReporterSet, genome key -> genome, DefaultSpeciesSet, DefaultReproduction.
    """
    from neat.reporting import ReporterSet

    reporters = ReporterSet()
    stagnation = config.stagnation_type(config.stagnation_config, reporters)
    reproduction = config.reproduction_type(config.reproduction_config, reporters, stagnation)
    population = reproduction.create_new(config.genome_type, config.genome_config, config.pop_size)
    species = config.species_set_type(config.species_set_config, reporters)
    species.speciate(config, population, 0)
    return reporters, population, species, reproduction


# --------------------------------------------------------------------------- #
# writing
# --------------------------------------------------------------------------- #


def plan_beside(config_path: str | Path, name: str) -> Path | None:
    """The sweep plan for a run config: ``sweeps/NAME.toml`` beside it, else the one for
    the longest hyphen-prefix of NAME (``drone-pair-wide`` falls back to ``drone-pair``)."""
    plans = Path(config_path).resolve().parent / "sweeps"
    parts = name.split("-")
    for n in range(len(parts), 0, -1):
        plan = plans / f"{'-'.join(parts[:n])}.toml"
        if plan.is_file():
            return plan
    return None


def with_overrides(cfg: Config, *, seed: int | None = None, generations: int | None = None,
                   workers: int | str | None = None, dask: str | None = None, engine: str | None = None) -> Config:
    """``cfg`` with the given ``[run]`` settings replaced (None keeps the config's)."""
    import dataclasses

    given = {"seed": seed, "generations": generations, "workers": workers, "dask": dask, "engine": engine}
    return dataclasses.replace(cfg, run=dataclasses.replace(cfg.run, **{k: v for k, v in given.items()
                                                                        if v is not None}))
