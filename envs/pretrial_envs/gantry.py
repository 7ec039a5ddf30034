"""Gantry crane: a trolley on a finite rail carrying a point-mass load on a rope.

The plant is the planar overhead crane of the crane-control literature (trolley
plus a point mass on a massless rope, optionally with a hoist that changes the
rope length). The equations below are derived with Newton's laws on the trolley
and on the load, which is equivalent to Lagrange's equations for the coordinates
``(x, phi, l)``; the test file checks them against that mass-matrix form.

Coordinates (x to the right, y up, pivot on the rail at height 0)::

    trolley  (x, 0)
    load     (x + l sin(phi), -l cos(phi))
    e_r   = ( sin(phi), -cos(phi))   along the rope, trolley -> load
    e_phi = ( cos(phi),  sin(phi))   direction of increasing phi

Free-body equations (T rope tension, q = -rope_damping * phi_dot / l the pivot
damping torque carried to the load as a tangential force, f_r / f_t the drag on
the load along e_r / e_phi, F the trolley force net of friction)::

    trolley:      M x''                          = F + T sin(phi) - q cos(phi)
    load, e_r:    m (x'' sin(phi) + l'' - l phi'^2)  = -T + m g cos(phi) + f_r
    load, e_phi:  m (x'' cos(phi) + l phi'' + 2 l' phi') = q + f_t - m g sin(phi)

With a fixed rope (l'' = l' = 0) the tension is eliminated in closed form,
``(M + m sin^2 phi) x'' = F - q cos(phi) + sin(phi) K`` with
``K = m (g cos(phi) + l phi'^2) + f_r`` and ``T = K - m sin(phi) x''``,
the classical cart-pendulum result.
"""

from __future__ import annotations

import math
from typing import Any, ClassVar

import numpy as np

from .core import (
    Array,
    EpisodeMetric,
    ParamSpec,
    ParamTable,
    Physics,
    PhysicsEnv,
    PhysicsVectorEnv,
    TraceLimit,
    masked_max,
    state_mask,
    tail_mask,
)

#: Speed over which the Coulomb friction sign is smoothed: F_c tanh(v / V).
#: tanh(v) has the sign of v, so the smoothed friction power -F_c v tanh(v/V)
#: is never positive: it dissipates, it never injects energy.
COULOMB_SMOOTHING_SPEED = 0.05  # m/s

#: The hoist slows down near its rope-length limits over this many drive time
#: constants (slow-down zone, common practice on hoist limit switches). With
#: the first-order speed loop the approach to a limit is then a second-order
#: system with damping ratio sqrt(4) / 2 = 1: critically damped, no overshoot.
HOIST_STOP_TIME_CONSTANTS = 4.0

#: With ``integral=True`` the state ``load_x_integral`` integrates the load's miss from
#: ``target_x`` only while the miss is within this distance (conditional integration, a
#: common anti-windup practice): the 4 m transfer does not wind it up, the steady offset
#: near the goal (wind on the load, Coulomb friction) does.
INTEGRAL_ZONE = 0.25  # m

#: Reward weights (see ``reward_doc``).
SWAY_WEIGHT = 1.0  # per rad^2 per second
EFFORT_WEIGHT = 0.01  # per unit action^2 per second

_HOIST_PARAMS = ("max_hoist_force", "max_hoist_speed", "min_rope_length", "max_rope_length", "hoist_time_constant")

