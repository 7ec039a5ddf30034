"""Which environments exist, and how to reach their physics core.

The shipped environments are registered with gymnasium by module path, so
importing :mod:`pretrial_envs` is cheap and each env module loads on first use.
A user's own plant joins the same way through :func:`register_physics`.
"""

from __future__ import annotations

import importlib
from typing import Any

import gymnasium as gym

from .core import Physics, PhysicsEnv, PhysicsVectorEnv, unknown_name_message

#: env id -> "module:PhysicsClass" (shipped) or the class itself (registered at run time)
_PHYSICS: dict[str, Any] = {
    "pretrial/CartPole-v0": "pretrial_envs.cartpole:CartPolePhysics",
    "pretrial/DronePair-v0": "pretrial_envs.drone_pair:DronePairPhysics",
    "pretrial/GantryCrane-v0": "pretrial_envs.gantry:GantryPhysics",
}
_FRONT_DOORS = {
    "pretrial/CartPole-v0": ("pretrial_envs.cartpole:CartPoleEnv", "pretrial_envs.cartpole:CartPoleVectorEnv"),
    "pretrial/DronePair-v0": ("pretrial_envs.drone_pair:DronePairEnv", "pretrial_envs.drone_pair:DronePairVectorEnv"),
    "pretrial/GantryCrane-v0": ("pretrial_envs.gantry:GantryEnv", "pretrial_envs.gantry:GantryVectorEnv"),
}


def _load(path: str) -> Any:
    module, name = path.split(":")
    return getattr(importlib.import_module(module), name)


def register_shipped() -> None:
    """Register the shipped environments with gymnasium (idempotent)."""
    for env_id, (entry, vector_entry) in _FRONT_DOORS.items():
        if env_id not in gym.registry:
            gym.register(id=env_id, entry_point=entry, vector_entry_point=vector_entry)


def register_physics(physics_type: type[Physics]) -> None:
    """Register a user's :class:`Physics` subclass under its ``env_id``.

    After this, ``gymnasium.make(physics_type.env_id)`` and ``make_vec`` work, and
    pretrial's rollout engine steps the plant at batched numpy speed.
    """
    env_id = physics_type.env_id
    if not env_id:
        raise ValueError(f"{physics_type.__name__}.env_id is empty; give the plant an id such as 'mylab/Arm-v0'")
    env_cls = type(f"{physics_type.__name__}Env", (PhysicsEnv,), {"physics_type": physics_type})
    vec_cls = type(f"{physics_type.__name__}VectorEnv", (PhysicsVectorEnv,), {"physics_type": physics_type})
    env_cls.__doc__ = physics_type.__doc__
    _PHYSICS[env_id] = physics_type
    if env_id in gym.registry:
        del gym.registry[env_id]
    gym.register(id=env_id, entry_point=env_cls, vector_entry_point=vec_cls)


def env_ids() -> list[str]:
    """Ids of every environment with a physics core (shipped first)."""
    return list(_PHYSICS)


def import_prefix(env_id: str) -> str:
    """``module:id`` (as gymnasium accepts) -> ``id``, importing ``module`` first so it can register its plants.

    A plain id comes back unchanged. ValueError names the module when it cannot be imported.
    """
    if ":" not in env_id:
        return env_id
    module, name = env_id.split(":", 1)
    try:
        importlib.import_module(module)
    except ImportError as exc:
        raise ValueError(f"{env_id}: cannot import module {module!r} ({exc})") from None
    return name


def physics_type(env_id: str) -> type[Physics]:
    """The :class:`Physics` class behind ``env_id`` (or ``module:id``); ValueError if it has none."""
    env_id = import_prefix(env_id)
    entry = _PHYSICS.get(env_id)
    if entry is None:
        # A gymnasium env whose class declares a physics core also qualifies.
        spec = gym.registry.get(env_id)
        if spec is not None:
            cls = _load(spec.entry_point) if isinstance(spec.entry_point, str) else spec.entry_point
            found = getattr(cls, "physics_type", None)
            if isinstance(found, type) and issubclass(found, Physics):
                return found
        raise ValueError(unknown_name_message("environment", env_id, env_ids()))
    if isinstance(entry, str):
        entry = _load(entry)
        _PHYSICS[env_id] = entry
    return entry


def make_physics(env_id: str, **kwargs: Any) -> Physics:
    """Build the physics core of ``env_id`` with the env's keyword arguments (no ``params``)."""
    return physics_type(env_id)(**kwargs)
