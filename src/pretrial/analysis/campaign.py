"""Perturbation sweeps: margins, Monte Carlo, worst case, sensitivity, success map, linear, integrator check.

Every analysis reduces to one primitive, :meth:`Campaign.evaluate`: run a
batch of episodes, row ``i`` with its own named values, seed and episode
number. Rows are grouped by control period (a different plant), cut into fixed
chunks (so serial, process and Dask execution give bit-identical results) and
mapped over the executor. Because a row depends on its own values, seed and
episode only (:func:`pretrial.sim.rollout.keyed_scenarios`), every point of every
analysis replays alone with ``pretrial replay ... --set ... --seed S``.

Common random numbers: all points of one analysis share the seed, so two
points differ by their values, not by luck.
"""

from __future__ import annotations

import math
import warnings
from collections import Counter
from collections.abc import Callable, Mapping, Sequence
from contextlib import ExitStack
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from pretrial.analysis.plan import MARGIN_BRACKET, Plan, Vary, unit_to_value
from pretrial.analysis.samples import ColumnStore, SampleHistograms, exact_quantiles, sample_histograms, unit_blocks
from pretrial.analysis.stats import derive_seed, wilson_interval
from pretrial.analysis.trust import EnvelopeTally, envelope_requirement, envelope_summary
from pretrial.playback.command import replay_command
from pretrial.sim import streams
from pretrial.sim.execution import Executor
from pretrial.sim.hybrid import residual_record
from pretrial.sim.perturb import CONTROL_PERIOD, describe_values, nominal_value, with_control_period
from pretrial.sim.rollout import keyed_scenarios, run_episodes
from pretrial_envs.core import Physics

#: rows per work item: fixed, so results never depend on the number of workers
CHUNK = 4096
#: diverged episodes whose values a sweep keeps (for the warning's ranges and its replay line)
_DIVERGED_KEPT = 1000
#: worst Monte Carlo samples listed with their replay commands
WORST_LISTED = 10
#: integrator check: changes above these flag a policy that exploits the solver (our thresholds)
INTEGRATOR_RATE_TOLERANCE = 0.02
INTEGRATOR_SCORE_TOLERANCE = 0.02


@dataclass
class Batch:
    """Results of :meth:`Campaign.evaluate`, one entry per row."""

    success: np.ndarray
    failure: np.ndarray  # failure words ("" for success)
    score: np.ndarray
    steps: np.ndarray
    #: share of each episode's steps outside a hybrid plant's residual envelope (None: no residual)
    outside: np.ndarray | None = None


def _run_chunk(item: tuple) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray | None]:
    """Work item: one chunk of rows of one plant (module level, so it pickles)."""
    physics, policy, params, settings, seeds, episodes, max_steps, quality, stream_version = item
    sc = keyed_scenarios(physics, seeds, episodes, params, settings)
    out = run_episodes(physics, policy, sc, max_steps=max_steps, score=True, quality=quality,
                       stream_version=stream_version)
    words = np.array(out.failure_words, dtype=object)[out.failure[0]]
    env = None
    if out.envelope is not None:  # rows: share, outside steps, first variable out
        env = np.stack([out.envelope["share"][0], out.envelope["outside_steps"][0], out.envelope["first_var"][0]])
    return out.success[0], words.astype(str), out.score[0], out.steps[0], env


