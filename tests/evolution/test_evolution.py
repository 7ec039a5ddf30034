"""`pretrial evolve` end to end: determinism across executors, resume, run-directory contract, bad input.

Every run here is tiny (cart-pole, 4 episodes of 2 s, 3 generations) so the file stays fast on 2 cores.
The reference for the physics of the small plant defined below is Newton's second law.
"""

from __future__ import annotations

import configparser
import csv
import hashlib
import json
import platform
import re
import shutil
import tomllib
from pathlib import Path
from typing import ClassVar

import gymnasium as gym
import matplotlib.pyplot as plt
import numpy as np
import pytest
from helpers import snapshot

import pretrial_envs
from pretrial.cli.main import main
from pretrial.controller.policy import load_policy, policy_from_genome
from pretrial.evolution import checkpoint
from pretrial.evolution.config import load_config
from pretrial.evolution.loop import Evolution
from pretrial.evolution.task import make_task, training_scenarios
from pretrial.sim.execution import Executor
from pretrial.sim.rollout import draw_scenarios, run_episodes
from pretrial_envs import ParamSpec, ParamTable, Physics
from pretrial_envs import registry as env_registry

HEADER = "generation,evaluations,best,mean,stdev,species,best_nodes,best_connections"
TIMESTAMP = re.compile(r"\d{4}-\d{2}-\d{2}[T ]\d{2}:\d{2}|\b\d{2}:\d{2}:\d{2}\b")
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


def write_config(path: Path, *, env: str = "pretrial/CartPole-v0", seed: int = 7, generations: int = 3,
                 pop_size: int = 20, run_extra: str = "", task_extra: str = "") -> Path:
    path.write_text(
        f'[task]\nenv = "{env}"\nepisodes = 4\nhorizon = 2.0\n{task_extra}\n'
        f"[neat]\npop_size = {pop_size}\n\n"
        f"[run]\ngenerations = {generations}\nseed = {seed}\ncheckpoint_every = 1\n{run_extra}"
    )
    return path


def run_cli(argv: list[str]) -> int:
    """``main(argv)``'s exit code, whether it returns it or argparse raises SystemExit."""
    try:
        return main(argv)
    except SystemExit as exc:
        return int(exc.code)


# pop_size 70: one work item serially, two with two workers (chunk_size), so the workers really split a
# generation; like the shipped configs it redraws a physics parameter and a sensor perturbation every generation
RANDOMIZE = "[task.randomize]\ncart_mass = [0.9, 1.1]\nsensor_noise_std = [0.0, 0.002]\n"


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    """One serial run through the CLI that the other tests compare against."""
    root = tmp_path_factory.mktemp("reference")
    cfg = write_config(root / "cart.toml", pop_size=70, task_extra=RANDOMIZE)
    run_dir = root / "serial"
    argv = ["evolve", str(cfg), "--out", str(run_dir), "--workers", "1"]
    assert main(argv) == 0
    return {"config": cfg, "run_dir": run_dir, "argv": argv}


# --------------------------------------------------------------------------- #
# 1. determinism
# --------------------------------------------------------------------------- #
@pytest.mark.parametrize("where", ["processes", "dask"])
def test_same_files_on_serial_processes_and_dask(where, reference, tmp_path):
    if where == "dask":
        pytest.importorskip("dask.distributed", reason="dask.distributed is not installed (pretrial[cluster])")
    run_dir = tmp_path / where
    extra = ["--dask", "local", "--workers", "2"] if where == "dask" else ["--workers", "2"]
    assert main(["evolve", str(reference["config"]), "--out", str(run_dir), "--quiet", *extra]) == 0
    execution = json.loads((run_dir / "manifest.json").read_text())["execution"]
    assert execution["executor"] == where and execution["workers"] == 2
    for name in ("history.csv", "champion.json"):
        assert (run_dir / name).read_bytes() == (reference["run_dir"] / name).read_bytes(), name


