"""Honest perturbations: exact fractional delays, per-channel sensor/actuator values, gain on the physical output.

References named beside each check: the sampled-data loop with a delay that is a fraction of the
period (Astrom & Wittenmark, Computer-Controlled Systems, sampling a system with a time delay /
the modified z-transform), scipy's ODE solver and matrix exponential, scipy.stats, Newton's
second law with a first-order rotor lag, and the env's own declared observation units.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
import scipy.linalg
import scipy.optimize
from scipy import integrate, stats

from pretrial.analysis.lqr import design_lqr
from pretrial.analysis.plan import load_plan
from pretrial.cli.main import main
from pretrial.errors import InputError
from pretrial.evolution.config import load_config
from pretrial.sim import streams
from pretrial.sim.perturb import (
    PERTURBATIONS,
    Loop,
    apply_settings,
    channel_names,
    setting_names,
    spec_of,
    split_delay,
    split_names,
)
from pretrial.sim.rollout import keyed_scenarios, run_episodes
from pretrial_envs import make_physics


@pytest.fixture(scope="module")
def cart():
    return make_physics("pretrial/CartPole-v0")


@pytest.fixture(scope="module")
def drone():
    return make_physics("pretrial/DronePair-v0")


def _bits(a: np.ndarray) -> np.ndarray:
    return np.ascontiguousarray(a, dtype=np.float64).view(np.uint64)


# --------------------------------------------------------------------------- #
# the delay edge against the exact continuous-delay limit of the sampled loop
# --------------------------------------------------------------------------- #
def _zoh_integrals(a: np.ndarray, b: np.ndarray, t: float) -> tuple[np.ndarray, np.ndarray]:
    """``(e^{A t}, int_0^t e^{A s} ds B)`` by one block matrix exponential (Van Loan 1978)."""
    n, m = b.shape
    big = np.zeros((n + m, n + m))
    big[:n, :n], big[:n, n:] = a, b
    e = scipy.linalg.expm(big * t)
    return e[:n, :n], e[:n, n:]


def _delayed_loop_radius(a: np.ndarray, b: np.ndarray, k: np.ndarray, h: float, tau: float) -> float:
    """Spectral radius of the sampled loop ``u_k = -K x_k`` with an input delay ``tau`` (any fraction of h).

    Astrom & Wittenmark, Computer-Controlled Systems, sec. 2.3 (a delay of (m + f) periods): over
    a period the plant sees u[k-m-1] for f h, then u[k-m]; ``x[k+1] = Phi x[k] + G0 u[k-m] +
    G1 u[k-m-1]`` with ``G0 = int_0^{h - f h} e^{As} ds B`` and ``G1 = e^{A(h - f h)} int_0^{f h}
    e^{As} ds B``; the state is augmented with the m + 1 past inputs.
    """
    m = int(math.floor(tau / h))
    late = tau - m * h
    phi, _ = _zoh_integrals(a, b, h)
    phi_rest, g0 = _zoh_integrals(a, b, h - late)
    _, g_late = _zoh_integrals(a, b, late)
    g1 = phi_rest @ g_late
    n, p = b.shape
    size = n + (m + 1) * p

    def past(j: int) -> slice:  # the block holding u[k - j], j = 1 .. m + 1
        return slice(n + (j - 1) * p, n + j * p)

    f = np.zeros((size, size))
    f[:n, :n] = phi
    if m == 0:
        f[:n, :n] -= g0 @ k
    else:
        f[:n, past(m)] += g0
    f[:n, past(m + 1)] += g1
    f[past(1), :n] = -k
    for j in range(2, m + 2):
        f[past(j), past(j - 1)] = np.eye(p)
    return float(np.max(np.abs(np.linalg.eigvals(f))))


def _exact_delay_limit(a: np.ndarray, b: np.ndarray, k: np.ndarray, h: float) -> float:
    """The smallest input delay at which the sampled loop's spectral radius reaches 1 (grid, then brentq)."""
    grid = np.linspace(0.0, 0.2, 161)
    radius = np.array([_delayed_loop_radius(a, b, k, h, t) for t in grid])
    assert radius[0] < 1.0
    i = int(np.argmax(radius >= 1.0))
    assert i > 0
    return scipy.optimize.brentq(lambda t: _delayed_loop_radius(a, b, k, h, t) - 1.0, grid[i - 1], grid[i],
                                 xtol=1e-9)