@dataclass
class Campaign:
    """One controller, one plant, one plan: what every analysis evaluates.

    Parameters
    ----------
    physics : Physics
        The plant as the plan configures it (options, start ranges).
    policy : batch policy
        The controller (a :class:`~pretrial.controller.policy.Policy` or an LQR baseline).
    base_params : dict
        Physics overrides in force at every point (the policy's, then the plan's).
    plan : Plan
    executor : Executor
    policy_arg : str
        How the replay command names the controller (a path, or ``lqr``).
    progress : callable, optional
        Called with the number of episodes just finished.
    stream_version : int
        Version of the sensor-noise and gust draws (:data:`pretrial.sim.streams.STREAM_VERSIONS`);
        replay commands name it when it is not 1, the version of commands that do not.
    """

    physics: Physics
    policy: Any
    base_params: dict[str, float]
    plan: Plan
    executor: Executor
    policy_arg: str
    progress: Callable[[int], None] | None = None
    stream_version: int = 1
    _plants: dict[float, Physics] = field(default_factory=dict, repr=False)
    #: diverged episodes so far: count, and the values (varied names) and keys of each
    _diverged: list[tuple[dict[str, float], int, int]] = field(default_factory=list, repr=False)
    diverged_episodes: int = 0
    #: the analysis running now: the trust-region tally is kept per analysis
    stage: str = "evaluate"
    _trust: EnvelopeTally | None = field(default=None, repr=False)

    def nominal(self, name: str) -> float:
        """Nominal value of a varied name here (policy/plan overrides included)."""
        if name == CONTROL_PERIOD:
            return self.physics.dt
        return nominal_value(self.physics, self.base_params, name)

    def plant(self, period: float) -> Physics:
        if period == self.physics.dt:
            return self.physics
        if period not in self._plants:
            self._plants[period] = with_control_period(self.physics, period)
        return self._plants[period]

    def max_steps(self, physics: Physics) -> int:
        if self.plan.horizon is None:
            return physics.max_steps
        return max(1, round(self.plan.horizon / physics.dt))

    def evaluate(self, values: Mapping[str, np.ndarray], seeds: np.ndarray | int, episodes: np.ndarray) -> Batch:
        """Run rows: row ``i`` has ``values[name][i]`` set, seed ``seeds[i]``, episode ``episodes[i]``.

        Names missing from ``values`` stay nominal.
        """
        episodes = np.asarray(episodes, dtype=np.int64)
        n = len(episodes)
        seeds = np.broadcast_to(np.asarray(seeds, dtype=np.uint64), (n,))
        vals = {k: np.broadcast_to(np.asarray(v, dtype=float), (n,)) for k, v in values.items()}
        period = vals.pop(CONTROL_PERIOD, np.full(n, self.physics.dt))
        success = np.zeros(n, dtype=bool)
        failure = np.empty(n, dtype=object)
        score = np.zeros(n)
        steps = np.zeros(n, dtype=np.int64)
        env = np.zeros((3, n)) if getattr(self.physics, "residual", None) is not None else None
        chunks = []
        for dt in np.unique(period):
            rows = np.flatnonzero(period == dt)
            physics = self.plant(float(dt))
            base = physics.param_table.resolve_batch(self.base_params, 1)
            chunks += [(physics, base, rows[lo:lo + CHUNK]) for lo in range(0, len(rows), CHUNK)]
        # map in groups so progress can be shown between them; a group's work items are built when it
        # runs (all the parameter rows of a big batch at once would cost more than its results)
        group = max(1, getattr(self.executor, "workers", 1))
        for g in range(0, len(chunks), group):
            part = chunks[g:g + group]
            items = [(physics, self.policy, np.repeat(base, len(r), axis=0), {k: v[r] for k, v in vals.items()},
                      seeds[r], episodes[r], self.max_steps(physics), self.plan.quality, self.stream_version)
                     for physics, base, r in part]
            for (_, _, r), (s, f, sc, st, e) in zip(part, self.executor.map(_run_chunk, items), strict=True):
                success[r], failure[r], score[r], steps[r] = s, f, sc, st
                if env is not None:
                    env[:, r] = e
                if self.progress is not None:
                    self.progress(len(r))
        failure = failure.astype(str)
        blew_up = np.flatnonzero(failure == "diverged")
        self.diverged_episodes += len(blew_up)
        for i in blew_up[: max(0, _DIVERGED_KEPT - len(self._diverged))]:
            row = {k: float(v[i]) for k, v in vals.items()}
            if np.any(period != self.physics.dt):
                row[CONTROL_PERIOD] = float(period[i])
            self._diverged.append((row, int(seeds[i]), int(episodes[i])))
        if env is None:
            return Batch(success, failure, score, steps)
        if self._trust is None:
            self._trust = EnvelopeTally(self.physics.residual.envelope.names)
        self._trust.add(self.stage, env[0], env[1].astype(np.int64), steps, env[2].astype(np.int64))
        return Batch(success, failure, score, steps, env[0])

    def envelope(self) -> dict[str, Any] | None:
        """The trust region so far (``results.json``'s ``envelope``); None on a plant without a residual."""
        record = residual_record(self.physics)
        if record is not None and self._trust is None:
            self._trust = EnvelopeTally(self.physics.residual.envelope.names)
        return envelope_summary(self._trust, record)

    def diverged(self) -> dict[str, Any] | None:
        """Diverged episodes (numerical blow-up, counted as failures): how many, where, and a replay of one."""
        if not self.diverged_episodes:
            return None
        names = sorted({k for row, _, _ in self._diverged for k in row})
        values = {k: np.array([row[k] for row, _, _ in self._diverged if k in row]) for k in names}
        first, seed, episode = self._diverged[0]
        return {
            "episodes": int(self.diverged_episodes),
            "where": describe_values(self.physics, values) or "the plan's nominal parameters",
            "ranges": {k: [float(v.min()), float(v.max())] for k, v in values.items()},
            # episode e of a seed is the last of a replay of e + 1 episodes
            "first": {"values": first, "seed": seed, "episode": episode,
                      "replay": self.replay_command(first, seed, episode + 1)},
        }

    # ------------------------------------------------------------- replay commands
    def replay_command(self, values: Mapping[str, float], seed: int, episodes: int = 1) -> str:
        """The replay of ``episodes`` episodes of ``seed`` at ``values`` under this plan."""
        return replay_command(self.policy_arg, plan=self.plan.path,
                              env=self.physics.env_id if self.policy_arg == "lqr" else None,
                              settings={k: float(v) for k, v in values.items()}, seed=seed, episodes=episodes,
                              stream_version=self.stream_version)


def _modes(words: np.ndarray) -> dict[str, int]:
    failed = words[words != ""]
    names, counts = np.unique(failed, return_counts=True)
    return _ordered_modes(dict(zip(names.tolist(), counts.tolist(), strict=True)))


def _ordered_modes(counts: Mapping[str, int]) -> dict[str, int]:
    """Failure words by count, commonest first (ties in name order)."""
    return {str(k): int(n) for k, n in sorted(counts.items(), key=lambda kv: (-kv[1], kv[0]))}


def _commonest(words: np.ndarray) -> str | None:
    return _commonest_modes(_modes(words))


# --------------------------------------------------------------------------- #
# margins
# --------------------------------------------------------------------------- #
@dataclass
class _Point:
    value: float
    successes: int = 0
    episodes: int = 0
    lower: float = 0.0
    upper: float = 0.0
    passed: bool = False
    modes: dict[str, int] = field(default_factory=dict)


