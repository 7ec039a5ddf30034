"""Statistics shared by every analysis: the Wilson interval and the seeds an analysis derives from a plan's."""

from __future__ import annotations

import math

import numpy as np

#: two-sided 95% normal quantile squared, as in the Wilson interval (1.959964**2)
Z2 = 1.959963984540054**2


def wilson_interval(successes: np.ndarray | int, n: np.ndarray | int) -> tuple[np.ndarray, np.ndarray]:
    """Wilson (1927) score interval at 95% for ``successes`` out of ``n``.

    Returns (lower, upper); with all n succeeding the lower bound is n / (n + z^2).
    """
    k = np.asarray(successes, dtype=float)
    n = np.asarray(n, dtype=float)
    p = k / n
    denom = 1.0 + Z2 / n
    centre = (p + Z2 / (2 * n)) / denom
    half = math.sqrt(Z2) * np.sqrt(p * (1 - p) / n + Z2 / (4 * n * n)) / denom
    lo = np.where(k == 0, 0.0, centre - half)
    hi = np.where(k == n, 1.0, centre + half)
    return lo, hi


def derive_seed(seed: int, *key: int) -> int:
    """A 64-bit seed for one analysis of a plan (a pure function of the plan seed)."""
    return int(np.random.SeedSequence(seed, spawn_key=key).generate_state(1, dtype=np.uint64)[0])