DELAY_PLAN = """
[scenario]
env = "pretrial/CartPole-v0"
episodes = 20          # 0.8 needs >= 16 all succeeding (Wilson bound)
horizon = 10.0
seed = 1
[scenario.start]
x = 0.05
theta = 0.05
[[vary]]
name = "actuator_delay_s"
range = [0.0, 0.1]
[analysis]
run = ["margins"]
tolerance = 0.005
[require]
success_rate = 0.8
"""


def test_lqr_delay_edge_matches_the_exact_sampled_loop_limit(cart, tmp_path):
    # Reference: the exact delay limit of the sampled LQR loop on the linearized cart-pole, from the
    # modified-z-transform model above (scipy's expm, eigvals, brentq); pretrial only supplies the
    # plant matrices and the gain. About 0.0649 s at 50 Hz.
    lqr = design_lqr(cart)
    limit = _exact_delay_limit(lqr.a, lqr.b, lqr.k, cart.dt)
    assert 0.060 < limit < 0.070
    assert limit / cart.dt % 1 > 0.1  # a fraction of a period: rounding to whole periods would miss it
    plan = tmp_path / "delay.toml"
    plan.write_text(DELAY_PLAN, encoding="utf-8")
    out = tmp_path / "out"
    # exit 0 or 1 is the verdict (PASS/FAIL), not what is checked here
    assert main(["sweep", "lqr", "--plan", str(plan), "--out", str(out), "--workers", "1", "--json"]) in (0, 1)
    res = json.loads((out / "results.json").read_text(encoding="utf-8"))
    edge = next(m for m in res["margins"] if m["name"] == "actuator_delay_s")
    assert not edge["high_limit_reached"]
    assert edge["high"] == pytest.approx(limit, rel=0.03), (edge["high"], limit)
    # the value reported is the value simulated: a replay of the first failing value fails there too
    failed = float(edge["replay_high"].split("actuator_delay_s=")[1].split()[0])
    assert edge["high"] < failed <= limit * 1.03


# --------------------------------------------------------------------------- #
# the two-phase period against an ODE solver
# --------------------------------------------------------------------------- #
def _solve(physics, x0, force, params, t):
    """scipy's adaptive RK45 at tight tolerance over ``t`` s with ``force`` held (one row)."""
    def rhs(_, y):
        return physics.derivatives(y[None, :], force[None, :], params[None, :])[0]

    sol = integrate.solve_ivp(rhs, (0.0, t), x0, rtol=1e-12, atol=1e-14)
    return sol.y[:, -1]


@pytest.mark.parametrize("switch", [0.0, 0.25, 0.6, 1.0])
def test_switch_within_the_period_matches_an_ode_solver(cart, switch):
    # Reference: scipy.integrate.solve_ivp over the two pieces of the period (earlier force for
    # switch * dt, then the new one); pretrial's RK4 at a 20 ms step agrees to its truncation error.
    p = cart.param_table.resolve({})
    x0 = np.array([0.1, -0.3, 0.08, 0.5])
    earlier, action = np.array([[0.7]]), np.array([[-0.4]])
    tr = cart.transition(x0[None], action.copy(), p[None], np.zeros(1), np.zeros(1, dtype=np.int64),
                         earlier=earlier, switch=np.array([[switch]]))
    f_early = cart.actuate(earlier, p[None])[0]
    f_new = cart.actuate(action, p[None])[0]
    mid = _solve(cart, x0, f_early, p, switch * cart.dt) if switch > 0 else x0
    ref = _solve(cart, mid, f_new, p, (1 - switch) * cart.dt) if switch < 1 else mid
    np.testing.assert_allclose(tr.state[0], ref, rtol=0, atol=1e-8)