@dataclass
class _Search:
    vary: Vary
    side: str  # "low" | "high"
    start: float
    end: float
    log: bool
    passed: float | None = None
    failed: float | None = None
    done: bool = False

    def at(self, f: float) -> float:
        if self.log:
            return float(self.start * (self.end / self.start) ** f)
        return float(self.start + (self.end - self.start) * f)

    def frac(self, v: float) -> float:
        if self.log:
            return math.log(v / self.start) / math.log(self.end / self.start)
        return (v - self.start) / (self.end - self.start)


def margins(c: Campaign, seed: int) -> list[dict[str, Any]]:
    """One-at-a-time margins: bracket outward from nominal, then bisect to the plan's tolerance.

    A point passes when the Wilson 95% lower bound of its success rate over K
    episodes (common random numbers: the same K episodes at every point) is
    at least the required rate. The edge is the last passing value found; the
    failure reported is the commonest one at the first failing value past it.
    """
    k = c.plan.episodes
    rate = c.plan.required_success_rate
    tol = c.plan.budgets["tolerance"]
    points: dict[str, dict[float, _Point]] = {v.name: {} for v in c.plan.vary}

    def run(requests: list[tuple[str, float]]) -> None:
        todo = [(n, v) for n, v in dict.fromkeys(requests) if v not in points[n]]
        if not todo:
            return
        # one row per (point, episode); names not at this point stay nominal
        reps = np.repeat(np.arange(len(todo)), k)
        values: dict[str, np.ndarray] = {}
        for name in {n for n, _ in todo}:
            col = np.array([v if n == name else c.nominal(name) for n, v in todo])
            values[name] = col[reps]
        batch = c.evaluate(values, seed, np.tile(np.arange(k), len(todo)))
        for i, (n, v) in enumerate(todo):
            sl = slice(i * k, (i + 1) * k)
            s = int(batch.success[sl].sum())
            lo, hi = wilson_interval(s, k)
            points[n][v] = _Point(v, s, k, float(lo), float(hi), bool(lo >= rate), _modes(batch.failure[sl]))

    searches: list[_Search] = []
    starts = {}
    for v in c.plan.vary:
        nominal = c.nominal(v.name)
        start = min(max(nominal, v.low), v.high)
        starts[v.name] = start
        for side, end in (("low", v.low), ("high", v.high)):
            if end == start:
                continue
            log = start > 0 and end > 0 and (max(start, end) / min(start, end)) > 4
            searches.append(_Search(v, side, start, end, log))
    run([(v.name, starts[v.name]) for v in c.plan.vary])
    for s in searches:
        if not points[s.vary.name][s.start].passed:
            s.passed, s.failed, s.done = None, s.start, True  # fails at nominal: no margin
    # bracket: every search's outward points in one batch
    run([(s.vary.name, s.at(f)) for s in searches if not s.done for f in MARGIN_BRACKET])
    for s in searches:
        if s.done:
            continue
        s.passed = s.start
        for f in MARGIN_BRACKET:
            p = points[s.vary.name][s.at(f)]
            if not p.passed:
                s.failed = p.value
                break
            s.passed = p.value
        if s.failed is None:
            s.done = True  # passed to the range end
    # bisect all open brackets together, round by round
    while True:
        # the tolerance is a fraction of the way to the range end, on the search's own scale (logarithmic
        # where the range spans more than 4x), so a wide log range still ends with a fine relative step
        open_ = [s for s in searches if not s.done and abs(s.frac(s.failed) - s.frac(s.passed)) > tol]
        if not open_:
            break
        mids = []
        for s in open_:
            f = 0.5 * (s.frac(s.passed) + s.frac(s.failed))
            mids.append(s.at(f))
        run([(s.vary.name, m) for s, m in zip(open_, mids, strict=True)])
        for s, m in zip(open_, mids, strict=True):
            if m in (s.passed, s.failed):  # no representable midpoint left
                s.done = True
            elif points[s.vary.name][m].passed:
                s.passed = m
            else:
                s.failed = m

    out = []
    for v in c.plan.vary:
        entry: dict[str, Any] = {
            "name": v.name, "unit": v.unit, "nominal": c.nominal(v.name), "range": [v.low, v.high],
            "episodes": k, "seed": seed,
        }
        for side in ("low", "high"):
            s = next((s for s in searches if s.vary is v and s.side == side), None)
            if s is None:  # the nominal sits on this end of the range
                edge, failed = starts[v.name], None
            else:
                edge, failed = s.passed, s.failed
            if edge is None:
                edge = starts[v.name]  # fails at nominal: the margin is nil
            entry[side] = edge
            nominal = c.nominal(v.name)
            entry[f"{side}_ratio"] = edge / nominal if nominal != 0 and math.isfinite(nominal) else None
            entry[f"{side}_failure"] = _commonest_modes(points[v.name][failed].modes) if failed is not None else None
            entry[f"{side}_limit_reached"] = failed is None
            entry[f"replay_{side}"] = (c.replay_command({v.name: failed}, seed, k) if failed is not None else None)
        entry["fails_at_nominal"] = not points[v.name][starts[v.name]].passed
        entry["points"] = [
            {"value": p.value, "episodes": p.episodes, "successes": p.successes,
             "success_rate": p.successes / p.episodes, "lower_bound": p.lower, "upper_bound": p.upper,
             "pass": p.passed, "failure_modes": p.modes, "seed": seed}
            for p in sorted(points[v.name].values(), key=lambda p: p.value)
        ]
        out.append(entry)
    return out


def _commonest_modes(modes: dict[str, int]) -> str | None:
    return next(iter(modes), None)


