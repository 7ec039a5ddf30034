"""Closed-loop equilibrium, linearization and loop margins of a policy on a plant.

The loop is the plant ``dx/dt = f(x, actuate(a), p)`` (``physics.model_derivatives``: the physics
plus a learned residual, if the plant has one) with the controller ``a = policy.act(observe(x))``. :func:`loop_report`

1. sets the Coulomb friction parameters (``physics.coulomb_params``) to 0 for
   the linear model: a sign function has no derivative at rest, so stick-slip
   is outside what a linearization can say (reported in the notes);
2. holds states whose derivative is identically zero (the drone gust, which
   ``advance_disturbance`` moves once per period) at their target value and
   leaves them out of the unknowns and the model;
3. solves ``f(x*, actuate(policy(observe(x*)))) = 0`` near
   ``physics.target_state`` (scipy least squares). Evolved policies rarely
   output exactly the holding action at the target, so the equilibrium may sit
   off the target (reported). Without an equilibrium the nominal loop is
   simulated from the target and the report says whether it settles,
   oscillates (a limit cycle) or leaves the operating region;
4. linearizes the plant and the controller by central differences and checks
   them against one-sided differences (a kink, e.g. a ReLU at its corner or a
   limit, makes them disagree: "not linearizable");
5. refuses a saturated output (``|a| >= 1 - 1e-9``) or a channel whose local
   gain is zero, naming the channel;
6. hands the loop, broken at each actuator channel (action units, which give
   the same gain factors as the physical input), to :mod:`pretrial.analysis.loop_margins`.

``sampled=True`` analyses the loop as it runs: the exact zero-order-hold
discretization of the plant at the control period ``physics.dt``, the
controller at the sampling instants, and ``delay_steps`` whole periods of input
delay (an augmented state of past actions).

Recurrent policies have their own state, advanced once per control period: a
discrete-time dynamic controller. The continuous loop is then "not
linearizable"; so, for now, is the sampled one (the network state is not yet
exposed for differentiation, future work).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import linalg, optimize

from pretrial.analysis.loop_margins import LoopMargins, analyze_loop
from pretrial.errors import InputError
from pretrial_envs.core import Physics, jacobians

Array = np.ndarray

#: an action this close to +-1 is at the actuator clip (not linearizable there)
SATURATION_TOL = 1e-9
#: equilibrium accepted when every free state derivative is below this (state units per second)
EQUILIBRIUM_TOL = 1e-7
#: relative finite-difference step (times max(1, |value|)), as pretrial_envs.core.jacobians
FD_STEP = 1e-6
#: forward and backward differences may differ by this, relative to the largest entry, before a kink is declared
KINK_TOL = 1e-3


class NotLinearizable(Exception):
    """The loop has no linearization at its equilibrium; the message says why."""


# --------------------------------------------------------------------------- #
# parameters and the linear model's plant
# --------------------------------------------------------------------------- #
def resolve_params(physics: Physics, params: Mapping[str, float] | Array | None) -> Array:
    """Parameter vector (P,) from None (nominal), a mapping of overrides, or a (P,) array."""
    if params is None or isinstance(params, Mapping):
        try:
            return physics.param_table.resolve(params)
        except ValueError as exc:
            raise InputError(str(exc)) from None
    p = np.asarray(params, dtype=float).reshape(-1)
    if p.shape != (len(physics.param_table),):
        raise InputError(f"params: expected {len(physics.param_table)} values, got {p.size}")
    return p.copy()


def linear_params(physics: Physics, p: Array) -> tuple[Array, list[str]]:
    """``p`` with the Coulomb friction parameters set to 0, and a note on what was left out."""
    out = p.copy()
    notes = []
    zeroed = []
    for name in physics.coulomb_params:
        i = physics.param_table.index(name)
        if out[i] != 0.0:
            zeroed.append(f"{name} = {out[i]:g}")
        out[i] = 0.0
    if zeroed:
        notes.append(
            f"Coulomb friction left out of the linear model ({', '.join(zeroed)} set to 0): a sign function has no "
            "derivative at rest, so stick-slip and hunting are not in these margins"
        )
    return out, notes


def linear_plant(physics: Physics) -> tuple[Physics, list[str]]:
    """The plant a linear model is taken of: a learned residual's smooth signs left out, as Coulomb friction is.

    Returns ``physics`` itself when it has no residual with sign terms, else a shallow copy whose residual has
    them at 0, and a note saying so.
    """
    res = getattr(physics, "residual", None)
    if res is None or not res.has_signs:
        return physics, []
    import copy

    smooth = copy.copy(physics)
    smooth.residual = res.without_signs()
    return smooth, ["the learned residual's smooth signs tanh(v/scale) (dry friction) left out of the linear model, "
                    "as Coulomb friction is"]


def equations_reason(physics: Physics) -> str | None:
    """Why ``physics`` cannot be linearized at all (no equations of motion), or None."""
    if type(physics).derivatives is Physics.derivatives:
        return (f"{physics.env_id} gives no equations of motion (a plain gymnasium env, stepped as a black box); "
                "linear margins and the LQR baseline need a physics-core plant")
    return None


def held_states(physics: Physics, x: Array, p: Array) -> list[int]:
    """States whose derivative is identically zero (checked at random points near ``x``)."""
    rng = np.random.default_rng(0)
    n = 16
    xs = x[None, :] + 0.1 * np.maximum(1.0, np.abs(x))[None, :] * rng.standard_normal((n, x.size))
    a = rng.uniform(-1.0, 1.0, (n, physics.action_dim))
    pp = np.tile(p, (n, 1))
    with np.errstate(all="ignore"):
        f = physics.model_derivatives(xs, physics.actuate(a, pp), pp)
    return [j for j in range(x.size) if np.all(f[:, j] == 0.0)]


def differences(fun: Callable[[Array], Array], x0: Array, cols: list[int]) -> tuple[Array, Array, Array]:
    """Central, forward and backward differences of the batched ``fun`` (N, n) -> (N, k) in columns ``cols``."""
    h = FD_STEP * np.maximum(1.0, np.abs(x0[cols]))
    k = len(cols)
    pts = np.tile(x0, (2 * k + 1, 1))
    pts[np.arange(k), cols] += h
    pts[k + np.arange(k), cols] -= h
    f = fun(pts)
    plus, minus, mid = f[:k], f[k : 2 * k], f[2 * k]
    central = ((plus - minus) / (2 * h[:, None])).T
    forward = ((plus - mid) / h[:, None]).T
    backward = ((mid - minus) / h[:, None]).T
    return central, forward, backward


def _check_kink(what: str, fwd: Array, bwd: Array, rows: list[str], cols: list[str]) -> None:
    scale = max(1.0, float(np.max(np.abs(fwd + bwd))) / 2)
    gap = np.abs(fwd - bwd)
    if gap.size and gap.max() > KINK_TOL * scale:
        i, j = np.unravel_index(int(np.argmax(gap)), gap.shape)
        raise NotLinearizable(
            f"{what}: central and one-sided differences disagree at d {rows[i]} / d {cols[j]} "
            f"(forward {fwd[i, j]:.6g}, backward {bwd[i, j]:.6g}): a kink or switch at the equilibrium"
        )


@dataclass
class PlantModel:
    """Plant linearized at ``(state, action)``: ``dx/dt = A dx + B da`` on the ``free`` states, da in action units."""

    state: Array  # (S,) full state of the operating point
    action: Array  # (A,)
    params: Array  # (P,) the linear model's parameters (Coulomb terms 0)
    free: list[int]
    held: list[int]
    a: Array
    b: Array
    notes: list[str] = field(default_factory=list)


def plant_model(physics: Physics, x: Array, action: Array, p_lin: Array, free: list[int],
                held: list[int]) -> PlantModel:
    """Central-difference A, B (``pretrial_envs.core.jacobians``), checked against one-sided differences."""
    force = physics.actuate(action[None, :], p_lin[None, :])[0]
    jac_a, jac_b = jacobians(physics, x, force, p_lin, eps=FD_STEP)
    names = list(physics.state_names)
    _, fa, ba = differences(lambda xs: physics.model_derivatives(xs, np.tile(force, (len(xs), 1)),
                                                            np.tile(p_lin, (len(xs), 1))), x, free)
    _check_kink("plant", fa[free], ba[free], [names[i] for i in free], [names[i] for i in free])
    anames = list(physics.action_names)
    acts = list(range(physics.action_dim))

    def by_action(a_rows: Array) -> Array:
        pp = np.tile(p_lin, (len(a_rows), 1))
        return physics.model_derivatives(np.tile(x, (len(a_rows), 1)), physics.actuate(a_rows, pp), pp)

    c_u, fu, bu = differences(by_action, action, acts)
    _check_kink("plant", fu[free], bu[free], [names[i] for i in free], anames)
    # B in action units from the actuator map: d force / d action times the force Jacobian
    du_da = differences(lambda a_rows: physics.actuate(a_rows, np.tile(p_lin, (len(a_rows), 1))), action, acts)[0]
    b = jac_b @ du_da
    if not np.allclose(b[free], c_u[free], rtol=1e-4, atol=1e-8 * max(1.0, float(np.abs(b).max()))):
        raise NotLinearizable("plant: input Jacobian through the actuator map disagrees with direct differences")
    return PlantModel(x.copy(), action.copy(), p_lin, free, held, jac_a[np.ix_(free, free)], b[free])


# --------------------------------------------------------------------------- #
# closed-loop equilibrium
# --------------------------------------------------------------------------- #
def _controller(physics: Physics, policy: Any, p: Array) -> Callable[[Array], Array]:
    def act(xs: Array) -> Array:
        obs = physics.observe(xs, np.tile(p, (len(xs), 1)))
        return np.asarray(policy.act(obs), dtype=float)

    return act


def _closed_residual(physics: Physics, act: Callable[[Array], Array], base: Array, free: list[int],
                     p: Array) -> Callable[[Array], Array]:
    def res(z: Array) -> Array:
        x = base.copy()
        x[free] = z
        a = act(x[None, :])
        with np.errstate(all="ignore"):
            f = physics.model_derivatives(x[None, :], physics.actuate(a, p[None, :]), p[None, :])[0]
        return np.where(np.isfinite(f[free]), f[free], 1e12)

    return res


def _solve(res: Callable[[Array], Array], z0: Array) -> tuple[Array, float]:
    try:
        sol = optimize.least_squares(res, z0, xtol=1e-15, ftol=1e-15, gtol=1e-15, max_nfev=200 * (len(z0) + 1))
        z = sol.x
    except (ValueError, np.linalg.LinAlgError):
        return z0, math.inf
    r = res(z)
    return z, float(np.max(np.abs(r))) if r.size else 0.0


def _simulate(physics: Physics, act: Callable[[Array], Array], x0: Array, p: Array, held: list[int],
              seconds: float) -> tuple[Array, int, int]:
    """Nominal closed loop from ``x0`` (held states fixed); trajectory (T+1, S), failure code, steps."""
    x = x0[None, :].copy()
    pp = p[None, :]
    traj = [x[0].copy()]
    steps = max(1, int(round(seconds / physics.dt)))
    for k in range(steps):
        a = np.clip(act(x), -1.0, 1.0)
        force = physics.actuate(a, pp)
        with np.errstate(all="ignore"):
            x = physics.integrate(x, force, pp)
        x[:, held] = x0[held]
        traj.append(x[0].copy())
        if not np.all(np.isfinite(x)) or np.max(np.abs(x)) > 1e9:
            return np.array(traj), physics.diverged_code, k + 1
        code = int(physics.check(x, force, pp)[0])
        if code:
            return np.array(traj), code, k + 1
    return np.array(traj), 0, steps


def closed_loop_equilibrium(physics: Physics, policy: Any, p_lin: Array) -> tuple[Array, Array, list[int],
                                                                                  list[str]]:
    """Equilibrium ``(x*, a*)`` of the nominal closed loop near the target, the held states and notes.

    Raises
    ------
    NotLinearizable
        No equilibrium near the target (with what a simulation from the target does instead).
    """
    target = physics.target_state(p_lin[None, :])[0]
    held = held_states(physics, target, p_lin)
    free = [j for j in range(physics.state_dim) if j not in held]
    notes = []
    if held:
        notes.append(
            f"states {', '.join(physics.state_names[j] for j in held)} have no continuous dynamics (moved once per "
            "control period by a disturbance process): held at their target value and left out of the linear model"
        )
    act = _controller(physics, policy, p_lin)
    res = _closed_residual(physics, act, target, free, p_lin)
    z, err = _solve(res, target[free])
    if err > EQUILIBRIUM_TOL:
        seconds = max(physics.time_limit, 20.0)
        traj, code, steps = _simulate(physics, act, target, p_lin, held, seconds)
        t = steps * physics.dt
        if code:
            raise NotLinearizable(
                f"no closed-loop equilibrium near the target (residual {err:.3g}); the nominal loop started at the "
                f"target ends in {physics.failure_words[code]} after {t:.3g} s"
            )
        z2, err2 = _solve(res, traj[-1, free])
        if err2 <= EQUILIBRIUM_TOL:
            z, err = z2, err2
            notes.append(f"equilibrium found where the nominal loop settles after {t:.3g} s from the target")
        else:
            tail = traj[len(traj) // 2 :, free]
            third = max(2, len(tail) // 3)
            early = np.ptp(tail[:third], axis=0)
            late = np.ptp(tail[-third:], axis=0)
            scale = np.maximum(1e-9, np.max(np.abs(tail), axis=0))
            # a state that moves steadily one way drifts; otherwise the largest relative swing oscillates
            travel = np.abs(tail[-1] - tail[-third])
            drifting = (travel > 0.9 * late) & (late > 1e-9)
            j = int(np.argmax(np.where(drifting, late / scale, -1.0))) if drifting.any() else int(
                np.argmax(late / scale))
            name = physics.state_names[free[j]]
            f_tail = np.array([res(row) for row in tail[-third:]])
            moving = np.max(np.abs(f_tail)) > EQUILIBRIUM_TOL
            if moving and late[j] > 0.5 * early[j] and late[j] > 1e-9:
                # the motion neither dies out nor leaves: bounded oscillation or drift
                kind = "drifts" if drifting.any() else "oscillates (a limit cycle)"
                raise NotLinearizable(
                    f"no closed-loop equilibrium near the target (residual {err:.3g}); the nominal loop {kind}: "
                    f"{name} spans {late[j]:.3g} over the last {third * physics.dt:.3g} s of {seconds:.3g} s"
                )
            raise NotLinearizable(
                f"no closed-loop equilibrium near the target (residual {err:.3g}, best {min(err, err2):.3g}); the "
                f"nominal loop does not settle within {seconds:.3g} s"
            )
    x = target.copy()
    x[free] = z
    a = act(x[None, :])[0]
    off = [f"{physics.state_names[j]} = {x[j]:.6g} {physics.state_units[j]} (target {target[j]:.6g})"
           for j in free if abs(x[j] - target[j]) > 1e-6 * max(1.0, abs(target[j]))]
    if off:
        notes.append("closed-loop equilibrium off the target: " + "; ".join(off))
    pp = p_lin[None, :]
    code = int(physics.check(x[None, :], physics.actuate(a[None, :], pp), pp)[0])
    if code:
        raise NotLinearizable(
            f"the closed-loop equilibrium near the target lies outside the operating region "
            f"({physics.failure_words[code]})"
        )
    return x, a, held, notes


# --------------------------------------------------------------------------- #
# the loop in state space
# --------------------------------------------------------------------------- #
def zoh(a: Array, b: Array, dt: float) -> tuple[Array, Array]:
    """Exact zero-order-hold discretization: ``expm([[A, B], [0, 0]] dt)``."""
    n, m = b.shape
    big = np.zeros((n + m, n + m))
    big[:n, :n] = a
    big[:n, n:] = b
    e = linalg.expm(big * dt)
    return e[:n, :n], e[:n, n:]


def sampled_loop(a: Array, b: Array, gain: Array, dt: float, delay_steps: int) -> tuple[Array, Array, Array]:
    """Sampled loop ``(A, B, C)`` (margins convention ``u = -C z``) for the controller ``a_k = gain x_k``.

    The state is augmented with the ``delay_steps`` most recent commands; the
    plant input is the oldest of them.
    """
    ad, bd = zoh(a, b, dt)
    n, m = b.shape
    d = int(delay_steps)
    if d == 0:
        return ad, bd, -gain
    size = n + d * m
    big_a = np.zeros((size, size))
    big_a[:n, :n] = ad
    big_a[n : n + m, :n] = gain
    for k in range(1, d):
        big_a[n + k * m : n + (k + 1) * m, n + (k - 1) * m : n + k * m] = np.eye(m)
    big_b = np.zeros((size, m))
    big_b[:n] = bd
    big_c = np.zeros((m, size))
    big_c[:, n + (d - 1) * m :] = -np.eye(m)
    return big_a, big_b, big_c


@dataclass
class LoopReport:
    """The linear analysis of one loop (see :func:`loop_report`)."""

    linearizable: bool
    reason: str | None
    notes: list[str]
    equilibrium_state: Array | None
    equilibrium_action: Array | None
    channels: list[LoopMargins]
    multi_loop_disk_margin: float | None
    sampled: bool = False
    delay_steps: int = 0
    dt: float = 0.0
    state_names: tuple[str, ...] = ()
    action_names: tuple[str, ...] = ()
    stable: bool | None = None
    closed_loop_poles: Array | None = field(default=None, repr=False)
    model: tuple[Array, Array, Array] | None = field(default=None, repr=False)

    def frequency_response(self, channel: int | str, omega: Array) -> Array:
        """Loop transfer of ``channel`` (index or action name) at ``omega`` (rad/s), complex array."""
        if not self.channels:
            raise InputError(f"no loop to evaluate: {self.reason}")
        if isinstance(channel, str):
            names = [c.name for c in self.channels]
            if channel not in names:
                raise InputError(f"unknown channel {channel!r}; valid: {', '.join(names)}")
            channel = names.index(channel)
        return self.channels[channel].frequency_response(np.asarray(omega, dtype=float))

    def channel_dicts(self) -> list[dict[str, Any]]:
        """The per-channel entries (``results.json`` ``linear`` / ``linear_sampled``)."""
        return [c.to_dict() for c in self.channels]

    def to_dict(self) -> dict[str, Any]:
        """JSON-friendly summary (None for infinite or undefined values)."""

        def named(values: Array | None, names: tuple[str, ...]) -> dict[str, float] | None:
            return None if values is None else {n: float(v) for n, v in zip(names, values, strict=True)}

        multi = None
        if self.multi_loop_disk_margin is not None:
            from pretrial.analysis.loop_margins import disk_ranges

            low, high, phase = disk_ranges(self.multi_loop_disk_margin)
            fin = [None if v is None or not math.isfinite(v) else float(v)
                   for v in (self.multi_loop_disk_margin, low, high, phase)]
            multi = dict(zip(("disk_margin", "disk_gain_low", "disk_gain_high", "disk_phase_deg"), fin, strict=True))
        poles = None
        if self.closed_loop_poles is not None:
            poles = [[float(p.real), float(p.imag)] for p in self.closed_loop_poles]
        return {
            "linearizable": self.linearizable,
            "reason": self.reason,
            "notes": list(self.notes),
            "sampled": self.sampled,
            "delay_steps": self.delay_steps,
            "control_period_s": self.dt,
            "equilibrium_state": named(self.equilibrium_state, self.state_names),
            "equilibrium_action": named(self.equilibrium_action, self.action_names),
            "stable": self.stable,
            "closed_loop_poles": poles,
            "channels": self.channel_dicts(),
            "multi_loop": multi,
        }


def loop_report(
    physics: Physics,
    policy: Any,
    params: Mapping[str, float] | Array | None = None,
    *,
    sampled: bool = False,
    delay_steps: int = 0,
) -> LoopReport:
    """Linear margins of ``policy`` flying ``physics`` at its closed-loop equilibrium near the target.

    Parameters
    ----------
    physics : Physics
    policy : object
        Anything with ``act(obs (B, O)) -> actions (B, A)`` (a :class:`~pretrial.controller.policy.Policy`, an
        :class:`~pretrial.analysis.lqr.LqrPolicy`); ``feed_forward`` False marks a recurrent controller.
    params : mapping, (P,) array or None
        Physics parameters (overrides by name, a full vector, or nominal).
    sampled : bool
        Analyse the sampled loop (zero-order hold at ``physics.dt``) instead of the continuous one.
    delay_steps : int
        Whole control periods of input delay (sampled loop only).

    Returns
    -------
    LoopReport
        ``linearizable`` False with ``reason`` when the loop has no linearization there.
    """
    if isinstance(delay_steps, bool) or not isinstance(delay_steps, (int, np.integer)) or delay_steps < 0:
        raise InputError(f"delay_steps: {delay_steps!r} must be a whole number >= 0")
    if delay_steps and not sampled:
        raise InputError("delay_steps: a delay of whole control periods needs the sampled loop (sampled=True)")
    p = resolve_params(physics, params)
    p_lin, notes = linear_params(physics, p)
    physics, signs = linear_plant(physics)
    notes += signs
    common = {"sampled": bool(sampled), "delay_steps": int(delay_steps), "dt": physics.dt,
              "state_names": tuple(physics.state_names), "action_names": tuple(physics.action_names)}

    def refuse(reason: str, x: Array | None = None, a: Array | None = None) -> LoopReport:
        return LoopReport(False, reason, notes, x, a, [], None, **common)

    no_equations = equations_reason(physics)
    if no_equations:
        return refuse(no_equations)
    if not getattr(policy, "feed_forward", True):
        if not sampled:
            return refuse("recurrent policy: its network state advances once per control period, a discrete-time "
                          "dynamic controller with no continuous-time loop; see the sampled loop")
        return refuse("recurrent policy: linearizing the network's own state is not implemented yet, so the sampled "
                      "loop with a dynamic controller is not analysed")
    if hasattr(policy, "reset"):
        policy.reset(1)
    try:
        x, a, held, eq_notes = closed_loop_equilibrium(physics, policy, p_lin)
    except NotLinearizable as exc:
        return refuse(str(exc))
    notes.extend(eq_notes)
    free = [j for j in range(physics.state_dim) if j not in held]
    sat = [physics.action_names[i] for i in range(physics.action_dim) if abs(a[i]) >= 1.0 - SATURATION_TOL]
    if sat:
        return refuse(f"saturated: the policy's output is at the actuator limit at the equilibrium on "
                      f"{', '.join(sat)}", x, a)
    try:
        model = plant_model(physics, x, a, p_lin, free, held)
        act = _controller(physics, policy, p_lin)
        gain, fk, bk = differences(act, x, free)
        names = [physics.state_names[j] for j in free]
        _check_kink("controller", fk, bk, list(physics.action_names), names)
    except NotLinearizable as exc:
        return refuse(str(exc), x, a)
    dead = [physics.action_names[i] for i in range(physics.action_dim) if not np.any(gain[i])]
    if dead:
        return refuse(f"saturated: zero local gain on {', '.join(dead)} (the output does not respond to the state "
                      "near the equilibrium: an internal activation is saturated or the channel ignores its inputs)",
                      x, a)
    if sampled:
        big_a, big_b, big_c = sampled_loop(model.a, model.b, gain, physics.dt, delay_steps)
        analysis = analyze_loop(big_a, big_b, big_c, dt=physics.dt, names=physics.action_names)
        notes.append(f"sampled loop: zero-order hold at the control period {physics.dt:g} s, controller at the "
                     f"sampling instants, {delay_steps} period(s) of input delay; delay margins in seconds")
    else:
        big_a, big_b, big_c = model.a, model.b, -gain
        analysis = analyze_loop(big_a, big_b, big_c, names=physics.action_names)
    if not analysis.stable:
        notes.append(analysis.reason or "nominal closed loop unstable")
    return LoopReport(True, None, notes, x, a, analysis.channels,
                      analysis.multi_loop_disk_margin if analysis.stable else 0.0, stable=analysis.stable,
                      closed_loop_poles=analysis.closed_loop_poles, model=(big_a, big_b, big_c), **common)
