"""One or two poles hinged on a cart that runs on a straight track.

One pole: the cart-pole of Barto, Sutton & Anderson (1983) with the corrected
friction equations of Florian (2007). Two poles: the double-pole balancing
benchmark (Wieland 1991) in the form used by Gomez & Miikkulainen and by
Stanley & Miikkulainen (2002). The equations and their sign conventions are
written out on :class:`CartPoleEnv`.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any, ClassVar, NamedTuple

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
    column_sums,
    holds_from,
    masked_max,
    state_mask,
    tail_mask,
)

#: Tilt of the long pole at the start of the two-pole benchmark, rad (0.07 rad, about 4 degrees;
#: the value used with Stanley & Miikkulainen 2002, from memory).
TWO_POLE_START_TILT = 0.07

OBSERVE_MODES = ("full", "positions")
POLE_COUNTS = (1, 2)

_FRICTION_SPEED_DOC = (
    "velocity scale v_eps of the Coulomb smoothing sgn(v) ~ tanh(v / v_eps); for a stable explicit "
    "integration keep (dt / substeps) * friction force / (cart_mass * v_eps) below about 2"
)

SINGLE_POLE_PARAMS = ParamTable(
    [
        ParamSpec("gravity", "m/s^2", 9.8, 0.0, 50.0, "gravitational acceleration"),
        ParamSpec("cart_mass", "kg", 1.0, 0.01, 100.0, "mass of the cart"),
        ParamSpec("pole_mass", "kg", 0.1, 1e-4, 10.0, "mass of the pole (uniform rod)"),
        ParamSpec("pole_half_length", "m", 0.5, 0.01, 10.0, "half the pole length (pivot to centre of mass)"),
        ParamSpec("max_force", "N", 10.0, 0.0, 1000.0, "force on the cart at action +-1", "limit"),
        ParamSpec(
            "cart_friction",
            "-",
            5e-4,
            0.0,
            0.2,
            "Coulomb coefficient of the cart on the track (friction force = coefficient * normal force)",
            "loss",
        ),
        ParamSpec("pole_friction", "N m s", 2e-6, 0.0, 0.01, "viscous friction coefficient of the pivot", "loss"),
        ParamSpec("friction_speed", "m/s", 0.01, 1e-4, 1.0, _FRICTION_SPEED_DOC),
        ParamSpec("track_half_length", "m", 2.4, 0.1, 100.0, "the episode fails when |x| exceeds this", "task"),
        ParamSpec(
            "fail_angle",
            "rad",
            math.radians(12.0),
            0.01,
            math.pi,
            "the episode fails when |theta| exceeds this",
            "task",
        ),
    ]
)

TWO_POLE_PARAMS = ParamTable(
    [
        ParamSpec("gravity", "m/s^2", 9.8, 0.0, 50.0, "gravitational acceleration"),
        ParamSpec("cart_mass", "kg", 1.0, 0.01, 100.0, "mass of the cart"),
        ParamSpec("pole_mass", "kg", 0.1, 1e-6, 10.0, "mass of the first (long) pole, a uniform rod"),
        ParamSpec("pole_half_length", "m", 0.5, 0.01, 10.0, "half the length of the first pole"),
        ParamSpec("pole2_mass", "kg", 0.01, 1e-6, 10.0, "mass of the second (short) pole, a uniform rod"),
        ParamSpec("pole2_half_length", "m", 0.05, 0.01, 10.0, "half the length of the second pole"),
        ParamSpec("max_force", "N", 10.0, 0.0, 1000.0, "force on the cart at action +-1", "limit"),
        ParamSpec(
            "cart_friction_force", "N", 5e-4, 0.0, 2.0, "Coulomb friction force of the cart on the track", "loss"
        ),
        ParamSpec("pole_friction", "N m s", 2e-6, 0.0, 0.01, "viscous friction coefficient of the first pivot", "loss"),
        ParamSpec(
            "pole2_friction", "N m s", 2e-6, 0.0, 0.01, "viscous friction coefficient of the second pivot", "loss"
        ),
        ParamSpec("friction_speed", "m/s", 0.01, 1e-4, 1.0, _FRICTION_SPEED_DOC),
        ParamSpec("track_half_length", "m", 2.4, 0.1, 100.0, "the episode fails when |x| exceeds this", "task"),
        ParamSpec(
            "fail_angle",
            "rad",
            math.radians(36.0),
            0.01,
            math.pi,
            "the episode fails when either |theta| exceeds this",
            "task",
        ),
    ]
)

#: Reward shaping weights (see ``reward_doc``).
ANGLE_WEIGHT = 0.5
OFFSET_WEIGHT = 0.25

#: settled = every |theta| within this fraction of fail_angle and |x| within it of the track half-length
#: (our choice for a balancing task, which has no step to take a 2 % band of)
SETTLE_FRACTION = 0.1

_REWARD_DOC = (
    f"each control period without failure: 1 - {ANGLE_WEIGHT} * mean_i (theta_i / fail_angle)^2 "
    f"- {OFFSET_WEIGHT} * (x / track_half_length)^2, so between 0.25 and 1; 0 for the period that fails"
)
_SUCCESS_RULE = "survive: reach the time limit with every pole within fail_angle and the cart within the track"


#: typical magnitudes of the observations (track half-length, fail angles, common rates):
#: network inputs are divided by these so one set of NEAT defaults suits both variants
_OBS_SCALE = {
    "x": 2.4, "x_dot": 1.0, "theta": 0.21, "theta_dot": 1.0,
    "theta1": 0.63, "theta1_dot": 2.0, "theta2": 0.63, "theta2_dot": 4.0,
}


class _OnePole(NamedTuple):
    """One batch's one-pole parameter columns and the values derived from them alone."""

    total: Array  # M + m
    ml: Array  # m l
    total_g: Array  # (M + m) g
    friction: bool  # any cart friction
    pivot_friction: bool  # any pivot friction
    gravity: Array
    pole_mass: Array
    half_length: Array
    friction_speed: Array
    cart_friction: Array
    pole_friction: Array
    four_thirds: Array  # 4 / 3 in every row


