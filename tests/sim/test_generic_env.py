"""The generic path: a plain gymnasium env with Box spaces evolves like a pretrial env.

References: gymnasium's own Pendulum-v1 (classic control) and a tiny env written here
against gymnasium's Env API.
"""

from __future__ import annotations

import gymnasium as gym
import numpy as np
import pytest

from pretrial.controller.policy import load_policy
from pretrial.errors import InputError
from pretrial.evolution.config import load_config
from pretrial.evolution.loop import Evolution
from pretrial.sim.execution import Executor
from pretrial.sim.plant import GymnasiumPlant, make_plant


class DriftEnv(gym.Env):
    """A point that drifts right; the action pushes it. Terminates when |x| > 1."""

    def __init__(self):
        self.observation_space = gym.spaces.Box(-np.inf, np.inf, (1,), np.float64)
        self.action_space = gym.spaces.Box(-2.0, 2.0, (1,), np.float64)
        self.dt = 0.1
        self.x = 0.0

    def reset(self, *, seed=None, options=None):
        super().reset(seed=seed)
        self.x = float(self.np_random.uniform(-0.1, 0.1))
        return np.array([self.x]), {}

    def step(self, action):
        self.x += self.dt * (0.5 + float(action[0]))
        term = abs(self.x) > 1.0
        return np.array([self.x]), -abs(self.x), term, False, {}


gym.register("testlab/Drift-v0", entry_point=DriftEnv, max_episode_steps=50)


def test_plant_steps_like_the_env_itself():
    plant = GymnasiumPlant("testlab/Drift-v0")
    assert (plant.obs_dim, plant.action_dim, plant.max_steps) == (1, 1, 50)
    start = plant.sample_start(np.random.default_rng(0), np.zeros((3, 0)))
    ref = gym.make("testlab/Drift-v0")
    obs, _ = ref.reset(seed=int(start[1, 0]))
    assert obs[0] == start[1, 1]
    # action +1 in [-1, 1] is the Box's high end (+2); same as stepping the env with 2.0
    tr = plant.transition(start, np.ones((3, 1)), np.zeros((3, 0)), np.zeros(3), np.zeros(3, dtype=int))
    ref_obs, ref_r, *_ = ref.step(np.array([2.0]))
    assert tr.state[1, 1] == ref_obs[0] and tr.reward[1] == ref_r


def test_non_box_env_is_refused():
    with pytest.raises(InputError, match="Box"):
        make_plant("CartPole-v1")  # gymnasium's CartPole has a Discrete action space


@pytest.mark.parametrize("env_id", ["testlab/Drift-v0", "Pendulum-v1"])
def test_generic_env_evolves(tmp_path, env_id):
    cfg_path = tmp_path / "c.toml"
    cfg_path.write_text(
        f'[task]\nenv = "{env_id}"\nepisodes = 2\nhorizon = 2.0\n'
        "[neat]\npop_size = 12\n[run]\ngenerations = 3\nseed = 4\nfinalists = 2\nvalidation_episodes = 2\n"
    )
    cfg = load_config(cfg_path)
    evo = Evolution(cfg, tmp_path / "run", Executor(), log=lambda _line: None)
    evo.create()
    summary = evo.run(cfg.run.generations)
    assert summary["generations"] == 3
    policy = load_policy(tmp_path / "run" / "champion.json")
    assert policy.env_id == env_id
    a = policy.act(np.zeros((4, make_plant(env_id).obs_dim)))
    assert a.shape == (4, make_plant(env_id).action_dim) and np.all(np.abs(a) <= 1)
