"""The physics core shared by every pretrial environment.

Each plant is a :class:`Physics` subclass: a parameter table, a pure vectorized
``derivatives(state[N, S], force[N, A], params[N, P])`` and vectorized task rules
(failure check, goal region, reward). Everything else is written once here:

* :class:`ParamSpec` / :class:`ParamTable`: the single declaration of every
  physical parameter (name, unit, nominal, valid range, meaning).
* :func:`euler_step`, :func:`rk4_step`: fixed-step integrators over a batch.
* :meth:`Physics.transition`: one control period for a batch, with the episode
  bookkeeping (divergence, failure words, goal hold time, time limit).
* :class:`PhysicsEnv` and :class:`PhysicsVectorEnv`: the gymnasium front doors.
  Both are thin wrappers over :meth:`Physics.transition`, so a single env, a
  vector env and pretrial's own rollout engine step the same equations.

Arrays are float64 throughout: policies are compared with neat-python to 1e-12
and the physics is checked against references to 1e-9.
"""

from __future__ import annotations

import difflib
import math
import os
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass
from typing import Any, ClassVar, NamedTuple

import gymnasium as gym
import numpy as np
from gymnasium import spaces
from gymnasium.vector import AutoresetMode, VectorEnv

Array = np.ndarray

#: Failure words every environment shares (appended after the env's own).
DIVERGED = "diverged"
TIMEOUT = "timeout"

#: A state component beyond this magnitude counts as diverged (common practice:
#: treat a blown-up integration as a failure, not as data).
DIVERGENCE_BOUND = 1e9

INTEGRATORS = ("rk4", "euler")


@dataclass(frozen=True)
class Limit:
    """The accepted range of one quantity, declared once and checked the same wherever it is given.

    Parameters
    ----------
    name : str
        The quantity as messages name it.
    low, high : float or int
        The range of accepted values, both ends included (but see ``above``).
    unit : str
        SI unit (``""`` for counts).
    whole : bool
        A whole number (counts, seeds) rather than a real one.
    above : bool
        ``low`` itself is excluded (a duration that only has to be more than 0).
    """

    name: str
    low: float
    high: float
    unit: str = ""
    whole: bool = False
    above: bool = False

    def allowed(self) -> str:
        """The range in words, e.g. ``a finite number >= 1e-06 and <= 3600 s``."""
        kind = "a whole number" if self.whole else "a finite number"
        unit = f" {self.unit}" if self.unit else ""
        low = f"{'>' if self.above else '>='} {_fmt(self.low, self.whole)}"
        return f"{kind} {low} and <= {_fmt(self.high, self.whole)}{unit}"

    def check(self, value: Any, label: str | None = None) -> Any:
        """``value`` as int (whole) or float when inside the range; ValueError naming ``label`` and the range."""
        v: Any = None
        if self.whole:
            if isinstance(value, (int, np.integer)) and not isinstance(value, bool):
                v = int(value)
        elif not isinstance(value, bool):
            try:
                v = float(value)
            except (TypeError, ValueError, OverflowError):
                v = None
        if (v is None or (not self.whole and not math.isfinite(v)) or not (self.low <= v <= self.high)
                or (self.above and v == self.low)):
            raise ValueError(f"{label or self.name}: {value!r} not allowed ({self.allowed()})")
        return v


def _fmt(x: float, whole: bool) -> str:
    return str(int(x)) if whole else f"{x:g}"


#: Limits of the episode quantities (common practice for a fixed-step simulator: a period below a
#: microsecond, or an episode past the caps, is a typing error, not a plant). Values are the tool's choice.
DT = Limit("dt", 1e-6, 3600.0, "s")
SUBSTEPS = Limit("substeps", 1, 10_000, whole=True)
TIME_LIMIT = Limit("time_limit", 0.0, 1e6, "s", above=True)  # shorter than dt: one control period
#: seconds a reach task's goal must be held (0: reaching it is enough)
HOLD_TIME = Limit("hold_time", 0.0, 1e6, "s")
#: half-width of the start distribution of one state (beyond DIVERGENCE_BOUND a start is already diverged)
START_SPREAD = Limit("start_spread", 0.0, DIVERGENCE_BOUND)
#: integration steps of one episode: control periods (time_limit / dt) x substeps
EPISODE_STEPS = Limit("integration steps per episode", 1, 10_000_000, whole=True)


def check_episode_steps(periods: int, substeps: int, what: str) -> None:
    """ValueError when ``periods`` control periods of ``substeps`` integration steps pass :data:`EPISODE_STEPS`."""
    total = int(periods) * int(substeps)
    if total > EPISODE_STEPS.high:
        raise ValueError(f"{what}: {periods} control periods x {substeps} substeps = {total} integration steps "
                         f"per episode, more than the cap of {EPISODE_STEPS.high}")


# --------------------------------------------------------------------------- #
# Parameter table
# --------------------------------------------------------------------------- #
@dataclass(frozen=True)
class ParamSpec:
    """One physical parameter of a plant.

    Parameters
    ----------
    name : str
        Identifier used in configs, sweeps and ``params={...}``.
    unit : str
        SI unit (``"-"`` for dimensionless).
    nominal : float
        Value used when nothing overrides it.
    low, high : float
        Valid closed range; values outside are refused.
    doc : str
        One-line meaning.
    role : str
        ``"physics"`` (a property of the plant), ``"loss"`` (friction, damping,
        drag: accepts 0), ``"disturbance"`` (wind, gust: accepts 0), ``"limit"``
        (actuator limits) or ``"task"`` (tolerances of the task rule).
    """

    name: str
    unit: str
    nominal: float
    low: float
    high: float
    doc: str
    role: str = "physics"

    def __post_init__(self) -> None:
        if not (self.low <= self.nominal <= self.high):
            raise ValueError(f"parameter {self.name}: nominal {self.nominal} outside [{self.low}, {self.high}]")
        if self.role in ("loss", "disturbance") and self.low > 0:
            raise ValueError(f"parameter {self.name}: a {self.role} parameter must accept 0")

    def as_dict(self) -> dict[str, Any]:
        return {
            "name": self.name,
            "unit": self.unit,
            "nominal": self.nominal,
            "low": self.low,
            "high": self.high,
            "doc": self.doc,
            "role": self.role,
        }


