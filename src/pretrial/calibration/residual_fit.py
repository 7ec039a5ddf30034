"""A residual of the equations of motion from bench logs, after the physical parameters.

The calibrated physics (:mod:`pretrial.calibration.fit`) leaves an error the parameters cannot
absorb: effects the equations do not contain. :func:`fit_residual` learns a correction of the
derivatives, linear in a feature library of the state and action
(:class:`pretrial_envs.residual.Library`), by **output error over the calibration's windows**:

* the fit segments are cut into the calibration's windows
  (:func:`~pretrial.calibration.fit.make_windows`), each simulated from its start state with the
  logged actions through the plant's own integrator at the calibrated parameters;
* the sensitivities of every simulated step to each coefficient and to the window's start state
  are taken by central differences through the same integrator (a plant carrying the residual
  with one coefficient moved);
* each window's start correction is projected out of its rows (variable projection, as the
  calibration fits start states near the measured ones), and the coefficients solve the
  linearized least-squares problem (each state's error divided by the calibration's robust
  residual scale) with a ridge penalty on the coefficients of standardized features, the penalty
  chosen from a grid by cross-validation over bootstrap units (whole segments when there are
  enough, else blocks of consecutive windows): held-out windows are never fitted on;
* :data:`GAUSS_NEWTON` passes, each linearized where the last one ended (coefficients and starts).

A one-step error would be simpler but is dominated by measurement noise (the correction acts over
one period only) and its regressors carry the same noise as its targets; over a window the
missing effect accumulates and the features are evaluated along the simulated, noise-free path.

The corrected states are the rates of other states (``d position / dt = velocity`` is exact, the
accelerations are what the physics can miss; :func:`pretrial.calibration.benchlog.kinematic_pairs`). The
validation is multi-step: the same windows and error as the calibration's, simulated with and
without the residual.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from pretrial.calibration.benchlog import Segment, kinematic_pairs
from pretrial.calibration.fit import START_STEP, Model, Windows, make_windows, rmse, simulate, to_command
from pretrial_envs.core import Physics
from pretrial_envs.residual import MARGIN, SIGN_SCALE, Envelope, Library, Residual

#: ridge penalties tried, as multiples of the samples' count (features standardized to unit RMS)
PENALTIES = np.logspace(-9.0, 1.0, 21)
#: Gauss-Newton passes: linearize the windows in the coefficients, solve the ridge problem, again from there
GAUSS_NEWTON = 3
#: cross-validation folds (at most; fewer when there are fewer units)
FOLDS = 5
#: central-difference step of a coefficient: this many units of the state's residual scale per second
#: squared of correction (a nearly linear step; the prediction is linear in the coefficients to first order)
STEP_SCALE = 1.0


@dataclass(frozen=True)
class ResidualFit:
    """What :func:`fit_residual` finds."""

    residual: Residual
    penalty: float  # chosen ridge penalty (multiple of the sample count, standardized features)
    penalties: np.ndarray  # the grid
    cv_error: np.ndarray  # mean held-out weighted one-step error per penalty (RMS)
    folds: int
    samples: int
    fold_kind: str


def with_residual(physics: Physics, residual: Residual | None) -> Physics:
    """``physics`` rebuilt with ``residual`` (None: without one), every other option kept."""
    options = {k: v for k, v in physics.options().items() if k != "residual"}
    if residual is not None:
        options["residual"] = residual
    return type(physics)(**options)


def outputs_of(physics: Physics) -> tuple[int, ...]:
    """States whose derivatives a residual corrects: the rates of other states, else every state."""
    rates = kinematic_pairs(physics)
    cols = tuple(j for j, n in enumerate(physics.state_names) if n in rates)
    return cols or tuple(range(physics.state_dim))


def applied_inputs(model: Model, theta: np.ndarray, segments: list[Segment]) -> np.ndarray:
    """Physical inputs (T, A) the plant's derivatives see over ``segments``: the logged actions through the
    actuator map, times the actuator gain (states (T, S) are the segments' own)."""
    from pretrial.calibration.fit import model_values

    params, act = model_values(model, theta[None, :])
    u = np.concatenate([s.actions for s in segments])[None]
    cmd = to_command(model, u, params)[0]
    cmd = np.clip(cmd, -1.0, 1.0)
    force = model.physics.actuate(cmd, np.repeat(params, len(cmd), axis=0))
    return force * act["actuator_gain"][0]


def envelope_of(physics: Physics, segments: list[Segment], inputs: np.ndarray, margin: float) -> Envelope:
    """Per-variable range of the fitted states and physical inputs."""
    z = np.concatenate([np.concatenate([s.states for s in segments]), inputs], axis=1)
    return Envelope(tuple(physics.state_names) + tuple(physics.action_names), z.min(axis=0), z.max(axis=0),
                    float(margin))


def _predict(model: Model, win: Windows, theta: np.ndarray, residual: Residual | None,
             x0: np.ndarray) -> np.ndarray:
    """Simulated windows (W, L, S) from ``x0`` with ``residual`` added to the physics (None: without)."""
    n = win.count
    hybrid = replace(model, physics=with_residual(model.physics, residual))
    return simulate(hybrid, win, theta[None, :], np.zeros(n, dtype=np.int64), np.arange(n), x0)


def _start_sensitivity(model: Model, win: Windows, theta: np.ndarray, residual: Residual, x0: np.ndarray,
                       scale: np.ndarray) -> np.ndarray:
    """Derivative (W, L, S, S) of the simulated windows in each window's start state (central differences)."""
    n_s = model.physics.state_dim
    h = START_STEP * (np.abs(x0) + scale)
    jac = np.empty((*win.target.shape, n_s))
    for j in range(n_s):
        pm = []
        for sign in (1.0, -1.0):
            x = x0.copy()
            x[:, j] += sign * h[:, j]
            pm.append(_predict(model, win, theta, residual, x))
        jac[..., j] = (pm[0] - pm[1]) / (2.0 * h[:, j])[:, None, None]
    return jac


def _sensitivity(model: Model, win: Windows, theta: np.ndarray, residual: Residual, x0: np.ndarray,
                 scale: np.ndarray, feat_rms: np.ndarray) -> np.ndarray:
    """Derivative (W, L, S, K, F) of the simulated windows in each coefficient, at ``residual``'s coefficients."""
    coef0 = residual.coefficients
    k_out, f_n = coef0.shape
    jac = np.empty((*win.target.shape, k_out, f_n))
    for k in range(k_out):
        step = STEP_SCALE * scale[residual.outputs[k]]
        for f in range(f_n):
            delta = step / feat_rms[f]
            pm = []
            for sign in (1.0, -1.0):
                coef = coef0.copy()
                coef[k, f] += sign * delta
                pm.append(_predict(model, win, theta, replace(residual, coefficients=coef), x0))
            jac[..., k, f] = (pm[0] - pm[1]) / (2.0 * delta)
    return jac


def _folds(win: Windows) -> tuple[np.ndarray, int, str]:
    """Fold of each window: its bootstrap unit, dealt round-robin into at most :data:`FOLDS` folds."""
    units = int(win.unit.max()) + 1
    folds = min(FOLDS, units)
    kind = "segments" if np.array_equal(win.unit, win.seg) else "blocks of consecutive windows"
    return win.unit % folds, folds, kind


def _ridge(a: np.ndarray, y: np.ndarray, penalty: float) -> np.ndarray:
    n, p = a.shape
    return np.linalg.solve(a.T @ a + penalty * n * np.eye(p), a.T @ y)


def _cross_validate(a: np.ndarray, y: np.ndarray, fold: np.ndarray, folds: int) -> np.ndarray:
    """RMS held-out error of the ridge solution for each penalty of :data:`PENALTIES`."""
    cv = np.zeros(len(PENALTIES))
    for i, lam in enumerate(PENALTIES):
        sq, count = 0.0, 0
        for g in range(folds):
            test = fold == g
            if folds > 1:
                r = y[test] - a[test] @ _ridge(a[~test], y[~test], lam)
            else:  # one unit: nothing to hold out, the penalty is judged on the fit itself
                r = y - a @ _ridge(a, y, lam)
            sq += float(r @ r)
            count += r.size
        cv[i] = np.sqrt(sq / max(count, 1))
    return cv


def fit_residual(model: Model, theta: np.ndarray, segments: list[Segment], scale: np.ndarray, steps: int,
                 degree: int = 2, sign_scale: float = SIGN_SCALE, margin: float = MARGIN) -> ResidualFit:
    """Fit a residual of ``model``'s derivatives at parameters ``theta`` (K,) to ``segments``.

    Parameters
    ----------
    model : Model
        The plant and the fitted names (as calibrated).
    theta : (K,) array
        The calibrated values of ``model.names``.
    segments : list of Segment
        The fit data (not the held-out segments).
    scale : (S,) array
        Per-state error scale (the calibration's robust residual scale): the weight of each state.
    steps : int
        Window length in control periods (the calibration's).
    degree, sign_scale : int, float
        The feature library (:class:`~pretrial_envs.residual.Library`).
    margin : float
        The envelope's default widening, a share of each variable's span.
    """
    physics = model.physics
    library = Library(tuple(physics.state_names), tuple(physics.state_units), tuple(physics.action_names),
                      degree, sign_scale)
    outputs = outputs_of(physics)
    inputs = applied_inputs(model, theta, segments)
    envelope = envelope_of(physics, segments, inputs, margin)
    states = np.concatenate([s.states for s in segments])
    feat_rms = np.sqrt(np.mean(library.features(states, inputs) ** 2, axis=0))
    feat_rms = np.where(feat_rms > 0, feat_rms, 1.0)
    win = make_windows(segments, steps)
    fold, folds, kind = _folds(win)
    residual = Residual(library, outputs, np.zeros((len(outputs), library.size)), envelope)
    x0 = win.x0.copy()
    n_w, n_s, n_c = win.count, physics.state_dim, len(outputs) * library.size
    step_w = np.concatenate([np.ones((n_w, 1)), win.weight], axis=1)[:, :, None]  # (W, L + 1, 1)
    for _ in range(GAUSS_NEWTON):
        # Linearized multiple shooting, per window: the start prior (start - measured) / scale, then every
        # step's (measured - simulated) / scale, in the coefficients (standardized) and the window's start.
        pred = _predict(model, win, theta, residual, x0)
        jc = _sensitivity(model, win, theta, residual, x0, scale, feat_rms) / feat_rms  # in beta = C feat_rms
        jx = _start_sensitivity(model, win, theta, residual, x0, scale)
        a = np.concatenate([np.zeros((n_w, 1, n_s, n_c)), jc.reshape(n_w, win.length, n_s, n_c)], axis=1)
        g = np.concatenate([np.broadcast_to(np.eye(n_s), (n_w, 1, n_s, n_s)), jx], axis=1)
        beta0 = (residual.coefficients * feat_rms).ravel()
        y = np.concatenate([(win.x0 - x0)[:, None, :], win.target - pred], axis=1)
        y = y + a @ beta0  # (W, L + 1, S): the linearized model is y = a beta + g d
        a = (a / scale[:, None] * step_w[..., None]).reshape(n_w, -1, n_c)
        g = (g / scale[:, None] * step_w[..., None]).reshape(n_w, -1, n_s)
        y = (y / scale * step_w).reshape(n_w, -1)
        # each window's start correction d is projected out (variable projection): its rows stay its own
        q, _ = np.linalg.qr(g)
        qt = np.swapaxes(q, 1, 2)
        pa = a - q @ (qt @ a)
        py = y - (q @ (qt @ y[:, :, None]))[:, :, 0]
        rows = np.repeat(fold, pa.shape[1])
        cv = _cross_validate(pa.reshape(-1, n_c), py.reshape(-1), rows, folds)
        best = int(np.argmin(cv))
        beta = _ridge(pa.reshape(-1, n_c), py.reshape(-1), float(PENALTIES[best]))
        r = y - (a @ beta)
        x0 = x0 + np.linalg.solve(np.swapaxes(g, 1, 2) @ g, (np.swapaxes(g, 1, 2) @ r[:, :, None]))[:, :, 0]
        residual = replace(residual, coefficients=beta.reshape(len(outputs), library.size) / feat_rms)
    return ResidualFit(residual, float(PENALTIES[best]), PENALTIES.copy(), cv, folds, int(win.mask.sum()), kind)


def validate(model: Model, theta: np.ndarray, residual: Residual, win: Windows) -> tuple[np.ndarray, np.ndarray]:
    """Multi-step RMS error per state on ``win`` (as the calibration's validation): physics alone, then hybrid."""
    _, plain = rmse(model, win, theta)
    hybrid = replace(model, physics=with_residual(model.physics, residual))
    _, with_res = rmse(hybrid, win, theta)
    return plain, with_res
