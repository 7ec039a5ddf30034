"""Evolution runs: neat-python drives the search, pretrial evaluates in batches.

The generation loop is neat-python's own (``DefaultReproduction``,
``DefaultSpeciesSet``, ``DefaultStagnation``), driven here rather than through
``Population.run`` so that every generation can be checkpointed, reported and
reseeded. A run is a pure function of (config, seed):

* scenarios of generation ``k`` come from ``SeedSequence(seed, spawn_key=(1, k))``
  and every genome sees the same ones (common random numbers);
* Python's global ``random`` (which neat-python uses) is reseeded from
  ``SeedSequence(seed, spawn_key=(2, k))`` right before reproduction, so nothing
  an evaluation backend does to it can leak into the search;
* each genome's episodes are rows of their own (no row's arithmetic depends on another's), so
  the results do not depend on how genomes are cut into work items; :func:`chunk_size` cuts
  them into as few items as keep every worker busy (a test holds the bytes equal for any cut).

The champion is picked by re-testing the best few genomes ever seen on fresh
scenarios the run never trained on (``spawn_key=(3,)``).
"""

from __future__ import annotations

import copy
import csv
import io
import platform
import random
import time
import tomllib
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from pretrial.controller.network import NetworkStack
from pretrial.controller.policy import policy_from_genome, policy_to_dict, save_policy
from pretrial.errors import InputError, PretrialError
from pretrial.evolution import checkpoint
from pretrial.evolution.config import Config, build_neat_ini, check_budget, neat_generation_zero
from pretrial.evolution.plan_training import linear_shortfall, short_verdict
from pretrial.evolution.reporters import LineReporter, Reporter, ReporterSet, WarningReporter
from pretrial.evolution.rundir import (
    HISTORY_FIELDS,
    RESUME_MAY_CHANGE,
    RunState,
    flat_keys,
    neat_config_at,
    read_manifest,
    read_neat_ini,
    read_timing,
    run_state_from,
)
from pretrial.evolution.task import (
    NEAT_STREAM,
    SCENARIO_STREAM,
    VALIDATION_STREAM,
    VERDICT_STREAM,
    evaluate_chunk,
    load_training_plan,
    make_task,
    seed_int,
    training_scenarios,
)
from pretrial.files import atomic_write_text, check_writable_dir, write_json
from pretrial.provenance import versions
from pretrial.sim.execution import Executor
from pretrial.sim.perturb import describe_values, diverged_warning
from pretrial.sim.plant import check_workers_can_build
from pretrial.sim.rollout import Scenarios
from pretrial.tomlfile import dump_toml
from pretrial.version import __version__

#: rows (genomes x episodes) a work item holds at most: batches this large pay numpy's fixed cost
#: per control step once for thousands of rows (benchmarks/evolution_throughput.py), and stay a
#: few MB of state per worker
MAX_CHUNK_ROWS = 16384


