"""Closed-loop equilibrium and linearization (pretrial.linear).

References: the frictionless cart-pole equations (Barto, Sutton & Anderson 1983; Florian 2007 with the
friction coefficients set to 0), linearized at the upright by hand; scipy.signal.cont2discrete for the
zero-order-hold discretization; pretrial_envs.core.jacobians for the plant Jacobians.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy import signal

from pretrial.analysis.linear import closed_loop_equilibrium, linear_params, loop_report, plant_model, sampled_loop, zoh
from pretrial.analysis.loop_margins import analyze_loop
from pretrial.analysis.lqr import design_lqr
from pretrial.controller.policy import Policy, content_hash
from pretrial.errors import InputError
from pretrial_envs import make_physics
from pretrial_envs.core import jacobians

CHANNEL_KEYS = {"channel", "gain_margin_low", "gain_margin_high", "gain_margin_db", "phase_margin_deg",
                "delay_margin_s", "disk_margin"}


def linear_policy(env_id: str, gains, bias, *, feed_forward: bool = True, activation: str = "identity",
                  options: dict | None = None) -> Policy:
    """A policy file whose network is ``a = act(bias + gains @ obs)`` (one node per action)."""
    gains = np.atleast_2d(np.asarray(gains, dtype=float))
    n_out, n_in = gains.shape
    inputs = [-(i + 1) for i in range(n_in)]
    doc = {
        "schema": "pretrial.policy",
        "schema_version": 1,
        "env": {"id": env_id, "options": dict(options or {}), "params": {}},
        "network": {
            "feed_forward": feed_forward,
            "inputs": inputs,
            "outputs": list(range(n_out)),
            "nodes": [{"key": j, "bias": float(bias[j]), "response": 1.0, "activation": activation,
                       "aggregation": "sum"} for j in range(n_out)],
            "connections": [{"in": inputs[i], "out": j, "weight": float(gains[j, i])}
                            for j in range(n_out) for i in range(n_in) if gains[j, i] != 0.0],
        },
        "layout": {"kind": "flat", "blocks": 1},
        "observation": {"offset": [0.0] * n_in, "scale": [1.0] * n_in},
        "action": {"scale": [1.0] * n_out, "offset": [0.0] * n_out},
        "training": {},
    }
    doc["content_sha256"] = content_hash(doc)
    return Policy.from_dict(doc)


def cartpole_gains(physics) -> np.ndarray:
    """A stabilizing observation-to-action gain for the cart-pole (the LQR baseline's)."""
    lqr = design_lqr(physics)
    return -lqr._m  # a = a* - M (obs - obs*), with a* = 0 and obs* = 0 at the upright


def test_cartpole_linearization_matches_the_textbook_equations():
    # Frictionless cart-pole linearized at the upright (Barto, Sutton & Anderson 1983 / Florian 2007 with
    # mu_c = mu_p = 0): with den = l (4/3 - m / (M + m)),
    #   theta'' = (g theta - F / (M + m)) / den,   x'' = F / (M + m) - m l theta'' / (M + m)
    ph = make_physics("pretrial/CartPole-v0")
    p = ph.param_table.resolve({"pole_friction": 0.0, "cart_friction": 0.0})
    g, big_m, m, half, fmax = (p[ph.param_table.index(n)] for n in
                              ("gravity", "cart_mass", "pole_mass", "pole_half_length", "max_force"))
    total = big_m + m
    den = half * (4.0 / 3.0 - m / total)
    a_ref = np.zeros((4, 4))
    a_ref[0, 1] = a_ref[2, 3] = 1.0
    a_ref[3, 2] = g / den
    a_ref[1, 2] = -m * half / total * g / den
    b_ref = np.array([0.0, 1.0 / total + m * half / (total**2 * den), 0.0, -1.0 / (total * den)]) * fmax
    model = plant_model(ph, np.zeros(4), np.zeros(1), p, [0, 1, 2, 3], [])
    assert np.allclose(model.a, a_ref, rtol=1e-7, atol=1e-8)
    assert np.allclose(model.b[:, 0], b_ref, rtol=1e-7, atol=1e-8)


def test_plant_model_uses_the_core_jacobians():
    ph = make_physics("pretrial/GantryCrane-v0", hoist=True)
    p, _ = linear_params(ph, ph.param_table.resolve({"wind_speed": 2.0}))
    x = ph.target_state(p[None])[0] + 0.01
    a = np.array([0.1, -0.2])
    model = plant_model(ph, x, a, p, list(range(6)), [])
    ja, jb = jacobians(ph, x, ph.actuate(a[None], p[None])[0], p)
    assert np.allclose(model.a, ja)
    assert np.allclose(model.b, jb @ np.diag([p[ph.param_table.index("max_force")],
                                               p[ph.param_table.index("max_hoist_speed")]]))


def test_equilibrium_off_target_for_a_biased_policy():
    # a = bias - M obs: at rest the force must vanish (theta = 0, no velocity), so M_x x* = bias
    ph = make_physics("pretrial/CartPole-v0")
    gains = cartpole_gains(ph)
    bias = np.array([0.05])
    pol = linear_policy(ph.env_id, gains, bias)
    p, _ = linear_params(ph, ph.param_table.resolve({}))
    x, a, _held, notes = closed_loop_equilibrium(ph, pol, p)
    assert x[0] == pytest.approx(-bias[0] / gains[0, 0], rel=1e-6)
    assert np.allclose(x[1:], 0.0, atol=1e-9) and abs(a[0]) < 1e-9
    assert any("off the target" in n for n in notes)
    rep = loop_report(ph, pol)
    assert rep.linearizable and rep.stable
    assert rep.equilibrium_state[0] == pytest.approx(x[0], rel=1e-9)


def test_saturated_policy_is_not_linearizable():
    ph = make_physics("pretrial/CartPole-v0")
    pol = linear_policy(ph.env_id, cartpole_gains(ph), np.array([3.0]))  # always pushes at full force
    rep = loop_report(ph, pol)
    assert not rep.linearizable
    assert "saturated" in rep.reason or "no closed-loop equilibrium" in rep.reason


def test_saturated_output_at_the_equilibrium_names_the_channel():
    # the hoist commanded at full speed out: the rope pays out to max_rope_length, where the drive's
    # slow-down zone stops it (at rest with the command still at +1), while the trolley loop holds x
    ph = make_physics("pretrial/GantryCrane-v0", hoist=True)
    lqr = design_lqr(ph)
    gains = -lqr._m.copy()
    gains[1] = 0.0
    bias = np.array([(lqr.equilibrium_action + lqr._m @ lqr._obs_star)[0], 2.0])
    pol = linear_policy(ph.env_id, gains, bias, options={"hoist": True})
    rep = loop_report(ph, pol)
    assert not rep.linearizable
    assert "saturated" in rep.reason and "hoist_speed" in rep.reason and "trolley_force" not in rep.reason
    assert rep.equilibrium_state[4] == pytest.approx(ph.param_table.resolve({})[ph.param_table.index(
        "max_rope_length")], rel=1e-6)


def test_drifting_loop_is_reported_as_such():
    # a speed loop a = 0.02 - x_dot: 10 (0.02 - v) N against 1 N s/m of friction settles at v = 0.2 / 11 m/s,
    # so there is no rest point and the trolley creeps (0.36 m in 20 s, short of the end stop)
    ph = make_physics("pretrial/GantryCrane-v0")
    pol = linear_policy(ph.env_id, np.array([[0.0, -1.0, 0.0, 0.0]]), np.array([0.02]))
    rep = loop_report(ph, pol)
    assert not rep.linearizable and "drifts" in rep.reason and "x" in rep.reason


def test_no_equilibrium_reports_what_the_loop_does():
    # a constant trolley force without position feedback: the trolley runs into the end stop
    ph = make_physics("pretrial/GantryCrane-v0")
    pol = linear_policy(ph.env_id, np.zeros((1, 4)) + np.array([[0.0, -0.1, 0.0, 0.0]]), np.array([0.3]))
    rep = loop_report(ph, pol)
    assert not rep.linearizable
    assert "no closed-loop equilibrium" in rep.reason and "rail_end" in rep.reason


def test_recurrent_policy_reasons():
    ph = make_physics("pretrial/CartPole-v0")
    pol = linear_policy(ph.env_id, cartpole_gains(ph), np.array([0.0]), feed_forward=False)
    cont = loop_report(ph, pol)
    samp = loop_report(ph, pol, sampled=True)
    assert not cont.linearizable and "recurrent" in cont.reason and "continuous" in cont.reason
    assert not samp.linearizable and "recurrent" in samp.reason


def test_zoh_matches_scipy_cont2discrete():
    rng = np.random.default_rng(3)
    a, b = rng.normal(size=(4, 4)), rng.normal(size=(4, 2))
    ad, bd = zoh(a, b, 0.02)
    ref = signal.cont2discrete((a, b, np.eye(4), np.zeros((4, 2))), 0.02, method="zoh")
    assert np.allclose(ad, ref[0], rtol=1e-12) and np.allclose(bd, ref[1], rtol=1e-12)


def test_sampled_loop_delay_augmentation():
    # one period of delay: x' = Ad x + Bd u_old, u_old' = K x; loop closed with the oldest command
    a, b = np.array([[0.0, 1.0], [2.0, 0.0]]), np.array([[0.0], [1.0]])
    k = np.array([[-6.0, -3.0]])
    big_a, big_b, big_c = sampled_loop(a, b, k, 0.02, 1)
    ad, bd = zoh(a, b, 0.02)
    closed = big_a - big_b @ big_c
    assert np.allclose(closed[:2, :2], ad) and np.allclose(closed[:2, 2:], bd) and np.allclose(closed[2:, :2], k)


def test_sampled_margins_approach_continuous_ones_at_fast_sampling():
    # a zero-order hold adds about w_c T / 2 of phase lag: at T = 1 ms the phase margin is nearly continuous
    ph = make_physics("pretrial/CartPole-v0", dt=0.001, substeps=1)
    pol = design_lqr(ph)
    cont = loop_report(ph, pol).channels[0]
    samp = loop_report(ph, pol, sampled=True).channels[0]
    lag = np.degrees(cont.crossover_rad_s * ph.dt / 2)
    assert samp.phase_margin_deg == pytest.approx(cont.phase_margin_deg - lag, abs=0.2)
    assert samp.gain_margin_low == pytest.approx(cont.gain_margin_low, rel=0.05)


def test_lqr_loop_report_matches_its_design_loop_and_is_json():
    ph = make_physics("pretrial/CartPole-v0")
    pol = design_lqr(ph)
    rep = loop_report(ph, pol)
    ref = analyze_loop(pol.a, pol.b, pol.k, names=ph.action_names).channels[0]
    ch = rep.channels[0]
    assert ch.phase_margin_deg == pytest.approx(ref.phase_margin_deg, rel=1e-5)
    assert ch.gain_margin_low == pytest.approx(ref.gain_margin_low, rel=1e-5)
    assert any("Coulomb" in n and "cart_friction" in n for n in rep.notes)
    d = json.loads(json.dumps(rep.to_dict(), allow_nan=False))
    assert CHANNEL_KEYS <= set(d["channels"][0])
    assert d["channels"][0]["gain_margin_high"] is None
    w = np.logspace(-1, 2, 5)
    assert np.allclose(rep.frequency_response("force", w), ch.frequency_response(w))
    with pytest.raises(InputError, match="unknown channel"):
        rep.frequency_response("torque", w)


def test_drone_gust_states_are_held_and_said_so():
    ph = make_physics("pretrial/DronePair-v0")
    rep = loop_report(ph, design_lqr(ph), sampled=True, delay_steps=1)
    assert rep.linearizable
    assert any("gust_x, gust_z" in n for n in rep.notes)
    assert len(rep.channels) == 4 and rep.multi_loop_disk_margin is not None
    assert rep.model[0].shape == (16 + 4, 16 + 4)  # 16 free states + one period of 4 commands


def test_bad_arguments():
    ph = make_physics("pretrial/CartPole-v0")
    pol = design_lqr(ph)
    with pytest.raises(InputError, match="delay_steps"):
        loop_report(ph, pol, delay_steps=2)
    with pytest.raises(InputError, match="cart_mas"):
        loop_report(ph, pol, {"cart_mas": 1.0})