def test_results_do_not_depend_on_how_genomes_are_cut(reference, tmp_path, monkeypatch):
    # one genome per work item against the reference's one item of 70: each genome's rows stand alone
    from pretrial.evolution import loop

    monkeypatch.setattr(loop, "chunk_size", lambda genomes, episodes, workers: 1)
    run_dir = tmp_path / "single"
    assert main(["evolve", str(reference["config"]), "--out", str(run_dir), "--quiet", "--workers", "1"]) == 0
    for name in ("history.csv", "champion.json"):
        assert (run_dir / name).read_bytes() == (reference["run_dir"] / name).read_bytes(), name


def test_chunk_size_keeps_every_worker_busy_within_the_row_cap():
    from pretrial.evolution.loop import MAX_CHUNK_ROWS, chunk_size

    assert chunk_size(100, 32, 1) == 100 and chunk_size(100, 32, 2) == 50 and chunk_size(101, 32, 2) == 51
    assert chunk_size(150, 1000, 1) == MAX_CHUNK_ROWS // 1000  # the row cap
    assert chunk_size(3, 4, 8) == 1


def test_compared_files_hold_no_clock_path_or_host(reference):
    run_dir = reference["run_dir"]
    host = platform.node()
    config_name = reference["config"].name
    # history.csv: every cell is a number
    with open(run_dir / "history.csv", newline="") as f:
        rows = list(csv.reader(f))[1:]
    assert rows and all(float(cell) == float(cell) for row in rows for cell in row)

    def strings(obj):
        if isinstance(obj, dict):
            for k, v in obj.items():
                yield k
                yield from strings(v)
        elif isinstance(obj, list):
            for v in obj:
                yield from strings(v)
        elif isinstance(obj, str):
            yield obj

    champion_text = (run_dir / "champion.json").read_text()
    for s in strings(json.loads(champion_text)):
        assert s != host and str(run_dir) not in s and config_name not in s and "/tmp" not in s, s
        assert not TIMESTAMP.search(s), s
    assert str(run_dir.parent) not in champion_text
    # ... while the manifest does record them
    manifest = json.loads((run_dir / "manifest.json").read_text())
    assert manifest["host"] == host
    assert TIMESTAMP.search(manifest["started"]) and TIMESTAMP.search(manifest["finished"])
    assert manifest["command"] == ["pretrial", *reference["argv"]]


# --------------------------------------------------------------------------- #
# 2. resume
# --------------------------------------------------------------------------- #
def test_resume_continues_exactly(reference, tmp_path, capsys):
    cfg, run_dir = str(reference["config"]), tmp_path / "split"
    assert main(["evolve", cfg, "--out", str(run_dir), "--workers", "1", "--generations", "2", "--quiet"]) == 0
    assert len((run_dir / "history.csv").read_text().splitlines()) == 1 + 2  # --generations beats the config's 3
    first_timing = (run_dir / "timing.csv").read_text().splitlines()
    capsys.readouterr()
    assert main(["evolve", cfg, "--resume", str(run_dir), "--generations", "3", "--workers", "1"]) == 0
    # the resolved config records what the run now is: 3 generations, like the reference
    assert tomllib.loads((run_dir / "config.resolved.toml").read_text())["run"]["generations"] == 3
    for name in ("history.csv", "champion.json"):
        assert (run_dir / name).read_bytes() == (reference["run_dir"] / name).read_bytes(), name
    # it continued rather than started over: only generation 2 ran, the first session's timings are kept
    out = capsys.readouterr().out
    assert "resumed" in out and [ln.split()[1] for ln in out.splitlines() if ln.startswith("gen ")] == ["2"]
    timing = (run_dir / "timing.csv").read_text().splitlines()
    assert timing[:3] == first_timing and [ln.split(",")[0] for ln in timing[1:]] == ["0", "1", "2"]


