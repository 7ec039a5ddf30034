"""Physics checks of ``pretrial/DronePair-v0`` against results from outside the project.

Sources are named beside each check. Front-door agreement, check_env and NaN handling are
in test_front_doors.py and not repeated here.
"""

from __future__ import annotations

import math

import gymnasium as gym
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import pretrial_envs  # noqa: F401  (registers the env ids)
from pretrial_envs.drone_pair import PARAMS, DronePairPhysics

FAST = settings(max_examples=15, deadline=None)
COLLISION, CRASHED, OUT, FLIPPED = 1, 2, 3, 4


def setup(overrides: dict | None = None, **kwargs) -> tuple[DronePairPhysics, np.ndarray]:
    """One physics configuration and its (1, P) parameter row."""
    return DronePairPhysics(**kwargs), PARAMS.resolve(overrides)[None, :]


def run(physics, state, action, params, steps, noise=None):
    """States after each of ``steps`` control periods (steps, N, S), action held."""
    n = state.shape[0]
    hold, count = np.zeros(n), np.zeros(n, dtype=np.int64)
    out = []
    for k in range(steps):
        tr = physics.transition(state, action, params, hold, count, None if noise is None else noise[k])
        state, hold, count = tr.state, tr.hold, tr.steps
        out.append(state)
    return np.array(out)


def hover_action(params: np.ndarray) -> np.ndarray:
    # Inverse of the documented mapping T = max_thrust (a + 1) / 2 at T = m g / 2.
    p = dict(zip(PARAMS.names, params[0], strict=True))
    return np.full((1, 4), p["mass"] * p["gravity"] / p["max_thrust"] - 1.0)


def mirror_swap(s: np.ndarray) -> np.ndarray:
    """The same scene seen in a mirror (x -> -x) with the drones' labels swapped.

    Built from the documented state layout only: x, pitch, x_dot, pitch_rate and gust_x
    change sign; rotors are named by world side (left = -x), so in the mirror each
    drone's left and right rotors trade names.
    """
    out = np.empty_like(s)
    sign = np.array([-1.0, 1.0, -1.0, -1.0, 1.0, -1.0])
    out[..., 0:6] = s[..., 6:12] * sign
    out[..., 6:12] = s[..., 0:6] * sign
    out[..., 12:16] = s[..., [15, 14, 13, 12]]
    out[..., 16] = -s[..., 16]
    out[..., 17] = s[..., 17]
    return out


# ----------------------------------------------------------------------------- 1. hover
@FAST
@given(
    mass=st.floats(0.2, 3.0),
    gravity=st.floats(1.0, 20.0),
    headroom=st.floats(0.6, 3.0),
    start_x=st.floats(0.5, 2.5),
    start_height=st.floats(1.0, 3.5),
)
def test_hover_stays_put(mass, gravity, headroom, start_x, start_height):
    # Newton's second law: thrust m g balancing weight gives zero acceleration; with no
    # wind the air is still, so drag (which acts on airspeed) is zero too (common practice).
    overrides = {
        "mass": mass,
        "gravity": gravity,
        "max_thrust": headroom * mass * gravity,
        "start_x": start_x,
        "start_height": start_height,
        "gust_std": 0.0,
    }
    physics, p = setup(overrides, time_limit=6.0)
    s0 = physics.start_center(p)
    noise = np.random.default_rng(0).standard_normal((250, 1, 2))  # drawn, but gust_std = 0
    states = run(physics, s0, hover_action(p), p, 250, noise)  # 5 s at dt = 0.02
    drift = np.abs(states[:, 0, :12] - s0[0, :12]).max()
    assert drift < 1e-9
    assert np.all(states[:, 0, 16:] == 0.0)


