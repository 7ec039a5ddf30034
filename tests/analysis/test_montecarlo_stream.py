"""Monte Carlo in bounded memory: the streamed run equals the one-batch run, and memory stays flat.

References: scipy.stats.qmc drawing every row at once, numpy.quantile, numpy.histogram, and the
Monte Carlo as it was before streaming (every sample in memory, one batch, one CSV write),
rebuilt inside the test from the same primitives.
"""

from __future__ import annotations

import errno
import gc
import json
import os
import tracemalloc
import warnings
from pathlib import Path

import numpy as np
import pytest
from scipy.stats import qmc

from pretrial.analysis import campaign as sweep
from pretrial.analysis import samples
from pretrial.analysis.campaign import Campaign, montecarlo
from pretrial.analysis.plan import unit_to_value
from pretrial.analysis.samples import exact_quantiles, order_statistics, sample_histograms, unit_blocks
from pretrial.analysis.sweep import controlled
from pretrial.cli.main import main
from pretrial.report import samples_csv as report
from pretrial.report.samples_csv import write_samples_csv
from pretrial.sim import streams
from pretrial.sim.execution import Executor, ProcessExecutor

# every distribution (uniform, loguniform, normal), a noise stream per episode; the LQR cart-pole, short
# episodes; no control period varied, so a block of whole chunks holds the very chunks of one big batch
PLAN = """
[scenario]
env = "pretrial/CartPole-v0"
episodes = 16
horizon = HORIZON
seed = 7
[scenario.start]
x = 0.05
theta = 0.05
[[vary]]
name = "pole_mass"
units = "ratio"
range = [0.5, 3.0]
dispersion = [0.7, 1.5]
distribution = "loguniform"
[[vary]]
name = "actuator_gain"
range = [0.05, 5.0]
dispersion = [0.2, 1.5]
distribution = "normal"
std = 0.3
[[vary]]
name = "sensor_noise_std"
range = [0.0, 0.5]
dispersion = [0.0, 0.05]
[analysis]
run = ["montecarlo"]
montecarlo_samples = SAMPLES
montecarlo_sampler = "SAMPLER"
"""


def campaign(tmp_path: Path, samples: int, sampler: str = "sobol", horizon: float = 3.0,
             executor: Executor | None = None) -> Campaign:
    plan = tmp_path / f"mc-{sampler}-{samples}.toml"
    plan.write_text(PLAN.replace("SAMPLES", str(samples)).replace("SAMPLER", sampler)
                    .replace("HORIZON", str(horizon)), encoding="utf-8")
    ctl = controlled("lqr", str(plan))
    return Campaign(ctl.physics, ctl.controller, ctl.base_params, ctl.plan, executor or Executor(), "lqr")


def one_batch_montecarlo(c: Campaign, seed: int, csv_path: Path) -> dict:
    """The Monte Carlo before streaming: all unit samples at once (scipy), one batch, one CSV write."""
    n = c.plan.budgets["montecarlo_samples"]
    vary = c.plan.vary
    rng = np.random.default_rng(seed)
    sampler = c.plan.budgets["montecarlo_sampler"]
    if sampler == "random":
        u = rng.random((n, len(vary)))
    elif sampler == "sobol":
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # Sobol balance warnings for n not a power of two
            u = qmc.Sobol(len(vary), scramble=True, seed=rng).random(n)
    else:
        u = qmc.LatinHypercube(len(vary), seed=rng).random(n)
    values = {v.name: unit_to_value(v, u[:, i]) for i, v in enumerate(vary)}
    seeds = streams.episode_keys(np.uint64(seed), np.arange(n))
    batch = c.evaluate(values, seeds, np.zeros(n, dtype=np.int64))
    write_samples_csv(csv_path, {**values, "seed": seeds, "success": batch.success, "failure": batch.failure,
                                 "score": batch.score}, {v.name: v.unit for v in vary})
    order = np.lexsort((np.arange(n), batch.score))
    worst = []
    for i in order[:sweep.WORST_LISTED]:
        if batch.success[i]:
            break
        worst.append({"values": {k: float(v[i]) for k, v in values.items()}, "seed": int(seeds[i]),
                      "score": float(batch.score[i]), "failure": str(batch.failure[i])})
    return {"successes": int(batch.success.sum()), "failure_modes": sweep._modes(batch.failure),
            "score_quantiles": {str(q): float(np.quantile(batch.score, q)) for q in (0.01, 0.05, 0.5)},
            "worst": worst, "batch": batch, "values": values}


