"""Plant parameters from bench logs: multiple-shooting output error, block bootstrap, identifiability.

The method, in the order :func:`calibrate` runs it:

* **Windows.** Each segment is cut into consecutive windows of ``L`` control periods (the last one
  of a segment may be shorter). Every window is simulated with the logged actions held over each
  period, through the plant's own ``Physics.transition`` (the same integrator, substeps and
  actuator map as every other pretrial command), from a start state fitted for it: multiple
  shooting, each window a shooting interval whose node state is estimated too. A start state
  taken as measured would carry its noise through the whole window, and on an unstable plant (a
  pole balanced upright) that biases the parameters by many standard deviations. The start
  states are fitted inside every evaluation (:data:`START_ITERATIONS` Gauss-Newton steps from the
  measured state, all windows at once: variable projection), so the solver sees the parameters
  only. All windows of all segments, and in the bootstrap all windows of every replicate, run as
  one batch.
* **Residuals.** Fitted minus measured start state, and simulated minus measured state at each of
  the ``L`` steps, each state divided by a robust scale: first the spread of the measured state
  itself (1.4826 x its median absolute deviation, MAD), then, for the final fit, 1.4826 x the MAD
  of that state's residuals at the first fit, floored at :data:`SCALE_FLOOR` of its spread (so a
  state predicted perfectly cannot take all the weight). The weights stay fixed in the bootstrap.
* **Fit.** ``scipy.optimize.least_squares`` (trust-region reflective) within each parameter's
  valid range, starting from the nominal values (or ``--guess``).
* **Uncertainty.** A block bootstrap: the units are whole segments when there are at least
  :data:`MIN_UNITS` of them, otherwise blocks of consecutive windows within segments, sized to give
  about :data:`MIN_UNITS` blocks. Units are drawn with replacement, each replicate is refitted from
  the estimate (all replicates as one ``least_squares`` problem with a block-diagonal Jacobian
  pattern), and the spread of the refits gives the standard deviation and the percentile 95%
  interval. Resampling whole units keeps the correlation of residuals inside them.
* **Identifiability.** A parameter is flagged when its bootstrap 95% interval spans more than
  :data:`FLAT_RANGE_SHARE` of its valid range or is wider than the estimate itself
  (:data:`FLAT_RELATIVE`), or when the Jacobian of the weighted residuals with
  respect to the parameters (columns scaled by each valid range; the start states fitted out) has
  a singular value below :data:`SINGULAR_RATIO` of the largest, and the parameter loads on that
  direction (|component| > :data:`FLAT_LOADING`).

Actuator names act as the sweep's :class:`~pretrial.sim.perturb.Loop` makes them act: the delay
shifts the command sequence, a fraction of a period by the exact two-phase period of
``Physics.transition``; the lag filters the delayed command once per period (the first-order
response at the period's end, held); the gain multiplies the physical output. Before a log starts
the command is taken as held at its first value.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from pretrial.calibration.benchlog import Segment
from pretrial.sim.perturb import PERTURBATIONS, split_delay
from pretrial_envs.core import Physics

#: generic perturbations a log of states and actions can tell
FITTABLE_ACTUATOR = ("actuator_gain", "actuator_lag_s", "actuator_delay_s")
#: robust scale of a normal sample from its median absolute deviation (common practice: 1 / Phi^-1(3/4))
MAD_TO_STD = 1.4826
#: a state's residual scale is at least this share of the state's own spread
SCALE_FLOOR = 1e-3
#: the bootstrap wants at least this many units to resample (segments, else blocks of windows)
MIN_UNITS = 20
#: flat direction: a bootstrap 95% interval wider than this share of the parameter's valid range
FLAT_RANGE_SHARE = 0.1
#: ... or wider than the estimate itself (its size taken as at least SCALE_FLOOR of the valid range)
FLAT_RELATIVE = 1.0
#: near-singular Jacobian: a singular value below this share of the largest (condition number above 1e6)
SINGULAR_RATIO = 1e-6
#: a parameter belongs to a flat direction when its share of the singular vector exceeds this
FLAT_LOADING = 0.3
#: Gauss-Newton steps that fit each window's start state inside every evaluation, and their finite-difference
#: step as a share of (|state| + its residual scale): the start moves by about the noise, a nearly linear step
START_ITERATIONS = 2
START_STEP = 1e-6
#: least_squares evaluations per fit (a fit that needs more stops there, and the output says it did not converge)
MAX_EVALUATIONS = 200
#: a weighted residual of a simulation that blew up (least_squares needs finite numbers)
BLOWN_UP = 1e6


@dataclass(frozen=True)
class Model:
    """The plant with its fixed values and the names being fitted.

    Attributes
    ----------
    physics : Physics
    base : (P,) array
        Physics parameters: nominal with ``--set`` applied.
    names : tuple of str
        Fitted names: physics parameters and :data:`FITTABLE_ACTUATOR` ones.
    actuator : dict of str to float
        Values of the actuator names not fitted (``--set`` or nominal).
    physical : (A,) bool array
        Actions logged in a physical unit (converted to the command through the plant's actuator map).
    start : (K,) array
        Where the fit starts (``--guess``, else the nominal values).
    """

    physics: Physics
    base: np.ndarray
    names: tuple[str, ...]
    actuator: dict[str, float]
    physical: np.ndarray
    start: np.ndarray

    @property
    def bounds(self) -> tuple[np.ndarray, np.ndarray]:
        specs = [self.spec(n) for n in self.names]
        return np.array([s.low for s in specs]), np.array([s.high for s in specs])

    def spec(self, name: str):
        table = self.physics.param_table
        return table[name] if name in table else PERTURBATIONS[name]


@dataclass(frozen=True)
class Windows:
    """Windows of the segments, padded to ``L`` steps; commands padded per segment.

    ``x0`` (W, S) measured start states, ``target`` (W, L, S) measured states after each step,
    ``mask`` (W, L) steps inside the segment, ``seg`` and ``start`` (W,) where each window starts,
    ``unit`` (W,) its bootstrap unit, ``commands`` (n_seg, T, A) logged actions (last one repeated
    past a segment's end), ``time`` (W, L) time of each target.
    """

    x0: np.ndarray
    target: np.ndarray
    mask: np.ndarray
    seg: np.ndarray
    start: np.ndarray
    unit: np.ndarray
    commands: np.ndarray
    time: np.ndarray

    @property
    def count(self) -> int:
        return len(self.x0)

    @property
    def weight(self) -> np.ndarray:
        """``mask`` as 1.0 / 0.0 (W, L)."""
        return self.mask.astype(float)

    @property
    def length(self) -> int:
        return self.target.shape[1]


def make_windows(segments: list[Segment], steps: int) -> Windows:
    """Cut ``segments`` into windows of ``steps`` control periods (the last of each may be shorter)."""
    lengths = np.array([len(s.t) for s in segments])
    if not (lengths >= 2).any():
        raise ValueError("no segment has two rows: nothing to fit")
    n_t = int(lengths.max())
    commands = np.stack([np.concatenate([s.actions, np.repeat(s.actions[-1:], n_t - len(s.t), axis=0)])
                         for s in segments])
    states = np.stack([np.concatenate([s.states, np.repeat(s.states[-1:], n_t - len(s.t), axis=0)])
                       for s in segments])
    times = np.stack([np.concatenate([s.t, np.full(n_t - len(s.t), s.t[-1])]) for s in segments])
    per_seg = np.maximum(0, -(-(lengths - 1) // steps))  # windows per segment: ceil((T - 1) / L)
    seg = np.repeat(np.arange(len(segments)), per_seg)
    start = (np.arange(per_seg.sum()) - np.repeat(np.cumsum(per_seg) - per_seg, per_seg)) * steps
    idx = start[:, None] + 1 + np.arange(steps)[None, :]
    mask = idx <= (lengths[seg] - 1)[:, None]
    idx = np.minimum(idx, n_t - 1)
    return Windows(states[seg, start], states[seg[:, None], idx], mask, seg, start,
                   _units(seg, len(segments)), commands, times[seg[:, None], idx])


def _units(seg: np.ndarray, n_seg: int) -> np.ndarray:
    """Bootstrap unit of each window: its segment, or a block of consecutive windows in it."""
    if n_seg >= MIN_UNITS:
        return seg.copy()
    block = max(1, len(seg) // MIN_UNITS)
    first = np.searchsorted(seg, seg)  # index of the segment's first window (seg is sorted)
    local = np.arange(len(seg)) - first
    key = seg * (len(seg) + 1) + local // block
    return np.unique(key, return_inverse=True)[1]


# --------------------------------------------------------------------------- #
# simulation
# --------------------------------------------------------------------------- #
def model_values(model: Model, theta: np.ndarray) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """Physics parameter rows (B, P) and actuator values (B,) per replicate from ``theta`` (B, K)."""
    table = model.physics.param_table
    params = np.tile(model.base, (len(theta), 1))
    actuator = {n: np.full(len(theta), v) for n, v in model.actuator.items()}
    for k, name in enumerate(model.names):
        if name in table:
            params[:, table.index(name)] = theta[:, k]
        else:
            actuator[name] = theta[:, k]
    return params, actuator


def _applied(model: Model, win: Windows, actuator: dict[str, np.ndarray]) -> np.ndarray:
    """Applied command sequences per replicate (B or 1, n_seg, T, A): delayed by whole periods, then lagged."""
    cmd = win.commands
    whole, _ = split_delay(actuator["actuator_delay_s"], model.physics.dt)
    lag = actuator["actuator_lag_s"]
    if not whole.any() and not (lag > 0).any():
        return cmd[None]
    n_t = cmd.shape[1]
    idx = np.maximum(np.arange(n_t)[None, :] - whole[:, None], 0)  # before the log: its first command held
    seq = np.moveaxis(cmd[:, idx], 1, 0)  # (B, n_seg, T, A)
    if (lag > 0).any():
        from scipy.signal import lfilter

        with np.errstate(over="ignore"):  # a lag far below dt is no lag: alpha = 1 (as perturb.Loop)
            alpha = np.where(lag > 0, -np.expm1(-model.physics.dt / np.where(lag > 0, lag, 1.0)), 1.0)
        seq = seq.copy()
        for b in np.flatnonzero(alpha < 1.0):  # one filter per replicate: its own time constant
            a = alpha[b]
            # u[k] = u[k-1] + a (c[k] - u[k-1]) with u[-1] = c[0]: at rest before the log
            seq[b] = lfilter([a], [1.0, a - 1.0], seq[b], axis=1, zi=(1.0 - a) * seq[b][:, :1])[0]
    return seq


def simulate(model: Model, win: Windows, theta: np.ndarray, rep: np.ndarray, rows: np.ndarray,
             x0: np.ndarray | None = None) -> np.ndarray:
    """Simulated states (N, L, S) of windows ``rows`` (N,) under replicate ``rep`` (N,) of ``theta`` (B, K).

    ``x0`` (N, S) are the start states (default: the measured ones).
    """
    physics = model.physics
    params_b, act_b = model_values(model, theta)
    seq = _applied(model, win, act_b)
    big = seq.shape[0] > 1
    steps = win.length
    k = win.start[rows][:, None] + np.arange(-1, steps)[None, :]  # the period before the window, then its own
    k = np.clip(k, 0, seq.shape[2] - 1)
    u = seq[rep[:, None] if big else 0, win.seg[rows][:, None], k]  # (N, L + 1, A) in logged units
    params = np.asfortranarray(params_b[rep])
    params.setflags(write=False)  # lets a plant keep its per-batch constants over the window
    u = to_command(model, u, params)
    _, frac = split_delay(act_b["actuator_delay_s"][rep], physics.dt)
    gain = act_b["actuator_gain"][rep][:, None]
    extra = {}
    if (gain != 1.0).any():
        extra["gain"] = gain
    switch = frac[:, None] if (frac > 0).any() else None
    n = len(rows)
    state = (win.x0[rows] if x0 is None else x0).copy()
    hold, count = np.zeros(n), np.zeros(n, dtype=np.int64)
    out = np.empty((n, steps, physics.state_dim))
    with np.errstate(all="ignore"):  # a blown-up window is a large residual, not an error
        for j in range(steps):
            if switch is not None:
                extra.update(earlier=u[:, j].copy(), switch=switch)
            state = physics.transition(state, u[:, j + 1].copy(), params, hold, count, None, **extra).state
            out[:, j] = state
    return out


def to_command(model: Model, u: np.ndarray, params: np.ndarray) -> np.ndarray:
    """Logged actions (N, L, A) as the normalized command: a physical unit through the inverse actuator map."""
    if not model.physical.any():
        return u
    zero = model.physics.actuate(np.zeros((len(params), u.shape[2])), params)
    one = model.physics.actuate(np.ones((len(params), u.shape[2])), params) - zero
    with np.errstate(divide="ignore", invalid="ignore"):
        conv = (u - zero[:, None, :]) / one[:, None, :]
    return np.where(model.physical, conv, u)


def check_actuation(model: Model, segments: list[Segment]) -> str | None:
    """Why the logged physical actions cannot be turned into commands (not affine, or past +-1); None if fine."""
    if not model.physical.any():
        return None
    physics, p = model.physics, model.base[None, :]
    a = physics.action_dim
    zero, one, minus = (physics.actuate(np.full((1, a), v), p)[0] for v in (0.0, 1.0, -1.0))
    for j in np.flatnonzero(model.physical):
        name, unit = physics.action_names[j], physics.action_units[j]
        if not np.isclose(zero[j] - minus[j], one[j] - zero[j], rtol=1e-9) or one[j] == zero[j]:
            return f"action {name}: the plant's actuator map is not affine; log the normalized command in [-1, 1]"
        for s in segments:
            c = (s.actions[:, j] - zero[j]) / (one[j] - zero[j])
            bad = np.flatnonzero(np.abs(c) > 1.0 + 1e-9)
            if bad.size:
                r = int(bad[0])
                return (f"{s.source}: row {s.first_row + r}, column {name}: {s.actions[r, j]:g} {unit} is beyond "
                        f"what the actuator gives at command +-1 ({minus[j]:g} to {one[j]:g} {unit}); "
                        "--set its limit (e.g. max_force) to the rig's")
    return None


# --------------------------------------------------------------------------- #
# residuals and fits
# --------------------------------------------------------------------------- #
@dataclass
class Problem:
    """Residuals of replicates of the windows: pair ``n`` is window ``rows[n]`` counted ``counts[n]`` times
    in replicate ``rep[n]``. The unknowns are ``theta`` (B, K); each evaluation first fits every pair's
    start state for its replicate's ``theta`` (:meth:`starts`), so the start states never reach the solver."""

    model: Model
    win: Windows
    scale: np.ndarray  # (S,) per-state residual scale
    rep: np.ndarray
    rows: np.ndarray
    counts: np.ndarray
    replicates: int = 1

    def residuals(self, z: np.ndarray) -> np.ndarray:
        theta = z.reshape(self.replicates, -1)
        x0, _ = self.starts(theta)
        out = self.pair_residuals(theta, x0, self.rep, self.rows)
        out *= np.sqrt(self.counts)[:, None, None]
        return out.ravel()

    def pair_residuals(self, theta: np.ndarray, x0: np.ndarray, rep: np.ndarray, rows: np.ndarray) -> np.ndarray:
        """Weighted residuals (N, L + 1, S) of windows ``rows`` started at ``x0``: the start, then each step."""
        pred = simulate(self.model, self.win, theta, rep, rows, x0)
        first = (x0 - self.win.x0[rows]) / self.scale
        return np.concatenate([first[:, None, :], weighted(pred, self.win, rows, self.scale)], axis=1)

    def starts(self, theta: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Each pair's fitted start state (N, S) under ``theta``, and the last Gauss-Newton step's size.

        :data:`START_ITERATIONS` Gauss-Newton steps from the measured state, all windows at once
        (forward differences: the S perturbed copies of every window run in the same batch). Always
        the same steps from the same place, so the result is a smooth function of ``theta`` that the
        solver's finite differences can differentiate.
        """
        s = self.model.physics.state_dim
        n = len(self.rows)
        x = self.win.x0[self.rows].copy()
        reps, rows = np.tile(self.rep, s + 1), np.tile(self.rows, s + 1)
        h = START_STEP * (np.abs(x) + self.scale)  # (N, S)
        step = np.zeros_like(x)
        for _ in range(START_ITERATIONS):
            trial = np.repeat(x[None], s + 1, axis=0)
            trial[1:] += np.eye(s)[:, None, :] * h[None]  # copy i + 1 moves state i
            r = self.pair_residuals(theta, trial.reshape(-1, s), reps, rows).reshape(s + 1, n, -1)
            jac = np.moveaxis((r[1:] - r[:1]) / np.moveaxis(h, 1, 0)[:, :, None], 0, 2)  # (N, R, S)
            jtj = np.swapaxes(jac, 1, 2) @ jac
            jtr = np.swapaxes(jac, 1, 2) @ r[0][:, :, None]
            step = -np.linalg.solve(jtj + 1e-12 * np.eye(s), jtr)[:, :, 0]  # jtj >= I / scale^2: never singular
            step = np.where(np.isfinite(step), step, 0.0)
            x = x + step
        return x, step

    def sparsity(self):
        """Jacobian pattern: a pair's residuals depend on its replicate's parameters only."""
        from scipy.sparse import csr_matrix

        k = len(self.model.names)
        per = (self.win.length + 1) * self.model.physics.state_dim
        n = len(self.rows)
        rr = np.repeat(np.arange(n * per), k)
        cc = (np.repeat(self.rep, per)[:, None] * k + np.arange(k)).ravel()
        return csr_matrix((np.ones(rr.size), (rr, cc)), shape=(n * per, self.replicates * k))


def weighted(pred: np.ndarray, win: Windows, rows: np.ndarray, scale: np.ndarray) -> np.ndarray:
    """(simulated - measured) / scale, zero past a segment's end; finite (a blown-up step is large)."""
    r = pred - win.target[rows]
    r /= scale
    if not np.isfinite(r).all():
        r = np.nan_to_num(r, nan=BLOWN_UP, posinf=BLOWN_UP, neginf=-BLOWN_UP)
        np.clip(r, -BLOWN_UP, BLOWN_UP, out=r)
    r *= win.weight[rows][:, :, None]
    return r


def spread(win: Windows) -> np.ndarray:
    """Robust spread of each measured state: 1.4826 MAD, else its standard deviation, else 1."""
    x = np.concatenate([win.x0, win.target[win.mask]])
    mad = MAD_TO_STD * np.median(np.abs(x - np.median(x, axis=0)), axis=0)
    std = x.std(axis=0)
    return np.where(mad > 0, mad, np.where(std > 0, std, 1.0))


def residual_scale(problem: Problem, theta: np.ndarray, floor: np.ndarray) -> np.ndarray:
    """1.4826 x the MAD of each state's residuals at ``theta`` (1, K), floored at ``SCALE_FLOOR`` x ``floor``."""
    x0, _ = problem.starts(theta)
    r = problem.pair_residuals(theta, x0, problem.rep, problem.rows) * problem.scale
    keep = np.concatenate([np.ones((len(problem.rows), 1), bool), problem.win.mask[problem.rows]], axis=1)
    r = r[keep]
    mad = MAD_TO_STD * np.median(np.abs(r - np.median(r, axis=0)), axis=0)
    return np.maximum(mad, SCALE_FLOOR * floor)


def fit(problem: Problem, theta0: np.ndarray):
    """``least_squares`` over every replicate of ``problem`` from ``theta0`` (B, K), within the valid ranges."""
    from scipy.optimize import least_squares

    low, high = problem.model.bounds
    b = problem.replicates
    lo, hi = np.tile(low, b), np.tile(high, b)
    z0 = np.clip(np.asarray(theta0, float).ravel(), lo, hi)
    # each parameter's own size (a thousandth of its range near 0) as its scale: the trust region is then
    # round in relative terms (x_scale="jac" took several times the steps)
    x_scale = np.tile(np.maximum(np.abs(problem.model.start), SCALE_FLOOR * (high - low)), b)
    options = dict(method="trf", x_scale=x_scale, ftol=1e-10, xtol=1e-10, gtol=1e-10, max_nfev=MAX_EVALUATIONS)
    if b > 1:  # replicates are independent: a block-diagonal pattern, one batch per finite difference
        options.update(jac_sparsity=problem.sparsity(), tr_solver="lsmr")
    return least_squares(problem.residuals, z0, bounds=(lo, hi), **options)


def single(model: Model, win: Windows, scale: np.ndarray) -> Problem:
    """The plain fit: every window once."""
    n = win.count
    return Problem(model, win, scale, np.zeros(n, dtype=np.int64), np.arange(n), np.ones(n))


def bootstrap_problem(model: Model, win: Windows, scale: np.ndarray, replicates: int,
                      rng: np.random.Generator) -> Problem:
    """Replicates drawn by resampling bootstrap units with replacement (each window weighted by its count)."""
    units = win.unit.max() + 1
    draws = rng.integers(0, units, size=(replicates, units))
    per_unit = np.zeros((replicates, units))
    np.add.at(per_unit, (np.repeat(np.arange(replicates), units), draws.ravel()), 1.0)
    counts = per_unit[:, win.unit]  # (B, W)
    rep, rows = np.nonzero(counts)
    return Problem(model, win, scale, rep, rows, counts[rep, rows], replicates)


# --------------------------------------------------------------------------- #
# the whole job
# --------------------------------------------------------------------------- #
@dataclass(frozen=True)
class Estimate:
    """What :func:`calibrate` finds."""

    names: tuple[str, ...]
    estimate: np.ndarray  # (K,)
    boot: np.ndarray  # (B, K) bootstrap refits
    std: np.ndarray
    ci95: np.ndarray  # (K, 2)
    correlation: np.ndarray  # (K, K)
    scale: np.ndarray  # (S,) residual scale per state
    flags: dict[str, str]  # name -> why it is not identifiable
    singular: np.ndarray  # singular values of the range-scaled weighted Jacobian
    units: int  # bootstrap units
    unit_kind: str  # "segments" or "blocks of N windows"
    converged: bool
    message: str


def calibrate(model: Model, win: Windows, replicates: int, seed: int) -> Estimate:
    """Fit ``model.names`` to the windows, then bootstrap; see the module docstring."""
    floor = spread(win)
    first_problem = single(model, win, floor)
    first = fit(first_problem, model.start[None, :])
    scale = residual_scale(first_problem, first.x[None, :], floor)
    final = fit(single(model, win, scale), first.x[None, :])
    theta = final.x
    if replicates > 0:
        prob = bootstrap_problem(model, win, scale, replicates, np.random.default_rng(seed))
        boot = fit(prob, np.tile(theta, (replicates, 1))).x.reshape(replicates, -1)
    else:
        boot = theta[None, :]
    std = boot.std(axis=0, ddof=1) if len(boot) > 1 else np.zeros(len(theta))
    ci = np.percentile(boot, [2.5, 97.5], axis=0).T
    singular, flags = identifiability(model, final.jac, theta, ci)
    units = int(win.unit.max()) + 1
    kind = "segments" if np.array_equal(win.unit, win.seg) else \
        f"blocks of up to {max(1, win.count // MIN_UNITS)} windows"
    return Estimate(model.names, theta, boot, std, ci, _correlation(boot), scale, flags, singular, units, kind,
                    bool(final.status > 0), str(final.message))


def _correlation(boot: np.ndarray) -> np.ndarray:
    """Correlation of the bootstrap refits; 0 off the diagonal where a parameter did not move."""
    k = boot.shape[1]
    if len(boot) < 3:
        return np.eye(k)
    with np.errstate(invalid="ignore", divide="ignore"):
        c = np.corrcoef(boot, rowvar=False).reshape(k, k)
    c = np.where(np.isfinite(c), c, 0.0)
    np.fill_diagonal(c, 1.0)
    return c


def identifiability(model: Model, jac: np.ndarray, estimate: np.ndarray,
                    ci: np.ndarray) -> tuple[np.ndarray, dict[str, str]]:
    """Singular values of the range-scaled Jacobian (start states already fitted out) and
    ``{name: reason}`` for each parameter the data do not pin down."""
    low, high = model.bounds
    width = high - low
    flags: dict[str, str] = {}
    for k, name in enumerate(model.names):
        spread_ = ci[k, 1] - ci[k, 0]
        size = max(abs(estimate[k]), SCALE_FLOOR * width[k])
        if spread_ > FLAT_RANGE_SHARE * width[k]:
            flags[name] = (f"bootstrap 95% interval spans {spread_ / width[k]:.0%} of its valid range "
                           f"(more than {FLAT_RANGE_SHARE:.0%})")
        elif min(estimate[k] - low[k], high[k] - estimate[k]) <= 1e-9 * width[k]:  # on a bound, to rounding
            flags[name] = (f"the fit ended at the edge of its valid range [{low[k]:g}, {high[k]:g}]: the data do not "
                           "hold it inside")
        elif spread_ > FLAT_RELATIVE * size:
            flags[name] = (f"bootstrap 95% interval [{ci[k, 0]:.4g}, {ci[k, 1]:.4g}] is wider than the estimate "
                           f"{estimate[k]:.4g} itself (more than {FLAT_RELATIVE:.0%} of it)")
    j = np.asarray(jac) * width[None, :]
    _, sv, vt = np.linalg.svd(j, full_matrices=False)
    top = sv[0] if len(sv) and sv[0] > 0 else 0.0
    for i, s in enumerate(sv):
        if top > 0 and s >= SINGULAR_RATIO * top:
            continue
        for k in np.flatnonzero(np.abs(vt[i]) > FLAT_LOADING):
            name = model.names[k]
            why = (f"the data barely move the fit along a direction it loads on (singular value {s:.2g} of "
                   f"{top:.2g}, below {SINGULAR_RATIO:g} of the largest: near-singular Jacobian)")
            flags[name] = f"{flags[name]}; {why}" if name in flags else why
    return sv, flags


def rmse(model: Model, win: Windows, theta: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Simulated trajectories (W, L, S) at ``theta`` (K,) and the RMS error of each state over them."""
    rows = np.arange(win.count)
    pred = simulate(model, win, theta[None, :], np.zeros(win.count, dtype=np.int64), rows)
    err = (pred - win.target)[win.mask]
    return pred, np.sqrt(np.mean(err * err, axis=0))
