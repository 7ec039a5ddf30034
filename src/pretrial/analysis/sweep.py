"""``pretrial sweep``: a controller and a plan in, a sweep directory out.

The sweep directory holds ``results.json`` (schema "pretrial.sweep" version 1,
documented in the README; no clock times, so a rerun gives an equal file),
``montecarlo.csv``, ``margins.csv``, plots, ``report.md``, ``report.html`` and
``manifest.json`` (versions, times, command line, executor). It is written
into a temporary sibling directory (the Monte Carlo samples stream into its
``montecarlo.csv`` as they finish) and renamed into place at the end, so an
error or Ctrl-C never leaves a partial sweep directory behind.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import shutil
import sys
import tempfile
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

from pretrial import __version__
from pretrial.analysis.plan import Plan, load_plan
from pretrial.console import CAUTIONS, Progress, emit_json, fmt_number, print_cautions, table
from pretrial.errors import InputError
from pretrial.files import canonical_json, check_writable_dir, sha256_hex, write_json
from pretrial.sim.perturb import diverged_warning
from pretrial.sim.plant import check_workers_can_build
from pretrial_envs.core import Physics

if TYPE_CHECKING:
    from pretrial.analysis.samples import SampleHistograms

LQR = "lqr"
SCHEMA = "pretrial.sweep"
SCHEMA_VERSION = 1
#: exit status of ``pretrial sweep`` by verdict, so a pipeline can gate on it
EXIT_PASS = 0
EXIT_FAIL = 1
EPILOG = """exit status:
  0  verdict PASS (every requirement of the plan met)
  1  verdict FAIL (the sweep directory is written all the same)
  2  bad input (one-line error; nothing written)
  130  interrupted (Ctrl-C; no partial sweep directory)
  143  terminated (SIGTERM, e.g. from timeout or a batch scheduler; no partial sweep directory)"""


@dataclass
class Controlled:
    """A controller on its plant as a plan configures it: what a sweep point and a replay both run."""

    controller: Any
    physics: Physics
    base_params: dict[str, float]
    plan: Plan | None
    env_id: str
    policy_kind: str  # "file" | "lqr"
    policy_path: str | None
    policy_hash: str | None
    env_options: dict[str, Any]


def _plant(env_id: str, options: dict[str, Any], where: str) -> Physics:
    from pretrial.sim.plant import make_plant

    try:
        return make_plant(env_id, **options)
    except InputError as exc:
        raise InputError(f"{where}: {exc.message}") from None
    except (TypeError, ValueError) as exc:
        raise InputError(f"{where}: {exc}") from None


#: said first when the controller was evolved against the very plan it is swept with
TRAINED_ON_PLAN = ("This controller was trained against this plan's distribution: the Monte Carlo draws fresh "
                   "samples, so its estimate is honest for that distribution, but it is the distribution the "
                   "controller was tuned for; a rig outside it is not covered.")


def _scenario_head(plan_path: str) -> tuple[str | None, dict[str, Any], dict[str, Any]]:
    """The plan's env, options and start ranges, read before the plant exists."""
    from pretrial.evolution.config import read_toml

    data, _ = read_toml(plan_path)
    if "task" in data and "scenario" not in data:
        raise InputError(f"{plan_path}: is a run config (it has [task]), not a sweep plan (see configs/sweeps/)")
    scen = data.get("scenario", {})
    if not isinstance(scen, dict):
        raise InputError(f"{plan_path}: scenario: expected a table")
    env = scen.get("env")
    if env is not None and not isinstance(env, str):
        raise InputError(f"{plan_path}: scenario.env: expected an environment id string, got {env!r}")
    options = scen.get("options", {})
    start = scen.get("start", {})
    if not isinstance(options, dict):
        raise InputError(f"{plan_path}: scenario.options: expected a table")
    if not isinstance(start, dict):
        raise InputError(f"{plan_path}: scenario.start: expected a table of state name = half-range")
    return env, options, start


