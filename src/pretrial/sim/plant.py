"""Plants by env id: a pretrial physics core, or any gymnasium env through the slower generic path.

:func:`env_id_of` resolves what a user typed (a full or short pretrial id, a gymnasium
id, or ``module:id``); :func:`build_plant` makes the batch plant, with errors naming where
the id and options came from.

Environments built on pretrial's physics core step a whole batch in a few
numpy calls. Any other gymnasium env with Box observation and action spaces
evolves, replays and sweeps the same way through :class:`GymnasiumPlant`, which
presents N separate env instances behind the :class:`~pretrial_envs.core.Physics`
interface the rollout engine drives. It steps them one by one in Python, so it
is as fast as the env itself, no faster.

The batch "state" of a row is ``[reset seed, observation...]``: the seed makes
a scenario replayable (every policy meets the same episode), the observation is
what the rollout engine passes on. Physics parameters and disturbance inputs of
such an env are not known to pretrial, so only the generic perturbations
(actuator, sensor, timing) apply to it.
"""

from __future__ import annotations

from typing import Any

import gymnasium as gym
import numpy as np

from pretrial.errors import InputError
from pretrial_envs.core import ParamTable, Physics


class GymnasiumPlant(Physics):
    """N instances of a gymnasium env behind the batch-physics interface.

    Parameters
    ----------
    env_id : str
        A registered gymnasium id whose spaces are ``Box``.
    time_limit_steps : int, optional
        Episode length in env steps (default: the env's registered limit, else 1000).
    **kwargs
        Passed to ``gymnasium.make``.
    """

    param_table = ParamTable([])
    #: each row is a live env object: rows cannot be dropped or reordered mid-episode
    rows_movable = False
    failure_modes = ("terminated",)
    success_rule = "the episode reaches its time limit without terminating"
    reward_doc = "the env's own reward"

    def __init__(self, env_id: str, time_limit_steps: int | None = None, **kwargs: Any):
        try:
            probe = gym.make(env_id, **kwargs)
        except Exception as exc:  # gymnasium raises many kinds for a bad id or kwargs
            raise InputError(f"{env_id}: gymnasium cannot make it ({type(exc).__name__}: {exc})") from None
        obs_space, act_space = probe.observation_space, probe.action_space
        if not isinstance(obs_space, gym.spaces.Box) or not isinstance(act_space, gym.spaces.Box):
            probe.close()
            raise InputError(f"{env_id}: observation and action spaces must be Box for pretrial's generic path")
        if time_limit_steps is None:
            spec_steps = probe.spec.max_episode_steps if probe.spec is not None else None
            time_limit_steps = spec_steps or 1000
        dt = float(getattr(probe.unwrapped, "dt", None) or 1.0 / float(probe.metadata.get("render_fps", 50) or 50))
        probe.close()
        self.env_id = env_id
        self.make_kwargs = dict(kwargs)
        n_obs, n_act = int(np.prod(obs_space.shape)), int(np.prod(act_space.shape))
        self.obs_names = tuple(f"obs{i}" for i in range(n_obs))
        self.obs_units = ("-",) * n_obs
        self.state_names = ("reset_seed", *self.obs_names)
        self.state_units = ("-", *self.obs_units)
        self.action_names = tuple(f"action{i}" for i in range(n_act))
        self.action_units = ("-",) * n_act
        self._low = np.broadcast_to(act_space.low.astype(float).reshape(-1), (n_act,))
        self._high = np.broadcast_to(act_space.high.astype(float).reshape(-1), (n_act,))
        super().__init__(dt=dt, time_limit=time_limit_steps * dt, integrator="euler")
        self._envs: list[Any] = []

    def options(self) -> dict[str, Any]:
        return {"time_limit_steps": self.max_steps, **self.make_kwargs}

    def _env(self, row: int) -> Any:
        while len(self._envs) <= row:
            self._envs.append(gym.make(self.env_id, **self.make_kwargs))
        return self._envs[row]

    def sample_start(self, rng: np.random.Generator, params: np.ndarray, scale: float | np.ndarray = 1.0) -> np.ndarray:
        n = params.shape[0]
        seeds = rng.integers(0, 2**31 - 1, n)
        out = np.empty((n, self.state_dim))
        out[:, 0] = seeds
        for i, seed in enumerate(seeds):
            obs, _ = self._env(i).reset(seed=int(seed))
            out[i, 1:] = np.asarray(obs, float).reshape(-1)
        return out

    def observe(self, state: np.ndarray, params: np.ndarray) -> np.ndarray:
        return state[:, 1:].copy()

    def transition(self, state, action, params, hold, steps, noise=None, clipped=False):
        from pretrial_envs.core import Transition

        n = state.shape[0]
        action = np.clip(action, -1.0, 1.0)
        physical = self._low + (action + 1.0) * 0.5 * (self._high - self._low)
        new = state.copy()
        reward = np.zeros(n)
        terminated = np.zeros(n, dtype=bool)
        truncated = np.zeros(n, dtype=bool)
        for i in range(n):  # the generic path: one Python call per instance per step
            env = self._env(i)
            if steps[i] == 0:
                env.reset(seed=int(state[i, 0]))
            obs, r, term, trunc, _ = env.step(physical[i].astype(env.action_space.dtype))
            new[i, 1:] = np.asarray(obs, float).reshape(-1)
            reward[i] = float(r)
            terminated[i] = bool(term)
            truncated[i] = bool(trunc)
        steps = steps + 1
        truncated |= ~terminated & (steps >= self.max_steps)
        bad = ~np.isfinite(new).all(axis=1)
        failure = np.where(terminated, 1, 0)
        failure[bad] = self.diverged_code
        terminated |= bad
        success = truncated & ~terminated
        return Transition(new, reward, failure, success, terminated, truncated, hold, steps)

    def close(self) -> None:
        for env in self._envs:
            env.close()
        self._envs = []