def test_switch_zero_is_bit_identical_to_one_piece(cart):
    # the rows of a batch whose switch is 0 must integrate exactly as without the two-phase path
    rng = np.random.default_rng(5)
    n = 6
    p = np.asfortranarray(np.tile(cart.param_table.resolve({}), (n, 1)))
    x = rng.normal(scale=0.1, size=(n, 4))
    a, early = rng.uniform(-1, 1, (n, 1)), rng.uniform(-1, 1, (n, 1))
    switch = np.array([[0.0], [0.3], [0.0], [1.0], [0.999], [0.0]])
    hold, steps = np.zeros(n), np.zeros(n, dtype=np.int64)
    plain = cart.transition(x, a.copy(), p, hold, steps)
    split = cart.transition(x, a.copy(), p, hold, steps, earlier=early, switch=switch)
    zero = switch[:, 0] == 0
    np.testing.assert_array_equal(_bits(split.state[zero]), _bits(plain.state[zero]))
    assert not np.array_equal(split.state[~zero], plain.state[~zero])
    # switch 1: the whole period under the earlier command, as one piece with that command
    whole_early = cart.transition(x, early.copy(), p, hold, steps)
    np.testing.assert_array_equal(_bits(split.state[3]), _bits(whole_early.state[3]))


# --------------------------------------------------------------------------- #
# rollouts: whole periods as before, fractional rows replay alone
# --------------------------------------------------------------------------- #
class _Linear:
    """The LQR gain as a batch policy computed column by column: elementwise, so its bits never depend on
    the batch size (a matrix product may round differently with the number of rows, BLAS kernels)."""

    n_policies = 1

    def __init__(self, physics):
        lqr = design_lqr(physics)
        max_force = physics.param_table["max_force"].nominal
        self.gain = lqr.k[0] / max_force  # force = max_force * action

    def reset(self, batch_size: int) -> None:
        """Static: nothing to clear."""

    def act(self, obs: np.ndarray) -> np.ndarray:
        a = -self.gain[0] * obs[:, 0]
        for j in range(1, len(self.gain)):
            a = a - self.gain[j] * obs[:, j]
        return a[:, None]


def _rollout(physics, policy, settings, steps=120, seed=3):
    n = len(next(iter(settings.values())))
    params = physics.param_table.resolve_batch({}, n)
    sc = keyed_scenarios(physics, np.full(n, seed, dtype=np.uint64), np.arange(n), params, settings)
    return sc, run_episodes(physics, policy, sc, max_steps=steps, record=True)


def test_whole_period_delay_is_the_plain_delay_line(cart):
    # A whole-period delay must give the loop it always gave: the command of k - m periods ago held
    # over the period, through the plant's one-piece transition (written out here by hand).
    lqr = _Linear(cart)
    settings = {"actuator_delay_s": np.array([0.04, 0.0, 0.06])}
    sc, out = _rollout(cart, lqr, settings)
    for row, m in ((0, 2), (1, 0), (2, 3)):
        p = sc.params[row:row + 1]
        state, hold, steps = sc.start[row:row + 1], np.zeros(1), np.zeros(1, dtype=np.int64)
        sent = []
        for k in range(out.trace["state"].shape[0] - 1):
            sent.append(np.clip(lqr.act(cart.observe(state, p)), -1, 1))
            applied = sent[k - m] if k >= m else np.zeros((1, 1))
            tr = cart.transition(state, applied.copy(), p, hold, steps)
            state, hold, steps = tr.state, tr.hold, tr.steps
            np.testing.assert_array_equal(_bits(out.trace["state"][k + 1, row:row + 1]), _bits(state),
                                          err_msg=f"row {row} step {k}")


def test_fractional_rows_replay_alone_bit_for_bit(cart):
    # a scenario row gives the same bits whatever else is in the batch (what sweep replays rely on)
    lqr = _Linear(cart)
    settings = {
        "actuator_delay_s": np.array([0.027, 0.0, 0.04, 0.013, 0.0]),
        "control_jitter_s": np.array([0.0, 0.01, 0.0, 0.004, 0.0]),
        "sensor_delay_s": np.array([0.0, 0.0, 0.031, 0.0, 0.0]),
        "actuator_gain.force": np.array([1.0, 1.0, 0.8, 1.3, 1.0]),
        "sensor_noise_std.theta": np.array([0.0, 0.002, 0.0, 0.0, 0.0]),
    }
    _, out = _rollout(cart, lqr, settings, steps=80)
    for i in range(5):
        # row i of the batch is episode i of the seed: run that episode alone
        params = cart.param_table.resolve_batch({}, 1)
        sc = keyed_scenarios(cart, np.array([3], dtype=np.uint64), np.array([i]), params,
                             {k: v[i:i + 1] for k, v in settings.items()})
        alone = run_episodes(cart, lqr, sc, max_steps=80, record=True)
        np.testing.assert_array_equal(_bits(out.trace["state"][:, i]), _bits(alone.trace["state"][:, 0]),
                                      err_msg=f"row {i}")


