"""The LQR baseline: a linear-quadratic regulator from the same linearization as the margins.

:func:`design_lqr` linearizes the plant at the target state held at rest
(``physics.target_state``, with the action that holds it solved for:
zero force for the cart-pole and the crane, hover thrust for the drones) with
the Coulomb friction terms left out (as :mod:`pretrial.analysis.linear` does), and
solves the continuous algebraic Riccati equation (``scipy.linalg.
solve_continuous_are``) for ``u = u* - K (x - x*)`` in physical input units.
The baseline controller is this continuous design applied at the control
period (sample and hold); no separate sampled design is made, so its sampled
loop has no LQR guarantee (the margins report says how much is left).

The design model keeps the states the observation determines. States with no
continuous dynamics (the drone gust) are left out; states that are not
observed but only follow the inputs through a stable lag (the drone rotor
thrusts) are residualized (singular perturbation: their lag is taken as
instantaneous), so the design (and its guarantee) covers the plant without
that lag; :func:`pretrial.analysis.linear.loop_report` on the policy gives the margins
with it. Any other unobserved state (e.g. the cart-pole's velocities with
``observe="positions"``) makes the design refuse: the baseline needs full-state
observations.

Default weights follow Bryson's rule (Bryson & Ho 1975, *Applied Optimal
Control*): ``Q_ii = 1 / x_i,max^2`` and ``R_jj = 1 / u_j,max^2``, with the
largest acceptable deviations taken from the task limits (see
:func:`bryson_limits`) and the largest input deviation the actuator range
allows from the holding input.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np
from scipy import linalg

from pretrial.analysis.linear import (
    EQUILIBRIUM_TOL,
    NotLinearizable,
    differences,
    equations_reason,
    held_states,
    linear_params,
    linear_plant,
    plant_model,
    resolve_params,
)
from pretrial.errors import InputError
from pretrial_envs.core import Physics, unknown_name_message

Array = np.ndarray

def bryson_limits(physics: Physics, p: Array) -> dict[str, float]:
    """Largest acceptable deviation per state name for Bryson's rule, from the task limits in ``p``.

    * cart-pole: cart position the track half-length, pole angles the fail angle;
    * crane: trolley position the distance from the target to the nearer end
      stop (at least the position tolerance), rope angle ``max_sway``, rope
      length the distance to the nearer hoist limit, rope speed
      ``max_hoist_speed``;
    * drones: x the distance from the goal to the field edge, z the distance to
      the ground or the ceiling, pitch ``pitch_limit``;
    * rates (``*_dot``, ``*_rate``) without their own limit: no task limit,
      so an unlimited deviation (weight 0). Weighting them by the position's
      limit per second instead made the designs far faster than the control
      period supports (closed-loop poles near -70 to -230 rad/s at 50 Hz);
    * anything else: 1 in the state's unit.
    """

    def par(name: str) -> float:
        return float(p[physics.param_table.index(name)])

    env = physics.env_id
    lim: dict[str, float] = {}
    if env == "pretrial/CartPole-v0":
        lim["x"] = par("track_half_length")
        for n in physics.state_names:
            if n.startswith("theta") and not n.endswith("_dot"):
                lim[n] = par("fail_angle")
    elif env == "pretrial/GantryCrane-v0":
        lim["x"] = max(par("rail_half_length") - abs(par("target_x")), par("position_tolerance"))
        lim["phi"] = par("max_sway")
        if "l" in physics.state_names:
            ln = par("rope_length")
            lim["l"] = max(min(ln - par("min_rope_length"), par("max_rope_length") - ln), 1e-3)
            lim["l_dot"] = par("max_hoist_speed")
    elif env == "pretrial/DronePair-v0":
        for i in (0, 1):
            lim[f"d{i}_x"] = max(par("field_half_width") - par("start_x"), par("goal_tolerance"))
            lim[f"d{i}_z"] = max(min(par("start_height"), par("field_height") - par("start_height")),
                                 par("goal_tolerance"))
            lim[f"d{i}_pitch"] = par("pitch_limit")
    for n in physics.state_names:
        if n in lim:
            continue
        if n.endswith(("_dot", "_rate")):
            lim[n] = math.inf  # no task limit on the rate: weight 0
        lim.setdefault(n, 1.0)
    return lim


def _hold_point(physics: Physics, x0: Array, a0: Array, p: Array, free: list[int]) -> tuple[Array, Array]:
    """The nearest rest point to ``(x0, a0)``: minimum-norm Newton steps on ``f(x, a) = 0`` (free states)."""
    x, a = x0.copy(), a0.copy()
    n, m = len(free), physics.action_dim
    pp = p[None, :]
    for _ in range(100):
        f = physics.model_derivatives(x[None, :], physics.actuate(a[None, :], pp), pp)[0][free]
        if np.max(np.abs(f), initial=0.0) <= 1e-10:
            return x, a
        model = plant_model(physics, x, a, p, free, [])
        jac = np.hstack([model.a, model.b])
        step = -np.linalg.pinv(jac) @ f
        x[free] += step[:n]
        a += step[n : n + m]
    f = physics.model_derivatives(x[None, :], physics.actuate(a[None, :], pp), pp)[0][free]
    if np.max(np.abs(f)) > EQUILIBRIUM_TOL:
        raise InputError(f"LQR baseline: no rest point of the plant near the target (residual {np.max(np.abs(f)):.3g})")
    return x, a


class LqrPolicy:
    """The LQR baseline as a batch policy: ``act(obs (B, O)) -> actions (B, A)`` in [-1, 1].

    ``a = clip(a* - G^-1 K (x_hat - x*), -1, 1)`` with ``x_hat`` recovered from
    the observation by least squares on ``d obs / d x`` (the observation is
    affine in the state for pretrial's plants), ``G = d input / d action``.
    Built by :func:`design_lqr`.
    """

    n_policies = 1
    feed_forward = True

    def __init__(self, *, physics: Physics, params: Array, state: Array, action: Array, design: list[int],
                 a: Array, b: Array, q: Array, r: Array, k: Array, recover: Array, obs_star: Array, du_da: Array,
                 notes: list[str]):
        self.env_id = physics.env_id
        self.env_options = physics.options()
        self.params = params
        self.state_names = tuple(physics.state_names)
        self.action_names = tuple(physics.action_names)
        self.action_units = tuple(physics.action_units)
        self.design_states = tuple(physics.state_names[j] for j in design)
        self.equilibrium_state = state
        self.equilibrium_action = action
        self.a, self.b, self.q, self.r, self.k = a, b, q, r, k
        self.notes = notes
        # one matrix from observation to action: a = a* - M (obs - obs*)
        self._obs_star = obs_star
        self._m = np.linalg.solve(du_da, k @ recover)
        self._recover = recover

    def reset(self, batch_size: int) -> None:
        """Nothing to clear (a static controller); present for the rollout engine."""

    def act(self, obs: Array) -> Array:
        """Actions (B, A) in [-1, 1] for observations (B, O)."""
        obs = np.asarray(obs, dtype=float)
        if obs.ndim != 2 or obs.shape[1] != self._obs_star.size:
            raise ValueError(f"observations of shape {obs.shape}: expected (B, {self._obs_star.size})")
        out = self.equilibrium_action - (obs - self._obs_star) @ self._m.T
        return np.clip(out, -1.0, 1.0, out=out)

    def closed_loop_poles(self) -> Array:
        """Eigenvalues of ``A - B K`` of the design model (continuous time)."""
        return np.linalg.eigvals(self.a - self.b @ self.k)

    def describe(self) -> dict[str, Any]:
        """Gains, weights, operating point and notes (JSON-friendly)."""
        poles = self.closed_loop_poles()
        return {
            "kind": "lqr",
            "env_id": self.env_id,
            "design_states": list(self.design_states),
            "actions": list(self.action_names),
            "gain": {"units": "physical input per state unit (u = u* - K (x - x*))",
                     "rows": {n: dict(zip(self.design_states, map(float, row), strict=True))
                              for n, row in zip(self.action_names, self.k, strict=True)}},
            "q": dict(zip(self.design_states, map(float, np.diag(self.q)), strict=True)),
            "r": dict(zip(self.action_names, map(float, np.diag(self.r)), strict=True)),
            "equilibrium_state": dict(zip(self.state_names, map(float, self.equilibrium_state), strict=True)),
            "equilibrium_action": dict(zip(self.action_names, map(float, self.equilibrium_action), strict=True)),
            "closed_loop_poles": [[float(p.real), float(p.imag)] for p in poles],
            "notes": list(self.notes),
        }


def _weights(kind: str, given: Mapping[str, float] | None, valid: tuple[str, ...], model: tuple[str, ...],
             default: dict[str, float], positive: bool) -> Array:
    w = dict(default)
    for name, value in (given or {}).items():
        if name not in valid:
            raise InputError(unknown_name_message(f"{kind} weight name", name, model))
        if name not in model:
            raise InputError(f"{kind} weight {name!r}: that state is not in the LQR design model "
                             f"(design states: {', '.join(model)})")
        try:
            v = float(value)
        except (TypeError, ValueError):
            raise InputError(f"{kind} weight {name!r}: {value!r} is not a number") from None
        if not math.isfinite(v) or v < 0 or (positive and v == 0):
            raise InputError(f"{kind} weight {name!r}: {value!r} must be a finite number {'>' if positive else '>='} 0")
        w[name] = v
    return np.diag([w[n] for n in model])


def design_lqr(
    physics: Physics,
    params: Mapping[str, float] | Array | None = None,
    q: Mapping[str, float] | None = None,
    r: Mapping[str, float] | None = None,
) -> LqrPolicy:
    """LQR baseline for ``physics`` around its target state.

    Parameters
    ----------
    physics : Physics
    params : mapping, (P,) array or None
        Physics parameters of the design (overrides, full vector or nominal).
    q : mapping of state name to weight, optional
        Diagonal state weights (1 / state unit^2); the others keep Bryson's rule.
    r : mapping of action name to weight, optional
        Diagonal input weights (1 / input unit^2, e.g. 1/N^2); the others keep Bryson's rule.

    Returns
    -------
    LqrPolicy

    Raises
    ------
    InputError
        Unknown weight names, observations that do not give the states the
        design needs, or a plant the Riccati equation cannot stabilize.
    """
    no_equations = equations_reason(physics)
    if no_equations:
        raise InputError(f"LQR baseline: {no_equations}")
    p = resolve_params(physics, params)
    p_lin, notes = linear_params(physics, p)
    physics, signs = linear_plant(physics)
    notes += signs
    target = physics.target_state(p_lin[None, :])[0]
    held = held_states(physics, target, p_lin)
    free = [j for j in range(physics.state_dim) if j not in held]
    names = physics.state_names
    if held:
        notes.append(f"{', '.join(names[j] for j in held)}: no continuous dynamics (disturbance states), "
                     "held at 0 and left out of the design")
    try:
        x_star, a_star = _hold_point(physics, target, np.zeros(physics.action_dim), p_lin, free)
        model = plant_model(physics, x_star, a_star, p_lin, free, held)
    except NotLinearizable as exc:
        raise InputError(f"LQR baseline: the plant is not linearizable at the target ({exc})") from None
    moved = [f"{names[j]} = {x_star[j]:.6g}" for j in free if abs(x_star[j] - target[j]) > 1e-9]
    if moved:
        notes.append("the plant cannot rest exactly at the target; designed around the nearest rest point: "
                     + ", ".join(moved))
    # observation map (affine for pretrial's plants): which states does it determine?
    def observe(xs: Array) -> Array:
        return physics.observe(xs, np.tile(p_lin, (len(xs), 1)))

    c_obs = differences(observe, x_star, free)[0]  # (O, free)
    obs_star = observe(x_star[None, :])[0]
    seen = [i for i in range(len(free)) if np.any(np.abs(c_obs[:, i]) > 1e-9)]
    hidden = [i for i in range(len(free)) if i not in seen]
    a_m, b_m = model.a, model.b
    if hidden:
        a22 = a_m[np.ix_(hidden, hidden)]
        # a hidden state can be residualized only if it just lags the inputs (no coupling from other states)
        lagging = not np.any(a_m[np.ix_(hidden, seen)]) and np.all(np.linalg.eigvals(a22).real < 0)
        if not lagging:
            missing = ", ".join(names[free[i]] for i in hidden)
            mode = physics.options().get("observe")
            hint = f" with observe={mode!r}" if mode is not None else ""
            raise InputError(f"the LQR baseline needs full-state observations for this env: {missing} not "
                             f"observed{hint}")
        a12 = a_m[np.ix_(seen, hidden)]
        b_r = b_m[seen] - a12 @ np.linalg.solve(a22, b_m[hidden])
        a_r = a_m[np.ix_(seen, seen)]
        notes.append(f"{', '.join(names[free[i]] for i in hidden)}: not observed; residualized (their lag taken as "
                     "instantaneous) in the design model, so the design's guarantee is for the plant without that lag")
        a_m, b_m = a_r, b_r
    design = [free[i] for i in seen]
    c_d = c_obs[:, seen]
    if np.linalg.matrix_rank(c_d, tol=1e-9 * max(1.0, float(np.abs(c_d).max()))) < len(seen):
        raise InputError("the LQR baseline needs full-state observations for this env: the observation does not "
                         "determine the state")
    recover = np.linalg.pinv(c_d)
    # physical-input Jacobian of the actuator map (affine): B above is per action unit
    du_da = differences(lambda a_rows: physics.actuate(a_rows, np.tile(p_lin, (len(a_rows), 1))), a_star,
                        list(range(physics.action_dim)))[0]
    b_phys = b_m @ np.linalg.inv(du_da)
    u_star = physics.actuate(a_star[None, :], p_lin[None, :])[0]
    u_hi = physics.actuate(np.ones((1, physics.action_dim)), p_lin[None, :])[0]
    u_lo = physics.actuate(-np.ones((1, physics.action_dim)), p_lin[None, :])[0]
    u_max = np.maximum(np.minimum(np.abs(u_hi - u_star), np.abs(u_star - u_lo)), 1e-9)
    limits = bryson_limits(physics, p)
    dnames = tuple(names[j] for j in design)
    qm = _weights("q", q, tuple(names), dnames, {n: 1.0 / limits[n] ** 2 for n in dnames}, positive=False)
    rm = _weights("r", r, tuple(physics.action_names), tuple(physics.action_names),
                  {n: 1.0 / float(v) ** 2 for n, v in zip(physics.action_names, u_max, strict=True)}, positive=True)
    try:
        pr = linalg.solve_continuous_are(a_m, b_phys, qm, rm)
    except (ValueError, np.linalg.LinAlgError) as exc:
        raise InputError(f"LQR baseline: the Riccati equation has no stabilizing solution for this plant ({exc})") \
            from None
    k = np.linalg.solve(rm, b_phys.T @ pr)
    if not np.all(np.linalg.eigvals(a_m - b_phys @ k).real < 0):
        raise InputError("LQR baseline: the design does not stabilize the linear model (weights too extreme?)")
    notes.append("continuous-time design (scipy.linalg.solve_continuous_are) applied at the control period "
                 f"{physics.dt:g} s with the action held (no sampled design)")
    notes.append("weights: Bryson's rule from the task limits unless given (q, r)")
    return LqrPolicy(physics=physics, params=p, state=x_star, action=a_star, design=design, a=a_m, b=b_phys, q=qm,
                     r=rm, k=k, recover=recover, obs_star=obs_star, du_da=du_da, notes=notes)