def make_plant(env_id: str, **options: Any) -> Physics:
    """The batch plant of ``env_id``: its physics core, else the generic gymnasium path.

    ValueError/TypeError from the env's own option checks propagate; an id that
    neither pretrial nor gymnasium knows raises :class:`InputError`.
    """
    import pretrial_envs

    try:
        kind = pretrial_envs.physics_type(env_id)
    except ValueError as exc:
        plain = env_id.split(":", 1)[-1]  # physics_type has imported the module of a module:id already
        if plain not in gym.registry:
            raise InputError(str(exc)) from None
        return GymnasiumPlant(env_id, **options)
    return kind(**options)


def resolve_env_id(name: str) -> str:
    """Accept a full id (``pretrial/CartPole-v0``) or its short form (``CartPole-v0``)."""
    import pretrial_envs

    ids = pretrial_envs.env_ids()
    if name in ids:
        return name
    for env_id in ids:
        if env_id.split("/", 1)[-1].lower() == name.lower():
            return env_id
    try:
        pretrial_envs.physics_type(name)  # also imports the module of a module:id
        return name
    except ValueError as exc:
        raise InputError(str(exc)) from None


def env_id_of(name: str) -> str:
    """A pretrial env id (full or short, which wins over a gymnasium id of the same name) or a gymnasium id."""
    import gymnasium as gym

    try:
        return resolve_env_id(name)
    except InputError:
        if name.split(":", 1)[-1] in gym.registry:  # resolve_env_id has imported the module of a module:id
            return name
        raise


def build_plant(env_id: str, options: dict[str, Any] | None = None, where: str | None = None) -> Physics:
    """:func:`make_plant` with its errors as one-line :class:`InputError` naming ``where`` (default the env id).

    Parameters
    ----------
    env_id : str
        A resolved id (:func:`env_id_of`).
    options : dict, optional
        The env's keyword options.
    where : str, optional
        What the message names first, e.g. ``"plan.toml: scenario.options"``.
    """
    try:
        return make_plant(env_id, **(options or {}))
    except InputError as exc:
        raise InputError(f"{where}: {exc.message}" if where else exc.message) from None
    except (TypeError, ValueError) as exc:
        raise InputError(f"{where or env_id}: {exc}") from None


def check_workers_can_build(physics: Any, executor: Any) -> None:
    """Refuse a plant defined in ``__main__`` when work goes to other processes, naming the fix.

    Worker processes import the plant's module to rebuild it; a script's ``__main__``
    is not importable there, so the workers would fail with no useful message.
    """
    from pretrial.sim.execution import Executor

    cls = type(physics)
    if cls.__module__ != "__main__" or type(executor) is Executor:
        return
    env_id = getattr(physics, "env_id", "") or cls.__name__
    raise InputError(
        f"{env_id}: the plant {cls.__name__} is defined in __main__, which worker processes cannot import; "
        f"move it into a module and name the env as 'MODULE:{env_id}' (the module registers it when "
        "imported), or run with one worker (--workers 1)"
    )
