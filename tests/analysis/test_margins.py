"""Loop margins (pretrial.margins) on textbook loops, cross-checked against python-control.

References: python-control 0.10 (``control.stability_margins``, ``control.disk_margins``) as the
general-purpose reference library; the Routh-Hurwitz criterion for the analytic gain limits;
Seiler, Packard & Gahinet 2020, "An introduction to disk margins" (IEEE Control Systems Magazine)
for the disk-margin definitions and their gain/phase ranges.
"""

from __future__ import annotations

import math

import control
import numpy as np
import pytest
from hypothesis import HealthCheck, assume, example, given, settings
from hypothesis import strategies as st

from pretrial.analysis.loop_margins import analyze_loop, disk_ranges, is_stable

RTOL = 1e-6


def _loop(num, den, dt=None):
    sys = control.tf(num, den) if dt is None else control.tf(num, den, dt)
    ss = control.ss(sys)
    return sys, analyze_loop(ss.A, ss.B, ss.C, dt=dt).channels[0]


def _reference_disk(sys, dt=None):
    omega = np.logspace(-3, 3, 40001) if dt is None else np.linspace(1e-5, math.pi / dt, 40001)
    return control.disk_margins(sys, omega)[0]


def test_third_order_type_one_loop():
    # L = k / (s (s + 1) (s + 2)): Routh on s^3 + 3 s^2 + 2 s + k gives stability for 0 < k < 6, so the
    # upper gain margin is 6 / k (classic textbook example, e.g. Ogata, Modern Control Engineering).
    k = 2.0
    sys, ch = _loop([k], [1, 3, 2, 0])
    assert ch.stable
    assert ch.gain_margin_high == pytest.approx(6.0 / k, rel=RTOL)
    assert ch.gain_margin_low == 0.0  # stable for every k > 0
    assert ch.gain_margin_db == pytest.approx(20 * math.log10(3.0), rel=RTOL)
    gm, pm, _, w180, wc, _ = control.stability_margins(sys)
    assert ch.gain_margin_high == pytest.approx(gm, rel=RTOL)
    assert ch.phase_margin_deg == pytest.approx(pm, rel=1e-8)
    assert ch.crossover_rad_s == pytest.approx(wc, rel=1e-8)
    assert ch.phase_crossovers_rad_s[0] == pytest.approx(w180, rel=1e-8)  # sqrt(2) analytically
    assert ch.delay_margin_s == pytest.approx(math.radians(pm) / wc, rel=1e-8)
    assert ch.disk_margin == pytest.approx(_reference_disk(sys), rel=1e-5)


def test_first_order_loop_has_infinite_gain_margin():
    # L = 2 / (s + 1): |L| = 1 at w = sqrt(3) where arg L = -60 deg, so PM = 120 deg; no phase crossover.
    # S = (s + 1) / (s + 3), |S - 1/2| rises to 1/2 as w -> inf, so the disk margin is 2 (upper disk gain
    # unbounded, phase +-90 deg; Seiler et al. 2020 ranges).
    sys, ch = _loop([2], [1, 1])
    assert ch.gain_margin_high is None and ch.gain_margin_low == 0.0
    assert math.isinf(ch.gain_margin_db)
    assert ch.phase_margin_deg == pytest.approx(120.0, rel=1e-9)
    assert ch.crossover_rad_s == pytest.approx(math.sqrt(3.0), rel=1e-9)
    assert ch.phase_margin_deg == pytest.approx(control.stability_margins(sys)[1], rel=1e-9)
    assert ch.disk_margin == pytest.approx(2.0, rel=1e-4)
    assert ch.disk_margin == pytest.approx(_reference_disk(sys), rel=1e-4)
    d = ch.to_dict()
    assert d["gain_margin_high"] is None and d["gain_margin_db"] is None


def test_open_loop_unstable_plant_has_a_lower_gain_margin():
    # L = 2 / (s - 1): closed loop s - 1 + 2k, stable for k > 1/2 (Routh), so the lower margin is 1/2;
    # |L| = 1 at w = sqrt(3) with arg L = -120 deg: PM 60 deg, delay margin (pi/3) / sqrt(3) s.
    sys, ch = _loop([2], [1, -1])
    assert ch.gain_margin_low == pytest.approx(0.5, rel=RTOL)
    assert ch.gain_margin_high is None
    assert ch.phase_margin_deg == pytest.approx(60.0, rel=1e-9)
    assert ch.delay_margin_s == pytest.approx((math.pi / 3) / math.sqrt(3.0), rel=1e-9)
    assert ch.gain_margin_low == pytest.approx(control.stability_margins(sys)[0], rel=RTOL)
    # S - 1/2 = (s - 3) / (2 (s + 1)) peaks at DC with 3/2: disk margin 2/3 analytically
    assert ch.disk_margin == pytest.approx(2.0 / 3.0, rel=1e-9)
    assert ch.disk_margin == pytest.approx(_reference_disk(sys), rel=1e-4)