class ParamTable(Sequence[ParamSpec]):
    """Ordered, immutable table of :class:`ParamSpec`; columns of ``params[N, P]``."""

    def __init__(self, specs: Sequence[ParamSpec]):
        self._specs = tuple(specs)
        self._index = {s.name: i for i, s in enumerate(self._specs)}
        if len(self._index) != len(self._specs):
            raise ValueError("duplicate parameter names in table")
        self.nominal = np.array([s.nominal for s in self._specs], dtype=float)
        self.nominal.setflags(write=False)

    def __getitem__(self, key):  # type: ignore[override]
        if isinstance(key, str):
            return self._specs[self.index(key)]
        return self._specs[key]

    def __len__(self) -> int:
        return len(self._specs)

    def __iter__(self) -> Iterator[ParamSpec]:
        return iter(self._specs)

    def __contains__(self, name: object) -> bool:
        return name in self._index

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(s.name for s in self._specs)

    def index(self, name: str) -> int:  # type: ignore[override]
        """Column of ``name``; ValueError naming the valid names otherwise."""
        try:
            return self._index[name]
        except KeyError:
            raise ValueError(unknown_name_message("parameter", name, self.names)) from None

    def check_value(self, name: str, value: Any) -> float:
        """Return ``value`` as float if it is a finite number in range, else raise ValueError."""
        spec = self[name]
        try:
            v = float(value)
        except (TypeError, ValueError):
            raise ValueError(f"parameter {name}: {value!r} is not a number") from None
        if not math.isfinite(v) or not (spec.low <= v <= spec.high):
            raise ValueError(
                f"parameter {name}: {value!r} outside its valid range [{spec.low:g}, {spec.high:g}] {spec.unit}"
            )
        return v

    def resolve(self, overrides: Mapping[str, Any] | None = None) -> Array:
        """Nominal vector with ``overrides`` applied and validated, shape (P,)."""
        p = self.nominal.copy()
        for name, value in (overrides or {}).items():
            p[self.index(name)] = self.check_value(name, value)
        return p

    def resolve_batch(self, overrides: Mapping[str, Any] | None, n: int) -> Array:
        """Parameters for ``n`` sub-environments, shape (n, P).

        Each override is a scalar (shared) or a sequence of length ``n``.
        """
        # column-major: the physics reads whole parameter columns, which are then contiguous
        p = np.asfortranarray(np.tile(self.nominal, (n, 1)))
        for name, value in (overrides or {}).items():
            col = self.index(name)
            arr = np.asarray(value, dtype=object)
            if arr.ndim == 0:
                p[:, col] = self.check_value(name, value)
            elif arr.shape == (n,):
                p[:, col] = [self.check_value(name, v) for v in arr]
            else:
                raise ValueError(f"parameter {name}: expected a scalar or {n} values, got shape {arr.shape}")
        return p

    def as_dicts(self) -> list[dict[str, Any]]:
        return [s.as_dict() for s in self._specs]


def unknown_name_message(kind: str, name: str, valid: Sequence[str]) -> str:
    """One-line message for an unknown name, with the nearest valid one suggested."""
    near = difflib.get_close_matches(str(name), list(valid), n=1)
    hint = f" (did you mean {near[0]!r}?)" if near else ""
    return f"unknown {kind} {name!r}{hint}; valid: {', '.join(valid)}"


# --------------------------------------------------------------------------- #
# Integrators
# --------------------------------------------------------------------------- #
Derivatives = Callable[[Array, Array, Array], Array]


# Both steppers work in place on the arrays ``f`` returns (a new array per call, as every plant's
# ``derivatives`` does): at N = 10,000 a fresh (N, S) temporary costs more than the arithmetic
# into it. Each line computes exactly what the textbook expression in the docstring does, in the
# same order (a + b and a * b are the same float as b + a and b * a).


def euler_step(f: Derivatives, x: Array, u: Array, p: Array, h: float | Array) -> Array:
    """Explicit (forward) Euler: ``x + h f(x, u, p)`` (``h`` a number or an (N, 1) step per row)."""
    dx = f(x, u, p)
    dx *= h
    dx += x
    return dx


def rk4_step(f: Derivatives, x: Array, u: Array, p: Array, h: float | Array) -> Array:
    """Classical fourth-order Runge-Kutta with ``u`` held over the step (``h`` a number or (N, 1) per row).

    ``x + (h / 6) (k1 + 2 (k2 + k3) + k4)`` with ``k1 = f(x)``,
    ``k2 = f(x + (h / 2) k1)``, ``k3 = f(x + (h / 2) k2)``, ``k4 = f(x + h k3)``.
    """
    k1 = f(x, u, p)
    y = k1 * (0.5 * h)
    y += x
    k2 = f(y, u, p)
    y = k2 * (0.5 * h)  # a new buffer: f may keep views of its input in what it returns
    y += x
    k3 = f(y, u, p)
    y = k3 * h
    y += x
    k4 = f(y, u, p)
    k2 += k3
    k2 *= 2.0
    k2 += k1
    k2 += k4
    k2 *= h / 6.0
    k2 += x
    return k2


_STEPPERS = {"euler": euler_step, "rk4": rk4_step}


# --------------------------------------------------------------------------- #
# The physics protocol
# --------------------------------------------------------------------------- #
class Transition(NamedTuple):
    """Result of one control period for a batch (all arrays have leading size N)."""

    state: Array  # (N, S) new physical state
    reward: Array  # (N,)
    failure: Array  # (N,) int code into Physics.failure_words, 0 = none
    success: Array  # (N,) bool, episode ended in success
    terminated: Array  # (N,) bool
    truncated: Array  # (N,) bool, time limit reached
    hold: Array  # (N,) seconds spent continuously in the goal region
    steps: Array  # (N,) control periods since reset


#: an applied command at or beyond this fraction of full scale counts as saturated (a hair below 1,
#: so commands clipped to the limit and then rounded still count)
SATURATION_LEVEL = 0.999

#: residual measures (e.g. residual sway) look at the last this many seconds of an episode
RESIDUAL_WINDOW_S = 2.0


class EpisodeMetric(NamedTuple):
    """One task measure per episode, from :meth:`Physics.episode_metrics`."""

    values: Array  # (N,) one value per episode; inf means "never" (e.g. never settled)
    unit: str
    meaning: str
    worst: str = "max"  # "max": larger is worse; "min": smaller is worse (e.g. a separation)


class TraceLimit(NamedTuple):
    """A task limit on one state, for plots of the state against time."""

    low: float
    high: float
    label: str
    kind: str = "limit"  # "limit": lines at low and high; "band": the region between (a tolerance)