# Nominal values are representative of a small laboratory gantry (a few kg of
# trolley, a 1 kg load on a 1 m rope, a 5 m rail); they are not a specific product.
GANTRY_PARAMS = ParamTable(
    [
        ParamSpec("gravity", "m/s^2", 9.81, 0.1, 30.0, "gravitational acceleration"),
        ParamSpec("trolley_mass", "kg", 5.0, 0.1, 1.0e4, "mass of the trolley (and what moves with it on the rail)"),
        ParamSpec("load_mass", "kg", 1.0, 0.01, 100.0, "mass of the load, a point mass at the rope end"),
        ParamSpec("rope_length", "m", 1.0, 0.05, 20.0, "rope length (the initial length when the hoist is on)"),
        ParamSpec("max_force", "N", 10.0, 0.01, 1.0e4, "trolley force at action +-1", "limit"),
        ParamSpec("trolley_friction", "N s/m", 1.0, 0.0, 1.0e3, "viscous friction of the trolley on the rail", "loss"),
        ParamSpec(
            "trolley_coulomb",
            "-",
            0.01,
            0.0,
            0.5,
            "Coulomb friction coefficient of the trolley (normal force taken as (M + m) g)",
            "loss",
        ),
        ParamSpec(
            "rope_damping", "N m s/rad", 0.005, 0.0, 10.0, "viscous damping of the rope angle at the pivot", "loss"
        ),
        ParamSpec(
            "load_drag",
            "kg/m",
            0.005,
            0.0,
            10.0,
            "quadratic drag of the load, 0.5 rho C_d A; force = -load_drag |v_rel| v_rel",
            "loss",
        ),
        ParamSpec("wind_speed", "m/s", 0.0, -30.0, 30.0, "horizontal wind (+x), acts through load_drag", "disturbance"),
        ParamSpec("rail_half_length", "m", 2.5, 0.1, 100.0, "end stops of the rail at x = +-rail_half_length"),
        ParamSpec(
            "max_hoist_force",
            "N",
            40.0,
            0.1,
            1.0e5,
            "largest rope tension the hoist drive can hold (hoist on)",
            "limit",
        ),
        ParamSpec("max_hoist_speed", "m/s", 0.5, 0.01, 10.0, "rope speed at hoist action +-1 (hoist on)", "limit"),
        ParamSpec("min_rope_length", "m", 0.3, 0.05, 20.0, "shortest rope the hoist winds to (hoist on)", "limit"),
        ParamSpec("max_rope_length", "m", 1.5, 0.05, 20.0, "longest rope the hoist pays out (hoist on)", "limit"),
        ParamSpec(
            "hoist_time_constant", "s", 0.15, 0.005, 2.0, "time constant of the hoist speed loop (hoist on)", "physics"
        ),
        ParamSpec("start_x", "m", -2.0, -100.0, 100.0, "trolley position at the start", "task"),
        ParamSpec("target_x", "m", 2.0, -100.0, 100.0, "where the load must be brought (horizontal position)", "task"),
        ParamSpec("position_tolerance", "m", 0.05, 1.0e-4, 10.0, "goal: |load x - target_x| at most this", "task"),
        ParamSpec("sway_tolerance", "rad", 0.05, 1.0e-4, 1.5, "goal: |phi| at most this", "task"),
        ParamSpec("sway_rate_tolerance", "rad/s", 0.1, 1.0e-4, 10.0, "goal: |phi_dot| at most this", "task"),
        ParamSpec("max_sway", "rad", 0.5, 0.01, math.pi, "failure when |phi| exceeds this", "task"),
    ]
)


