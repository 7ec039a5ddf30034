"""Physics checks of the gantry crane (pretrial/GantryCrane-v0) against outside results.

Each check names its source beside it. Where a value or citation is from
memory it says so.
"""

from __future__ import annotations

import math

import gymnasium as gym
import matplotlib
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import pretrial_envs  # noqa: F401  (registers the ids)
from pretrial_envs.core import rk4_step
from pretrial_envs.gantry import COULOMB_SMOOTHING_SPEED, GantryPhysics

matplotlib.use("Agg")

LOSSLESS = {"trolley_friction": 0.0, "trolley_coulomb": 0.0, "rope_damping": 0.0, "load_drag": 0.0, "wind_speed": 0.0}
# "Trolley held fixed": 1e4 kg against a 1 kg load (the valid range reaches 1e4 x the nominal load).
FIXED = {**LOSSLESS, "trolley_mass": 1.0e4, "load_mass": 1.0}
FAST = settings(max_examples=12, deadline=None)


def _params(physics: GantryPhysics, n: int = 1, **overrides) -> np.ndarray:
    return physics.param_table.resolve_batch(overrides, n)


def _col(physics: GantryPhysics, params: np.ndarray, name: str) -> np.ndarray:
    return physics.param(params, name)


def _run(physics: GantryPhysics, state: np.ndarray, force: np.ndarray, params: np.ndarray, steps: int) -> np.ndarray:
    """States at every control instant, shape (steps + 1, N, S), inputs held."""
    out = [state]
    for _ in range(steps):
        state = physics.integrate(state, force, params)
        out.append(state)
    return np.array(out)


def _rope(physics: GantryPhysics, states: np.ndarray, params: np.ndarray):
    """Rope length and rate for states (..., N, S)."""
    if physics.hoist:
        return states[..., 4], states[..., 5]
    return np.broadcast_to(_col(physics, params, "rope_length"), states.shape[:-1]), 0.0


def _load_velocity(physics, states, params):
    # d/dt of (x + l sin phi, -l cos phi)
    rope, ld = _rope(physics, states, params)
    xd, phi, w = states[..., 1], states[..., 2], states[..., 3]
    s, c = np.sin(phi), np.cos(phi)
    return xd + ld * s + rope * c * w, -ld * c + rope * s * w


def _energy(physics, states, params):
    """Kinetic + gravitational potential energy of trolley and point-mass load (any mechanics text)."""
    big_m, m, g = (_col(physics, params, k) for k in ("trolley_mass", "load_mass", "gravity"))
    rope, _ = _rope(physics, states, params)
    vx, vy = _load_velocity(physics, states, params)
    return 0.5 * big_m * states[..., 1] ** 2 + 0.5 * m * (vx**2 + vy**2) - m * g * rope * np.cos(states[..., 2])


