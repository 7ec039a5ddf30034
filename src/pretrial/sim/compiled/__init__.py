"""The compiled engine: nominal episodes in numba-compiled code, an opt-in alternative to numpy.

``run_compiled`` returns what :func:`pretrial.sim.rollout.run_episodes` returns
for the same networks and scenarios (returns, success, failure codes, steps),
running each row alone to its end in compiled code instead of stepping the
whole batch with numpy calls. It is for evolution's inner loop: many short,
shrinking batches, where numpy's fixed cost per call dominates.

What it runs: the cart-pole (one or two poles, Euler or RK4) under its nominal
loop, with physics parameters varying per scenario, the continuous episode
score if asked for, and any neat-python
network (feed-forward or recurrent, every built-in activation and
aggregation). What it does not: perturbations of the loop (sensor, actuator,
timing, start scale), loop-quality judging, traces, learned residuals, the
other plants. :func:`unsupported` names the first
such need; callers refuse with it rather than fall back silently.

Numbers: the plant's operations are the numpy core's, in the same order; the
networks and the cart's friction use the C library's ``tanh``/``exp`` (the
networks as neat-python does), where numpy's may differ in the last bit (see
:mod:`pretrial.controller.network_kernel`). So outcomes are equal bit for bit
once the numpy engine uses the C library's functions too (tested), and agree
to rounding otherwise, except where a plant amplifies a last-bit difference
(a pole that falls a step earlier). A run records which engine it used.

numba is an optional dependency: ``pip install "pretrial[fast]"``.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from pretrial.controller.network import NetworkStack
from pretrial.controller.policy import IOMap
from pretrial.sim.rollout import Outcome, Scenarios, episode_score
from pretrial_envs.cartpole import CartPolePhysics
from pretrial_envs.core import Physics

__all__ = ["ENGINES", "available", "run_compiled", "unsupported"]

#: the engines a run can name: numpy (the reference and default) and this one
ENGINES = ("numpy", "compiled")


def available() -> bool:
    """True when numba can be imported (the compiled engine's one extra dependency)."""
    try:
        import numba  # noqa: F401
    except ImportError:
        return False
    return True


def unsupported(physics: Physics, io: IOMap | None = None, perturbations: Any = (), *,
                quality: Any = None) -> str | None:
    """Why the compiled engine cannot run this set-up (one phrase), or None when it can."""
    if not available():
        return 'numba is not installed (pip install "pretrial[fast]")'
    if type(physics) is not CartPolePhysics:
        return f"it runs the cart-pole only, not {getattr(physics, 'env_id', type(physics).__name__)}"
    if getattr(physics, "residual", None) is not None:
        return "it does not run learned residuals"
    if physics.noise_dim:
        return "it does not run the plant's random disturbances"
    if io is not None and io.action_dim != physics.action_dim:
        return f"the network drives {io.action_dim} actions, the plant takes {physics.action_dim}"
    if len(perturbations):
        return f"it runs the nominal loop only, without perturbations ({', '.join(sorted(perturbations))})"
    if quality is not None:
        return "it does not judge loop quality (a plan's [require.quality])"
    return None


def run_compiled(physics: Physics, networks: NetworkStack, io: IOMap, scenarios: Scenarios,
                 max_steps: int | None = None, score: bool = False) -> Outcome:
    """Every network on every scenario, to the end of each episode, in compiled code.

    Parameters
    ----------
    physics : Physics
        The plant (see :func:`unsupported` for which).
    networks : NetworkStack
        G networks; rows are policy-major as in ``run_episodes`` (row ``g * S + s``).
    io : IOMap
        Observation and action mapping shared by the networks.
    scenarios : Scenarios
        S scenarios without perturbations.
    max_steps : int, optional
        Episode length in control periods (defaults to the plant's time limit).
    score : bool
        Also compute each episode's continuous score (:func:`~pretrial.sim.rollout.episode_score`).

    Returns
    -------
    Outcome
        ``returns``, ``success``, ``failure``, ``steps`` (and ``score``) of shape (G, S); no trace or quality.

    Raises
    ------
    ValueError
        When :func:`unsupported` names a reason.
    """
    why = unsupported(physics, io, scenarios.perturb)
    if why is not None:
        raise ValueError(f"the compiled engine cannot run this: {why}")
    from pretrial.controller.network_kernel import KernelNetworks
    from pretrial.sim.compiled import cartpole
    from pretrial.sim.compiled.episodes import run

    nets = KernelNetworks.of_stack(networks)
    g, s = len(nets), len(scenarios)
    rows = g * s
    params = np.ascontiguousarray(np.tile(scenarios.params, (g, 1)), dtype=float)
    start = np.ascontiguousarray(np.tile(scenarios.start, (g, 1)), dtype=float)
    limit = physics.max_steps if max_steps is None else int(max_steps)
    returns, success = np.zeros(rows), np.zeros(rows, dtype=bool)
    failure, steps = np.zeros(rows, dtype=np.int64), np.zeros(rows, dtype=np.int64)
    min_slack = np.full(rows, np.inf)
    offset, scale, a_scale, a_offset = (np.ascontiguousarray(np.asarray(v, dtype=float))
                                        for v in (io.obs_offset, io.obs_scale, io.action_scale, io.action_offset))
    flags = np.array([physics.poles, physics.observe_mode == "positions"], dtype=np.int64)
    run(*nets.arrays(), offset, scale, a_scale, a_offset, io.blocks, params, start, s,
        cartpole.columns(physics), flags, float(physics.dt), int(physics.substeps), physics.integrator == "rk4",
        int(physics.max_steps), limit, int(physics.diverged_code), bool(score),
        np.empty((6, physics.state_dim)), np.empty(physics.obs_dim), np.empty((io.blocks, 2 * nets.n_slots)),
        np.empty(max(nets.max_fan, 1)), np.empty(nets.n_out), np.empty(physics.action_dim),
        returns, success, failure, steps, min_slack)
    shape = (g, s)
    scores = None
    if score:  # a survival task holds no goal: its longest hold is 0
        scores = episode_score(physics, success, failure, steps, limit, min_slack, np.zeros(rows)).reshape(shape)
    return Outcome(returns.reshape(shape), success.reshape(shape), failure.reshape(shape), steps.reshape(shape),
                   physics.failure_words, score=scores)
