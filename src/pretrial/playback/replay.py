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

import argparse
import os
import shlex
import sys
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from pretrial.console import CAUTIONS, emit_json, fmt_number, print_cautions, table
from pretrial.errors import InputError, PretrialError
from pretrial.limits import RECORDED_STEPS, REPLAY_EPISODES, check_total
from pretrial.sim.perturb import Setup, apply_settings, diverged_warning
from pretrial.sim.quality import QualityLimits, quality_metrics
from pretrial.sim.rollout import BatchPolicy, Outcome, Scenarios, draw_scenarios, run_episodes
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
        words = ["pretrial", "replay", self.policy_label]
        if self.plan:
            words += ["--plan", self.plan]
        if env:
            words += ["--env", self.env_id]
        for k, v in self.setup.settings.items():
            words += ["--set", f"{k}={v!r}"]
        words += ["--episodes", str(self.episodes), "--seed", str(self.seed)]
        if self.start_text is not None:
            words += ["--start", self.start_text]
        return shlex.join(words)


# --------------------------------------------------------------------------- #
# what to run
# --------------------------------------------------------------------------- #
def env_id_of(name: str) -> str:
    """A pretrial env id (full or short, which wins over a gymnasium id of the same name) or a gymnasium id."""
    import gymnasium as gym

    from pretrial.cli.main import resolve_env_id

    try:
        return resolve_env_id(name)
    except InputError:
        if name.split(":", 1)[-1] in gym.registry:  # resolve_env_id has imported the module of a module:id
            return name
        raise


def _plant(env_id: str, options: dict[str, Any] | None = None) -> Physics:
    from pretrial.sim.plant import make_plant

    try:
        return make_plant(env_id, **(options or {}))
    except (TypeError, ValueError) as exc:
        raise InputError(f"{env_id}: {exc}") from None


def _settings(physics: Physics, base: dict[str, float], settings: dict[str, Any]) -> Setup:
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


def prepare(policy_arg: str, env: str | None, settings: dict[str, Any]) -> tuple[BatchPolicy, Setup, str, str | None]:
    """Controller, plant setup, env id and policy hash for a POLICY argument and ``--env``/``--set``.

    Raises
    ------
    InputError
        ``lqr`` without ``--env``; a policy that does not fit the named env
        (naming both); an unknown setting or value; an unreadable policy.
    """
    if policy_arg == LQR:
        if env is None:
            raise InputError("lqr: name the environment with --env (e.g. --env CartPole-v0)")
        env_id = env_id_of(env)
        setup = _settings(_plant(env_id), {}, settings)
        return lqr_policy(setup), setup, env_id, None
    from pretrial.controller.policy import open_policy

    policy = open_policy(policy_arg)
    env_id = policy.env_id if env is None else env_id_of(env)
    if env_id == policy.env_id:
        physics, base = _plant(env_id, dict(policy.env_options)), dict(policy.env_params)
    else:
        physics, base = _plant(env_id), {}
        sizes = (physics.obs_dim, physics.action_dim)
        if sizes != (policy.io.obs_dim, policy.io.action_dim):
            raise InputError(
                f"--env {env_id}: has {sizes[0]} observations and {sizes[1]} actions, but the policy "
                f"{policy_arg} (trained on {policy.env_id}) takes {policy.io.obs_dim} and gives {policy.io.action_dim}"
            )
    return policy, _settings(physics, base, settings), env_id, policy.content_hash


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
               max_steps: int | None = None, quality: QualityLimits | None = None) -> Replay:
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
    """
    try:
        episodes = REPLAY_EPISODES.check(episodes, "--episodes")
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
    outcome = run_episodes(physics, policy, scenarios, max_steps=max_steps, record=True, quality=quality)
    trace = outcome.trace
    metrics = physics.episode_metrics(trace["state"], trace["action"], scenarios.params, outcome.steps[0])
    if outcome.quality is not None:
        metrics.update(quality_metrics(physics, outcome.quality))
    return Replay(policy_label, policy_hash, env_id or physics.env_id, setup, int(seed), scenarios, outcome, metrics,
                  start_state, start)


# --------------------------------------------------------------------------- #
# summary
# --------------------------------------------------------------------------- #
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

    See :func:`~pretrial.analysis.campaign.wilson_interval`.
    """
    from pretrial.analysis.campaign import wilson_interval

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
        "command": rep.command(),
        "files": dict(rep.files),
        "cautions": list(CAUTIONS),
    }


def _value(v: float | None, never: bool = False) -> str:
    if v is None:
        return "-"
    if np.isinf(v):
        return "never" if never else fmt_number(float(v))
    return fmt_number(float(v))