def test_split_delay_keeps_float_noise_whole():
    # 0.06 / 0.02 is 2.9999999999999996 in binary floating point (IEEE 754): still three whole periods
    m, f = split_delay(np.array([0.06, 0.0649, 0.02, 0.0, 0.01]), 0.02)
    np.testing.assert_array_equal(m, [3, 3, 1, 0, 0])
    np.testing.assert_allclose(f, [0.0, 0.245, 0.0, 0.0, 0.5], rtol=1e-12, atol=0)


def test_jitter_switch_is_uniform_over_the_late_window(cart):
    # Reference: scipy.stats.kstest against U(0, jitter/dt): each command arrives tau ~ U(0, jitter) late
    jitter = 0.012
    n = 4000
    loop = Loop(cart, {"control_jitter_s": np.full(n, jitter)}, streams.scenario_keys(4, n))
    loop.reset(np.zeros((n, 4)))
    loop.actuate(np.zeros((n, 1)), 0)
    switch = loop.plant_inputs()["switch"][:, 0]
    assert stats.kstest(switch, stats.uniform(0, jitter / cart.dt).cdf).pvalue > 1e-3
    # with a fractional delay as well, the arrival is the delay's fraction plus the jitter, held at 1
    loop = Loop(cart, {"control_jitter_s": np.full(n, jitter), "actuator_delay_s": np.full(n, 0.015)},
                streams.scenario_keys(4, n))
    loop.reset(np.zeros((n, 4)))
    loop.actuate(np.zeros((n, 1)), 0)
    both = loop.plant_inputs()["switch"][:, 0]
    np.testing.assert_allclose(both, np.minimum(0.75 + switch, 1.0), rtol=1e-12)
    assert both.max() == 1.0 and both.min() >= 0.75


# --------------------------------------------------------------------------- #
# actuator gain on the physical output
# --------------------------------------------------------------------------- #
def test_zero_gain_drone_has_no_thrust(drone):
    # Reference: Newton's second law with the rotors' first-order lag (the drone model's own rotor
    # equation, T' = (T_cmd - T) / tau_r): with no commanded thrust T(t) = T0 e^{-t/tau_r}, so with no
    # drag vz(t) = (2 T0 tau_r / m)(1 - e^{-t/tau_r}) - g t. Under the old meaning (gain on the
    # normalized command) gain 0 left every rotor at half thrust.
    p = drone.param_table.resolve({"drag_linear": 0.0, "drag_quadratic": 0.0, "gust_std": 0.0})
    g, mass, tau = (p[drone.param_table.index(k)] for k in ("gravity", "mass", "rotor_time_constant"))
    state = drone.start_center(p[None])
    t0 = state[0, 12]
    for command in (-1.0, 0.0, 1.0):
        action = np.full((1, 4), command)
        tr = drone.transition(state, action, p[None], np.zeros(1), np.zeros(1, dtype=np.int64),
                              gain=np.zeros((1, 4)))
        t = drone.dt
        vz = 2 * t0 * tau / mass * (1 - math.exp(-t / tau)) - g * t
        # RK4 over one period of dt / tau_r = 0.4 has a relative truncation error ~0.4^5 / 120 ~ 1e-4
        # (Hairer, Norsett & Wanner, from memory): tolerances at that level; half thrust would be 0.03 off
        assert tr.state[0, 4] == pytest.approx(vz, rel=0, abs=1e-5)
        np.testing.assert_allclose(tr.state[0, 12:16], t0 * math.exp(-t / tau), rtol=1e-4)


def test_gain_scales_the_force_beyond_the_command_limit(cart):
    # On the cart-pole the force is max_force x command: a gain g on the output is the same plant with
    # g x max_force, even for commands whose gained value would once have been clipped at 1.
    p = cart.param_table.resolve({})
    x = np.array([[0.0, 0.0, 0.05, 0.0]])
    for gain, command in ((2.0, 0.8), (0.5, -1.0), (0.0, 1.0)):
        a = np.array([[command]])
        tr = cart.transition(x, a.copy(), p[None], np.zeros(1), np.zeros(1, dtype=np.int64),
                             gain=np.array([[gain]]))
        q = cart.param_table.resolve({"max_force": p[cart.param_table.index("max_force")] * gain})
        ref = cart.transition(x, a.copy(), q[None], np.zeros(1), np.zeros(1, dtype=np.int64))
        np.testing.assert_allclose(tr.state, ref.state, rtol=1e-12, atol=1e-15)


