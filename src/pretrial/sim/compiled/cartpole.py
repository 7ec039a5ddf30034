"""The cart-pole's equations and episode rules for one row, compiled: the compiled engine's cart-pole.

A second writing of :class:`pretrial_envs.cartpole.CartPolePhysics` (one pole,
Florian 2007; two poles, Wieland 1991) for :mod:`pretrial.sim.compiled`: the same
operations in the same order on one row's numbers, so that every state,
failure code and reward equals the numpy core's bit for bit (``sin``, ``cos``
and ``tanh`` are the C library's in both, numba's and numpy's alike; the
tests compare them on random batches). Where the numpy core decides per
batch whether any row has friction, a row here takes the friction terms only
when its own coefficient is non-zero: with a zero coefficient both forms give
the same numbers.

Where numpy's function is the C library's (``sin`` and ``cos`` here), the
numbers are equal bit for bit; numpy's ``tanh`` differs from the C library's
in the last bit on about a quarter of values, so rows with cart friction
(which smooths the Coulomb sign with ``tanh``) agree to rounding.

Rows are passed by index, never as views (numba counts references on every
view): ``deriv(ws, src, dst, force, params, r, cols, poles)`` writes the state
derivative of workspace row ``src`` into row ``dst`` for parameter row ``r``;
``rules(ws, action, params, r, cols, poles, code)`` returns ``(failure code,
reward)`` for the state in workspace row 0 after a period (``code``: a
divergence the engine found, else 0); ``slack(ws, params, r, cols, poles)`` is
its constraint slack; ``observe(ws, obs, positions)`` writes the observation of
workspace row 0.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from pretrial_envs.cartpole import ANGLE_WEIGHT, OFFSET_WEIGHT, CartPolePhysics

#: parameter columns the kernels read, in this order (``cols``); names missing from a one-pole table are -1
_ONE = ("gravity", "cart_mass", "pole_mass", "pole_half_length", "max_force", "cart_friction", "pole_friction",
        "friction_speed", "track_half_length", "fail_angle")
_TWO = ("pole2_mass", "pole2_half_length", "cart_friction_force", "pole2_friction")
COLUMNS = _ONE + _TWO


def columns(physics: CartPolePhysics) -> np.ndarray:
    """Column of each name of :data:`COLUMNS` in ``physics``' parameter table (-1: not in it)."""
    names = physics.param_table.names
    return np.array([names.index(n) if n in names else -1 for n in COLUMNS], dtype=np.int64)


G, M, MP, L, MAX_FORCE, MU_C, MU_P, V_EPS, TRACK, FAIL, MP2, L2, F_C2, MU_P2 = range(len(COLUMNS))

# no reference counting, as in pretrial.controller.network_kernel; cached: nothing here calls another file
_JIT = {"cache": True, "_nrt": False}


@njit(inline="always", **_JIT)
def solve(s: float, friction: bool, sin: float, cos: float, mlw2: float, force: float, total: float, g: float,
          m: float, half: float, ml: float, g_sin: float) -> tuple[float, float, float]:
    # CartPolePhysics._one_pole's solve, operation for operation: (x'', theta'', N_c)
    if not friction:
        temp = mlw2 * sin
        temp += force
        temp /= total
        lever = cos
    else:
        temp = s * cos
        temp += sin
        temp *= mlw2
        temp += force
        temp /= total
        temp -= s * g  # (F + m l w^2 (sin + s cos)) / (M + m) - s g
        lever = cos - s * sin
    den = cos * lever
    den *= m
    den /= total
    den = 4.0 / 3.0 - den
    den *= half
    th_acc = g_sin - cos * temp
    th_acc /= den
    x_acc = ml * th_acc
    x_acc *= lever
    x_acc /= total
    x_acc = temp - x_acc
    normal = th_acc * sin
    normal *= ml
    normal += mlw2 * cos
    normal = total * g - normal  # N_c = (M + m) g - m l (theta'' sin + theta'^2 cos)
    return x_acc, th_acc, normal


@njit(inline="always", **_JIT)
def pole_terms(angle: float, w: float, m: float, half: float, mu: float, g: float
               ) -> tuple[float, float, float, float, float]:
    # one pole of CartPolePhysics._two_poles: (effective force, effective mass, cos, piv, g sin)
    sin = math.sin(angle)
    cos = math.cos(angle)
    piv = mu * w
    piv /= m
    piv /= half
    g_sin = g * sin
    t = piv - g_sin
    t *= cos
    t *= 0.75
    eff = w * w
    eff *= half
    eff *= sin
    eff += t
    eff *= m
    mass = cos * cos
    mass *= -0.75
    mass += 1.0
    mass *= m
    return eff, mass, cos, piv, g_sin


@njit(inline="always", **_JIT)
def pole_acceleration(cos: float, piv: float, g_sin: float, half: float, x_acc: float) -> float:
    # theta'' = 3 / (4 l) (g sin - x'' cos - mu_p theta' / (m l))
    a = g_sin - cos * x_acc
    a -= piv
    a *= 0.75
    a /= half
    return a


