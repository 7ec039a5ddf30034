"""Random streams that depend on a scenario's own key, not on its batch.

A scenario's sensor noise and gust draws must be the same whether it runs in a
batch of 10,000 (a sweep), next to 150 genomes (evolution) or alone (a replay
of one failing sample). numpy's generators are one stream per object, so a
batch would need one Python call per scenario per step. Instead each draw is a
pure function of ``(scenario key, step, channel)``: a counter-based generator
built from the splitmix64 finalizer (Steele, Lea & Flood 2014, "Fast
splittable pseudorandom number generators") and the Box-Muller transform.
Scenario keys themselves come from numpy's ``SeedSequence``.

Normal draws come in stream versions (:data:`STREAM_VERSIONS`), and whoever
creates a stream names its version, so that a recorded result replays with the
draws it was made with:

* version 1: draw ``j`` of ``dim`` is ``sqrt(-2 ln u_j) cos(2 pi u_{dim+j})``
  from ``2 dim`` uniforms; the sine half of each Box-Muller pair is dropped;
* version 2: both halves of each pair (Box & Muller 1958): from ``2 h``
  uniforms, ``h = ceil(dim / 2)``, draw ``j < h`` is ``r_j cos(2 pi u_{h+j})``
  and draw ``h + j`` is ``r_j sin(2 pi u_{h+j})`` with ``r_j = sqrt(-2 ln u_j)``:
  half the uniforms, logarithms and square roots of version 1.

Uniform draws are the same in every version.
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
    return _uniform(keys, counter, dim, lanes_first=False)


def _uniform(keys: np.ndarray, counter: int, dim: int, lanes_first: bool) -> np.ndarray:
    # lane j of key i; lanes_first gives the transpose, (dim, len(keys)), whose lanes are contiguous
    with np.errstate(over="ignore"):
        base = keys.astype(np.uint64) + np.uint64(counter) * _STEP
        lanes = np.arange(1, dim + 1, dtype=np.uint64) * _GOLDEN
        bits = _mix(base[None, :] + lanes[:, None] if lanes_first else base[:, None] + lanes[None, :])
    return ((bits >> np.uint64(11)).astype(np.float64) + 1.0) * _INV_2_53


#: the normal-draw stream versions (see the module docstring); 1 is what results recorded before versions used
STREAM_VERSIONS = (1, 2)


def check_version(version: object) -> int:
    """``version`` as an int if it is one of :data:`STREAM_VERSIONS`, else a one-line ValueError."""
    if isinstance(version, bool) or not isinstance(version, (int, np.integer)) or version not in STREAM_VERSIONS:
        raise ValueError(f"stream_version: {version!r} not one of {', '.join(map(str, STREAM_VERSIONS))}")
    return int(version)


def normal(keys: np.ndarray, counter: int, dim: int, *, version: int) -> np.ndarray:
    """Standard normal draws, shape (len(keys), dim), for draw number ``counter`` in stream ``version``."""
    # The lanes of uniform(keys, counter, 2 h), drawn lane-major so that every step below runs over
    # contiguous memory (row-major, each operation would loop over rows of h values); same floats.
    if check_version(version) == 1:
        u = _uniform(keys, counter, 2 * dim, lanes_first=True)
        r = u[:dim]
        np.log(r, out=r)
        r *= -2.0
        np.sqrt(r, out=r)  # sqrt(-2 ln u1)
        angle = u[dim:]
        angle *= _TWO_PI
        np.cos(angle, out=angle)
        r *= angle  # times cos(2 pi u2)
        return np.ascontiguousarray(r.T)
    half = (dim + 1) // 2
    u = _uniform(keys, counter, 2 * half, lanes_first=True)
    r = u[:half]
    np.log(r, out=r)
    r *= -2.0
    np.sqrt(r, out=r)
    angle = u[half:]
    angle *= _TWO_PI
    out = np.empty((2 * half, len(keys)))
    np.cos(angle, out=out[:half])
    np.sin(angle, out=out[half:])
    out[:half] *= r
    out[half:] *= r
    return np.ascontiguousarray(out[:dim].T)


#: draw number of the start-state draws (the control loop's counters, 2 per step, never reach it)
START_COUNTER = 2**63 - 1


def episode_keys(seeds: np.ndarray | int, episodes: np.ndarray) -> np.ndarray:
    """Key of episode ``e`` of integer seed ``N``: a function of ``(N, e)`` only.

    So episode 3 of seed 42 is the same episode in a batch of 10,000 (a sweep)
    and alone (``pretrial replay --seed 42 --episodes 4``, its fourth one).
    """
    s = np.broadcast_to(np.asarray(seeds, dtype=np.uint64), np.shape(episodes))
    with np.errstate(over="ignore"):
        return _mix(_mix(s + _GOLDEN) + np.asarray(episodes, dtype=np.uint64) * _STEP + _GOLDEN)


class RowDraws:
    """The part of :class:`numpy.random.Generator` that start-state samplers use, row-keyed.

    Row ``i`` of every draw depends only on ``keys[i]`` and on how many draws
    came before, never on the other rows.
    """

    def __init__(self, keys: np.ndarray, counter: int = START_COUNTER):
        self.keys = np.asarray(keys, dtype=np.uint64)
        self._counter = int(counter)

    def _unit(self, size: int | tuple[int, ...] | None) -> np.ndarray:
        n = len(self.keys)
        shape = (n,) if size is None else ((size,) if isinstance(size, int) else tuple(size))
        if shape[0] != n:
            raise ValueError(f"RowDraws draws one row per key ({n}), not shape {shape}")
        dim = int(np.prod(shape[1:], dtype=np.int64))
        u = uniform(self.keys, self._counter, max(dim, 1))
        self._counter -= 1
        return (u[:, 0] if len(shape) == 1 else u.reshape(shape)) - _INV_2_53  # [0, 1)

    def uniform(self, low: float = 0.0, high: float = 1.0,
                size: int | tuple[int, ...] | None = None) -> np.ndarray:
        """Uniform draws in [low, high), first axis one row per key."""
        return low + (high - low) * self._unit(size)

    def integers(self, low: int, high: int | None = None, size: int | tuple[int, ...] | None = None) -> np.ndarray:
        """Whole numbers in [low, high), first axis one row per key."""
        if high is None:
            low, high = 0, low
        return low + np.floor(self._unit(size) * (high - low)).astype(np.int64)
