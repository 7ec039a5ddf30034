"""``pretrial replay``: run a controller on chosen conditions and show what it does."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np

from pretrial.cli.args import limit_arg, parse_assignments
from pretrial.console import emit_json, fmt_number, print_cautions, table
from pretrial.errors import InputError, PretrialError
from pretrial.files import check_output_file, same_file
from pretrial.playback.replay import LQR, Replay, replay, summary
from pretrial.sim.perturb import diverged_warning


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
    env = doc["envelope"]
    if env is not None:  # a hybrid plant: how much of this replay the residual's data covered
        print(f"\noutside the residual's data envelope: {env['share']:.1%} of the simulated time "
              f"({env['episodes_outside']} of {rep.episodes} episodes; {env['residual']['path']}, "
              f"margin {env['residual']['margin']:g}); there the learned correction is extrapolated", file=out)
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


def configure(p: argparse.ArgumentParser) -> None:
    """Arguments of ``pretrial replay``."""
    p.add_argument("policy", metavar="POLICY",
                   help="policy file, run directory (its champion.json), or 'lqr' (the LQR baseline; needs --env)")
    p.add_argument("--set", action="append", metavar="NAME=VALUE",
                   help="physics parameter, perturbation or control_period_s, e.g. pole_mass=0.2 (repeatable)")
    p.add_argument("--episodes", type=limit_arg("REPLAY_EPISODES"), default=1,
                   help="episodes, run together (default 1)")
    p.add_argument("--seed", type=limit_arg("SEED"), default=0, help="scenario seed, as in sweep reports (default 0)")
    p.add_argument("--stream-version", type=int, choices=(1, 2), default=1,
                   help="version of the noise draws, as a sweep's replay command names it (default 1)")
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
    p.add_argument("--option", action="append", metavar="NAME=VALUE",
                   help="env keyword option over the policy's own, e.g. residual=PATH (repeatable)")
    p.add_argument("--plan", metavar="PLAN.toml",
                   help="run under a sweep plan's scenario (env options, params, start ranges, horizon, LQR weights), "
                   "as its replay commands do")
    p.add_argument("--force", action="store_true",
                   help="replace existing --csv/--plot/--gif/--mp4 files (an input file is never replaced)")


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


def run(args: argparse.Namespace) -> int:
    """Run ``pretrial replay``; PretrialError for bad input (the CLI prints one line, exit 2)."""
    from pretrial.playback import animation, traces

    outputs = {"gif": args.gif, "mp4": args.mp4, "csv": args.csv, "plot": args.plot}
    inputs, written = _inputs(args), []
    for kind, path in outputs.items():
        if path is not None:
            check_output_file(path, f"--{kind}", inputs, getattr(args, "force", False))
            if any(same_file(Path(path), other) for other in written):
                raise InputError(f"--{kind} {path}: names the same file as another output")
            written.append(Path(path))
    if args.plot is not None:
        traces.plot_format(args.plot)
    if args.mp4 is not None:
        animation.check_mp4()
    settings = parse_assignments(args.set, "--set")
    rep = replay(args.policy, env=args.env, plan=getattr(args, "plan", None), settings=settings,
                 episodes=args.episodes, seed=args.seed, start=args.start,
                 options=parse_assignments(getattr(args, "option", None), "--option"),
                 stream_version=getattr(args, "stream_version", 1))
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
            title = f"{args.policy} on {rep.env_id}: {note}"
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
