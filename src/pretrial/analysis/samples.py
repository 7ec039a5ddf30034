"""Monte Carlo samples in bounded memory: unit samples by block, a scratch store, exact quantiles, histograms.

A Monte Carlo run of 10^7 samples cannot hold its samples: :func:`pretrial.analysis.campaign.montecarlo`
draws and runs them a block at a time, streams each block to ``montecarlo.csv`` and keeps only
aggregates. What needs every sample again (the score quantiles, the report's histograms, whose
bins span the whole range) reads a scratch copy of the numeric columns back from an anonymous
temporary file (:class:`ColumnStore`), block by block.

Every function here gives the same numbers as its one-shot counterpart (scipy's samplers drawing
all rows at once, ``numpy.quantile``, ``numpy.histogram``); tests/analysis/test_montecarlo_stream.py checks each.
"""

from __future__ import annotations

import copy
import math
import tempfile
import warnings
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from pretrial.errors import PretrialError

#: equal-width bins of the report's Monte Carlo histograms (numpy's ``bins=30`` over the finite values)
HIST_BINS = 30
#: rows read back from the scratch store at a time
_READ_ROWS = 1 << 17


# --------------------------------------------------------------------------- #
# unit samples, a block at a time
# --------------------------------------------------------------------------- #
def unit_blocks(n: int, d: int, seed: int, sampler: str, block: int) -> Iterator[np.ndarray]:
    """The unit-cube samples of a Monte Carlo run, ``block`` rows at a time.

    Parameters
    ----------
    n, d : int
        Samples and dimensions.
    seed : int
        Seed of ``numpy.random.default_rng``, which drives the sampler.
    sampler : {"sobol", "lhs", "random"}
        Scrambled Sobol' points, a Latin hypercube (``scipy.stats.qmc``) or plain uniforms.
    block : int
        Rows per block (the last block may be shorter).

    Yields
    ------
    ndarray, shape (rows, d)
        Consecutive rows of the design that one call for all ``n`` rows gives, bit for bit:
        ``rng.random((n, d))``, ``qmc.Sobol(d, scramble=True, seed=rng).random(n)`` or
        ``qmc.LatinHypercube(d, seed=rng).random(n)``.

    Notes
    -----
    Uniforms and Sobol' points continue their stream from one call to the next. A Latin hypercube
    cannot be cut into blocks (each column is one shuffle of 1..n); :func:`_lhs_blocks` reproduces
    scipy's construction with one column's permutation in memory at a time (4 bytes per sample).
    """
    rng = np.random.default_rng(seed)
    sizes = [min(block, n - lo) for lo in range(0, n, block)]
    if sampler == "random":
        for b in sizes:
            yield rng.random((b, d))
    elif sampler == "sobol":
        from scipy.stats import qmc

        engine = qmc.Sobol(d, scramble=True, seed=rng)
        for b in sizes:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")  # Sobol balance warnings for n not a power of two
                yield engine.random(b)
    else:
        from scipy.stats import qmc

        # the engine draws from its own generator, spawned from ``rng``: take that one
        yield from _lhs_blocks(n, d, qmc.LatinHypercube(d, seed=rng).rng, sizes)


def _lhs_blocks(n: int, d: int, rng: np.random.Generator, sizes: Sequence[int]) -> Iterator[np.ndarray]:
    """scipy's Latin hypercube (scramble, no optimization) for ``rng``, in blocks of rows.

    scipy 1.x draws the jitter first (``rng.uniform(size=(n, d))``), then shuffles 1..n once per
    column (``rng.shuffle``) and returns ``(permutation - jitter) / n``. Here a copy of the
    generator re-draws the jitter block by block, and each column's permutation (int32: the
    shuffle's draws do not depend on the dtype) waits in an anonymous temporary file. The one
    allocation proportional to n is the permutation being shuffled: 40 MB at the plans' limit of
    10^7 samples. The test checks the result against scipy drawing all rows at once.
    """
    jitter = copy.deepcopy(rng)
    for b in sizes:  # the main stream moves past the jitter, as scipy's one draw of n x d does
        rng.uniform(size=(b, d))
    with tempfile.TemporaryFile() as f:
        for _ in range(d):
            perm = np.arange(1, n + 1, dtype=np.int32)
            rng.shuffle(perm)
            perm.tofile(f)
            del perm
        lo = 0
        for b in sizes:
            cols = []
            for j in range(d):
                f.seek(4 * (j * n + lo))
                cols.append(np.fromfile(f, dtype=np.int32, count=b))
            yield (np.column_stack(cols) - jitter.uniform(size=(b, d))) / n
            lo += b