def _upward_zero_crossings(t: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Times where y crosses 0 going up, linearly interpolated between samples."""
    i = np.nonzero((y[:-1] < 0) & (y[1:] >= 0))[0]
    return t[i] - y[i] * (t[i + 1] - t[i]) / (y[i + 1] - y[i])


def _measured_periods(physics, phi0, params, duration):
    n = params.shape[0]
    state = np.zeros((n, physics.state_dim))
    state[:, 2] = phi0
    if physics.hoist:
        state[:, 4] = _col(physics, params, "rope_length")
    steps = math.ceil(duration / physics.dt)
    traj = _run(physics, state, np.zeros((n, physics.action_dim)), params, steps)
    t = np.arange(steps + 1) * physics.dt
    periods = []
    for i in range(n):
        z = _upward_zero_crossings(t, traj[:, i, 2])
        assert len(z) >= 3
        periods.append((z[-1] - z[0]) / (len(z) - 1))
    return np.array(periods), traj


# --------------------------------------------------------------------------- #
# 1. trolley held fixed: simple pendulum
# --------------------------------------------------------------------------- #
@FAST
@given(st.lists(st.tuples(st.floats(0.2, 5.0), st.floats(1.6, 25.0)), min_size=1, max_size=5))
def test_fixed_trolley_small_swing_has_simple_pendulum_period(cases):
    # Small-angle period of a simple pendulum, T = 2 pi sqrt(L / g) (any mechanics
    # textbook, e.g. Halliday, Resnick & Walker, Fundamentals of Physics, ch. 15).
    physics = GantryPhysics(dt=0.01, substeps=1)
    lengths, gs = np.array(cases).T
    params = _params(physics, len(cases), rope_length=lengths, gravity=gs, **FIXED)
    expected = 2 * np.pi * np.sqrt(lengths / gs)
    measured, _ = _measured_periods(physics, 0.01, params, 3.3 * expected.max())
    np.testing.assert_allclose(measured, expected, rtol=0.005)


# --------------------------------------------------------------------------- #
# 2. free frictionless trolley: coupled frequency, momentum conservation
# --------------------------------------------------------------------------- #
@FAST
@given(
    st.lists(st.tuples(st.floats(0.5, 20.0), st.floats(0.1, 5.0), st.floats(0.3, 3.0)), min_size=1, max_size=5),
    st.booleans(),
)
def test_free_trolley_small_swing_frequency(cases, hoist):
    # Pendulum whose support (mass M) slides freely on a horizontal line:
    # omega^2 = g (M + m) / (M L). Linearize the two Lagrange equations and use
    # conservation of horizontal momentum to eliminate x'' (Landau & Lifshitz,
    # Mechanics, the pendulum with a movable point of support among the problems
    # on small oscillations, section 23 -- section number from memory).
    physics = GantryPhysics(dt=0.01, substeps=1, hoist=hoist)
    big_m, m, lengths = np.array(cases).T
    params = _params(physics, len(cases), trolley_mass=big_m, load_mass=m, rope_length=lengths, **LOSSLESS)
    if hoist:
        params[:, physics.param_table.index("max_hoist_force")] = 1e5  # keep the drive holding
        params[:, physics.param_table.index("max_rope_length")] = 20.0  # and away from its slow-down zones
        params[:, physics.param_table.index("min_rope_length")] = 0.05
    g = _col(physics, params, "gravity")
    expected = 2 * np.pi / np.sqrt(g * (big_m + m) / (big_m * lengths))
    measured, traj = _measured_periods(physics, 0.01, params, 3.3 * expected.max())
    np.testing.assert_allclose(measured, expected, rtol=0.005)
    # No horizontal external force: M x' + m v_load_x stays at its initial 0
    # (Newton's laws; momentum conservation).
    vx, _ = _load_velocity(physics, traj, params)
    momentum = big_m * traj[..., 1] + m * vx
    scale = m * lengths * np.sqrt(g / lengths) * 0.01  # load momentum at the swing's peak speed
    # 1e-8: round-off over ~300 RK4 steps (hypothesis found 1.2e-9 relative for a trolley 8x
    # lighter than its load); a wrong coupling term would leave an error of order 1.
    assert np.all(np.abs(momentum) <= 1e-8 * scale)


# --------------------------------------------------------------------------- #
# 3. energy: conserved without losses, never increased by the losses
# --------------------------------------------------------------------------- #
@settings(max_examples=15, deadline=None)
@given(
    st.lists(st.tuples(st.floats(-1.2, 1.2), st.floats(-2.0, 2.0), st.floats(-1.0, 1.0)), min_size=1, max_size=6),
    st.booleans(),
)
def test_lossless_rk4_conserves_energy(starts, hoist):
    # Conservative forces only: total mechanical energy is constant (work-energy
    # theorem, any mechanics textbook). With the hoist on and commanded to stand
    # still the rope length stays constant, so the drive does no work.
    physics = GantryPhysics(hoist=hoist)  # default control period, substeps and RK4
    n = len(starts)
    params = _params(physics, n, **LOSSLESS)
    state = np.zeros((n, physics.state_dim))
    state[:, 2], state[:, 3], state[:, 1] = np.array(starts).T
    if hoist:
        state[:, 4] = 1.0
    traj = _run(physics, state, np.zeros((n, physics.action_dim)), params, round(10.0 / physics.dt))
    energy = _energy(physics, traj, params)
    scale = _col(physics, params, "load_mass") * _col(physics, params, "gravity") * 1.0  # m g L
    # RK4 with h = 0.01 s on a ~3 rad/s pendulum: stated tolerance 1e-6 m g L over 10 s
    assert np.max(np.abs(energy - energy[0])) <= 1e-6 * scale.max()


@settings(max_examples=30, deadline=None)
@given(
    st.integers(0, 2**32 - 1),
    st.booleans(),
)
def test_loss_power_is_dissipative_and_matches_force_times_velocity(seed, hoist):
    # The rate of change of mechanical energy equals the power of the
    # non-conservative forces, sum(force . velocity) (work-energy theorem). With
    # no wind every loss term is a force opposing its own velocity, so the power
    # is never positive, including the tanh-smoothed Coulomb friction.
    rng = np.random.default_rng(seed)
    n = 64
    physics = GantryPhysics(hoist=hoist)
    table = physics.param_table
    params = _params(physics, n, wind_speed=0.0, max_hoist_force=1e5)
    for name in ("trolley_friction", "trolley_coulomb", "rope_damping", "load_drag"):
        params[:, table.index(name)] = rng.uniform(0.0, table[name].high, n) * (rng.random(n) < 0.7)
    state = np.zeros((n, physics.state_dim))
    state[:, 1] = rng.normal(0, 1, n) * rng.choice([1.0, 0.02], n)  # include speeds inside the tanh zone
    state[:, 2] = rng.uniform(-1.3, 1.3, n)
    state[:, 3] = rng.normal(0, 2, n)
    if hoist:
        state[:, 4] = rng.uniform(0.3, 1.5, n)
    force = np.zeros((n, physics.action_dim))
    d = physics.derivatives(state, force, params)
    big_m, m, g = (_col(physics, params, k) for k in ("trolley_mass", "load_mass", "gravity"))
    rope, ld = _rope(physics, state, params)
    ldd = d[:, 5] if hoist else 0.0
    xd, phi, w = state[:, 1], state[:, 2], state[:, 3]
    xdd, wd = d[:, 1], d[:, 3]
    s, c = np.sin(phi), np.cos(phi)
    vx, vy = _load_velocity(physics, state, params)
    ax = xdd + ldd * s + 2 * ld * c * w + rope * c * wd - rope * s * w**2
    ay = -ldd * c + 2 * ld * s * w + rope * s * wd + rope * c * w**2
    de_dt = big_m * xd * xdd + m * (vx * ax + vy * ay) + m * g * vy
    # power of each loss: force . velocity
    mu, b, cr, k = (
        _col(physics, params, n_) for n_ in ("trolley_coulomb", "trolley_friction", "rope_damping", "load_drag")
    )
    speed = np.hypot(vx, vy)
    loss_power = (
        -b * xd**2 - mu * (big_m + m) * g * np.tanh(xd / COULOMB_SMOOTHING_SPEED) * xd - cr * w**2 - k * speed**3
    )
    # with the hoist the drive's tension also does work, -T l'
    hoist_power = -physics.rope_tension(state, force, params) * ld if hoist else 0.0
    scale = 1.0 + np.abs(loss_power) + m * g * speed
    np.testing.assert_allclose(de_dt, loss_power + hoist_power, rtol=0, atol=1e-9 * scale.max())
    assert np.all(loss_power <= 0.0)


@settings(max_examples=12, deadline=None)
@given(st.integers(0, 2**32 - 1), st.booleans())
def test_energy_never_increases_with_losses_and_zero_force(seed, hoist):
    # Friction, damping and drag only remove energy (second law of thermodynamics
    # for passive losses; see the power check above). Along an RK4 trajectory the
    # energy may move up only by the integration error of the lossless case.
    rng = np.random.default_rng(seed)
    n = 32
    physics = GantryPhysics(hoist=hoist)
    table = physics.param_table
    params = _params(physics, n, wind_speed=0.0)
    for name in ("trolley_friction", "trolley_coulomb", "rope_damping", "load_drag"):
        params[:, table.index(name)] *= rng.uniform(0.0, 10.0, n)
    state = np.zeros((n, physics.state_dim))
    state[:, 1] = rng.normal(0, 0.5, n)
    state[:, 2] = rng.uniform(-1.0, 1.0, n)
    state[:, 3] = rng.normal(0, 1.0, n)
    if hoist:
        state[:, 4] = 1.0
    traj = _run(physics, state, np.zeros((n, physics.action_dim)), params, round(5.0 / physics.dt))
    energy = _energy(physics, traj, params)
    scale = _col(physics, params, "load_mass") * _col(physics, params, "gravity")
    assert np.all(np.diff(energy, axis=0) <= 1e-9 * scale)
    assert np.all(energy[-1] < energy[0])  # and they do remove some


# --------------------------------------------------------------------------- #
# Equations of motion against the Lagrangian mass-matrix form
# --------------------------------------------------------------------------- #
@pytest.mark.parametrize("hoist", [False, True])
def test_equations_match_lagrange_mass_matrix_form(hoist):
    # Lagrange's equations for the planar crane with coordinates (x, phi, l),
    # kinetic energy 1/2 M x'^2 + 1/2 m |v_load|^2 and potential -m g l cos(phi):
    #   [M+m      m l c   m s] [x'' ]   [2 m c l' phi' - m l s phi'^2]   [Q_x  ]
    #   [m l c    m l^2   0  ] [phi''] + [2 m l l' phi' + m g l s     ] = [Q_phi]
    #   [m s      0       m  ] [l'' ]   [-m l phi'^2 - m g c          ]   [Q_l  ]
    # (the planar form of the overhead crane with hoisting, e.g. H.-H. Lee, ASME
    # J. Dyn. Syst. Meas. Control 120, 1998 -- from memory). Generalized forces of
    # friction, pivot damping, drag and tension by virtual work (Goldstein,
    # Classical Mechanics, ch. 1): Q = sum(F . d r / d q).
    rng = np.random.default_rng(7)
    n = 200
    physics = GantryPhysics(hoist=hoist)
    table = physics.param_table
    params = _params(physics, n, max_hoist_force=1e5)
    for name in ("trolley_friction", "trolley_coulomb", "rope_damping", "load_drag"):
        params[:, table.index(name)] = rng.uniform(0.0, 0.2 * table[name].high, n)
    params[:, table.index("wind_speed")] = rng.uniform(-10, 10, n)
    params[:, table.index("trolley_mass")] = rng.uniform(0.5, 20, n)
    params[:, table.index("load_mass")] = rng.uniform(0.1, 5, n)
    state = np.zeros((n, physics.state_dim))
    state[:, :4] = rng.normal(0, [1.0, 1.0, 0.6, 1.5], (n, 4))
    force = np.zeros((n, physics.action_dim))
    force[:, 0] = rng.uniform(-20, 20, n)
    if hoist:
        state[:, 4] = rng.uniform(0.7, 1.0, n)  # away from the slow-down zones
        state[:, 5] = rng.uniform(-0.4, 0.4, n)
        force[:, 1] = state[:, 5] + rng.uniform(-0.1, 0.1, n)
    d = physics.derivatives(state, force, params)
    tension = physics.rope_tension(state, force, params)
    big_m, m, g = (_col(physics, params, k) for k in ("trolley_mass", "load_mass", "gravity"))
    mu, b, cr, k = (
        _col(physics, params, q) for q in ("trolley_coulomb", "trolley_friction", "rope_damping", "load_drag")
    )
    wind = _col(physics, params, "wind_speed")
    rope, ld = _rope(physics, state, params)
    ld = np.broadcast_to(ld, (n,))
    xd, phi, w = state[:, 1], state[:, 2], state[:, 3]
    s, c = np.sin(phi), np.cos(phi)
    vx, vy = _load_velocity(physics, state, params)
    rvx = vx - wind
    fdx, fdy = -k * np.hypot(rvx, vy) * rvx, -k * np.hypot(rvx, vy) * vy
    q_x = force[:, 0] - b * xd - mu * (big_m + m) * g * np.tanh(xd / COULOMB_SMOOTHING_SPEED) + fdx
    q_phi = -cr * w + rope * (fdx * c + fdy * s)
    q_l = -tension + fdx * s - fdy * c
    mass = np.zeros((n, 3, 3))
    mass[:, 0, 0], mass[:, 0, 1], mass[:, 0, 2] = big_m + m, m * rope * c, m * s
    mass[:, 1, 0], mass[:, 1, 1] = m * rope * c, m * rope**2
    mass[:, 2, 0], mass[:, 2, 2] = m * s, m
    h_x = 2 * m * c * ld * w - m * rope * s * w**2
    h_phi = 2 * m * rope * ld * w + m * g * rope * s
    h_l = -m * rope * w**2 - m * g * c
    h = np.stack([h_x, h_phi, h_l], axis=1)
    rhs = np.stack([q_x, q_phi, q_l], axis=1) - h
    if hoist:
        # where the drive holds the tension it needs (0 < T < max_hoist_force, most states here)
        held = (tension > 0) & (tension < _col(physics, params, "max_hoist_force"))
        assert held.mean() > 0.8
        qdd = np.stack([d[:, 1], d[:, 3], d[:, 5]], axis=1)
        residual = np.einsum("nij,nj->ni", mass, qdd) - rhs
        np.testing.assert_allclose(residual[held], 0.0, atol=1e-9 * np.abs(rhs).max())
        # inside its limits the drive sets the rope acceleration: (v_ref - l') / tau
        tau = _col(physics, params, "hoist_time_constant")
        np.testing.assert_allclose(d[held, 5], (force[held, 1] - ld[held]) / tau[held], rtol=1e-12)
        np.testing.assert_array_equal(d[:, 4], ld)
    else:
        # fixed rope: the first two rows give x'', phi''; the third gives the tension
        qdd = np.linalg.solve(mass[:, :2, :2], rhs[:, :2, None])[..., 0]
        np.testing.assert_allclose(d[:, 1], qdd[:, 0], rtol=1e-9, atol=1e-12)
        np.testing.assert_allclose(d[:, 3], qdd[:, 1], rtol=1e-9, atol=1e-12)
        expected_t = fdx * s - fdy * c - (m * s * qdd[:, 0] + h[:, 2])
        np.testing.assert_allclose(tension, expected_t, rtol=1e-9, atol=1e-9)
    np.testing.assert_array_equal(d[:, 0], xd)
    np.testing.assert_array_equal(d[:, 2], w)


# --------------------------------------------------------------------------- #
# 4. rope tension and slack rope
# --------------------------------------------------------------------------- #
@FAST
@given(st.floats(-1.45, 1.45), st.floats(-3.0, 3.0), st.floats(0.1, 10.0), st.booleans())
def test_tension_matches_textbook_pendulum_with_fixed_trolley(phi, phi_dot, mass, hoist):
    # Tension in a simple pendulum's string: T = m (g cos(phi) + L phi'^2); at
    # rest (phi' = 0) T = m g cos(phi) (any mechanics textbook, circular motion
    # with gravity's radial component). The hoist standing still holds the same.
    physics = GantryPhysics(hoist=hoist)
    params = _params(physics, 1, **{**FIXED, "load_mass": mass, "max_hoist_force": 1e5})
    g, length = 9.81, 1.0
    state = np.zeros((1, physics.state_dim))
    state[0, 2], state[0, 3] = phi, phi_dot
    if hoist:
        state[0, 4] = length
    force = np.zeros((1, physics.action_dim))
    swinging = physics.rope_tension(state, force, params)[0]
    assert swinging == pytest.approx(mass * (g * math.cos(phi) + length * phi_dot**2), rel=1e-3, abs=1e-3 * mass * g)
    state[0, 3] = 0.0
    at_rest = physics.rope_tension(state, force, params)[0]
    assert at_rest == pytest.approx(mass * g * math.cos(phi), rel=1e-3, abs=1e-3 * mass * g)


@pytest.mark.parametrize("hoist", [False, True])
def test_slack_rope_when_load_above_pivot_level(hoist):
    # A load at rest beyond 90 degrees has m g cos(phi) < 0: a rope cannot push
    # (same textbook tension as above), so the episode ends as slack_rope.
    env = gym.make("pretrial/GantryCrane-v0", hoist=hoist, params={**FIXED, "max_sway": math.pi}).unwrapped
    for phi, slack in ((2.0, True), (1.2, False)):
        state = np.zeros(env.physics.state_dim)
        state[2] = phi
        if hoist:
            state[4] = 1.0
        env.reset(options={"state": state})
        _, _, terminated, _, info = env.step(np.zeros(env.action_space.shape))
        assert terminated == slack
        if slack:
            assert info["failure"] == "slack_rope"


def test_slack_rope_when_trolley_runs_under_a_swung_load():
    # A light trolley pushed hard towards the side the load has swung to runs
    # ahead of the load: with the classical cart-pendulum equations the tension
    # is T = (M m (g cos(phi) + L phi'^2) - m sin(phi) F) / (M + m sin^2(phi)),
    # negative once m sin(phi) F exceeds the numerator's first term (derived from
    # the textbook cart-pendulum equations, e.g. Ogata, Modern Control Engineering,
    # pendulum on a cart -- from memory). Pushing the other way only raises it.
    params = {**LOSSLESS, "trolley_mass": 0.5, "max_force": 20.0, "max_sway": 1.0, "start_x": 0.0}
    env = gym.make("pretrial/GantryCrane-v0", params=params).unwrapped
    phi = 0.5
    big_m, m, g, f = 0.5, 1.0, 9.81, 20.0
    expected = (big_m * m * g * math.cos(phi) - m * math.sin(phi) * f) / (big_m + m * math.sin(phi) ** 2)
    state = np.array([0.0, 0.0, phi, 0.0])
    tension = env.physics.rope_tension(state[None], np.array([[f]]), env._params)[0]
    assert tension == pytest.approx(expected, rel=1e-12)
    assert expected < 0
    for action, slack in ((1.0, True), (-1.0, False)):
        env.reset(options={"state": state})
        _, _, terminated, _, info = env.step(np.array([action]))
        assert terminated == slack
        if slack:
            assert info["failure"] == "slack_rope"


# --------------------------------------------------------------------------- #
# 5. task rules: success after the hold time, rail ends, sway
# --------------------------------------------------------------------------- #
@pytest.mark.parametrize("hoist", [False, True])
def test_load_at_rest_on_target_succeeds_after_hold_time(hoist):
    # The documented task rule: goal region held continuously for hold_time.
    env = gym.make("pretrial/GantryCrane-v0", hoist=hoist).unwrapped
    p = env.params
    state = np.zeros(env.physics.state_dim)
    state[0] = p["target_x"]
    if hoist:
        state[4] = p["rope_length"]
    env.reset(options={"state": state})
    needed = round(env.physics.hold_time / env.dt)
    for k in range(1, needed + 1):
        _, reward, terminated, truncated, info = env.step(np.zeros(env.action_space.shape))
        assert not truncated
        assert terminated == (k == needed), k
        assert reward <= 0.0
    assert info["success"] is True and "failure" not in info


def test_start_state_is_not_in_goal_and_goal_needs_still_load():
    physics = GantryPhysics()
    params = _params(physics, 5)
    target = _col(physics, params, "target_x")[0]
    states = np.array(
        [
            physics.start_center(params[:1])[0],  # the start: 4 m away
            [target, 0.0, 0.0, 0.0],  # on target, still
            [target - 0.3, 0.0, 0.0, 0.0],  # trolley and load short of it
            [target, 0.0, 0.0, 0.5],  # on target but swinging fast
            [target - math.sin(0.04), 0.0, 0.04, 0.0],  # trolley off, load (x + L sin phi) on target
        ]
    )
    np.testing.assert_array_equal(physics.in_goal(states, params), [False, True, False, False, True])


@FAST
@given(st.floats(0.5, 50.0), st.floats(0.05, 3.0), st.sampled_from([-1.0, 1.0]))
def test_rail_end_and_sway_failures(half, max_sway, side):
    # The documented failure rule: end stops at +-rail_half_length, sway limit max_sway.
    physics = GantryPhysics()
    params = _params(physics, 4, rail_half_length=half, max_sway=max_sway, **FIXED)
    eps = 1e-3
    states = np.zeros((4, 4))
    states[:, 0] = side * np.array([half + eps, half - eps, 0.0, 0.0])
    states[:, 2] = side * np.array([0.0, 0.0, max_sway + eps, max_sway - eps])
    code = physics.check(states, np.zeros((4, 1)), params)
    words = [physics.failure_words[i] for i in code]
    # a load above pivot level at rest would also slacken the rope: rail and sway take precedence
    assert words[0] == "rail_end" and words[1] == "" and words[2] == "sway"
    assert words[3] == ("" if max_sway - eps < math.pi / 2 else "slack_rope")


def test_failure_penalty_outweighs_running_cost():
    # Common practice for shaped rewards: ending in a failure must never score
    # better than surviving to the time limit, whatever the running cost.
    env = gym.make("pretrial/GantryCrane-v0").unwrapped
    env.reset(seed=0)
    total = 0.0
    truncated = False
    while not truncated:
        _, r, terminated, truncated, info = env.step(np.array([0.0]))
        assert not terminated
        total += r
    assert info["failure"] == "timeout"
    # an immediate crash into the left end stop
    env.reset(options={"state": np.array([-2.49, -3.0, 0.0, 0.0])})
    _, crash, terminated, _, info = env.step(np.array([-1.0]))
    assert terminated and info["failure"] == "rail_end"
    assert crash < total


# --------------------------------------------------------------------------- #
# 6. hoist
# --------------------------------------------------------------------------- #
@FAST
@given(st.floats(-1.0, 1.0), st.floats(0.06, 0.3))
def test_hoist_follows_speed_command_as_first_order_lag(command, tau):
    # The drive's speed loop is first order: for a step in the reference v from
    # rest, l(t) = l0 + v (t - tau (1 - exp(-t / tau))) (first-order step
    # response, e.g. Ogata, Modern Control Engineering, ch. 5). tau >= 0.06 s
    # keeps the initial rope acceleration v / tau below g, so the rope stays taut.
    physics = GantryPhysics(hoist=True, dt=0.01, substeps=2)
    # rope limits out of reach here (their slow-down zones are checked below)
    params = _params(physics, 1, hoist_time_constant=tau, min_rope_length=0.05, max_rope_length=20.0, **FIXED)
    v = command * _col(physics, params, "max_hoist_speed")[0]
    state = np.array([[0.0, 0.0, 0.0, 0.0, 0.9, 0.0]])
    steps = 60
    force = physics.actuate(np.array([[0.0, command]]), params)
    traj = _run(physics, state, force, params, steps)
    t = np.arange(steps + 1) * physics.dt
    expected = 0.9 + v * (t - tau * (1 - np.exp(-t / tau)))
    np.testing.assert_allclose(traj[:, 0, 4], expected, rtol=0, atol=1e-6)
    np.testing.assert_allclose(traj[:, 0, 5], v * (1 - np.exp(-t / tau)), rtol=0, atol=1e-5)
    np.testing.assert_allclose(traj[:, 0, 2], 0.0, atol=1e-12)  # hanging straight, it stays so


@pytest.mark.parametrize("command", [-1.0, 1.0])
def test_hoist_respects_speed_and_length_limits(command):
    physics = GantryPhysics(hoist=True)
    params = _params(physics, 1, **FIXED)
    p = dict(zip(physics.param_table.names, params[0], strict=True))
    traj = _run(
        physics,
        np.array([[0.0, 0.0, 0.0, 0.0, 0.9, 0.0]]),
        physics.actuate(np.array([[0.0, command]]), params),
        params,
        200,
    )
    assert np.all(np.abs(traj[:, 0, 5]) <= p["max_hoist_speed"] + 1e-12)
    assert np.all(traj[:, 0, 4] >= p["min_rope_length"] - 1e-9)
    assert np.all(traj[:, 0, 4] <= p["max_rope_length"] + 1e-9)
    end = p["max_rope_length"] if command > 0 else p["min_rope_length"]
    assert traj[-1, 0, 4] == pytest.approx(end, abs=1e-3)
    assert np.max(np.abs(traj[:, 0, 5])) == pytest.approx(p["max_hoist_speed"], rel=0.02)  # it gets to full speed


def test_hoist_at_its_force_limit_lets_a_heavy_load_descend():
    # A load heavier than the drive can hold: the tension stays at
    # max_hoist_force and Newton's second law gives l'' = g - F_max / m.
    physics = GantryPhysics(hoist=True)
    params = _params(physics, 1, **{**FIXED, "load_mass": 5.0, "max_hoist_force": 40.0})
    state = np.array([[0.0, 0.0, 0.0, 0.0, 0.8, 0.0]])
    steps = 15
    traj = _run(physics, state, np.zeros((1, 2)), params, steps)
    t = np.arange(steps + 1) * physics.dt
    accel = 9.81 - 40.0 / 5.0
    np.testing.assert_allclose(traj[:, 0, 4], 0.8 + 0.5 * accel * t**2, rtol=0, atol=1e-9)


@settings(max_examples=8, deadline=None)
@given(st.integers(0, 2**32 - 1))
def test_hoist_energy_bookkeeping(seed):
    # Work-energy theorem: E(t) - E(0) = integral of (F x' - T l') dt, the power
    # of the trolley force and of the hoist drive on the rope (any mechanics
    # textbook). Integrated with Simpson's rule on the RK4 nodes of each period.
    rng = np.random.default_rng(seed)
    n, sub, periods = 8, 4, 150
    ctrl = GantryPhysics(hoist=True)
    physics = GantryPhysics(hoist=True, dt=ctrl.dt / sub, substeps=1)
    # rope limits out of reach: their slow-down zones are kinks RK4 would step across
    params = _params(physics, n, min_rope_length=0.05, max_rope_length=20.0, **LOSSLESS)
    state = np.zeros((n, 6))
    state[:, 2] = rng.uniform(-0.3, 0.3, n)
    state[:, 4] = rng.uniform(0.8, 1.2, n)  # the command below moves it by at most 0.4 m
    e0 = _energy(physics, state, params)
    work = np.zeros(n)
    freq, phase = rng.uniform(0.2, 1.0, n), rng.uniform(0, 2 * np.pi, n)
    weights = np.array([1, 4, 2, 4, 1]) * physics.dt / 3
    for k in range(periods):
        t = k * ctrl.dt
        # smooth hoist command and a random trolley force, held over the period
        action = np.stack([rng.uniform(-1, 1, n), 0.5 * np.sin(2 * np.pi * freq * t + phase)], axis=1)
        force = physics.actuate(action, params)
        nodes = [state]
        for _ in range(sub):
            nodes.append(rk4_step(physics.derivatives, nodes[-1], force, params, physics.dt))
        power = []
        for s_ in nodes:
            tension = physics.rope_tension(s_, force, params)
            assert np.all((tension > 0) & (tension < _col(physics, params, "max_hoist_force")))  # drive holds
            power.append(force[:, 0] * s_[:, 1] - tension * s_[:, 5])
        work += weights @ np.array(power)
        state = nodes[-1]
    change = _energy(physics, state, params) - e0
    scale = _col(physics, params, "load_mass") * 9.81 * state[:, 4]
    assert np.max(np.abs(change)) > 0.05 * scale.min()  # the inputs did real work
    np.testing.assert_allclose(change, work, rtol=0, atol=1e-6 * scale.max())


# --------------------------------------------------------------------------- #
# Options, spaces, drawing
# --------------------------------------------------------------------------- #
def test_hoist_option_shapes_and_validation():
    off = gym.make("pretrial/GantryCrane-v0").unwrapped
    on = gym.make("pretrial/GantryCrane-v0", hoist=True).unwrapped
    assert off.observation_space.shape == (4,) and off.action_space.shape == (1,)
    assert on.observation_space.shape == (6,) and on.action_space.shape == (2,)
    assert on.physics.state_names == ("x", "x_dot", "phi", "phi_dot", "l", "l_dot")
    assert on.physics.options()["hoist"] is True and off.physics.options()["hoist"] is False
    assert GantryPhysics(**on.physics.options()).options() == on.physics.options()
    with pytest.raises(ValueError, match="hoist"):
        GantryPhysics(hoist="yes")
    # the contract: a trolley at least 1000 x the nominal load can be set
    table = GantryPhysics.param_table
    assert table["trolley_mass"].high >= 1000 * table["load_mass"].nominal


@pytest.mark.parametrize("hoist", [False, True])
def test_integral_option_shapes_and_validation(hoist):
    on = gym.make("pretrial/GantryCrane-v0", hoist=hoist, integral=True).unwrapped
    base = 6 if hoist else 4
    assert on.observation_space.shape == (base + 1,)
    assert on.physics.state_names[-1] == "load_x_integral" and on.physics.state_units[-1] == "m s"
    assert GantryPhysics(**on.physics.options()).options() == on.physics.options()
    # off: the options (and so the hashes of files that record them) are as before the option existed
    assert "integral" not in GantryPhysics(hoist=hoist).options()
    with pytest.raises(ValueError, match="integral"):
        GantryPhysics(integral="yes")


@given(miss=st.floats(-0.24, 0.24), seconds=st.floats(0.2, 3.0))
@FAST
def test_integral_state_is_the_time_integral_of_the_miss_inside_its_zone(miss, seconds):
    # A load held still at a constant miss d from target_x: the integral of a constant
    # is d * t (calculus); outside the 0.25 m zone (INTEGRAL_ZONE) it does not move.
    physics = GantryPhysics(integral=True, dt=0.02, substeps=1)
    p = _params(physics, 2, **FIXED)
    target = _col(physics, p, "target_x")
    state = np.zeros((2, 5))
    state[:, 0] = target + np.array([miss, 0.5])  # the second is outside the zone
    steps = round(seconds / physics.dt)
    end = _run(physics, state, np.zeros((2, 1)), p, steps)[-1]
    t = steps * physics.dt
    np.testing.assert_allclose(end[0, 4], miss * t, rtol=1e-9, atol=1e-12)
    assert end[1, 4] == 0.0


@pytest.mark.parametrize("hoist", [False, True])
def test_draw_shows_crane_parts(hoist):
    from matplotlib.figure import Figure
    from matplotlib.patches import Circle, Rectangle

    physics = GantryPhysics(hoist=hoist)
    params = physics.param_table.resolve({"wind_speed": 3.0})
    state = physics.start_center(params[None])[0]
    state[2] = 0.3
    ax = Figure().add_subplot()
    physics.draw(ax, state, params)
    assert ax.get_aspect() == 1.0
    circles = [p for p in ax.patches if isinstance(p, Circle)]
    assert len(circles) == 1 and len([p for p in ax.patches if isinstance(p, Rectangle)]) == 1
    # the load is drawn where the state puts it
    np.testing.assert_allclose(circles[0].center, (-2.0 + math.sin(0.3), -math.cos(0.3)), atol=1e-12)
    assert any("wind" in t.get_text() for t in ax.texts)


# --------------------------------------------------------------------------- #
# The in-place derivatives against the plain closed-form expressions
# --------------------------------------------------------------------------- #
def _closed_form(physics: GantryPhysics, state: np.ndarray, force: np.ndarray, params: np.ndarray):
    """The module docstring's free-body result written as plain numpy expressions (no buffers reused).

    Fixed rope: ``(M + m sin^2 phi) x'' = F - q cos(phi) + sin(phi) K``, ``T = K - m sin(phi) x''``
    with ``K = m (g cos(phi) + l phi'^2) + f_r`` (the classical cart-pendulum result, e.g.
    Ogata, Modern Control Engineering, inverted-pendulum example -- from memory); with the hoist
    ``K = m (g cos(phi) + l phi'^2 - l'') + f_r`` and the drive's tension limits.
    """
    p = {name: params[:, i] for i, name in enumerate(physics.param_table.names)}
    g, big_m, m = p["gravity"], p["trolley_mass"], p["load_mass"]
    xd, phi, w = state[:, 1], state[:, 2], state[:, 3]
    s, c = np.sin(phi), np.cos(phi)
    ln, ld = (state[:, 4], state[:, 5]) if physics.hoist else (p["rope_length"], None)
    mu = p["trolley_coulomb"]
    f_net = force[:, 0] - p["trolley_friction"] * xd
    if mu.any():
        f_net = f_net - mu * (big_m + m) * g * np.tanh(xd / COULOMB_SMOOTHING_SPEED)
    q = -p["rope_damping"] * w / ln
    k = p["load_drag"]
    f_r, f_t = 0.0, q
    if k.any():
        vx = xd + ln * w * c - p["wind_speed"]
        vy = ln * w * s
        if ld is not None:
            vx, vy = vx + ld * s, vy - ld * c
        kv = k * np.sqrt(vx * vx + vy * vy)
        fx, fy = -kv * vx, -kv * vy
        f_r, f_t = fx * s - fy * c, q + fx * c + fy * s
    denom = big_m + m * s * s
    base = g * c + ln * w * w
    if ld is None:
        big_k = m * base + f_r
        xdd = (f_net - q * c + s * big_k) / denom
        return xdd, (f_t / m - g * s - xdd * c) / ln, None, big_k - m * s * xdd
    tau = p["hoist_time_constant"]
    stop = 4.0 * tau  # HOIST_STOP_TIME_CONSTANTS
    v_ref = np.clip(force[:, 1], (p["min_rope_length"] - ln) / stop, (p["max_rope_length"] - ln) / stop)
    ldd = (v_ref - ld) / tau
    big_k = m * (base - ldd) + f_r
    xdd = (f_net - q * c + s * big_k) / denom
    tension = big_k - m * s * xdd
    held = np.clip(tension, 0.0, p["max_hoist_force"])
    sat = held != tension
    xdd_s = (f_net + held * s - q * c) / big_m
    xdd = np.where(sat, xdd_s, xdd)
    ldd = np.where(sat, base - xdd_s * s + (f_r - held) / m, ldd)
    return xdd, (f_t / m - g * s - xdd * c - 2.0 * ld * w) / ln, ldd, tension


@pytest.mark.parametrize("hoist", [False, True])
@pytest.mark.parametrize("losses", ["none", "viscous", "all"])
@pytest.mark.parametrize("n", [1, 7, 300])
def test_derivatives_equal_closed_form_bit_for_bit(hoist, losses, n):
    # Same expressions in the same order, so equal floats, not merely close ones; on random
    # states, forces and parameters (read-only parameter arrays, as the rollout passes them,
    # exercise the per-batch constants; writable ones are formed afresh).
    rng = np.random.default_rng(11 + n)
    physics = GantryPhysics(hoist=hoist)
    table = physics.param_table
    for writeable in (True, False):
        params = _params(physics, n)
        for name in ("trolley_mass", "load_mass", "rope_length", "gravity"):
            params[:, table.index(name)] = rng.uniform(table[name].low, min(table[name].high, 50.0), n)
        if losses == "none":
            for name in LOSSLESS:
                params[:, table.index(name)] = 0.0
        elif losses == "viscous":
            params[:, table.index("trolley_coulomb")] = 0.0
            params[:, table.index("load_drag")] = 0.0
        else:
            params[:, table.index("wind_speed")] = rng.uniform(-10, 10, n)
            params[:, table.index("load_drag")] = rng.uniform(0, 1, n)
        params[:, table.index("max_hoist_force")] = rng.uniform(1.0, 60.0, n)  # some rows saturate
        params = np.ascontiguousarray(params) if writeable else np.asfortranarray(params)
        params.setflags(write=writeable)
        for _ in range(3):  # again with the same read-only array: the kept constants
            state = rng.normal(0, 1.5, (n, physics.state_dim))
            force = rng.uniform(-30, 30, (n, physics.action_dim))
            if hoist:
                state[:, 4] = rng.uniform(0.1, 2.0, n)
            xdd, phidd, ldd, tension = _closed_form(physics, state, force, params)
            d = physics.derivatives(state, force, params)
            np.testing.assert_array_equal(d[:, 1], xdd)
            np.testing.assert_array_equal(d[:, 3], phidd)
            np.testing.assert_array_equal(d[:, 0], state[:, 1])
            np.testing.assert_array_equal(d[:, 2], state[:, 3])
            if hoist:
                np.testing.assert_array_equal(d[:, 5], ldd)
                np.testing.assert_array_equal(d[:, 4], state[:, 5])
            np.testing.assert_array_equal(physics.rope_tension(state, force, params), tension)


def test_hold_time_option_sets_the_hold_success_needs():
    # Contract: a reach task succeeds after its goal is held hold_time seconds; the option
    # overrides the task's default, is recorded in options() only when changed, and is refused
    # on survival tasks and beyond the time limit.
    from pretrial_envs.cartpole import CartPolePhysics

    for hold in (0.5, 1.0):
        ph = GantryPhysics(hold_time=hold)
        p = ph.param_table.resolve({})[None, :]
        s = ph.target_state(p)
        hold_acc, steps = np.zeros(1), np.zeros(1, dtype=np.int64)
        periods = 0
        while periods < 200:
            tr = ph.transition(s, np.zeros((1, 1)), p, hold_acc, steps)
            s, hold_acc, steps, periods = tr.state, tr.hold, tr.steps, periods + 1
            if tr.success[0]:
                break
        # at rest on the target: success on the period the hold reaches hold_time
        assert periods == round(hold / ph.dt)
        assert ph.options()["hold_time"] == hold
        assert f"{hold:g} s" in ph.success_rule
    assert "hold_time" not in GantryPhysics().options()
    with pytest.raises(ValueError, match="hold_time"):
        GantryPhysics(hold_time=20.0)  # longer than the 15 s episode
    with pytest.raises(ValueError, match="hold_time"):
        CartPolePhysics(hold_time=1.0)