# --------------------------------------------------------------------------- #
# the pieces against their one-shot references
# --------------------------------------------------------------------------- #
@pytest.mark.parametrize("sampler", ["sobol", "lhs", "random"])
@pytest.mark.parametrize(("n", "d", "block"), [(1000, 3, 256), (1, 2, 5), (64, 1, 64), (257, 6, 16)])
def test_unit_blocks_are_the_design_drawn_at_once(sampler, n, d, block):
    seed = 12345
    rng = np.random.default_rng(seed)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # Sobol balance warnings for n not a power of two
        once = {"sobol": lambda: qmc.Sobol(d, scramble=True, seed=rng).random(n),
                "lhs": lambda: qmc.LatinHypercube(d, seed=rng).random(n),
                "random": lambda: rng.random((n, d))}[sampler]()
    parts = list(unit_blocks(n, d, seed, sampler, block))
    assert [len(p) for p in parts] == [min(block, n - lo) for lo in range(0, n, block)]
    np.testing.assert_array_equal(np.vstack(parts), once)  # bit for bit
    if sampler == "lhs":  # still a Latin hypercube: one point in each of the n strata of every axis
        strata = np.floor(np.vstack(parts) * n).astype(int)
        assert all(sorted(strata[:, j]) == list(range(n)) for j in range(d))


def _split(x: np.ndarray, size: int):
    return lambda: (x[lo:lo + size] for lo in range(0, len(x), size))


