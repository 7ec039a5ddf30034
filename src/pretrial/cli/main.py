"""The ``pretrial`` command line.

Each sub-command is a ``configure(parser)`` / ``run(args) -> int`` pair. Any
:class:`~pretrial.errors.PretrialError` becomes one line on stderr and exit
code 2 (``--debug`` shows the traceback too).
"""

from __future__ import annotations

import argparse
import sys
import traceback
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

from pretrial import __version__
from pretrial.console import emit_json, fmt_number, table
from pretrial.errors import InputError, PretrialError
from pretrial.sim.signals import EXIT_INTERRUPTED, EXIT_TERMINATED, Terminated, stop_on_signals


# --------------------------------------------------------------------------- #
# shared argument helpers
# --------------------------------------------------------------------------- #
def parse_literal(text: str) -> Any:
    """Value of a ``NAME=VALUE`` option: bool, int, float or string."""
    low = text.strip().lower()
    if low in ("true", "false"):
        return low == "true"
    for cast in (int, float):
        try:
            return cast(text)
        except ValueError:
            pass
    return text


def parse_assignments(items: Sequence[str] | None, flag: str) -> dict[str, Any]:
    """``["a=1", "b=x"]`` -> ``{"a": 1, "b": "x"}``; InputError naming the flag otherwise."""
    out: dict[str, Any] = {}
    for item in items or ():
        name, sep, value = item.partition("=")
        if not sep or not name.strip() or not value.strip():
            raise InputError(f"{flag} {item!r}: expected NAME=VALUE")
        if name.strip() in out:  # the later one would win without a word
            raise InputError(f"{flag} {item!r}: {name.strip()} is given twice")
        out[name.strip()] = parse_literal(value.strip())
    return out


def resolve_env_id(name: str) -> str:
    """Accept a full id (``pretrial/CartPole-v0``) or its short form (``CartPole-v0``)."""
    import pretrial_envs

    ids = pretrial_envs.env_ids()
    if name in ids:
        return name
    for env_id in ids:
        if env_id.split("/", 1)[-1].lower() == name.lower():
            return env_id
    try:
        pretrial_envs.physics_type(name)  # also imports the module of a module:id
        return name
    except ValueError as exc:
        raise InputError(str(exc)) from None


# --------------------------------------------------------------------------- #
# pretrial envs
# --------------------------------------------------------------------------- #
def _configure_envs(p: argparse.ArgumentParser) -> None:
    p.add_argument("env_id", nargs="?", help="environment id (full or short, e.g. GantryCrane-v0)")
    p.add_argument(
        "--option",
        action="append",
        metavar="NAME=VALUE",
        help="environment keyword argument, e.g. poles=2 or hoist=true (repeatable)",
    )
    p.add_argument("--json", action="store_true", help="print JSON instead of text")