def state_mask(n_states: int, steps: Array) -> Array:
    """(n_states, N) bool: recorded state k of episode i belongs to it (k <= steps[i])."""
    return np.arange(n_states)[:, None] <= np.asarray(steps)[None, :]


def tail_mask(n_states: int, steps: Array, dt: float, window: float = RESIDUAL_WINDOW_S) -> Array:
    """(n_states, N) bool: the states of the last ``window`` seconds of each episode (all if shorter)."""
    k = np.arange(n_states)[:, None]
    steps = np.asarray(steps)[None, :]
    return (k <= steps) & (k >= steps - int(round(window / dt)))


def masked_max(values: Array, mask: Array) -> Array:
    """Per-column maximum of ``values`` (T, N) over ``mask``; -inf for an empty column."""
    return np.where(mask, values, -np.inf).max(axis=0)


def masked_min(values: Array, mask: Array) -> Array:
    """Per-column minimum of ``values`` (T, N) over ``mask``; inf for an empty column."""
    return np.where(mask, values, np.inf).min(axis=0)


def column_sums(values: Array) -> Array:
    """Per-column sums of ``values`` (T, N), each summed alone, so a column's sum never depends on N.

    (numpy sums a contiguous run pairwise but accumulates across rows naively, so
    ``values.sum(axis=0)`` can differ in the last bit between a batch and a single episode.)
    """
    return np.ascontiguousarray(np.asarray(values, dtype=float).T).sum(axis=1)


def holds_from(ok: Array, steps: Array, dt: float) -> Array:
    """Settling time: the first ``k dt`` such that ``ok`` holds at every state from k to the episode's end.

    ``ok`` is (T+1, N) for the recorded states 0..T; states after ``steps[i]``
    are ignored. inf where the episode's last state is not ``ok`` (never settled).
    """
    n = ok.shape[0]
    steps = np.asarray(steps)
    bad = state_mask(n, steps) & ~np.asarray(ok, bool)
    last_bad = n - 1 - np.argmax(bad[::-1], axis=0)
    first = np.where(bad.any(axis=0), last_bad + 1, 0)
    return np.where(first <= steps, first * dt, np.inf)