# --------------------------------------------------------------------------- #
# Monte Carlo
# --------------------------------------------------------------------------- #
#: Monte Carlo samples drawn, run and written per block, so memory stays flat in their number. A whole
#: number of chunks and a constant (not the number of workers): the chunks, hence the results, are the
#: same on every executor, and with no control period varied they are the chunks of one batch of all rows
MC_BLOCK = 32 * CHUNK
#: score quantiles in the Monte Carlo summary
SCORE_QUANTILES = (0.01, 0.05, 0.5)


@dataclass
class _Lowest:
    """The K lowest-scoring samples so far, in ``numpy.lexsort((index, score))`` order (NaN scores last)."""

    k: int
    rows: list[tuple[tuple[bool, float, int], dict[str, Any]]] = field(default_factory=list)

    def add(self, index: np.ndarray, score: np.ndarray, block: Mapping[str, np.ndarray]) -> None:
        """Offer a block's samples (global sample numbers ``index``, columns ``block``)."""
        for i in np.lexsort((index, score))[: self.k]:
            nan = bool(np.isnan(score[i]))
            key = (nan, 0.0 if nan else float(score[i]), int(index[i]))
            self.rows.append((key, {name: col[i] for name, col in block.items()}))
        self.rows = sorted(self.rows, key=lambda r: r[0])[: self.k]


def montecarlo(c: Campaign, seed: int, csv_path: Path | None = None, scratch: Path | None = None
               ) -> tuple[dict[str, Any], SampleHistograms]:
    """Joint samples of every varied name, one episode each with its own seed.

    The samples are drawn, run and written :data:`MC_BLOCK` at a time, so memory does not grow
    with their number: each block's rows go to ``csv_path`` as it finishes, and only aggregates
    stay (counts of successes and of each failure mode, the :data:`WORST_LISTED` lowest scores,
    and a scratch copy of the numeric columns in an anonymous file in ``scratch``). The score
    quantiles are exact, found by a second pass over that copy
    (:func:`pretrial.analysis.samples.exact_quantiles`): the very numbers ``numpy.quantile`` gave when
    every sample was in memory, so results.json did not change with streaming; a fixed-bin
    histogram would have approximated them. The report's histograms come from the same copy.

    Blocks are whole chunks, so without ``control_period_s`` varied every chunk is the one a single
    batch of all samples made: the same bytes as before streaming. With the period varied, rows are
    chunked by period within a block; past :data:`MC_BLOCK` samples some chunks then differ from the
    one-batch run's, and a score may differ from it in the last digit (the batched arithmetic
    rounds a row by its place in the chunk). Either way the results depend on the plan and seed
    only, never on the executor or its number of workers.

    Parameters
    ----------
    c : Campaign
    seed : int
        The analysis seed (unit samples and per-sample episode seeds derive from it).
    csv_path : Path, optional
        ``montecarlo.csv`` to write (streamed; the caller makes it atomic, e.g. in a directory
        renamed at the end); None writes no CSV.
    scratch : Path, optional
        Directory of the scratch file (default: the system's temporary directory).

    Returns
    -------
    summary : dict
        Schema ``montecarlo`` of results.json.
    histograms : SampleHistograms
        Score and varied values per outcome, for the report's plot.
    """
    from pretrial.report.samples_csv import SamplesCSV

    n = c.plan.budgets["montecarlo_samples"]
    vary = c.plan.vary
    cal = c.plan.calibration
    cal_names = list(cal.names) if cal is not None else []
    boot = cal.rows() if cal is not None else None
    cal_seed = derive_seed(seed, _CALIBRATION_DRAWS)
    units = {v.name: v.unit for v in vary} | (dict(zip(cal.names, cal.units, strict=True)) if cal else {})
    names = [v.name for v in vary] + cal_names
    successes, modes, lowest, has_nan = 0, Counter[str](), _Lowest(WORST_LISTED), False
    with ExitStack() as stack:
        store = stack.enter_context(ColumnStore([*names, "score", "success"], n, scratch))
        csv = stack.enter_context(SamplesCSV(csv_path, names, units)) if csv_path else None
        start = 0
        for u in unit_blocks(n, len(vary), seed, c.plan.budgets["montecarlo_sampler"], MC_BLOCK):
            index = np.arange(start, start + len(u))
            start += len(u)
            values = {v.name: unit_to_value(v, u[:, i]) for i, v in enumerate(vary)}
            if CONTROL_PERIOD in values:  # each distinct period is its own plant: keep them few
                values[CONTROL_PERIOD] = np.round(values[CONTROL_PERIOD], 4)
            if boot is not None:  # one bootstrap row per sample: the calibrated names move together
                row = streams.episode_keys(np.uint64(cal_seed), index) % np.uint64(len(boot))
                values.update({name: boot[row.astype(np.int64), j] for j, name in enumerate(cal_names)})
            seeds = streams.episode_keys(np.uint64(seed), index)
            batch = c.evaluate(values, seeds, np.zeros(len(u), dtype=np.int64))
            block = {**values, "seed": seeds, "success": batch.success, "failure": batch.failure, "score": batch.score}
            if csv is not None:
                csv.write(block)
            store.append(block)
            successes += int(batch.success.sum())
            modes.update(_modes(batch.failure))
            has_nan = has_nan or bool(np.isnan(batch.score).any())
            lowest.add(index, batch.score, block)
        quant = exact_quantiles(lambda: (b["score"] for b in store.blocks(["score"])), n, SCORE_QUANTILES, has_nan)
        hist = sample_histograms(store.blocks, ["score", *names])
    lo, hi = wilson_interval(successes, n)
    worst = []
    for _, row in lowest.rows:
        if row["success"]:
            break
        vals = {k: float(row[k]) for k in names}
        worst.append({"values": vals, "seed": int(row["seed"]), "score": float(row["score"]), "success": False,
                      "failure": str(row["failure"]), "replay": c.replay_command(vals, int(row["seed"]), 1)})
    summary = {
        "samples": n, "successes": successes, "success_rate": successes / n, "ci95": [float(lo), float(hi)],
        "failure_modes": _ordered_modes(modes), "sampler": c.plan.budgets["montecarlo_sampler"],
        "varied": [{"name": v.name, "unit": v.unit, "distribution": v.distribution, "low": v.box_low,
                    "high": v.box_high, "mean": v.mean, "std": v.std} for v in vary]
                  + [{"name": name, "unit": units[name], "distribution": "calibration bootstrap",
                      "low": float(boot[:, j].min()), "high": float(boot[:, j].max()), "mean": None, "std": None}
                     for j, name in enumerate(cal_names)],
        "score_quantiles": {str(q): float(quant[q]) for q in SCORE_QUANTILES}, "worst": worst,
        "samples_file": "montecarlo.csv" if csv_path is not None else None, "seed": seed,
    }
    return summary, hist