# ----------------------------------------------------------------------------- 2. free fall
@FAST
@given(mass=st.floats(0.5, 3.0), drag=st.floats(0.05, 5.0))
def test_free_fall_linear_drag_matches_closed_form(mass, drag):
    # Linear drag m v' = -m g - c v from rest: v(t) = -(m g / c)(1 - exp(-c t / m)),
    # z(t) = z0 - (m g / c) t + (m^2 g / c^2)(1 - exp(-c t / m)) (standard result, any
    # mechanics textbook). RK4 at h = 0.01 s and c/m <= 10: ~1e-7 relative, ~1e-8 m.
    g = 9.81
    overrides = {
        "mass": mass,
        "gravity": g,
        "drag_linear": drag,
        "drag_quadratic": 0.0,
        "gust_std": 0.0,
        "start_height": 90.0,
        "field_height": 100.0,
    }
    physics, p = setup(overrides)
    s0 = physics.start_center(p)
    s0[:, 12:16] = 0.0  # rotors stopped
    states = run(physics, s0, -np.ones((1, 4)), p, 100)  # command 0 N for 2 s
    t = physics.dt * np.arange(1, 101)
    k = drag / mass
    v = -(g / k) * (1.0 - np.exp(-k * t))
    z = 90.0 - (g / k) * t + (g / k**2) * (1.0 - np.exp(-k * t))
    for i in (0, 1):
        np.testing.assert_allclose(states[:, 0, 6 * i + 4], v, rtol=1e-6, atol=1e-9)
        np.testing.assert_allclose(90.0 - states[:, 0, 6 * i + 1], 90.0 - z, rtol=1e-6, atol=1e-7)
        assert np.all(states[:, 0, 6 * i + 3] == 0.0) and np.all(states[:, 0, 6 * i + 2] == 0.0)


def test_free_fall_reaches_terminal_velocity():
    # Terminal velocity of linear drag -m g / c (same textbook result); RK4 keeps the
    # equilibrium of a linear ODE exactly, and 3 s is 30 time constants m/c here.
    mass, drag, g = 0.4, 4.0, 9.81
    physics, p = setup({"mass": mass, "drag_linear": drag, "drag_quadratic": 0.0, "gust_std": 0.0})
    s0 = physics.start_center(p)
    s0[:, 12:16] = 0.0
    states = run(physics, s0, -np.ones((1, 4)), p, 150)
    np.testing.assert_allclose(states[-1, 0, [4, 10]], -mass * g / drag, rtol=1e-9)


@FAST
@given(mass=st.floats(0.3, 2.0), drag=st.floats(0.01, 0.5))
def test_free_fall_quadratic_drag_matches_closed_form(mass, drag):
    # Quadratic drag m v' = -m g + c v^2 (falling) from rest: v(t) = -v_t tanh(g t / v_t),
    # v_t = sqrt(m g / c) (standard result, any mechanics textbook).
    g = 9.81
    overrides = {"mass": mass, "drag_linear": 0.0, "drag_quadratic": drag, "gust_std": 0.0}
    physics, p = setup({**overrides, "start_height": 90.0, "field_height": 100.0})
    s0 = physics.start_center(p)
    s0[:, 12:16] = 0.0
    states = run(physics, s0, -np.ones((1, 4)), p, 100)
    t = physics.dt * np.arange(1, 101)
    vt = math.sqrt(mass * g / drag)
    np.testing.assert_allclose(states[:, 0, 4], -vt * np.tanh(g * t / vt), rtol=1e-7, atol=1e-9)


# ----------------------------------------------------------------------------- 3. torque
@settings(max_examples=40, deadline=None)
@given(
    t_left=st.floats(0.0, 8.0),
    t_right=st.floats(0.0, 8.0),
    pitch=st.floats(-1.5, 1.5),
    arm=st.floats(0.05, 1.0),
    inertia=st.floats(1e-3, 0.5),
    mass=st.floats(0.2, 3.0),
)
def test_rotor_forces_and_torque(t_left, t_right, pitch, arm, inertia, mass):
    # Rigid-body Newton-Euler in the plane: I pitch'' = L (T_r - T_l) (torque = lever x force),
    # m a = total thrust along the body's up axis (-sin pitch, cos pitch) - m g (textbook).
    physics, p = setup({"arm_length": arm, "inertia": inertia, "mass": mass, "gust_std": 0.0, "drag_linear": 0.0})
    s = physics.start_center(p)
    s[0, [2, 8]] = pitch
    s[0, 12:16] = [t_left, t_right, t_left, t_right]
    d = physics.derivatives(s, s[:, 12:16].copy(), p)[0]
    alpha = (t_right - t_left) * arm / inertia
    assert d[5] == pytest.approx(alpha, rel=1e-12, abs=1e-9)
    assert d[11] == pytest.approx(alpha, rel=1e-12, abs=1e-9)  # both drones name rotors by world side
    total = t_left + t_right
    for i in (0, 1):
        assert d[6 * i + 3] == pytest.approx(-total * math.sin(pitch) / mass, rel=1e-12, abs=1e-12)
        assert d[6 * i + 4] == pytest.approx(total * math.cos(pitch) / mass - 9.81, rel=1e-12, abs=1e-12)