class Physics:
    """A plant and its task, vectorized over a batch of N instances.

    Subclasses declare the class attributes and implement :meth:`derivatives`,
    :meth:`check` and :meth:`reward`; override :meth:`actuate`,
    :meth:`observe`, :meth:`in_goal`, :meth:`start_center`,
    :meth:`terminal_reward`, :meth:`advance_disturbance` and :meth:`draw` as needed. An instance is one
    configuration (control period, integrator, options); parameters are data
    passed with each call, so every sub-environment can have its own.

    Parameters
    ----------
    dt : float, optional
        Control period in seconds (the action is held over it).
    substeps : int, optional
        Integration steps inside one control period.
    integrator : {"rk4", "euler"}
        Fixed-step integration method.
    time_limit : float, optional
        Episode length in seconds (truncation).
    start_spread : mapping, optional
        Half-width of the uniform start distribution per state name (overrides
        the class default).
    residual : str or Residual, optional
        A ``residual.json`` (from ``pretrial calibrate --residual``) whose learned correction is
        added to :meth:`derivatives` wherever the integrators evaluate them
        (:meth:`model_derivatives`; see :mod:`pretrial_envs.residual`).
    hold_time : float, optional
        Reach tasks only: seconds the goal must be held for success (overrides
        the class default; at most ``time_limit``). A longer hold asks for a
        loop that stays at its goal rather than one that passes through it.
    """

    #: gymnasium id, e.g. ``"pretrial/CartPole-v0"``
    env_id: ClassVar[str] = ""
    #: one-line description for listings
    summary: ClassVar[str] = ""
    param_table: ParamTable
    state_names: tuple[str, ...]
    state_units: tuple[str, ...]
    obs_names: tuple[str, ...]
    obs_units: tuple[str, ...]
    action_names: tuple[str, ...]
    action_units: tuple[str, ...]
    #: the env's own failure words (``diverged`` and ``timeout`` are added)
    failure_modes: tuple[str, ...] = ()
    #: "survive": success = time limit reached with no failure;
    #: "reach": success = goal region held for ``hold_time`` seconds.
    success_mode: str = "survive"
    hold_time: float = 0.0
    success_rule: str = ""
    reward_doc: str = ""
    #: standard normal draws per instance per control period (gust processes)
    noise_dim: int = 0
    #: k > 0: observation and action are k equal egocentric blocks (one per
    #: vehicle), so one shared network can drive every block
    obs_blocks: int = 0
    #: typical magnitude of each observation (None: 1 for all); pretrial scales
    #: network inputs by it so that one set of NEAT defaults suits every plant
    obs_scale: tuple[float, ...] | None = None
    default_dt: ClassVar[float] = 0.02
    default_substeps: ClassVar[int] = 1
    default_integrator: ClassVar[str] = "rk4"
    default_time_limit: ClassVar[float] = 10.0
    default_start_spread: ClassVar[Mapping[str, float]] = {}
    #: parameters that scale Coulomb (dry) friction terms; linear analyses set them to 0,
    #: because a sign function has no derivative at rest (see :mod:`pretrial.linear`)
    coulomb_params: tuple[str, ...] = ()

    def __init__(
        self,
        dt: float | None = None,
        substeps: int | None = None,
        integrator: str | None = None,
        time_limit: float | None = None,
        start_spread: Mapping[str, float] | None = None,
        residual: Any = None,
        hold_time: float | None = None,
    ):
        self.residual = None if residual is None else _residual_for(self, residual)
        self.dt = DT.check(self.default_dt if dt is None else dt)
        self.substeps = SUBSTEPS.check(self.default_substeps if substeps is None else substeps)
        integrator = self.default_integrator if integrator is None else integrator
        if integrator not in INTEGRATORS:
            raise ValueError(f"integrator: {integrator!r} not one of {', '.join(INTEGRATORS)}")
        self.integrator = integrator
        self.time_limit = TIME_LIMIT.check(self.default_time_limit if time_limit is None else time_limit)
        self.max_steps = max(1, int(round(self.time_limit / self.dt)))
        check_episode_steps(self.max_steps, self.substeps, f"time_limit {self.time_limit:g} s / dt {self.dt:g} s")
        if hold_time is not None:
            if self.success_mode != "reach":
                raise ValueError(f"hold_time: {hold_time!r} not allowed: this task succeeds by surviving, "
                                 "it has no goal to hold")
            self.hold_time = HOLD_TIME.check(hold_time)
            if self.hold_time > self.time_limit:
                raise ValueError(f"hold_time: {hold_time!r} s is longer than time_limit {self.time_limit:g} s: "
                                 "no episode could succeed")
        spread = dict(self.default_start_spread)
        if start_spread is not None and not isinstance(start_spread, Mapping):
            raise ValueError(f"start_spread: expected a table of state name = half-range, got {start_spread!r}")
        for name, value in (start_spread or {}).items():
            if name not in self.state_names:
                raise ValueError(unknown_name_message("state", name, self.state_names))
            spread[name] = START_SPREAD.check(value, f"start_spread {name}")
        self.start_spread = np.array([spread.get(n, 0.0) for n in self.state_names], dtype=float)
        self._step = _STEPPERS[self.integrator]
        self.failure_words: tuple[str, ...] = ("",) + tuple(self.failure_modes) + (DIVERGED, TIMEOUT)
        self.diverged_code = len(self.failure_words) - 2
        self.timeout_code = len(self.failure_words) - 1

    # ----------------------------------------------------------- sizes
    @property
    def state_dim(self) -> int:
        return len(self.state_names)

    @property
    def obs_dim(self) -> int:
        return len(self.obs_names)

    @property
    def action_dim(self) -> int:
        return len(self.action_names)

    def options(self) -> dict[str, Any]:
        """Keyword arguments that rebuild this configuration (JSON-friendly)."""
        return {
            "dt": self.dt,
            "substeps": self.substeps,
            "integrator": self.integrator,
            "time_limit": self.time_limit,
            "start_spread": {n: float(s) for n, s in zip(self.state_names, self.start_spread) if s},
            # only when set: configurations without a residual keep their options (and their hashes)
            **({"residual": self.residual.source or self.residual} if self.residual is not None else {}),
            # only when changed from the task's own, for the same reason
            **({"hold_time": self.hold_time} if self.hold_time != type(self).hold_time else {}),
        }

    def param(self, params: Array, name: str) -> Array:
        """Column ``name`` of ``params`` (N, P) as an (N,) view."""
        return params[:, self.param_table.index(name)]

    def batch_constants(self, params: Array, build: Callable[[Array], Any]) -> Any:
        """``build(params)``, kept while the same read-only array that owns its data comes back.

        The rollout engine and the vector env pass one such array every step, so
        values derived from the parameters alone (sums of masses, which loss terms
        are on) are formed once per batch instead of at every derivative
        evaluation (4 per RK4 substep). Any other array is built afresh each call.
        A plant uses one ``build`` per instance.
        """
        cached = self.__dict__.get("_batch_constants")
        if cached is not None and cached[0] is params:
            return cached[1]
        values = build(params)
        if not params.flags.writeable and params.base is None:
            self.__dict__["_batch_constants"] = (params, values)
        return values

    def __getstate__(self) -> dict[str, Any]:
        state = self.__dict__.copy()
        state.pop("_batch_constants", None)  # a cache, not configuration: never pickled
        return state

    # ----------------------------------------------------------- to implement
    def derivatives(self, state: Array, force: Array, params: Array) -> Array:
        """Time derivative of ``state`` (N, S) under ``force`` (N, A) in physical units."""
        raise NotImplementedError

    def check(self, state: Array, force: Array, params: Array) -> Array:
        """Failure code per instance (0 = none, else index into ``failure_words``)."""
        raise NotImplementedError

    def reward(self, state: Array, action: Array, params: Array, failure: Array, success: Array) -> Array:
        """Shaped reward for the control period that ended in ``state``."""
        raise NotImplementedError

    def terminal_reward(self, params: Array, failure: Array, success: Array, remaining: Array) -> Array | None:
        """Reward added on the period an episode terminates, given the seconds ``remaining`` to the time limit.

        Called only when some instance terminated (success or failure, not
        truncation); the result counts for those instances only. It lets a
        plant settle the rest of the episode at once, e.g. charge a failure
        its worst running cost for the time it did not fly, so that failing
        later always scores better than failing sooner. Default: None (nothing).
        """
        return None

    def actuate(self, action: Array, params: Array) -> Array:
        """Map actions in [-1, 1] (N, A) to physical inputs (N, A)."""
        raise NotImplementedError

    def observe(self, state: Array, params: Array) -> Array:
        """Observation (N, O); the default observes the whole state."""
        return state.copy()

    def in_goal(self, state: Array, params: Array) -> Array:
        """Whether each instance is inside the goal region (reach tasks)."""
        return np.zeros(state.shape[0], dtype=bool)

    def start_center(self, params: Array) -> Array:
        """Centre of the start distribution (N, S); default the origin."""
        return np.zeros((params.shape[0], self.state_dim))

    def constraint_slack(self, state: Array, force: Array, params: Array) -> Array:
        """Normalized distance to the nearest failure limit, shape (N,).

        1 (or more) is far from every limit, 0 is on one, negative is past it;
        each limit contributes ``1 - |value| / limit`` or its own normalized
        margin, and the smallest counts. Sweeps minimize it over an episode
        for a continuous score. The default (no limits known) is +inf.
        """
        return np.full(state.shape[0], np.inf)

    def target_state(self, params: Array) -> Array:
        """The state the task aims to hold, (N, S); default the origin.

        Linear analyses look for the closed-loop equilibrium near it and the
        LQR baseline is designed around it, so it should be a rest state of
        the plant (for a reach task: at the goal, at rest).
        """
        return np.zeros((params.shape[0], self.state_dim))

    def safe_action(self, params: Array) -> Array:
        """The command an exported controller falls back to on a fault, (A,) in [-1, 1] for params (P,).

        Default: zero command on every channel. A plant where zero is not
        the least harmful command (one that must carry its own weight)
        overrides it.
        """
        return np.zeros(self.action_dim)

    def regulated(self) -> dict[str, tuple[str, float]]:
        """Quantities the task regulates, for loop-quality checks: name -> (unit, default band half-width).

        The default regulates nothing (a plant that declares no quantities gets
        no settling, offset or growth checks; saturation and chatter still apply).
        Names that are state names need no more: :meth:`regulation_error`
        takes them minus :meth:`target_state`.
        """
        return {}

    def regulation_error(self, state: Array, params: Array) -> Array:
        """Deviation of each regulated quantity from its target, (N, R) in its unit."""
        idx = [self.state_names.index(n) for n in self.regulated()]
        return state[:, idx] - self.target_state(params)[:, idx]

    def regulation_band(self, params: Array) -> Array:
        """Tolerance band half-width of each regulated quantity, (N, R); default the declared constants."""
        bands = np.array([b for _, b in self.regulated().values()], dtype=float)
        return np.broadcast_to(bands, (params.shape[0], len(bands)))

    def advance_disturbance(self, state: Array, params: Array, noise: Array) -> Array:
        """Update disturbance states once per control period (held within it)."""
        return state

    def draw(self, ax: Any, state: Array, params: Array) -> None:
        """Draw one instance on a matplotlib Axes (state (S,), params (P,))."""
        raise NotImplementedError

    def episode_metrics(self, states: Array, actions: Array, params: Array, steps: Array) -> dict[str, EpisodeMetric]:
        """Task measures of recorded episodes, vectorized over the episodes.

        Parameters
        ----------
        states : (T+1, N, S) array
            States at t = 0, dt, ..., T dt; an episode that ended after
            ``steps[i] < T`` periods keeps its last state in later rows.
        actions : (T, N, A) array
            Applied actions in [-1, 1] (after the loop's perturbations).
        params : (N, P) array
        steps : (N,) int array
            Control periods each episode lasted; only those count.

        Returns
        -------
        dict of str to EpisodeMetric
            Generic measures, for every plant:

            * ``effort_rms_<action>``: root mean square of the applied
              command over the episode, as a fraction of full scale (the
              action in [-1, 1], not physical units, so that it means the same
              on every plant; 1 = always at a limit).
            * ``saturated_fraction`` (-): fraction of control periods in which
              any command is at ``>= SATURATION_LEVEL`` (0.999) of full scale.
            * ``settling_time`` (s, reach tasks): the first time after which
              the goal rule (:meth:`in_goal`) holds at every state to the end
              of the episode; inf if the last state is outside it.

            Subclasses add their own (see each env's docstring).
        """
        states = np.asarray(states, dtype=float)
        actions = np.asarray(actions, dtype=float)
        steps = np.asarray(steps, dtype=np.int64)
        counted = np.arange(actions.shape[0])[:, None] < steps[None, :]
        periods = np.maximum(steps, 1)
        out: dict[str, EpisodeMetric] = {}
        for j, name in enumerate(self.action_names):
            a = np.where(counted, actions[:, :, j], 0.0)
            out[f"effort_rms_{name}"] = EpisodeMetric(
                np.sqrt(column_sums(a * a) / periods), "full scale",
                f"RMS of the applied {name} command as a fraction of full scale (1 = always at a limit)",
            )
        saturated = (np.abs(actions) >= SATURATION_LEVEL).any(axis=2) & counted
        out["saturated_fraction"] = EpisodeMetric(
            saturated.sum(axis=0) / periods, "-",
            f"fraction of control periods with a command at >= {SATURATION_LEVEL:g} of full scale",
        )
        if self.success_mode == "reach":
            n, rows = states.shape[:2]
            ok = self.in_goal(states.reshape(n * rows, -1), np.tile(params, (n, 1))).reshape(n, rows)
            out["settling_time"] = EpisodeMetric(
                holds_from(ok, steps, self.dt), "s",
                "first time after which the goal rule holds to the end of the episode (inf: never)",
            )
        return out

    def trace_limits(self, params: Array) -> dict[str, list[TraceLimit]]:
        """Task limits per state name, for plots of states against time (params (P,)); default none."""
        return {}

    # ----------------------------------------------------------- provided
    def model_derivatives(self, state: Array, force: Array, params: Array, residual_scale: Array | None = None
                          ) -> Array:
        """:meth:`derivatives` plus the learned residual, if the plant has one, times ``residual_scale`` (N, 1).

        Without a residual, or with every row's scale 0, this is :meth:`derivatives` itself, bit for bit.
        """
        dx = self.derivatives(state, force, params)
        if self.residual is None:
            return dx
        return self.residual.add_to(dx, state, force, residual_scale)

    def _model(self, residual_scale: Array | None) -> Derivatives:
        """What the integrators call: the plain derivatives where no residual acts on any row."""
        if self.residual is None or (residual_scale is not None and not np.any(residual_scale)):
            return self.derivatives
        if residual_scale is None or np.all(residual_scale == 1.0):  # scale 1 adds the correction itself
            return self.model_derivatives
        return lambda x, u, p: self.model_derivatives(x, u, p, residual_scale)

    def integrate(self, state: Array, force: Array, params: Array, fraction: Array | None = None,
                  residual_scale: Array | None = None) -> Array:
        """Advance ``state`` over one control period with ``force`` held, or over ``fraction`` (N, 1) of it per row.

        With ``fraction`` each row takes ``substeps`` steps of ``fraction dt / substeps`` (never longer than
        the whole period's step); a fraction of exactly 1 gives the same numbers as none. ``residual_scale``
        (N, 1) multiplies the learned residual per row (None: 1; 0: the physics alone, bit for bit).
        """
        h = self.dt / self.substeps if fraction is None else (self.dt * fraction) / self.substeps
        f = self._model(residual_scale)
        step = self._step
        for _ in range(self.substeps):
            state = step(f, state, force, params, h)
        return state

    def sample_start(self, rng: np.random.Generator, params: Array, scale: float | Array = 1.0) -> Array:
        """Start states: ``start_center + scale * start_spread * U(-1, 1)``."""
        n = params.shape[0]
        u = rng.uniform(-1.0, 1.0, size=(n, self.state_dim))
        scale = np.asarray(scale, dtype=float)
        u *= self.start_spread if scale.ndim == 0 and scale == 1.0 else scale.reshape(-1, 1) * self.start_spread
        center = self.start_center(params)
        center += u
        return center

    def transition(
        self,
        state: Array,
        action: Array,
        params: Array,
        hold: Array,
        steps: Array,
        noise: Array | None = None,
        *,
        earlier: Array | None = None,
        switch: Array | None = None,
        gain: Array | None = None,
        residual_scale: Array | None = None,
        clipped: bool = False,
    ) -> Transition:
        """One control period for a batch, with the episode rules applied.

        Parameters
        ----------
        state : (N, S) array
        action : (N, A) array, clipped to [-1, 1] here
        params : (N, P) array
        hold : (N,) seconds already spent in the goal region
        steps : (N,) control periods already taken
        noise : (N, noise_dim) standard normal draws, or None for none
        earlier : (N, A) array, optional
            Action (clipped too) acting over the first ``switch`` of the period, ``action`` over the
            rest: a command arriving within the period (a transport delay of a fraction of a period,
            a late control step). The period is integrated in two phases, exactly.
        switch : (N, 1) array in [0, 1], optional
            Share of the period before ``action`` takes over; rows at 0 integrate the period in one
            piece, bit for bit as without ``switch``.
        gain : (N, A) or (N, 1) array, optional
            Multiplier on the physical inputs :meth:`actuate` produces (force, thrust), e.g. a weak
            or failed actuator: 0 means no output at all.
        residual_scale : (N, 1) array, optional
            Multiplier on the plant's learned residual (``residual`` option): 1 as fitted, 0 the
            physics alone (bit for bit), 2 doubled. Ignored by a plant without one.
        clipped : bool
            ``action`` and ``earlier`` are already within [-1, 1] (the clip, which would change
            nothing, is skipped); they are only read.
        """
        if not clipped:
            action = np.maximum(action, -1.0)  # np.clip, at half its call overhead (same values, NaN kept)
            np.minimum(action, 1.0, out=action)
        with np.errstate(all="ignore"):
            if self.noise_dim:
                if noise is None:
                    noise = np.zeros((state.shape[0], self.noise_dim))
                state = self.advance_disturbance(state, params, noise)
            force = self.actuate(action, params)
            if gain is not None:
                force = force * gain
            if switch is None:
                state = self.integrate(state, force, params, residual_scale=residual_scale)
            else:
                state = self._two_phases(state, earlier, force, params, switch, gain, residual_scale)
            bad = _diverged_rows(state)
            # np.count_nonzero, not .any(): a quarter of the call overhead, and this runs every step
            any_bad = np.count_nonzero(bad) > 0
            failure = np.asarray(self.check(state, force, params), dtype=np.int64)
            if any_bad:
                failure[bad] = self.diverged_code
            ok = failure == 0
            steps = steps + 1
            if self.success_mode == "reach":
                goal = ok & self.in_goal(state, params)
                hold = np.where(goal, hold + self.dt, 0.0)
                success = goal & (hold >= self.hold_time - 1e-9)
                terminated = ~ok | success
                truncated = ~terminated & (steps >= self.max_steps)
                failure[truncated] = self.timeout_code
            else:
                terminated = ~ok
                truncated = ok & (steps >= self.max_steps)
                success = truncated.copy()
            reward = self.reward(state, action, params, failure, success)
            # a plant without its own terminal reward adds nothing: skip the remaining time (finished
            # rows report terminated on every later step, so this would run on almost every step)
            if type(self).terminal_reward is not Physics.terminal_reward and np.count_nonzero(terminated):
                remaining = np.maximum(self.max_steps - steps, 0) * self.dt
                extra = self.terminal_reward(params, failure, success, remaining)
                if extra is not None:
                    reward = reward + np.where(terminated, extra, 0.0)
            if any_bad:  # finite states give finite rewards; a diverged row's reward is 0
                reward = np.where(bad | ~np.isfinite(reward), 0.0, reward)
        return Transition(state, reward, failure, success, terminated, truncated, hold, steps)

    def _two_phases(self, state: Array, earlier: Array, force: Array, params: Array, switch: Array,
                    gain: Array | None, residual_scale: Array | None = None) -> Array:
        """The period: ``earlier`` over its first ``switch``, ``force`` over the rest (rows at 0 or 1: one piece)."""
        first = np.maximum(earlier, -1.0)
        np.minimum(first, 1.0, out=first)
        first = self.actuate(first, params)
        if gain is not None:
            first = first * gain
        # a zero-length phase is skipped by mask, not integrated with h = 0 (x + 0 k is not always x: -0.0, inf)
        mid = np.where(switch > 0, self.integrate(state, first, params, switch, residual_scale), state)
        end = self.integrate(mid, force, params, 1.0 - switch, residual_scale)
        return np.where(switch < 1, end, mid)

    def describe(self) -> dict[str, Any]:
        """Everything a listing needs: parameters, spaces, rules."""
        return {
            "id": self.env_id,
            "summary": self.summary,
            "state": [{"name": n, "unit": u} for n, u in zip(self.state_names, self.state_units)],
            "observation": [{"name": n, "unit": u} for n, u in zip(self.obs_names, self.obs_units)],
            "action": [
                {"name": n, "unit": u, "low": -1.0, "high": 1.0}
                for n, u in zip(self.action_names, self.action_units)
            ],
            "params": self.param_table.as_dicts(),
            "failure_modes": list(self.failure_words[1:]),
            "regulated": [{"name": n, "unit": u, "band": b} for n, (u, b) in self.regulated().items()],
            "success_rule": self.success_rule,
            "reward": self.reward_doc,
            "options": self.options(),
        }