# --------------------------------------------------------------------------- #
# the scratch store
# --------------------------------------------------------------------------- #
class ColumnStore:
    """Float64 columns of a known length, filled block by block in an anonymous temporary file.

    Each column is one contiguous stretch of the file, so a pass that needs one column (the
    score quantiles) reads that column only. The file has no name: it disappears when closed or
    when the process dies, and leaves nothing in ``directory``.

    Parameters
    ----------
    names : sequence of str
        The columns.
    rows : int
        Their length.
    directory : Path, optional
        Where the file lives (default: the system's temporary directory).
    """

    def __init__(self, names: Sequence[str], rows: int, directory: str | Path | None = None):
        self.names = list(names)
        self.rows = rows
        self.filled = 0
        self._where = str(directory or tempfile.gettempdir())
        try:
            self._file = tempfile.TemporaryFile(dir=directory)
        except OSError as exc:
            raise PretrialError(f"{self._where}: cannot create a scratch file ({exc.strerror})") from None

    def __enter__(self) -> ColumnStore:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        self._file.close()

    def append(self, block: Mapping[str, Any]) -> None:
        """Add the next rows: ``block[name]`` for every column (other keys are ignored)."""
        size = 0
        try:
            for j, k in enumerate(self.names):
                v = np.ascontiguousarray(block[k], dtype=np.float64)
                size = len(v)
                self._file.seek(8 * (j * self.rows + self.filled))
                v.tofile(self._file)
        except OSError as exc:
            raise PretrialError(f"{self._where}: scratch write failed ({exc.strerror})") from None
        self.filled += size

    def blocks(self, names: Sequence[str] | None = None) -> Iterator[dict[str, np.ndarray]]:
        """The rows filled so far, in order, :data:`_READ_ROWS` at a time: column name -> array."""
        names = self.names if names is None else list(names)
        for lo in range(0, self.filled, _READ_ROWS):
            b = min(_READ_ROWS, self.filled - lo)
            out = {}
            for k in names:
                self._file.seek(8 * (self.names.index(k) * self.rows + lo))
                out[k] = np.fromfile(self._file, dtype=np.float64, count=b)
            yield out


# --------------------------------------------------------------------------- #
# exact quantiles
# --------------------------------------------------------------------------- #
_SIGN = np.uint64(1 << 63)


def _order_keys(x: np.ndarray) -> np.ndarray:
    """Unsigned keys that sort as the float64 values do (no NaN; -0.0 is taken as 0.0)."""
    bits = (np.asarray(x, dtype=np.float64) + 0.0).view(np.uint64)  # + 0.0: -0.0 becomes 0.0
    return np.where(bits >= _SIGN, ~bits, bits | _SIGN)


def _from_key(key: int) -> float:
    bits = key ^ (1 << 63) if key >> 63 else ~key & ((1 << 64) - 1)
    return float(np.array(bits, dtype=np.uint64).view(np.float64))


def order_statistics(blocks: Callable[[], Iterable[np.ndarray]], ranks: Sequence[int]) -> dict[int, float]:
    """The values at positions ``ranks`` of the sorted data, read in blocks (no NaN in the data).

    A radix selection on the values' 64 bits, 16 bits per pass over ``blocks()``: each pass counts
    the next 16 bits among the values that share the prefix found so far, so memory is a 65536-bin
    count per rank and four passes find every rank exactly.
    """
    todo = {int(r): (0, int(r)) for r in ranks}  # rank -> (prefix found, rank among values with that prefix)
    for level in range(4):
        shift = np.uint64(48 - 16 * level)
        counts = {r: np.zeros(1 << 16, dtype=np.int64) for r in todo}
        for x in blocks():
            keys = _order_keys(x)
            digits = ((keys >> shift) & np.uint64(0xFFFF)).astype(np.intp)
            high = keys >> (shift + np.uint64(16)) if level else None
            for r, (prefix, _) in todo.items():
                d = digits if high is None else digits[high == np.uint64(prefix)]
                counts[r] += np.bincount(d, minlength=1 << 16)
        for r, (prefix, within) in todo.items():
            cum = np.cumsum(counts[r])
            digit = int(np.searchsorted(cum, within, side="right"))
            todo[r] = ((prefix << 16) | digit, within - (int(cum[digit - 1]) if digit else 0))
    return {r: _from_key(prefix) for r, (prefix, _) in todo.items()}