# --------------------------------------------------------------------------- #
# worst case, sensitivity, success map
# --------------------------------------------------------------------------- #
def _scored(c: Campaign, names: Sequence[str], points: np.ndarray, seed: int, k: int) -> tuple[np.ndarray, Batch]:
    """Mean score over K common episodes at each of M points (M, D); also the raw batch."""
    m = len(points)
    reps = np.repeat(np.arange(m), k)
    values = {name: points[reps, j] for j, name in enumerate(names)}
    if CONTROL_PERIOD in values:
        values[CONTROL_PERIOD] = np.round(values[CONTROL_PERIOD], 4)
    batch = c.evaluate(values, seed, np.tile(np.arange(k), m))
    return batch.score.reshape(m, k).mean(axis=1), batch


def worstcase(c: Campaign, seed: int) -> dict[str, Any]:
    """The lowest mean episode score in the box of varied values (differential evolution)."""
    from scipy.optimize import differential_evolution

    vary = c.plan.vary
    names = [v.name for v in vary]
    k = c.plan.budgets["worstcase_episodes"]
    logs = np.array([v.distribution == "loguniform" for v in vary])
    lo = np.array([math.log(v.box_low) if lg else v.box_low for v, lg in zip(vary, logs, strict=True)])
    hi = np.array([math.log(v.box_high) if lg else v.box_high for v, lg in zip(vary, logs, strict=True)])
    evaluations = 0

    def to_units(z: np.ndarray) -> np.ndarray:
        return np.where(logs, np.exp(z), z)

    def objective(z: np.ndarray) -> np.ndarray:
        nonlocal evaluations
        pts = to_units(np.atleast_2d(z.T))  # (M, D)
        evaluations += len(pts)
        return _scored(c, names, pts, seed, k)[0]

    res = differential_evolution(
        objective, list(zip(lo, hi, strict=True)), maxiter=c.plan.budgets["worstcase_iterations"],
        popsize=c.plan.budgets["worstcase_population"], rng=np.random.default_rng(seed), polish=False, vectorized=True,
        updating="deferred", tol=0.0,
    )
    best = to_units(res.x)
    if CONTROL_PERIOD in names:
        best[names.index(CONTROL_PERIOD)] = round(float(best[names.index(CONTROL_PERIOD)]), 4)
    score, batch = _scored(c, names, best[None, :], seed, k)
    vals = {n: float(x) for n, x in zip(names, best, strict=True)}
    successes = int(batch.success.sum())
    # the search saw K episodes per point: confirm the point found on the plan's episodes, fresh draws
    kc = c.plan.episodes
    cseed = derive_seed(seed, 1)
    confirm = c.evaluate({n: np.full(kc, x) for n, x in vals.items()}, cseed, np.arange(kc))
    cs = int(confirm.success.sum())
    lo, hi = wilson_interval(cs, kc)
    return {
        "method": "scipy.optimize.differential_evolution", "evaluations": evaluations, "episodes": k,
        "score": float(score[0]), "values": vals, "seed": seed, "success_rate": successes / k,
        "failure": _commonest(batch.failure), "failure_modes": _modes(batch.failure),
        "replay": c.replay_command(vals, seed, k),
        "confirm": {"episodes": kc, "seed": cseed, "successes": cs, "success_rate": cs / kc,
                    "ci95": [float(lo), float(hi)], "failure_modes": _modes(confirm.failure),
                    "replay": c.replay_command(vals, cseed, kc)},
    }