def test_gain_per_actuator(drone):
    # actuator_gain.d0_rotor_left reaches only that rotor; the plain form every rotor
    n = 2
    values = {"actuator_gain": np.array([1.0, 0.5]), "actuator_gain.d0_rotor_left": np.array([0.0, 0.0])}
    loop = Loop(drone, values, streams.scenario_keys(1, n))
    loop.reset(np.zeros((n, drone.obs_dim)))
    loop.actuate(np.full((n, 4), 0.3), 0)
    np.testing.assert_array_equal(loop.plant_inputs()["gain"], [[0.0, 1.0, 1.0, 1.0], [0.0, 0.5, 0.5, 0.5]])


# --------------------------------------------------------------------------- #
# per-channel sensor values, in the channel's unit
# --------------------------------------------------------------------------- #
def test_channel_specs_carry_the_observation_units(cart, drone):
    # the unit is the env's own declared observation unit (pretrial envs ID lists the same)
    for physics in (cart, drone):
        for obs, unit in zip(physics.obs_names, physics.obs_units, strict=True):
            for base in ("sensor_noise_std", "sensor_bias", "sensor_quantization"):
                spec = spec_of(physics, f"{base}.{obs}")
                assert spec.unit == unit and spec.nominal == PERTURBATIONS[base].nominal
                assert (spec.low, spec.high) == (PERTURBATIONS[base].low, PERTURBATIONS[base].high)
        for act in physics.action_names:
            assert spec_of(physics, f"actuator_gain.{act}").unit == "-"
    assert spec_of(cart, "sensor_noise_std.theta").unit == "rad"
    assert spec_of(cart, "sensor_noise_std.x").unit == "m"
    assert len(channel_names(drone)) == 3 * drone.obs_dim + drone.action_dim
    assert set(channel_names(cart)) <= set(setting_names(cart))


def test_noise_on_one_channel_only(cart):
    # Reference: scipy.stats (Kolmogorov-Smirnov against N(0, std^2)); the other channels are untouched
    n, steps, std = 800, 10, 0.002
    loop = Loop(cart, {"sensor_noise_std.theta": np.full(n, std)}, streams.scenario_keys(2, n))
    obs = np.tile([0.3, -0.2, 0.01, 0.4], (n, 1))
    loop.reset(obs)
    res = np.stack([loop.sense(obs, k) - obs for k in range(steps)])
    theta = cart.obs_names.index("theta")
    others = [j for j in range(4) if j != theta]
    assert np.all(res[:, :, others] == 0.0)
    assert stats.kstest(res[:, :, theta].ravel() / std, "norm").pvalue > 1e-3


def test_channel_overrides_plain_form_and_same_draws(cart):
    # the plain form on every channel and per-channel forms with the same numbers give the same bits
    n = 5
    keys = streams.scenario_keys(7, n)
    obs = np.random.default_rng(1).normal(size=(n, 4))
    plain = Loop(cart, {"sensor_noise_std": np.full(n, 0.1), "sensor_bias": np.full(n, 0.02)}, keys)
    split = Loop(cart, {**{f"sensor_noise_std.{o}": np.full(n, 0.1) for o in cart.obs_names},
                        **{f"sensor_bias.{o}": np.full(n, 0.02) for o in cart.obs_names}}, keys)
    for loop in (plain, split):
        loop.reset(obs)
    np.testing.assert_array_equal(plain.sense(obs, 0), split.sense(obs, 0))
    # a channel form overrides the plain one for its channel only
    mixed = Loop(cart, {"sensor_bias": np.full(n, 0.02), "sensor_bias.theta": np.full(n, -0.5)}, keys)
    mixed.reset(obs)
    seen = mixed.sense(obs, 0) - obs
    theta = cart.obs_names.index("theta")
    np.testing.assert_allclose(seen[:, theta], -0.5)
    np.testing.assert_allclose(np.delete(seen, theta, axis=1), 0.02)


