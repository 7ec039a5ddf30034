"""The gymnasium front doors agree with the physics core, for every shipped env.

References: gymnasium's own ``check_env`` (gymnasium.utils.env_checker) and its
vector-env API (``gymnasium.make_vec``); everything else here compares the two
front doors with the one physics core they wrap.
"""

from __future__ import annotations

import gymnasium as gym
import numpy as np
import pytest
from gymnasium.utils.env_checker import check_env

import pretrial_envs
from pretrial_envs import physics_type

# (env id, extra keyword arguments): every configuration the issue names.
CONFIGS = [
    ("pretrial/CartPole-v0", {}),
    ("pretrial/CartPole-v0", {"poles": 2}),
    ("pretrial/CartPole-v0", {"poles": 2, "observe": "positions"}),
    ("pretrial/CartPole-v0", {"integrator": "euler", "substeps": 1}),
    ("pretrial/DronePair-v0", {}),
    ("pretrial/GantryCrane-v0", {}),
    ("pretrial/GantryCrane-v0", {"hoist": True}),
]
IDS = [f"{e.split('/')[1]}{kw}" for e, kw in CONFIGS]


@pytest.mark.parametrize(("env_id", "kwargs"), CONFIGS, ids=IDS)
def test_gymnasium_check_env(env_id, kwargs):
    # gymnasium's own API checker (includes its determinism and info-reuse checks).
    env = gym.make(env_id, **kwargs)
    check_env(env.unwrapped, skip_render_check=True)
    env.close()


@pytest.mark.parametrize(("env_id", "kwargs"), CONFIGS[:1] + CONFIGS[4:6], ids=["cartpole", "drones", "gantry"])
def test_render_rgb_array(env_id, kwargs):
    env = gym.make(env_id, render_mode="rgb_array", **kwargs)
    env.reset(seed=0)
    frame = env.render()
    assert frame.ndim == 3 and frame.shape[2] == 3 and frame.dtype == np.uint8
    assert frame.std() > 0  # something was drawn
    env.close()


@pytest.mark.parametrize(("env_id", "kwargs"), CONFIGS, ids=IDS)
def test_contract_attributes(env_id, kwargs):
    env = gym.make(env_id, **{**kwargs, "dt": 0.05, "substeps": 3})
    u = env.unwrapped
    assert u.dt == pytest.approx(0.05)
    assert u.physics.substeps == 3
    names = [s.name for s in u.param_table]
    assert set(u.params) == set(names)
    assert all(u.params[s.name] == s.nominal for s in u.param_table)
    # every loss and disturbance parameter accepts 0
    zero = {s.name: 0.0 for s in u.param_table if s.role in ("loss", "disturbance")}
    env0 = gym.make(env_id, params=zero, **kwargs)
    assert all(env0.unwrapped.params[n] == 0.0 for n in zero)
    assert isinstance(env.action_space, gym.spaces.Box)
    assert np.all(env.action_space.low == -1) and np.all(env.action_space.high == 1)
    _, info = env.reset(seed=3)
    assert np.array_equal(info["state"], u.state)
    exact = u.state + 0.01
    env.reset(seed=3, options={"state": exact})
    assert np.array_equal(u.state, exact)


@pytest.mark.parametrize("env_id", pretrial_envs.env_ids())
def test_bad_params_name_the_problem(env_id):
    with pytest.raises(ValueError, match="no_such_param"):
        gym.make(env_id, params={"no_such_param": 1.0})
    spec = gym.make(env_id).unwrapped.param_table[0]
    with pytest.raises(ValueError, match=spec.name):
        gym.make(env_id, params={spec.name: spec.high * 10 + 1})
    with pytest.raises(ValueError, match="integrator"):
        gym.make(env_id, integrator="leapfrog")


