"""The perturbed control loop (:class:`pretrial.sim.perturb.Loop`) against control-engineering references.

Each actuator and sensor element is checked on its own against its textbook or common-practice
definition, then all of them together for the property sweeps rely on: a row of a batch behaves
exactly as that row run alone, whatever the other rows carry.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import signal, stats

from pretrial.sim import streams
from pretrial.sim.perturb import PERTURBATIONS, Loop, spec_of, split_names
from pretrial_envs import make_physics

DT = 0.02  # pretrial/CartPole-v0's default control period


@pytest.fixture(scope="module")
def cart():
    return make_physics("pretrial/CartPole-v0")


def make_loop(physics, values: dict, n: int = 1, seed: int = 0, obs0: np.ndarray | None = None) -> Loop:
    loop = Loop(physics, {k: np.broadcast_to(np.asarray(v, float), (n,)) for k, v in values.items()},
                streams.scenario_keys(seed, n))
    loop.reset(np.zeros((n, physics.obs_dim)) if obs0 is None else obs0)
    return loop


def drive(loop: Loop, commands: np.ndarray) -> np.ndarray:
    """Applied actions for a (T, n, A) command sequence."""
    return np.stack([loop.actuate(c, k) for k, c in enumerate(commands)])


def sense_all(loop: Loop, observations: np.ndarray) -> np.ndarray:
    return np.stack([loop.sense(o, k) for k, o in enumerate(observations)])


# --------------------------------------------------------------------------- #
# actuator path
# --------------------------------------------------------------------------- #
def test_first_order_lag_step_response(cart):
    # Reference: step response of 1/(tau s + 1) is 1 - exp(-t/tau) (Ogata, Modern Control Engineering,
    # first-order systems). The command applied over period k is the lag's output after the command
    # has been held k+1 periods, i.e. at t = (k+1) dt; tau = 0 is no lag at all.
    taus = np.array([0.005, 0.02, 0.1, 1.0, 0.0])
    loop = make_loop(cart, {"actuator_lag_s": taus}, n=len(taus))
    steps = 200
    u = drive(loop, np.ones((steps, len(taus), 1)))[:, :, 0]
    t = DT * np.arange(1, steps + 1)[:, None]
    expected = np.where(taus > 0, 1.0 - np.exp(-t / np.where(taus > 0, taus, 1.0)), 1.0)
    np.testing.assert_allclose(u, expected, rtol=1e-12, atol=1e-15)


def test_first_order_lag_matches_scipy_zoh_discretization(cart):
    # Reference: scipy.signal.cont2discrete with a zero-order hold, the exact discretization of a linear
    # system whose input is held over each period; driven by an arbitrary command sequence.
    tau = 0.07
    rng = np.random.default_rng(4)
    cmd = rng.uniform(-1, 1, 150)
    loop = make_loop(cart, {"actuator_lag_s": tau})
    u = drive(loop, cmd[:, None, None])[:, 0, 0]
    lag = (np.array([[-1.0 / tau]]), np.array([[1.0 / tau]]), np.eye(1), np.zeros((1, 1)))  # x' = (u - x) / tau
    ad, bd, cd, dd, _ = signal.cont2discrete(lag, DT, method="zoh")
    _, y, _ = signal.dlsim((ad, bd, cd, dd, DT), np.append(cmd, 0.0))
    np.testing.assert_allclose(u, y[1:, 0], rtol=1e-10, atol=1e-13)


@pytest.mark.parametrize("delay", [0.009, 0.011, 0.02, 0.06, 0.061, 0.1, 0.5])
def test_actuator_delay_shifts_commands(cart, delay):
    # Reference: a transport delay of d = (m + f) periods on a sampled, held command (Astrom & Wittenmark,
    # Computer-Controlled Systems, sampling a system with a time delay): over period k the plant sees
    # c[k - m - 1] for the first f of the period and c[k - m] for the rest; zero before the line fills.
    m = math.floor(delay / DT + 1e-9)
    f = delay / DT - m if abs(delay / DT - round(delay / DT)) > 1e-9 else 0.0
    rng = np.random.default_rng(1)
    cmd = rng.uniform(-1, 1, (60, 1, 1))
    loop = make_loop(cart, {"actuator_delay_s": delay})
    shifted = np.concatenate([np.zeros((m + 1, 1, 1)), cmd[: len(cmd) - m]])  # shifted[k + 1] = c[k - m]
    for k in range(len(cmd)):
        u = loop.actuate(cmd[k], k)
        np.testing.assert_array_equal(u, shifted[k + 1])
        inputs = loop.plant_inputs()
        if f == 0.0:
            assert inputs == {}  # whole periods: the plant integrates the period in one piece
        else:
            np.testing.assert_array_equal(inputs["earlier"], shifted[k])
            np.testing.assert_allclose(inputs["switch"], [[f]], rtol=1e-12)


def test_deadband_zeroes_small_commands(cart):
    # Reference: a deadband element outputs 0 for |u| <= band and passes u otherwise (common practice).
    band = 0.25
    cmd = np.linspace(-1, 1, 81)[:, None, None]
    u = drive(make_loop(cart, {"actuator_deadband": band}), cmd)
    np.testing.assert_array_equal(u, np.where(np.abs(cmd) <= band, 0.0, cmd))
    assert np.count_nonzero(u == 0) == np.count_nonzero(np.abs(cmd) <= band) > 1


@pytest.mark.parametrize("gain", [0.0, 0.3, 1.7, 100.0])
def test_gain_goes_to_the_physical_output_not_the_command(cart, gain):
    # the command stays the (clipped) command; the gain is handed to the plant for its physical output
    cmd = np.linspace(-1, 1, 41)[:, None, None]
    loop = make_loop(cart, {"actuator_gain": gain})
    for k, c in enumerate(cmd):
        np.testing.assert_array_equal(loop.actuate(c.copy(), k), c)
        inputs = loop.plant_inputs()
        if gain == 1.0:
            assert inputs == {}
        else:
            np.testing.assert_array_equal(inputs["gain"], [[gain]])


def test_rate_limit_bounds_change_per_step(cart):
    # Reference: a slew-rate limiter moves its output towards the input by at most rate*dt per sample
    # (common practice).
    rate = 4.0  # full scale per second -> 0.08 per 20 ms period
    rng = np.random.default_rng(2)
    cmd = np.repeat(rng.choice([-1.0, 1.0, 0.3], 12), 10)[:, None, None]
    u = drive(make_loop(cart, {"actuator_rate_limit": rate}), cmd)[:, 0, 0]
    prev = np.concatenate([[0.0], u[:-1]])
    expected = np.clip(cmd[:, 0, 0], prev - rate * DT, prev + rate * DT)
    np.testing.assert_allclose(u, expected, rtol=0, atol=1e-15)
    assert np.max(np.abs(np.diff(np.concatenate([[0.0], u])))) <= rate * DT + 1e-15
    assert np.isclose(np.max(np.abs(np.diff(u))), rate * DT)  # the limit is actually reached


def test_output_is_clipped_to_actuator_range(cart):
    cmd = np.array([-7.0, -1.0, -0.5, 0.5, 1.0, 3.0, np.inf, -np.inf])[:, None, None]
    u = drive(make_loop(cart, {}), cmd)
    np.testing.assert_array_equal(u, np.clip(cmd, -1, 1))
    u = drive(make_loop(cart, {"actuator_gain": 5.0, "actuator_lag_s": 0.01}), np.full((50, 1, 1), 3.0))
    assert u.max() == 1.0 and u.min() >= 0.0


def test_elements_are_in_documented_order(cart):
    # delay -> deadband -> slew -> lag -> clip (the gain acts on the plant's physical output), worked by
    # hand for four steps from rest; any other order of these elements gives different numbers here
    tau, rate, band, gain = 0.05, 10.0, 0.2, 3.0
    loop = make_loop(cart, {"actuator_lag_s": tau, "actuator_rate_limit": rate, "actuator_deadband": band,
                            "actuator_gain": gain, "actuator_delay_s": 2 * DT})
    u = drive(loop, np.array([0.5, 0.1, 0.3, 0.3])[:, None, None])[:, 0, 0]
    alpha = 1 - math.exp(-DT / tau)
    slew = rate * DT
    # step 2: 0.5 arrives, passes the deadband, is slewed to 0.2 from rest, lagged to 0.2 alpha;
    # step 3: 0.1 is inside the deadband (0.3 after a gain of 3 would not be), 0 is within one slew step
    # of 0.2 alpha, and the lag moves alpha of the way there
    np.testing.assert_allclose(u, [0.0, 0.0, alpha * slew, alpha * slew * (1 - alpha)], rtol=1e-14, atol=0)


# --------------------------------------------------------------------------- #
# sensor path
# --------------------------------------------------------------------------- #
@pytest.mark.parametrize("delay", [0.0, 0.009, 0.011, 0.04, 0.06, 0.1, 0.027])
def test_sensor_delay_returns_old_observation(cart, delay):
    # Reference: a measurement delay of d = (m + f) periods, y[k] = x(t_k - d), holding the first sample
    # before the line fills (common practice); between two samples x is taken on the straight line
    # through them (linear interpolation, the approximation the module states).
    ratio = delay / DT
    m = round(ratio) if abs(ratio - round(ratio)) <= 1e-9 else math.floor(ratio)
    f = ratio - m if abs(ratio - round(ratio)) > 1e-9 else 0.0
    rng = np.random.default_rng(3)
    obs = rng.normal(size=(40, 1, cart.obs_dim))
    seen = sense_all(make_loop(cart, {"sensor_delay_s": delay}, obs0=obs[0]), obs)
    padded = np.concatenate([np.repeat(obs[:1], m + 1, axis=0), obs])  # padded[k + m + 1] = x[k]
    newer, older = padded[1:len(obs) + 1], padded[:len(obs)]  # x[k - m], x[k - m - 1]
    if f == 0.0:
        np.testing.assert_array_equal(seen, newer)
    else:
        np.testing.assert_allclose(seen, (1 - f) * newer + f * older, rtol=1e-12, atol=1e-15)


def test_sensor_bias_adds(cart):
    rng = np.random.default_rng(5)
    obs = rng.normal(size=(10, 1, cart.obs_dim))
    seen = sense_all(make_loop(cart, {"sensor_bias": -0.125}, obs0=obs[0]), obs)
    np.testing.assert_array_equal(seen, obs - 0.125)


def test_sensor_quantization_rounds_to_multiples(cart):
    # Reference: a uniform mid-tread quantizer rounds to the nearest multiple of the quantum (common practice).
    q = 0.01
    rng = np.random.default_rng(6)
    obs = rng.uniform(-3, 3, size=(50, 1, cart.obs_dim))
    seen = sense_all(make_loop(cart, {"sensor_quantization": q}, obs0=obs[0]), obs)
    levels = seen / q
    np.testing.assert_allclose(levels, np.round(levels), rtol=0, atol=1e-9)
    assert np.max(np.abs(seen - obs)) <= q / 2 + 1e-12
    # a quantum far below the float spacing of the values changes them by at most that spacing (and must
    # not overflow to inf, as x / 5e-324 would)
    for tiny in (1e-300, 5e-324):
        seen = sense_all(make_loop(cart, {"sensor_quantization": tiny}, obs0=obs[0]), obs)
        np.testing.assert_allclose(seen, obs, rtol=2.3e-16, atol=0)


def test_sensor_noise_has_requested_std(cart):
    # Reference: scipy.stats. The residuals must be N(0, std^2): Kolmogorov-Smirnov on residual/std and a
    # chi-square test of the sample variance, ((n - 1) s^2 / std^2 ~ chi2(n - 1)).
    std = np.array([0.05, 2.0])
    rows, steps = 500, 20
    loop = make_loop(cart, {"sensor_noise_std": np.repeat(std, rows)}, n=2 * rows)
    obs = np.full((2 * rows, cart.obs_dim), 0.7)
    res = np.stack([loop.sense(obs, k) - obs for k in range(steps)])  # (T, 2*rows, O)
    for i, s in enumerate(std):
        r = res[:, i * rows:(i + 1) * rows].ravel()
        assert stats.kstest(r / s, "norm").pvalue > 1e-3
        n = r.size
        chi2 = (n - 1) * r.var(ddof=1) / s**2
        p = 2 * min(stats.chi2.cdf(chi2, n - 1), stats.chi2.sf(chi2, n - 1))
        assert p > 1e-3, (s, r.std(ddof=1))
    # white: consecutive steps uncorrelated; bound 5 standard errors of a correlation, 1/sqrt(n)
    a, b = res[:-1].ravel(), res[1:].ravel()
    assert abs(np.corrcoef(a, b)[0, 1]) < 5 / math.sqrt(a.size)


# --------------------------------------------------------------------------- #
# nominal = untouched, and rows are independent
# --------------------------------------------------------------------------- #
def _bits(a: np.ndarray) -> np.ndarray:
    return np.ascontiguousarray(a, dtype=np.float64).view(np.uint64)


@pytest.mark.parametrize("explicit", [False, True])
def test_nominal_values_touch_nothing(cart, explicit):
    values = {s.name: s.nominal for s in PERTURBATIONS} if explicit else {}
    n = 7
    rng = np.random.default_rng(8)
    loop = make_loop(cart, values, n=n)
    for k in range(30):
        obs = rng.normal(size=(n, cart.obs_dim)) * 10.0 ** rng.uniform(-8, 3, (n, 1))
        cmd = rng.uniform(-1, 1, (n, 1)) * 10.0 ** rng.uniform(-9, 0, (n, 1))
        np.testing.assert_array_equal(_bits(loop.sense(obs, k)), _bits(obs))
        np.testing.assert_array_equal(_bits(loop.actuate(cmd, k)), _bits(cmd))
        assert loop.plant_inputs() == {}  # the plant's transition runs exactly as without a loop


ROW_VALUES = {
    # one row per column; row 0 and row 5 are nominal, the others vary one or several things
    "actuator_gain": [1.0, 1.5, 1.0, 0.7, 1.0, 1.0],
    "actuator_lag_s": [0.0, 0.03, 0.0, 0.2, 0.0, 0.0],
    "actuator_delay_s": [0.0, 0.04, 0.0, 0.1, 0.027, 0.0],
    "actuator_deadband": [0.0, 0.0, 0.05, 0.01, 0.0, 0.0],
    "actuator_rate_limit": [np.inf, 20.0, np.inf, 5.0, np.inf, np.inf],
    "sensor_noise_std": [0.0, 0.1, 0.0, 0.02, 0.3, 0.0],
    "sensor_bias": [0.0, 0.01, -0.2, 0.0, 0.0, 0.0],
    "sensor_delay_s": [0.0, 0.06, 0.0, 0.033, 0.0, 0.0],
    "sensor_quantization": [0.0, 0.0, 0.001, 0.01, 0.0, 0.0],
    "control_jitter_s": [0.0, 0.0, 0.0, 0.005, 0.015, 0.0],
    "sensor_bias.theta": [0.0, 0.0, 0.003, 0.0, -0.01, 0.0],
    "sensor_noise_std.x_dot": [0.0, 0.0, 0.0, 0.0, 0.05, 0.0],
}


def _plant_view(loop: Loop, u: np.ndarray) -> np.ndarray:
    """What the plant is handed for a period: command, earlier command, switch and gain, side by side."""
    inputs = loop.plant_inputs()
    n, a = u.shape
    switch = np.broadcast_to(inputs.get("switch", np.zeros((n, 1))), (n, 1))
    # the earlier command means nothing on a row whose switch is 0 (the plant never integrates it)
    earlier = np.where(switch > 0, inputs.get("earlier", u), u)
    gain = np.broadcast_to(inputs.get("gain", np.ones((n, 1))), (n, a))
    return np.concatenate([u, earlier, switch, gain], axis=1)


def _run_rows(physics, values: dict[str, np.ndarray], keys: np.ndarray, obs: np.ndarray, cmd: np.ndarray):
    loop = Loop(physics, values, keys)
    loop.reset(obs[0])
    seen, applied = [], []
    for k in range(len(obs)):
        seen.append(loop.sense(obs[k], k))
        applied.append(_plant_view(loop, loop.actuate(cmd[k], k)))
    return np.stack(seen), np.stack(applied)


def _check_rows_independent(physics, values: dict[str, np.ndarray], seed: int) -> None:
    # The property sweeps rely on: a row's results do not depend on what the other rows carry, so any
    # sample of a sweep can be replayed alone, bit for bit.
    n = len(next(iter(values.values())))
    rng = np.random.default_rng(seed)
    keys = streams.scenario_keys(seed, n)
    steps = 40
    obs = rng.normal(size=(steps, n, physics.obs_dim)) * 10.0 ** rng.uniform(-6, 1, (steps, n, 1))
    cmd = rng.uniform(-1.2, 1.2, (steps, n, physics.action_dim)) * 10.0 ** rng.uniform(-6, 0, (steps, n, 1))
    seen, applied = _run_rows(physics, values, keys, obs, cmd)
    for i in range(n):
        alone = {k: v[i:i + 1] for k, v in values.items()}
        s1, a1 = _run_rows(physics, alone, keys[i:i + 1], obs[:, i:i + 1], cmd[:, i:i + 1])
        np.testing.assert_array_equal(seen[:, i:i + 1], s1, err_msg=f"row {i} sensed")
        np.testing.assert_array_equal(applied[:, i:i + 1], a1, err_msg=f"row {i} applied")


def test_rows_with_different_values_are_independent(cart):
    _check_rows_independent(cart, {k: np.asarray(v, float) for k, v in ROW_VALUES.items()}, seed=11)


def test_take_keeps_rows_mid_episode(cart):
    # dropping rows mid-episode (the rollout engine does it for finished policies) must leave the kept
    # rows' delay lines, actuator state and random streams exactly as if they had run alone
    values = {k: np.asarray(v, float) for k, v in ROW_VALUES.items()}
    n = len(values["actuator_gain"])
    keys = streams.scenario_keys(12, n)
    rng = np.random.default_rng(12)
    steps, cut = 30, 11
    obs = rng.normal(size=(steps, n, cart.obs_dim))
    cmd = rng.uniform(-1, 1, (steps, n, 1))
    keep = np.array([1, 3, 5])
    loop = Loop(cart, values, keys)
    loop.reset(obs[0])
    seen, applied = [], []
    for k in range(steps):
        if k == cut:
            loop.take(keep)
        rows = np.arange(n) if k < cut else keep
        y, u = loop.sense(obs[k, rows], k), _plant_view(loop, loop.actuate(cmd[k, rows], k))
        seen.append(y[keep] if k < cut else y)
        applied.append(u[keep] if k < cut else u)
    s1, a1 = _run_rows(cart, {k: v[keep] for k, v in values.items()}, keys[keep], obs[:, keep], cmd[:, keep])
    np.testing.assert_array_equal(np.stack(seen), s1)
    np.testing.assert_array_equal(np.stack(applied), a1)


_ROW_RANGES = {
    "actuator_gain": (0.0, 3.0), "actuator_lag_s": (0.0, 0.3), "actuator_delay_s": (0.0, 0.1),
    "actuator_deadband": (0.0, 0.3), "actuator_rate_limit": (0.0, 50.0), "sensor_noise_std": (0.0, 1.0),
    "sensor_bias": (-1.0, 1.0), "sensor_delay_s": (0.0, 0.1), "sensor_quantization": (0.0, 0.1),
    "control_jitter_s": (0.0, 0.03), "actuator_gain.d1_rotor_left": (0.0, 3.0), "sensor_bias.d0_pitch": (-1.0, 1.0),
}
_row_value = {
    name: st.one_of(st.just(PERTURBATIONS[name.split(".")[0]].nominal), st.floats(lo, hi))
    for name, (lo, hi) in _ROW_RANGES.items()
}


@settings(max_examples=25, deadline=None)
@given(st.lists(st.fixed_dictionaries(_row_value), min_size=2, max_size=5), st.integers(0, 2**32))
def test_rows_independent_for_random_values(rows, seed):
    drone = make_physics("pretrial/DronePair-v0")  # 4 actuators, 12 observations
    values = {name: np.array([r[name] for r in rows], float) for name in rows[0]}
    _check_rows_independent(drone, values, seed)


def test_plant_noise_streams(cart):
    drone = make_physics("pretrial/DronePair-v0")
    n = 4000
    loop = make_loop(drone, {"sensor_noise_std": 1.0}, n=n)
    a, b = loop.plant_noise(0), loop.plant_noise(1)
    assert a.shape == (n, drone.noise_dim)
    np.testing.assert_array_equal(a, loop.plant_noise(0))  # a pure function of (key, step)
    # with zero observations and unit std the sensor returns its own draws: they must not be the plant's
    sensed = loop.sense(np.zeros((n, drone.obs_dim)), 0)[:, : drone.noise_dim]
    bound = 5 / math.sqrt(n)  # 5 standard errors of a correlation between independent samples
    for x, y in ((a, sensed), (a, b)):
        assert not np.array_equal(x, y)
        assert abs(np.corrcoef(x.ravel(), y.ravel())[0, 1]) < bound
    assert make_loop(cart, {}, n=3).plant_noise(0) is None  # the cart-pole has no disturbance process


# --------------------------------------------------------------------------- #
# names
# --------------------------------------------------------------------------- #
def test_split_names(cart):
    assert split_names(cart, ["cart_mass", "sensor_noise_std", "gravity", "actuator_lag_s"]) == (
        ["cart_mass", "gravity"], ["sensor_noise_std", "actuator_lag_s"])


@pytest.mark.parametrize(("name", "near"), [("sensor_nosie_std", "sensor_noise_std"), ("cart_mas", "cart_mass"),
                                            ("actuator_delay", "actuator_delay_s")])
def test_unknown_names_suggest_nearest(cart, name, near):
    for call in (lambda: split_names(cart, ["gravity", name]), lambda: spec_of(cart, name)):
        with pytest.raises(ValueError, match=f"did you mean '{near}'"):
            call()


def test_spec_of(cart):
    assert spec_of(cart, "cart_mass") is cart.param_table["cart_mass"]
    assert spec_of(cart, "sensor_delay_s") is PERTURBATIONS["sensor_delay_s"]


def test_loop_refuses_unknown_perturbation(cart):
    with pytest.raises(ValueError, match="did you mean 'actuator_gain'"):
        Loop(cart, {"actuator_gian": np.ones(2)}, streams.scenario_keys(0, 2))


def test_nominal_of_every_perturbation_is_in_range():
    for s in PERTURBATIONS:
        assert s.low <= s.nominal <= s.high