def test_pure_torque_in_zero_gravity_integrates_to_parabola():
    # Constant torque from rest: pitch(t) = alpha t^2 / 2 (kinematics of constant angular
    # acceleration); RK4 integrates a quadratic exactly, so the match is to rounding.
    overrides = {"gravity": 0.0, "drag_linear": 0.0, "drag_quadratic": 0.0, "gust_std": 0.0, "max_thrust": 8.0}
    physics, p = setup({**overrides, "arm_length": 0.25, "inertia": 0.01})
    s0 = physics.start_center(p)
    s0[0, 12:16] = [0.0, 2.0, 0.0, 2.0]
    action = np.array([[-1.0, -0.5, -1.0, -0.5]])  # T = 8 (a + 1) / 2: holds 0 N and 2 N
    states = run(physics, s0, action, p, 10)
    t = physics.dt * np.arange(1, 11)
    alpha = 2.0 * 0.25 / 0.01
    np.testing.assert_allclose(states[:, 0, 2], 0.5 * alpha * t**2, rtol=1e-12)
    np.testing.assert_allclose(states[:, 0, 8], 0.5 * alpha * t**2, rtol=1e-12)


def test_positive_pitch_raises_the_right_rotor_and_pushes_toward_minus_x():
    # The documented sign: positive pitch is counter-clockwise (x right, z up), thrust along
    # (-sin, cos). Differential thrust T_r > T_l on drone 0 gives pitch > 0, then x'' < 0.
    physics, p = setup({"gust_std": 0.0})
    s0 = physics.start_center(p)
    hover = hover_action(p)[0, 0]
    states = run(physics, s0, np.array([[hover - 0.01, hover + 0.01, hover, hover]]), p, 25)
    assert states[-1, 0, 2] > 0 and states[-1, 0, 3] < 0
    assert states[-1, 0, 8] == 0 and states[-1, 0, 9] == 0


# ----------------------------------------------------------------------------- action mapping
@FAST
@given(action=st.lists(st.floats(-5.0, 5.0), min_size=4, max_size=4), max_thrust=st.floats(1.0, 50.0))
def test_rotor_commands_never_push_down(action, max_thrust):
    # Contract: [-1, 1] maps linearly onto [0, max_thrust]; transition clips to [-1, 1]
    # and a first-order lag from a start in range stays in range (common practice).
    physics, p = setup({"max_thrust": max_thrust})
    ends = physics.actuate(np.array([[-1.0, 1.0, 0.0, -1.0]]), p)[0]
    np.testing.assert_allclose(ends, [0.0, max_thrust, max_thrust / 2, 0.0], rtol=1e-15)
    s = physics.start_center(p)
    s[0, 12:16] = np.clip(s[0, 12:16], 0.0, max_thrust)
    states = run(physics, s, np.array([action]), p, 5)
    assert np.all(states[:, 0, 12:16] >= 0.0) and np.all(states[:, 0, 12:16] <= max_thrust * (1 + 1e-12))


# ----------------------------------------------------------------------------- 4. rotor lag
@FAST
@given(tau=st.floats(0.02, 0.5), commands=st.lists(st.floats(-1.0, 1.0), min_size=4, max_size=4))
def test_rotor_lag_is_first_order(tau, commands):
    # First-order system tau T' = T_cmd - T: step response T(t) = T_cmd (1 - exp(-t / tau))
    # (standard result, any control textbook). h = 1 ms keeps RK4 within 1e-7.
    physics, p = setup(
        {"rotor_time_constant": tau, "start_height": 90.0, "field_height": 100.0, "gust_std": 0.0}, substeps=20
    )
    s0 = physics.start_center(p)
    s0[:, 12:16] = 0.0
    a = np.array([commands])
    states = run(physics, s0, a, p, 40)
    t = physics.dt * np.arange(1, 41)[:, None]
    target = physics.actuate(a, p)[0]
    np.testing.assert_allclose(states[:, 0, 12:16], target * (1.0 - np.exp(-t / tau)), rtol=0, atol=1e-7 * 8.0)


# ----------------------------------------------------------------------------- 5. gusts
def _gust_run(sigma: float, tau: float, n: int = 4000, steps: int = 60) -> np.ndarray:
    """Gust samples (steps + 1, n, 2) from the VectorEnv, started from the stationary law."""
    params = {"gust_std": sigma, "gust_time_constant": tau, "drag_linear": 0.0, "drag_quadratic": 0.0}
    env = gym.make_vec(
        "pretrial/DronePair-v0", num_envs=n, vectorization_mode="vector_entry_point", params=params, time_limit=100.0
    )
    physics = env.unwrapped.physics
    rng = np.random.default_rng(7)
    s0 = physics.start_center(env.unwrapped.params)
    s0[:, 16:18] = sigma * rng.standard_normal((n, 2))
    env.reset(seed=3, options={"state": s0})
    action = np.tile(hover_action(env.unwrapped.params[:1]), (n, 1))
    gusts = [s0[:, 16:18]]
    for _ in range(steps):
        _, _, term, trunc, info = env.step(action)
        assert not (term | trunc).any()  # no drag: the gust cannot disturb the hover
        gusts.append(info["state"][:, 16:18])
    env.close()
    return np.array(gusts)


