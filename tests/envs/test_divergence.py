"""Physics that blow up: episodes end as ``diverged``, count as failures, a warning names the parameters,
and the run or sweep goes on.

The plant is a scalar unstable first-order system dx/dt = a x + u (a textbook example, e.g. Franklin,
Powell & Emami-Naeini, "Feedback Control of Dynamic Systems", first-order plants). For a step h the
classic RK4 update multiplies x by 1 + ha + (ha)^2/2 + (ha)^3/6 + (ha)^4/24 (the Taylor polynomial of
exp(ha), any numerical analysis text), so with a = 1e200 and h = 0.01 one step overflows float64
(largest finite value about 1.8e308, IEEE 754) and the state becomes inf, then nan.
"""

from __future__ import annotations

import json
import shlex
from typing import ClassVar

import gymnasium as gym
import numpy as np
import pytest

import pretrial_envs
from pretrial.cli.main import main
from pretrial_envs import ParamSpec, ParamTable, Physics
from pretrial_envs import registry as env_registry


class RunawayPhysics(Physics):
    """dx/dt = a x + u: unstable for a > 0, held near 0 by feedback; huge a overflows the integrator."""

    env_id = "testlab/Runaway-v0"
    summary = "scalar unstable first-order plant"
    param_table = ParamTable([
        ParamSpec("growth_rate", "1/s", 1.0, 0.0, 1e300, "open-loop pole a"),
        ParamSpec("max_input", "1/s", 5.0, 0.1, 100.0, "input at full command", "limit"),
        ParamSpec("limit", "-", 10.0, 0.1, 1e6, "the episode fails when |x| exceeds this", "task"),
    ])
    state_names = ("x",)
    state_units = ("-",)
    obs_names = ("x",)
    obs_units = ("-",)
    action_names = ("u",)
    action_units = ("1/s",)
    failure_modes = ("out_of_range",)
    success_mode = "survive"
    success_rule = "|x| stays within limit for the whole episode"
    reward_doc = "1 per control period survived"
    default_dt = 0.02
    default_time_limit = 1.0
    default_start_spread: ClassVar[dict[str, float]] = {"x": 0.5}

    def derivatives(self, state, force, params):
        return self.param(params, "growth_rate")[:, None] * state + force

    def actuate(self, action, params):
        return action * self.param(params, "max_input")[:, None]

    def check(self, state, force, params):
        return (np.abs(state[:, 0]) > self.param(params, "limit")).astype(np.int64)

    def reward(self, state, action, params, failure, success):
        return np.ones(len(state))


@pytest.fixture
def runaway():
    pretrial_envs.register_physics(RunawayPhysics)
    yield RunawayPhysics.env_id
    env_registry._PHYSICS.pop(RunawayPhysics.env_id, None)
    gym.registry.pop(RunawayPhysics.env_id, None)


def test_one_step_overflows_and_the_episode_ends_diverged(runaway):
    env = gym.make(runaway, params={"growth_rate": 1e200})
    env.reset(seed=0, options={"state": [0.1]})
    _, _, terminated, _, info = env.step(np.array([0.0]))
    assert terminated and info["failure"] == "diverged"
    env.close()


PLAN = """
[scenario]
env = "testlab/Runaway-v0"
episodes = 20
seed = 3

[[vary]]
name = "growth_rate"
range = [0.5, 1e200]
dispersion = [1.0, 1e200]

[analysis]
run = ["montecarlo"]
montecarlo_samples = 64

[require]
success_rate = 0.5
"""


def test_sweep_counts_warns_and_goes_on(runaway, tmp_path, capsys):
    plan = tmp_path / "runaway.toml"
    plan.write_text(PLAN)
    out = tmp_path / "sweep"
    # exit 1: diverged episodes are failures, so the verdict fails (and the sweep still finishes)
    assert main(["sweep", "lqr", "--plan", str(plan), "--out", str(out), "--workers", "1"]) == 1
    err = capsys.readouterr().err
    results = json.loads((out / "results.json").read_text())
    mc, div = results["montecarlo"], results["diverged"]
    # uniform in [1, 1e200]: all but a vanishing fraction of draws overflow in the first step
    assert mc["failure_modes"].get("diverged", 0) >= 60
    assert div["episodes"] == mc["failure_modes"]["diverged"] == mc["samples"] - mc["successes"]
    assert results["verdict"] == "fail"
    warning = [line for line in err.splitlines() if "warning" in line]
    assert len(warning) == 1 and "diverged" in warning[0] and "growth_rate in [" in warning[0], err
    assert "Diverged episodes" in (out / "report.md").read_text()
    lo, hi = div["ranges"]["growth_rate"]
    assert 1.0 <= lo <= hi <= 1e200

    # the replay line reproduces the blow-up, with its own warning
    words = shlex.split(div["first"]["replay"])
    assert main([*words[1:], "--json"]) == 0
    cap = capsys.readouterr()
    doc = json.loads(cap.out)
    assert doc["failure"][-1] == "diverged"
    assert "diverged" in cap.err and "growth_rate" in cap.err


def test_nominal_sweep_has_no_divergence(runaway, tmp_path, capsys):
    plan = tmp_path / "calm.toml"
    plan.write_text(PLAN.replace("dispersion = [1.0, 1e200]", "dispersion = [0.5, 2.0]"))
    assert main(["sweep", "lqr", "--plan", str(plan), "--out", str(tmp_path / "s"), "--workers", "1"]) == 0
    assert "warning" not in capsys.readouterr().err
    assert json.loads((tmp_path / "s" / "results.json").read_text())["diverged"] is None


def test_evolution_warns_and_goes_on(runaway, tmp_path, capsys):
    cfg = tmp_path / "runaway.toml"
    cfg.write_text(
        '[task]\nenv = "testlab/Runaway-v0"\nepisodes = 4\n'
        "[task.randomize]\ngrowth_rate = [1.0, 1e200]\n"
        "[neat]\npop_size = 10\n"
        "[run]\ngenerations = 2\nseed = 1\nworkers = 1\nvalidation_episodes = 4\n"
    )
    # serial: worker processes could not import a plant defined in a test module
    assert main(["evolve", str(cfg), "--out", str(tmp_path / "run"), "--quiet"]) == 0
    err = capsys.readouterr().err
    lines = [line for line in err.splitlines() if "warning" in line]
    assert len(lines) == 3, err  # one per generation, one for the finalists' re-test on fresh scenarios
    assert all("diverged" in line and "growth_rate in [" in line for line in lines), err
    assert "generation 0:" in lines[0] and "generation 1:" in lines[1] and "re-test" in lines[2], err
    assert (tmp_path / "run" / "champion.json").is_file()