def sensitivity(c: Campaign, seed: int) -> dict[str, Any]:
    """Sobol first-order and total indices of the mean episode score (scipy.stats.sobol_indices).

    Saltelli (2010) estimators over the plan's own distributions (uniform,
    log-uniform or truncated normal over each dispersion), with 95% bootstrap
    confidence half-widths (``S1_conf``, ``ST_conf``).
    """
    from scipy import stats

    vary = c.plan.vary
    names = [v.name for v in vary]
    n = c.plan.budgets["sensitivity_samples"]
    k = c.plan.budgets["sensitivity_episodes"]
    evaluated: list[np.ndarray] = []

    def score(x: np.ndarray) -> np.ndarray:  # x: (d, m) points -> (m,) mean scores
        y, _ = _scored(c, names, np.ascontiguousarray(x.T), seed, k)
        evaluated.append(y)
        return y

    rng = np.random.default_rng(seed)
    res = stats.sobol_indices(func=score, n=n, dists=[_Drawn(v) for v in vary], rng=rng)
    # SobolResult.bootstrap resamples with numpy's global random state (it takes no generator): seed it
    # from the analysis seed for the call, and put the caller's state back, so the intervals are
    # a function of the plan alone
    saved = np.random.get_state()  # noqa: NPY002 (the legacy state is what scipy draws from here)
    np.random.seed(seed % 2**32)  # noqa: NPY002
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # degenerate resamples of a flat score
            boot = res.bootstrap(confidence_level=0.95, n_resamples=999)
    finally:
        np.random.set_state(saved)  # noqa: NPY002
    rows = []
    for i, name in enumerate(names):
        s1_lo, s1_hi = boot.first_order.confidence_interval.low[i], boot.first_order.confidence_interval.high[i]
        st_lo, st_hi = boot.total_order.confidence_interval.low[i], boot.total_order.confidence_interval.high[i]
        rows.append({"name": name, "S1": _finite(res.first_order[i]), "S1_conf": _finite((s1_hi - s1_lo) / 2),
                     "ST": _finite(res.total_order[i]), "ST_conf": _finite((st_hi - st_lo) / 2)})
    y = np.concatenate(evaluated)
    return {"method": "Sobol indices (scipy.stats.sobol_indices, Saltelli 2010, the plan's distributions)",
            "score": "mean episode score", "samples": int(len(y)), "episodes": k, "seed": seed, "indices": rows,
            "score_variance": float(np.var(y))}


@dataclass(frozen=True)
class _Drawn:
    """A varied name's distribution as ``scipy.stats.sobol_indices`` asks for one: its inverse CDF only.

    The mapping is :func:`pretrial.analysis.plan.unit_to_value`, the one Monte Carlo and training use.
    """

    vary: Vary

    def ppf(self, u: np.ndarray) -> np.ndarray:
        return unit_to_value(self.vary, u)


def _finite(v: Any) -> float | None:
    v = float(v)
    return v if math.isfinite(v) else None


def success_map(c: Campaign, seed: int) -> dict[str, Any]:
    """Success rate over a grid of two varied names (the others nominal), K common episodes per cell.

    The grid spans each name's margin search range (``range``, not the dispersion box), so the map
    shows where the margins' edges lie; each cell carries its successes and Wilson 95% bounds.
    """
    xname, yname = c.plan.budgets["map"]
    vx = next(v for v in c.plan.vary if v.name == xname)
    vy = next(v for v in c.plan.vary if v.name == yname)
    m = c.plan.budgets["map_points"]
    k = c.plan.budgets.get("map_episodes", c.plan.episodes)

    def grid(v: Vary) -> np.ndarray:
        if v.low > 0 and v.high / v.low > 10:
            return np.geomspace(v.low, v.high, m)
        return np.linspace(v.low, v.high, m)

    xs, ys = grid(vx), grid(vy)
    if CONTROL_PERIOD in (xname, yname):
        xs, ys = (np.round(a, 4) if n == CONTROL_PERIOD else a for a, n in ((xs, xname), (ys, yname)))
    gx, gy = np.meshgrid(xs, ys)  # rows: y, columns: x
    pts = np.column_stack([gx.ravel(), gy.ravel()])
    reps = np.repeat(np.arange(len(pts)), k)
    batch = c.evaluate({xname: pts[reps, 0], yname: pts[reps, 1]}, seed, np.tile(np.arange(k), len(pts)))
    wins = batch.success.reshape(len(pts), k).sum(axis=1).reshape(m, m)
    lower, upper = wilson_interval(wins, k)
    return {"x": xname, "y": yname, "x_unit": vx.unit, "y_unit": vy.unit, "x_values": xs.tolist(),
            "y_values": ys.tolist(), "success_rate": (wins / k).tolist(), "episodes": k, "seed": seed,
            "successes": wins.astype(int).tolist(), "lower_bound": lower.tolist(), "upper_bound": upper.tolist()}


# --------------------------------------------------------------------------- #
# linear, integrator check
# --------------------------------------------------------------------------- #
def linear_analysis(c: Campaign, sampled: bool) -> tuple[list[dict[str, Any]], dict[str, Any]]:
    """Per-channel margins at the closed-loop equilibrium, and the details (with the frequency response)."""
    from pretrial.analysis.linear import equations_reason, loop_report

    params = c.physics.param_table.resolve(c.base_params)
    delay = c.plan.budgets["delay_steps"] if sampled else 0
    rep = loop_report(c.physics, c.policy, params, sampled=sampled, delay_steps=delay)
    details = rep.to_dict()
    details["dt"] = details.pop("control_period_s", c.physics.dt)
    if rep.linearizable and rep.channels:
        top = math.pi / c.physics.dt if sampled else 1e3
        omega = np.geomspace(1e-2, top * (0.999 if sampled else 1.0), 400)
        details["response"] = {"omega": omega.tolist(), "channels": {}}
        for ch in rep.channels:
            h = ch.frequency_response(omega)
            details["response"]["channels"][ch.name] = {"re": np.real(h).tolist(), "im": np.imag(h).tolist()}
    if not getattr(c.policy, "feed_forward", True):
        # a dynamic (recurrent) controller is not analysed here: its linear requirements do not apply,
        # rather than fail by construction (the report says so)
        details["not_applicable"] = "recurrent controller (its network state is not linearized)"
    elif equations_reason(c.physics):  # a plain gymnasium env: no equations to linearize (skipped, said so)
        details["not_applicable"] = "the plant gives no equations of motion (a plain gymnasium env)"
    channels = rep.channel_dicts() if rep.linearizable else []
    if rep.linearizable and rep.stable is False:
        # margins of an unstable loop are meaningless numbers (0 dB / 0 deg): say UNSTABLE instead
        details["unstable"] = True
        channels = [{k: None if isinstance(v, (int, float)) and not isinstance(v, bool) else v for k, v in ch.items()}
                    | {"unstable": True} for ch in channels]
    return channels, details