def _corr(a: np.ndarray, b: np.ndarray) -> float:
    return float(np.corrcoef(a.ravel(), b.ravel())[0, 1])


def test_gust_is_ornstein_uhlenbeck():
    # OU process: stationary std sigma and autocorrelation exp(-lag / tau) (Uhlenbeck and
    # Ornstein 1930; exact update per Gillespie 1996; from memory). 8000 chains: standard
    # error of the std about 0.8 %, of the lag-1 correlation about 0.001, lag-10 about 0.006;
    # tolerances are 4-5 standard errors.
    sigma, tau, dt = 0.7, 0.5, 0.02
    g = _gust_run(sigma, tau)
    assert g[-1].std() == pytest.approx(sigma, rel=0.04)  # 60 steps on: the start law has been forgotten
    assert g[30].std() == pytest.approx(sigma, rel=0.04)
    assert _corr(g[:-1], g[1:]) == pytest.approx(math.exp(-dt / tau), abs=0.005)
    assert _corr(g[:-10], g[10:]) == pytest.approx(math.exp(-10 * dt / tau), abs=0.03)
    assert abs(_corr(g[-1, :, 0], g[-1, :, 1])) < 0.06  # components independent
    assert abs(g[-1].mean()) < 4 * sigma / math.sqrt(g[-1].size)


def test_gust_with_zero_time_constant_is_white():
    # tau -> 0 limit of the exact OU update: independent N(0, sigma^2) draws each period.
    g = _gust_run(0.5, 0.0, n=2000, steps=10)
    assert g[1:].std() == pytest.approx(0.5, rel=0.04)
    assert abs(_corr(g[1:-1], g[2:])) < 0.03


def test_still_air_without_wind_or_gust():
    # With gust_std = 0 and no mean wind the air velocity is zero: the gust state stays 0
    # whatever noise is drawn, and a drone at rest feels no drag (drag acts on airspeed).
    physics, p = setup({"gust_std": 0.0, "wind_x": 0.0, "wind_z": 0.0, "drag_linear": 3.0, "drag_quadratic": 1.0})
    s = physics.start_center(p)
    after = physics.advance_disturbance(s, p, np.array([[2.5, -1.7]]))
    assert np.all(after[:, 16:18] == 0.0)
    no_drag = p.copy()
    no_drag[0, PARAMS.index("drag_linear")] = no_drag[0, PARAMS.index("drag_quadratic")] = 0.0
    f = physics.actuate(hover_action(p), p)
    np.testing.assert_array_equal(physics.derivatives(after, f, p), physics.derivatives(after, f, no_drag))


# ----------------------------------------------------------------------------- 6. wind
@FAST
@given(wind=st.floats(-5.0, 5.0), drag=st.floats(0.2, 3.0), mass=st.floats(0.3, 2.0))
def test_linear_drag_in_steady_wind_matches_closed_form(wind, drag, mass):
    # Drag on the velocity relative to the air: m v' = -c (v - w) from rest gives
    # v(t) = w (1 - exp(-c t / m)) (standard first-order relaxation). Thrust balances
    # gravity at pitch 0 and the wind is horizontal, so z and pitch do not move at all.
    # RK4 at h = 0.01 s with c/m <= 10 /s: about 1e-7 relative.
    physics, p = setup({"wind_x": wind, "drag_linear": drag, "drag_quadratic": 0.0, "gust_std": 0.0, "mass": mass})
    s = physics.start_center(p)
    f = physics.actuate(hover_action(p), p)
    t, out = 0.0, []
    for _ in range(100):
        s = physics.integrate(s, f, p)
        t += physics.dt
        out.append((t, s[0].copy()))
    times = np.array([o[0] for o in out])
    states = np.array([o[1] for o in out])
    expected = wind * (1.0 - np.exp(-drag * times / mass))
    np.testing.assert_allclose(states[:, [3, 9]], np.c_[expected, expected], rtol=1e-6, atol=1e-10)
    assert np.abs(states[:, [1, 7]] - s[0, [1, 7]]).max() < 1e-9
    assert np.all(states[:, [2, 8]] == 0.0)