@pytest.mark.parametrize("n", [1, 2, 3, 10, 101, 1000, 4099])
def test_exact_quantiles_are_numpys(n):
    rng = np.random.default_rng(n)
    qs = (0.0, 0.01, 0.05, 0.25, 0.37, 0.5, 0.99, 1.0)
    sets = {
        "normal": rng.normal(size=n) * 1e3,
        "ties": rng.integers(-3, 4, size=n).astype(float),  # many equal values, negatives, zeros
        "tiny and huge": rng.choice([-1e300, -5e-324, 0.0, 5e-324, 1e-300, 2.0, 1e308], size=n),
        "with inf": np.where(rng.random(n) < 0.1, np.inf, rng.random(n)),
    }
    for name, x in sets.items():
        got = exact_quantiles(_split(x, 97), n, qs)
        for q in qs:
            with np.errstate(invalid="ignore"):  # inf - inf between neighbours
                want = np.quantile(x, q)
            assert got[q] == want or (np.isnan(want) and np.isnan(got[q])), (name, q, got[q], want)
    ranks = sorted({0, n // 3, n - 1})
    assert order_statistics(_split(sets["normal"], 10), ranks) == {r: np.sort(sets["normal"])[r] for r in ranks}


def test_a_nan_score_makes_every_quantile_nan_as_numpy_does():
    x = np.array([0.3, np.nan, 0.1])
    got = exact_quantiles(_split(x[~np.isnan(x)], 2), 3, (0.05, 0.5), has_nan=True)
    assert all(np.isnan(got[q]) and np.isnan(np.quantile(x, q)) for q in (0.05, 0.5))


def test_histograms_are_numpys():
    rng = np.random.default_rng(3)
    n = 5000
    score = rng.normal(size=n)
    score[::97] = np.nan  # not finite: left out, as the plot has always done
    score[5] = np.inf
    ok = rng.random(n) < 0.7
    const = np.full(n, 2.5)  # one value: numpy's bins are value -/+ 0.5
    blocks = [{"score": score[lo:lo + 333], "c": const[lo:lo + 333], "none": np.full(len(score[lo:lo + 333]), np.nan),
               "success": ok[lo:lo + 333]} for lo in range(0, n, 333)]
    h = sample_histograms(lambda: blocks, ["score", "c", "none"])
    assert h.samples == n and h.columns["none"] is None
    for key, v in (("score", score), ("c", const)):
        keep = np.isfinite(v)
        edges = np.histogram_bin_edges(v[keep], bins=30)
        np.testing.assert_array_equal(h.columns[key][0], edges)
        np.testing.assert_array_equal(h.columns[key][1], np.histogram(v[keep & ok], bins=edges)[0])
        np.testing.assert_array_equal(h.columns[key][2], np.histogram(v[keep & ~ok], bins=edges)[0])


# --------------------------------------------------------------------------- #
# the streamed run against the one-batch run
# --------------------------------------------------------------------------- #
@pytest.mark.slow
@pytest.mark.parametrize("sampler", ["sobol", "lhs", "random"])
def test_streamed_montecarlo_equals_the_one_batch_run(sampler, tmp_path, monkeypatch):
    # small chunks and blocks: 1000 samples cross 4 block boundaries, every block whole chunks
    monkeypatch.setattr(sweep, "CHUNK", 64)
    monkeypatch.setattr(sweep, "MC_BLOCK", 256)
    c = campaign(tmp_path, 1000, sampler)
    ref = one_batch_montecarlo(c, 99, tmp_path / "reference.csv")
    assert 0 < ref["successes"] < 1000 and len(ref["worst"]) == sweep.WORST_LISTED  # something to compare
    summary, hist = montecarlo(c, 99, tmp_path / "streamed.csv", tmp_path)
    assert (tmp_path / "streamed.csv").read_bytes() == (tmp_path / "reference.csv").read_bytes()
    for key in ("successes", "failure_modes", "score_quantiles"):
        assert summary[key] == ref[key], key
    assert list(summary["failure_modes"]) == list(ref["failure_modes"])  # same order too
    assert [{k: w[k] for k in ("values", "seed", "score", "failure")} for w in summary["worst"]] == ref["worst"]
    # the report's histograms count what numpy counts over all the samples
    score, ok = ref["batch"].score, ref["batch"].success
    edges = np.histogram_bin_edges(score, bins=30)
    np.testing.assert_array_equal(hist.columns["score"][1], np.histogram(score[ok], bins=edges)[0])
    assert hist.samples == 1000
    # the scratch file (in tmp_path) left nothing behind
    assert sorted(p.name for p in tmp_path.iterdir()) == [f"mc-{sampler}-1000.toml", "reference.csv", "streamed.csv"]


@pytest.mark.slow
def test_streamed_montecarlo_is_the_same_on_worker_processes(tmp_path, monkeypatch):
    monkeypatch.setattr(sweep, "CHUNK", 64)
    monkeypatch.setattr(sweep, "MC_BLOCK", 192)
    serial, _ = montecarlo(campaign(tmp_path, 700, horizon=1.0), 5, tmp_path / "serial.csv")
    with ProcessExecutor(2) as ex:
        pooled, _ = montecarlo(campaign(tmp_path, 700, horizon=1.0, executor=ex), 5, tmp_path / "pooled.csv")
    assert json.dumps(serial) == json.dumps(pooled)
    assert (tmp_path / "serial.csv").read_bytes() == (tmp_path / "pooled.csv").read_bytes()


# --------------------------------------------------------------------------- #
# memory
# --------------------------------------------------------------------------- #
def _traced_peak(tmp_path: Path, samples: int) -> int:
    c = campaign(tmp_path, samples, horizon=0.1)
    montecarlo(campaign(tmp_path, 10, horizon=0.1), 1, tmp_path / "warm-up.csv", tmp_path)  # imports, caches
    gc.collect()
    tracemalloc.start()
    try:
        montecarlo(c, 1, tmp_path / f"mc-{samples}.csv", tmp_path)
        return tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()


@pytest.mark.slow
def test_memory_does_not_grow_with_the_sample_count(tmp_path, monkeypatch):
    # blocks of one chunk (5 blocks vs 49), and the scratch file read back a chunk's worth at a time (its
    # reads are 2^17 rows, a constant once the samples are more)
    monkeypatch.setattr(sweep, "MC_BLOCK", sweep.CHUNK)
    monkeypatch.setattr(samples, "_READ_ROWS", sweep.CHUNK)
    small, large = _traced_peak(tmp_path, 20_000), _traced_peak(tmp_path, 200_000)
    # holding the samples in memory cost about 280 bytes each: the Monte Carlo before streaming peaked
    # at 9.0 MB for 20,000 and 58.7 MB for 200,000 (measured so); streamed, both peak near 9 MB
    assert large - small < 2 * 2**20, (small, large)
    assert len((tmp_path / "mc-200000.csv").read_text().splitlines()) == 200_001


# --------------------------------------------------------------------------- #
# a full disk while the samples stream
# --------------------------------------------------------------------------- #
class _FullDisk:
    """A text file that takes the header, then fails as a full disk does."""

    def __init__(self, f):
        self._f, self._writes = f, 0

    def write(self, text: str) -> int:
        self._writes += 1
        if self._writes > 1:
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        return self._f.write(text)

    def __getattr__(self, name):
        return getattr(self._f, name)


def test_a_full_disk_while_streaming_is_one_line_and_leaves_nothing(tmp_path, monkeypatch, capsys):
    plan = tmp_path / "plan.toml"
    plan.write_text(PLAN.replace("SAMPLES", "300").replace("SAMPLER", "sobol").replace("HORIZON", "0.5"),
                    encoding="utf-8")
    where = tmp_path / "sweeps"
    where.mkdir()
    monkeypatch.setattr(report, "open", lambda *a, **k: _FullDisk(open(*a, **k)), raising=False)
    assert main(["sweep", "lqr", "--plan", str(plan), "--out", str(where / "D"), "--workers", "1"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "montecarlo.csv: write failed (No space left on device)" in err, err
    assert "Traceback" not in err
    assert list(where.iterdir()) == []  # no D, and no hidden .D.partial-* beside it