def controlled(policy_arg: str, plan_path: str | None, env: str | None = None) -> Controlled:
    """Resolve POLICY (a file, a run directory or ``lqr``), the plan's scenario and ``--env``.

    The LQR baseline is designed on the plan's model (its ``[scenario.params]``)
    with the plan's ``[baseline]`` weights; it is not told what a sweep point
    or a ``--set`` changes.
    """
    from pretrial.playback.replay import env_id_of

    plan_env, plan_options, plan_start = _scenario_head(plan_path) if plan_path else (None, {}, {})
    if plan_env is not None:
        try:
            env_id_of(plan_env)
        except InputError as exc:
            raise InputError(f"{plan_path}: scenario.env: {exc.message}") from None
    where = f"{plan_path}: scenario.options" if plan_path else "--env"
    if policy_arg == LQR:
        name = env or plan_env
        if name is None:
            where_env = f"{plan_path}: scenario.env: " if plan_path else ""
            raise InputError(f"{where_env}lqr: name the environment (the plan's [scenario].env, or --env)")
        env_id = env_id_of(name)
        options = dict(plan_options)
        policy = None
    else:
        from pretrial.controller.policy import open_policy

        policy = open_policy(policy_arg)
        env_id = policy.env_id
        named = env or plan_env
        if named is not None and env_id_of(named) != env_id:
            raise InputError(f"{plan_path or '--env'}: the env is {env_id_of(named)}, but the policy {policy_arg} "
                             f"was trained on {env_id}")
        options = dict(policy.env_options)
        for k, v in plan_options.items():
            if k in ("poles", "observe", "hoist") and options.get(k, v) != v:
                raise InputError(f"{where}.{k}: {v!r} does not fit the policy (trained with {k}={options[k]!r})")
            options[k] = v
    if plan_start:
        spread = dict(options.get("start_spread") or {})
        spread.update(plan_start)
        options["start_spread"] = spread
    physics = _plant(env_id, options, where)
    plan = load_plan(plan_path, physics, None) if plan_path else None
    base = dict(policy.env_params) if policy is not None else {}
    if plan is not None:
        base.update(plan.params)
    try:
        physics.param_table.resolve(base)
    except ValueError as exc:
        raise InputError(f"{plan_path}: scenario.params: {exc}") from None
    if policy is not None:
        sizes = (physics.obs_dim, physics.action_dim)
        if sizes != (policy.io.obs_dim, policy.io.action_dim):
            raise InputError(f"{policy_arg}: takes {policy.io.obs_dim} observations and gives {policy.io.action_dim} "
                             f"actions; {env_id} with these options has {sizes[0]} and {sizes[1]}")
        return Controlled(policy, physics, base, plan, env_id, "file", str(policy_arg), policy.content_hash,
                          options)
    return Controlled(baseline_lqr(physics, base, plan), physics, base, plan, env_id, "lqr", None, None, options)


def baseline_lqr(physics: Physics, base: dict[str, float], plan: Plan | None) -> Any:
    """The LQR baseline designed on the plan's model."""
    from pretrial.analysis.lqr import design_lqr

    try:
        return design_lqr(physics, params=base or None, q=plan.lqr_q if plan else None, r=plan.lqr_r if plan else None)
    except ValueError as exc:
        raise InputError(f"lqr: {exc}") from None


# --------------------------------------------------------------------------- #
# the run
# --------------------------------------------------------------------------- #
def _results_skeleton(ctl: Controlled, plan: Plan, policy_arg: str) -> dict[str, Any]:
    return {
        "schema": SCHEMA, "schema_version": SCHEMA_VERSION,
        "policy": {"kind": ctl.policy_kind, "path": ctl.policy_path, "content_sha256": ctl.policy_hash},
        "env": {"id": ctl.env_id, "options": ctl.env_options, "params": ctl.base_params},
        "plan": {"path": plan.path, "content_sha256": plan.content_hash(), "resolved": plan.to_dict()},
        "seed": plan.seed, "required_success_rate": plan.required_success_rate,
        "episodes_per_point": plan.episodes,
    }


@dataclass
class Prepared:
    """What a sweep runs, checked before its first episode: the controller under test and the baseline."""

    ctl: Controlled
    baseline: Any | None  # the LQR baseline designed on the plan's model, when asked for