def test_edited_checkpoint_is_refused(reference, tmp_path, capsys):
    run_dir = tmp_path / "edited"
    shutil.copytree(reference["run_dir"], run_dir)
    recorded = json.loads((run_dir / "manifest.json").read_text())["checkpoints"]
    newest = run_dir / "checkpoints" / max(recorded, key=lambda n: int(re.findall(r"\d+", n)[-1]))
    data = bytearray(newest.read_bytes())
    data[len(data) // 2] ^= 0xFF
    newest.write_bytes(bytes(data))
    before = snapshot(run_dir)
    capsys.readouterr()
    argv = ["evolve", str(reference["config"]), "--resume", str(run_dir), "--generations", "4", "--workers", "1"]
    assert main(argv) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "hash" in err and newest.name in err and "Traceback" not in err
    assert snapshot(run_dir) == before


@pytest.mark.parametrize(
    ("extra", "edit", "needle"),
    [(["--seed", "99"], None, "run.seed"), ([], ("episodes = 4", "episodes = 5"), "task.episodes")],
)
def test_resume_under_other_settings_is_refused(extra, edit, needle, reference, tmp_path, capsys):
    # a run resumed with another seed or task would be reproducible from neither config
    run_dir = tmp_path / "other"
    shutil.copytree(reference["run_dir"], run_dir)
    cfg = reference["config"]
    if edit is not None:
        cfg = tmp_path / cfg.name
        cfg.write_text(reference["config"].read_text().replace(*edit))
    before = snapshot(run_dir)
    capsys.readouterr()
    assert main(["evolve", str(cfg), "--resume", str(run_dir), "--generations", "4", "--workers", "1", *extra]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and needle in err and "Traceback" not in err
    assert snapshot(run_dir) == before


# --------------------------------------------------------------------------- #
# 3. the run directory
# --------------------------------------------------------------------------- #
def test_run_directory_layout(reference):
    import neat

    run_dir, cfg_path = reference["run_dir"], reference["config"]
    cfg = load_config(cfg_path)
    physics = pretrial_envs.make_physics(cfg.task.env, **cfg.task.env_options)

    resolved = tomllib.loads((run_dir / "config.resolved.toml").read_text())
    assert resolved["task"]["env"] == "pretrial/CartPole-v0" and resolved["task"]["horizon"] == 2.0
    assert resolved["neat"]["pop_size"] == 70 and resolved["run"]["seed"] == 7
    # the resolved file is itself a config that decides the same results
    manifest = json.loads((run_dir / "manifest.json").read_text())
    assert load_config(run_dir / "config.resolved.toml").content_hash() == manifest["config_sha256"]
    assert manifest["config_sha256"] == cfg.content_hash()

    neat.Config(neat.DefaultGenome, neat.DefaultReproduction, neat.DefaultSpeciesSet, neat.DefaultStagnation,
                str(run_dir / "neat.ini"))
    ini = configparser.ConfigParser()
    ini.read(run_dir / "neat.ini")
    assert int(ini["DefaultGenome"]["num_inputs"]) == physics.obs_dim == 4
    assert int(ini["DefaultGenome"]["num_outputs"]) == physics.action_dim == 1
    assert int(ini["NEAT"]["pop_size"]) == 70

    lines = (run_dir / "history.csv").read_text().splitlines()
    assert lines[0] == HEADER and len(lines) == 1 + 3  # no target: exactly the configured 3 generations
    with open(run_dir / "timing.csv", newline="") as f:
        timing = list(csv.DictReader(f))
    assert [int(r["generation"]) for r in timing] == [0, 1, 2] and all(float(r["seconds"]) >= 0 for r in timing)

    champion = load_policy(run_dir / "champion.json")
    assert champion.env_id == cfg.task.env
    env = gym.make(champion.env_id, params=champion.env_params, **champion.env_options)
    obs = np.array([env.reset(seed=s)[0] for s in range(8)])
    wild = np.random.default_rng(0).normal(0.0, 100.0, (64, physics.obs_dim))  # far outside training
    actions = champion.act(np.vstack([obs, wild]))
    assert actions.shape == (72, physics.action_dim)
    assert np.all(np.isfinite(actions)) and np.all(np.abs(actions) <= 1.0)
    env.close()

    ckpts = sorted(p.name for p in (run_dir / "checkpoints").iterdir())
    assert ckpts == ["generation-0.pkl", "generation-1.pkl", "generation-2.pkl", "generation-3.pkl"]
    for name in ckpts:
        digest = hashlib.sha256((run_dir / "checkpoints" / name).read_bytes()).hexdigest()
        assert manifest["checkpoints"][name] == digest

    assert {"numpy", "neat-python", "gymnasium", "python"} <= set(manifest["versions"])
    assert manifest["seed"] == 7 and manifest["execution"] == {"executor": "serial", "workers": 1}
    assert manifest["host"] and manifest["command"][:2] == ["pretrial", "evolve"]

    for name in ("fitness.png", "species.png", "network.png"):
        path = run_dir / "plots" / name
        assert path.read_bytes()[:8] == PNG_SIGNATURE, name
        img = plt.imread(path)
        assert img.shape[0] > 100 and img.shape[1] > 100 and img.std() > 0, name  # decodes and is not blank


# --------------------------------------------------------------------------- #
# 4. fitness target
# --------------------------------------------------------------------------- #
def test_fitness_target_stops_the_run(tmp_path, capsys):
    # cart-pole pays up to 1 per surviving step, so a target of 1.0 is met within the first generations
    cfg = write_config(tmp_path / "target.toml", generations=3, run_extra="fitness_target = 1.0\n")
    run_dir = tmp_path / "run"
    assert main(["evolve", str(cfg), "--out", str(run_dir), "--workers", "1"]) == 0
    assert "fitness target" in capsys.readouterr().out
    with open(run_dir / "history.csv", newline="") as f:
        best = [float(r["best"]) for r in csv.DictReader(f)]
    assert len(best) < 3 and best[-1] >= 1.0 and all(b < 1.0 for b in best[:-1])
    training = load_policy(run_dir / "champion.json").training
    assert training["target_reached"] is True and training["generations"] == len(best)


# --------------------------------------------------------------------------- #
# 5. a user's own plant
# --------------------------------------------------------------------------- #
class PointMassPhysics(Physics):
    """A point mass on a rail with viscous friction, to be brought to rest at the origin."""

    env_id = "testlab/PointMass-v0"
    summary = "1-D point mass driven to the origin and held there"
    param_table = ParamTable([
        ParamSpec("mass", "kg", 1.0, 0.1, 10.0, "moving mass"),
        ParamSpec("viscous_friction", "N s/m", 0.1, 0.0, 10.0, "viscous friction coefficient of the rail", "loss"),
        ParamSpec("max_force", "N", 5.0, 0.1, 100.0, "force at full command", "limit"),
        ParamSpec("track_half_length", "m", 2.0, 0.5, 10.0, "end stops at +- this", "task"),
        ParamSpec("goal_radius", "m", 0.1, 0.01, 1.0, "position tolerance of the goal", "task"),
        ParamSpec("goal_speed", "m/s", 0.2, 0.01, 1.0, "speed tolerance of the goal", "task"),
    ])
    state_names = ("x", "v")
    state_units = ("m", "m/s")
    obs_names = ("x", "v")
    obs_units = ("m", "m/s")
    action_names = ("force",)
    action_units = ("N",)
    failure_modes = ("off_track",)
    success_mode = "reach"
    hold_time = 0.2
    success_rule = "|x| < goal_radius and |v| < goal_speed held for 0.2 s"
    reward_doc = "-x^2 dt per control period, -10 for leaving the track"
    default_dt = 0.02
    default_time_limit = 4.0
    default_start_spread: ClassVar[dict[str, float]] = {"x": 1.0, "v": 0.5}

    def derivatives(self, state, force, params):
        v = state[:, 1]
        accel = (force[:, 0] - self.param(params, "viscous_friction") * v) / self.param(params, "mass")
        return np.stack([v, accel], axis=1)

    def actuate(self, action, params):
        return action * self.param(params, "max_force")[:, None]

    def check(self, state, force, params):
        return (np.abs(state[:, 0]) > self.param(params, "track_half_length")).astype(np.int64)

    def in_goal(self, state, params):
        return (np.abs(state[:, 0]) < self.param(params, "goal_radius")) & (
            np.abs(state[:, 1]) < self.param(params, "goal_speed")
        )

    def reward(self, state, action, params, failure, success):
        return -(state[:, 0] ** 2) * self.dt - 10.0 * (failure == 1)


class _Zero:
    """The do-nothing controller, as a batch policy."""

    n_policies = 1

    def reset(self, batch_size: int) -> None:
        pass

    def act(self, obs: np.ndarray) -> np.ndarray:
        return np.zeros((obs.shape[0], 1))


@pytest.fixture
def point_mass():
    pretrial_envs.register_physics(PointMassPhysics)
    yield PointMassPhysics.env_id
    # leave the registries as other test modules expect them
    env_registry._PHYSICS.pop(PointMassPhysics.env_id, None)
    gym.registry.pop(PointMassPhysics.env_id, None)


def test_users_own_plant_evolves(point_mass, tmp_path):
    # the plant is what the user says it is: from rest, no friction, constant F gives x = F t^2 / (2 m)
    # (Newton's second law; RK4 is exact for a quadratic in t)
    env = gym.make(point_mass, params={"viscous_friction": 0.0, "mass": 2.0})
    env.reset(options={"state": [0.0, 0.0]})
    for _ in range(50):
        env.step(np.array([1.0]))
    assert env.unwrapped.state[0] == pytest.approx(5.0 * 1.0**2 / (2 * 2.0), rel=1e-12)
    env.close()

    # serial on purpose: worker processes cannot import a class defined in a test module
    cfg = load_config(write_config(tmp_path / "pm.toml", env=point_mass, seed=2))
    lines: list[str] = []
    evo = Evolution(cfg, tmp_path / "run", Executor(), lines.append)
    evo.create()
    summary = evo.run(cfg.run.generations)
    assert summary["generations"] == 3 and len(lines) >= 3

    # generation 0's best genome, from the checkpoint written after that generation
    run_dir = tmp_path / "run"
    recorded = json.loads((run_dir / "manifest.json").read_text())["checkpoints"]
    first = checkpoint.load(run_dir / "checkpoints" / "generation-1.pkl", recorded["generation-1.pkl"])
    gen0_best = first["hall"][0]
    assert gen0_best.fitness == evo.state.history[0]["best"]

    champion = load_policy(run_dir / "champion.json")
    assert champion.env_id == point_mass
    gen0 = policy_from_genome(gen0_best, evo.neat_config, env_id=point_mass, env_params=champion.env_params,
                              io=champion.io)
    physics = evo.task.physics()
    scenarios = draw_scenarios(physics, 64, np.random.SeedSequence(2024), evo.task.params)  # unseen in training
    steps = evo.task.max_steps
    champ_out = run_episodes(physics, champion, scenarios, steps)
    gen0_out = run_episodes(physics, gen0, scenarios, steps)
    idle_out = run_episodes(physics, _Zero(), scenarios, steps)
    improved = champ_out.returns.mean() > gen0_out.returns.mean()
    reaches = champ_out.success.mean() >= 0.9
    assert improved or reaches, (champ_out.returns.mean(), gen0_out.returns.mean(), champ_out.success.mean())
    assert champ_out.returns.mean() > 3.0 * idle_out.returns.mean()  # returns are negative: 3x less cost

    # the champion also drives the plant through the gymnasium front door
    env = gym.make(point_mass, params=champion.env_params)
    obs, _ = env.reset(seed=5)
    champion.reset(1)
    for _ in range(200):
        obs, _, terminated, truncated, info = env.step(champion.act(obs[None, :])[0])
        if terminated or truncated:
            break
    assert info.get("success") is True, info
    env.close()


# --------------------------------------------------------------------------- #
# 6. bad input
# --------------------------------------------------------------------------- #
def _bad_missing(tmp_path: Path) -> tuple[list[str], str]:
    return ["evolve", str(tmp_path / "nope.toml")], "no such file"


def _bad_unknown_key(tmp_path: Path) -> tuple[list[str], str]:
    cfg = write_config(tmp_path / "typo.toml", run_extra="generatons = 5\n")
    return ["evolve", str(cfg)], "run.generatons"


def _bad_workers(tmp_path: Path) -> tuple[list[str], str]:
    cfg = write_config(tmp_path / "ok.toml")
    return ["evolve", str(cfg), "--workers", "0", "--out", str(tmp_path / "run")], "--workers"


def _bad_occupied_out(tmp_path: Path) -> tuple[list[str], str]:
    cfg = write_config(tmp_path / "ok.toml")
    (tmp_path / "occupied").mkdir()
    (tmp_path / "occupied" / "notes.txt").write_text("measured on the bench\n")
    return ["evolve", str(cfg), "--out", str(tmp_path / "occupied"), "--workers", "1"], "already holds files"


def _bad_not_a_run(tmp_path: Path) -> tuple[list[str], str]:
    cfg = write_config(tmp_path / "ok.toml")
    (tmp_path / "plain").mkdir()
    (tmp_path / "plain" / "data.csv").write_text("a,b\n1,2\n")
    return ["evolve", str(cfg), "--resume", str(tmp_path / "plain"), "--workers", "1"], "not a run directory"


def _bad_resume_nothing(tmp_path: Path) -> tuple[list[str], str]:
    cfg = write_config(tmp_path / "ok.toml")
    return ["evolve", str(cfg), "--resume", str(tmp_path / "never"), "--workers", "1"], "not a run directory"


@pytest.mark.parametrize(
    "case", [_bad_missing, _bad_unknown_key, _bad_workers, _bad_occupied_out, _bad_not_a_run, _bad_resume_nothing]
)
def test_bad_input_is_one_line_exit_2_and_leaves_nothing(case, tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)  # where the default runs/<name>-<time>/ would appear
    argv, needle = case(tmp_path)
    before = snapshot(tmp_path)
    capsys.readouterr()
    assert run_cli(argv) == 2
    out, err = capsys.readouterr()
    assert err.count("\n") == 1 and err.startswith("pretrial"), err
    assert needle in err and "Traceback" not in err + out
    assert snapshot(tmp_path) == before


def test_randomize_ramp_widens_the_ranges_from_nominal(tmp_path):
    # cart_mass nominal 1.0 kg sits inside its range; pole_mass nominal 0.1 kg lies below [0.2, 0.3],
    # so that range grows from its nearest end (the env's ParamSpec table gives both nominals)
    ranges = "[task.randomize]\ncart_mass = [0.9, 1.1]\npole_mass = [0.2, 0.3]\nsensor_noise_std = [0.0, 0.002]\n"
    ramped = make_task(load_config(write_config(tmp_path / "a.toml", task_extra="randomize_ramp = 10\n" + ranges)))
    plain = make_task(load_config(write_config(tmp_path / "b.toml", task_extra=ranges)))
    assert ramped.ranges(0) == {"cart_mass": (1.0, 1.0), "pole_mass": (0.2, 0.2), "sensor_noise_std": (0.0, 0.0)}
    half = ramped.ranges(5)
    assert half["cart_mass"] == pytest.approx((0.95, 1.05)) and half["pole_mass"] == pytest.approx((0.2, 0.25))
    assert ramped.ranges(10) == ramped.ranges(None) == plain.ranges(3) == plain.randomize
    physics = ramped.physics()
    col = physics.param_table.index("cart_mass")
    first = training_scenarios(ramped, 6, 7, 1, 0, generation=0)
    assert np.all(first.params[:, col] == 1.0) and np.all(first.perturb["sensor_noise_std"] == 0.0)
    # past the ramp a generation draws exactly what it would have drawn without one
    late = [training_scenarios(t, 6, 7, 1, 12, generation=12) for t in (ramped, plain)]
    assert np.array_equal(late[0].params, late[1].params)
    assert np.array_equal(late[0].perturb["sensor_noise_std"], late[1].perturb["sensor_noise_std"])