#: unsigned integer as wide as a row of 1, 2, 4 or 8 bools, and its value when every bool is true
_ROW_WORDS = {s: (w, w(int.from_bytes(b"\x01" * s, "little")))
              for s, w in ((1, np.uint8), (2, np.uint16), (4, np.uint32), (8, np.uint64))}


def _diverged_rows(a: Array) -> Array:
    """Rows of ``a`` (N, S) with a component beyond ``DIVERGENCE_BOUND`` or NaN, shape (N,).

    numpy's ``axis=1`` reductions over short rows cost about 130 us at
    N = 10,000. Rows of 1, 2, 4 or 8 values: one contiguous comparison, and
    each row's bools read as one integer (all true = every byte 1); others: a
    loop over the few columns.
    """
    word = _ROW_WORDS.get(a.shape[1])
    if word is not None and a.flags.c_contiguous:
        ok = np.abs(a) <= DIVERGENCE_BOUND  # NaN compares False: diverged too
        return ok.view(word[0])[:, 0] != word[1]
    m = np.abs(a[:, 0])
    for j in range(1, a.shape[1]):
        np.maximum(m, np.abs(a[:, j]), out=m)
    return ~(m <= DIVERGENCE_BOUND)


def _residual_for(physics: Physics, residual: Any) -> Any:
    """The plant's residual from a ``residual.json`` path (checked against it) or a ready object."""
    from .residual import Residual, load_residual

    if isinstance(residual, Residual):
        lib = residual.library
        if (lib.state_names, lib.action_names) != (tuple(physics.state_names), tuple(physics.action_names)):
            raise ValueError(f"residual: built for states {', '.join(lib.state_names)} and actions "
                             f"{', '.join(lib.action_names)}, not this plant's")
        return residual
    if not isinstance(residual, (str, os.PathLike)):
        raise ValueError(f"residual: {residual!r} is not a path to a residual.json")
    return load_residual(residual, physics)