def integrator_check(c: Campaign, seed: int) -> dict[str, Any]:
    """Nominal episodes again with a quarter of the integration step, and with the other integrator."""
    k = c.plan.episodes
    base = c.physics

    def outcome(physics: Physics) -> dict[str, Any]:
        saved = c.physics, c._plants
        c.physics, c._plants = physics, {}
        try:
            b = c.evaluate({}, seed, np.arange(k))
        finally:
            c.physics, c._plants = saved
        return {"integrator": physics.integrator, "substeps": physics.substeps,
                "integration_step_s": physics.dt / physics.substeps, "success_rate": float(b.success.mean()),
                "mean_score": float(b.score.mean())}

    def rebuilt(**change: Any) -> Physics:
        options = base.options()
        options.update(change)
        return type(base)(**options)

    nominal = outcome(base)
    variants = [outcome(rebuilt(substeps=base.substeps * 4))]
    if "integrator" in base.options():
        other = "euler" if base.integrator == "rk4" else "rk4"
        variants.append(outcome(rebuilt(substeps=base.substeps * 4, integrator=other)))
    # one borderline episode flipping (e.g. a steady offset right at its limit) is not a policy exploiting
    # the solver: the rate must move by more than the tolerance and by more than one episode
    rate_tol = max(INTEGRATOR_RATE_TOLERANCE, 1.5 / k)
    moved = [v for v in variants
             if abs(v["success_rate"] - nominal["success_rate"]) > rate_tol
             or abs(v["mean_score"] - nominal["mean_score"]) > INTEGRATOR_SCORE_TOLERANCE]
    note = ("success rate and score unchanged with a finer step and the other integrator" if not moved else
            "results move with the integration step or method: the policy may exploit the solver "
            "(check its behaviour with a finer step before trusting other numbers)")
    return {"nominal": nominal, "variants": variants, "flagged": bool(moved), "episodes": k, "seed": seed,
            "tolerance": {"success_rate": rate_tol, "mean_score": INTEGRATOR_SCORE_TOLERANCE},
            "note": note}


# --------------------------------------------------------------------------- #
# requirements and verdict
# --------------------------------------------------------------------------- #
def requirements(plan: Plan, res: Mapping[str, Any]) -> list[dict[str, Any]]:
    """Pass/fail per requirement of the plan, from the analyses that ran."""
    out: list[dict[str, Any]] = []
    mc = res.get("montecarlo")
    if mc is not None:
        out.append({"name": "success rate (Monte Carlo, Wilson 95% lower bound)",
                    "required": plan.required_success_rate, "measured": mc["ci95"][0],
                    "interval": list(mc["ci95"]), "point": mc["success_rate"],
                    "pass": mc["ci95"][0] >= plan.required_success_rate})
    elif res.get("integrator_check") is not None:
        ic = res["integrator_check"]
        k = ic["episodes"]
        lo, hi = wilson_interval(round(ic["nominal"]["success_rate"] * k), k)
        out.append({"name": "success rate (nominal episodes, Wilson 95% lower bound)",
                    "required": plan.required_success_rate, "measured": float(lo),
                    "interval": [float(lo), float(hi)], "point": ic["nominal"]["success_rate"],
                    "pass": float(lo) >= plan.required_success_rate})
    margins_by = {m["name"]: m for m in res.get("margins") or []}
    for name, req in plan.required_margins.items():
        m = margins_by.get(name)
        for key, want in req.items():
            label = f"margin {name} {key}"
            if m is None:
                out.append({"name": label, "required": want, "measured": "margins not run", "pass": False})
                continue
            got = m[key]
            ok = got is not None and (got >= want if key.startswith("high") else got <= want)
            out.append({"name": label, "required": want, "measured": got, "pass": bool(ok)})
    wc = res.get("worstcase")
    if wc is not None and plan.worstcase_success_rate is not None:
        conf = wc.get("confirm") or {"success_rate": wc["success_rate"], "ci95": None}
        out.append({"name": "success rate at the worst case found (point estimate)",
                    "required": plan.worstcase_success_rate, "measured": conf["success_rate"],
                    "interval": conf["ci95"], "pass": conf["success_rate"] >= plan.worstcase_success_rate})
    wanted = [(k, w) for k, w in (("gain_margin_db", plan.gain_margin_db), ("phase_margin_deg", plan.phase_margin_deg))
              if w is not None]
    for key, title in (("linear", "continuous loop"), ("linear_sampled", "sampled loop")):
        if res.get(key) is None:
            continue
        details = res["linear_details"]["continuous" if key == "linear" else "sampled"]
        # a loop judged whole: not applicable (neither passes nor fails), unstable, or not linearizable
        whole = (
            (f"not applicable: {details['not_applicable']}", None) if details.get("not_applicable")
            else ("UNSTABLE (an unstable pole in the nominal linearized loop)", False) if details.get("unstable")
            else (f"not linearizable: {details['reason']}", False) if not details["linearizable"]
            else None
        )
        if whole is not None:
            out += [{"name": f"{req_name} ({title})", "required": want, "measured": whole[0], "pass": whole[1]}
                    for req_name, want in wanted]
            continue
        for ch in res[key]:
            for req_name, want in wanted:
                got = ch.get(req_name)
                # None: no limit on that side (an unbounded margin)
                measured = "unlimited" if got is None else got
                ok = got is None or got >= want
                out.append({"name": f"{req_name} {ch['channel']} ({title})", "required": want, "measured": measured,
                            "pass": bool(ok)})
    if "envelope" in res:  # a sweep's campaign measured it (None: the plant has no residual)
        row = envelope_requirement(plan.max_outside_envelope, res["envelope"])
        if row is not None:
            out.append(row)
    if res.get("integrator_check") is not None:
        ic = res["integrator_check"]
        out.append({"name": "integrator check", "required": "no change with a finer step",
                    "measured": "changed" if ic["flagged"] else "unchanged", "pass": not ic["flagged"]})
    return out