def print_summary(rep: Replay, out=None) -> None:
    """The text report: outcome, failure modes, metrics table, per-episode lines, files, command, cautions."""
    out = out or sys.stdout
    doc = summary(rep)
    words = rep.setup.words() or "nominal (no --set)"
    print(f"replay of {rep.policy_label} on {rep.env_id}: {rep.episodes} episode(s), seed {rep.seed}, "
          f"control period {rep.physics.dt:g} s", file=out)
    print(f"settings: {words}", file=out)
    if rep.start is not None:
        print(f"start state: {', '.join(f'{n}={fmt_number(v)}' for n, v in zip(rep.physics.state_names, rep.start))}",
              file=out)
    print(file=out)
    r = doc["return"]
    lo, hi = doc["success_ci95"]
    rows = [["episodes", rep.episodes, ""], ["success rate", f"{doc['success_rate']:.1%}",
                                             f"{doc['successes']} of {rep.episodes}; Wilson 95% interval "
                                             f"{lo:.1%} to {hi:.1%}"],
            ["return", fmt_number(r["mean"]), f"mean (min {fmt_number(r['min'])}, max {fmt_number(r['max'])})"]]
    for word, count in sorted(doc["failure_modes"].items()):
        rows.append([f"failed: {word}", count, "episodes"])
    table(["outcome", "value", "note"], rows, out)
    print(file=out)
    mrows = []
    for name, m in doc["metrics"].items():
        never = f", {m['never']} never" if m["never"] else ""
        mrows.append([name, m["unit"], _value(m["mean"]), _value(m["worst"], True) + never, m["worst_is"],
                      m["meaning"]])
    table(["metric", "unit", "mean", "worst", "worst is", "meaning"], mrows, out)
    if rep.episodes > 1:
        print(file=out)
        erows = []
        for e in range(rep.episodes):
            outcome = "success" if doc["success"][e] else doc["failure"][e]
            erows.append([e, outcome, fmt_number(doc["duration_s"][e]), fmt_number(doc["returns"][e])])
            if e == 19 and rep.episodes > 21:
                erows.append(["...", f"{rep.episodes - 20} more in --json", "", ""])
                break
        table(["episode", "outcome", "duration [s]", "return"], erows, out)
    if rep.files:
        print(file=out)
        for kind, path in rep.files.items():
            print(f"wrote {kind}: {path}", file=out)
    print(f"\nreproduce: {doc['command']}", file=out)
    print_cautions(out)


# --------------------------------------------------------------------------- #
# command line
# --------------------------------------------------------------------------- #
def configure_cli(p: argparse.ArgumentParser) -> None:
    """Arguments of ``pretrial replay``."""
    from pretrial.cli.main import limit_arg

    p.add_argument("policy", metavar="POLICY",
                   help="policy file, run directory (its champion.json), or 'lqr' (the LQR baseline; needs --env)")
    p.add_argument("--set", action="append", metavar="NAME=VALUE",
                   help="physics parameter, perturbation or control_period_s, e.g. pole_mass=0.2 (repeatable)")
    p.add_argument("--episodes", type=limit_arg("REPLAY_EPISODES"), default=1,
                   help="episodes, run together (default 1)")
    p.add_argument("--seed", type=limit_arg("SEED"), default=0, help="scenario seed, as in sweep reports (default 0)")
    p.add_argument("--start", metavar="STATE",
                   help="exact start state: numbers in state order, or name=value pairs (others: start centre)")
    p.add_argument("--gif", metavar="FILE", help="animation of the first episode (GIF)")
    p.add_argument("--mp4", metavar="FILE", help="animation of the first episode (MP4, needs ffmpeg)")
    p.add_argument("--csv", metavar="FILE", help="time, state, observation and action per step")
    p.add_argument("--plot", metavar="FILE",
                   help="states and actions against time with the task's limits (.png, .pdf or .svg)")
    p.add_argument("--show", action="store_true", help="play the first episode in a window")
    p.add_argument("--json", action="store_true", help="print one JSON object instead of text")
    p.add_argument("--env", metavar="ID", help="environment (required for lqr; else must fit the policy)")
    p.add_argument("--plan", metavar="PLAN.toml",
                   help="run under a sweep plan's scenario (env options, params, start ranges, horizon, LQR weights), "
                   "as its replay commands do")
    p.add_argument("--force", action="store_true",
                   help="replace existing --csv/--plot/--gif/--mp4 files (an input file is never replaced)")


def _same_file(a: Path, b: Path) -> bool:
    """Whether two paths name one file: the same path once symlinks are resolved, or the same inode (a hard link)."""
    if a.resolve() == b.resolve():
        return True
    try:
        return a.samefile(b)
    except OSError:  # one of them does not exist
        return False