class GantryPhysics(Physics):
    """Planar overhead crane: trolley force (and optional hoist) moves a load on a rope.

    Parameters
    ----------
    hoist : bool, optional
        Add the rope length as a second actuated degree of freedom (state
        ``l, l_dot``; action ``hoist_speed``). Default False.
    integral : bool, optional
        Add the state ``load_x_integral`` (m s, observed last): the time
        integral of ``load x - target_x`` while that miss is within
        ``INTEGRAL_ZONE`` (0.25 m), 0 at the start. A controller that reads it
        has integral action (state augmentation, common practice in servo
        design) and can remove a steady offset. Default False.
    **kwargs
        ``dt``, ``substeps``, ``integrator``, ``time_limit``, ``start_spread``,
        ``hold_time`` (default 2 s) as in :class:`~pretrial_envs.core.Physics`.
    """

    env_id: ClassVar[str] = "pretrial/GantryCrane-v0"
    summary: ClassVar[str] = "trolley on a rail carries a load on a rope to a target and leaves it still"
    param_table = GANTRY_PARAMS
    state_names = ("x", "x_dot", "phi", "phi_dot")
    state_units = ("m", "m/s", "rad", "rad/s")
    obs_names = state_names
    obs_units = state_units
    action_names = ("trolley_force",)
    action_units = ("N",)
    failure_modes = ("rail_end", "sway", "slack_rope")
    success_mode = "reach"
    hold_time = 2.0
    success_rule = ""  # set per instance: it names the hold time
    reward_doc = (
        "per control period dt: -dt * (|load x - target_x| + 1.0 phi^2 + 0.01 sum(action^2)); "
        "on a failure other than timeout, minus the largest running cost a whole episode could accumulate, "
        "time_limit * (rail_half_length + rope reach + |target_x| + max_sway^2 + 0.01 n_actions)"
    )
    default_dt: ClassVar[float] = 0.02
    default_substeps: ClassVar[int] = 2
    default_integrator: ClassVar[str] = "rk4"
    default_time_limit: ClassVar[float] = 15.0
    default_start_spread: ClassVar[dict[str, float]] = {"x": 0.05, "x_dot": 0.02, "phi": 0.02, "phi_dot": 0.02}
    coulomb_params: tuple[str, ...] = ("trolley_coulomb",)

    def __init__(self, hoist: bool = False, integral: bool = False, **kwargs: Any):
        if not isinstance(hoist, (bool, np.bool_)):
            raise ValueError(f"hoist: {hoist!r} must be True or False")
        if not isinstance(integral, (bool, np.bool_)):
            raise ValueError(f"integral: {integral!r} must be True or False")
        self.hoist = bool(hoist)
        self.integral = bool(integral)
        if self.hoist:
            self.state_names = (*GantryPhysics.state_names, "l", "l_dot")
            self.state_units = (*GantryPhysics.state_units, "m", "m/s")
            self.action_names = ("trolley_force", "hoist_speed")
            self.action_units = ("N", "m/s")
        if self.integral:
            self.state_names = (*self.state_names, "load_x_integral")
            self.state_units = (*self.state_units, "m s")
        self.obs_names, self.obs_units = self.state_names, self.state_units
        # typical magnitudes (rail, max sway, common rates; the integral of a few cm over a few s):
        # network inputs are divided by these
        scale = {"x": 2.5, "x_dot": 1.0, "phi": 0.5, "phi_dot": 1.0, "l": 1.0, "l_dot": 0.5, "load_x_integral": 0.1}
        self.obs_scale = tuple(scale[n] for n in self.obs_names)
        super().__init__(**kwargs)
        self.success_rule = (
            "load within position_tolerance of target_x, |phi| <= sway_tolerance and |phi_dot| <= "
            f"sway_rate_tolerance, held for {self.hold_time:g} s (hold_time) without touching a rail end, "
            "exceeding max_sway or slackening the rope"
        )
        # column indices, looked up once (derivatives runs 4x per RK4 substep)
        self._col = {name: self.param_table.index(name) for name in self.param_table.names}

    def options(self) -> dict[str, Any]:
        # integral only when on: configurations without it keep their options (and their hashes)
        return {**super().options(), "hoist": self.hoist, **({"integral": True} if self.integral else {})}

    # ----------------------------------------------------------- dynamics
    def _solve(self, state: Array, force: Array, params: Array,
               need_tension: bool = True) -> tuple[Array, Array, Array | None, Array | None]:
        """Accelerations ``x'', phi'', l''`` (None without hoist) and the tension the motion requires.

        With the hoist on, the required tension is the one that realises the
        drive's commanded rope acceleration; the drive can only supply
        ``0 <= T <= max_hoist_force``, and the motion is solved with the
        tension clipped to that range. A negative required tension (the rope
        would have to push) is reported by :meth:`check` as ``slack_rope``.
        Without the hoist the tension is None unless ``need_tension``.
        """
        # In-place arithmetic into a few buffers: on small batches every numpy call and every fresh
        # temporary costs more than its arithmetic. Each line computes the closed-form expression
        # of the module docstring in the same order (a + b, a * b equal b + a, b * a), so the
        # results are the same floats as the plain expressions (tests/test_gantry.py checks it).
        c_ = self._col
        p = params

        def build(p: Array) -> tuple[Any, ...]:
            # derived values, and the columns read below (views, looked up once per batch)
            big_m, m = p[:, c_["trolley_mass"]], p[:, c_["load_mass"]]
            coulomb = p[:, c_["trolley_coulomb"]] * (big_m + m)
            coulomb *= p[:, c_["gravity"]]
            return (coulomb, -p[:, c_["rope_damping"]], bool(p[:, c_["trolley_coulomb"]].any()),
                    bool(p[:, c_["load_drag"]].any()), p[:, c_["gravity"]], big_m, m, p[:, c_["rope_length"]],
                    p[:, c_["trolley_friction"]], p[:, c_["wind_speed"]], p[:, c_["load_drag"]])

        (coulomb, neg_damping, any_coulomb, any_drag, g, big_m, m, rope, friction, wind,
         drag) = self.batch_constants(params, build)
        xd = state[:, 1]
        w = state[:, 3]
        s = np.sin(state[:, 2])
        c = np.cos(state[:, 2])
        if self.hoist:
            ln = state[:, 4]
            ld = state[:, 5]
        else:
            ln = rope
            ld = None

        # trolley friction: viscous + Coulomb with tanh-smoothed sign
        f_net = friction * xd
        np.subtract(force[:, 0], f_net, out=f_net)
        if any_coulomb:
            t = xd / COULOMB_SMOOTHING_SPEED
            np.tanh(t, out=t)
            t *= coulomb
            f_net -= t
        # pivot damping torque -rope_damping * phi_dot, seen by the load as a tangential force
        q = neg_damping * w
        q /= ln

        # quadratic drag on the load velocity relative to the wind
        f_r = None
        f_t = q
        if any_drag:
            lw = ln * w
            vx = lw * c
            vx += xd
            vx -= wind
            vy = lw
            vy *= s
            if ld is not None:
                t = ld * s
                vx += t
                np.multiply(ld, c, out=t)
                vy -= t
            kv = vx * vx
            t = vy * vy
            kv += t
            np.sqrt(kv, out=kv)
            kv *= drag
            np.negative(kv, out=kv)
            fx = vx
            fx *= kv
            fy = vy
            fy *= kv
            f_r = fx * s
            np.multiply(fy, c, out=t)
            f_r -= t
            f_t = fx * c
            f_t += q
            np.multiply(fy, s, out=t)
            f_t += t

        ms = m * s
        denom = ms * s
        denom += big_m
        base = ln * w
        base *= w
        t = g * c
        base += t
        if ld is None:
            big_k = m * base
            ldd = None
        else:
            # hoist: first-order speed loop towards the commanded rope speed,
            # which the slow-down zones limit near the rope-length limits
            tau = p[:, c_["hoist_time_constant"]]
            stop = HOIST_STOP_TIME_CONSTANTS * tau
            v_ref = np.clip(
                force[:, 1], (p[:, c_["min_rope_length"]] - ln) / stop, (p[:, c_["max_rope_length"]] - ln) / stop
            )
            ldd = np.subtract(v_ref, ld, out=v_ref)
            ldd /= tau
            big_k = base - ldd
            big_k *= m
        if f_r is not None:  # without drag f_r is 0 and m (...) + 0.0 is the same float
            big_k += f_r
        xdd = q * c
        np.subtract(f_net, xdd, out=xdd)
        np.multiply(s, big_k, out=t)
        xdd += t
        xdd /= denom
        tension = None
        if need_tension or ld is not None:
            tension = ms * xdd
            np.subtract(big_k, tension, out=tension)
        if ld is not None:
            held = np.clip(tension, 0.0, p[:, c_["max_hoist_force"]])
            sat = held != tension
            if sat.any():
                # the drive is at a tension limit: the tension is known, the rope acceleration is not
                xdd_s = (f_net + held * s - q * c) / big_m
                xdd = np.where(sat, xdd_s, xdd)
                ldd = np.where(sat, base - xdd_s * s + ((0.0 if f_r is None else f_r) - held) / m, ldd)
        phidd = f_t / m
        np.multiply(g, s, out=t)
        phidd -= t
        np.multiply(xdd, c, out=t)
        phidd -= t
        if ld is not None:
            np.multiply(2.0, ld, out=t)
            t *= w
            phidd -= t
        phidd /= ln
        return xdd, phidd, ldd, tension

    def derivatives(self, state: Array, force: Array, params: Array) -> Array:
        xdd, phidd, ldd, _ = self._solve(state, force, params, need_tension=False)
        out = np.empty_like(state)
        out[:, 0] = state[:, 1]
        out[:, 1] = xdd
        out[:, 2] = state[:, 3]
        out[:, 3] = phidd
        if ldd is not None:
            out[:, 4] = state[:, 5]
            out[:, 5] = ldd
        if self.integral:
            miss = self.load_x(state, params) - params[:, self._col["target_x"]]
            out[:, -1] = np.where(np.abs(miss) <= INTEGRAL_ZONE, miss, 0.0)
        return out

    def rope_tension(self, state: Array, force: Array, params: Array) -> Array:
        """Rope tension (N) the motion requires at ``state`` under ``force``, shape (N,).

        Negative means the rope would have to push: it goes slack. With the
        hoist on this is the tension before the drive's limits are applied.
        """
        return self._solve(state, force, params)[3]

    def rope_length(self, state: Array, params: Array) -> Array:
        """Rope length per instance (state ``l`` with the hoist, else the parameter)."""
        return state[:, 4] if self.hoist else params[:, self._col["rope_length"]]

    def load_x(self, state: Array, params: Array) -> Array:
        """Horizontal position of the load (m)."""
        return state[:, 0] + self.rope_length(state, params) * np.sin(state[:, 2])

    def actuate(self, action: Array, params: Array) -> Array:
        out = np.empty_like(action)
        out[:, 0] = action[:, 0] * params[:, self._col["max_force"]]
        if self.hoist:
            out[:, 1] = action[:, 1] * params[:, self._col["max_hoist_speed"]]
        return out

    # ----------------------------------------------------------- task
    def check(self, state: Array, force: Array, params: Array) -> Array:
        """First failure in ``failure_modes`` order that holds, per instance (0 = none)."""
        rail = np.abs(state[:, 0]) > params[:, self._col["rail_half_length"]]
        sway = np.abs(state[:, 2]) > params[:, self._col["max_sway"]]
        slack = self.rope_tension(state, force, params) < 0.0
        code = np.where(slack, 3, 0)
        code = np.where(sway, 2, code)
        return np.where(rail, 1, code)

    def constraint_slack(self, state: Array, force: Array, params: Array) -> Array:
        """Smallest of ``1 - |x| / rail_half_length``, ``1 - |phi| / max_sway`` and tension / (m g)."""
        c_ = self._col
        weight = params[:, c_["load_mass"]] * params[:, c_["gravity"]]
        rope = np.minimum(self.rope_tension(state, force, params) / weight, 1.0)
        rail = 1.0 - np.abs(state[:, 0]) / params[:, c_["rail_half_length"]]
        return np.minimum(np.minimum(rail, 1.0 - np.abs(state[:, 2]) / params[:, c_["max_sway"]]), rope)

    def in_goal(self, state: Array, params: Array) -> Array:
        c_ = self._col
        return (
            (np.abs(self.load_x(state, params) - params[:, c_["target_x"]]) <= params[:, c_["position_tolerance"]])
            & (np.abs(state[:, 2]) <= params[:, c_["sway_tolerance"]])
            & (np.abs(state[:, 3]) <= params[:, c_["sway_rate_tolerance"]])
        )

    def reward(self, state: Array, action: Array, params: Array, failure: Array, success: Array) -> Array:
        miss = np.abs(self.load_x(state, params) - params[:, self._col["target_x"]])
        phi = state[:, 2]
        cost = miss + SWAY_WEIGHT * phi * phi + EFFORT_WEIGHT * np.einsum("ij,ij->i", action, action)
        failed = (failure != 0) & (failure != self.timeout_code)
        return -self.dt * cost - np.where(failed, self.failure_penalty(params), 0.0)

    def failure_penalty(self, params: Array) -> Array:
        """Bound on an episode's running cost, so ending in a failure never pays better than surviving."""
        c_ = self._col
        reach = params[:, c_["rope_length"]]
        if self.hoist:
            reach = np.maximum(reach, params[:, c_["max_rope_length"]])
        # while no failure: |load x| <= rail_half_length + reach and |phi| <= max_sway
        per_second = (
            params[:, c_["rail_half_length"]]
            + reach
            + np.abs(params[:, c_["target_x"]])
            + SWAY_WEIGHT * params[:, c_["max_sway"]] ** 2
            + EFFORT_WEIGHT * self.action_dim
        )
        return self.time_limit * per_second

    def start_center(self, params: Array) -> Array:
        center = np.zeros((params.shape[0], self.state_dim))
        center[:, 0] = params[:, self._col["start_x"]]
        if self.hoist:
            center[:, 4] = params[:, self._col["rope_length"]]
        return center

    def target_state(self, params: Array) -> Array:
        """Load at rest hanging straight down over ``target_x`` (rope at ``rope_length`` with the hoist)."""
        target = np.zeros((params.shape[0], self.state_dim))
        target[:, 0] = params[:, self._col["target_x"]]
        if self.hoist:
            target[:, 4] = params[:, self._col["rope_length"]]
        return target

    def regulated(self) -> dict[str, tuple[str, float]]:
        """The load's horizontal miss from ``target_x`` and the sway, banded by the goal tolerances."""
        table = self.param_table
        return {"load_x": ("m", table["position_tolerance"].nominal), "phi": ("rad", table["sway_tolerance"].nominal)}

    def regulation_error(self, state: Array, params: Array) -> Array:
        return np.stack([self.load_x(state, params) - params[:, self._col["target_x"]], state[:, 2]], axis=1)

    def regulation_band(self, params: Array) -> Array:
        c_ = self._col
        return np.stack([params[:, c_["position_tolerance"]], params[:, c_["sway_tolerance"]]], axis=1)

    # ----------------------------------------------------------- measures
    def episode_metrics(self, states: Array, actions: Array, params: Array, steps: Array) -> dict[str, EpisodeMetric]:
        """The generic measures (:meth:`Physics.episode_metrics`, incl. ``settling_time``) plus the crane's.

        * ``peak_sway`` (rad): largest |phi| over the episode.
        * ``residual_sway`` (rad): largest |phi| over the last
          ``RESIDUAL_WINDOW_S`` (2 s) of the episode (all of it if shorter).
        * ``overshoot`` (m): how far the load's horizontal position went past
          ``target_x``, in the direction from its start towards the target
          (0 if it never passed it).
        """
        out = super().episode_metrics(states, actions, params, steps)
        states = np.asarray(states, dtype=float)
        n, rows = states.shape[:2]
        valid = state_mask(n, steps)
        phi = np.abs(states[:, :, 2])
        load = self.load_x(states.reshape(n * rows, -1), np.tile(params, (n, 1))).reshape(n, rows)
        target = params[:, self._col["target_x"]]
        heading = np.sign(target - load[0])
        heading = np.where(heading == 0, 1.0, heading)  # starting on the target: either way is past it
        out["peak_sway"] = EpisodeMetric(masked_max(phi, valid), "rad", "largest |phi| (rope angle)")
        out["residual_sway"] = EpisodeMetric(
            masked_max(phi, tail_mask(n, steps, self.dt)), "rad", "largest |phi| over the last 2 s of the episode"
        )
        out["overshoot"] = EpisodeMetric(
            np.maximum(masked_max(heading * (load - target), valid), 0.0), "m",
            "farthest the load went past target_x (from its start's side)",
        )
        return out

    def trace_limits(self, params: Array) -> dict[str, list[TraceLimit]]:
        c_ = self._col
        rail = float(params[c_["rail_half_length"]])
        out = {
            "x": [TraceLimit(-rail, rail, "rail ends")],
            "phi": [
                TraceLimit(-float(params[c_["max_sway"]]), float(params[c_["max_sway"]]), "max_sway"),
                TraceLimit(-float(params[c_["sway_tolerance"]]), float(params[c_["sway_tolerance"]]),
                           "sway_tolerance", "band"),
            ],
            "phi_dot": [TraceLimit(-float(params[c_["sway_rate_tolerance"]]), float(params[c_["sway_rate_tolerance"]]),
                                   "sway_rate_tolerance", "band")],
        }
        if self.hoist:
            out["l"] = [TraceLimit(float(params[c_["min_rope_length"]]), float(params[c_["max_rope_length"]]),
                                   "rope length limits")]
        return out

    # ----------------------------------------------------------- drawing
    def draw(self, ax: Any, state: Array, params: Array) -> None:
        from matplotlib.patches import Circle, Rectangle

        c_ = self._col
        half = float(params[c_["rail_half_length"]])
        ln = float(state[4]) if self.hoist else float(params[c_["rope_length"]])
        reach = float(params[c_["max_rope_length"]]) if self.hoist else ln
        x, phi = float(state[0]), float(state[2])
        target = float(params[c_["target_x"]])
        wind = float(params[c_["wind_speed"]])
        size = 0.04 * (2.0 * half + reach)
        lx, ly = x + ln * math.sin(phi), -ln * math.cos(phi)

        ax.plot([-half, half], [0.0, 0.0], color="0.3", lw=2, zorder=1)
        for end in (-half, half):
            ax.plot([end, end], [-size, size], color="k", lw=3, zorder=1)
        floor = -reach - 2.0 * size
        ax.plot([target, target], [floor, 0.0], color="tab:green", ls="--", lw=1, zorder=0)
        ax.plot([target], [floor], marker="^", color="tab:green", ms=10, zorder=2)
        ax.add_patch(Rectangle((x - 1.5 * size, -0.5 * size), 3.0 * size, size, color="tab:blue", zorder=3))
        ax.plot([x, lx], [0.0, ly], color="0.2", lw=1.2, zorder=2)
        ax.add_patch(Circle((lx, ly), 0.5 * size, color="tab:orange", zorder=4))
        if wind:
            # arrow along the wind, centred above the rail, length growing with the speed
            y = 2.5 * size
            half_arrow = 0.5 * math.copysign(min(0.1 * abs(wind) * half, half), wind)
            ax.annotate(
                "", xy=(half_arrow, y), xytext=(-half_arrow, y), arrowprops={"arrowstyle": "->", "color": "0.4"}
            )
            ax.text(0.0, y + 0.6 * size, f"wind {wind:+.1f} m/s", fontsize=8, color="0.4", ha="center")
        ax.set_aspect("equal")
        ax.set_xlim(-half - 3.0 * size, half + 3.0 * size)
        ax.set_ylim(floor - 2.0 * size, 5.0 * size)
        ax.set_xlabel("x [m]")