def jacobians(physics: Physics, state: Array, force: Array, params: Array, eps: float = 1e-6) -> tuple[Array, Array]:
    """Central-difference Jacobians ``A = df/dx``, ``B = df/du`` of the model (physics plus residual) at one point.

    ``state`` (S,), ``force`` (A,) in physical units, ``params`` (P,). All
    perturbed points are evaluated in one batched call.
    """
    s, a = state.size, force.size
    step_x = eps * np.maximum(1.0, np.abs(state))
    step_u = eps * np.maximum(1.0, np.abs(force))
    dx = np.concatenate([np.diag(step_x), -np.diag(step_x), np.zeros((2 * a, s))])
    du = np.concatenate([np.zeros((2 * s, a)), np.diag(step_u), -np.diag(step_u)])
    f = physics.model_derivatives(state + dx, force + du, np.tile(params, (dx.shape[0], 1)))
    jac_a = (f[:s] - f[s : 2 * s]).T / (2 * step_x)
    jac_b = (f[2 * s : 2 * s + a] - f[2 * s + a :]).T / (2 * step_u)
    return jac_a, jac_b


# --------------------------------------------------------------------------- #
# gymnasium front doors
# --------------------------------------------------------------------------- #
class Renderer:
    """matplotlib renderer shared by the single and vector envs."""

    def __init__(self, physics: Physics, mode: str | None):
        self.physics = physics
        self.mode = mode
        self.fig = None
        self.ax = None

    def frame(self, state: Array, params: Array, t: float, note: str = "") -> Array | None:
        import matplotlib

        if self.fig is None:
            if self.mode == "human":
                import matplotlib.pyplot as plt

                self.fig, self.ax = plt.subplots(figsize=(6, 4), dpi=100)
            else:
                from matplotlib.backends.backend_agg import FigureCanvasAgg
                from matplotlib.figure import Figure

                self.fig = Figure(figsize=(6, 4), dpi=100)
                FigureCanvasAgg(self.fig)
                self.ax = self.fig.add_subplot(1, 1, 1)
        ax = self.ax
        ax.clear()
        self.physics.draw(ax, state, params)
        label = f"t = {t:6.2f} s" + (f"   {note}" if note else "")
        ax.text(0.01, 0.98, label, transform=ax.transAxes, va="top", ha="left", fontsize=9, family="monospace")
        self.fig.canvas.draw()
        if self.mode == "human":
            import matplotlib.pyplot as plt

            if matplotlib.get_backend().lower() != "agg":
                plt.pause(0.001)
            return None
        buf = np.asarray(self.fig.canvas.buffer_rgba())
        return buf[:, :, :3].copy()

    def close(self) -> None:
        if self.fig is not None and self.mode == "human":
            import matplotlib.pyplot as plt

            plt.close(self.fig)
        self.fig = None
        self.ax = None