def _run_envs(args: argparse.Namespace) -> int:
    import pretrial_envs

    if args.env_id is None:
        rows = []
        for env_id in pretrial_envs.env_ids():
            phys = pretrial_envs.physics_type(env_id)
            rows.append({"id": env_id, "summary": phys.summary})
        if args.json:
            emit_json({"environments": rows})
        else:
            table(["id", "summary"], [[r["id"], r["summary"]] for r in rows])
            print("\n`pretrial envs ID` shows an environment's parameters, spaces and success rule.")
        return 0
    env_id = resolve_env_id(args.env_id)
    options = parse_assignments(args.option, "--option")
    try:
        physics = pretrial_envs.make_physics(env_id, **options)
    except (TypeError, ValueError) as exc:
        raise InputError(f"{env_id}: {exc}") from None
    info = physics.describe()
    from pretrial.sim.perturb import perturbation_specs

    info["perturbations"] = [s.as_dict() for s in perturbation_specs(physics)]
    if args.json:
        emit_json(info)
        return 0
    print(f"{env_id}: {info['summary']}")
    opts = ", ".join(f"{k}={v}" for k, v in info["options"].items() if k != "start_spread")
    print(f"options: {opts}\n")
    print("Parameters")
    table(
        ["name", "unit", "nominal", "valid range", "role", "meaning"],
        [[s["name"], s["unit"], s["nominal"], f"[{s['low']:g}, {s['high']:g}]", s["role"], s["doc"]]
         for s in info["params"]],
    )
    for title, key in (("State", "state"), ("Observation", "observation")):
        print(f"\n{title} ({len(info[key])})")
        table(["#", "name", "unit"], [[i, d["name"], d["unit"]] for i, d in enumerate(info[key])])
    print(f"\nAction ({len(info['action'])}, each in [-1, 1])")
    table(["#", "name", "physical unit"], [[i, d["name"], d["unit"]] for i, d in enumerate(info["action"])])
    print("\nGeneric perturbations (NAME.CHANNEL sets one channel, in its unit; plain NAME is every channel)")
    table(["name", "unit", "nominal", "valid range", "meaning"],
          [[s["name"], s["unit"], s["nominal"], f"[{s['low']:g}, {s['high']:g}]", s["doc"]]
           for s in info["perturbations"]])
    print(f"\nSuccess: {info['success_rule']}")
    print(f"Failure words: {', '.join(info['failure_modes'])}")
    from pretrial.sim.quality import QUALITY_WORDS

    regulated = ", ".join(f"{r['name']} (band {r['band']:g} {r['unit']})" for r in info.get("regulated", []))
    print(f"Loop quality (a sweep's success also needs it): {', '.join(QUALITY_WORDS)}; regulated: "
          f"{regulated or 'none declared (saturation and chatter only)'}")
    print(f"Reward: {info['reward']}")
    return 0


# --------------------------------------------------------------------------- #
# pretrial evolve
# --------------------------------------------------------------------------- #
def _whole(text: str, minimum: int) -> int:
    try:
        n = int(text)
    except ValueError:
        n = minimum - 1
    if n < minimum:
        raise argparse.ArgumentTypeError(f"{text!r}: expected a whole number >= {minimum}")
    return n


def _workers_arg(text: str) -> int | str:
    try:
        return text if text == "auto" else _whole(text, 1)
    except argparse.ArgumentTypeError:
        raise argparse.ArgumentTypeError(f"{text!r}: expected 'auto' or a whole number >= 1") from None


def limit_arg(name: str) -> Callable[[str], Any]:
    """An argparse ``type`` for the quantity ``name`` of :mod:`pretrial.limits` (the same range as in files).

    The table is looked up when a value is parsed: it imports the env core, which ``--help`` does not need.
    """

    def parse(text: str) -> Any:
        from pretrial import limits
        limit = getattr(limits, name)
        try:
            value: Any = int(text) if limit.whole else float(text)
        except ValueError:
            value = text
        try:
            return limit.check(value)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{text!r}: expected {limit.allowed()}") from None

    return parse


def _configure_evolve(p: argparse.ArgumentParser) -> None:
    p.add_argument("config", help="run config (TOML), e.g. configs/cartpole.toml")
    p.add_argument("--out", metavar="DIR", help="run directory (default runs/<config>-<UTC time>/)")
    p.add_argument("--seed", type=limit_arg("SEED"), help="override [run].seed")
    p.add_argument("--generations", type=lambda t: _whole(t, 1), help="override [run].generations")
    p.add_argument("--workers", type=_workers_arg, help="worker processes: N or auto (default: the config's, auto)")
    p.add_argument("--dask", metavar="ADDRESS", help="evaluate on a Dask scheduler; 'local' starts a LocalCluster")
    p.add_argument("--trust-config-dask", action="store_true",
                   help="use the scheduler the config's [run] dask names (it receives and returns pickles)")
    p.add_argument("--plan", metavar="PLAN.toml",
                   help="train against a sweep plan: its scenario, dispersions and quality limits (as [task] plan)")
    p.add_argument("--resume", metavar="RUN_DIR", help="continue an interrupted run from its last checkpoint")
    p.add_argument("--quiet", action="store_true", help="no per-generation lines")
    p.add_argument("--json", action="store_true", help="print a final JSON summary instead of text")