def prepare(policy_arg: str, plan_path: str, baseline: bool = False) -> Prepared:
    """Check that POLICY, the plan and the baseline fit together, before any work starts.

    Raises
    ------
    InputError
        A policy or plan that does not fit (see :func:`controlled`); ``--baseline lqr`` on the LQR
        baseline itself; a baseline the plant cannot have (the LQR design needs the full state
        observed and a plant linearizable at its target).
    """
    ctl = controlled(policy_arg, plan_path)
    if ctl.plan is None:  # pragma: no cover - plan_path is required
        raise InputError("--plan: a sweep needs a plan")
    lqr = None
    if baseline:
        if ctl.policy_kind == LQR:
            raise InputError("--baseline lqr: the controller under test is already the LQR baseline")
        try:
            lqr = baseline_lqr(ctl.physics, ctl.base_params, ctl.plan)
        except InputError as exc:
            # named with the plan: its scenario (options, params) is what the design could not use
            raise InputError(f"--baseline lqr: {plan_path}: {exc.message.removeprefix('lqr: ')}") from None
    return Prepared(ctl, lqr)


def sweep(policy_arg: str, plan_path: str, executor: Any, *, baseline: bool = False,
          log: Any = None, progress: bool = True, prepared: Prepared | None = None, stage: Path | None = None
          ) -> tuple[dict[str, Any], SampleHistograms | None]:
    """Run a plan on a controller (and on the LQR baseline when asked).

    ``prepared`` is :func:`prepare`'s result when the caller checked the inputs already.
    ``stage`` is the hidden directory the sweep is written into (:func:`staged`): the Monte Carlo
    samples stream into its ``montecarlo.csv`` as they finish, and the scratch file that
    aggregates them lives there (without ``stage`` no CSV is written).
    Returns the results document (with its content hash) and the Monte Carlo histograms.
    """
    from pretrial.analysis.campaign import Campaign, planned_episodes, run_analyses

    prep = prepared or prepare(policy_arg, plan_path, baseline)
    ctl, plan, lqr = prep.ctl, prep.ctl.plan, prep.baseline
    assert plan is not None and (lqr is not None) == baseline
    say = log or (lambda _line: None)
    total = planned_episodes(plan, ctl.physics) * (2 if baseline else 1)
    bar = Progress(total, "episodes") if progress else None
    tick = bar.advance if bar is not None else None
    try:
        check_workers_can_build(ctl.physics, executor)
        say(f"sweeping {policy_arg} on {ctl.env_id} with {plan.path} ({', '.join(plan.analyses)})")
        camp = Campaign(ctl.physics, ctl.controller, ctl.base_params, plan, executor, policy_arg, tick)
        part, samples = run_analyses(camp, say, stage / "montecarlo.csv" if stage else None, stage)
        results = _results_skeleton(ctl, plan, policy_arg) | part
        results["baseline"] = None
        if lqr is not None:
            say("baseline: the same plan on the LQR baseline")
            base_camp = Campaign(ctl.physics, lqr, ctl.base_params, plan, executor, LQR, tick)
            base_part, _ = run_analyses(base_camp, say, None, stage)
            results["baseline"] = {"kind": LQR, "controller": lqr.describe(), **base_part}
    finally:
        if bar is not None:
            bar.close()
    for who, part in (("", results), ("LQR baseline", results.get("baseline") or {})):
        d = part.get("diverged")
        if d:
            print(f"{diverged_warning(d['episodes'], d['where'], context=who)}; replay one: {d['first']['replay']}",
                  file=sys.stderr)
    results["cautions"] = list(CAUTIONS)
    trained = (getattr(ctl.controller, "training", None) or {}).get("plan") or {}
    if trained.get("content_sha256") == plan.content_hash():
        results["cautions"].insert(0, TRAINED_ON_PLAN)
    from pretrial.console import jsonable

    results = jsonable(results)
    results["content_sha256"] = sha256_hex(canonical_json(results))
    return results, samples


def _default_out(plan: str, policy_arg: str) -> Path:
    who = "lqr" if policy_arg == LQR else Path(policy_arg).stem if Path(policy_arg).suffix else Path(policy_arg).name
    stamp = time.strftime("%Y%m%d-%H%M%S", time.gmtime())
    return Path("sweeps") / f"{Path(plan).stem}-{who}-{stamp}"


@contextmanager
def staged(out: Path) -> Iterator[Path]:
    """A hidden sibling of ``out`` (``.NAME.partial-*``) to write the sweep into.

    :func:`write_outputs` renames it into place when everything is written; on any error or
    Ctrl-C before that it is removed, so no partial sweep directory is ever left behind
    (only ``kill -9`` can leave the hidden one).
    """
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.partial-", dir=out.parent))
    try:
        tmp.chmod(0o777 & ~_umask())  # mkdtemp makes it 0700; the sweep directory follows the umask like mkdir
        yield tmp
    finally:
        shutil.rmtree(tmp, ignore_errors=True)  # gone already once renamed into place