@FAST
@given(wind=st.floats(-5.0, 5.0).filter(lambda w: abs(w) > 0.1), drag=st.floats(0.5, 3.0), quad=st.floats(0.0, 0.5))
def test_drone_drifts_to_wind_speed(wind, drag, quad):
    # Any drag that vanishes at zero airspeed has its equilibrium at v = w (the drone moves
    # with the air, common practice); with c/m >= 0.5 /s, 30 s is >= 15 time constants.
    overrides = {"wind_x": wind, "drag_linear": drag, "drag_quadratic": quad, "gust_std": 0.0, "mass": 1.0}
    physics, p = setup(overrides, dt=0.1, substeps=5)
    s = physics.start_center(p)
    f = physics.actuate(hover_action(p), p)
    for _ in range(300):
        s = physics.integrate(s, f, p)
    np.testing.assert_allclose(s[0, [3, 9]], wind, rtol=1e-6)
    np.testing.assert_allclose(s[0, [4, 10]], 0.0, atol=1e-12)


# ----------------------------------------------------------------------------- 7. task rules
def _scene(physics, p):
    s = physics.start_center(p)
    return s, np.zeros((1, 4))


@FAST
@given(angle=st.floats(0.0, 2 * math.pi), gap=st.floats(1e-6, 0.2))
def test_collision_at_min_separation(angle, gap):
    # Contract: collision when the centre distance drops below min_separation.
    physics, p = setup()
    s, f = _scene(physics, p)
    ms = PARAMS["min_separation"].nominal
    for dist, code in ((ms * (1 - gap), COLLISION), (ms * (1 + gap), 0)):
        s[0, 6] = s[0, 0] + dist * math.cos(angle)
        s[0, 7] = s[0, 1] + dist * math.sin(angle)
        assert physics.check(s, f, p)[0] == code


@FAST
@given(pitch=st.floats(-1.5, 1.5), gap=st.floats(1e-6, 0.1))
def test_crash_when_lower_rotor_touches_ground(pitch, gap):
    # Contract: crashed when z - arm_length |sin pitch| <= 0 (the lower rotor tip).
    physics, p = setup()
    s, f = _scene(physics, p)
    s[0, 2] = pitch
    low = PARAMS["arm_length"].nominal * abs(math.sin(pitch))
    s[0, 1] = low - gap
    assert physics.check(s, f, p)[0] == CRASHED
    s[0, 1] = low + gap
    assert physics.check(s, f, p)[0] == 0


@pytest.mark.parametrize(
    ("name", "where", "code"),
    [("d0_x", -1, OUT), ("d1_x", 1, OUT), ("d1_z", 1, OUT), ("d1_pitch", 1, FLIPPED), ("d0_pitch", -1, FLIPPED)],
)
def test_out_of_bounds_and_flipped(name, where, code):
    # Contract: the field is |x| <= field_half_width, z <= field_height; flipped past pitch_limit.
    physics, p = setup()
    s, f = _scene(physics, p)
    assert physics.check(s, f, p)[0] == 0
    limit = {"x": "field_half_width", "z": "field_height", "pitch": "pitch_limit"}[name[3:]]
    s[0, physics.state_names.index(name)] = where * (PARAMS[limit].nominal + 0.01)
    assert physics.check(s, f, p)[0] == code


def test_first_failure_word_wins():
    # Documented order: collision before crashed before out_of_bounds before flipped.
    physics, p = setup()
    s, f = _scene(physics, p)
    s[0, [0, 6]] = 0.0
    s[0, [1, 7]] = [0.0, 0.1]  # too close and drone 0 on the ground
    assert physics.failure_words[physics.check(s, f, p)[0]] == "collision"


def test_success_after_hold_time_at_goals():
    # Contract: success when both drones are settled at their goals for hold_time seconds;
    # the success bonus of time_limit is paid on that step (hovering level at the goals, far
    # apart, costs nothing: no miss, no near penalty, hover commands).
    physics, p = setup({"gust_std": 0.0}, hold_time=0.5)
    s = physics.start_center(p)
    s[0, [0, 6]] = s[0, [6, 0]]  # put each at its goal
    a = hover_action(p)
    hold, steps = np.zeros(1), np.zeros(1, dtype=np.int64)
    for k in range(1, 26):
        tr = physics.transition(s, a, p, hold, steps)
        s, hold, steps = tr.state, tr.hold, tr.steps
        assert bool(tr.success[0]) == (k == 25)
    assert tr.terminated[0] and tr.reward[0] == pytest.approx(physics.time_limit, abs=1e-12)
    s[0, 3] = 0.3  # faster than goal_speed: not settled
    assert not physics.in_goal(s, p)[0]