def verdict(reqs: Sequence[Mapping[str, Any]]) -> str:
    """"pass" when every applicable requirement passes (and there is at least one).

    A requirement whose ``pass`` is None does not apply (e.g. linear margins of
    a recurrent controller) and neither passes nor fails.
    """
    judged = [r for r in reqs if r["pass"] is not None]
    return "pass" if judged and all(r["pass"] for r in judged) else "fail"


#: key into the Monte Carlo seed for the calibration's bootstrap-row draws
_CALIBRATION_DRAWS = 7

#: analysis -> key into the plan seed, so adding an analysis never changes another's draws
_SEED_KEYS = {"margins": 1, "montecarlo": 2, "worstcase": 3, "sensitivity": 4, "map": 5, "integrator_check": 6}


@dataclass
class _Outputs:
    """Where the analyses put what they find: the results part, and the Monte Carlo histograms and files."""

    res: dict[str, Any]
    say: Callable[[str], None] | None
    samples_csv: Path | None
    scratch: Path | None
    samples: SampleHistograms | None = None


def _linear(c: Campaign, _seed: int, out: _Outputs) -> None:
    out.res["linear"], out.res["linear_details"]["continuous"] = linear_analysis(c, sampled=False)


def _linear_sampled(c: Campaign, _seed: int, out: _Outputs) -> None:
    out.res["linear_sampled"], out.res["linear_details"]["sampled"] = linear_analysis(c, sampled=True)


def _integrator(c: Campaign, seed: int, out: _Outputs) -> None:
    if "substeps" not in c.physics.options():  # a plain gymnasium env integrates itself: no step to refine
        why = f"{c.physics.env_id} integrates its own equations; pretrial cannot refine its step or change its method"
        out.res["skipped"] = {"integrator_check": why}
        if out.say is not None:
            out.say(f"  integrator_check skipped: {why}")
        return
    out.res["integrator_check"] = integrator_check(c, seed)


def _montecarlo(c: Campaign, seed: int, out: _Outputs) -> None:
    out.res["montecarlo"], out.samples = montecarlo(c, seed, out.samples_csv, out.scratch)


#: what runs each analysis a plan may name (:data:`pretrial.analysis.plan.ANALYSES`), in the order they run
RUNNERS: dict[str, Callable[[Campaign, int, _Outputs], None]] = {
    "linear": _linear,
    "linear_sampled": _linear_sampled,
    "integrator_check": _integrator,
    "margins": lambda c, seed, out: out.res.__setitem__("margins", margins(c, seed)),
    "montecarlo": _montecarlo,
    "worstcase": lambda c, seed, out: out.res.__setitem__("worstcase", worstcase(c, seed)),
    "sensitivity": lambda c, seed, out: out.res.__setitem__("sensitivity", sensitivity(c, seed)),
    "map": lambda c, seed, out: out.res.__setitem__("success_map", success_map(c, seed)),
}


def run_analyses(c: Campaign, say: Callable[[str], None] | None = None, samples_csv: Path | None = None,
                 scratch: Path | None = None) -> tuple[dict[str, Any], SampleHistograms | None]:
    """Every analysis the plan names (:data:`RUNNERS`), on one controller; returns (results part, histograms).

    ``say`` receives one line as each analysis starts (progress where no bar can be drawn);
    ``samples_csv`` and ``scratch`` are :func:`montecarlo`'s ``csv_path`` and ``scratch``.
    """
    plan = c.plan
    order = [a for a in RUNNERS if a in set(plan.analyses)]
    res: dict[str, Any] = {k: None for k in ("margins", "montecarlo", "worstcase", "sensitivity", "success_map",
                                             "linear", "linear_sampled", "linear_details", "integrator_check")}
    if "linear" in order or "linear_sampled" in order:
        res["linear_details"] = {"continuous": None, "sampled": None}
    out = _Outputs(res, say, samples_csv, scratch)
    for k, name in enumerate(order):
        c.stage = name  # which analysis the envelope tally counts for
        if say is not None and not (name == "integrator_check" and "substeps" not in c.physics.options()):
            say(f"  [{k + 1}/{len(order)}] {name}")
        RUNNERS[name](c, derive_seed(plan.seed, _SEED_KEYS.get(name, 0)), out)  # the linear ones draw nothing
    samples = out.samples
    res["diverged"] = c.diverged()
    res["envelope"] = c.envelope()
    res["requirements"] = requirements(plan, res)
    res["verdict"] = verdict(res["requirements"])
    return res, samples