def chunk_size(genomes: int, episodes: int, workers: int) -> int:
    """Genomes per work item: one item per worker, no more than :data:`MAX_CHUNK_ROWS` rows each."""
    per_worker = -(-genomes // max(1, workers))
    return max(1, min(per_worker, MAX_CHUNK_ROWS // max(1, episodes)))


# --------------------------------------------------------------------------- #
# the task as workers see it
# --------------------------------------------------------------------------- #


#: generations whose diverged episodes are each named in a warning (then one line says more follow)
_DIVERGED_WARNINGS = 3


# --------------------------------------------------------------------------- #
# the run
# --------------------------------------------------------------------------- #


def _size(genome: Any) -> tuple[int, int]:
    """(nodes, enabled connections) of a genome."""
    return len(genome.nodes), sum(1 for c in genome.connections.values() if c.enabled)


class Evolution:
    """One evolution run in its run directory.

    Parameters
    ----------
    cfg : Config
        The validated run config (CLI overrides already applied).
    run_dir : Path
        The run directory (created; must not hold another run unless resuming).
    executor : Executor
        Where batches are evaluated.
    log : callable
        Receives one line per generation and the closing lines.
    command_line : sequence of str
        The words the run was started with (recorded in the manifest).
    warn : callable, optional
        Receives warnings (default: the ``pretrial`` logger), e.g. episodes that diverged.
    reporters : sequence of Reporter, optional
        More observers of the run (:mod:`pretrial.evolution.reporters`), told after the line and
        warning reporters that ``log`` and ``warn`` make.
    """

    def __init__(self, cfg: Config, run_dir: Path, executor: Executor, log: Callable[[str], None] = print,
                 command_line: Sequence[str] = (), warn: Callable[[str], None] | None = None,
                 reporters: Sequence[Reporter] = ()):
        self.cfg = cfg
        self.reporters = ReporterSet([LineReporter(log), WarningReporter(warn), *reporters])
        self._warnings = 0
        self.run_dir = run_dir
        self.executor = executor
        self.command_line = list(command_line)
        #: (plan, physics, options, params) when training against a plan
        self._plan = load_training_plan(cfg) if cfg.task.plan is not None else None
        self.task = make_task(cfg, self._plan)
        check_workers_can_build(self.task.physics(), executor)
        self.ini_path = run_dir / "neat.ini"
        self.manifest_path = run_dir / "manifest.json"
        self.manifest: dict[str, Any] = {}
        self.neat_config: Any = None
        self.state: RunState | None = None
        self.timing: list[float] = []  # seconds per generation of this session
        self._timing_rows: list[dict[str, Any]] = []  # timing.csv, earlier sessions included
        self._best_success = 0.0

    # ------------------------------------------------------------ set-up
    def create(self) -> None:
        """Lay out a new run directory and the initial population, checkpointed as generation 0.

        The manifest is first written together with that checkpoint, so a directory with a
        manifest can always be resumed, whenever the process is stopped.
        """
        # neat-python's objections (a dry run of generation 0) and the budget, before anything is written
        ini = build_neat_ini(self.cfg, self.task.io.num_inputs, self.task.io.num_outputs)
        check_budget(self.cfg, self.task, ini)
        check_writable_dir(self.run_dir)
        if self.run_dir.exists() and any(self.run_dir.iterdir()):
            if self.manifest_path.exists():
                raise InputError(f"{self.run_dir}: already holds a run; continue it with --resume {self.run_dir} "
                                 "or pick another --out")
            if self._stopped_before_first_checkpoint():
                raise InputError(f"{self.run_dir}: already holds files of a run stopped before its first "
                                 "checkpoint; delete the directory and start again")
            raise InputError(f"{self.run_dir}: already holds files; pick another --out")
        self.run_dir.mkdir(parents=True, exist_ok=True)
        (self.run_dir / "checkpoints").mkdir(exist_ok=True)
        (self.run_dir / "plots").mkdir(exist_ok=True)
        atomic_write_text(self.run_dir / "config.resolved.toml", dump_toml(self.cfg.to_dict()))
        atomic_write_text(self.ini_path, ini)
        self.neat_config = neat_config_at(self.ini_path)
        self.manifest = {
            "pretrial": __version__,
            "versions": versions(),
            "seed": self.cfg.run.seed,
            "config": self.cfg.path,
            "config_sha256": self.cfg.content_hash(),
            "command": self.command_line,
            "host": platform.node(),
            "execution": self.executor.describe(),
            "started": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
            "checkpoints": {},
        }
        cfg = self.neat_config
        random.seed(seed_int(self.cfg.run.seed, NEAT_STREAM, 0))
        _, population, species, reproduction = neat_generation_zero(cfg)
        self.state = RunState(0, population, species, reproduction, None, [], [], [], 0)
        self.save_checkpoint()  # also writes the manifest: from here on the directory resumes

    def _stopped_before_first_checkpoint(self) -> bool:
        """Whether the directory holds what create() lays out before its first manifest (a run killed then)."""
        return any((self.run_dir / n).exists() for n in ("checkpoints", "plots", "config.resolved.toml", "neat.ini"))

    def resume(self) -> None:
        """Continue from the newest checkpoint recorded in the manifest.

        Every file the resume needs is read and checked before anything is written, so a damaged
        run directory is refused with one line and left exactly as it was.
        """
        if not self.manifest_path.is_file():
            if self._stopped_before_first_checkpoint():
                raise InputError(f"{self.run_dir}: the run was stopped before its first checkpoint (no "
                                 "manifest.json); delete the directory and start the run again")
            raise InputError(f"{self.run_dir}: not a run directory (no manifest.json)")
        self.manifest = read_manifest(self.manifest_path, self.run_dir / "checkpoints")
        self._check_same_config()
        recorded = self.manifest["checkpoints"]
        if not recorded:
            raise InputError(f"{self.run_dir}: no checkpoint yet; delete the directory and start the run again")
        check_writable_dir(self.run_dir)
        name = max(recorded, key=checkpoint.generation_of)
        self.neat_config = read_neat_ini(self.ini_path)
        path = checkpoint.recorded_path(self.run_dir / "checkpoints", name, self.manifest_path)
        self.state = run_state_from(checkpoint.load(path, recorded[name]), path)
        timing_rows = read_timing(self.run_dir / "timing.csv", self.state.generation)
        # everything read: from here on the run directory is written
        from neat.reporting import ReporterSet

        from pretrial.files import remove_partial_writes

        for d in (self.run_dir, self.run_dir / "checkpoints", self.run_dir / "plots"):
            remove_partial_writes(d)  # left by a process killed mid-write; the files they were for are whole
        reporters = ReporterSet()
        self.state.species.reporters = reporters
        self.state.reproduction.reporters = reporters
        self.state.reproduction.stagnation.reporters = reporters
        gc = self.neat_config.genome_config
        gc.innovation_tracker = self.state.reproduction.innovation_tracker
        if self.state.node_indexer_next is not None:
            import itertools

            gc.node_indexer = itertools.count(self.state.node_indexer_next)
        self._rewrite_history()
        self._timing_rows = timing_rows
        # the checkpoint loaded and only settings a resume may change differ: record them (e.g. more generations)
        atomic_write_text(self.run_dir / "config.resolved.toml", dump_toml(self.cfg.to_dict()))
        self.reporters.note(f"resumed {self.run_dir} at generation {self.state.generation}")

    def _check_same_config(self) -> None:
        """Refuse to continue a run under settings that would change its results (seed, task, [neat], ...)."""
        path = self.run_dir / "config.resolved.toml"
        try:
            old = flat_keys(tomllib.loads(path.read_text()))
        except (OSError, ValueError) as exc:
            raise InputError(f"{path}: unreadable ({exc})") from None
        new = flat_keys(self.cfg.to_dict())
        differ = sorted(k for k in old.keys() | new.keys() if k not in RESUME_MAY_CHANGE and old.get(k) != new.get(k))
        if differ:
            raise InputError(
                f"{self.cfg.path}: {differ[0]} differs from the run being resumed ({path}); resume with the same "
                f"config and seed (only --generations, --workers, --dask and [run] checkpoint_every may change)"
            )

    # ------------------------------------------------------------ generations
    def evaluate(self, genomes: Sequence[Any], scenarios: Scenarios, label: str | None = None
                 ) -> tuple[np.ndarray, np.ndarray]:
        networks = NetworkStack.of_genomes(genomes, self.neat_config)  # compiled once, sent to workers in chunks
        n = len(networks)
        size = chunk_size(n, len(scenarios), self.executor.describe()["workers"])
        items = [(self.task, networks if size >= n else networks.take(np.arange(i, min(i + size, n))), scenarios)
                 for i in range(0, n, size)]
        parts = self.executor.map(evaluate_chunk, items)
        diverged = np.sum([p[2] for p in parts], axis=0)
        if diverged.any():
            self._warn_diverged(scenarios, diverged, len(genomes), label)
        return np.concatenate([p[0] for p in parts]), np.concatenate([p[1] for p in parts])

    def _warn_diverged(self, scenarios: Scenarios, diverged: np.ndarray, n_genomes: int, label: str | None) -> None:
        """One warning line naming where episodes blew up (they count as failures; the run goes on)."""
        physics = self.task.physics()
        rows = np.flatnonzero(diverged)
        values = {}
        for name in sorted(self.task.randomize):
            if name in physics.param_table:
                values[name] = scenarios.params[rows, physics.param_table.index(name)]
            elif name in scenarios.perturb:
                values[name] = scenarios.perturb[name][rows]
        where = describe_values(physics, values) or describe_values(
            physics, {k: np.array([v]) for k, v in self.task.params.items()}) or "nominal physics"
        if label is None:  # generations: the first few are named; the finalists' re-test always is
            self._warnings += 1
            if self._warnings > _DIVERGED_WARNINGS:
                if self._warnings == _DIVERGED_WARNINGS + 1:
                    self.reporters.warning("more generations with diverged episodes; not shown again this session")
                return
            label = f"generation {self.state.generation if self.state is not None else 0}"
        self.reporters.warning(diverged_warning(int(diverged.sum()), f"{where} ({len(rows)} scenarios)",
                                   n_genomes * len(scenarios), label))

    def run(self, generations: int) -> dict[str, Any]:
        """Evolve until ``generations`` have been evaluated or the fitness target is reached."""
        st = self.state
        assert st is not None
        cfg = self.neat_config
        target = self.cfg.run.fitness_target
        every = self.cfg.run.checkpoint_every
        reached = st.finished
        try:
            while st.generation < generations and not reached:
                t0 = time.perf_counter()
                k = st.generation
                genomes = [st.population[key] for key in sorted(st.population)]
                scen = training_scenarios(self.task, self.cfg.task.episodes, self.cfg.run.seed, SCENARIO_STREAM, k,
                                  generation=k)
                try:
                    fitness, succ = self.evaluate(genomes, scen)
                except (KeyboardInterrupt, PretrialError):
                    # Nothing of generation k is recorded yet: the state is exactly its start.
                    try:
                        self.save_checkpoint()
                    except PretrialError:
                        pass  # e.g. the disk is full: the previous checkpoint stands, resuming still works
                    raise
                if self._plan is not None and self.cfg.run.linear_every and k % self.cfg.run.linear_every == 0:
                    fitness = self._linear_rerank(genomes, fitness)
                for g, f in zip(genomes, fitness):
                    g.fitness = float(f)
                st.evaluations += len(genomes) * self.cfg.task.episodes
                ibest = int(np.argmax(fitness))  # first of equals, as max() over the sorted genomes
                best = genomes[ibest]
                self._best_success = float(succ[ibest])
                nodes, conns = _size(best)
                row = {
                    "generation": k,
                    "evaluations": st.evaluations,
                    "best": float(best.fitness),
                    "mean": float(np.mean(fitness)),
                    "stdev": float(np.std(fitness)),
                    "species": len(st.species.species),
                    "best_nodes": nodes,
                    "best_connections": conns,
                }
                st.history.append(row)
                st.species_sizes.append({int(sid): len(s.members) for sid, s in st.species.species.items()})
                self._update_hall(genomes)
                reached = target is not None and best.fitness >= target
                if not reached:  # also after the last one, so a resume with more generations continues
                    random.seed(seed_int(self.cfg.run.seed, NEAT_STREAM, k + 1))
                    try:
                        st.population = st.reproduction.reproduce(cfg, st.species, cfg.pop_size, k)
                    except RuntimeError as exc:  # neat-python refuses settings it cannot breed with
                        raise InputError(
                            f"{self.cfg.path}: [neat]: generation {k}: neat-python cannot breed the next generation "
                            f"({exc}); raise pop_size or compatibility_threshold, or lower min_species_size"
                        ) from None
                    if not st.species.species:
                        st.population = st.reproduction.create_new(cfg.genome_type, cfg.genome_config, cfg.pop_size)
                    st.species.speciate(cfg, st.population, k + 1)
                st.generation = k + 1
                st.finished = reached
                self._rewrite_history()
                elapsed = time.perf_counter() - t0
                self.timing.append(elapsed)
                self._timing_rows.append({"generation": k, "seconds": f"{elapsed:.4f}"})
                self._write_csv(self.run_dir / "timing.csv", ("generation", "seconds"), self._timing_rows)
                if st.generation % every == 0 or reached or st.generation >= generations:
                    self.save_checkpoint()
                self._report(row, generations, reached, target)
        except KeyboardInterrupt:
            # Interrupted while evaluating: checkpointed above. Elsewhere: the last checkpoint stands.
            self.reporters.note(f"\ninterrupted: resume with  pretrial evolve {self.cfg.path} --resume {self.run_dir}")
            raise
        except InputError:
            raise  # the settings, not the machine: resuming would fail the same way
        except PretrialError as exc:
            # a failed evaluation (checkpointed above), or e.g. the disk filled while writing: every file is whole
            raise PretrialError(
                f"generation {st.generation}: {exc.message}; the last checkpoint stands, continue the run with  "
                f"pretrial evolve {self.cfg.path} --resume {self.run_dir}"
            ) from None
        return self.finish(reached)

    def _env_params(self) -> dict[str, float]:
        """Every physics parameter of the task's plant, by name (what a policy file records)."""
        table = self.task.physics().param_table
        return dict(zip(table.names, table.resolve(self.task.params).tolist()))

    def _policy(self, genome: Any) -> Any:
        return policy_from_genome(genome, self.neat_config, env_id=self.task.env_id,
                                  env_options=self.task.physics().options(), env_params=self._env_params(),
                                  io=self.task.io)

    def _linear_rerank(self, genomes: Sequence[Any], fitness: np.ndarray) -> np.ndarray:
        """The best ``linear_top`` genomes, reordered so that those meeting the plan's linear margins come first.

        Their fitness values are permuted among themselves (by shortfall, then
        fitness): the generation's fitness scale is untouched, only who holds
        the best values changes.
        """
        plan, physics, _, params = self._plan
        top = np.argsort(-fitness, kind="stable")[: self.cfg.run.linear_top]
        short = {int(i): linear_shortfall(plan, physics, params, self._policy(genomes[i])) for i in top}
        values = sorted((float(fitness[i]) for i in top), reverse=True)
        order = sorted(top.tolist(), key=lambda i: (short[i], -fitness[i], i))
        out = np.array(fitness, dtype=float)
        for i, v in zip(order, values, strict=True):
            out[i] = v
        return out

    def _update_hall(self, genomes: Sequence[Any]) -> None:
        st = self.state
        n = self.cfg.run.finalists
        pool = {g.key: g for g in st.hall}
        for g in sorted(genomes, key=lambda g: (-g.fitness, g.key))[:n]:
            if g.key not in pool or pool[g.key].fitness < g.fitness:
                pool[g.key] = copy.deepcopy(g)
        st.hall = sorted(pool.values(), key=lambda g: (-g.fitness, g.key))[:n]

    def _report(self, row: dict[str, Any], generations: int, reached: bool, target: float | None) -> None:
        done = row["generation"] + 1
        mean_t = float(np.mean(self.timing[-5:]))
        eta = None if reached else mean_t * max(0, generations - done)
        self.reporters.generation_done(row, self.timing[-1], eta, self._best_success)
        if reached and target is not None:
            self.reporters.target_reached(target, row["generation"])

    # ------------------------------------------------------------ files
    def save_checkpoint(self) -> None:
        st = self.state
        gc = self.neat_config.genome_config
        nxt = None
        if gc.node_indexer is not None:
            nxt = int(repr(gc.node_indexer)[len("count(") : -1])
        st.node_indexer_next = nxt
        name = checkpoint.file_name(st.generation)
        state = dict(st.__dict__)
        digest = checkpoint.save(self.run_dir / "checkpoints" / name, state)
        self.manifest.setdefault("checkpoints", {})[name] = digest
        write_json(self.manifest_path, self.manifest)

    def _rewrite_history(self) -> None:
        self._write_csv(self.run_dir / "history.csv", HISTORY_FIELDS, self.state.history)

    @staticmethod
    def _write_csv(path: Path, fields: Sequence[str], rows: Sequence[dict[str, Any]]) -> None:
        buf = io.StringIO()
        w = csv.DictWriter(buf, fieldnames=list(fields), lineterminator="\n")
        w.writeheader()
        for r in rows:
            w.writerow({k: (repr(v) if isinstance(v, float) else v) for k, v in r.items()})
        atomic_write_text(path, buf.getvalue())

    # ------------------------------------------------------------ champion
    def finish(self, reached: bool) -> dict[str, Any]:
        """Re-test the finalists on fresh scenarios, write champion.json and the plots."""
        st = self.state
        scen = training_scenarios(self.task, self.cfg.run.validation_episodes, self.cfg.run.seed, VALIDATION_STREAM)
        returns, success = self.evaluate(st.hall, scen, "re-test of the finalists")
        verdicts = self._short_verdicts(st.hall) if self._plan is not None else None
        if verdicts is not None:  # the plan's requirements first, then the re-test
            order = sorted(range(len(st.hall)), key=lambda i: (-verdicts[i]["met"], -success[i], -returns[i],
                                                                st.hall[i].key))
        else:
            order = sorted(range(len(st.hall)), key=lambda i: (-success[i], -returns[i], st.hall[i].key))
        i = order[0]
        champ = st.hall[i]
        finalists = [
            {"genome": int(st.hall[j].key), "training_fitness": float(st.hall[j].fitness),
             "validation_return": float(returns[j]), "validation_success_rate": float(success[j])}
            | ({"requirements_met": verdicts[j]["met"], "requirements_judged": verdicts[j]["judged"]}
               if verdicts is not None else {})
            for j in order
        ]
        training = {
            "seed": self.cfg.run.seed,
            "generations": st.generation,
            "evaluations": st.evaluations,
            "episodes_per_genome": self.cfg.task.episodes,
            "horizon_steps": self.task.max_steps,
            "randomize": {k: list(v) for k, v in self.task.randomize.items()},
            "randomize_ramp": self.task.randomize_ramp,
            "fitness_target": self.cfg.run.fitness_target,
            "target_reached": bool(reached),
            "config_sha256": self.cfg.content_hash(),
            "validation_episodes": self.cfg.run.validation_episodes,
            "finalists": finalists,
            "objective": self.task.objective.text,
        }
        if self._plan is not None:
            plan = self._plan[0]
            training["plan"] = {"name": Path(plan.path).name, "content_sha256": plan.content_hash(),
                                "vary": [v.name for v in self.task.distribution.vary],
                                "linear_every": self.cfg.run.linear_every, "linear_top": self.cfg.run.linear_top}
            training["predicted_verdict"] = verdicts[i]
        physics = self.task.physics()
        if physics.residual is not None:  # the learned residual trained on: replay and sweep check its hash
            training["residual"] = {"path": physics.residual.source, "sha256": physics.residual.sha256}
        doc = policy_to_dict(champ, self.neat_config, env_id=self.task.env_id, env_options=physics.options(),
                             env_params=self._env_params(), io=self.task.io, training=training)
        save_policy(self.run_dir / "champion.json", doc)
        self._plots(doc, physics)
        summary = {
            "run_dir": str(self.run_dir),
            "champion": str(self.run_dir / "champion.json"),
            "generations": st.generation,
            "evaluations": st.evaluations,
            "target_reached": bool(reached),
            "best_training_fitness": float(champ.fitness),
            "validation_success_rate": float(success[i]),
            "validation_return": float(returns[i]),
            "seconds": float(sum(self.timing)),
        }
        if verdicts is not None:
            summary["predicted_verdict"] = verdicts[i]["verdict"]
            summary["requirements_met"] = [verdicts[i]["met"], verdicts[i]["judged"]]
            summary["requirements"] = verdicts[i]["requirements"]
            summary["confirm"] = f"pretrial sweep {self.run_dir} --plan {self._plan[0].path}"
        self.manifest["finished"] = time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())
        self.manifest["seconds_this_session"] = float(sum(self.timing))
        write_json(self.manifest_path, self.manifest)
        return summary

    def _short_verdicts(self, genomes: Sequence[Any]) -> list[dict[str, Any]]:
        """Each finalist's predicted verdict on a short form of the plan (fresh streams: neither training's nor
        the plan's own)."""
        plan, physics, _, params = self._plan
        seed = seed_int(self.cfg.run.seed, VERDICT_STREAM)
        return [short_verdict(plan, physics, params, self._policy(g), self.executor, self.cfg.run.verdict_samples,
                              seed) for g in genomes]

    def _plots(self, doc: dict[str, Any], physics: Any) -> None:
        from pretrial.report.plots import plot_fitness, plot_network, plot_species

        plots = self.run_dir / "plots"
        plots.mkdir(exist_ok=True)
        st = self.state
        plot_fitness(st.history, plots / "fitness.png", self.cfg.run.fitness_target)
        plot_species(st.species_sizes, plots / "species.png")
        blocks = self.task.io.blocks
        names_in = list(physics.obs_names[: physics.obs_dim // blocks])
        names_out = list(physics.action_names[: physics.action_dim // blocks])
        plot_network(doc["network"], plots / "network.png", names_in, names_out)


# --------------------------------------------------------------------------- #
# the run directory read back on --resume: each file checked, one line naming it
# --------------------------------------------------------------------------- #