def test_quantization_per_channel(cart):
    # Reference: a mid-tread quantizer rounds to the nearest multiple of its quantum (common practice)
    n = 50
    rng = np.random.default_rng(3)
    obs = rng.uniform(-2, 2, (n, 4))
    loop = Loop(cart, {"sensor_quantization.x": np.full(n, 0.001), "sensor_quantization.theta": np.full(n, 0.0015)},
                streams.scenario_keys(0, n))
    loop.reset(obs)
    seen = loop.sense(obs, 0)
    np.testing.assert_allclose(seen[:, 0], np.round(obs[:, 0] / 0.001) * 0.001, rtol=0, atol=1e-15)
    np.testing.assert_allclose(seen[:, 2], np.round(obs[:, 2] / 0.0015) * 0.0015, rtol=0, atol=1e-15)
    np.testing.assert_array_equal(seen[:, [1, 3]], obs[:, [1, 3]])


# --------------------------------------------------------------------------- #
# names everywhere: apply_settings, plans, configs, --set, envs; one-line errors
# --------------------------------------------------------------------------- #
def test_apply_settings_takes_channels(cart):
    setup = apply_settings(cart, None, {"sensor_noise_std.theta": 0.002, "actuator_gain.force": 0.5})
    assert setup.perturb == {"sensor_noise_std.theta": 0.002, "actuator_gain.force": 0.5}
    assert split_names(cart, ["pole_mass", "sensor_bias.x_dot"]) == (["pole_mass"], ["sensor_bias.x_dot"])
    with pytest.raises(ValueError, match=r"sensor_noise_std\.theta.*outside"):
        apply_settings(cart, None, {"sensor_noise_std.theta": -1.0})


@pytest.mark.parametrize(("name", "near"), [("sensor_noise_std.thetaa", "sensor_noise_std.theta"),
                                            ("actuator_gain.forse", "actuator_gain.force"),
                                            ("sensor_bias.x_dott", "sensor_bias.x_dot")])
def test_unknown_channel_names_the_valid_ones(cart, name, near):
    for call in (lambda: spec_of(cart, name), lambda: apply_settings(cart, None, {name: 0.1}),
                 lambda: Loop(cart, {name: np.ones(2)}, streams.scenario_keys(0, 2))):
        with pytest.raises(ValueError) as exc:
            call()
        msg = str(exc.value)
        assert "\n" not in msg and f"did you mean {near!r}" in msg
        base = name.split(".")[0]
        assert all(c in msg for c in channel_names(cart, base))


def test_plan_varies_a_channel_in_its_unit(cart, tmp_path):
    plan = tmp_path / "p.toml"
    plan.write_text('[scenario]\nenv = "pretrial/CartPole-v0"\nepisodes = 73\n'
                    '[[vary]]\nname = "sensor_noise_std.theta"\nrange = [0.0, 0.05]\n'
                    '[[vary]]\nname = "actuator_gain.force"\nunits = "ratio"\nrange = [0.5, 2.0]\n'
                    '[analysis]\nrun = ["margins"]\n', encoding="utf-8")
    p = load_plan(plan, cart)
    assert [(v.name, v.unit) for v in p.vary] == [("sensor_noise_std.theta", "rad"), ("actuator_gain.force", "-")]
    plan.write_text('[scenario]\nenv = "pretrial/CartPole-v0"\n[[vary]]\nname = "sensor_noise_std.omega"\n'
                    'range = [0.0, 0.05]\n[analysis]\nrun = ["margins"]\n', encoding="utf-8")
    with pytest.raises(InputError) as exc:
        load_plan(plan, cart)
    assert "vary[0].name" in exc.value.message and "sensor_noise_std.theta_dot" in exc.value.message


CONFIG = """
[task]
env = "pretrial/CartPole-v0"
episodes = 2
[task.randomize]
{line}
[run]
generations = 1
"""


@pytest.mark.parametrize("line", ['"sensor_noise_std.theta" = [0.0, 0.002]', "sensor_noise_std.theta = [0.0, 0.002]"])
def test_config_randomize_channel_keys(tmp_path, line):
    # a quoted TOML key is one name; an unquoted dotted key is a table (TOML 1.0), read the same way
    path = tmp_path / "c.toml"
    path.write_text(CONFIG.format(line=line), encoding="utf-8")
    assert load_config(path).task.randomize == {"sensor_noise_std.theta": (0.0, 0.002)}