def write_outputs(out: Path, results: dict[str, Any], samples: Any, manifest: dict[str, Any],
                  stage: Path | None = None) -> list[Path]:
    """Write the sweep directory: into the hidden ``stage`` (:func:`staged`; a new one if None), renamed into place.

    ``samples`` are the Monte Carlo histograms (or per-sample arrays) for the report's plot;
    ``montecarlo.csv`` is already in ``stage``, streamed there by the sweep.
    """
    from pretrial.report.sweep_report import write_report

    if stage is None:
        with staged(out) as tmp:
            return write_outputs(out, results, samples, manifest, tmp)
    write_json(stage / "results.json", results)
    write_report(results, stage, samples)
    write_json(stage / "manifest.json", manifest)
    if out.exists():
        out.rmdir()  # empty (checked before the work started)
    os.replace(stage, out)
    return sorted(out.iterdir())


def _umask() -> int:
    """The process umask (read by setting it, then restoring it at once)."""
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def _check_out(out: Path) -> None:
    if out.exists() and (not out.is_dir() or any(out.iterdir())):
        what = "a file" if not out.is_dir() else "a directory that is not empty"
        raise InputError(f"--out {out}: is {what}; choose a new directory (nothing is overwritten)")
    check_writable_dir(out, label=f"--out {out}")  # found out now, not after the work


# --------------------------------------------------------------------------- #
# command line
# --------------------------------------------------------------------------- #
def configure_cli(p: argparse.ArgumentParser) -> None:
    """Arguments of ``pretrial sweep``."""
    from pretrial.cli.main import _workers_arg

    p.epilog = EPILOG
    p.formatter_class = argparse.RawDescriptionHelpFormatter  # keep the exit-status lines as written
    p.add_argument("policy", metavar="POLICY", help="policy file, run directory (its champion.json), or 'lqr'")
    p.add_argument("--plan", required=True, metavar="PLAN.toml", help="sweep plan, e.g. configs/sweeps/cartpole.toml")
    p.add_argument("--out", metavar="DIR", help="sweep directory (default sweeps/<plan>-<policy>-<UTC time>/)")
    p.add_argument("--workers", type=_workers_arg, default="auto", help="worker processes: N or auto (default auto)")
    p.add_argument("--dask", metavar="ADDRESS", help="run on a Dask scheduler; 'local' starts a LocalCluster")
    p.add_argument("--baseline", choices=[LQR], help="also run the plan on the LQR baseline, side by side")
    p.add_argument("--json", action="store_true", help="print the results as one JSON object instead of text")


def run_cli(args: argparse.Namespace) -> int:
    """Run ``pretrial sweep``."""
    from pretrial.sim.execution import make_executor

    out = Path(args.out) if args.out else _default_out(args.plan, args.policy)
    _check_out(out)
    baseline = args.baseline == LQR
    prepared = prepare(args.policy, args.plan, baseline)  # refused now, not after the policy's sweep
    quiet = args.json
    log = (lambda _l: None) if quiet else (lambda line: print(line, flush=True))
    started = time.time()
    with staged(out) as stage:
        with make_executor(args.workers, args.dask) as executor:
            results, samples = sweep(args.policy, args.plan, executor, baseline=baseline, log=log,
                                     progress=not quiet and sys.stderr.isatty(), prepared=prepared, stage=stage)
            ex = executor.describe()
        manifest = {
            "pretrial": __version__, "python": platform.python_version(), "platform": platform.platform(),
            "command": ["pretrial", *getattr(args, "argv", [])], "started_utc": time.strftime(
                "%Y-%m-%dT%H:%M:%SZ", time.gmtime(started)), "seconds": round(time.time() - started, 3),
            "executor": ex, "results_sha256": results["content_sha256"], "versions": _versions(),
        }
        files = write_outputs(out, results, samples, manifest, stage)
    if args.json:
        emit_json({**results, "directory": str(out), "files": [str(f) for f in files]})
    else:
        print_results(results, out)
    return exit_code(results)