class CartPolePhysics(Physics):
    """Cart-pole physics core: one pole (Florian 2007) or two poles (Wieland 1991).

    Parameters
    ----------
    poles : {1, 2}
        Number of poles hinged on the cart.
    observe : {"full", "positions"}
        ``"positions"`` leaves the velocities out of the observation.
    **kwargs
        ``dt``, ``substeps``, ``integrator``, ``time_limit``, ``start_spread``
        of :class:`~pretrial_envs.core.Physics`.
    """

    env_id = "pretrial/CartPole-v0"
    summary = "one or two poles balanced on a cart on a track (Florian 2007 friction; double-pole benchmark)"
    param_table = SINGLE_POLE_PARAMS
    state_names = ("x", "x_dot", "theta", "theta_dot")
    state_units = ("m", "m/s", "rad", "rad/s")
    obs_names = state_names
    obs_units = state_units
    action_names = ("force",)
    action_units = ("N",)
    failure_modes = ("pole_fell", "off_track")
    success_mode = "survive"
    success_rule = _SUCCESS_RULE
    reward_doc = _REWARD_DOC
    default_dt = 0.02
    default_substeps = 2
    default_integrator = "rk4"
    default_time_limit = 10.0
    default_start_spread: ClassVar[Mapping[str, float]] = {"x": 0.05, "x_dot": 0.05, "theta": 0.05, "theta_dot": 0.05}
    #: the track friction of Florian 2007 is Coulomb (two poles: ``cart_friction_force``)
    coulomb_params: tuple[str, ...] = ("cart_friction",)

    def __init__(self, poles: int = 1, observe: str = "full", **kwargs: Any):
        if isinstance(poles, bool) or not isinstance(poles, (int, np.integer)) or int(poles) not in POLE_COUNTS:
            raise ValueError(f"poles: {poles!r} must be 1 or 2")
        if observe not in OBSERVE_MODES:
            raise ValueError(f"observe: {observe!r} not one of {', '.join(OBSERVE_MODES)}")
        self.poles = int(poles)
        self.observe_mode = observe
        if self.poles == 2:
            self.param_table = TWO_POLE_PARAMS
            self.coulomb_params = ("cart_friction_force",)
            self.state_names = ("x", "x_dot", "theta1", "theta1_dot", "theta2", "theta2_dot")
            self.state_units = ("m", "m/s", "rad", "rad/s", "rad", "rad/s")
            # The benchmark starts every trial from the same state (Stanley & Miikkulainen 2002).
            self.default_start_spread = {}
            self.default_time_limit = 20.0
        if observe == "positions":
            self.obs_names = self.state_names[0::2]
            self.obs_units = self.state_units[0::2]
        else:
            self.obs_names = self.state_names
            self.obs_units = self.state_units
        self.obs_scale = tuple(_OBS_SCALE[n] for n in self.obs_names)
        super().__init__(**kwargs)
        self._col = {name: i for i, name in enumerate(self.param_table.names)}

    def regulated(self) -> dict[str, tuple[str, float]]:
        """Cart position and pole angles, held at 0: bands 0.1 m and 0.05 rad (about 3 degrees).

        The bands are our defaults for a balance task on a 4.8 m track (common
        practice: a few percent of the travel, a few degrees of tilt); a plan's
        ``[require.quality] band`` overrides them.
        """
        return {"x": ("m", 0.1), **{n: ("rad", 0.05) for n in self.state_names[2::2]}}

    def _one_pole_constants(self, params: Array) -> _OnePole:
        """The parameter columns and the values derived from them alone, for ``params`` (N, P).

        Formed once per batch (:meth:`~pretrial_envs.core.Physics.batch_constants`): a derivative
        evaluation then indexes nothing (RK4 with two substeps evaluates eight per control step).
        """
        return self.batch_constants(params, self._build_one_pole)

    def _build_one_pole(self, params: Array) -> _OnePole:
        c = self._col
        col = {name: params[:, c[name]] for name in ("gravity", "pole_mass", "pole_half_length", "friction_speed",
                                                     "cart_friction", "pole_friction")}
        m = col["pole_mass"]
        total = params[:, c["cart_mass"]] + m
        return _OnePole(total, m * col["pole_half_length"], total * col["gravity"],
                        bool(np.count_nonzero(col["cart_friction"])), bool(np.count_nonzero(col["pole_friction"])),
                        col["gravity"], m, col["pole_half_length"], col["friction_speed"], col["cart_friction"],
                        col["pole_friction"], np.full(len(m), 4.0 / 3.0))

    def options(self) -> dict[str, Any]:
        return {"poles": self.poles, "observe": self.observe_mode, **super().options()}

    # ----------------------------------------------------------- dynamics
    def derivatives(self, state: Array, force: Array, params: Array) -> Array:
        if self.poles == 1:
            return self._one_pole(state, force, params, need_normal=False)[0]
        return self._two_poles(state, force, params)

    def normal_force(self, state: Array, force: Array, params: Array) -> Array:
        """Normal force N_c of the track on the cart, N (one pole only; Florian 2007)."""
        if self.poles != 1:
            raise ValueError("normal_force: defined for poles=1 only (the two-pole model uses a friction force)")
        return self._one_pole(state, force, params)[1]

    def _one_pole(self, state: Array, force: Array, params: Array, need_normal: bool = True) -> tuple[Array, Array]:
        # In-place arithmetic into a few buffers: at N = 10,000 every fresh temporary costs about
        # as much as the arithmetic itself (allocation and page faults), so the peak is kept small.
        k = self._one_pole_constants(params)
        g, m, half, total, ml, total_g = k.gravity, k.pole_mass, k.half_length, k.total, k.ml, k.total_g
        friction, pivot_friction = k.friction, k.pivot_friction
        x_dot = state[:, 1]
        w = state[:, 3]
        sin = np.sin(state[:, 2])
        cos = np.cos(state[:, 2])
        mlw2 = w * w
        mlw2 *= ml
        # mu_c * smoothed sgn(x_dot); the sign of N_c multiplies it below.
        slip = None
        if friction:  # a frictionless track skips the tanh (the largest single cost at large N)
            slip = np.divide(x_dot, k.friction_speed)
            np.tanh(slip, out=slip)
            slip *= k.cart_friction
        # g sin(theta) - mu_p theta_dot / (m l): gravity and pivot friction on the pole.
        g_sin = g * sin
        if pivot_friction:
            pivot = k.pole_friction * w
            pivot /= ml
            g_sin -= pivot
            del pivot
        out = np.empty_like(state)
        out[:, 0] = x_dot
        out[:, 2] = w
        def solve(s: Array | None) -> Array | None:
            # s = mu_c sgn(N_c) sgn(x_dot); None for a frictionless track, where the operations
            # are gymnasium's CartPole-v1 expression in the same order (bit-for-bit equal).
            if s is None:
                temp = mlw2 * sin
                temp += force[:, 0]
                temp /= total
                lever = cos
            else:
                temp = s * cos
                temp += sin
                temp *= mlw2
                temp += force[:, 0]
                temp /= total
                lever = s * g
                temp -= lever  # (F + m l w^2 (sin + s cos)) / (M + m) - s g
                np.multiply(s, sin, out=lever)
                np.subtract(cos, lever, out=lever)  # lever = cos - s sin
            den = cos * lever
            den *= m
            den /= total
            np.subtract(k.four_thirds, den, out=den)  # 4 / 3 as an array: cheaper than a Python float
            den *= half
            th_acc = cos * temp
            np.subtract(g_sin, th_acc, out=th_acc)
            th_acc /= den
            np.multiply(ml, th_acc, out=den)
            den *= lever
            den /= total
            np.subtract(temp, den, out=den)
            out[:, 1] = den
            out[:, 3] = th_acc
            if not need_normal and s is None:
                return None
            # N_c = (M + m) g - m l (theta'' sin + theta'^2 cos)
            np.multiply(th_acc, sin, out=temp)
            temp *= ml
            buf = mlw2 * cos
            temp += buf
            np.subtract(total_g, temp, out=temp)
            return temp

        if not friction:
            return out, solve(None)
        normal = solve(slip)
        # Florian 2007: solve assuming N_c > 0, then solve again where N_c came out negative
        # (only friction depends on that sign).
        negative = normal < 0.0
        if np.count_nonzero(negative):
            normal = solve(np.where(negative, -slip, slip))
        return out, normal

    def _two_poles(self, state: Array, force: Array, params: Array) -> Array:
        c = self._col
        g = params[:, c["gravity"]]
        x_dot = state[:, 1]
        out = np.empty_like(state)
        out[:, 0] = x_dot
        out[:, 2] = state[:, 3]
        out[:, 4] = state[:, 5]
        # Cart: F - mu_c sgn(x_dot) + sum_i F~_i over M + sum_i m~_i (Wieland 1991).
        num = np.divide(x_dot, params[:, c["friction_speed"]])
        np.tanh(num, out=num)
        num *= params[:, c["cart_friction_force"]]
        np.subtract(force[:, 0], num, out=num)
        den = params[:, c["cart_mass"]].copy()
        poles = []
        for col, m_name, l_name, mu_name in (
            (2, "pole_mass", "pole_half_length", "pole_friction"),
            (4, "pole2_mass", "pole2_half_length", "pole2_friction"),
        ):
            m = params[:, c[m_name]]
            half = params[:, c[l_name]]
            w = state[:, col + 1]
            sin = np.sin(state[:, col])
            cos = np.cos(state[:, col])
            # Pivot friction as an acceleration of the pole's centre, mu_p theta' / (m l).
            piv = params[:, c[mu_name]] * w
            piv /= m
            piv /= half
            g_sin = g * sin
            # Effective force m (l w^2 sin + 3/4 cos (piv - g sin)) and mass m (1 - 3/4 cos^2).
            t = np.subtract(piv, g_sin)
            t *= cos
            t *= 0.75
            eff = w * w
            eff *= half
            eff *= sin
            eff += t
            eff *= m
            num += eff
            np.multiply(cos, cos, out=t)
            t *= -0.75
            t += 1.0
            t *= m
            den += t
            poles.append((col, half, cos, piv, g_sin))
        num /= den  # x_acc
        out[:, 1] = num
        for col, half, cos, piv, g_sin in poles:
            # theta'' = 3 / (4 l) (g sin - x'' cos - mu_p theta' / (m l))
            cos *= num
            np.subtract(g_sin, cos, out=g_sin)
            g_sin -= piv
            g_sin *= 0.75
            g_sin /= half
            out[:, col + 1] = g_sin
        return out

    # ----------------------------------------------------------- task
    def actuate(self, action: Array, params: Array) -> Array:
        return action * params[:, self._col["max_force"], None]

    def check(self, state: Array, force: Array, params: Array) -> Array:
        # Column by column: axis=1 reductions over two or three columns are slow at large N.
        fail = params[:, self._col["fail_angle"]]
        fell = np.abs(state[:, 2]) > fail
        if self.poles == 2:
            fell |= np.abs(state[:, 4]) > fail
        off = np.abs(state[:, 0]) > params[:, self._col["track_half_length"]]
        if len(fell) < 2048:  # small batches: fewest calls (off -> 2, then fell -> 1 over it)
            code = np.add(off, off, dtype=np.int64)
            code[fell] = 1
            return code
        # fell -> 1, else off -> 2, else 0, branch-free on bytes (np.where on random masks mispredicts)
        off &= ~fell
        code = off.view(np.uint8) << 1
        code |= fell.view(np.uint8)
        return code.astype(np.int64)

    def constraint_slack(self, state: Array, force: Array, params: Array) -> Array:
        """``min(1 - |theta_i| / fail_angle, 1 - |x| / track_half_length)``."""
        fail = params[:, self._col["fail_angle"]]
        tilt = np.abs(state[:, 2])
        if self.poles == 2:
            tilt = np.maximum(tilt, np.abs(state[:, 4]))
        return np.minimum(1.0 - tilt / fail, 1.0 - np.abs(state[:, 0]) / params[:, self._col["track_half_length"]])

    def reward(self, state: Array, action: Array, params: Array, failure: Array, success: Array) -> Array:
        fail = params[:, self._col["fail_angle"]]
        tilt = state[:, 2] / fail
        tilt *= tilt
        if self.poles == 2:
            tilt2 = state[:, 4] / fail
            tilt2 *= tilt2
            tilt += tilt2
            tilt *= 0.5
        offset = state[:, 0] / params[:, self._col["track_half_length"]]
        offset *= offset
        tilt *= -ANGLE_WEIGHT
        tilt += 1.0
        offset *= OFFSET_WEIGHT
        tilt -= offset
        # 0 for the failing period: multiply by the mask (no branch per row), then + 0.0 turns the
        # -0.0 of a negative value into 0.0; a finite tilt times 1.0 plus 0.0 is itself
        tilt *= failure == 0
        tilt += 0.0
        return tilt

    def observe(self, state: Array, params: Array) -> Array:
        if self.observe_mode == "positions":
            return state[:, 0::2].copy()
        return state.copy()

    def start_center(self, params: Array) -> Array:
        center = np.zeros((params.shape[0], self.state_dim))
        if self.poles == 2:
            center[:, 2] = TWO_POLE_START_TILT
        return center

    # ----------------------------------------------------------- measures
    def episode_metrics(self, states: Array, actions: Array, params: Array, steps: Array) -> dict[str, EpisodeMetric]:
        """The generic measures (:meth:`Physics.episode_metrics`) plus the balancing ones.

        * ``peak_angle`` (rad): largest |theta| of any pole over the episode.
        * ``peak_cart_excursion`` (m): largest |x| over the episode.
        * ``settling_time`` (s): first time after which every |theta| stays
          within ``SETTLE_FRACTION`` (10 %) of ``fail_angle`` and |x| within
          10 % of ``track_half_length`` to the end of the episode; inf: never.
        * ``residual_angle_rms`` (rad): RMS of the largest |theta| over the
          last ``RESIDUAL_WINDOW_S`` (2 s) of the episode (all of it if shorter).
        """
        out = super().episode_metrics(states, actions, params, steps)
        states = np.asarray(states, dtype=float)
        n = states.shape[0]
        valid = state_mask(n, steps)
        angle = np.abs(states[:, :, 2::2]).max(axis=2)  # (T+1, N): the worst pole at each instant
        x = np.abs(states[:, :, 0])
        band = SETTLE_FRACTION * params[:, self._col["fail_angle"]]
        room = SETTLE_FRACTION * params[:, self._col["track_half_length"]]
        tail = tail_mask(n, steps, self.dt)
        residual = np.sqrt(column_sums(np.where(tail, angle * angle, 0.0)) / np.maximum(tail.sum(axis=0), 1))
        out["peak_angle"] = EpisodeMetric(masked_max(angle, valid), "rad", "largest |theta| of any pole")
        out["peak_cart_excursion"] = EpisodeMetric(masked_max(x, valid), "m", "largest |x| of the cart")
        out["settling_time"] = EpisodeMetric(
            holds_from((angle <= band) & (x <= room), steps, self.dt), "s",
            f"first time after which |theta| <= {SETTLE_FRACTION:g} fail_angle and |x| <= {SETTLE_FRACTION:g} "
            "track_half_length hold to the end (inf: never)",
        )
        out["residual_angle_rms"] = EpisodeMetric(
            residual, "rad", "RMS of the largest |theta| over the last 2 s of the episode"
        )
        return out

    def trace_limits(self, params: Array) -> dict[str, list[TraceLimit]]:
        fail = float(params[self._col["fail_angle"]])
        track = float(params[self._col["track_half_length"]])
        out = {"x": [TraceLimit(-track, track, "track ends")]}
        for name in self.state_names[2::2]:
            out[name] = [TraceLimit(-fail, fail, "fail_angle")]
        return out

    # ----------------------------------------------------------- drawing
    def draw(self, ax: Any, state: Array, params: Array) -> None:
        from matplotlib.patches import Rectangle

        c = self._col
        track = float(params[c["track_half_length"]])
        fail = float(params[c["fail_angle"]])
        lengths = [2.0 * float(params[c["pole_half_length"]])]
        if self.poles == 2:
            lengths.append(2.0 * float(params[c["pole2_half_length"]]))
        reach = max(lengths)
        cart_w = 0.15 * track + 0.05
        cart_h = 0.5 * cart_w
        x = float(state[0])
        ax.plot([-track, track], [-0.5 * cart_h, -0.5 * cart_h], color="0.35", lw=2, zorder=1)
        for end in (-track, track):
            ax.plot([end, end], [-cart_h, 0.2 * cart_h], color="0.35", lw=3, zorder=1)
        ax.add_patch(
            Rectangle((x - 0.5 * cart_w, -0.5 * cart_h), cart_w, cart_h, facecolor="0.6", edgecolor="0.2", zorder=2)
        )
        for side in (-1.0, 1.0):
            ang = side * fail
            ax.plot([x, x + reach * math.sin(ang)], [0.0, reach * math.cos(ang)], color="tab:red", lw=0.6, ls=":")
        for k, (length, color) in enumerate(zip(lengths, ("tab:blue", "tab:orange"), strict=False)):
            th = float(state[2 + 2 * k])
            tip = (x + length * math.sin(th), length * math.cos(th))
            ax.plot([x, tip[0]], [0.0, tip[1]], color=color, lw=4 if k == 0 else 3, solid_capstyle="round", zorder=3)
        ax.plot([x], [0.0], marker="o", color="k", ms=4, zorder=4)
        ax.set_aspect("equal")
        ax.set_xlim(-track - reach - cart_w, track + reach + cart_w)
        ax.set_ylim(-reach - cart_h, reach + cart_h)
        ax.set_xlabel("x [m]")
        ax.set_yticks([])