def test_config_randomize_unknown_channel(tmp_path):
    path = tmp_path / "c.toml"
    path.write_text(CONFIG.format(line='"sensor_bias.tehta" = [0.0, 0.01]'), encoding="utf-8")
    with pytest.raises(InputError) as exc:
        load_config(path)
    assert "task.randomize.sensor_bias.tehta" in exc.value.message and "sensor_bias.theta" in exc.value.message


def test_replay_set_channel_and_bad_channel(capsys):
    args = ["replay", "lqr", "--env", "pretrial/CartPole-v0", "--episodes", "1", "--json"]
    assert main([*args, "--set", "sensor_noise_std.theta=0.002", "--set", "actuator_gain.force=0.9"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["settings"] == {"sensor_noise_std.theta": 0.002, "actuator_gain.force": 0.9}
    assert main([*args, "--set", "sensor_noise_std.tehta=0.002"]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "Traceback" not in err and "sensor_noise_std.theta" in err


def test_envs_lists_channel_forms(capsys):
    assert main(["envs", "CartPole-v0"]) == 0
    text = capsys.readouterr().out
    assert "sensor_noise_std.theta" in text and "actuator_gain.force" in text
    assert main(["envs", "CartPole-v0", "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    units = {p["name"]: p["unit"] for p in doc["perturbations"]}
    assert units["sensor_bias.theta_dot"] == "rad/s" and units["sensor_noise_std"] == "obs unit"


def test_sweep_report_gives_channel_units_and_simulation_notes(tmp_path):
    plan = tmp_path / "c.toml"
    plan.write_text('[scenario]\nenv = "pretrial/CartPole-v0"\nepisodes = 20\nhorizon = 2.0\n'
                    '[[vary]]\nname = "sensor_bias.theta"\nrange = [-0.2, 0.2]\n'
                    '[[vary]]\nname = "actuator_delay_s"\nrange = [0.0, 0.1]\n'
                    '[analysis]\nrun = ["margins"]\ntolerance = 0.1\n[require]\nsuccess_rate = 0.8\n',
                    encoding="utf-8")
    out = tmp_path / "out"
    assert main(["sweep", "lqr", "--plan", str(plan), "--out", str(out), "--workers", "1", "--json"]) in (0, 1)
    res = json.loads((out / "results.json").read_text(encoding="utf-8"))
    units = {m["name"]: m["unit"] for m in res["margins"]}
    assert units == {"sensor_bias.theta": "rad", "actuator_delay_s": "s"}
    report = (out / "report.md").read_text(encoding="utf-8")
    assert " rad" in report and "actuator_delay_s: exact at any fraction" in report
    assert "sensor_bias: the plain form is one number for every observation" in report


def test_plain_gymnasium_env_refuses_within_period_values():
    import gymnasium as gym

    from pretrial.sim.plant import GymnasiumPlant

    if "testlab/Hold-v0" not in gym.registry:
        gym.register("testlab/Hold-v0", entry_point="gymnasium.envs.classic_control:PendulumEnv",
                     max_episode_steps=20)
    plant = GymnasiumPlant("testlab/Hold-v0")
    whole = 2 * plant.dt
    assert apply_settings(plant, None, {"actuator_delay_s": whole}).perturb == {"actuator_delay_s": whole}
    for name, value in (("actuator_gain", 0.5), ("control_jitter_s", 0.01), ("actuator_delay_s", 0.3 * plant.dt)):
        with pytest.raises(ValueError, match=f"{name}: testlab/Hold-v0 steps whole control periods"):
            apply_settings(plant, None, {name: value})
        with pytest.raises(ValueError, match="steps whole control periods"):
            Loop(plant, {name: np.full(2, value)}, streams.scenario_keys(0, 2))


def test_every_plain_perturbation_still_listed(cart):
    assert set(PERTURBATIONS.names) <= set(setting_names(cart))


def test_physical_inputs_carry_the_gain(cart):
    # what constraint checks see (e.g. the gantry's rope tension) is the force the plant received
    n = 3
    p = np.tile(cart.param_table.resolve({}), (n, 1))
    loop = Loop(cart, {"actuator_gain": np.array([1.0, 0.0, 2.5])}, streams.scenario_keys(0, n))
    loop.reset(np.zeros((n, 4)))
    a = loop.actuate(np.full((n, 1), 0.4), 0)
    np.testing.assert_allclose(loop.physical(a, p)[:, 0], 0.4 * p[:, cart.param_table.index("max_force")]
                               * np.array([1.0, 0.0, 2.5]), rtol=1e-15)