def test_failure_is_penalised_and_start_is_clean():
    physics, p = setup()
    s = physics.start_center(p)
    assert physics.check(s, np.zeros((1, 4)), p)[0] == 0 and not physics.in_goal(s, p)[0]
    s[0, 1] = -0.01
    tr = physics.transition(s, hover_action(p), p, np.zeros(1), np.zeros(1, dtype=np.int64))
    assert physics.failure_words[tr.failure[0]] == "crashed"
    assert tr.reward[0] < -physics.time_limit + physics.dt


def test_failing_later_scores_better_and_never_pays():
    # Contract (reward_doc): a failure is charged the worst running cost for the rest of the
    # time limit, so a crash after k periods of the worst cost scores the same as a crash after
    # k + 1 (worse than any real flight), and a crash always scores below flying on to the end.
    physics, p = setup()
    worst = physics.worst_cost_rate(p)[0]
    crashed = np.array([CRASHED])

    def crash_after(k):
        remaining = np.array([(physics.max_steps - k) * physics.dt])
        tail = physics.terminal_reward(p, crashed, np.zeros(1, dtype=bool), remaining)[0]
        return -worst * physics.dt * k + tail

    scores = [crash_after(k) for k in range(1, physics.max_steps + 1)]
    flying_on_worst = -worst * physics.time_limit
    assert max(scores) < flying_on_worst
    np.testing.assert_allclose(np.diff(scores), 0.0, atol=1e-9)


def test_a_timeout_is_charged_nothing_extra():
    # Contract: the terminal charge is for failures; running out of time (truncation) ends with
    # the running cost alone. Hovering at the starts never reaches the goals.
    physics, p = setup({"gust_std": 0.0}, time_limit=0.1)
    s = physics.start_center(p)
    a = hover_action(p)
    hold, steps = np.zeros(1), np.zeros(1, dtype=np.int64)
    for _ in range(physics.max_steps):
        tr = physics.transition(s, a, p, hold, steps)
        s, hold, steps = tr.state, tr.hold, tr.steps
    assert tr.truncated[0] and not tr.terminated[0]
    none = np.zeros(1, dtype=np.int64)
    assert tr.reward[0] == physics.reward(s, a, p, none, np.zeros(1, dtype=bool))[0] == pytest.approx(-physics.dt)


@settings(max_examples=40, deadline=None)
@given(
    d0=st.tuples(st.floats(-3.0, 3.0), st.floats(0.0, 4.0)),
    d1=st.tuples(st.floats(-3.0, 3.0), st.floats(0.0, 4.0)),
    actions=st.lists(st.floats(-1.0, 1.0), min_size=4, max_size=4),
    mass=st.floats(0.05, 10.0),
    max_thrust=st.floats(0.1, 200.0),
)
def test_running_cost_stays_below_its_documented_bound(d0, d1, actions, mass, max_thrust):
    # The failure charge rests on this bound (reward_doc): per second, the running cost never
    # exceeds worst_cost_rate, anywhere in the field and for any command.
    physics, p = setup({"mass": mass, "max_thrust": max_thrust})
    s = physics.start_center(p)
    s[0, [0, 1, 6, 7]] = [*d0, *d1]
    none = np.zeros(1, dtype=np.int64)
    r = physics.reward(s, np.array([actions]), p, none, np.zeros(1, dtype=bool))[0]
    assert 0.0 <= -r / physics.dt <= physics.worst_cost_rate(p)[0] * (1 + 1e-12)


STATE = st.tuples(
    st.floats(-2.5, 2.5),
    st.floats(0.5, 3.5),
    st.floats(-1.0, 1.0),
    st.floats(-3.0, 3.0),
    st.floats(-3.0, 3.0),
    st.floats(-5.0, 5.0),
)