def test_conditionally_stable_loop_has_both_gain_limits():
    # L = 2 (s + 1)^2 / (s^3 (0.1 s + 1)^2): stable only between two gains; both limits must match the
    # gains python-control finds at the two phase crossovers.
    sys, ch = _loop([2, 4, 2], [0.01, 0.2, 1, 0, 0, 0])
    gms = np.sort(control.stability_margins(sys, returnall=True)[0])
    assert ch.gain_margin_low == pytest.approx(gms[0], rel=RTOL)
    assert ch.gain_margin_high == pytest.approx(gms[1], rel=RTOL)
    assert ch.gain_margin_db == pytest.approx(min(20 * math.log10(gms[1]), -20 * math.log10(gms[0])), rel=RTOL)
    # the eigenvalue scan and the frequency-response crossings agree (no disagreement note)
    assert ch.notes == []
    low, high = ch.frequency_gain_margins
    assert low == pytest.approx(ch.gain_margin_low, rel=1e-6) and high == pytest.approx(ch.gain_margin_high, rel=1e-6)


def test_sampled_loop_against_python_control():
    # L(z) = (0.02 z + 0.01) / (z^2 - 1.6 z + 0.7), T = 0.05 s: a discrete textbook-style loop.
    dt = 0.05
    sys, ch = _loop([0.02, 0.01], [1, -1.6, 0.7], dt)
    gm = control.stability_margins(sys)[0]
    assert ch.gain_margin_high == pytest.approx(gm, rel=RTOL)
    assert ch.disk_margin == pytest.approx(_reference_disk(sys, dt), rel=1e-5)
    sys2, ch2 = _loop([0.4], [1, -1.2, 0.5], dt)
    gm2, pm2, _, _, wc2, _ = control.stability_margins(sys2)
    assert ch2.gain_margin_high == pytest.approx(gm2, rel=RTOL)
    assert ch2.phase_margin_deg == pytest.approx(pm2, rel=1e-7)
    assert ch2.delay_margin_s == pytest.approx(math.radians(pm2) / wc2, rel=1e-7)


def test_sampled_delay_margin_predicts_the_destabilizing_delay():
    # A loop with d whole periods of delay is z^-d L(z): it must be stable while d T is below the delay
    # margin and unstable just beyond (the phase lag w d T reaches the margin at the crossover).
    # L(z) = 0.05 / (z - 1), T = 0.05 s: a sampled integrator, delay margin about 31 periods.
    dt = 0.05
    sys, ch = _loop([0.05], [1, -1], dt)
    d_ok = int(ch.delay_margin_s / dt)
    assert d_ok == 30
    for d, expect in ((d_ok, True), (d_ok + 1, False)):
        delayed = control.ss(sys * control.tf([1], [1] + [0] * d, dt))
        assert is_stable(delayed.A - delayed.B @ delayed.C, dt)[0] is expect


def test_unstable_nominal_loop_is_flagged():
    # L = 10 (s + 2) / (s^2 (s + 1)): closed loop s^3 + s^2 + 10 s + 20 fails Routh (1 * 10 < 20).
    _, ch = _loop([10, 20], [1, 1, 0, 0])
    assert not ch.stable and "unstable" in ch.reason
    assert (ch.gain_margin_low, ch.gain_margin_high, ch.phase_margin_deg, ch.delay_margin_s, ch.disk_margin) == (
        1.0, 1.0, 0.0, 0.0, 0.0)
    assert ch.gain_margin_db == 0.0


def test_disk_ranges_follow_seiler_2020():
    # balanced disk (skew 0): gains [(1 - a/2)/(1 + a/2), (1 + a/2)/(1 - a/2)], phase +-2 atan(a/2)
    low, high, phase = disk_ranges(0.5)
    assert low == pytest.approx(0.75 / 1.25) and high == pytest.approx(1.25 / 0.75)
    assert phase == pytest.approx(math.degrees(2 * math.atan(0.25)))
    assert disk_ranges(2.5)[1] is None and disk_ranges(2.5)[0] == 0.0