@njit(**_JIT)
def deriv(ws: np.ndarray, src: int, dst: int, force: float, params: np.ndarray, r: int, cols: np.ndarray,
          poles: int) -> None:
    x_dot = ws[src, 1]
    if poles == 1:
        g, m, half = params[r, cols[G]], params[r, cols[MP]], params[r, cols[L]]
        total = params[r, cols[M]] + m
        ml = m * half
        w = ws[src, 3]
        sin = math.sin(ws[src, 2])
        cos = math.cos(ws[src, 2])
        mlw2 = w * w
        mlw2 *= ml
        g_sin = g * sin
        mu_p = params[r, cols[MU_P]]
        if mu_p != 0.0:
            pivot = mu_p * w
            pivot /= ml
            g_sin -= pivot
        mu_c = params[r, cols[MU_C]]
        friction = mu_c != 0.0
        slip = 0.0
        if friction:
            slip = math.tanh(x_dot / params[r, cols[V_EPS]]) * mu_c
        x_acc, th_acc, normal = solve(slip, friction, sin, cos, mlw2, force, total, g, m, half, ml, g_sin)
        if friction and normal < 0.0:  # Florian 2007: solve again with the sign of N_c
            x_acc, th_acc, normal = solve(-slip, friction, sin, cos, mlw2, force, total, g, m, half, ml, g_sin)
        ws[dst, 0] = x_dot
        ws[dst, 1] = x_acc
        ws[dst, 2] = w
        ws[dst, 3] = th_acc
        return
    # two poles: CartPolePhysics._two_poles, operation for operation
    g = params[r, cols[G]]
    num = math.tanh(x_dot / params[r, cols[V_EPS]])
    num *= params[r, cols[F_C2]]
    num = force - num
    den = params[r, cols[M]]
    ws[dst, 0] = x_dot
    ws[dst, 2] = ws[src, 3]
    ws[dst, 4] = ws[src, 5]
    e1, t1, c1, v1, s1 = pole_terms(ws[src, 2], ws[src, 3], params[r, cols[MP]], params[r, cols[L]],
                                    params[r, cols[MU_P]], g)
    num += e1
    den += t1
    e2, t2, c2, v2, s2 = pole_terms(ws[src, 4], ws[src, 5], params[r, cols[MP2]], params[r, cols[L2]],
                                    params[r, cols[MU_P2]], g)
    num += e2
    den += t2
    num /= den  # x''
    ws[dst, 1] = num
    ws[dst, 3] = pole_acceleration(c1, v1, s1, params[r, cols[L]], num)
    ws[dst, 5] = pole_acceleration(c2, v2, s2, params[r, cols[L2]], num)


@njit(inline="always", **_JIT)
def rules(ws: np.ndarray, action: float, params: np.ndarray, r: int, cols: np.ndarray, poles: int,
          code: int) -> tuple[int, float]:
    # check() then reward(); ``code`` is a failure the engine found already (divergence), else 0
    fail = params[r, cols[FAIL]]
    track = params[r, cols[TRACK]]
    if code == 0:
        fell = abs(ws[0, 2]) > fail
        if poles == 2:
            fell = fell or abs(ws[0, 4]) > fail
        if fell:
            code = 1
        elif abs(ws[0, 0]) > track:
            code = 2
    tilt = ws[0, 2] / fail
    tilt *= tilt
    if poles == 2:
        tilt2 = ws[0, 4] / fail
        tilt2 *= tilt2
        tilt += tilt2
        tilt *= 0.5
    offset = ws[0, 0] / track
    offset *= offset
    tilt *= -ANGLE_WEIGHT
    tilt += 1.0
    offset *= OFFSET_WEIGHT
    tilt -= offset
    tilt *= 1.0 if code == 0 else 0.0
    tilt += 0.0
    return code, tilt


@njit(inline="always", **_JIT)
def slack(ws: np.ndarray, params: np.ndarray, r: int, cols: np.ndarray, poles: int) -> float:
    # constraint_slack: min(1 - |theta_i| / fail_angle, 1 - |x| / track), NaN kept (np.maximum, np.minimum)
    tilt = abs(ws[0, 2])
    if poles == 2:
        t2 = abs(ws[0, 4])
        tilt = t2 if (t2 > tilt or t2 != t2) else tilt
    a = 1.0 - tilt / params[r, cols[FAIL]]
    b = 1.0 - abs(ws[0, 0]) / params[r, cols[TRACK]]
    if a != a or b != b:
        return math.nan
    return a if a < b else b


@njit(inline="always", **_JIT)
def observe(ws: np.ndarray, obs: np.ndarray, positions: bool) -> None:
    if positions:
        for i in range(obs.shape[0]):
            obs[i] = ws[0, 2 * i]
    else:
        for i in range(obs.shape[0]):
            obs[i] = ws[0, i]
