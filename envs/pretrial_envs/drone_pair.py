"""Two planar quadrotors that must swap places without coming too close.

The physics core is :class:`DronePairPhysics`; :class:`DronePairEnv` and
:class:`DronePairVectorEnv` are its gymnasium front doors. The full description
(equations, spaces, rewards, episode end) is the docstring of :class:`DronePairEnv`.
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
    masked_min,
    state_mask,
)

_BODY = ("x", "z", "pitch", "x_dot", "z_dot", "pitch_rate")
_BODY_UNITS = ("m", "m", "rad", "m/s", "m/s", "rad/s")
_BLOCK = (*_BODY, "goal_dx", "goal_dz", "other_dx", "other_dz", "other_dx_dot", "other_dz_dot")
_BLOCK_UNITS = (*_BODY_UNITS, "m", "m", "m", "m", "m/s", "m/s")

#: Direction of travel per drone: drone 0 flies toward +x, drone 1 toward -x.
_HEADING = np.array([1.0, -1.0])
_HEADING.setflags(write=False)

#: Row layout of the state: two drone blocks of 6, then 4 rotor thrusts, then 2 gust components.
ROTORS = slice(12, 16)
GUST = slice(16, 18)
# State rows of one quantity for (drone 0, drone 1).
_PITCH, _VX, _VZ, _OMEGA = [2, 8], [3, 9], [4, 10], [5, 11]
_POS, _VEL = [0, 1, 2, 6, 7, 8], [3, 4, 5, 9, 10, 11]
_LEFT, _RIGHT = [12, 14], [13, 15]

# Reward weights (see reward_doc).
NEAR_WEIGHT = 0.5  # per second at half the minimum separation inside the near zone
EFFORT_WEIGHT = 0.5  # per second per mean squared command deviation from hover

PARAMS = ParamTable(
    [
        ParamSpec("gravity", "m/s^2", 9.81, 0.0, 30.0, "gravitational acceleration (acts along -z)"),
        ParamSpec("mass", "kg", 0.8, 0.05, 10.0, "mass of each drone"),
        ParamSpec("arm_length", "m", 0.2, 0.03, 1.5, "distance from a rotor to the drone's centre of mass"),
        ParamSpec("inertia", "kg m^2", 0.008, 1e-4, 1.0, "moment of inertia of each drone about its pitch axis"),
        ParamSpec("max_thrust", "N", 8.0, 0.1, 200.0, "largest thrust of one rotor (command +1)", "limit"),
        ParamSpec(
            "rotor_time_constant",
            "s",
            0.05,
            0.01,
            1.0,
            "first-order lag from thrust command to thrust (keep above dt/substeps)",
        ),
        ParamSpec("drag_linear", "N s/m", 0.25, 0.0, 20.0, "drag force per unit airspeed (linear term)", "loss"),
        ParamSpec("drag_quadratic", "N s^2/m^2", 0.03, 0.0, 5.0, "drag force per airspeed squared", "loss"),
        ParamSpec("wind_x", "m/s", 0.0, -20.0, 20.0, "mean horizontal wind (air velocity, +x)", "disturbance"),
        ParamSpec("wind_z", "m/s", 0.0, -10.0, 10.0, "mean vertical wind (air velocity, +z up)", "disturbance"),
        ParamSpec("gust_std", "m/s", 0.3, 0.0, 10.0, "stationary std of each gust velocity component", "disturbance"),
        ParamSpec(
            "gust_time_constant",
            "s",
            1.0,
            0.0,
            60.0,
            "correlation time of the gust process (0: a fresh gust every control period)",
            "disturbance",
        ),
        ParamSpec("min_separation", "m", 0.6, 0.0, 10.0, "closest allowed centre-to-centre distance", "task"),
        ParamSpec("field_half_width", "m", 3.0, 0.2, 100.0, "the field spans |x| <= this", "task"),
        ParamSpec("field_height", "m", 4.0, 0.2, 100.0, "the field spans 0 < z <= this", "task"),
        ParamSpec("start_x", "m", 1.5, 0.05, 100.0, "drone 0 starts at x = -start_x, drone 1 at +start_x", "task"),
        ParamSpec("start_height", "m", 2.0, 0.0, 100.0, "height of both starts (and goals)", "task"),
        ParamSpec("goal_tolerance", "m", 0.15, 0.001, 10.0, "distance to the goal counted as arrived", "task"),
        ParamSpec("goal_speed", "m/s", 0.25, 0.001, 10.0, "speed below which an arrived drone is settled", "task"),
        ParamSpec(
            "pitch_limit", "rad", math.pi / 2, 0.05, math.pi, "largest |pitch| before a drone has flipped", "task"
        ),
    ]
)


def _col(params: Array, name: str) -> Array:
    """Column ``name`` of ``params`` shaped (N, 1) to broadcast over the two drones."""
    return params[:, PARAMS.index(name), None]


def _per_batch(params: Array) -> tuple[Array, Array]:
    """Values of the parameters alone, formed once per batch: ``1 / mass`` and ``arm_length / inertia``."""
    pt = params.T
    return 1.0 / pt[PARAMS.index("mass")], pt[PARAMS.index("arm_length")] / pt[PARAMS.index("inertia")]


class DronePairPhysics(Physics):
    """Physics core of ``pretrial/DronePair-v0``: two planar quadrotors in a gusty wind.

    Parameters
    ----------
    hold_time : float, optional
        Seconds both drones must stay settled at their goals for success (default 1).
    **kwargs
        ``dt``, ``substeps``, ``integrator``, ``time_limit``, ``start_spread`` as
        for :class:`~pretrial_envs.core.Physics`.
    """

    env_id = "pretrial/DronePair-v0"
    summary = "two planar quadrotors with rotor lag, drag and gusty wind that must swap places without coming too close"
    param_table = PARAMS
    state_names = (
        *(f"d{i}_{n}" for i in (0, 1) for n in _BODY),
        "d0_thrust_left",
        "d0_thrust_right",
        "d1_thrust_left",
        "d1_thrust_right",
        "gust_x",
        "gust_z",
    )
    state_units = (*_BODY_UNITS, *_BODY_UNITS, "N", "N", "N", "N", "m/s", "m/s")
    #: two blocks of 12, each centred on its drone (world axes): one shared network can fly either drone
    obs_blocks = 2
    #: typical magnitudes per block entry (field size, pitch limit, common rates)
    obs_scale = (2.0, 2.0, 0.5, 1.0, 1.0, 2.0, 4.0, 2.0, 2.0, 2.0, 1.0, 1.0) * 2
    obs_names = tuple(f"d{i}_{n}" for i in (0, 1) for n in _BLOCK)
    obs_units = (*_BLOCK_UNITS, *_BLOCK_UNITS)
    action_names = ("d0_rotor_left", "d0_rotor_right", "d1_rotor_left", "d1_rotor_right")
    action_units = ("-", "-", "-", "-")
    failure_modes = ("collision", "crashed", "out_of_bounds", "flipped")
    success_mode = "reach"
    hold_time = 1.0
    reward_doc = (
        f"per control period -dt * (miss + {NEAR_WEIGHT:g} near + {EFFORT_WEIGHT:g} effort), where miss = mean over "
        "the drones of min(distance to goal / (2 start_x), 1), near = clip((2 min_separation - separation) / "
        "min_separation, 0, 1) and effort = mean over the 4 rotors of (action - hover action)^2; plus time_limit on "
        "success; on collision, crashed, out_of_bounds, flipped or diverged (not on timeout), minus the worst cost "
        f"rate (1 + {NEAR_WEIGHT:g} + {EFFORT_WEIGHT:g} (1 + |hover action|)^2) times the seconds left to the time "
        "limit plus dt. A cost while flying: arriving sooner scores better, failing later scores better than failing "
        "sooner, failing never pays and succeeding always does"
    )
    noise_dim = 2
    default_dt = 0.02
    default_substeps = 2
    default_integrator = "rk4"
    default_time_limit = 10.0
    default_start_spread: ClassVar[dict[str, float]] = {
        f"d{i}_{n}": s for i in (0, 1) for n, s in zip(_BODY, (0.1, 0.1, 0.05, 0.1, 0.1, 0.1), strict=True)
    }

    def __init__(self, **kwargs: Any):
        super().__init__(**kwargs)
        self.success_rule = (
            "both drones within goal_tolerance of their goals (each other's start) and slower than goal_speed, "
            f"continuously for {self.hold_time:g} s (hold_time)"
        )

    def options(self) -> dict[str, Any]:
        # always named: the drone pair's options recorded it before the core took the option
        return {**super().options(), "hold_time": self.hold_time}

    # ----------------------------------------------------------- dynamics
    def actuate(self, action: Array, params: Array) -> Array:
        # [-1, 1] -> [0, max_thrust]: a rotor never pushes down.
        return (action + 1.0) * (0.5 * self.param(params, "max_thrust"))[:, None]

    def derivatives(self, state: Array, force: Array, params: Array) -> Array:
        # Work on rows of the transposed state: each quantity of both drones is one (2, N) view
        # (rows j and j + 6, or j and j + 2 for the rotors), and the results are written into the
        # rows of ``out`` in place: on small batches every numpy call and every fresh temporary
        # costs more than its arithmetic. Each line computes the plain expression of the comments
        # in the same order (a + b, a * b equal b + a, b * a), so the results are the same floats
        # (tests/envs/test_drone_pair.py checks it bit for bit).
        st = state.T
        inv_m, arm_over_inertia = self.batch_constants(params, _per_batch)
        pt = params.T
        col = PARAMS.index
        pitch, vx, vz = st[2:9:6], st[3:10:6], st[4:11:6]
        left, right = st[12:15:2], st[13:16:2]
        out = np.empty((self.state_dim, state.shape[0]))
        out[0:3] = st[3:6]  # positions and pitch advance by the velocities and pitch rate
        out[6:9] = st[9:12]
        # Drag acts on the velocity relative to the air (mean wind plus the shared gust):
        # rel = v - (wind + gust), drag = drag_linear + drag_quadratic * sqrt(rel_x^2 + rel_z^2)
        rel_x = np.subtract(vx, pt[col("wind_x")] + st[16])
        rel_z = np.subtract(vz, pt[col("wind_z")] + st[17])
        drag = rel_x * rel_x
        buf = rel_z * rel_z
        drag += buf
        np.sqrt(drag, out=drag)
        drag *= pt[col("drag_quadratic")]
        drag += pt[col("drag_linear")]
        total = left + right
        # x'' = (-total sin(pitch) - drag rel_x) / m, as (...) * (1 / m)
        acc = out[3:10:6]
        np.negative(total, out=acc)
        np.sin(pitch, out=buf)
        acc *= buf
        rel_x *= drag
        acc -= rel_x
        acc *= inv_m
        # z'' = (total cos(pitch) - drag rel_z) / m - g
        acc = out[4:11:6]
        np.cos(pitch, out=buf)
        np.multiply(total, buf, out=acc)
        rel_z *= drag
        acc -= rel_z
        acc *= inv_m
        acc -= pt[col("gravity")]
        # pitch'' = (right - left) * (arm_length / inertia)
        acc = out[5:12:6]
        np.subtract(right, left, out=acc)
        acc *= arm_over_inertia
        # first-order rotors: (command - thrust) / rotor_time_constant
        acc = out[ROTORS]
        np.subtract(force.T, st[ROTORS], out=acc)
        acc /= pt[col("rotor_time_constant")]
        out[GUST] = 0.0  # the gust is held within a control period
        return out.T

    def advance_disturbance(self, state: Array, params: Array, noise: Array) -> Array:
        # Ornstein-Uhlenbeck gust with its exact one-period update (Gillespie 1996, from memory).
        tau = _col(params, "gust_time_constant")
        with np.errstate(divide="ignore"):
            ratio = -self.dt / tau  # tau = 0 -> -inf -> white gusts
        keep = np.exp(ratio)
        fresh = _col(params, "gust_std") * np.sqrt(-np.expm1(2.0 * ratio))
        out = state.copy()
        out[:, GUST] = keep * state[:, GUST] + fresh * noise
        return out

    # ----------------------------------------------------------- task
    def goals(self, params: Array) -> tuple[Array, Array]:
        """Goal x and z of (drone 0, drone 1), each (2, N): drone 0's at +start_x, drone 1's at -start_x."""
        gx = _HEADING[:, None] * self.param(params, "start_x")
        gz = np.broadcast_to(self.param(params, "start_height"), gx.shape)
        return gx, gz

    def start_center(self, params: Array) -> Array:
        s = np.zeros((self.state_dim, params.shape[0]))
        gx, gz = self.goals(params)
        s[[0, 6]] = -gx  # each starts at the other's goal
        s[[1, 7]] = gz
        s[ROTORS] = 0.5 * self.param(params, "mass") * self.param(params, "gravity")
        return np.ascontiguousarray(s.T)

    def target_state(self, params: Array) -> Array:
        """Each drone hovering level at its goal: rotors at m g / 2 (N), velocities and gust 0."""
        s = np.zeros((self.state_dim, params.shape[0]))
        gx, gz = self.goals(params)
        s[[0, 6]] = gx
        s[[1, 7]] = gz
        s[ROTORS] = 0.5 * self.param(params, "mass") * self.param(params, "gravity")
        return np.ascontiguousarray(s.T)

    def regulated(self) -> dict[str, tuple[str, float]]:
        """Each drone's position at its goal, banded by ``goal_tolerance`` per axis."""
        tol = self.param_table["goal_tolerance"].nominal
        return {n: ("m", tol) for n in ("d0_x", "d0_z", "d1_x", "d1_z")}

    def regulation_band(self, params: Array) -> Array:
        return np.repeat(self.param(params, "goal_tolerance")[:, None], 4, axis=1)

    # ----------------------------------------------------------- measures
    def episode_metrics(self, states: Array, actions: Array, params: Array, steps: Array) -> dict[str, EpisodeMetric]:
        """The generic measures (:meth:`Physics.episode_metrics`, incl. ``settling_time``) plus the pair's.

        * ``min_separation`` (m): smallest centre-to-centre distance of the
          drones over the episode (worst = smallest).
        * ``peak_path_deviation`` (m): largest distance of either drone from
          the straight segment between its own start position (the episode's
          first state) and its goal.
        """
        out = super().episode_metrics(states, actions, params, steps)
        st = np.asarray(states, dtype=float)
        valid = state_mask(st.shape[0], steps)
        sep = np.hypot(st[:, :, 0] - st[:, :, 6], st[:, :, 1] - st[:, :, 7])
        gx, gz = self.goals(params)
        deviation = np.full(st.shape[:2], -np.inf)
        for i in (0, 1):
            px, pz = st[:, :, 6 * i], st[:, :, 6 * i + 1]  # (T+1, N)
            ux, uz = gx[i] - px[0], gz[i] - pz[0]
            span = ux * ux + uz * uz
            # nearest point of the segment: projection clipped to its ends (a zero-length one is its start)
            along = np.clip(((px - px[0]) * ux + (pz - pz[0]) * uz) / np.where(span > 0, span, 1.0), 0.0, 1.0)
            d = np.hypot(px - px[0] - along * ux, pz - pz[0] - along * uz)
            deviation = np.maximum(deviation, d)
        out["min_separation"] = EpisodeMetric(
            masked_min(sep, valid), "m", "smallest centre-to-centre distance of the drones", "min"
        )
        out["peak_path_deviation"] = EpisodeMetric(
            masked_max(deviation, valid), "m", "largest distance of a drone from the straight line start -> goal"
        )
        return out

    def trace_limits(self, params: Array) -> dict[str, list[TraceLimit]]:
        p = dict(zip(PARAMS.names, map(float, params), strict=True))
        hw, tol = p["field_half_width"], p["goal_tolerance"]
        out: dict[str, list[TraceLimit]] = {}
        for i, goal in enumerate(p["start_x"] * _HEADING):
            out[f"d{i}_x"] = [TraceLimit(-hw, hw, "field"), TraceLimit(goal - tol, goal + tol, f"d{i} goal", "band")]
            out[f"d{i}_z"] = [
                TraceLimit(0.0, p["field_height"], "ground / ceiling"),
                TraceLimit(p["start_height"] - tol, p["start_height"] + tol, "goal height", "band"),
            ]
            out[f"d{i}_pitch"] = [TraceLimit(-p["pitch_limit"], p["pitch_limit"], "pitch_limit")]
        for name in self.state_names[ROTORS]:
            out[name] = [TraceLimit(0.0, p["max_thrust"], "thrust range")]
        return out

    def _distances(self, state: Array, params: Array) -> tuple[Array, Array, Array]:
        """Distance to goal (2, N), speed (2, N) and separation (N,)."""
        st = state.T
        gx, gz = self.goals(params)
        dist = np.hypot(st[[0, 6]] - gx, st[[1, 7]] - gz)
        speed = np.hypot(st[_VX], st[_VZ])
        sep = np.hypot(st[0] - st[6], st[1] - st[7])
        return dist, speed, sep

    def check(self, state: Array, force: Array, params: Array) -> Array:
        st = state.T
        x, z, pitch = st[[0, 6]], st[[1, 7]], st[_PITCH]
        sep = np.hypot(st[0] - st[6], st[1] - st[7])
        collision = sep < self.param(params, "min_separation")
        # The lower rotor touches the ground first.
        crashed = (z - self.param(params, "arm_length") * np.abs(np.sin(pitch)) <= 0.0).any(axis=0)
        out = ((np.abs(x) > self.param(params, "field_half_width")) | (z > self.param(params, "field_height"))).any(
            axis=0
        )
        flipped = (np.abs(pitch) > self.param(params, "pitch_limit")).any(axis=0)
        # The first word in failure_modes order wins when several apply.
        return np.select([collision, crashed, out, flipped], [1, 2, 3, 4], 0).astype(np.int64)

    def constraint_slack(self, state: Array, force: Array, params: Array) -> Array:
        """Smallest normalized margin of the four failure rules, over both drones.

        Separation ``sep / min_separation - 1``; ground ``z_low / start_height``
        (lower rotor height); field ``1 - |x| / field_half_width`` and
        ``1 - z / field_height``; attitude ``1 - |pitch| / pitch_limit``.
        """
        st = state.T
        x, z, pitch = st[[0, 6]], st[[1, 7]], st[_PITCH]
        p = self.param
        sep = np.hypot(st[0] - st[6], st[1] - st[7]) / p(params, "min_separation") - 1.0
        ground = (z - p(params, "arm_length") * np.abs(np.sin(pitch))) / p(params, "start_height")
        field = np.minimum(1.0 - np.abs(x) / p(params, "field_half_width"), 1.0 - z / p(params, "field_height"))
        tilt = 1.0 - np.abs(pitch) / p(params, "pitch_limit")
        worst = np.minimum(np.minimum(ground, field), tilt).min(axis=0)
        return np.minimum(worst, sep)

    def in_goal(self, state: Array, params: Array) -> Array:
        dist, speed, _ = self._distances(state, params)
        settled = (dist <= self.param(params, "goal_tolerance")) & (speed <= self.param(params, "goal_speed"))
        return settled.all(axis=0)

    def hover_action(self, params: Array) -> Array:
        """The rotor command (N,) whose thrust holds a level drone's weight, m g / 2 per rotor."""
        return self.param(params, "mass") * self.param(params, "gravity") / self.param(params, "max_thrust") - 1.0

    def safe_action(self, params: Array) -> Array:
        """Hover thrust on all 4 rotors: each drone's weight m g shared by its 2 rotors, m g / 2 per rotor,
        which ``actuate`` (thrust = (a + 1) max_thrust / 2) gives at a = m g / max_thrust - 1.

        Clipped to [-1, 1] (+1 where m g > 2 max_thrust: no hover then). Open
        loop it holds no attitude or position: a fallback only.
        """
        hover = np.clip(self.hover_action(np.asarray(params, dtype=float)[None]), -1.0, 1.0)
        return np.repeat(hover, self.action_dim)

    def reward(self, state: Array, action: Array, params: Array, failure: Array, success: Array) -> Array:
        dist, _, sep = self._distances(state, params)
        span = 2.0 * self.param(params, "start_x")
        miss = 0.5 * (np.minimum(dist[0] / span, 1.0) + np.minimum(dist[1] / span, 1.0))
        min_sep = self.param(params, "min_separation")
        near = np.clip((2.0 * min_sep - sep) / np.maximum(min_sep, 1e-12), 0.0, 1.0)
        effort = ((action - self.hover_action(params)[:, None]) ** 2).mean(axis=1)
        return -self.dt * (miss + NEAR_WEIGHT * near + EFFORT_WEIGHT * effort)

    def worst_cost_rate(self, params: Array) -> Array:
        """Largest running cost per second (N,): miss <= 1, near <= 1, |action - hover| <= 1 + |hover|."""
        return 1.0 + NEAR_WEIGHT + EFFORT_WEIGHT * (1.0 + np.abs(self.hover_action(params))) ** 2

    def terminal_reward(self, params: Array, failure: Array, success: Array, remaining: Array) -> Array:
        # A success is paid time_limit; a failure is charged the worst cost rate for the rest of the
        # time limit and once more for a whole dt, so it never pays better than flying on, however late.
        charge = self.worst_cost_rate(params) * (remaining + self.dt)
        return np.where(success, self.time_limit, np.where(failure != 0, -charge, 0.0))

    def observe(self, state: Array, params: Array) -> Array:
        st = state.T
        gx, gz = self.goals(params)
        obs = np.empty((2, 12, state.shape[0]))  # (drone, block entry, N)
        obs[:, :6] = st[:12].reshape(2, 6, -1)  # own body state
        obs[:, 6] = gx - st[[0, 6]]
        obs[:, 7] = gz - st[[1, 7]]
        obs[:, 8] = st[[6, 0]] - st[[0, 6]]
        obs[:, 9] = st[[7, 1]] - st[[1, 7]]
        obs[:, 10] = st[[9, 3]] - st[_VX]
        obs[:, 11] = st[[10, 4]] - st[_VZ]
        return np.ascontiguousarray(obs.reshape(24, -1).T)

    # ----------------------------------------------------------- drawing
    def draw(self, ax: Any, state: Array, params: Array) -> None:
        from matplotlib.patches import Circle, Rectangle

        p = dict(zip(PARAMS.names, map(float, params), strict=True))
        hw, top, arm = p["field_half_width"], p["field_height"], p["arm_length"]
        ax.add_patch(Rectangle((-hw, 0.0), 2 * hw, top, fill=False, edgecolor="0.5", linestyle="-", linewidth=1))
        ax.axhspan(-0.5, 0.0, color="0.85", zorder=0)
        gx = p["start_x"] * _HEADING
        for i, color in enumerate(("tab:blue", "tab:orange")):
            x, z, pitch = state[6 * i : 6 * i + 3]
            along = np.array([math.cos(pitch), math.sin(pitch)])  # body axis, rotor left -> right (world)
            up = np.array([-math.sin(pitch), math.cos(pitch)])  # thrust direction
            centre = np.array([x, z])
            for side, thrust in zip((-1.0, 1.0), state[12 + 2 * i : 14 + 2 * i], strict=True):
                hub = centre + side * arm * along
                blade = np.array([hub - 0.35 * arm * along, hub + 0.35 * arm * along]) + 0.06 * up
                ax.plot(*blade.T, color=color, linewidth=2)
                tip = 0.8 * arm * thrust / p["max_thrust"] * up
                ax.arrow(*hub, *tip, color=color, width=0.004, head_width=0.03, length_includes_head=True, alpha=0.6)
            ends = np.array([centre - arm * along, centre + arm * along])
            ax.plot(*ends.T, color=color, linewidth=3, solid_capstyle="round")
            ax.add_patch(Circle((x, z), 0.5 * p["min_separation"], fill=False, edgecolor=color, linestyle=":"))
            ax.add_patch(Circle((gx[i], p["start_height"]), p["goal_tolerance"], fill=False, edgecolor=color))
            ax.plot(gx[i], p["start_height"], marker="x", color=color)
        wind = np.array([p["wind_x"] + state[16], p["wind_z"] + state[17]])
        base = np.array([-0.85 * hw, 0.9 * top])
        ax.arrow(*base, *(0.2 * wind), color="0.3", width=0.01, head_width=0.06, length_includes_head=True)
        ax.text(base[0], base[1] - 0.08 * top, f"air {wind[0]:+.1f}, {wind[1]:+.1f} m/s", fontsize=8, color="0.3")
        ax.set_xlim(-hw - 0.3, hw + 0.3)
        ax.set_ylim(-0.3, top + 0.3)
        ax.set_aspect("equal")
        ax.set_xlabel("x [m]")
        ax.set_ylabel("z [m]")