def _run_evolve(args: argparse.Namespace) -> int:
    import dataclasses
    import time

    from pretrial.evolution.config import load_config
    from pretrial.evolution.loop import Evolution
    from pretrial.sim.execution import make_executor

    cfg = load_config(args.config)
    if getattr(args, "plan", None):
        cfg = _with_plan(cfg, args.plan)
    run = cfg.run
    if args.seed is not None:
        run = dataclasses.replace(run, seed=args.seed)
    if args.generations is not None:
        run = dataclasses.replace(run, generations=args.generations)
    if args.workers is not None:
        run = dataclasses.replace(run, workers=args.workers)
    if args.dask is not None:
        run = dataclasses.replace(run, dask=args.dask)
    else:
        _check_config_dask(cfg.path, run.dask, args.trust_config_dask)
    cfg = dataclasses.replace(cfg, run=run)
    if args.resume:
        run_dir = Path(args.resume)
        if args.out and Path(args.out).resolve() != run_dir.resolve():
            raise InputError(f"--out {args.out}: a resumed run continues in its own directory {args.resume}; "
                             "drop --out (or copy the run directory first)")
    elif args.out:
        run_dir = Path(args.out)
    else:
        run_dir = Path("runs") / f"{cfg.name}-{time.strftime('%Y%m%d-%H%M%S', time.gmtime())}"
    quiet = args.quiet or args.json
    log = (lambda _line: None) if quiet else (lambda line: print(line, flush=True))
    with make_executor(run.workers, run.dask) as executor:
        evo = Evolution(cfg, run_dir, executor, log, command_line=["pretrial", *args.argv])
        if args.resume:
            evo.resume()
        else:
            evo.create()
            if not quiet:
                ex = executor.describe()
                print(f"evolving {cfg.task.env} from {cfg.path} (seed {run.seed}, {run.generations} generations, "
                      f"{ex['executor']} x{ex['workers']}) -> {run_dir}", flush=True)
        summary = evo.run(run.generations)
    if args.json:
        emit_json(summary)
        return 0
    print(f"\nrun directory: {run_dir}")
    print(f"champion: {summary['champion']}  (validation success {summary['validation_success_rate']:.1%} "
          f"over {cfg.run.validation_episodes} fresh episodes, {summary['evaluations']} evaluations, "
          f"{summary['seconds']:.1f} s)")
    if "predicted_verdict" in summary:
        met, judged = summary["requirements_met"]
        print(f"predicted verdict on {Path(cfg.task.plan).name}: {summary['predicted_verdict'].upper()} "
              f"({met} of {judged} requirements met on a short run; margins, worst case and sensitivity are "
              "left to the sweep)")
        for r in summary["requirements"]:
            mark = {True: "yes", False: "NO"}.get(r["pass"], "n/a")
            print(f"  {mark:3s}  {r['name']}: {fmt_number(r['measured'])} (required {fmt_number(r['required'])})")
        print(f"confirm with:  {summary['confirm']}")
    names = {c[0] for c in COMMANDS}
    nxt = []
    if "replay" in names:
        nxt.append(f"pretrial replay {run_dir} --gif {run_dir}/replay.gif")
    if "sweep" in names:
        plan = plan_beside(cfg.path, cfg.name)
        shown = Path(cfg.path).parent / "sweeps" / plan.name if plan else "PLAN.toml"
        nxt.append(f"pretrial sweep {run_dir} --plan {shown} --baseline lqr")
    if nxt:
        print("next:")
        for line in nxt:
            print(f"  {line}")
    return 0


def _with_plan(cfg: Any, plan: str) -> Any:
    """``cfg`` training against the plan at ``plan`` (``--plan``: a path from the working directory)."""
    import dataclasses

    if not Path(plan).is_file():
        raise InputError(f"--plan {plan}: no such file")
    if cfg.task.randomize:
        raise InputError(f"--plan {plan}: {cfg.path} has [task.randomize]; with a plan its [[vary]] dispersions are "
                         "the training distribution: move those ranges into the plan")
    task = dataclasses.replace(cfg.task, plan=str(Path(plan).resolve()))
    new = dataclasses.replace(cfg, task=task)
    from pretrial.evolution.loop import load_training_plan

    load_training_plan(new)  # every plan error now, before anything is written
    return new


