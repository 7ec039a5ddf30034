"""A user's own plant, named as MODULE:ID (the form gymnasium.make accepts), in every command.

gymnasium's own ``make("module:EnvId")`` imports the module first so it can register its envs;
pretrial does the same, in the command's process and in every worker process.
"""

from __future__ import annotations

import json
import sys
import textwrap

import pytest

from pretrial.cli.main import main
from pretrial.errors import InputError
from pretrial.sim.execution import Executor, ProcessExecutor
from pretrial.sim.plant import check_workers_can_build

PLANT = textwrap.dedent('''
    """A cart on a frictionless rail pushed by a force: x'' = u / m (double integrator)."""
    from typing import ClassVar

    import numpy as np

    import pretrial_envs
    from pretrial_envs.core import ParamSpec, ParamTable, Physics


    class SliderPhysics(Physics):
        env_id = "benchlab/Slider-v0"
        summary = "a mass on a rail to hold at the origin"
        param_table = ParamTable([
            ParamSpec("mass", "kg", 1.0, 0.01, 100.0, "the sliding mass"),
            ParamSpec("max_force", "N", 2.0, 0.01, 100.0, "force at full command", "limit"),
        ])
        state_names = ("x", "x_dot")
        state_units = ("m", "m/s")
        obs_names = ("x", "x_dot")
        obs_units = ("m", "m/s")
        action_names = ("force",)
        action_units = ("N",)
        failure_modes = ("off_rail",)
        success_rule = "|x| <= 1 m for the whole episode"
        reward_doc = "-(x^2) per control period"
        default_time_limit = 2.0
        default_start_spread: ClassVar[dict[str, float]] = {"x": 0.2}

        def regulated(self):
            return {"x": ("m", 0.1)}

        def derivatives(self, state, force, params):
            return np.stack([state[:, 1], force[:, 0] / self.param(params, "mass")], axis=1)

        def actuate(self, action, params):
            return action * self.param(params, "max_force")[:, None]

        def check(self, state, force, params):
            return (np.abs(state[:, 0]) > 1.0).astype(np.int64)

        def reward(self, state, action, params, failure, success):
            return -state[:, 0] ** 2


    pretrial_envs.register_physics(SliderPhysics)
''')


@pytest.fixture
def plant_module(tmp_path, monkeypatch):
    (tmp_path / "benchlab_plants.py").write_text(PLANT, encoding="utf-8")
    monkeypatch.syspath_prepend(str(tmp_path))  # spawned workers receive the parent's sys.path
    yield "benchlab_plants:benchlab/Slider-v0"
    sys.modules.pop("benchlab_plants", None)


def test_envs_lists_a_module_plant(plant_module, capsys):
    assert main(["envs", plant_module, "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["id"] == "benchlab/Slider-v0" and [p["name"] for p in doc["params"]] == ["mass", "max_force"]


def test_evolve_and_sweep_a_module_plant_on_two_workers(plant_module, tmp_path, capsys):
    cfg = tmp_path / "slider.toml"
    cfg.write_text(f'[task]\nenv = "{plant_module}"\nepisodes = 4\n[neat]\npop_size = 10\n'
                   "[run]\ngenerations = 2\nseed = 1\nworkers = 2\nfinalists = 2\nvalidation_episodes = 4\n",
                   encoding="utf-8")
    assert main(["evolve", str(cfg), "--out", str(tmp_path / "run"), "--json"]) == 0
    capsys.readouterr()
    plan = tmp_path / "plan.toml"
    plan.write_text(f'[scenario]\nenv = "{plant_module}"\nepisodes = 8\nhorizon = 1.0\n'
                    '[[vary]]\nname = "mass"\nrange = [0.5, 2.0]\n'
                    '[analysis]\nrun = ["montecarlo"]\nmontecarlo_samples = 16\n[require]\nsuccess_rate = 0.5\n',
                    encoding="utf-8")
    code = main(["sweep", str(tmp_path / "run"), "--plan", str(plan), "--out", str(tmp_path / "sw"),
                 "--workers", "2", "--json"])
    assert code in (0, 1)
    res = json.loads((tmp_path / "sw" / "results.json").read_text(encoding="utf-8"))
    assert res["montecarlo"]["samples"] == 16


def test_a_plant_defined_in_main_is_refused_for_worker_processes(plant_module):
    import pretrial_envs

    kind = pretrial_envs.physics_type(plant_module)
    main_kind = type("SliderPhysics", (kind,), {"__module__": "__main__"})
    physics = main_kind()
    check_workers_can_build(physics, Executor())  # one process: fine
    with ProcessExecutor(2) as ex, pytest.raises(InputError, match="defined in __main__") as err:
        check_workers_can_build(physics, ex)
    assert "MODULE:benchlab/Slider-v0" in str(err.value) and "\n" not in str(err.value)


def test_an_unimportable_module_is_one_line(capsys):
    assert main(["envs", "no_such_module_xyz:lab/Thing-v0"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "no_such_module_xyz" in err[0]


def test_sweep_of_a_plain_gymnasium_env_runs_what_needs_no_physics(tmp_path, capsys):
    # gymnasium's own Pendulum-v1: no parameter table, no equations; generic perturbations still apply
    cfg = tmp_path / "pend.toml"
    cfg.write_text('[task]\nenv = "Pendulum-v1"\nepisodes = 2\n[neat]\npop_size = 10\n'
                   "[run]\ngenerations = 1\nseed = 1\nworkers = 1\nfinalists = 1\nvalidation_episodes = 2\n",
                   encoding="utf-8")
    assert main(["evolve", str(cfg), "--out", str(tmp_path / "run"), "--json"]) == 0
    plan = tmp_path / "plan.toml"
    plan.write_text('[scenario]\nenv = "Pendulum-v1"\nepisodes = 4\n[[vary]]\nname = "sensor_noise_std"\n'
                    'range = [0.0, 0.5]\n[analysis]\nrun = ["margins", "montecarlo", "linear", "integrator_check"]\n'
                    "montecarlo_samples = 8\n[require]\nsuccess_rate = 0.5\n", encoding="utf-8")
    capsys.readouterr()
    code = main(["sweep", str(tmp_path / "run"), "--plan", str(plan), "--out", str(tmp_path / "sw"), "--workers", "1"])
    assert code in (0, 1)
    res = json.loads((tmp_path / "sw" / "results.json").read_text(encoding="utf-8"))
    assert res["montecarlo"]["samples"] == 8 and res["margins"][0]["name"] == "sensor_noise_std"
    assert res["integrator_check"] is None and "integrates its own equations" in res["skipped"]["integrator_check"]
    linear_rows = [r for r in res["requirements"] if "loop" in r["name"]]
    assert linear_rows and all(r["pass"] is None for r in linear_rows)
    assert "skipped" in capsys.readouterr().out
