"""``pretrial evolve``: a run config in, a run directory out (the loop is :mod:`pretrial.evolution.loop`)."""

from __future__ import annotations

import argparse
from pathlib import Path

from pretrial.cli.args import limit_arg, whole, workers_arg
from pretrial.console import emit_json, fmt_number
from pretrial.errors import InputError
from pretrial.evolution.config import plan_beside
from pretrial.sim.compiled import ENGINES


def configure(p: argparse.ArgumentParser) -> None:
    p.add_argument("config", help="run config (TOML), e.g. configs/cartpole.toml")
    p.add_argument("--out", metavar="DIR", help="run directory (default runs/<config>-<UTC time>/)")
    p.add_argument("--seed", type=limit_arg("SEED"), help="override [run].seed")
    p.add_argument("--generations", type=lambda t: whole(t, 1), help="override [run].generations")
    p.add_argument("--workers", type=workers_arg, help="worker processes: N or auto (default: the config's, auto)")
    p.add_argument("--engine", choices=ENGINES,
                   help="what runs the episodes: numpy (the reference) or compiled (numba, pip install "
                        "'pretrial[fast]': the cart-pole's nominal loop, many times faster); default: the config's")
    p.add_argument("--dask", metavar="ADDRESS", help="evaluate on a Dask scheduler; 'local' starts a LocalCluster")
    p.add_argument("--trust-config-dask", action="store_true",
                   help="use the scheduler the config's [run] dask names (it receives and returns pickles)")
    p.add_argument("--plan", metavar="PLAN.toml",
                   help="train against a sweep plan: its scenario, dispersions and quality limits (as [task] plan)")
    p.add_argument("--resume", metavar="RUN_DIR", help="continue an interrupted run from its last checkpoint")
    p.add_argument("--quiet", action="store_true", help="no per-generation lines")
    p.add_argument("--json", action="store_true", help="print a final JSON summary instead of text")


def run(args: argparse.Namespace) -> int:
    import time

    from pretrial.evolution.config import load_config, with_overrides
    from pretrial.evolution.loop import Evolution
    from pretrial.evolution.task import with_plan
    from pretrial.sim.execution import make_executor

    cfg = load_config(args.config)
    if getattr(args, "plan", None):
        cfg = with_plan(cfg, args.plan)
    if args.dask is None:
        _check_config_dask(cfg.path, cfg.run.dask, args.trust_config_dask)
    cfg = with_overrides(cfg, seed=args.seed, generations=args.generations, workers=args.workers, dask=args.dask,
                         engine=args.engine)
    run = cfg.run
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
                      f"{ex['executor']} x{ex['workers']}{', compiled engine' if run.engine == 'compiled' else ''}) "
                      f"-> {run_dir}", flush=True)
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
    if cfg.task.plan:  # the plan trained against is the one to sweep with
        shown: Path | str = cfg.task.plan
    else:
        plan = plan_beside(cfg.path, cfg.name)
        shown = Path(cfg.path).parent / "sweeps" / plan.name if plan else "PLAN.toml"
    print("next:")
    print(f"  pretrial replay {run_dir} --gif {run_dir}/replay.gif")
    print(f"  pretrial sweep {run_dir} --plan {shown} --baseline lqr")
    return 0


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