class CartPoleEnv(PhysicsEnv):
    r"""One or two poles balanced on a cart that moves along a straight track.

    Description
    -----------
    A cart of mass ``cart_mass`` runs on a horizontal track centred at x = 0.
    One pole (``poles=1``) or two poles of different lengths side by side
    (``poles=2``) are hinged on the cart and must be kept upright by pushing the
    cart left and right. Poles are uniform rods (moment of inertia about the
    centre m (2 l)^2 / 12, where l is the half-length). Unlike gymnasium's
    ``CartPole-v1`` the force is continuous, the track and the pivots have
    friction, and the equations are integrated with RK4 by default.

    Sign convention (gymnasium's): theta = 0 is upright, positive theta leans
    the pole toward +x, a positive force pushes the cart toward +x.

    Action space
    ------------
    ``Box(-1, 1, (1,))``: force on the cart = action * ``max_force`` (N),
    held over one control period ``dt``.

    Observation space
    -----------------
    ``observe="full"`` (default): the state. One pole
    ``[x, x_dot, theta, theta_dot]`` (m, m/s, rad, rad/s); two poles
    ``[x, x_dot, theta1, theta1_dot, theta2, theta2_dot]``.
    ``observe="positions"``: the partially observed variant without velocities,
    ``[x, theta]`` or ``[x, theta1, theta2]``; a controller must estimate the
    velocities itself (recurrent network).

    Rewards
    -------
    Shaped so that evolution sees a gradient before it can balance: each
    control period without failure earns
    ``1 - 0.5 * mean_i (theta_i / fail_angle)^2 - 0.25 * (x / track_half_length)^2``
    (between 0.25 and 1); the period that fails earns 0.

    Starting state
    --------------
    One pole: every state variable uniform in (-0.05, 0.05), as gymnasium's
    CartPole-v1. Two poles: the benchmark's fixed start, the long pole tilted
    0.07 rad (about 4 degrees; value from memory), everything else zero.
    ``start_spread={...}`` changes the half-widths per state name.

    Episode end
    -----------
    Failure words: ``pole_fell`` (|theta| > ``fail_angle`` for any pole),
    ``off_track`` (|x| > ``track_half_length``), ``diverged`` (the numbers blew
    up). Success (survive): the time limit is reached with no failure, which
    truncates the episode. Defaults: 10 s (500 steps, as CartPole-v1) for one
    pole, 20 s for two poles; the two-pole benchmark's 100,000 steps is
    ``time_limit=2000``.

    Arguments
    ---------
    ``gymnasium.make("pretrial/CartPole-v0", ...)`` accepts

    ============== ========================================================
    poles          1 (default) or 2
    observe        ``"full"`` (default) or ``"positions"``
    dt             control period, s (default 0.02)
    substeps       integration steps per control period (default 2)
    integrator     ``"rk4"`` (default) or ``"euler"``
    time_limit     episode length, s
    start_spread   ``{state name: half-width}`` of the uniform start
    params         ``{name: value}`` overrides of the parameter table
    ============== ========================================================

    One-pole parameters (nominal): gravity 9.8 m/s^2, cart_mass 1.0 kg,
    pole_mass 0.1 kg, pole_half_length 0.5 m, max_force 10 N (gymnasium's
    CartPole-v1 constants); cart_friction 5e-4 (Coulomb coefficient) and
    pole_friction 2e-6 N m s, the friction values of Barto, Sutton & Anderson
    (1983) (from memory), small enough to leave the task unchanged but not
    zero, because no real track is frictionless; pass
    ``params={"cart_friction": 0, "pole_friction": 0}`` for the ideal plant.
    Two-pole parameters follow the benchmark setting of Stanley & Miikkulainen
    (2002): cart 1 kg; poles 0.1 kg / half-length 0.5 m and 0.01 kg /
    half-length 0.05 m; 10 N; track +-2.4 m; fail angle 36 degrees; cart
    friction force 5e-4 N; pivot friction 2e-6 N m s; RK4 at 0.01 s with a
    decision every 0.02 s (dt=0.02, substeps=2).

    Equations
    ---------
    One pole, Florian (2007), "Correct equations for the dynamics of the
    cart-pole system", with cart mass M, pole mass m, half-length l, Coulomb
    coefficient mu_c, pivot friction mu_p, force F:

    .. math::

        N_c &= (M + m) g - m l (\ddot\theta \sin\theta + \dot\theta^2 \cos\theta) \\
        \ddot x &= \frac{F + m l (\dot\theta^2 \sin\theta - \ddot\theta \cos\theta)
                   - \mu_c N_c \,\mathrm{sgn}(N_c \dot x)}{M + m} \\
        \tfrac{4}{3} l \ddot\theta &= g \sin\theta - \ddot x \cos\theta - \frac{\mu_p \dot\theta}{m l}

    Eliminating N_c and x'' with s = mu_c sgn(N_c) sgn(x_dot) gives

    .. math::

        \ddot\theta = \frac{g \sin\theta - \cos\theta \left(\frac{F + m l \dot\theta^2
            (\sin\theta + s \cos\theta)}{M + m} - s g\right) - \frac{\mu_p \dot\theta}{m l}}
            {l \left(\frac43 - \frac{m \cos\theta (\cos\theta - s \sin\theta)}{M + m}\right)}

    solved first assuming N_c > 0 and again, per instance, where N_c comes out
    negative (Florian's procedure); with s = 0 it reduces to gymnasium's
    CartPole-v1. The tests check the result against the three balances above.

    Two poles (i = 1, 2), Wieland (1991) as used by Gomez & Miikkulainen and
    Stanley & Miikkulainen (2002), with a cart friction force mu_c in N:

    .. math::

        \tilde F_i &= m_i l_i \dot\theta_i^2 \sin\theta_i
                     + \tfrac34 m_i \cos\theta_i \left(\frac{\mu_{pi}\dot\theta_i}{m_i l_i} - g \sin\theta_i\right) \\
        \tilde m_i &= m_i (1 - \tfrac34 \cos^2\theta_i) \\
        \ddot x &= \frac{F - \mu_c \mathrm{sgn}(\dot x) + \sum_i \tilde F_i}{M + \sum_i \tilde m_i} \\
        \ddot\theta_i &= \frac{3}{4 l_i}\left(g \sin\theta_i - \ddot x \cos\theta_i
                         - \frac{\mu_{pi}\dot\theta_i}{m_i l_i}\right)

    Coulomb friction near zero speed: ``sgn(x_dot)`` is replaced by
    ``tanh(x_dot / v_eps)`` with ``v_eps = friction_speed`` (0.01 m/s). The
    smoothed force still opposes the motion everywhere, so friction never adds
    energy; the price is a slow creep under a force below the breakaway force
    (steady speed ``v_eps * atanh(F / F_breakaway)``). Large friction with a
    small ``friction_speed`` makes the equations stiff: keep
    ``(dt / substeps) * F_c / (cart_mass * friction_speed)`` below about 2, where
    F_c is the friction force (about ``cart_friction * (M + m) g`` for one pole,
    ``cart_friction_force`` for two); the parameter ranges (``cart_friction`` up
    to 0.2, ``cart_friction_force`` up to 2 N) respect this at the default
    RK4 step of 0.01 s with the nominal masses.

    Pivot friction is viscous (torque ``-mu_p theta_dot``), as in Florian 2007.

    Metrics
    -------
    What ``pretrial replay`` measures per episode (besides the generic
    ``effort_rms_force``, RMS of the command as a fraction of full scale, and
    ``saturated_fraction``, the fraction of periods at >= 0.999 of full scale):

    ==================== ===== ===================================================
    peak_angle           rad   largest |theta| of any pole
    peak_cart_excursion  m     largest |x|
    settling_time        s     first time after which every |theta| <= 0.1
                               fail_angle and |x| <= 0.1 track_half_length hold
                               to the end (inf: never)
    residual_angle_rms   rad   RMS of the largest |theta| over the last 2 s
    ==================== ===== ===================================================
    """

    physics_type = CartPolePhysics


class CartPoleVectorEnv(PhysicsVectorEnv):
    """N cart-poles stepped together, each with its own parameters (see :class:`CartPoleEnv`)."""

    physics_type = CartPolePhysics