@settings(max_examples=40, deadline=None)
@given(
    d0=STATE,
    d1=STATE,
    rotors=st.lists(st.floats(0.0, 8.0), min_size=4, max_size=4),
    gust=st.tuples(st.floats(-2.0, 2.0), st.floats(-2.0, 2.0)),
    wind_x=st.floats(-5.0, 5.0),
    actions=st.lists(st.floats(-1.0, 1.0), min_size=4, max_size=4),
)
def test_mirror_swap_symmetry(d0, d1, rotors, gust, wind_x, actions):
    # Mirror symmetry of the plane (x -> -x) with the drones relabelled: dynamics, rules and
    # reward are equivariant, and each observation block is the other's mirror image
    # (x-like entries negated, common practice for a reflection of the plane).
    physics, p = setup({"wind_x": wind_x, "wind_z": 0.3})
    pm = p.copy()
    pm[0, PARAMS.index("wind_x")] = -wind_x
    s = np.array([[*d0, *d1, *rotors, *gust]])
    sm = mirror_swap(s)
    a = np.array([actions])
    am = a[:, [3, 2, 1, 0]]  # drones relabelled, left and right trade names
    obs, obs_m = physics.observe(s, p)[0], physics.observe(sm, pm)[0]
    block_sign = np.array([-1.0, 1.0, -1.0, -1.0, 1.0, -1.0, -1.0, 1.0, -1.0, 1.0, -1.0, 1.0])
    np.testing.assert_array_equal(obs_m[:12], obs[12:] * block_sign)
    np.testing.assert_array_equal(obs_m[12:], obs[:12] * block_sign)
    f, fm = physics.actuate(a, p), physics.actuate(am, pm)
    np.testing.assert_allclose(physics.derivatives(sm, fm, pm), mirror_swap(physics.derivatives(s, f, p)), atol=1e-12)
    assert physics.check(sm, fm, pm)[0] == physics.check(s, f, p)[0]
    assert physics.in_goal(sm, pm)[0] == physics.in_goal(s, p)[0]
    fail, ok = np.zeros(1, dtype=np.int64), np.zeros(1, dtype=bool)
    assert physics.reward(sm, am, pm, fail, ok)[0] == pytest.approx(physics.reward(s, a, p, fail, ok)[0], abs=1e-15)


def test_blocks_are_one_function_of_each_drone():
    # Contract (documented table): a block is the drone's own body state, its goal minus its
    # position, and the other drone minus itself; drone 1's goal is drone 0's start.
    physics, p = setup()
    rng = np.random.default_rng(11)
    s = physics.sample_start(rng, p) + rng.normal(0.0, 0.3, (1, 18))
    obs = physics.observe(s, p)[0]
    goals = {0: (1.5, 2.0), 1: (-1.5, 2.0)}
    for i, j in ((0, 1), (1, 0)):
        own, other = s[0, 6 * i : 6 * i + 6], s[0, 6 * j : 6 * j + 6]
        gx, gz = goals[i]
        expected = [*own, gx - own[0], gz - own[1], *(other[[0, 1, 3, 4]] - own[[0, 1, 3, 4]])]
        np.testing.assert_allclose(obs[12 * i : 12 * i + 12], expected, rtol=0, atol=1e-15)


def _shared_pd(block: np.ndarray, p: dict[str, float], climb_per_m: float) -> np.ndarray:
    """Rotor commands of one drone from its block: a near-hover cascaded PD controller.

    Position PD to a desired acceleration, pitch set-point -a_x / g (thrust along
    (-sin, cos)), attitude PD on the torque (the small-angle planar quadrotor controller,
    common practice). The height set-point is raised by ``climb_per_m`` times the distance
    still to go in x: the tie-break by direction of travel.
    """
    _, _, pitch, vx, vz, rate, gdx, gdz = block[:, :8].T
    ax = np.clip(4.0 * gdx - 4.0 * vx, -4.0, 4.0)
    az = np.clip(8.0 * (gdz + np.clip(climb_per_m * gdx, -0.5, 0.5)) - 5.6 * vz, -5.0, 5.0)
    g, m = p["gravity"], p["mass"]
    pitch_set = np.clip(-ax / g, -0.5, 0.5)
    total = m * (g + az) / np.cos(pitch)
    diff = p["inertia"] * (150.0 * (pitch_set - pitch) - 22.0 * rate) / p["arm_length"]  # T_r - T_l
    thrust = np.stack([total - diff, total + diff], axis=1) / 2.0
    return 2.0 * thrust / p["max_thrust"] - 1.0


@pytest.mark.parametrize(("climb_per_m", "least", "most"), [(0.3, 0.97, 1.0), (0.0, 0.0, 0.0)])
def test_one_program_for_both_drones_passes_by_direction_of_travel(climb_per_m, least, most):
    # One controller applied to each block in turn, as a shared network is. Climbing by the
    # distance still to go (sign of goal_dx: drone 0 climbs, drone 1 descends) separates the
    # drones vertically where they pass; without it the two flights are mirror images that
    # meet in the middle (common practice: the cruising-level rules of air traffic decide
    # height by direction of travel). 200 episodes at nominal physics in the default gusts.
    n = 200
    physics, p1 = setup()
    p = np.repeat(p1, n, axis=0)
    named = dict(zip(PARAMS.names, p1[0], strict=True))
    rng = np.random.default_rng(3)
    s = physics.sample_start(rng, p)
    hold, steps = np.zeros(n), np.zeros(n, dtype=np.int64)
    ended, success = np.zeros(n, dtype=bool), np.zeros(n, dtype=bool)
    for _ in range(physics.max_steps):
        blocks = physics.observe(s, p).reshape(n * 2, 12)
        action = _shared_pd(blocks, named, climb_per_m).reshape(n, 4)
        tr = physics.transition(s, action, p, hold, steps, rng.standard_normal((n, 2)))
        success |= ~ended & tr.success
        ended |= tr.terminated | tr.truncated
        s, hold, steps = tr.state, tr.hold, tr.steps
    assert least <= success.mean() <= most


