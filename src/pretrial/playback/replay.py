"""``pretrial replay``: run a controller on chosen conditions, measure what it does, show it.

A replay runs K episodes of one controller (a policy file, a run directory's
champion, or the LQR baseline) on the plant with named settings applied
(:func:`pretrial.sim.perturb.apply_settings`), records every step and reports the
outcome and the task metrics (:meth:`pretrial_envs.core.Physics.episode_metrics`).

Episodes are those of a sweep: the K episodes of seed N are
``draw_scenarios(physics, K, N, base_params=..., fixed=...)``, so a sample of a
sweep report replays by copying its command line. ``--start`` replaces every
episode's start state.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from pretrial.console import CAUTIONS
from pretrial.errors import InputError
from pretrial.limits import RECORDED_STEPS, REPLAY_EPISODES, check_total
from pretrial.playback.command import replay_command
from pretrial.sim.envelope import describe_episode
from pretrial.sim.hybrid import check_trained_residual, residual_record
from pretrial.sim.perturb import Setup, apply_settings
from pretrial.sim.plant import build_plant, env_id_of
from pretrial.sim.quality import QualityLimits, quality_metrics
from pretrial.sim.rollout import BatchPolicy, Outcome, Scenarios, draw_scenarios, run_episodes
from pretrial.sim.streams import check_version
from pretrial_envs.core import EpisodeMetric, Physics

#: replay records every step of every episode; beyond this many, a sweep is the tool
MAX_EPISODES = REPLAY_EPISODES.high

LQR = "lqr"


@dataclass
class Replay:
    """A finished replay: what ran, on what, and what happened.

    Attributes
    ----------
    policy_label : str
        The POLICY argument as given (a path) or ``"lqr"``.
    policy_hash : str or None
        SHA-256 of the policy file's content (None for the LQR baseline).
    env_id : str
    setup : Setup
        Plant, parameters and perturbations in force.
    seed : int
    scenarios : Scenarios
    outcome : Outcome
        With the recorded trace.
    metrics : dict of str to EpisodeMetric
    start : list of float or None
        The ``--start`` state, if one was given.
    start_text : str or None
        The ``--start`` text as given (for the reproducing command).
    files : dict of str to str
        Output kind (``csv``, ``plot``, ``gif``, ``mp4``) -> path written.
    """

    policy_label: str
    policy_hash: str | None
    env_id: str
    setup: Setup
    seed: int
    scenarios: Scenarios
    outcome: Outcome
    metrics: dict[str, EpisodeMetric]
    start: list[float] | None = None
    start_text: str | None = None
    files: dict[str, str] = field(default_factory=dict)
    plan: str | None = None
    #: ``--option`` env options given over the policy's own
    options: dict[str, Any] = field(default_factory=dict)
    stream_version: int = 1

    @property
    def physics(self) -> Physics:
        return self.setup.physics

    @property
    def episodes(self) -> int:
        return len(self.scenarios)

    def failure_words(self) -> list[str]:
        """Per episode: ``""`` for a success, else the failure word."""
        out = self.outcome
        return ["" if s else out.failure_words[c] for s, c in zip(out.success[0], out.failure[0])]

    def command(self, env: bool = True) -> str:
        """The command line that reproduces this replay (without file outputs)."""
        return replay_command(self.policy_label, plan=self.plan, env=self.env_id if env else None,
                              options=self.options, settings=self.setup.settings, seed=self.seed,
                              episodes=self.episodes, start=self.start_text, stream_version=self.stream_version)


# --------------------------------------------------------------------------- #
# what to run
# --------------------------------------------------------------------------- #


def check_settings(physics: Physics, base: dict[str, float], settings: dict[str, Any]) -> Setup:
    try:
        return apply_settings(physics, base_params=base, settings=settings)
    except ValueError as exc:
        raise InputError(f"--set {exc}") from None


def lqr_policy(setup: Setup) -> BatchPolicy:
    """The LQR baseline for ``setup.physics``, designed on the nominal plant.

    The design knows the task's own settings (role ``"task"``: targets,
    tolerances, limits of the task rule), which a controller is told, but not
    what ``--set`` changes in the plant or the loop: like a controller tuned
    before the trial, it meets the perturbation unprepared.
    """
    try:
        from pretrial.analysis.lqr import design_lqr
    except ImportError:
        raise InputError("lqr: the LQR baseline is not available in this installation") from None
    table_ = setup.physics.param_table
    told = {k: v for k, v in setup.params.items() if k in table_ and table_[k].role == "task"}
    try:
        return design_lqr(setup.physics, params=told or None)
    except ValueError as exc:
        raise InputError(f"lqr: {exc}") from None


def prepare(policy_arg: str, env: str | None, settings: dict[str, Any], policy: Any = None,
            options: dict[str, Any] | None = None) -> tuple[BatchPolicy, Setup, str, str | None]:
    """Controller, plant setup, env id and policy hash for a POLICY argument and ``--env``/``--set``/``--option``.

    Raises
    ------
    InputError
        ``lqr`` without ``--env``; a policy that does not fit the named env
        (naming both); an unknown setting or value; an unreadable policy; an env option the plant
        refuses; a residual other than the one the policy was trained on.

    ``policy``, when given, is the loaded policy (``policy_arg`` then only labels it). ``options`` are env
    keyword options (``--option``) over the policy's own.
    """
    options = dict(options or {})
    if policy_arg == LQR:
        if env is None:
            raise InputError("lqr: name the environment with --env (e.g. --env CartPole-v0)")
        env_id = env_id_of(env)
        setup = check_settings(build_plant(env_id, options, "--option" if options else None), {}, settings)
        return lqr_policy(setup), setup, env_id, None
    from pretrial.controller.policy import open_policy

    policy = open_policy(policy_arg) if policy is None else policy
    env_id = policy.env_id if env is None else env_id_of(env)
    where = "--option" if options else f"{policy_arg}: env.options"
    if env_id == policy.env_id:
        physics = build_plant(env_id, {**policy.env_options, **options}, where)
        base = dict(policy.env_params)
        check_trained_residual(policy, physics, policy_arg, where)
    else:
        physics, base = build_plant(env_id, options, "--option" if options else None), {}
        sizes = (physics.obs_dim, physics.action_dim)
        if sizes != (policy.io.obs_dim, policy.io.action_dim):
            raise InputError(
                f"--env {env_id}: has {sizes[0]} observations and {sizes[1]} actions, but the policy "
                f"{policy_arg} (trained on {policy.env_id}) takes {policy.io.obs_dim} and gives {policy.io.action_dim}"
            )
    return policy, check_settings(physics, base, settings), env_id, policy.content_hash


def parse_start(text: str, physics: Physics, params: np.ndarray) -> np.ndarray:
    """Start states (K, S) from ``--start``: S numbers in state order, or ``name=value`` pairs.

    Names not given take the env's start centre for each episode's parameters.
    """
    names = physics.state_names
    valid = f"valid: {', '.join(names)}"
    items = [t.strip() for t in text.split(",")]
    start = physics.start_center(params).astype(float)
    if not any("=" in t for t in items):
        if len(items) != len(names):
            raise InputError(f"--start {text!r}: expected {len(names)} numbers in state order ({valid}), "
                             f"got {len(items)}")
        values = [_number(t, text, valid) for t in items]
        start[:] = values
        return start
    for item in items:
        name, sep, value = item.partition("=")
        name = name.strip()
        if not sep:
            raise InputError(f"--start {text!r}: {item!r} is not name=value (use all numbers or all name=value; "
                             f"{valid})")
        if name not in names:
            raise InputError(f"--start {text!r}: unknown state {name!r}; {valid}")
        start[:, names.index(name)] = _number(value, text, valid)
    return start


def _number(item: str, text: str, valid: str) -> float:
    try:
        v = float(item)
    except ValueError:
        raise InputError(f"--start {text!r}: {item.strip()!r} is not a number ({valid})") from None
    if not np.isfinite(v):
        raise InputError(f"--start {text!r}: {item.strip()!r} is not a finite number ({valid})")
    return v


def run_replay(policy: BatchPolicy, setup: Setup, *, episodes: int = 1, seed: int = 0, start: str | None = None,
               policy_label: str = "", env_id: str = "", policy_hash: str | None = None,
               max_steps: int | None = None, quality: QualityLimits | None = None,
               stream_version: int = 1) -> Replay:
    """Run and measure ``episodes`` recorded episodes of seed ``seed`` (all in one batch).

    Parameters
    ----------
    policy : BatchPolicy
        One controller (``n_policies == 1``).
    setup : Setup
        From :func:`pretrial.sim.perturb.apply_settings`.
    episodes, seed : int
        The episodes are ``draw_scenarios(setup.physics, episodes, seed, ...)``.
    start : str, optional
        ``--start`` text: replaces every episode's start state.
    max_steps : int, optional
        Episode length in control periods (default: the env's time limit; a plan's horizon).
    quality : QualityLimits, optional
        Loop-quality limits an episode must also meet to succeed (a plan's, or
        the defaults); None judges survival only.
    stream_version : int
        Version of the noise draws (:data:`pretrial.sim.streams.STREAM_VERSIONS`): the one the
        replayed result was made with (1 for results that do not record one).
    """
    try:
        episodes = REPLAY_EPISODES.check(episodes, "--episodes")
        stream_version = check_version(stream_version)
        periods = setup.physics.max_steps if max_steps is None else int(max_steps)
        check_total("replay", [(episodes, "episodes"), (periods, "control periods")], RECORDED_STEPS)
    except ValueError as exc:
        raise InputError(str(exc)) from None
    physics = setup.physics
    scenarios = draw_scenarios(physics, int(episodes), int(seed), base_params=setup.params, fixed=setup.perturb)
    start_state = None
    if start is not None:
        scenarios.start = parse_start(start, physics, scenarios.params)
        start_state = scenarios.start[0].tolist()
    outcome = run_episodes(physics, policy, scenarios, max_steps=max_steps, record=True, quality=quality,
                           stream_version=stream_version)
    trace = outcome.trace
    metrics = physics.episode_metrics(trace["state"], trace["action"], scenarios.params, outcome.steps[0])
    if outcome.quality is not None:
        metrics.update(quality_metrics(physics, outcome.quality))
    return Replay(policy_label, policy_hash, env_id or physics.env_id, setup, int(seed), scenarios, outcome, metrics,
                  start_state, start)


def replay(policy: str | Path | BatchPolicy, *, env: str | None = None, plan: str | Path | None = None,
           settings: dict[str, Any] | None = None, episodes: int = 1, seed: int = 0,
           start: str | None = None, options: dict[str, Any] | None = None, stream_version: int = 1) -> Replay:
    """Replay a controller: ``episodes`` recorded episodes of seed ``seed`` under named settings.

    Parameters
    ----------
    policy : path-like, ``"lqr"`` or Policy
        A policy file, a run directory (its champion), the LQR baseline (needs ``env`` or ``plan``),
        or a loaded :class:`~pretrial.controller.policy.Policy`.
    env : str, optional
        Environment id (full or short, gymnasium, or ``module:id``); must fit the policy.
    plan : path-like, optional
        Run under a sweep plan's scenario (env options, params, start ranges, horizon, quality
        limits, LQR weights), as a sweep report's replay commands do.
    settings : dict, optional
        Physics parameters, generic perturbations or ``control_period_s`` by name.
    episodes, seed : int
        The same episodes a sweep draws for that seed.
    start : str, optional
        An exact start state (numbers in state order, or ``name=value`` pairs).
    options : dict, optional
        Env keyword options (``--option``, e.g. ``residual``) over the policy's own; not with ``plan``
        (a plan's ``[scenario.options]`` set them).
    stream_version : int
        Version of the noise draws; a sweep's replay commands name it when it is not 1.

    Returns
    -------
    Replay
        With the recorded trace, the outcome and the task and loop-quality metrics.
    """
    settings = dict(settings or {})
    label = policy if isinstance(policy, str) else str(policy) if isinstance(policy, Path) else "<in-memory policy>"
    loaded = None if isinstance(policy, (str, Path)) else policy
    max_steps = None
    quality = QualityLimits()
    if plan is not None:
        from pretrial.analysis.sweep import controlled

        if options:
            raise InputError(f"--option: not with --plan (set env options in {plan}'s [scenario.options])")
        ctl = controlled(str(policy) if loaded is None else label, str(plan), env, policy=loaded)
        controller, env_id, digest = ctl.controller, ctl.env_id, ctl.policy_hash
        setup = check_settings(ctl.physics, ctl.base_params, settings)
        if ctl.plan is not None:
            quality = ctl.plan.quality
            if ctl.plan.horizon is not None:
                max_steps = max(1, round(ctl.plan.horizon / setup.physics.dt))
    else:
        controller, setup, env_id, digest = prepare(str(policy) if loaded is None else label, env, settings,
                                                    policy=loaded, options=options)
    rep = run_replay(controller, setup, episodes=episodes, seed=seed, start=start, policy_label=label, env_id=env_id,
                     policy_hash=digest, max_steps=max_steps, quality=quality, stream_version=stream_version)
    rep.plan = None if plan is None else str(plan)
    rep.options = dict(options or {})
    rep.stream_version = stream_version
    return rep


# --------------------------------------------------------------------------- #
# summary
# --------------------------------------------------------------------------- #
def envelope_summary(rep: Replay) -> dict[str, Any] | None:
    """A hybrid plant's trust region over the replay: its residual, the share of the simulated time outside the
    data it was fitted on, and per episode the share, first time and first variable out (None: no residual)."""
    env = rep.outcome.envelope
    if env is None:
        return None
    episodes = [describe_episode(rep.physics, env, e) for e in range(rep.episodes)]
    steps = rep.outcome.steps[0]
    return {"residual": residual_record(rep.physics),
            "share": float(env["outside_steps"][0].sum() / max(int(steps.sum()), 1)),
            "episodes_outside": int((env["outside_steps"][0] > 0).sum()), "episodes": episodes}


def metric_summary(metric: EpisodeMetric) -> dict[str, Any]:
    """Mean over the finite values, the worst value, min, max, and the count of infinite ones ("never")."""
    v = np.asarray(metric.values, dtype=float)
    finite = v[np.isfinite(v)]
    worst = float(v.max() if metric.worst == "max" else v.min()) if v.size else None
    return {
        "mean": float(finite.mean()) if finite.size else None,
        "worst": worst,
        "worst_is": metric.worst,
        "min": float(v.min()) if v.size else None,
        "max": float(v.max()) if v.size else None,
        "never": int(np.isinf(v).sum()),
        "unit": metric.unit,
        "meaning": metric.meaning,
        "per_episode": v.tolist(),
    }


def success_interval(successes: int, episodes: int) -> list[float]:
    """Wilson 95% interval [lo, hi] of ``successes`` of ``episodes``.

    See :func:`~pretrial.analysis.stats.wilson_interval`.
    """
    from pretrial.analysis.stats import wilson_interval

    lo, hi = wilson_interval(successes, episodes)
    return [float(lo), float(hi)]


def summary(rep: Replay) -> dict[str, Any]:
    """The JSON document of a replay (infinities become null: "never")."""
    out = rep.outcome
    returns = out.returns[0]
    physics = rep.physics
    return {
        "policy": rep.policy_label,
        "policy_sha256": rep.policy_hash,
        "env": rep.env_id,
        "env_options": physics.options(),
        "settings": dict(rep.setup.settings),
        "seed": rep.seed,
        "episodes": rep.episodes,
        "start": rep.start,
        "control_period_s": physics.dt,
        "success_rate": float(out.success.mean()),
        "success_ci95": success_interval(int(out.success.sum()), rep.episodes),
        "successes": int(out.success.sum()),
        "failure_modes": out.failure_counts(),
        "returns": returns.tolist(),
        "return": {"mean": float(returns.mean()), "min": float(returns.min()), "max": float(returns.max())},
        "success": out.success[0].tolist(),
        "failure": rep.failure_words(),
        "steps": out.steps[0].tolist(),
        "duration_s": (out.steps[0] * physics.dt).tolist(),
        "metrics": {name: metric_summary(m) for name, m in rep.metrics.items()},
        "envelope": envelope_summary(rep),
        "command": rep.command(),
        "files": dict(rep.files),
        "cautions": list(CAUTIONS),
    }


# --------------------------------------------------------------------------- #
# command line
# --------------------------------------------------------------------------- #