class GantryEnv(PhysicsEnv):
    r"""
    ## Description

    A trolley runs on a finite horizontal rail and carries a load hanging from
    a rope. A force on the trolley (and, with ``hoist=True``, a hoist that winds
    the rope in or out) must bring the load from a start on the left to a
    target on the right and leave it there with almost no sway, without hitting
    the rail's end stops, letting the load swing past ``max_sway`` or jerking
    the trolley so hard that the rope goes slack. This is the planar overhead
    (gantry) crane of the crane-control literature, with trolley friction, rope
    damping, load drag and wind added so perturbation campaigns can vary them.

    **Caution.** Cranes can hurt people. This simulation does not certify that
    a controller is safe: run first trials with a light load and a restrained,
    supervised rig, with a hardware stop that does not depend on the
    controller, and follow the lifting-equipment regulations that apply where
    the crane runs.

    Conventions: x is the trolley position with 0 at the rail centre and +x to
    the right; phi is the rope angle from the downward vertical, 0 hanging
    straight down and positive when the load has swung towards +x; l is the
    rope length. The load sits at ``(x + l sin(phi), -l cos(phi))``.

    ## Action Space

    A `ndarray` in ``[-1, 1]``, shape ``(1,)`` without hoist, ``(2,)`` with it.

    | Num | Action        | Physical input                                                   |
    |-----|---------------|------------------------------------------------------------------|
    | 0   | trolley_force | ``action * max_force`` N on the trolley, +x positive             |
    | 1   | hoist_speed   | rope speed reference ``action * max_hoist_speed`` m/s (hoist on) |

    A positive hoist speed pays rope out (lowers the load).

    The hoist is modelled simply, as an industrial hoist drive in speed mode:
    the rope speed follows its reference with a first-order lag
    (``hoist_time_constant``), the drive holds any rope tension between 0 and
    ``max_hoist_force`` (above that it slips: the tension stays at the limit and
    the load accelerates downwards), and near ``min_rope_length`` and
    ``max_rope_length`` the speed reference is limited to the remaining
    distance divided by ``4 * hoist_time_constant`` (a slow-down zone), so the
    rope settles on the limit without overshooting it. The drive cannot push:
    a command that asks the rope to accelerate downwards faster than the load
    can fall (about ``g cos(phi)``) needs a negative tension and ends the
    episode as ``slack_rope``; with the defaults (0.5 m/s, 0.15 s) even a full
    reversal of the command asks for only 6.7 m/s^2.
    The drum is massless, so the drive's force on the rope is the rope tension.

    ## Observation Space

    The observation is the state, shape ``(4,)``, ``(6,)`` with the hoist, one
    more with ``integral=True``:

    | Num | Observation | Unit  |
    |-----|-------------|-------|
    | 0   | x           | m     |
    | 1   | x_dot       | m/s   |
    | 2   | phi         | rad   |
    | 3   | phi_dot     | rad/s |
    | 4   | l (hoist)   | m     |
    | 5   | l_dot (hoist) | m/s |
    | last | load_x_integral (integral) | m s |

    ``load_x_integral`` (``integral=True``) is the time integral of
    ``x + l sin(phi) - target_x`` while that miss is within 0.25 m
    (``INTEGRAL_ZONE``; conditional integration against wind-up), starting
    at 0. It is part of the state, so a controller trained with it needs it on
    hardware too: the host computes it from the measured load position, with
    the same zone, at the control rate.

    ## Rewards

    Every control period of length dt gives
    ``-dt * (|x + l sin(phi) - target_x| + 1.0 phi^2 + 0.01 sum(action^2))``:
    the time integral of the load's distance to the target, a sway penalty and
    an effort penalty. An episode that ends in ``rail_end``, ``sway``,
    ``slack_rope`` or ``diverged`` gets a further penalty equal to the largest
    running cost a whole episode could accumulate without failing,
    ``time_limit * (rail_half_length + rope reach + |target_x| + max_sway^2 +
    0.01 n_actions)`` (86.4 with the defaults), so crashing early never pays.
    Ending in success stops the running cost.

    ## Starting State

    Trolley at ``start_x`` (default -2 m), at rest, load hanging straight down
    (rope at ``rope_length`` with the hoist on), plus a uniform spread of
    +-0.05 m on x and +-0.02 on x_dot, phi and phi_dot (``start_spread``).

    ## Episode End

    1. Success: the load is within ``position_tolerance`` (0.05 m) of
       ``target_x`` (2 m) horizontally with ``|phi| <= sway_tolerance``
       (0.05 rad) and ``|phi_dot| <= sway_rate_tolerance`` (0.1 rad/s),
       continuously for ``hold_time`` (2 s by default).
    2. Termination ``rail_end``: ``|x| > rail_half_length`` (2.5 m).
    3. Termination ``sway``: ``|phi| > max_sway`` (0.5 rad).
    4. Termination ``slack_rope``: the tension the motion requires is negative
       (the rope cannot push). The tension comes from the equations of motion
       under the applied inputs, e.g. ``m g cos(phi)`` for a load at rest under
       a fixed trolley.
    5. Termination ``diverged``: the integration blew up.
    6. Truncation ``timeout``: ``time_limit`` (15 s) elapsed.

    If several failures happen in the same period, the first in the order
    above is reported.

    ## Arguments

    ```python
    >>> import gymnasium as gym
    >>> import pretrial_envs
    >>> env = gym.make("pretrial/GantryCrane-v0", hoist=True, params={"load_mass": 2.0, "wind_speed": 3.0})

    ```

    | Argument       | Default | Meaning                                                   |
    |----------------|---------|-----------------------------------------------------------|
    | `hoist`        | `False` | add the rope length as an actuated degree of freedom      |
    | `integral`     | `False` | add ``load_x_integral`` to the state (integral action)    |
    | `params`       | `{}`    | parameter overrides, names as in ``GANTRY_PARAMS``        |
    | `dt`           | `0.02`  | control period, s                                         |
    | `substeps`     | `2`     | integration steps per control period                      |
    | `integrator`   | `"rk4"` | ``"rk4"`` or ``"euler"``                                  |
    | `time_limit`   | `15.0`  | episode length, s                                         |
    | `hold_time`    | `2.0`   | seconds the load must stay settled at the target          |
    | `start_spread` | see above | half-widths of the uniform start distribution           |

    Losses and disturbances (all accept 0):

    * ``trolley_friction`` viscous, ``-b x_dot``; ``trolley_coulomb`` Coulomb,
      ``-mu (M + m) g tanh(x_dot / 0.05 m/s)``: the sign is smoothed with tanh,
      which keeps the sign of x_dot, so the friction never injects energy. The
      normal force is taken as the static weight (the rope's dynamic vertical
      pull is neglected). The smoothing is stiff near zero speed, with slope
      ``mu (M + m) g / 0.05``; keep ``dt / substeps`` times that over M below
      about 2.8 (RK4's stability limit) or raise ``substeps``.
    * ``rope_damping``: torque ``-c phi_dot`` at the pivot.
    * ``load_drag``: quadratic drag ``-k |v - w| (v - w)`` on the load, with
      ``v`` the load velocity and ``w = (wind_speed, 0)`` the air velocity. The
      wind acts only through this drag: with ``load_drag = 0`` it has no effect.

    ## Metrics

    What ``pretrial replay`` measures per episode, besides the generic
    ``effort_rms_<action>`` (RMS of the command, fraction of full scale) and
    ``saturated_fraction`` (fraction of periods at >= 0.999 of full scale):

    | Metric          | Unit | Definition                                                          |
    |-----------------|------|---------------------------------------------------------------------|
    | `settling_time` | s    | first time after which the goal rule holds to the end (inf: never)  |
    | `peak_sway`     | rad  | largest abs(phi)                                                    |
    | `residual_sway` | rad  | largest abs(phi) over the last 2 s of the episode                   |
    | `overshoot`     | m    | farthest the load went past target_x, seen from its start's side    |

    ## Equations and source

    Point-mass load on a massless rope of length l hanging from a trolley of
    mass M: the planar overhead crane model standard in crane control (e.g.
    H.-H. Lee, "Modeling and control of a three-dimensional overhead crane",
    ASME J. Dyn. Syst. Meas. Control 120(4), 1998, reduced to one trolley axis),
    derived here with Newton's laws on each body, which is equivalent to
    Lagrange's equations for ``(x, phi, l)``:

    ```
    M x''                                   = F + T sin(phi) - q cos(phi)
    m (x'' sin(phi) + l'' - l phi'^2)       = -T + m g cos(phi) + f_r
    m (x'' cos(phi) + l phi'' + 2 l' phi')  = q + f_t - m g sin(phi)
    ```

    F is the trolley force net of friction, T the rope tension, q = -c phi'/l
    the pivot damping carried to the load, f_r and f_t the drag along and
    across the rope. Without hoist l'' = l' = 0 and the tension follows from
    the second line; with it l'' is set by the drive (see Action Space).
    """

    physics_type = GantryPhysics


class GantryVectorEnv(PhysicsVectorEnv):
    """Vectorized :class:`GantryEnv`: N cranes, each with its own parameters."""

    physics_type = GantryPhysics
