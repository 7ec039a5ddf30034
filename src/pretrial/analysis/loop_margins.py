"""Stability margins of a feedback loop given in state space (pure linear algebra).

The loop is ``z' = A z + B u`` (or ``z[k+1] = A z[k] + B u[k]`` with sample
period ``dt``), ``y = C z``, closed by negative feedback ``u = -y``: with a
state-feedback controller ``u = -K x``, ``C = K`` and the loop transfer matrix
broken at the plant input is ``L(s) = C (sI - A)^-1 B`` (``s = e^{jwT}`` for a
sampled loop). The loop must be strictly proper (no direct feedthrough), which
holds for every plant-input loop pretrial builds.

Per channel i the loop is broken at that plant input while every other channel
stays closed (a "loop at a time" analysis), giving the scalar ``L_i``:

* gain margins: the closed loop with a real gain k on channel i is
  ``A - B diag(1, .., k, .., 1) C``; the lower and upper gain margins are the
  nearest k below and above 1 where an eigenvalue crosses the stability
  boundary, found by an eigenvalue scan (a geometric grid plus the gains
  ``-1 / L_i(jw)`` at the phase crossovers, then bisection). Gains up to
  ``GAIN_SCAN_LIMIT`` are scanned; beyond that the margin counts as infinite
  (``gain_margin_high`` None, ``gain_margin_low`` 0). The phase crossovers
  give the same gains from the frequency response; a disagreement is noted.
* phase margin: at every gain crossover ``|L_i(jw_c)| = 1``, the rotation of
  ``L_i(jw_c)`` to -1, ``|wrap(arg L_i + 180 deg)|``; the smallest is reported.
* delay margin: the phase *lag* that moves ``L_i(jw_c)`` to -1 divided by
  ``w_c``, the smallest over the crossovers, in seconds (for sampled loops too;
  there a delay acts in whole periods, so it is a bound, not a realisable delay).
* disk margin (Seiler, Packard & Gahinet 2020, "An introduction to disk
  margins", IEEE Control Systems Magazine 40(5)), balanced (skew sigma = 0):
  ``alpha = 1 / max_w |S_i - T_i| / 2`` with ``S_i = 1 / (1 + L_i)``,
  ``T_i = 1 - S_i``; the loop tolerates simultaneous gain and phase changes
  ``f = (1 + alpha delta / 2) / (1 - alpha delta / 2)``, ``|delta| <= 1``: gains
  ``[(1 - a/2)/(1 + a/2), (1 + a/2)/(1 - a/2)]`` (upper unbounded for
  ``alpha >= 2``) and phases ``+-2 atan(alpha / 2)``.
* multi-loop disk margin (same paper): independent perturbations in every
  channel at once. Its exact value needs the structured singular value
  ``mu`` of ``S - I/2`` (``S = (I + L)^-1``) for a diagonal complex block
  structure; this module computes the classical upper bound
  ``min_D sigma_max(D M D^-1)`` over positive diagonal scalings D (Osborne
  balancing at every grid frequency, numerical optimisation of D near the
  peaks), so the reported ``1 / max_w mu_upper`` is a guaranteed *lower*
  bound of the multi-loop disk margin at the grid frequencies.

An unstable nominal closed loop has no meaningful margins: every margin is
reported as 0 (gain factors 1) with ``stable`` False and the reason.

Frequency grids are log-spaced (``POINTS_PER_DECADE``) over the range the
loop's eigenvalues span, widened by two decades either side, with every
eigenvalue magnitude added; crossings are refined by root finding and peaks
by bounded scalar minimisation.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import optimize

Array = np.ndarray

#: largest loop-gain factor the eigenvalue scan tries (120 dB); beyond it a margin counts as infinite
GAIN_SCAN_LIMIT = 1e6
#: frequency grid density
POINTS_PER_DECADE = 80
#: eigenvalues with real part (continuous) or modulus - 1 (sampled) above minus this count as unstable
STABILITY_TOL = 1e-9


def _finite_or_none(v: float | None) -> float | None:
    if v is None:
        return None
    v = float(v)
    return v if math.isfinite(v) else None


def is_stable(a: Array, dt: float | None) -> tuple[bool, float]:
    """Whether ``a`` is a stable system matrix, and the abscissa (max Re eig, or max |eig| for sampled)."""
    if a.size == 0:
        return True, -math.inf if dt is None else 0.0
    ev = np.linalg.eigvals(a)
    if not np.all(np.isfinite(ev)):
        return False, math.inf
    if dt is None:
        worst = float(np.max(ev.real))
        return worst < -STABILITY_TOL, worst
    worst = float(np.max(np.abs(ev)))
    return worst < 1.0 - STABILITY_TOL, worst


def frequency_response(a: Array, b: Array, c: Array, omega: Array, dt: float | None = None) -> Array:
    """``C (sI - A)^-1 B`` at ``s = j omega`` (or ``e^{j omega dt}``), shape (F, p, m).

    ``omega`` in rad/s. Batched over the frequencies with one linear solve.
    """
    omega = np.atleast_1d(np.asarray(omega, dtype=float))
    n = a.shape[0]
    s = 1j * omega if dt is None else np.exp(1j * omega * dt)
    m = s[:, None, None] * np.eye(n)[None] - a[None]
    rhs = np.broadcast_to(b.astype(complex), (len(omega), *b.shape))
    with np.errstate(all="ignore"):
        try:
            x = np.linalg.solve(m, rhs)
        except np.linalg.LinAlgError:  # a frequency on a pole of the loop: infinite response there
            x = np.empty(rhs.shape, dtype=complex)
            for i in range(len(omega)):
                try:
                    x[i] = np.linalg.solve(m[i], rhs[i])
                except np.linalg.LinAlgError:
                    x[i] = np.inf
    return np.einsum("pn,fnm->fpm", c, x)


def _wrap180(deg: Array) -> Array:
    """Angles to (-180, 180]."""
    return 180.0 - np.mod(180.0 - deg, 360.0)


def disk_ranges(alpha: float) -> tuple[float, float | None, float]:
    """Gain range (low, high or None) and phase range (deg) of a balanced disk margin ``alpha`` (Seiler 2020)."""
    if not math.isfinite(alpha):
        return 0.0, None, 180.0
    h = 0.5 * alpha
    low = max(0.0, (1.0 - h) / (1.0 + h))
    high = (1.0 + h) / (1.0 - h) if h < 1.0 else None
    return low, high, math.degrees(2.0 * math.atan(h))


@dataclass
class LoopMargins:
    """Margins of one channel, broken at the plant input with the other channels closed.

    Gain margins are factors on the loop gain (``gain_margin_low`` 0 and
    ``gain_margin_high`` None mean no limit in that direction); phases in
    degrees; frequencies in rad/s; delays in seconds.
    """

    name: str
    a: Array = field(repr=False)
    b: Array = field(repr=False)
    c: Array = field(repr=False)
    dt: float | None
    stable: bool
    reason: str | None = None
    gain_margin_low: float = 1.0
    gain_margin_high: float | None = 1.0
    phase_margin_deg: float = 0.0
    delay_margin_s: float = 0.0
    disk_margin: float = 0.0
    crossover_rad_s: float | None = None
    phase_crossovers_rad_s: tuple[float, ...] = ()
    gain_crossovers_rad_s: tuple[float, ...] = ()
    disk_peak_rad_s: float | None = None
    frequency_gain_margins: tuple[float, float | None] | None = None
    notes: list[str] = field(default_factory=list)

    @property
    def gain_margin_db(self) -> float:
        """The smaller of ``20 log10(high)`` and ``-20 log10(low)`` (inf when both sides are unlimited)."""
        up = math.inf if self.gain_margin_high is None else 20.0 * math.log10(self.gain_margin_high)
        down = math.inf if self.gain_margin_low <= 0 else -20.0 * math.log10(self.gain_margin_low)
        return min(up, down)

    @property
    def disk_gain_low(self) -> float:
        return disk_ranges(self.disk_margin)[0]

    @property
    def disk_gain_high(self) -> float | None:
        return disk_ranges(self.disk_margin)[1]

    @property
    def disk_phase_deg(self) -> float:
        return disk_ranges(self.disk_margin)[2]

    def frequency_response(self, omega: Array) -> Array:
        """``L_i`` at the frequencies ``omega`` (rad/s), complex (F,), for Nyquist and Bode plots."""
        return frequency_response(self.a, self.b[:, None], self.c[None, :], omega, self.dt)[:, 0, 0]

    def to_dict(self) -> dict[str, Any]:
        """JSON-friendly entry (None for infinite or undefined values)."""
        return {
            "channel": self.name,
            "gain_margin_low": _finite_or_none(self.gain_margin_low),
            "gain_margin_high": _finite_or_none(self.gain_margin_high),
            "gain_margin_db": _finite_or_none(self.gain_margin_db),
            "phase_margin_deg": _finite_or_none(self.phase_margin_deg),
            "delay_margin_s": _finite_or_none(self.delay_margin_s),
            "disk_margin": _finite_or_none(self.disk_margin),
            "disk_gain_low": _finite_or_none(self.disk_gain_low),
            "disk_gain_high": _finite_or_none(self.disk_gain_high),
            "disk_phase_deg": _finite_or_none(self.disk_phase_deg),
            "crossover_rad_s": _finite_or_none(self.crossover_rad_s),
            "gain_crossovers_rad_s": [float(w) for w in self.gain_crossovers_rad_s],
            "phase_crossovers_rad_s": [float(w) for w in self.phase_crossovers_rad_s],
            "disk_peak_rad_s": _finite_or_none(self.disk_peak_rad_s),
            "stable": self.stable,
            "reason": self.reason,
            "sampled": self.dt is not None,
            "notes": list(self.notes),
        }


@dataclass
class LoopAnalysis:
    """Margins of every channel of a loop, plus the multi-loop disk margin."""

    channels: list[LoopMargins]
    multi_loop_disk_margin: float
    stable: bool
    closed_loop_poles: Array = field(repr=False)
    dt: float | None = None
    reason: str | None = None

    def multi_loop_ranges(self) -> dict[str, float | None]:
        low, high, phase = disk_ranges(self.multi_loop_disk_margin)
        return {
            "disk_margin": _finite_or_none(self.multi_loop_disk_margin),
            "disk_gain_low": _finite_or_none(low),
            "disk_gain_high": _finite_or_none(high),
            "disk_phase_deg": _finite_or_none(phase),
        }


# --------------------------------------------------------------------------- #
# frequency grid and crossings
# --------------------------------------------------------------------------- #
def frequency_grid(matrices: Sequence[Array], dt: float | None) -> Array:
    """Log-spaced grid (rad/s) covering the eigenvalue magnitudes of ``matrices``, widened two decades."""
    mags = []
    for m in matrices:
        if m.size:
            ev = np.linalg.eigvals(m)
            if dt is not None:  # z -> s = log(z) / dt, the equivalent continuous frequency
                ev = np.log(ev[ev != 0].astype(complex)) / dt  # z = 0 (pure delays) has no frequency
            mags.append(np.abs(ev))
    mag = np.concatenate(mags) if mags else np.array([1.0])
    mag = mag[np.isfinite(mag) & (mag > 1e-8)]
    if mag.size == 0:
        mag = np.array([1.0])
    lo = 10.0 ** (math.floor(math.log10(mag.min())) - 2)
    hi = 10.0 ** (math.ceil(math.log10(mag.max())) + 2)
    lo = max(lo, 1e-6)
    if dt is not None:
        hi = math.pi / dt
        lo = min(lo, hi * 1e-4)
    else:
        hi = min(max(hi, lo * 1e3), 1e8)
    n = max(2, int(math.ceil(math.log10(hi / lo) * POINTS_PER_DECADE)) + 1)
    grid = np.geomspace(lo, hi, n)
    extra = mag[(mag > lo) & (mag < hi)]
    return np.unique(np.concatenate([grid, extra]))


def _roots_on_grid(fun, grid: Array, values: Array) -> list[float]:
    """Roots of a real function of frequency between grid points where ``values`` change sign."""
    roots = []
    sign = np.sign(values)
    for i in np.flatnonzero(sign[:-1] * sign[1:] < 0):
        try:
            roots.append(float(optimize.brentq(fun, grid[i], grid[i + 1], xtol=1e-14, rtol=1e-12, maxiter=200)))
        except (ValueError, RuntimeError):
            continue
    roots.extend(float(w) for w in grid[sign == 0])
    return sorted(roots)


def _refine_max(fun, grid: Array, values: Array, top: int = 4) -> tuple[float, float]:
    """Largest value of ``fun`` near the ``top`` largest local maxima of ``values`` on ``grid``."""
    values = np.where(np.isfinite(values), values, np.inf)
    if np.isinf(values).any():
        i = int(np.argmax(values))
        return math.inf, float(grid[i])
    best_i = np.argsort(values)[::-1][:top]
    best_v, best_w = float(values[best_i[0]]), float(grid[best_i[0]])
    for i in best_i:
        lo, hi = grid[max(i - 1, 0)], grid[min(i + 1, len(grid) - 1)]
        if hi <= lo:
            continue
        res = optimize.minimize_scalar(
            lambda lw: -fun(math.exp(lw)), bounds=(math.log(lo), math.log(hi)), method="bounded",
            options={"xatol": 1e-10},
        )
        v = -float(res.fun)
        if v > best_v:
            best_v, best_w = v, math.exp(float(res.x))
    return best_v, best_w


# --------------------------------------------------------------------------- #
# one channel
# --------------------------------------------------------------------------- #
def _scan_gain(a_i: Array, bc: Array, dt: float | None, candidates: Sequence[float], upward: bool) -> float | None:
    """Nearest gain factor above (``upward``) or below 1 where ``a_i - k bc`` loses stability (None: none)."""

    def stable(k: float) -> bool:
        return is_stable(a_i - k * bc, dt)[0]

    if upward:
        trial = list(np.geomspace(1.0, GAIN_SCAN_LIMIT, 121)[1:])
        trial += [k * f for k in candidates if 1.0 < k <= GAIN_SCAN_LIMIT for f in (1 - 1e-7, 1 + 1e-7)]
        trial = sorted(t for t in trial if t > 1.0)
    else:
        # stops at 1 / GAIN_SCAN_LIMIT: k = 0 opens the channel, which leaves e.g. an integrator marginal
        trial = list(np.geomspace(1.0, 1.0 / GAIN_SCAN_LIMIT, 121)[1:])
        trial += [k * f for k in candidates if 1.0 / GAIN_SCAN_LIMIT <= k < 1.0 for f in (1 - 1e-7, 1 + 1e-7)]
        trial = sorted((t for t in trial if 1.0 / GAIN_SCAN_LIMIT <= t < 1.0), reverse=True)
    good = 1.0
    for k in trial:
        if stable(k):
            good = k
            continue
        bad = k
        for _ in range(200):  # bisection on the boundary, geometric where both ends are positive
            mid = math.sqrt(good * bad) if good > 0 and bad > 0 else 0.5 * (good + bad)
            if stable(mid):
                good = mid
            else:
                bad = mid
            if abs(bad - good) <= 1e-11 * max(abs(good), abs(bad), 1e-300):
                break
        return 0.5 * (good + bad)
    return None if upward else 0.0


def _channel(name: str, a: Array, b: Array, c: Array, i: int, dt: float | None, grid: Array) -> LoopMargins:
    m = b.shape[1]
    others = [j for j in range(m) if j != i]
    a_i = a - b[:, others] @ c[others, :] if others else a.copy()
    b_i, c_i = b[:, i].copy(), c[i, :].copy()
    bc = np.outer(b_i, c_i)
    out = LoopMargins(name, a_i, b_i, c_i, dt, stable=False)
    ok, worst = is_stable(a_i - bc, dt)
    if not ok:
        kind = "max |eigenvalue|" if dt is not None else "max real part of the eigenvalues"
        out.reason = f"nominal closed loop unstable ({kind} {worst:.6g}): margins are not meaningful"
        return out
    out.stable = True

    def resp(w: float | Array) -> Array:
        return out.frequency_response(np.atleast_1d(w))

    lw = resp(grid)
    finite = np.isfinite(lw)
    # phase crossovers: Im L = 0 with Re L < 0; candidate boundary gains -1 / L
    im = np.where(finite, lw.imag, np.nan)
    w180 = [w for w in _roots_on_grid(lambda w: float(resp(w)[0].imag), grid, np.nan_to_num(im)) if resp(w)[0].real < 0]
    cand = [float(-1.0 / resp(w)[0].real) for w in w180 if resp(w)[0].real != 0]
    # L is real at DC (s = 0, z = 1) and, sampled, at the Nyquist frequency (z = -1)
    points = [(0.0, np.eye(len(b_i)) * (0.0 if dt is None else 1.0) - a_i)]
    if dt is not None:
        points.append((math.pi / dt, -np.eye(len(b_i)) - a_i))
    for w, mat in points:
        try:
            v = float(c_i @ np.linalg.solve(mat, b_i))
        except np.linalg.LinAlgError:
            continue
        if v < 0 and math.isfinite(v):
            w180.append(w)
            cand.append(-1.0 / v)
    w180 = sorted(set(w180))
    out.phase_crossovers_rad_s = tuple(w180)
    out.gain_margin_high = _scan_gain(a_i, bc, dt, cand, upward=True)
    low = _scan_gain(a_i, bc, dt, cand, upward=False)
    out.gain_margin_low = 0.0 if low is None else low
    f_high = min((k for k in cand if k > 1.0), default=None)
    f_low = max((k for k in cand if 1.0 / GAIN_SCAN_LIMIT <= k < 1.0), default=0.0)
    out.frequency_gain_margins = (f_low, f_high)
    for label, eig_k, freq_k in (("upper", out.gain_margin_high, f_high), ("lower", out.gain_margin_low, f_low)):
        if eig_k is None and freq_k is None:
            continue
        if eig_k is None or freq_k is None or abs(eig_k - freq_k) > 1e-4 * max(abs(eig_k), abs(freq_k), 1e-12):
            out.notes.append(
                f"{label} gain margin: eigenvalue scan {eig_k} and frequency-response crossings {freq_k} disagree "
                "(the eigenvalue scan is reported)"
            )

    # gain crossovers |L| = 1: phase and delay margins
    mag = np.where(finite, np.abs(lw), np.inf)
    logmag = np.log(np.where(mag > 0, mag, 1e-300))
    wc = _roots_on_grid(lambda w: float(np.log(max(abs(resp(w)[0]), 1e-300))), grid, np.nan_to_num(logmag, posinf=1e3))
    out.gain_crossovers_rad_s = tuple(wc)
    if wc:
        ang = np.degrees(np.angle(resp(np.array(wc))))
        pm = np.abs(_wrap180(ang + 180.0))
        lag = np.mod(ang + 180.0, 360.0)  # phase lag (deg) a delay must add to reach -1
        j = int(np.argmin(pm))
        out.phase_margin_deg = float(pm[j])
        out.crossover_rad_s = float(wc[j])
        out.delay_margin_s = float(np.min(np.radians(lag) / np.array(wc)))
    else:
        out.phase_margin_deg = math.inf
        out.delay_margin_s = math.inf

    # balanced disk margin: 1 / max |S - 1/2|
    def half_st(w: float) -> float:
        v = resp(w)[0]
        return float(abs(1.0 / (1.0 + v) - 0.5)) if np.isfinite(v) else 0.5

    with np.errstate(divide="ignore", invalid="ignore"):
        st = np.where(finite, np.abs(1.0 / (1.0 + lw) - 0.5), 0.5)
    peak, w_peak = _refine_max(half_st, grid, st)
    # the supremum may sit at DC (s = 0, z = 1) or, continuous and strictly proper, at w -> inf (value 1/2)
    dc = points[0][1]
    try:
        v0 = float(c_i @ np.linalg.solve(dc, b_i))
        if abs(1.0 / (1.0 + v0) - 0.5) > peak:
            peak, w_peak = abs(1.0 / (1.0 + v0) - 0.5), 0.0
    except (np.linalg.LinAlgError, ZeroDivisionError):
        pass
    if dt is None and peak < 0.5:
        peak, w_peak = 0.5, math.inf
    out.disk_margin = 0.0 if peak == math.inf else 1.0 / peak
    out.disk_peak_rad_s = w_peak
    return out


# --------------------------------------------------------------------------- #
# several channels: mu upper bound for the multi-loop disk margin
# --------------------------------------------------------------------------- #
def _osborne(m: Array, sweeps: int = 30) -> Array:
    """Diagonal scalings d (F, n) that balance the off-diagonal row and column norms of each m (F, n, n)."""
    f, n, _ = m.shape
    d = np.ones((f, n))
    absm = np.abs(m) ** 2
    absm[:, np.arange(n), np.arange(n)] = 0.0
    for _ in range(sweeps):
        for i in range(n):
            scale = d / d[:, i : i + 1]  # entries d_i m_ij / d_j
            row = np.einsum("fj,fj->f", absm[:, i, :], 1.0 / scale**2)
            col = np.einsum("fj,fj->f", absm[:, :, i], scale**2)
            ok = (row > 0) & (col > 0)
            d[ok, i] *= (col[ok] / row[ok]) ** 0.25
    return d


def _scaled_norm(m: Array, d: Array) -> Array:
    dm = d[..., :, None] * m / d[..., None, :]
    return np.linalg.svd(dm, compute_uv=False)[..., 0]


def _mu_upper(m: Array, d0: Array) -> float:
    """``min_D sigma_max(D m D^-1)`` for one matrix, from the scaling ``d0``."""
    n = m.shape[0]
    if n == 1:
        return float(abs(m[0, 0]))
    x0 = np.log(d0[1:] / d0[0])

    def obj(x: Array) -> float:
        d = np.concatenate([[1.0], np.exp(np.clip(x, -50, 50))])
        return float(_scaled_norm(m, d))

    res = optimize.minimize(obj, x0, method="Nelder-Mead", options={"xatol": 1e-8, "fatol": 1e-12, "maxiter": 2000})
    return min(float(res.fun), obj(x0))


def _multi_loop(a: Array, b: Array, c: Array, dt: float | None, grid: Array) -> float:
    m = b.shape[1]

    def half_s(w: Array) -> Array:
        lw = frequency_response(a, b, c, w, dt)
        eye = np.eye(m)[None]
        with np.errstate(all="ignore"):
            return np.linalg.inv(eye + lw) - 0.5 * eye

    ms = half_s(grid)
    if not np.all(np.isfinite(ms)):
        ms = np.nan_to_num(ms, nan=0.0, posinf=0.0, neginf=0.0)
    d = _osborne(ms)
    bound = _scaled_norm(ms, d)
    # continuous and strictly proper: (I + L)^-1 - I/2 -> I/2 as w -> inf, whose mu is 1/2, wherever the grid ends
    floor = 0.5 if dt is None else 0.0
    if m == 1:
        peak, _ = _refine_max(lambda w: float(abs(half_s(np.array([w]))[0, 0, 0])), grid, bound)
        peak = max(peak, floor)
        return 1.0 / peak if peak > 0 else math.inf

    def mu_at(w: float) -> float:
        mw = half_s(np.array([w]))
        return _mu_upper(mw[0], _osborne(mw)[0])

    # optimised scalings only near the peaks (each valid D gives an upper bound at its frequency)
    best = 0.0
    for i in np.argsort(bound)[::-1][:3]:
        lo, hi = grid[max(i - 1, 0)], grid[min(i + 1, len(grid) - 1)]
        res = optimize.minimize_scalar(lambda lw: -mu_at(math.exp(lw)), bounds=(math.log(lo), math.log(hi)),
                                       method="bounded", options={"xatol": 1e-6})
        best = max(best, -float(res.fun), mu_at(float(grid[i])))
    # elsewhere the Osborne bound stands; the maximum over all is an upper bound of max mu on the grid
    top = set(np.argsort(bound)[::-1][:3].tolist())
    rest = [bound[k] for k in range(len(grid)) if k not in top]
    peak = max([best, *rest, floor])
    return 1.0 / peak if peak > 0 else math.inf


# --------------------------------------------------------------------------- #
# entry point
# --------------------------------------------------------------------------- #
def analyze_loop(
    a: Array,
    b: Array,
    c: Array,
    *,
    dt: float | None = None,
    names: Sequence[str] | None = None,
) -> LoopAnalysis:
    """Margins of the loop ``z' = A z + B u, u = -C z`` broken at each input channel.

    Parameters
    ----------
    a : (n, n) array
    b : (n, m) array
        Input matrix of the plant input channels (the break points).
    c : (m, n) array
        What the loop feeds back: ``u = -C z`` closes it (``C = K`` for ``u = -K x``).
    dt : float, optional
        Sample period in seconds for a discrete-time loop; None for continuous time.
    names : sequence of str, optional
        Channel names (default ``u0, u1, ...``).

    Returns
    -------
    LoopAnalysis
    """
    a = np.atleast_2d(np.asarray(a, dtype=float))
    b = np.asarray(b, dtype=float).reshape(a.shape[0], -1)
    c = np.asarray(c, dtype=float).reshape(b.shape[1], a.shape[0])
    if dt is not None and not (dt > 0 and math.isfinite(dt)):
        raise ValueError(f"dt: {dt!r} must be a positive number (or None for continuous time)")
    m = b.shape[1]
    names = [f"u{i}" for i in range(m)] if names is None else list(names)
    if len(names) != m:
        raise ValueError(f"names: {len(names)} given for {m} channels")
    acl = a - b @ c
    ok, worst = is_stable(acl, dt)
    poles = np.linalg.eigvals(acl) if acl.size else np.zeros(0, complex)
    grid = frequency_grid([a, acl], dt)
    channels = [_channel(names[i], a, b, c, i, dt, grid) for i in range(m)]
    if not ok:
        kind = "max |eigenvalue|" if dt is not None else "max real part of the eigenvalues"
        reason = f"nominal closed loop unstable ({kind} {worst:.6g}): margins are not meaningful"
        return LoopAnalysis(channels, 0.0, False, poles, dt, reason)
    multi = channels[0].disk_margin if m == 1 else _multi_loop(a, b, c, dt, grid)
    return LoopAnalysis(channels, multi, True, poles, dt)
