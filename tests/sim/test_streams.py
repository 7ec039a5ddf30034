"""Counter-based random streams, and the common random numbers the rollout engine builds on them.

References: the splitmix64 generator as published (Steele, Lea & Flood 2014; the reference C code
by S. Vigna), re-implemented here with Python integers; scipy.stats for the distribution tests.
Correlation bounds are 5 standard errors of a sample correlation of independent samples, 1/sqrt(n)
(common practice), so a correct generator fails one of them with probability below 1e-6.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from pretrial.sim import rollout, streams
from pretrial.sim.rollout import Scenarios, draw_scenarios, run_episodes
from pretrial_envs import make_physics

_M64 = (1 << 64) - 1


def splitmix64(state: int, count: int) -> list[int]:
    """The published splitmix64 sequence from ``state``, with Python integers."""
    out = []
    for _ in range(count):
        state = (state + 0x9E3779B97F4A7C15) & _M64
        z = state
        z = ((z ^ (z >> 30)) * 0xBF58476D1CE4E5B9) & _M64
        z = ((z ^ (z >> 27)) * 0x94D049BB133111EB) & _M64
        out.append(z ^ (z >> 31))
    return out


def bound(n: int) -> float:
    return 5.0 / math.sqrt(n)


# --------------------------------------------------------------------------- #
# the generator
# --------------------------------------------------------------------------- #
def test_uniform_is_splitmix64():
    # counter 0 of a key is the splitmix64 sequence seeded with the key: 53 high bits, shifted into (0, 1]
    assert splitmix64(0, 1)[0] == 0xE220A8397B1DCDAF  # first output from seed 0 (from memory)
    keys = np.array([0, 1, 2**63 + 12345, _M64], dtype=np.uint64)
    u = streams.uniform(keys, 0, 5)
    for key, row in zip(keys, u):
        expected = [((z >> 11) + 1) / 2.0**53 for z in splitmix64(int(key), 5)]
        assert row.tolist() == expected


def test_uniform_passes_ks_in_open_closed_unit_interval():
    keys = streams.scenario_keys(1, 20_000)
    u = streams.uniform(keys, 7, 5)
    assert u.min() > 0.0 and u.max() <= 1.0
    assert stats.kstest(u.ravel(), "uniform").pvalue > 1e-3  # reference: scipy.stats.uniform on [0, 1]
    # one key along its counters is uniform too (that is how one scenario sees its steps)
    along = np.concatenate([streams.uniform(keys[:1], c, 1)[0] for c in range(5000)])
    assert stats.kstest(along, "uniform").pvalue > 1e-3


@pytest.mark.parametrize("version", streams.STREAM_VERSIONS)
def test_normal_passes_ks_against_scipy_norm(version):
    keys = streams.scenario_keys(2, 20_000)
    z = streams.normal(keys, 3, 5, version=version)
    assert np.all(np.isfinite(z))
    assert stats.kstest(z.ravel(), "norm").pvalue > 1e-3  # reference: scipy.stats.norm
    along = np.concatenate([streams.normal(keys[:2], c, 3, version=version).ravel() for c in range(2000)])
    assert stats.kstest(along, "norm").pvalue > 1e-3
    # moments with their standard errors: mean 1/sqrt(n), variance sqrt(2/n), fourth moment 3 +- sqrt(96/n)
    x = z.ravel()
    n = x.size
    assert abs(x.mean()) < 5 / math.sqrt(n)
    assert abs(x.var() - 1.0) < 5 * math.sqrt(2 / n)
    assert abs(np.mean(x**4) - 3.0) < 5 * math.sqrt(96 / n)


def test_draws_are_a_pure_function_of_key_counter_dim():
    keys = streams.scenario_keys(3, 50)
    rng = np.random.default_rng(0)
    normals = [lambda k, c, d, v=v: streams.normal(k, c, d, version=v) for v in streams.STREAM_VERSIONS]
    for fn in (streams.uniform, *normals):
        full = fn(keys, 11, 4)
        perm = rng.permutation(len(keys))
        np.testing.assert_array_equal(fn(keys[perm], 11, 4), full[perm])  # any order of the batch
        sub = np.array([3, 3, 40, 0])
        np.testing.assert_array_equal(fn(keys[sub], 11, 4), full[sub])  # any subset, repeats too
        for i in (0, 17, 49):
            np.testing.assert_array_equal(fn(keys[i:i + 1], 11, 4), full[i:i + 1])  # alone
        np.testing.assert_array_equal(fn(keys.copy(), 11, 4), full)  # same inputs, same draws
        assert not np.array_equal(fn(keys, 12, 4), full)


@pytest.mark.parametrize("version", streams.STREAM_VERSIONS)
def test_counters_lanes_and_keys_are_uncorrelated(version):
    keys = streams.scenario_keys(4, 40_000)
    n = len(keys)
    z0 = streams.normal(keys, 0, 4, version=version)
    z1 = streams.normal(keys, 1, 4, version=version)
    pairs = [(z0[:, 0], z1[:, 0]), (z0[:, 1], z1[:, 1])]  # same lane, next counter (next step)
    pairs += [(z0[:, i], z0[:, j]) for i in range(4) for j in range(i + 1, 4)]  # lanes of one draw
    pairs += [(z0[:-1, 0], z0[1:, 0])]  # neighbouring keys of a batch
    u0, u1 = streams.uniform(keys, 0, 2), streams.uniform(keys, 1, 2)
    pairs += [(u0[:, 0], u0[:, 1]), (u0[:, 0], u1[:, 0])]
    for a, b in pairs:
        assert abs(np.corrcoef(a, b)[0, 1]) < bound(n)
    # neighbouring counters of one key (consecutive steps of one scenario)
    along = np.array([streams.normal(keys[:1], c, 1, version=version)[0, 0] for c in range(4001)])
    assert abs(np.corrcoef(along[:-1], along[1:])[0, 1]) < bound(4000)


@pytest.mark.parametrize("dim", [1, 2, 3, 4, 7])
def test_normal_versions_are_the_box_muller_transform(dim):
    # Box & Muller (1958): from independent uniforms u1, u2 in (0, 1], sqrt(-2 ln u1) cos(2 pi u2)
    # and sqrt(-2 ln u1) sin(2 pi u2) are two independent standard normals. Version 1 keeps the
    # cosine of `dim` pairs; version 2 both halves of ceil(dim / 2) pairs. Written out plainly here.
    keys = streams.scenario_keys(5, 300)
    u = streams.uniform(keys, 9, 2 * dim)
    v1 = np.sqrt(-2.0 * np.log(u[:, :dim])) * np.cos(2.0 * np.pi * u[:, dim:])
    np.testing.assert_array_equal(streams.normal(keys, 9, dim, version=1), v1)  # the draws recorded results used
    h = (dim + 1) // 2
    u = streams.uniform(keys, 9, 2 * h)
    r = np.sqrt(-2.0 * np.log(u[:, :h]))
    both = np.concatenate([r * np.cos(2.0 * np.pi * u[:, h:]), r * np.sin(2.0 * np.pi * u[:, h:])], axis=1)
    np.testing.assert_array_equal(streams.normal(keys, 9, dim, version=2), both[:, :dim])


def test_normal_version_2_pair_halves_are_independent():
    # The two halves of a Box-Muller pair share their radius; they are still independent normals
    # (Box & Muller 1958): uncorrelated, and their squares too (a shared radius would correlate those).
    keys = streams.scenario_keys(6, 40_000)
    z = streams.normal(keys, 0, 2, version=2)
    assert abs(np.corrcoef(z[:, 0], z[:, 1])[0, 1]) < bound(len(keys))
    # var(z^2) = 2 for a standard normal, so the sample correlation's standard error is still 1/sqrt(n)
    assert abs(np.corrcoef(z[:, 0] ** 2, z[:, 1] ** 2)[0, 1]) < bound(len(keys))
    # the radius alone is chi with 2 degrees of freedom (reference: scipy.stats.chi)
    assert stats.kstest(np.hypot(z[:, 0], z[:, 1]), stats.chi(2).cdf).pvalue > 1e-3


@pytest.mark.parametrize("bad", [0, 3, "2", 1.5, True, None])
def test_unknown_stream_version_is_refused_in_one_line(bad):
    keys = streams.scenario_keys(0, 3)
    with pytest.raises(ValueError, match=r"^stream_version: .* not one of 1, 2$"):
        streams.normal(keys, 0, 2, version=bad)


def test_scenario_keys():
    a = streams.scenario_keys(123, 1000)
    assert a.dtype == np.uint64 and a.shape == (1000,)
    np.testing.assert_array_equal(a, streams.scenario_keys(123, 1000))  # deterministic
    np.testing.assert_array_equal(a, streams.scenario_keys(np.random.SeedSequence(123), 1000))
    b = streams.scenario_keys(124, 1000)
    assert not np.any(np.isin(a, b))  # 64-bit keys of two seeds: a collision has probability ~ 1e-14
    assert len(np.unique(a)) == len(a)
    # the keys themselves look uniform over 64 bits: top bit is a fair coin
    assert abs(np.mean(a >> np.uint64(63)) - 0.5) < 5 * 0.5 / math.sqrt(len(a))


# --------------------------------------------------------------------------- #
# common random numbers through the rollout engine
# --------------------------------------------------------------------------- #
class ConstantPolicy:
    """G copies of a controller that always sends the same command."""

    def __init__(self, n_policies: int, action_dim: int, value: float = 0.0):
        self.n_policies = n_policies
        self.command = np.full(action_dim, value)

    def reset(self, batch_size: int) -> None:
        pass

    def act(self, obs: np.ndarray) -> np.ndarray:
        return np.broadcast_to(self.command, (obs.shape[0], self.command.size)).copy()


class FeedbackPolicy:
    """G linear controllers ``u = clip(command[g] + gains[g] @ obs)``, so that sensor noise changes the actions.

    The product is written as an elementwise product and a row sum, so each row's action depends on
    that row alone. ``select`` lets the rollout engine drop policies that have finished.
    """

    def __init__(self, gains: np.ndarray, command: np.ndarray):
        self.gains = np.asarray(gains, float)  # (G, A, O)
        self.command = np.asarray(command, float)  # (G, A)
        self.n_policies = self.gains.shape[0]
        self.selected: list[list[int]] = []

    def reset(self, batch_size: int) -> None:
        pass

    def select(self, keep: np.ndarray) -> FeedbackPolicy:
        self.selected.append(list(keep))
        smaller = FeedbackPolicy(self.gains[keep], self.command[keep])
        smaller.selected = self.selected
        return smaller

    def act(self, obs: np.ndarray) -> np.ndarray:
        g = self.n_policies
        x = obs.reshape(g, -1, 1, obs.shape[1])  # (G, S, 1, O)
        u = self.command[:, None, :] + (x * self.gains[:, None]).sum(axis=3)
        return np.clip(u, -1.0, 1.0).reshape(obs.shape[0], -1)


CART_GAINS = np.array([[0.2, 0.4, 4.0, 0.6]])  # push towards the side the pole leans to


def cart_feedback(n_policies: int) -> FeedbackPolicy:
    return FeedbackPolicy(np.repeat(CART_GAINS[None], n_policies, axis=0), np.zeros((n_policies, 1)))


def test_identical_policies_see_identical_episodes():
    cart = make_physics("pretrial/CartPole-v0")
    sc = draw_scenarios(cart, 8, 5, ranges={"pole_mass": (0.05, 0.3), "sensor_noise_std": (0.0, 0.05),
                                            "actuator_lag_s": (0.0, 0.05)})
    for policy in (ConstantPolicy(3, 1), cart_feedback(3)):
        out = run_episodes(cart, policy, sc, max_steps=200)
        assert out.returns.shape == (3, 8)
        for name in ("returns", "success", "failure", "steps"):
            a = getattr(out, name)
            np.testing.assert_array_equal(a[1], a[0], err_msg=name)
            np.testing.assert_array_equal(a[2], a[0], err_msg=name)
        assert len(np.unique(out.returns[0])) > 1  # the scenarios do differ


def _assert_same_episode(batch, alone, i):
    for name in ("returns", "success", "failure", "steps"):
        np.testing.assert_array_equal(getattr(batch, name)[:, i], getattr(alone, name)[:, 0], err_msg=name)
    # a batch's trace runs until its last row ends; a row's own episode is its first `steps` periods
    for g in range(batch.steps.shape[0]):
        t = int(alone.steps[g, 0])
        row, row_alone = g * batch.steps.shape[1] + i, g
        for name, length in (("state", t + 1), ("obs", t), ("action", t)):
            np.testing.assert_array_equal(batch.trace[name][:length, row], alone.trace[name][:length, row_alone],
                                          err_msg=name)
        # and a finished row keeps its last state
        assert np.all(batch.trace["state"][t:, row] == batch.trace["state"][t, row])


@pytest.mark.parametrize("noise", [0.0, 0.02])
def test_scenario_in_a_batch_equals_it_alone_cartpole(noise):
    cart = make_physics("pretrial/CartPole-v0")
    ranges = {"cart_mass": (0.5, 2.0), "actuator_lag_s": (0.0, 0.04), "actuator_delay_s": (0.0, 0.05)}
    sc = draw_scenarios(cart, 6, 9, ranges=ranges, fixed={"sensor_noise_std": noise})
    # row 0 nominal in its actuator: its neighbours' lag and delay must not touch it
    sc.perturb["actuator_lag_s"][0] = 0.0
    sc.perturb["actuator_delay_s"][0] = 0.0
    policy = cart_feedback(1)
    batch = run_episodes(cart, policy, sc, max_steps=250, record=True)
    assert len(np.unique(batch.steps)) > 1 or len(np.unique(batch.returns)) > 1
    for i in range(len(sc)):
        alone = run_episodes(cart, policy, sc.subset(np.array([i])), max_steps=250, record=True)
        _assert_same_episode(batch, alone, i)
    if noise:
        # the noise reaches the policy, so the check above covers the sensor stream
        clean = run_episodes(cart, policy, Scenarios(sc.params, sc.start, sc.keys,
                                                     {**sc.perturb, "sensor_noise_std": np.zeros(len(sc))}),
                             max_steps=250, record=True)
        assert not np.array_equal(clean.trace["obs"], batch.trace["obs"])


@pytest.mark.parametrize("version", streams.STREAM_VERSIONS)
def test_scenario_in_a_batch_equals_it_alone_drone_pair_gusts(version):
    drone = make_physics("pretrial/DronePair-v0")
    mass, g, max_thrust = (drone.param_table[n].nominal for n in ("mass", "gravity", "max_thrust"))
    hover = 2.0 * mass * g / (2.0 * max_thrust) - 1.0  # two rotors carry m g: (a + 1) max_thrust / 2 = m g / 2
    sc = draw_scenarios(drone, 5, 21, ranges={"gust_std": (0.5, 2.0), "sensor_noise_std": (0.0, 0.05)})
    gains = np.zeros((2, 4, drone.obs_dim))
    gains[:, :, 1] = -0.05  # a little height feedback so that sensor noise matters
    policy = FeedbackPolicy(gains, np.full((2, 4), hover))
    batch = run_episodes(drone, policy, sc, max_steps=150, record=True, stream_version=version)
    gust = batch.trace["state"][:, :, 16:18]
    assert np.std(gust) > 0.1  # the gust process is running
    assert not np.array_equal(gust[:, 0], gust[:, 1])  # and differs between scenarios
    np.testing.assert_array_equal(batch.returns[0], batch.returns[1])  # two identical policies, same draws
    for i in (0, 3, 4):
        alone = run_episodes(drone, policy, sc.subset(slice(i, i + 1)), max_steps=150, record=True,
                             stream_version=version)
        _assert_same_episode(batch, alone, i)


def test_stream_version_changes_only_the_random_draws():
    # Sensor noise and gusts are drawn from the version's normals; a scenario without them runs
    # the same episode in every version, and one with them runs another draw of the same process.
    drone = make_physics("pretrial/DronePair-v0")
    sc = draw_scenarios(drone, 4, 8, ranges={"gust_std": (0.5, 2.0)},
                        fixed={"sensor_noise_std": np.array([0.0, 0.02, 0.0, 0.02])})
    sc.params[:2, drone.param_table.index("gust_std")] = 0.0  # rows 0: no randomness at all; 1: noise; 2, 3: gusts
    policy = ConstantPolicy(1, drone.action_dim, 0.2)
    runs = [run_episodes(drone, policy, sc, max_steps=60, record=True, stream_version=v)
            for v in streams.STREAM_VERSIONS]
    a, b = (r.trace["state"] for r in runs)
    np.testing.assert_array_equal(a[:, 0], b[:, 0])
    for row in (2, 3):
        assert not np.array_equal(a[:, row], b[:, row])
    oa, ob = (r.trace["obs"] for r in runs)
    np.testing.assert_array_equal(oa[:, 0], ob[:, 0])
    assert not np.array_equal(oa[:, 1], ob[:, 1])
    with pytest.raises(ValueError, match=r"^stream_version: 3 not one of 1, 2$"):
        run_episodes(drone, policy, sc, max_steps=5, stream_version=3)


def test_dropping_finished_policies_changes_no_result(monkeypatch):
    # Two policies that push the cart off the track at once and two that balance for a while: once the
    # first two have finished every scenario the engine drops them from the batch, which must change
    # nothing, for any mix of perturbed and nominal rows. (12 rows are fewer than the engine drops by
    # default, so the thresholds are lowered here; at the default the batch keeps them.)
    assert rollout.COMPACT_ROWS > 12 and rollout.DROP_ROWS > 6
    monkeypatch.setattr(rollout, "COMPACT_ROWS", 12)
    monkeypatch.setattr(rollout, "DROP_ROWS", 6)
    cart = make_physics("pretrial/CartPole-v0")
    sc = draw_scenarios(cart, 6, 33, ranges={"actuator_lag_s": (0.0, 0.03), "sensor_noise_std": (0.0, 0.02),
                                             "actuator_rate_limit": (20.0, 80.0)})
    sc.perturb["actuator_lag_s"][:2] = 0.0
    sc.perturb["actuator_rate_limit"][1:3] = np.inf
    gains = np.stack([np.zeros((1, 4)), CART_GAINS, np.zeros((1, 4)), 0.8 * CART_GAINS])
    command = np.array([[1.0], [0.0], [-1.0], [0.0]])

    def fresh() -> FeedbackPolicy:
        return FeedbackPolicy(gains, command)

    dropping = fresh()
    out = run_episodes(cart, dropping, sc, max_steps=300)
    assert dropping.selected == [[1, 3]]  # the shrinking did happen
    assert out.steps[[0, 2]].max() < out.steps[[1, 3]].max()
    whole = run_episodes(cart, fresh(), sc, max_steps=300, record=True)  # recording keeps every row
    monkeypatch.undo()
    keeping = fresh()
    kept = run_episodes(cart, keeping, sc, max_steps=300)
    assert keeping.selected == []  # too few rows to drop at the default threshold
    for name in ("returns", "success", "failure", "steps"):
        np.testing.assert_array_equal(getattr(out, name), getattr(whole, name), err_msg=name)
        np.testing.assert_array_equal(getattr(kept, name), getattr(whole, name), err_msg=name)
    for g in range(4):
        alone = run_episodes(cart, FeedbackPolicy(gains[g:g + 1], command[g:g + 1]), sc, max_steps=300)
        for name in ("returns", "success", "failure", "steps"):
            np.testing.assert_array_equal(getattr(out, name)[g], getattr(alone, name)[0], err_msg=name)
