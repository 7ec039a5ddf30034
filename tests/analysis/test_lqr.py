"""The LQR baseline (pretrial.lqr).

References: Safonov & Athans 1977 ("Gain and phase margin for multiloop LQG regulators", IEEE TAC 22(2)):
a continuous LQR with diagonal R keeps every input channel stable for gains in [1/2, inf) and phase
changes of +-60 degrees; python-control's ``control.lqr`` and Kleinman's Newton iteration on Lyapunov
equations (Kleinman 1968, IEEE TAC 13(1)) as independent solutions of the same Riccati equation.
"""

from __future__ import annotations

import json

import control
import numpy as np
import pytest
from scipy import linalg

from pretrial.analysis.linear import loop_report
from pretrial.analysis.loop_margins import analyze_loop
from pretrial.analysis.lqr import design_lqr
from pretrial.errors import InputError
from pretrial.sim.rollout import Scenarios, draw_scenarios, run_episodes
from pretrial_envs import make_physics

ENVS = [
    ("pretrial/CartPole-v0", {}),
    ("pretrial/CartPole-v0", {"poles": 2}),
    ("pretrial/GantryCrane-v0", {}),
    ("pretrial/GantryCrane-v0", {"hoist": True}),
    ("pretrial/DronePair-v0", {}),
]


def _safonov_athans(channels):
    for ch in channels:
        assert ch.stable
        assert ch.gain_margin_low <= 0.5 + 1e-6, ch.name
        assert ch.gain_margin_high is None, ch.name
        assert ch.phase_margin_deg >= 60.0 - 1e-6, ch.name


@pytest.mark.parametrize(("env_id", "options"), ENVS)
def test_safonov_athans_guarantee_on_every_env(env_id, options):
    ph = make_physics(env_id, **options)
    pol = design_lqr(ph)
    # the design loop L = K (sI - A)^-1 B, broken at each plant input
    _safonov_athans(analyze_loop(pol.a, pol.b, pol.k, names=ph.action_names).channels)
    if env_id != "pretrial/DronePair-v0":
        # design model = the linearized plant here, so the policy's own continuous loop meets it too
        rep = loop_report(ph, pol)
        assert rep.linearizable
        _safonov_athans(rep.channels)
    json.dumps(pol.describe(), allow_nan=False)


def test_drone_loop_with_rotor_lag_is_reported_honestly():
    # the rotor lag was residualized for the design: the full loop keeps stability but not the guarantee
    ph = make_physics("pretrial/DronePair-v0")
    pol = design_lqr(ph)
    assert any("residualized" in n for n in pol.notes)
    rep = loop_report(ph, pol)
    assert rep.linearizable and rep.stable
    assert all(ch.phase_margin_deg < 60.0 for ch in rep.channels)


@pytest.mark.parametrize(("env_id", "options"), ENVS[:3])
def test_gain_against_independent_riccati_solutions(env_id, options):
    ph = make_physics(env_id, **options)
    pol = design_lqr(ph)
    k_ref, _, _ = control.lqr(pol.a, pol.b, pol.q, pol.r)
    assert np.allclose(pol.k, k_ref, rtol=1e-6, atol=1e-9)
    # Kleinman 1968: K_{i+1} = R^-1 B' P_i, (A - B K_i)' P_i + P_i (A - B K_i) + Q + K_i' R K_i = 0,
    # started from any stabilizing gain (here the design's own, perturbed by 10 %)
    k = 1.1 * pol.k
    for _ in range(30):
        acl = pol.a - pol.b @ k
        p = linalg.solve_continuous_lyapunov(acl.T, -(pol.q + k.T @ pol.r @ k))
        k = np.linalg.solve(pol.r, pol.b.T @ p)
    assert np.allclose(pol.k, k, rtol=1e-6, atol=1e-9)


def test_lqr_balances_the_cartpole():
    ph = make_physics("pretrial/CartPole-v0")
    pol = design_lqr(ph)
    out = run_episodes(ph, pol, draw_scenarios(ph, 32, seed=5))
    assert out.success.all()
    two = make_physics("pretrial/CartPole-v0", poles=2)
    out2 = run_episodes(two, design_lqr(two), draw_scenarios(two, 4, seed=5))
    assert out2.success.all()


def test_lqr_holds_the_drones_near_their_goals():
    ph = make_physics("pretrial/DronePair-v0")
    pol = design_lqr(ph)
    sc = draw_scenarios(ph, 8, seed=2, base_params={"gust_std": 0.0})
    start = ph.target_state(sc.params)
    start[:, [0, 1, 6, 7]] += np.random.default_rng(0).uniform(-0.1, 0.1, (8, 4))
    out = run_episodes(ph, pol, Scenarios(sc.params, start, sc.keys, {}))
    assert out.success.all()
    hover = pol.equilibrium_action
    p = ph.param_table.resolve({})
    assert np.allclose(hover, p[ph.param_table.index("mass")] * p[ph.param_table.index("gravity")]
                       / p[ph.param_table.index("max_thrust")] - 1.0)


def test_weights_by_name():
    ph = make_physics("pretrial/CartPole-v0")
    base = design_lqr(ph)
    heavier = design_lqr(ph, q={"x": 10.0})
    assert heavier.q[0, 0] == 10.0 and abs(heavier.k[0, 0]) > abs(base.k[0, 0])
    with pytest.raises(InputError, match=r"unknown q weight name 'theta_dt'.*valid: x, x_dot, theta, theta_dot"):
        design_lqr(ph, q={"theta_dt": 1.0})
    with pytest.raises(InputError, match="r weight 'force'"):
        design_lqr(ph, r={"force": 0.0})
    with pytest.raises(InputError, match="unknown r weight name 'torque'"):
        design_lqr(ph, r={"torque": 1.0})


def test_needs_full_state_observations():
    ph = make_physics("pretrial/CartPole-v0", observe="positions")
    with pytest.raises(InputError, match=r"full-state observations.*x_dot, theta_dot.*positions"):
        design_lqr(ph)


def test_wind_moves_the_crane_design_point():
    # with wind the load cannot hang straight down at rest: the design uses the nearest rest point
    ph = make_physics("pretrial/GantryCrane-v0")
    pol = design_lqr(ph, {"wind_speed": 10.0, "load_drag": 0.5})
    assert pol.equilibrium_state[2] > 0.0  # swung downwind
    assert any("nearest rest point" in n for n in pol.notes)
    f = ph.derivatives(pol.equilibrium_state[None], ph.actuate(pol.equilibrium_action[None], pol.params[None]),
                       pol.params[None])
    assert np.abs(f).max() < 1e-8
