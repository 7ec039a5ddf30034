"""The trust region per episode: steps outside a hybrid plant's residual envelope, counted in the rollout.

Reference: the rule the README states (a step is outside when its starting state or its physical input
lies beyond ``[low - m span, high + m span]`` for some variable, ``span = high - low``), recomputed here
with plain numpy from the recorded trace.
"""

from __future__ import annotations

import numpy as np
import pytest
from helpers import residual_file

import pretrial_envs
from pretrial.sim.rollout import draw_scenarios, run_episodes
from pretrial_envs.residual import Library

#: an envelope around the upright pole: x, x_dot, theta, theta_dot, force
UPRIGHT_LOW = (-0.05, -0.1, -0.3, -3.0, -10.0)
UPRIGHT_HIGH = (0.05, 0.1, 0.3, 3.0, 10.0)


class Push:
    """One policy that pushes the cart with a constant command (drives x out of the envelope on purpose)."""

    n_policies = 1

    def __init__(self, command: float):
        self.command = command

    def reset(self, batch_size: int) -> None:
        pass

    def act(self, obs: np.ndarray) -> np.ndarray:
        return np.full((obs.shape[0], 1), self.command)


def reference_counts(trace, steps, force_scale, low, high, margin):
    """Outside steps, first step and first variable per row, from the recorded trace (numpy only)."""
    low, high = np.asarray(low), np.asarray(high)
    span = high - low
    lo, hi = low - margin * span, high + margin * span
    rows = trace["action"].shape[1]
    out = np.zeros(rows, dtype=int)
    first = np.full(rows, -1)
    var = np.full(rows, -1)
    for r in range(rows):
        for k in range(int(steps[r])):
            z = np.concatenate([trace["state"][k, r], force_scale * trace["action"][k, r]])
            bad = ~((z >= lo) & (z <= hi))
            if bad.any():
                out[r] += 1
                if first[r] < 0:
                    first[r], var[r] = k, int(np.flatnonzero(bad)[0])
    return out, first, var


@pytest.mark.parametrize("command", [0.3, -0.6, 0.0])
def test_steps_outside_match_the_trace(tmp_path, command):
    path = residual_file(tmp_path / "r.json", UPRIGHT_LOW, UPRIGHT_HIGH, margin=0.1)
    physics = pretrial_envs.make_physics("pretrial/CartPole-v0", residual=str(path))
    sc = draw_scenarios(physics, 6, 3)
    out = run_episodes(physics, Push(command), sc, record=True)
    env = out.envelope
    assert env is not None
    max_force = physics.param_table.resolve({})[physics.param_table.index("max_force")]
    ref, first, var = reference_counts(out.trace, out.steps[0], max_force, UPRIGHT_LOW, UPRIGHT_HIGH, 0.1)
    np.testing.assert_array_equal(env["outside_steps"][0], ref)
    np.testing.assert_array_equal(env["first_step"][0], first)
    np.testing.assert_array_equal(env["first_var"][0], var)
    np.testing.assert_allclose(env["share"][0], ref / out.steps[0], rtol=0, atol=0)
    if command:  # a push drives the cart out: some steps inside and some outside, on every row
        assert ((ref > 0) & (ref < out.steps[0])).all(), (ref, out.steps[0])
    else:  # unpushed, the pole falls before the cart leaves
        assert (ref == 0).all()


def test_hanging_data_leave_an_upright_episode_outside_from_its_first_step(tmp_path):
    # the shipped bench data were taken with the pole hanging: every upright step is outside, through theta
    path = residual_file(tmp_path / "r.json")
    physics = pretrial_envs.make_physics("pretrial/CartPole-v0", residual=str(path))
    out = run_episodes(physics, Push(0.0), draw_scenarios(physics, 4, 0))
    assert (out.envelope["share"] == 1.0).all()
    assert (out.envelope["first_step"] == 0).all()
    assert (out.envelope["first_var"] == physics.state_names.index("theta")).all()


def test_no_residual_no_envelope():
    physics = pretrial_envs.make_physics("pretrial/CartPole-v0")
    out = run_episodes(physics, Push(0.2), draw_scenarios(physics, 3, 0))
    assert out.envelope is None


def test_scale_zero_rows_are_the_physics_alone_and_never_outside(tmp_path):
    # a residual that acts (random coefficients), rows at residual_scale 0 beside rows at 1: the scale-0 rows
    # equal the physics-only plant bit for bit, and count no step outside (no residual acts on them)
    plain = pretrial_envs.make_physics("pretrial/CartPole-v0")
    size = Library(plain.state_names, plain.state_units, plain.action_names, 2).size
    coef = np.random.default_rng(4).normal(0.0, 0.3, (2, size))
    path = residual_file(tmp_path / "r.json", coefficients=coef)
    hybrid = pretrial_envs.make_physics("pretrial/CartPole-v0", residual=str(path))
    scale = np.array([0.0, 1.0, 0.0, 1.0, 0.0])
    mixed = run_episodes(hybrid, Push(0.1), draw_scenarios(hybrid, 5, 2, fixed={"residual_scale": scale}),
                         record=True, score=True)
    alone = run_episodes(plain, Push(0.1), draw_scenarios(plain, 5, 2), record=True, score=True)
    zero = scale == 0
    for key in ("success", "failure", "steps", "returns", "score"):
        assert getattr(mixed, key)[0][zero].tobytes() == getattr(alone, key)[0][zero].tobytes(), key
    assert mixed.trace["state"][:, zero].tobytes() == alone.trace["state"][:, zero].tobytes()
    assert (mixed.envelope["outside_steps"][0][zero] == 0).all()
    assert (mixed.envelope["outside_steps"][0][~zero] > 0).all()