_DOC = r"""Two planar quadrotors swap places across a field without coming too close.

    ## Description

    Two identical quadrotors fly in the vertical x-z plane (x to the right, z up). Each
    is a rigid body with two rotors, one at each end of its arm, ``arm_length`` from the
    centre of mass; as usual for the planar model, each rotor stands for the pair of real
    rotors on that side. Drone 0 starts at (-start_x, start_height), drone 1 at
    (+start_x, start_height); each must fly to the other's start, hold there, and never
    come closer to the other than ``min_separation`` (centre to centre). Since both
    routes run along the same line, they must leave it to pass each other.

    **Pitch sign.** ``pitch`` is the body's rotation in the x-z plane, positive
    counter-clockwise as drawn (x right, z up): at positive pitch the right-hand rotor
    (world +x side) is higher. The thrust acts along (-sin pitch, cos pitch), so a
    positive pitch tilts the thrust toward -x.

    Equations of motion of each drone (world frame), with thrusts ``T_l`` of its left
    (-x side) and ``T_r`` of its right rotor, total thrust ``F = T_l + T_r``, air velocity
    ``w = (wind_x + gust_x, wind_z + gust_z)`` and airspeed vector ``v_r = v - w``:

        m x''     = -F sin(pitch) - (c1 + c2 |v_r|) v_r,x
        m z''     =  F cos(pitch) - m g - (c1 + c2 |v_r|) v_r,z
        I pitch'' =  L (T_r - T_l)
        tau T'    =  T_cmd - T                  (each rotor, first-order lag)

    with m = ``mass``, g = ``gravity``, I = ``inertia``, L = ``arm_length``, c1 =
    ``drag_linear``, c2 = ``drag_quadratic``, tau = ``rotor_time_constant``. The
    gust (``gust_x``, ``gust_z``, shared by both drones: they fly in one air mass) is an
    Ornstein-Uhlenbeck process in each component with stationary standard deviation
    sigma = ``gust_std`` and correlation time tau_g = ``gust_time_constant``, advanced
    once per control period dt by its exact update and held within the period:

        g' = g exp(-dt / tau_g) + sigma sqrt(1 - exp(-2 dt / tau_g)) n,   n ~ N(0, 1)

    Sources: the planar quadrotor model as in R. Tedrake, *Underactuated Robotics*
    (MIT course notes), and the exact OU update of D. T. Gillespie, Phys. Rev. E 54,
    2084 (1996) (both from memory); linear-plus-quadratic drag on the airspeed is
    common practice. Nominal values are representative of a 0.5-1 kg quadrotor class,
    not of any specific product.

    **Blocks (shared network).** Each drone's observation block is the same function of
    that drone's own state, its own goal and the other drone, on world axes (x right, z
    up), and each drone's rotors are named the same way (``left`` is the world -x side).
    So one network, fed one block and driving that drone's two rotors, can fly either
    drone, as identical vehicles running one flight program with their own goals do.
    The blocks are not mirrored: a shared network sees from the sign of ``goal_dx``
    which way its drone travels, and that is what lets it pass the other drone. With
    mirror-image blocks both drones would see the same picture at a symmetric start and
    a shared network would steer them into each other; deciding height by direction of
    travel is the tie-break that air traffic uses in its cruising-level rules (common
    practice).

    ## Action Space

    ``Box(-1, 1, (4,))``: ``[d0_rotor_left, d0_rotor_right, d1_rotor_left, d1_rotor_right]``
    (left: the rotor on the drone's -x side). Each command maps linearly to a thrust command
    ``T_cmd = max_thrust (a + 1) / 2`` in [0, max_thrust]: a rotor never pushes down.
    Hover is ``a = m g / max_thrust - 1`` on both rotors.

    ## Observation Space

    ``Box(-inf, inf, (24,))``: one block of 12 per drone, drone 0 then drone 1, on world
    axes; entries 6 to 11 are relative to the block's own drone:

    | Num     | Observation           | Unit  |
    |---------|-----------------------|-------|
    | 0 / 12  | `di_x` own position   | m     |
    | 1 / 13  | `di_z` height         | m     |
    | 2 / 14  | `di_pitch`            | rad   |
    | 3 / 15  | `di_x_dot`            | m/s   |
    | 4 / 16  | `di_z_dot`            | m/s   |
    | 5 / 17  | `di_pitch_rate`       | rad/s |
    | 6 / 18  | `di_goal_dx` goal - own x     | m   |
    | 7 / 19  | `di_goal_dz` goal - own z     | m   |
    | 8 / 20  | `di_other_dx` other - own x   | m   |
    | 9 / 21  | `di_other_dz` other - own z   | m   |
    | 10 / 22 | `di_other_dx_dot` other - own | m/s |
    | 11 / 23 | `di_other_dz_dot` other - own | m/s |

    Wind, gust and rotor thrusts are not observed (a controller must reject them).

    The state (``info["state"]``, 18 values) is, in world frame: per drone ``[x, z,
    pitch, x_dot, z_dot, pitch_rate]`` (drone 0, then drone 1), then the actual rotor
    thrusts ``d0_thrust_left, d0_thrust_right, d1_thrust_left, d1_thrust_right`` in N
    (the order of the actions), then ``gust_x, gust_z`` in m/s.

    ## Rewards

    {reward}

    ## Starting State

    Both drones hover at their starts, rotors at hover thrust m g / 2, gust zero; each
    drone's position, pitch and rates are spread uniformly by ±0.1 m, ±0.05 rad,
    ±0.1 m/s and ±0.1 rad/s (``start_spread`` changes this). The gust reaches its
    stationary spread after about ``gust_time_constant``.

    ## Episode End

    Termination with success when {success}.
    Termination with failure (the first that applies, in this order):

    1. ``collision``: centre-to-centre distance < ``min_separation``.
    2. ``crashed``: a drone touches the ground, z - arm_length |sin pitch| <= 0 (its lower rotor).
    3. ``out_of_bounds``: a drone's centre leaves the field, |x| > ``field_half_width`` or z > ``field_height``.
    4. ``flipped``: |pitch| > ``pitch_limit``.
    5. ``diverged``: the integration produced a non-finite or huge state.

    Truncation (``timeout``) after ``time_limit`` (10 s by default).

    ## Metrics

    What ``pretrial replay`` measures per episode, besides the generic
    ``effort_rms_<rotor>`` (RMS of the command, fraction of full scale) and
    ``saturated_fraction`` (fraction of periods with a command at >= 0.999 of
    full scale, either end):

    | Metric                | Unit | Definition                                                    |
    |-----------------------|------|---------------------------------------------------------------|
    | `settling_time`       | s    | first time after which the goal rule holds to the end (inf: never) |
    | `min_separation`      | m    | smallest centre-to-centre distance of the drones              |
    | `peak_path_deviation` | m    | largest distance of a drone from the segment start -> goal    |

    ## Arguments

    | Argument       | Default | Meaning                                                    |
    |----------------|---------|------------------------------------------------------------|
    | `params`       | `{{}}`  | parameter overrides by name (see `param_table`)            |
    | `dt`           | 0.02    | control period in s (action and gust held over it)         |
    | `substeps`     | 2       | integration steps per control period (keep dt/substeps below `rotor_time_constant`) |
    | `integrator`   | "rk4"   | "rk4" or "euler"                                           |
    | `time_limit`   | 10.0    | episode length in s                                        |
    | `start_spread` | above   | half-width of the uniform start spread per state name      |
    | `hold_time`    | 1.0     | seconds both drones must stay settled at their goals       |
    | `render_mode`  | None    | "rgb_array" or "human"                                     |

    ```python
    >>> import gymnasium as gym, pretrial_envs
    >>> env = gym.make("pretrial/DronePair-v0", params={{"wind_x": 2.0, "gust_std": 0.5}})
    >>> obs, info = env.reset(seed=0)
    >>> obs.shape
    (24,)

    ```

    ## Caution

    Drones can hurt people. This simulation does not certify that a controller is safe:
    make first hardware trials restrained (tethered or netted, props guarded, nobody in
    the flight area) and follow your local aviation regulations.
    """


class DronePairEnv(PhysicsEnv):
    physics_type = DronePairPhysics


class DronePairVectorEnv(PhysicsVectorEnv):
    """N independent drone pairs, each with its own parameters; see :class:`DronePairEnv`."""

    physics_type = DronePairPhysics


DronePairEnv.__doc__ = _DOC.format(
    reward=DronePairPhysics.reward_doc[0].upper() + DronePairPhysics.reward_doc[1:] + ".",
    success="both drones are within goal_tolerance of their goals and slower than goal_speed for hold_time seconds",
)