def test_frequency_response_matches_python_control():
    sys, ch = _loop([2], [1, 3, 2, 0])
    w = np.logspace(-2, 2, 50)
    assert np.allclose(ch.frequency_response(w), sys(1j * w), rtol=1e-10)


def _satellite():
    # the spinning-body 2x2 example of python-control's disk_margins docstring (P = ss([[0, 10], [-10, 0]],
    # I, [[1, 10], [-10, 1]]), K = [[1, -2], [0, 1]]), a common disk-margin illustration (from memory)
    a = np.array([[0.0, 10.0], [-10.0, 0.0]])
    b = np.eye(2)
    cp = np.array([[1.0, 10.0], [-10.0, 1.0]])
    k = np.array([[1.0, -2.0], [0.0, 1.0]])
    return a, b, k @ cp  # loop at the plant input: u = -K y = -K C x


def test_multi_loop_disk_margin_bounds_and_guarantee():
    a, b, c = _satellite()
    res = analyze_loop(a, b, c)
    assert res.stable
    single = [ch.disk_margin for ch in res.channels]
    # simultaneous perturbations can only do more harm than one channel at a time
    assert res.multi_loop_disk_margin <= min(single) * (1 + 1e-9)
    # loop-at-a-time disk margins against python-control on the SISO loop with the other channel closed
    for i, ch in enumerate(res.channels):
        j = 1 - i
        ai = a - np.outer(b[:, j], c[j])
        sys = control.ss(ai, b[:, [i]], c[[i]], 0)
        assert ch.disk_margin == pytest.approx(_reference_disk(sys), rel=1e-4)
    # Seiler et al. 2020: every complex f_i in the disk D(alpha) in both channels at once keeps the loop
    # stable; the computed value is a lower bound of that alpha, so random draws inside must be stable
    alpha = res.multi_loop_disk_margin
    rng = np.random.default_rng(0)
    for _ in range(300):
        delta = rng.uniform(0, 1, 2) ** 0.5 * np.exp(2j * np.pi * rng.uniform(0, 1, 2))
        f = (1 + 0.999 * alpha * delta / 2) / (1 - 0.999 * alpha * delta / 2)
        ev = np.linalg.eigvals(a - b @ np.diag(f) @ c)
        assert ev.real.max() < 0


@st.composite
def _stable_loops(draw):
    n = draw(st.integers(1, 4))
    m = draw(st.integers(1, 2))
    seed = draw(st.integers(0, 2**31))
    rng = np.random.default_rng(seed)
    a = rng.normal(size=(n, n))
    b = rng.normal(size=(n, m))
    c = rng.normal(size=(m, n)) * draw(st.floats(0.1, 5.0))
    return a, b, c


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.filter_too_much])
@given(_stable_loops())
# found by hypothesis: the multi-loop peak sat past the grid's top frequency, at the 1/2 asymptote
@example(loop=(np.array([[-0.05972962, -0.50592545], [0.63655246, -1.32230448]]),
               np.array([[-0.72464793, -0.02872115], [-1.29312617, -0.09832514]]),
               np.array([[-1.94596236, -0.90635313], [-0.14953835, -1.23519089]])))
def test_random_stable_loops_are_consistent(loop):
    a, b, c = loop
    assume(is_stable(a - b @ c, None)[0])
    res = analyze_loop(a, b, c)
    for ch in res.channels:
        assert ch.stable
        # Seiler et al. 2020: the disk's gain interval lies inside the gain-margin interval, and its
        # phase range inside the phase margin
        assert ch.disk_gain_low >= ch.gain_margin_low * (1 - 1e-6) - 1e-9
        if ch.gain_margin_high is not None:
            assert ch.disk_gain_high is not None and ch.disk_gain_high <= ch.gain_margin_high * (1 + 1e-6)
        assert ch.disk_phase_deg <= ch.phase_margin_deg + 1e-6
        assert ch.delay_margin_s > 0
        # the eigenvalue scan: just inside the margins stable, just outside unstable
        ai = ch.a
        bc = np.outer(ch.b, ch.c)
        if ch.gain_margin_high is not None:
            assert is_stable(ai - 0.999 * ch.gain_margin_high * bc, None)[0]
            assert not is_stable(ai - 1.001 * ch.gain_margin_high * bc, None)[0]
        if ch.gain_margin_low > 1e-5:
            assert is_stable(ai - 1.001 * ch.gain_margin_low * bc, None)[0]
            assert not is_stable(ai - 0.999 * ch.gain_margin_low * bc, None)[0]
    assert res.multi_loop_disk_margin <= min(ch.disk_margin for ch in res.channels) * (1 + 1e-9)