def _check_config_dask(path: str, address: str | None, trusted: bool) -> None:
    """Refuse a remote scheduler named by a config file unless the command line confirms it.

    Work goes to a Dask scheduler as pickles and results come back as pickles, which run code when
    loaded: whoever runs that scheduler can run code here. A config file is shared and copied, so
    it may not choose a host on its own; ``local`` (a cluster on this machine) is always allowed.
    """
    if address in (None, "local") or trusted:
        return
    raise InputError(
        f"{path}: [run] dask = {address!r} would send pickled work to that scheduler and load the pickles it "
        f"returns; a config file may not choose that: give --dask {address} on the command line "
        "(or add --trust-config-dask)"
    )


def plan_beside(config_path: str | Path, name: str) -> Path | None:
    """The sweep plan for a run config: ``sweeps/NAME.toml`` beside it, else the one for
    the longest hyphen-prefix of NAME (``drone-pair-wide`` falls back to ``drone-pair``)."""
    plans = Path(config_path).resolve().parent / "sweeps"
    parts = name.split("-")
    for n in range(len(parts), 0, -1):
        plan = plans / f"{'-'.join(parts[:n])}.toml"
        if plan.is_file():
            return plan
    return None


# --------------------------------------------------------------------------- #
# entry point
# --------------------------------------------------------------------------- #
Command = tuple[str, Callable[[argparse.ArgumentParser], None], Callable[[argparse.Namespace], int]]

def _lazy(module: str) -> tuple[Callable[[argparse.ArgumentParser], None], Callable[[argparse.Namespace], int]]:
    """A command's (configure, run) pair from ``pretrial.<module>``, imported only when used."""
    import importlib

    def configure(p: argparse.ArgumentParser) -> None:
        importlib.import_module(f"pretrial.{module}").configure_cli(p)

    def run(args: argparse.Namespace) -> int:
        return importlib.import_module(f"pretrial.{module}").run_cli(args)

    return configure, run


COMMANDS: list[Command] = [
    ("envs", _configure_envs, _run_envs),
    ("evolve", _configure_evolve, _run_evolve),
    ("replay", *_lazy("playback.replay")),
    ("sweep", *_lazy("analysis.sweep")),
    ("export", *_lazy("export.exporter")),
    ("calibrate", *_lazy("calibration.calibrate")),
]

HELP = {
    "envs": "list the environments, or show one's parameters, spaces and success rule",
    "evolve": "evolve a controller with NEAT from a run config",
    "replay": "replay a policy (or the LQR baseline) and measure what it does",
    "sweep": "run a perturbation plan: margins, Monte Carlo, worst case, linear margins, verdict",
    "export": "write a policy as dependency-free C99 or Python for the target",
    "calibrate": "estimate plant parameters from bench logs, with bootstrap intervals",
}


class _Parser(argparse.ArgumentParser):
    """argparse that reports usage errors as one line with exit code 2."""

    def error(self, message: str) -> None:  # type: ignore[override]
        self.exit(2, f"{self.prog}: error: {message} (see --help)\n")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="pretrial",
        description="Evolve neural controllers with NEAT and measure how far they can be trusted "
        "before a hardware trial.",
    )
    parser.add_argument("--version", action="version", version=f"pretrial {__version__}")
    parser.add_argument("--debug", action="store_true", help="show a traceback on errors")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for name, configure, run in COMMANDS:
        p = sub.add_parser(name, help=HELP[name], description=HELP[name])
        configure(p)
        p.set_defaults(_run=run)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return 2
    # what the manifest records: the words actually given, also when main() is called with a list
    args.argv = list(sys.argv[1:] if argv is None else argv)
    try:
        with stop_on_signals():
            return int(args._run(args) or 0)
    except PretrialError as exc:
        if args.debug:
            traceback.print_exc()
        print(f"pretrial: error: {exc.message}", file=sys.stderr)
        return exc.exit_code
    except Terminated:
        print("pretrial: terminated (SIGTERM)", file=sys.stderr)
        return EXIT_TERMINATED
    except KeyboardInterrupt:
        print("pretrial: interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED
    except BrokenPipeError:
        # output piped into e.g. `head`, which closed early: not an error of ours
        sys.stderr.close()
        return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