def _positions(n: int, q: float) -> tuple[int, int, float]:
    """numpy.quantile's (method "linear") neighbouring positions and weight for ``q`` of ``n`` values."""
    virtual = (n - 1) * q
    if virtual >= n - 1:  # numpy takes the last value, with a weight past 1
        return n - 1, n - 1, virtual + 1.0
    lower = math.floor(virtual)
    return lower, lower + 1, virtual - lower


def _lerp(a: float, b: float, t: float) -> float:
    """numpy.quantile's interpolation between neighbours (the symmetric form from t = 0.5 on)."""
    with np.errstate(invalid="ignore"):  # inf - inf is NaN, as in numpy
        diff = np.float64(b) - np.float64(a)
        return float(np.float64(b) - diff * (1 - t)) if t >= 0.5 else float(np.float64(a) + diff * t)


def exact_quantiles(blocks: Callable[[], Iterable[np.ndarray]], n: int, qs: Sequence[float],
                    has_nan: bool = False) -> dict[float, float]:
    """``numpy.quantile(x, q)`` for each q, with ``x`` (``n`` values) read in blocks from ``blocks()``.

    The same numbers as numpy's default ("linear") method: the two neighbouring order statistics
    found by :func:`order_statistics`, then numpy's interpolation; NaN everywhere when the data
    hold a NaN (``has_nan``), as numpy gives.
    """
    if has_nan:
        return {q: math.nan for q in qs}
    where = {q: _positions(n, q) for q in qs}
    values = order_statistics(blocks, sorted({p for lo, hi, _ in where.values() for p in (lo, hi)}))
    return {q: _lerp(values[lo], values[hi], t) for q, (lo, hi, t) in where.items()}


# --------------------------------------------------------------------------- #
# histograms for the report
# --------------------------------------------------------------------------- #
@dataclass
class SampleHistograms:
    """What the report's Monte Carlo plot draws: per column, successes and failures over equal bins.

    ``columns`` maps "score" and each varied name to (bin edges, successes per bin, failures per bin),
    or to None when the column has no finite value. The bins are ``numpy.histogram_bin_edges(v, 30)``
    of the column's finite values.
    """

    samples: int
    columns: dict[str, tuple[np.ndarray, np.ndarray, np.ndarray] | None]


def sample_histograms(blocks: Callable[[], Iterable[Mapping[str, Any]]], names: Sequence[str]) -> SampleHistograms:
    """Histograms of ``names`` split by the "success" column, over data read twice from ``blocks()``.

    The first pass finds each column's finite range (numpy's bin edges depend on nothing else), the
    second counts: the counts equal ``numpy.histogram`` of all values at once.
    """
    n = 0
    lo = {k: math.inf for k in names}
    hi = {k: -math.inf for k in names}
    for b in blocks():
        n += len(np.atleast_1d(b["success"]))
        for k in names:
            v = np.asarray(b[k], dtype=float)
            v = v[np.isfinite(v)]
            if len(v):
                lo[k], hi[k] = min(lo[k], float(v.min())), max(hi[k], float(v.max()))
    edges = {k: np.histogram_bin_edges(np.array([lo[k], hi[k]]), bins=HIST_BINS) for k in names if lo[k] <= hi[k]}
    counts = {k: (np.zeros(HIST_BINS, dtype=np.int64), np.zeros(HIST_BINS, dtype=np.int64)) for k in edges}
    for b in blocks():
        ok = np.asarray(b["success"], dtype=bool)
        for k, e in edges.items():
            v = np.asarray(b[k], dtype=float)
            keep = np.isfinite(v)
            counts[k][0][:] += np.histogram(v[keep & ok], bins=e)[0]
            counts[k][1][:] += np.histogram(v[keep & ~ok], bins=e)[0]
    return SampleHistograms(n, {k: (edges[k], *counts[k]) if k in edges else None for k in names})