def _spaces(physics: Physics) -> tuple[spaces.Box, spaces.Box]:
    obs = spaces.Box(-np.inf, np.inf, shape=(physics.obs_dim,), dtype=np.float64)
    act = spaces.Box(-1.0, 1.0, shape=(physics.action_dim,), dtype=np.float64)
    return obs, act


def _split_kwargs(kwargs: dict[str, Any]) -> tuple[dict[str, Any], dict[str, Any]]:
    params = kwargs.pop("params", None) or {}
    if not isinstance(params, Mapping):
        raise ValueError(f"params: expected a mapping of parameter names to values, got {type(params).__name__}")
    return dict(params), kwargs


class PhysicsEnv(gym.Env):
    """gymnasium ``Env`` over one instance of a :class:`Physics`.

    Keyword arguments are those of the physics class plus ``params`` (a mapping
    of parameter overrides) and ``render_mode``.
    """

    physics_type: ClassVar[type[Physics]]
    metadata: ClassVar[dict[str, Any]] = {"render_modes": ["human", "rgb_array"], "render_fps": 50}

    def __init__(self, render_mode: str | None = None, **kwargs: Any):
        overrides, kwargs = _split_kwargs(kwargs)
        self.physics = self.physics_type(**kwargs)
        self.param_table = self.physics.param_table
        self._params = self.param_table.resolve(overrides)[None, :]
        self.observation_space, self.action_space = _spaces(self.physics)
        if render_mode is not None and render_mode not in self.metadata["render_modes"]:
            raise ValueError(f"render_mode: {render_mode!r} not one of {self.metadata['render_modes']}")
        self.render_mode = render_mode
        self.metadata = {**self.metadata, "render_fps": int(round(1.0 / self.physics.dt))}
        self._renderer = Renderer(self.physics, render_mode)
        self._state: Array | None = None
        self._hold = np.zeros(1)
        self._steps = np.zeros(1, dtype=np.int64)
        self._done = False

    # exact names from the contract
    @property
    def dt(self) -> float:
        return self.physics.dt

    @property
    def params(self) -> dict[str, float]:
        return dict(zip(self.param_table.names, map(float, self._params[0])))

    @property
    def state(self) -> Array | None:
        return None if self._state is None else self._state[0].copy()

    def _info(self) -> dict[str, Any]:
        return {"state": self._state[0].copy(), "time": float(self._steps[0] * self.physics.dt)}

    def reset(self, *, seed: int | None = None, options: dict[str, Any] | None = None):
        super().reset(seed=seed)
        options = options or {}
        if "state" in options:
            s = np.asarray(options["state"], dtype=float).reshape(-1)
            if s.shape != (self.physics.state_dim,):
                raise ValueError(
                    f"options['state']: expected {self.physics.state_dim} values "
                    f"({', '.join(self.physics.state_names)}), got {s.size}"
                )
            self._state = s[None, :].copy()
        else:
            self._state = self.physics.sample_start(self.np_random, self._params, options.get("start_scale", 1.0))
        self._hold = np.zeros(1)
        self._steps = np.zeros(1, dtype=np.int64)
        self._done = False
        obs = self.physics.observe(self._state, self._params)[0]
        if self.render_mode == "human":
            self.render()
        return obs, self._info()

    def step(self, action):
        if self._state is None:
            raise RuntimeError("call reset() before step()")
        a = np.asarray(action, dtype=float).reshape(1, self.physics.action_dim)
        noise = self.np_random.standard_normal((1, self.physics.noise_dim)) if self.physics.noise_dim else None
        tr = self.physics.transition(self._state, a, self._params, self._hold, self._steps, noise)
        self._state, self._hold, self._steps = tr.state, tr.hold, tr.steps
        obs = self.physics.observe(self._state, self._params)[0]
        info = self._info()
        terminated, truncated = bool(tr.terminated[0]), bool(tr.truncated[0])
        if terminated or truncated:
            info["success"] = bool(tr.success[0])
            if not tr.success[0]:
                info["failure"] = self.physics.failure_words[int(tr.failure[0])]
        if self.render_mode == "human":
            self.render()
        return obs, float(tr.reward[0]), terminated, truncated, info

    def render(self):
        if self.render_mode is None:
            gym.logger.warn("render() called without a render_mode; pass render_mode='rgb_array' or 'human'")
            return None
        if self._state is None:
            raise RuntimeError("call reset() before render()")
        return self._renderer.frame(self._state[0], self._params[0], float(self._steps[0] * self.physics.dt))

    def close(self) -> None:
        self._renderer.close()