def exit_code(results: dict[str, Any]) -> int:
    """The verdict as an exit status: 0 pass, 1 fail (bad input is 2, Ctrl-C 130 and SIGTERM 143, from the CLI)."""
    return EXIT_PASS if results.get("verdict") == "pass" else EXIT_FAIL


def _versions() -> dict[str, str]:
    from importlib.metadata import PackageNotFoundError, version

    out = {}
    for name in ("numpy", "scipy", "gymnasium", "neat-python", "matplotlib"):
        try:
            out[name] = version(name)
        except PackageNotFoundError:
            pass
    return out


def _with_interval(req: dict[str, Any]) -> str:
    """A requirement's measured value, with its Wilson 95% interval where it is a rate."""
    text = fmt_number(req["measured"])
    ci = req.get("interval")
    return f"{text} (95% {fmt_number(ci[0])} to {fmt_number(ci[1])})" if ci else text


def print_results(results: dict[str, Any], out: Path) -> None:
    """The text summary: verdict first, then requirements and the main evidence."""
    v = results["verdict"].upper()
    failed = [r["name"] for r in results["requirements"] if r["pass"] is False]
    print(f"\nverdict: {v}" + (f"  (failing: {'; '.join(failed)})" if failed else ""))
    table(["requirement", "required", "measured", "pass"],
          [[r["name"], fmt_number(r["required"]), _with_interval(r), {True: "yes", False: "NO"}.get(r["pass"], "n/a")]
           for r in results["requirements"]])
    if results.get("margins"):
        print("\nmargins (one at a time; edge = last value meeting the required rate)")
        table(["name", "unit", "nominal", "low", "high", "low ratio", "high ratio", "failure past low",
               "failure past high"],
              [[m["name"], m["unit"], fmt_number(m["nominal"]),
                fmt_number(m["low"]) + (" (range end)" if m["low_limit_reached"] else ""),
                fmt_number(m["high"]) + (" (range end)" if m["high_limit_reached"] else ""),
                fmt_number(m["low_ratio"]) if m["low_ratio"] is not None else "-",
                fmt_number(m["high_ratio"]) if m["high_ratio"] is not None else "-",
                m["low_failure"] or "-", m["high_failure"] or "-"] for m in results["margins"]])
    mc = results.get("montecarlo")
    if mc:
        modes = ", ".join(f"{k} {n}" for k, n in mc["failure_modes"].items()) or "none"
        print(f"\nMonte Carlo: {mc['successes']}/{mc['samples']} succeeded ({mc['success_rate']:.2%}, "
              f"95% interval {mc['ci95'][0]:.2%} to {mc['ci95'][1]:.2%}); failures: {modes}")
        if mc["worst"]:
            print(f"  worst sample: {mc['worst'][0]['replay']}")
    wc = results.get("worstcase")
    if wc:
        vals = ", ".join(f"{k}={fmt_number(x)}" for k, x in wc["values"].items())
        print(f"\nworst case found: score {fmt_number(wc['score'])} at {vals} "
              f"(success {_rate_text(wc['success_rate'], wc['episodes'])}, {wc['failure'] or 'no failure'})"
              f"\n  {wc['replay']}")
    for key, title in (("linear", "linear (continuous)"), ("linear_sampled", "linear (sampled)")):
        if results.get(key) is None:
            continue
        det = results["linear_details"]["continuous" if key == "linear" else "sampled"]
        if not det["linearizable"]:
            print(f"\n{title}: not linearizable: {det['reason']}")
            continue
        print(f"\n{title}")
        table(["channel", "gain margin low", "gain margin high", "gain margin dB", "phase margin deg",
               "delay margin s", "disk margin"],
              [[c["channel"], fmt_number(c["gain_margin_low"]),
                "none" if c["gain_margin_high"] is None else fmt_number(c["gain_margin_high"]),
                fmt_number(c["gain_margin_db"]), fmt_number(c["phase_margin_deg"]), fmt_number(c["delay_margin_s"]),
                fmt_number(c["disk_margin"])] for c in results[key]])
    base = results.get("baseline")
    if base:
        print(f"\nLQR baseline, same plan: verdict {base['verdict'].upper()}")
        bmc = base.get("montecarlo")
        if bmc and mc:
            print(f"  Monte Carlo success: policy {_rate_text(mc['success_rate'], mc['samples'])}, "
                  f"LQR {_rate_text(bmc['success_rate'], bmc['samples'])}")
    print(f"\nsweep directory: {out}  (report.html, report.md, results.json)")
    print_cautions()


