"""Random streams that depend on a scenario's own key, not on its batch.

A scenario's sensor noise and gust draws must be the same whether it runs in a
batch of 10,000 (a sweep), next to 150 genomes (evolution) or alone (a replay
of one failing sample). numpy's generators are one stream per object, so a
batch would need one Python call per scenario per step. Instead each draw is a
pure function of ``(scenario key, step, channel)``: a counter-based generator
built from the splitmix64 finalizer (Steele, Lea & Flood 2014, "Fast
splittable pseudorandom number generators") and the Box-Muller transform.
Scenario keys themselves come from numpy's ``SeedSequence``.
"""

from __future__ import annotations

import numpy as np

_GOLDEN = np.uint64(0x9E3779B97F4A7C15)
_M1 = np.uint64(0xBF58476D1CE4E5B9)
_M2 = np.uint64(0x94D049BB133111EB)
_STEP = np.uint64(0xD1B54A32D192ED03)
_TWO_PI = 2.0 * np.pi
_INV_2_53 = 1.0 / float(1 << 53)


def scenario_keys(seed: int | np.random.SeedSequence, n: int) -> np.ndarray:
    """``n`` independent 64-bit scenario keys drawn from ``seed`` (uint64 array)."""
    ss = seed if isinstance(seed, np.random.SeedSequence) else np.random.SeedSequence(seed)
    return ss.generate_state(n, dtype=np.uint64)


def _mix(z: np.ndarray) -> np.ndarray:
    # splitmix64 output function; uint64 arithmetic wraps modulo 2**64 as intended.
    z = (z ^ (z >> np.uint64(30))) * _M1
    z = (z ^ (z >> np.uint64(27))) * _M2
    return z ^ (z >> np.uint64(31))


def uniform(keys: np.ndarray, counter: int, dim: int) -> np.ndarray:
    """Uniform draws in (0, 1], shape (len(keys), dim), for draw number ``counter``."""
    with np.errstate(over="ignore"):
        base = keys.astype(np.uint64)[:, None] + np.uint64(counter) * _STEP
        lanes = (np.arange(1, dim + 1, dtype=np.uint64) * _GOLDEN)[None, :]
        bits = _mix(base + lanes)
    return ((bits >> np.uint64(11)).astype(np.float64) + 1.0) * _INV_2_53


def normal(keys: np.ndarray, counter: int, dim: int) -> np.ndarray:
    """Standard normal draws, shape (len(keys), dim), for draw number ``counter``."""
    u = uniform(keys, counter, 2 * dim)
    return np.sqrt(-2.0 * np.log(u[:, :dim])) * np.cos(_TWO_PI * u[:, dim:])
