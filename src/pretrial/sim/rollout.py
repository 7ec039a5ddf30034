"""Batched episodes: policies x scenarios -> outcomes, at numpy speed.

One call runs every (policy, scenario) pair as a row of one batch and steps
them together through the perturbed loop (:class:`~pretrial.sim.perturb.Loop`) and
the plant's physics core (:meth:`~pretrial_envs.core.Physics.transition`).
Rows are ordered policy-major: row ``g * S + s`` is policy ``g`` in scenario
``s``. Every policy sees the same scenarios, draw for draw (common random
numbers), because all randomness is keyed by the scenario, not by the row.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Protocol

import numpy as np

from pretrial.sim import streams
from pretrial.sim.envelope import envelope_tracker
from pretrial.sim.perturb import Loop, spec_of
from pretrial.sim.quality import QualityLimits, QualityTracker, merge_words
from pretrial_envs.core import Physics

#: Fewest rows worth dropping from the policies' grid (whole policies whose rows have all ended).
#: Dropping rebuilds the policies' networks (about 0.3 ms for 40 cart-pole genomes on one core),
#: which a row saves back at 25-50 ns per step: fewer rows than this would take longer to pay for
#: it than most episodes last.
COMPACT_ROWS = 64

#: Fewest ended rows worth dropping from the plant's batch (also at least a quarter of it). Dropping
#: costs about 10 us (a dozen indexing calls); an ended row kept costs 50-250 ns per step of plant,
#: plus the masks that keep its values.
DROP_ROWS = 16


class BatchPolicy(Protocol):
    """What the rollout engine drives: G policies acting on G x S rows."""

    n_policies: int

    def reset(self, batch_size: int) -> None:
        """Clear recurrent state for ``batch_size`` scenarios per policy."""

    def act(self, obs: np.ndarray) -> np.ndarray:
        """Env actions (G*S, A) in [-1, 1] for observations (G*S, O), policy-major rows."""


@dataclass
class Scenarios:
    """S scenarios: physics parameters, generic perturbations, start states, stream keys."""

    params: np.ndarray  # (S, P)
    start: np.ndarray  # (S, state_dim)
    keys: np.ndarray  # (S,) uint64
    perturb: dict[str, np.ndarray] = field(default_factory=dict)  # name -> (S,)

    def __len__(self) -> int:
        return len(self.keys)

    def subset(self, idx: np.ndarray | slice) -> Scenarios:
        perturb = {k: v[idx] for k, v in self.perturb.items()}
        return Scenarios(self.params[idx], self.start[idx], self.keys[idx], perturb)


def draw_scenarios(
    physics: Physics,
    n: int,
    seed: int | np.random.SeedSequence,
    base_params: Mapping[str, float] | None = None,
    ranges: Mapping[str, tuple[float, float]] | None = None,
    fixed: Mapping[str, float | np.ndarray] | None = None,
) -> Scenarios:
    """Draw ``n`` scenarios: uniform values in ``ranges``, start states and stream keys.

    ``base_params`` are the run's physics overrides; ``ranges`` maps physics or
    perturbation names to (low, high); ``fixed`` sets names to given values
    (scalars or (n,) arrays). Everything is a pure function of ``seed``; with
    no ``ranges``, scenario ``e`` is episode ``e`` of the seed (see
    :func:`keyed_scenarios`), whatever ``n`` is.
    """
    if isinstance(seed, np.random.SeedSequence):
        seed = int(seed.generate_state(1, dtype=np.uint64)[0])
    seed = int(seed)
    settings: dict[str, np.ndarray] = {}
    if ranges:
        rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(0,)))
        # draw in sorted name order so adding a name never reshuffles the others' draws
        for name in sorted(ranges):
            lo, hi = ranges[name]
            settings[name] = rng.uniform(lo, hi, n) if hi > lo else np.full(n, float(lo))
    for name, value in (fixed or {}).items():
        settings[name] = np.broadcast_to(np.asarray(value, float), (n,)).copy()
    params = physics.param_table.resolve_batch(base_params, n)
    return keyed_scenarios(physics, np.full(n, seed, dtype=np.uint64), np.arange(n), params, settings)


def keyed_scenarios(
    physics: Physics,
    seeds: np.ndarray,
    episodes: np.ndarray,
    params: np.ndarray,
    settings: Mapping[str, np.ndarray] | None = None,
) -> Scenarios:
    """Scenarios whose start state and random streams are episode ``episodes[i]`` of seed ``seeds[i]``.

    Row ``i`` depends on ``(seeds[i], episodes[i])`` and its own parameter
    and perturbation values only, so a sweep sample replays alone with
    ``pretrial replay --seed SEED --set ...`` to the same outcome.

    Parameters
    ----------
    seeds : (n,) uint64 array
    episodes : (n,) int array
    params : (n, P) array
        Physics parameter rows (settings for physics names are written into a copy).
    settings : mapping of str to (n,) array, optional
        Physics parameter or generic perturbation values per row (channel forms such as
        ``sensor_noise_std.theta`` included).
    """
    params = np.array(params, dtype=float)
    table = physics.param_table
    perturb: dict[str, np.ndarray] = {}
    for name, v in (settings or {}).items():
        if name in table:
            params[:, table.index(name)] = v
        else:
            spec_of(physics, name)  # a perturbation or one channel of it; anything else fails loudly
            perturb[name] = np.asarray(v, dtype=float)
    keys = streams.episode_keys(seeds, episodes)
    scale = perturb.get("start_scale", 1.0)
    start = physics.sample_start(streams.RowDraws(keys), params, scale)
    return Scenarios(params, start, keys, perturb)


@dataclass
class Outcome:
    """Per-row results of a batch of episodes (arrays of shape (G, S))."""

    returns: np.ndarray
    success: np.ndarray
    failure: np.ndarray  # int codes into physics.failure_words
    steps: np.ndarray
    failure_words: tuple[str, ...]
    trace: dict[str, np.ndarray] | None = None  # (T+1, rows, ...) when recorded
    score: np.ndarray | None = None  # (G, S) when asked for; see episode_score
    #: loop-quality measures (name -> (G, S) array) when judged; see :mod:`pretrial.sim.quality`
    quality: dict[str, np.ndarray] | None = None
    #: a hybrid plant's trust region per episode (share of steps outside it, ...); see :mod:`pretrial.sim.envelope`
    envelope: dict[str, np.ndarray] | None = None

    def failure_counts(self) -> dict[str, int]:
        """Failure word -> number of episodes that ended with it."""
        codes, counts = np.unique(self.failure[~self.success], return_counts=True)
        return {self.failure_words[c]: int(k) for c, k in zip(codes, counts)}


def run_episodes(
    physics: Physics,
    policy: BatchPolicy,
    scenarios: Scenarios,
    max_steps: int | None = None,
    record: bool = False,
    score: bool = False,
    quality: QualityLimits | None = None,
    stream_version: int = 1,
) -> Outcome:
    """Run every policy of ``policy`` on every scenario until all rows end.

    Parameters
    ----------
    physics : Physics
        The plant configuration (control period, integrator, time limit).
    policy : BatchPolicy
        G policies; ``policy.n_policies`` sets G.
    scenarios : Scenarios
        S scenarios shared by all policies.
    max_steps : int, optional
        Episode length in control periods (defaults to the env's time limit).
    record : bool
        Keep per-step states, observations and actions (for replay; small batches only).
    score : bool
        Also compute each episode's continuous score (:func:`episode_score`).
    quality : QualityLimits, optional
        Judge how the loop behaved (:mod:`pretrial.sim.quality`): an episode that
        survived but chattered, saturated, kept growing, did not settle or kept
        an offset is a failure with that word (codes after the env's own words),
        and its score is 0 (on the line between passing and failing).
    stream_version : int
        Version of the sensor-noise and gust draws (:data:`pretrial.sim.streams.STREAM_VERSIONS`);
        1, the draws of results recorded without a version, unless the caller names another.
    """
    g, s = policy.n_policies, len(scenarios)
    rows = g * s
    params = np.asfortranarray(np.tile(scenarios.params, (g, 1)))  # contiguous parameter columns
    params.setflags(write=False)  # fixed for the run: plants may keep constants derived from it
    keys = np.tile(scenarios.keys, g)
    loop = Loop(physics, {k: np.tile(v, g) for k, v in scenarios.perturb.items()}, keys, stream_version)
    state = np.tile(scenarios.start, (g, 1))
    limit = physics.max_steps if max_steps is None else int(max_steps)
    # a plant that declares no limits (e.g. a plain gymnasium env) has no slack and may not map actions to forces
    has_limits = type(physics).constraint_slack is not Physics.constraint_slack
    tracker = None
    if quality is not None:
        tracker = QualityTracker(physics, quality, params, limit, np.tile(random_rows(physics, scenarios), g))
    trust = envelope_tracker(physics, rows)  # None without a learned residual: no check at all
    hold = np.zeros(rows)
    steps = np.zeros(rows, dtype=np.int64)
    # results by original row; `where` maps the rows still stepped to them
    returns = np.zeros(rows)
    success = np.zeros(rows, dtype=bool)
    failure = np.zeros(rows, dtype=np.int64)
    length = np.zeros(rows, dtype=np.int64)
    where = np.arange(rows)
    ret = np.zeros(rows)
    active = np.ones(rows, dtype=bool)
    movable = getattr(physics, "rows_movable", True)
    # score terms by original row, and the running ones of the rows still stepped
    slack_all = np.full(rows, np.inf)
    best_hold_all = np.zeros(rows)
    slack = np.full(rows, np.inf) if score else None
    best_hold = np.zeros(rows)
    policy.reset(s)
    obs = physics.observe(state, params)
    loop.reset(obs)
    trace: dict[str, list[np.ndarray]] | None = {"state": [state.copy()], "obs": [], "action": []} if record else None
    # Rows that have ended keep their values. While no row has ended the masks that keep them are
    # skipped; while few have, those rows are put back by index (`finished`) instead of a full np.where.
    finished: np.ndarray | None = None  # None: every row runs
    few = False
    # once rows have been dropped: each row's place in the policies' grid, and the grid's inputs
    pos: np.ndarray | None = None
    grid_obs = np.zeros((0, 0))
    selectable = hasattr(policy, "select")

    def keep_finished(new: np.ndarray, old: np.ndarray) -> np.ndarray:
        """``new`` (this step's own array) for running rows, ``old`` for finished ones."""
        if finished is None:
            return new
        if few:
            new[finished] = old[finished]
            return new
        return np.where(active if new.ndim == 1 else active[:, None], new, old)

    for k in range(limit):
        measured = loop.sense(obs, k)
        if pos is None:
            command = policy.act(measured)
        else:  # the policies' grid still holds rows that have ended: they act on stale inputs, unread
            grid_obs[pos] = measured
            command = policy.act(grid_obs)[pos]
        action = loop.actuate(command, k, getattr(policy, "clips_actions", False))
        if trust is not None:
            trust.update(k, where, state, loop.physical(action, params), loop.residual_scale,
                         None if finished is None else active)
        # the loop's command is within [-1, 1] already: the plant skips its clip
        tr = physics.transition(state, action, params, hold, steps, loop.plant_noise(k), clipped=True,
                                **loop.plant_inputs())
        if tracker is not None:
            tracker.update(k, tr.state, action, tr.hold, params, None if finished is None else active)
        if slack is not None:
            with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
                now = (physics.constraint_slack(tr.state, loop.physical(action, params), params) if has_limits
                       else np.full(len(tr.state), np.inf))
            slack = keep_finished(np.fmin(slack, now), slack)
            best_hold = keep_finished(np.maximum(best_hold, tr.hold), best_hold)
        if finished is None:
            ret += tr.reward
        else:  # ret is never -0.0 (it starts at +0.0), so skipping a finished row equals adding 0.0 to it
            np.add(ret, tr.reward, out=ret, where=active)
        ended = tr.terminated | tr.truncated
        if finished is not None:
            ended &= active
        # np.count_nonzero and .nonzero(): a fraction of the call overhead of .any() and np.flatnonzero
        any_ended = np.count_nonzero(ended) > 0
        if any_ended:
            rows_ended = ended.nonzero()[0]
            success[where[rows_ended]] = tr.success[rows_ended]
            failure[where[rows_ended]] = tr.failure[rows_ended]
        out_of_time = None
        if k + 1 >= limit:
            out_of_time = active & ~ended
            if np.count_nonzero(out_of_time):
                # the run's horizon ends the episode before the env's own time limit
                if physics.success_mode == "survive":
                    success[where[out_of_time]] = True
                else:
                    failure[where[out_of_time]] = physics.timeout_code
        # finished rows keep their last state, so later steps cannot disturb them
        state = keep_finished(tr.state, state)
        steps = keep_finished(tr.steps, steps)
        hold = tr.hold
        if trace is not None:
            trace["obs"].append(measured.copy())
            trace["action"].append(action.copy())
            trace["state"].append(state.copy())
        if not (any_ended or out_of_time is not None or len(active) == 0):
            obs = physics.observe(state, params)
            continue  # nothing ended: the batch and its live policies are as they were
        active &= ~ended
        if out_of_time is not None:
            active &= ~out_of_time
        n_active = np.count_nonzero(active)
        if not n_active:
            break
        live = None  # policies that still have a running row, when dropping the others pays
        # at least ceil(n_active / s) policies are live: past half of them, dropping cannot pay yet
        if (selectable and trace is None and movable and policy.n_policies * s - n_active >= COMPACT_ROWS
                and -(-n_active // s) <= 0.5 * policy.n_policies):
            live = live_policies(policy.n_policies, (active.nonzero()[0] if pos is None else pos[active]) // s, s)
        if trace is None and movable and (live is not None or len(active) - n_active >= max(DROP_ROWS,
                                                                                           len(active) // 4)):
            # Enough rows have ended: drop them from the plant's batch. Rows are independent, so this
            # changes no result, only the work done per step. The policies keep their grid of rows
            # (`pos` points into it) until most of them have no row left.
            keep = active.nonzero()[0]
            done = (~active).nonzero()[0]
            returns[where[done]] = ret[done]
            length[where[done]] = steps[done]
            if slack is not None:
                slack_all[where[done]], best_hold_all[where[done]] = slack[done], best_hold[done]
                slack, best_hold = slack[keep], best_hold[keep]
            if tracker is not None:
                tracker.store(where, rows)
                tracker.take(keep)
            where, ret, state, hold, steps = where[keep], ret[keep], state[keep], hold[keep], steps[keep]
            active = np.ones(len(keep), dtype=bool)
            params = np.asfortranarray(params[keep])
            params.setflags(write=False)
            loop.take(keep)
            pos = keep if pos is None else pos[keep]
            smaller = None if live is None else policy.select(live.nonzero()[0])
            if smaller is not None:
                pos = (np.cumsum(live) - 1)[pos // s] * s + pos % s  # the same rows in the smaller grid
                policy = smaller
            elif live is not None:
                selectable = False  # the policy keeps all its networks (e.g. recurrent state): do not ask again
            if len(pos) == policy.n_policies * s:  # pos increases: every grid row runs, in order
                pos = None
            grid_obs = np.zeros((policy.n_policies * s, obs.shape[1])) if pos is not None else grid_obs
        finished = (~active).nonzero()[0]
        few = 4 * len(finished) < len(active)
        if not len(finished):
            finished = None
        obs = physics.observe(state, params)
    returns[where] = ret
    length[where] = steps
    steps = length
    failure[success] = 0
    shape = (g, s)
    words = physics.failure_words
    measures = None
    poor = None
    if tracker is not None:
        tracker.store(where, rows)
        code, measures = tracker.finish(steps, success)
        poor = code >= 0
        success[poor] = False
        failure[poor] = len(words) + code[poor]
        words = merge_words(words)
    scores = None
    if slack is not None:
        slack_all[where], best_hold_all[where] = slack, best_hold
        scores = episode_score(physics, success, failure, steps, limit, slack_all, best_hold_all)
        if poor is not None:
            scores[poor] = 0.0
        scores = scores.reshape(shape)
    return Outcome(
        returns.reshape(shape),
        success.reshape(shape),
        failure.reshape(shape),
        steps.reshape(shape),
        words,
        {k: np.asarray(v) for k, v in trace.items()} if trace is not None else None,
        scores,
        {k: v.reshape(shape) for k, v in measures.items()} if measures is not None else None,
        trust.finish(steps, shape) if trust is not None else None,
    )


def live_policies(g: int, owners: np.ndarray, s: int) -> np.ndarray | None:
    """(g,) bool: the policies owning a running row (``owners``), when dropping the others pays; else None.

    It pays when at most half of the ``g`` policies of ``s`` rows each are live and the others
    hold at least :data:`COMPACT_ROWS` rows.
    """
    live = np.zeros(g, dtype=bool)
    live[owners] = True
    n_live = np.count_nonzero(live)
    return live if n_live <= 0.5 * g and (g - n_live) * s >= COMPACT_ROWS else None


def random_rows(physics: Physics, scenarios: Scenarios) -> np.ndarray:
    """(S,) bool: scenarios driven by random inputs (sensor noise, control jitter, the plant's own gusts)."""
    noisy = np.full(len(scenarios), physics.noise_dim > 0)
    for name, v in scenarios.perturb.items():
        if name.split(".")[0] in ("sensor_noise_std", "control_jitter_s"):
            noisy |= np.asarray(v).reshape(len(scenarios), -1).any(axis=1)
    return noisy


def episode_score(physics: Physics, success: np.ndarray, failure: np.ndarray, steps: np.ndarray, limit: int,
                  min_slack: np.ndarray, best_hold: np.ndarray) -> np.ndarray:
    """One continuous number per episode: how far from failing (> 0) or from passing (<= 0).

    * success: the smallest constraint slack over the episode
      (:meth:`~pretrial_envs.core.Physics.constraint_slack`), capped at 1;
      a plant that declares no limits scores 1;
    * a limit broken at step ``t`` of ``T``: ``-(1 - t / T)``, so failing later is better;
    * ran out of time on a reach task: ``-(1 - h / hold_time)`` where ``h`` is the
      longest time the goal was held;
    * diverged: -1.

    Worst-case search and sensitivity analyses use it, since a success rate
    alone is flat almost everywhere.
    """
    won = np.minimum(np.where(np.isfinite(min_slack), min_slack, 1.0), 1.0)
    # a success can still touch a limit exactly: keep it above every failure
    won = np.maximum(won, 0.0)
    broke = -(1.0 - steps / max(limit, 1))
    hold_time = getattr(physics, "hold_time", 0.0) or 0.0
    late = -(1.0 - np.minimum(best_hold / hold_time, 1.0)) if hold_time > 0 else np.full(len(steps), -1.0)
    out = np.where(success, won, broke)
    out = np.where(~success & (failure == physics.timeout_code), late, out)
    return np.where(~success & (failure == physics.diverged_code), -1.0, out)