class PhysicsVectorEnv(VectorEnv):
    """gymnasium ``VectorEnv``: N instances, each with its own parameters.

    ``params`` maps names to a scalar (shared) or to N values. Finished
    sub-environments are reset on the next call to :meth:`step` (gymnasium's
    next-step autoreset), which ignores their action and returns reward 0.
    """

    physics_type: ClassVar[type[Physics]]
    metadata: ClassVar[dict[str, Any]] = {
        "render_modes": ["rgb_array"],
        "render_fps": 50,
        "autoreset_mode": AutoresetMode.NEXT_STEP,
    }

    def __init__(
        self,
        num_envs: int = 1,
        max_episode_steps: int | None = None,
        render_mode: str | None = None,
        **kwargs: Any,
    ):
        overrides, kwargs = _split_kwargs(kwargs)
        if max_episode_steps is not None:
            dt = kwargs.get("dt", self.physics_type.default_dt)
            kwargs["time_limit"] = int(max_episode_steps) * float(dt)
        self.physics = self.physics_type(**kwargs)
        self.num_envs = int(num_envs)
        self.param_table = self.physics.param_table
        self._params = self.param_table.resolve_batch(overrides, self.num_envs)
        # row-major copy for the autoreset's row gathers (the physics reads whole columns of _params)
        self._param_rows = np.ascontiguousarray(self._params)
        # fixed for the env's life: plants may keep constants derived from it (see CartPolePhysics)
        self._params.setflags(write=False)
        self.single_observation_space, self.single_action_space = _spaces(self.physics)
        self.observation_space = gym.vector.utils.batch_space(self.single_observation_space, self.num_envs)
        self.action_space = gym.vector.utils.batch_space(self.single_action_space, self.num_envs)
        if render_mode is not None and render_mode not in self.metadata["render_modes"]:
            raise ValueError(f"render_mode: {render_mode!r} not one of {self.metadata['render_modes']}")
        self.render_mode = render_mode
        self._renderer = Renderer(self.physics, render_mode)
        self._state: Array | None = None
        self._hold = np.zeros(self.num_envs)
        self._steps = np.zeros(self.num_envs, dtype=np.int64)
        self._redo = np.zeros(0, dtype=np.int64)  # rows that ended at the previous step
        self._words = np.array(self.physics.failure_words)

    @property
    def dt(self) -> float:
        return self.physics.dt

    @property
    def params(self) -> Array:
        """Parameters in use, shape (num_envs, P), columns as ``param_table``."""
        return self._params.copy()

    @property
    def state(self) -> Array | None:
        return None if self._state is None else self._state.copy()

    def reset(self, *, seed: int | None = None, options: dict[str, Any] | None = None):
        super().reset(seed=seed)
        options = options or {}
        if "state" in options:
            s = np.broadcast_to(np.asarray(options["state"], dtype=float), (self.num_envs, self.physics.state_dim))
            self._state = s.copy()
        else:
            self._state = self.physics.sample_start(self.np_random, self._params, options.get("start_scale", 1.0))
        self._hold = np.zeros(self.num_envs)
        self._steps = np.zeros(self.num_envs, dtype=np.int64)
        self._redo = np.zeros(0, dtype=np.int64)
        return self.physics.observe(self._state, self._params), {"state": self._state.copy()}

    def step(self, actions):
        if self._state is None:
            raise RuntimeError("call reset() before step()")
        a = np.asarray(actions, dtype=float).reshape(self.num_envs, self.physics.action_dim)
        noise = (
            self.np_random.standard_normal((self.num_envs, self.physics.noise_dim)) if self.physics.noise_dim else None
        )
        tr = self.physics.transition(self._state, a, self._params, self._hold, self._steps, noise)
        state, hold, steps = tr.state, tr.hold, tr.steps
        reward, terminated, truncated = tr.reward, tr.terminated, tr.truncated
        success = tr.success
        redo = self._redo  # integer rows: cheaper than repeated boolean masks
        if redo.size:
            state[redo] = self.physics.sample_start(self.np_random, self._param_rows[redo])
            hold[redo] = 0.0
            steps[redo] = 0
            reward[redo] = 0.0
            terminated[redo] = False
            truncated[redo] = False
            success[redo] = False
        self._state, self._hold, self._steps = state, hold, steps
        done = terminated | truncated
        ended = np.flatnonzero(done)
        self._redo = ended
        failed_rows = ended[~success[ended]]
        failed = np.zeros(self.num_envs, dtype=bool)
        failed[failed_rows] = True
        # np.zeros of a string dtype is a lazily zeroed page: only failed rows cost a write
        failure = np.zeros(self.num_envs, dtype=self._words.dtype)
        if failed_rows.size:
            failure[failed_rows] = self._words[tr.failure[failed_rows]]
        info = {
            "state": state.copy(),
            "success": success,
            "_success": done,
            "failure": failure,
            "_failure": failed,
        }
        return self.physics.observe(state, self._params), reward, terminated, truncated, info

    def render(self):
        if self.render_mode is None or self._state is None:
            return None
        return tuple(
            self._renderer.frame(s, p, float(k * self.physics.dt))
            for s, p, k in zip(self._state, self._params, self._steps)
        )

    def close_extras(self, **kwargs: Any) -> None:
        self._renderer.close()