@pytest.mark.parametrize(("env_id", "kwargs"), CONFIGS, ids=IDS)
def test_batched_core_equals_single_env(env_id, kwargs):
    """N sub-environments with their own parameters step exactly like N single envs."""
    n = 6
    rng = np.random.default_rng(11)
    probe = gym.make(env_id, **kwargs).unwrapped
    table = probe.param_table
    # perturb every non-task parameter within its range, per sub-environment
    per_env = {}
    for s in table:
        if s.role == "task":
            continue
        lo, hi = max(s.low, 0.8 * s.nominal), min(s.high, 1.2 * s.nominal) if s.nominal else s.high * 0.1
        per_env[s.name] = rng.uniform(min(lo, hi), max(lo, hi), n)
    vec = gym.make_vec(env_id, num_envs=n, vectorization_mode="vector_entry_point", params=per_env, **kwargs)
    vec.reset(seed=5)
    state0 = vec.unwrapped.state
    singles = []
    for i in range(n):
        e = gym.make(env_id, params={k: v[i] for k, v in per_env.items()}, **kwargs).unwrapped
        e.reset(seed=0, options={"state": state0[i]})
        singles.append(e)
    physics = vec.unwrapped.physics
    if physics.noise_dim:
        # Disturbance processes draw noise from each door's own generator; give
        # the batched core and every single core the same draws instead.
        state, params = vec.unwrapped.state, vec.unwrapped.params
        hold, steps = np.zeros(n), np.zeros(n, dtype=np.int64)
        single_state = [e.state[None] for e in singles]
        for _ in range(25):
            actions = rng.uniform(-1, 1, (n, physics.action_dim))
            noise = rng.standard_normal((n, physics.noise_dim))
            tr = physics.transition(state, actions, params, hold, steps, noise)
            for i, e in enumerate(singles):
                one = slice(i, i + 1)
                t1 = e.physics.transition(single_state[i], actions[one], e._params, hold[one], steps[one], noise[one])
                single_state[i] = t1.state
                np.testing.assert_allclose(t1.state[0], tr.state[i], rtol=0, atol=1e-12)
                np.testing.assert_allclose(t1.reward[0], tr.reward[i], rtol=0, atol=1e-12)
            state, hold, steps = tr.state, tr.hold, tr.steps
        return
    for _ in range(25):
        actions = rng.uniform(-1, 1, (n, physics.action_dim))
        obs, rew, term, trunc, _ = vec.step(actions)
        for i, e in enumerate(singles):
            if e._done:
                continue
            o1, r1, te1, tr1, _ = e.step(actions[i])
            np.testing.assert_allclose(o1, obs[i], rtol=0, atol=1e-12)
            np.testing.assert_allclose(r1, rew[i], rtol=0, atol=1e-12)
            assert (te1, tr1) == (term[i], trunc[i])
            e._done = te1 or tr1


@pytest.mark.parametrize(("env_id", "kwargs"), CONFIGS, ids=IDS)
def test_non_finite_state_ends_as_diverged(env_id, kwargs):
    env = gym.make(env_id, **kwargs).unwrapped
    env.reset(seed=0)
    bad = env.state.copy()
    bad[1] = np.nan
    env.reset(options={"state": bad})
    _, reward, terminated, truncated, info = env.step(np.zeros(env.action_space.shape))
    assert terminated and not truncated
    assert info["success"] is False and info["failure"] == "diverged"
    assert np.isfinite(reward)


@pytest.mark.parametrize(("env_id", "kwargs"), CONFIGS, ids=IDS)
def test_vector_env_autoresets_next_step(env_id, kwargs):
    vec = gym.make_vec(
        env_id, num_envs=3, vectorization_mode="vector_entry_point", max_episode_steps=4, **kwargs
    )
    assert vec.metadata["autoreset_mode"] == gym.vector.AutoresetMode.NEXT_STEP
    vec.reset(seed=1)
    a = np.zeros((3, vec.unwrapped.physics.action_dim))
    seen_done = False
    for _ in range(6):
        _, _, term, trunc, info = vec.step(a)
        if (term | trunc).any():
            seen_done = True
            assert info["_success"][term | trunc].all()
    assert seen_done


def test_start_state_alone_is_not_success():
    # A reach task started inside its goal region must still hold it for hold_time.
    for env_id in pretrial_envs.env_ids():
        phys = physics_type(env_id)
        if phys.success_mode != "reach":
            continue
        assert phys.hold_time > 0, env_id