def test_options_round_trip_and_hold_time_validation():
    physics = DronePairPhysics(hold_time=2.5, dt=0.01)
    again = DronePairPhysics(**physics.options())
    assert again.options() == physics.options() and again.hold_time == 2.5
    with pytest.raises(ValueError, match="hold_time"):
        DronePairPhysics(hold_time=-1)


# --------------------------------------------------------------------------- #
# The in-place derivatives against the plain expressions
# --------------------------------------------------------------------------- #
def _plain_derivatives(state: np.ndarray, force: np.ndarray, params: np.ndarray) -> np.ndarray:
    """The planar quadrotor's rigid-body equations as plain numpy expressions (no buffer reused).

    Per drone: ``m x'' = -(T_l + T_r) sin(pitch) - D v_rel,x``, ``m z'' = (T_l + T_r) cos(pitch) -
    D v_rel,z - m g``, ``I pitch'' = (T_r - T_l) arm`` with ``D = d_lin + d_quad |v_rel|`` (the
    textbook planar quadrotor, e.g. Mellinger and Kumar 2011 reduced to the plane -- from memory),
    first-order rotors ``T' = (command - T) / tau``; the gust is held over the period.
    """
    st, pt = state.T, params.T
    col = PARAMS.index
    pitch, vx, vz = st[[2, 8]], st[[3, 9]], st[[4, 10]]
    rel_x = vx - (pt[col("wind_x")] + st[16])
    rel_z = vz - (pt[col("wind_z")] + st[17])
    drag = pt[col("drag_linear")] + pt[col("drag_quadratic")] * np.sqrt(rel_x * rel_x + rel_z * rel_z)
    left, right = st[[12, 14]], st[[13, 15]]
    total = left + right
    inv_m = 1.0 / pt[col("mass")]
    out = np.empty((18, state.shape[0]))
    out[[0, 1, 2, 6, 7, 8]] = st[[3, 4, 5, 9, 10, 11]]
    out[[3, 9]] = (-total * np.sin(pitch) - drag * rel_x) * inv_m
    out[[4, 10]] = (total * np.cos(pitch) - drag * rel_z) * inv_m - pt[col("gravity")]
    out[[5, 11]] = (right - left) * (pt[col("arm_length")] / pt[col("inertia")])
    out[12:16] = (force.T - st[12:16]) / pt[col("rotor_time_constant")]
    out[16:18] = 0.0
    return out.T


@pytest.mark.parametrize("n", [1, 7, 300])
def test_derivatives_equal_the_plain_expressions_bit_for_bit(n):
    # Same expressions in the same order, so equal floats; random states, thrusts, winds, drags and
    # bodies. Read-only parameter arrays (as the rollout passes them) exercise the per-batch
    # constants, kept while the same array comes back; writable ones are formed afresh.
    rng = np.random.default_rng(5 + n)
    physics = DronePairPhysics()
    for writeable in (True, False):
        params = PARAMS.resolve_batch(None, n)
        for name, (lo, hi) in {"mass": (0.3, 3.0), "arm_length": (0.1, 0.5), "inertia": (0.005, 0.1),
                               "wind_x": (-5.0, 5.0), "wind_z": (-2.0, 2.0), "drag_linear": (0.0, 1.0),
                               "drag_quadratic": (0.0, 0.5), "rotor_time_constant": (0.01, 0.2),
                               "gravity": (9.0, 10.0)}.items():
            params[:, PARAMS.index(name)] = rng.uniform(lo, hi, n)
        params = np.asfortranarray(params) if not writeable else params
        params.setflags(write=writeable)
        for _ in range(3):  # again with the same read-only array: the kept constants
            state = rng.normal(0, 2.0, (n, physics.state_dim))
            force = rng.uniform(0, 20, (n, physics.action_dim))
            np.testing.assert_array_equal(physics.derivatives(state, force, params),
                                          _plain_derivatives(state, force, params))