def _inputs(args: argparse.Namespace) -> list[Path]:
    """The files this replay reads: the policy (a run directory's champion) and the plan."""
    from pretrial.controller.policy import CHAMPION_FILE

    found = []
    if args.policy != LQR:
        policy = Path(args.policy)
        found.append(policy / CHAMPION_FILE if policy.is_dir() else policy)
    if getattr(args, "plan", None):
        found.append(Path(args.plan))
    return found


def _check_output(path: str, flag: str, inputs: Sequence[Path] = (), force: bool = False) -> None:
    """Refuse, before any work, an output path that cannot be written or would replace a file.

    An input (the policy, the plan) is never replaced; another existing file only with ``force``.
    """
    p = Path(path)
    for source in inputs:
        if _same_file(p, source):
            raise InputError(f"{flag} {path}: is an input of this replay ({source}); write the output elsewhere")
    if p.is_dir():
        raise InputError(f"{flag} {path}: is a directory")
    if (p.exists() or p.is_symlink()) and not force:
        raise InputError(f"{flag} {path}: already exists; pick another name or add --force to replace it")
    parent = p.parent if str(p.parent) else Path(".")
    if not parent.is_dir():
        raise InputError(f"{flag} {path}: directory {parent} does not exist")
    if not os.access(parent, os.W_OK | os.X_OK):
        raise InputError(f"{flag} {path}: directory {parent} is not writable")


def run_cli(args: argparse.Namespace) -> int:
    """Run ``pretrial replay``; PretrialError for bad input (the CLI prints one line, exit 2)."""
    from pretrial.cli.main import parse_assignments
    from pretrial.playback import animation, traces

    outputs = {"gif": args.gif, "mp4": args.mp4, "csv": args.csv, "plot": args.plot}
    inputs, written = _inputs(args), []
    for kind, path in outputs.items():
        if path is not None:
            _check_output(path, f"--{kind}", inputs, getattr(args, "force", False))
            if any(_same_file(Path(path), other) for other in written):
                raise InputError(f"--{kind} {path}: names the same file as another output")
            written.append(Path(path))
    if args.plot is not None:
        traces.plot_format(args.plot)
    if args.mp4 is not None:
        animation.check_mp4()
    settings = parse_assignments(args.set, "--set")
    max_steps = None
    if getattr(args, "plan", None):
        from pretrial.analysis.sweep import controlled

        ctl = controlled(args.policy, args.plan, args.env)
        policy, env_id, digest = ctl.controller, ctl.env_id, ctl.policy_hash
        setup = _settings(ctl.physics, ctl.base_params, settings)
        if ctl.plan is not None and ctl.plan.horizon is not None:
            max_steps = max(1, round(ctl.plan.horizon / setup.physics.dt))
    else:
        policy, setup, env_id, digest = prepare(args.policy, args.env, settings)
    quality = ctl.plan.quality if getattr(args, "plan", None) and ctl.plan is not None else QualityLimits()
    rep = run_replay(policy, setup, episodes=args.episodes, seed=args.seed, start=args.start,
                     policy_label=args.policy, env_id=env_id, policy_hash=digest, max_steps=max_steps,
                     quality=quality)
    rep.plan = getattr(args, "plan", None)
    trace, steps, params = rep.outcome.trace, rep.outcome.steps[0], rep.scenarios.params
    note = rep.setup.words() or "nominal"
    blew_up = rep.outcome.failure_counts().get("diverged", 0)
    if blew_up:
        print(diverged_warning(blew_up, note, args.episodes), file=sys.stderr)
    try:
        if args.csv:
            traces.write_trace_csv(args.csv, rep.physics, trace, params, steps)
            rep.files["csv"] = args.csv
        if args.plot:
            title = f"{args.policy} on {env_id}: {note}"
            traces.plot_traces(args.plot, rep.physics, trace, params, steps, title)
            rep.files["plot"] = args.plot
        for kind in ("gif", "mp4"):
            if outputs[kind]:
                animation.write_animation(outputs[kind], rep.physics, trace["state"][:, 0], params[0], int(steps[0]),
                                          traces.plot_title(note))
                rep.files[kind] = outputs[kind]
    except OSError as exc:
        raise PretrialError(f"cannot write output: {exc.strerror or exc}") from None
    if args.show:
        ok, backend = animation.display_available()
        if ok:
            animation.show_episode(rep.physics, trace["state"][:, 0], params[0], int(steps[0]), traces.plot_title(note))
        else:
            print(f"pretrial: --show skipped: no display here (matplotlib backend {backend}); use --gif or --mp4",
                  file=sys.stderr)
    if args.json:
        emit_json(summary(rep))
    else:
        print_summary(rep)
    return 0