def _rate_text(rate: float, n: int) -> str:
    """``"97.50% (39 of 40; 95% interval 87.12% to 99.56%)"``: a rate with its Wilson interval."""
    from pretrial.analysis.campaign import wilson_interval

    k = round(rate * n)  # the rates stored are k / n exactly
    lo, hi = wilson_interval(k, n)
    return f"{rate:.2%} ({k} of {n}; 95% interval {float(lo):.2%} to {float(hi):.2%})"


def _no_constant(text: str) -> Any:
    raise ValueError(f"{text} is not a number a results file may hold (written with allow_nan=False)")


def _is_int(v: Any) -> bool:
    return isinstance(v, int) and not isinstance(v, bool)


def _is_number(v: Any) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool)


def _is_dict_or_none(v: Any) -> bool:
    return v is None or isinstance(v, dict)


def _is_list_or_none(v: Any) -> bool:
    return v is None or isinstance(v, list)


#: top-level keys of results.json (schema version 1, README "results.json") -> (check, what it must be)
_RESULTS_KEYS: dict[str, tuple[Any, str]] = {
    "policy": (lambda v: isinstance(v, dict), "an object"),
    "env": (lambda v: isinstance(v, dict), "an object"),
    "plan": (lambda v: isinstance(v, dict), "an object"),
    "seed": (_is_int, "a whole number"),
    "required_success_rate": (_is_number, "a number"),
    "episodes_per_point": (_is_int, "a whole number"),
    "margins": (_is_list_or_none, "a list or null"),
    "montecarlo": (_is_dict_or_none, "an object or null"),
    "worstcase": (_is_dict_or_none, "an object or null"),
    "sensitivity": (_is_dict_or_none, "an object or null"),
    "success_map": (_is_dict_or_none, "an object or null"),
    "linear": (_is_list_or_none, "a list or null"),
    "linear_sampled": (_is_list_or_none, "a list or null"),
    "linear_details": (_is_dict_or_none, "an object or null"),
    "integrator_check": (_is_dict_or_none, "an object or null"),
    "diverged": (_is_dict_or_none, "an object or null"),
    "requirements": (lambda v: isinstance(v, list), "a list"),
    "verdict": (lambda v: v in ("pass", "fail"), '"pass" or "fail"'),
    "baseline": (_is_dict_or_none, "an object or null"),
    "cautions": (lambda v: isinstance(v, list) and all(isinstance(c, str) for c in v), "a list of text"),
    "content_sha256": (lambda v: isinstance(v, str), "text (a SHA-256)"),
}


def _check_results_schema(p: Path, doc: dict[str, Any]) -> None:
    """Refuse a results document of another schema version, or missing a top-level key or of the wrong type."""
    version = doc.get("schema_version")
    if not _is_int(version) or version != SCHEMA_VERSION:
        raise InputError(f"{p}: schema_version {version!r} is not one this pretrial reads ({SCHEMA_VERSION})")
    for key, (ok, what) in _RESULTS_KEYS.items():
        if key not in doc:
            raise InputError(f"{p}: not a complete sweep results file ('{key}' is missing)")
        if not ok(doc[key]):
            raise InputError(f"{p}: '{key}' must be {what}, not {type(doc[key]).__name__}")


def read_results(path: str | Path) -> dict[str, Any]:
    """Read a results.json back, refusing an edited or damaged file."""
    p = Path(path)
    try:
        doc = json.loads(p.read_text(encoding="utf-8"), parse_constant=_no_constant)
    except FileNotFoundError:
        raise InputError(f"{p}: no such file") from None
    except (OSError, UnicodeDecodeError, ValueError, RecursionError) as exc:  # ValueError: bad JSON, NaN, huge ints
        raise InputError(f"{p}: not a readable results file ({exc})") from None
    if not isinstance(doc, dict) or doc.get("schema") != SCHEMA:
        raise InputError(f"{p}: not a pretrial sweep results file")
    _check_results_schema(p, doc)  # before the hash: anyone can compute a hash over a made-up file
    stored = doc.pop("content_sha256", None)
    if stored != sha256_hex(canonical_json(doc)):
        raise InputError(f"{p}: content hash mismatch: the file was edited or damaged")
    doc["content_sha256"] = stored
    return doc
