"""The compiled engine's episode loop: one row at a time, from start to end, in compiled code.

:func:`pretrial.sim.rollout.run_episodes` steps every row of a batch together,
a few numpy calls per control period whatever the batch holds; here each row
runs alone to its end (its network, its plant, its episode rules), so a period
costs what its arithmetic costs and a row that has ended costs nothing. The
loop is the nominal one of ``run_episodes``: observation -> network inputs ->
network -> action in [-1, 1] -> physical input -> integration (Euler or RK4,
``substeps`` per period) -> divergence check -> the plant's failure rule and
reward -> survival or the horizon. Tasks that succeed by surviving only (the
cart-pole's); reach tasks would need the goal hold here.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from pretrial.controller.network_kernel import forward
from pretrial.sim.compiled.cartpole import MAX_FORCE, deriv, observe, rules, slack
from pretrial_envs.core import DIVERGENCE_BOUND


# Not cached on disk: numba's cache notices changes to this file only, and this inlines the
# network from another (compiling takes a few seconds per process, once).
@njit(cache=False, _nrt=False)  # no reference counting (see pretrial.controller.network_kernel)
def run(n_in: int, node_ptr: np.ndarray, bias: np.ndarray, response: np.ndarray, activation: np.ndarray,
        aggregation: np.ndarray, edge_ptr: np.ndarray, edge_slot: np.ndarray, edge_weight: np.ndarray,
        output_slot: np.ndarray, plain: np.ndarray,
        obs_offset: np.ndarray, obs_scale: np.ndarray, action_scale: np.ndarray, action_offset: np.ndarray,
        blocks: int, params: np.ndarray, start: np.ndarray, scenarios: int, cols: np.ndarray,
        flags: np.ndarray, dt: float, substeps: int, rk4: bool,
        env_steps: int, limit: int, diverged_code: int, score: bool,
        ws: np.ndarray, obs: np.ndarray, values: np.ndarray, buf: np.ndarray, out: np.ndarray,
        action: np.ndarray, returns: np.ndarray, success: np.ndarray, failure: np.ndarray,
        steps: np.ndarray, min_slack: np.ndarray) -> None:
    """Every row's episode, row after row (the cart-pole's kernels; a task that succeeds by surviving).

    Its arguments, in order: the networks (:meth:`KernelNetworks.arrays`), the I/O map
    (``obs_offset``, ``obs_scale``, ``action_scale``, ``action_offset``, ``blocks``),
    the rows (``params`` (R, P), ``start`` (R, S), scenarios per policy), the plant's ``cols``,
    ``flags`` (``poles``, ``positions``), the period (``dt``, ``substeps``, ``rk4``),
    ``env_steps`` (the plant's time limit in periods), ``limit`` (the run's horizon),
    ``diverged_code``, ``score`` (keep the smallest
    constraint slack of each episode, as ``run_episodes(score=True)`` does), the buffers (``ws`` (6, S):
    the state, the four RK4 stages and a stage's argument; ``obs`` (O,); ``values``
    (blocks, 2 n_slots); ``buf`` (max_fan,); ``out`` (n_out,); ``action`` (A,)), then the outputs
    (``returns``, ``success``, ``failure``, ``steps``, ``min_slack``, each (R,)).
    """
    rows, s_dim = start.shape
    n_out = output_slot.shape[1]
    poles, positions = flags[0], flags[1] != 0
    h = dt / substeps
    half_h, sixth_h = 0.5 * h, h / 6.0
    for r in range(rows):
        g = r // scenarios
        for i in range(s_dim):
            ws[0, i] = start[r, i]
        for b in range(blocks):  # a fresh recurrent state per episode
            for i in range(values.shape[1]):
                values[b, i] = 0.0
        ret = 0.0
        least = np.inf
        code = 0
        k = 0
        while k < limit:
            observe(ws, obs, positions)
            for b in range(blocks):
                for i in range(n_in):
                    j = b * n_in + i
                    values[b, 1 + i] = (obs[j] - obs_offset[j]) * obs_scale[j]
                forward(g, n_in, node_ptr, bias, response, activation, aggregation, edge_ptr, edge_slot,
                        edge_weight, output_slot, plain, values, b, buf, out)
                for o in range(n_out):
                    j = b * n_out + o
                    a = out[o] * action_scale[j] + action_offset[j]
                    # np.clip's rule, NaN kept
                    action[j] = -1.0 if a < -1.0 else (1.0 if a > 1.0 else a)
            force = action[0] * params[r, cols[MAX_FORCE]]
            for _ in range(substeps):
                if rk4:
                    deriv(ws, 0, 1, force, params, r, cols, poles)
                    for i in range(s_dim):
                        ws[5, i] = ws[1, i] * half_h + ws[0, i]
                    deriv(ws, 5, 2, force, params, r, cols, poles)
                    for i in range(s_dim):
                        ws[5, i] = ws[2, i] * half_h + ws[0, i]
                    deriv(ws, 5, 3, force, params, r, cols, poles)
                    for i in range(s_dim):
                        ws[5, i] = ws[3, i] * h + ws[0, i]
                    deriv(ws, 5, 4, force, params, r, cols, poles)
                    for i in range(s_dim):
                        # rk4_step: ((((k2 + k3) * 2 + k1) + k4) * (h / 6)) + x
                        ws[0, i] = ((ws[2, i] + ws[3, i]) * 2.0 + ws[1, i] + ws[4, i]) * sixth_h + ws[0, i]
                else:
                    deriv(ws, 0, 1, force, params, r, cols, poles)
                    for i in range(s_dim):
                        ws[0, i] = ws[1, i] * h + ws[0, i]
            bad = False
            for i in range(s_dim):
                if not abs(ws[0, i]) <= DIVERGENCE_BOUND:  # NaN too
                    bad = True
            code, reward = rules(ws, action[0], params, r, cols, poles, diverged_code if bad else 0)
            if bad or not np.isfinite(reward):
                reward = 0.0
            ret += reward
            if score:  # np.fmin: a NaN slack leaves the running minimum as it was
                now = slack(ws, params, r, cols, poles)
                if now < least:
                    least = now
            k += 1
            if code != 0 or k >= env_steps:  # a failure, or the plant's own time limit (a success)
                break
        # surviving to the plant's time limit or to the run's horizon is a success
        returns[r] = ret
        success[r] = code == 0
        failure[r] = code
        steps[r] = k
        min_slack[r] = least

