"""pretrial's physics-simulated gymnasium environments.

Importing this package registers ``pretrial/CartPole-v0``,
``pretrial/DronePair-v0`` and ``pretrial/GantryCrane-v0`` with gymnasium::

    import gymnasium, pretrial_envs
    env = gymnasium.make("pretrial/GantryCrane-v0", params={"load_mass": 2.0})
"""

from .core import (
    DIVERGED,
    TIMEOUT,
    ParamSpec,
    ParamTable,
    Physics,
    PhysicsEnv,
    PhysicsVectorEnv,
    Transition,
    euler_step,
    jacobians,
    rk4_step,
)
from .registry import env_ids, import_prefix, make_physics, physics_type, register_physics, register_shipped

register_shipped()

__all__ = [
    "DIVERGED",
    "TIMEOUT",
    "ParamSpec",
    "ParamTable",
    "Physics",
    "PhysicsEnv",
    "PhysicsVectorEnv",
    "Transition",
    "env_ids",
    "euler_step",
    "import_prefix",
    "jacobians",
    "make_physics",
    "physics_type",
    "register_physics",
    "register_shipped",
    "rk4_step",
]
__version__ = "0.1.0"
