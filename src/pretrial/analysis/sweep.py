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

import platform
import time
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

from pretrial.analysis.plan import Plan, load_plan, scenario_head
from pretrial.analysis.results import SCHEMA, SCHEMA_VERSION, SweepResults, seal, write_results
from pretrial.analysis.trust import envelope_caution
from pretrial.console import CAUTIONS, Progress
from pretrial.errors import InputError
from pretrial.files import check_new_dir, move_into_place, staged, write_json
from pretrial.log import warn as log_warning
from pretrial.provenance import versions
from pretrial.sim.hybrid import check_trained_residual, residual_record
from pretrial.sim.perturb import diverged_warning
from pretrial.sim.plant import build_plant, check_workers_can_build, env_id_of
from pretrial.version import __version__
from pretrial_envs.core import Physics

if TYPE_CHECKING:
    from pretrial.analysis.samples import SampleHistograms

LQR = "lqr"
#: Version of the noise draws new sweeps make (:data:`pretrial.sim.streams.STREAM_VERSIONS`), recorded
#: in results.json as ``stream_version`` (a file without it was made with version 1) and named by
#: the replay commands when it is not 1 (``pretrial replay --stream-version``). It stays 1: measured on
#: the cart-pole demo sweep (2 runs each, one worker), version 2 takes 2-4 % less wall time, which does
#: not pay for changing the numbers of every noisy plan against sweeps made before.
SWEEP_STREAM_VERSION = 1


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


#: said first when the controller was evolved against the very plan it is swept with
TRAINED_ON_PLAN = ("This controller was trained against this plan's distribution: the Monte Carlo draws fresh "
                   "samples, so its estimate is honest for that distribution, but it is the distribution the "
                   "controller was tuned for; a rig outside it is not covered.")


def controlled(policy_arg: str, plan_path: str | None, env: str | None = None, policy: Any = None
               ) -> Controlled:
    """Resolve POLICY (a file, a run directory or ``lqr``), the plan's scenario and ``--env``.

    The LQR baseline is designed on the plan's model (its ``[scenario.params]``)
    with the plan's ``[baseline]`` weights; it is not told what a sweep point
    or a ``--set`` changes. ``policy``, when given, is the loaded policy (``policy_arg`` then labels it).
    """
    plan_env, plan_options, plan_start = scenario_head(plan_path) if plan_path else (None, {}, {})
    if plan_env is not None:
        try:
            env_id_of(plan_env)
        except InputError as exc:
            raise InputError(f"{plan_path}: scenario.env: {exc.message}") from None
    where = f"{plan_path}: scenario.options" if plan_path else "--env"
    if policy_arg == LQR and policy is None:
        name = env or plan_env
        if name is None:
            where_env = f"{plan_path}: scenario.env: " if plan_path else ""
            raise InputError(f"{where_env}lqr: name the environment (the plan's [scenario].env, or --env)")
        env_id = env_id_of(name)
        options = dict(plan_options)
        policy = None
    else:
        from pretrial.controller.policy import open_policy

        policy = open_policy(policy_arg) if policy is None else policy
        env_id = policy.env_id
        named = env or plan_env
        if named is not None and env_id_of(named) != env_id:
            raise InputError(f"{plan_path or '--env'}: the env is {env_id_of(named)}, but the policy {policy_arg} "
                             f"was trained on {env_id}")
        options = dict(policy.env_options)
        for k, v in plan_options.items():
            if k in ("poles", "observe", "hoist", "integral") and options.get(k, v) != v:
                raise InputError(f"{where}.{k}: {v!r} does not fit the policy (trained with {k}={options[k]!r})")
            options[k] = v
    if plan_start:
        spread = dict(options.get("start_spread") or {})
        spread.update(plan_start)
        options["start_spread"] = spread
    physics = build_plant(env_id, options, where)
    plan = load_plan(plan_path, physics, None) if plan_path else None
    base = dict(policy.env_params) if policy is not None else {}
    if plan is not None:
        base.update(plan.params)
    try:
        physics.param_table.resolve(base)
    except ValueError as exc:
        raise InputError(f"{plan_path}: scenario.params: {exc}") from None
    if policy is not None:
        check_trained_residual(policy, physics, str(policy_arg),
                               where if "residual" in plan_options else f"{policy_arg}: env.options")
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
        "episodes_per_point": plan.episodes, "stream_version": SWEEP_STREAM_VERSION,
        # the learned residual swept on, and the one the policy was trained on (None: physics alone)
        "residual": None if ctl.physics.residual is None else {
            **residual_record(ctl.physics),
            "trained_on": (getattr(ctl.controller, "training", None) or {}).get("residual")},
    }


@dataclass
class Prepared:
    """What a sweep runs, checked before its first episode: the controller under test and the baseline."""

    ctl: Controlled
    baseline: Any | None  # the LQR baseline designed on the plan's model, when asked for


def prepare(policy_arg: str, plan_path: str, baseline: bool = False, policy: Any = None) -> Prepared:
    """Check that POLICY, the plan and the baseline fit together, before any work starts.

    ``policy``, when given, is the loaded policy under test (``policy_arg`` then labels it).

    Raises
    ------
    InputError
        A policy or plan that does not fit (see :func:`controlled`); ``--baseline lqr`` on the LQR
        baseline itself; a baseline the plant cannot have (the LQR design needs the full state
        observed and a plant linearizable at its target).
    """
    ctl = controlled(policy_arg, plan_path, policy=policy)
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
    from pretrial.analysis.campaign import Campaign, run_analyses
    from pretrial.analysis.plan import planned_episodes

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
        camp = Campaign(ctl.physics, ctl.controller, ctl.base_params, plan, executor, policy_arg, tick,
                        SWEEP_STREAM_VERSION)
        part, samples = run_analyses(camp, say, stage / "montecarlo.csv" if stage else None, stage)
        results = _results_skeleton(ctl, plan, policy_arg) | part
        results["baseline"] = None
        if lqr is not None:
            say("baseline: the same plan on the LQR baseline")
            base_camp = Campaign(ctl.physics, lqr, ctl.base_params, plan, executor, LQR, tick, SWEEP_STREAM_VERSION)
            base_part, _ = run_analyses(base_camp, say, None, stage)
            results["baseline"] = {"kind": LQR, "controller": lqr.describe(), **base_part}
    finally:
        if bar is not None:
            bar.close()
    for who, part in (("", results), ("LQR baseline", results.get("baseline") or {})):
        d = part.get("diverged")
        if d:
            first = d["first"]["replay"]
            log_warning(f"{diverged_warning(d['episodes'], d['where'], context=who)}; replay one: {first}")
    results["cautions"] = list(CAUTIONS)
    trained = (getattr(ctl.controller, "training", None) or {}).get("plan") or {}
    if trained.get("content_sha256") == plan.content_hash():
        results["cautions"].insert(0, TRAINED_ON_PLAN)
    for who, part in (("", results), ("LQR baseline", results.get("baseline") or {})):
        extrapolated = envelope_caution(part.get("envelope"), who)
        if extrapolated:
            results["cautions"].insert(0 if not who else 1, extrapolated)
    return seal(results), samples


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
    write_results(stage / "results.json", results)
    write_report(results, stage, samples)
    write_json(stage / "manifest.json", manifest)
    move_into_place(stage, out)
    return sorted(out.iterdir())


# --------------------------------------------------------------------------- #
# command line
# --------------------------------------------------------------------------- #


def default_out(plan: str, policy_arg: str) -> Path:
    """``sweeps/<plan>-<policy>-<UTC time>``: where a sweep goes when no directory is named."""
    who = "lqr" if policy_arg == LQR else Path(policy_arg).stem if Path(policy_arg).suffix else Path(policy_arg).name
    stamp = time.strftime("%Y%m%d-%H%M%S", time.gmtime())
    return Path("sweeps") / f"{Path(plan).stem}-{who}-{stamp}"


def run_sweep(policy: Any, plan: str | Path, out: str | Path | None = None, *, baseline: bool = False,
              workers: int | str | None = "auto", dask: str | None = None, log: Any = None, progress: bool = False,
              command: Sequence[str] = ()) -> tuple[SweepResults, list[Path]]:
    """Run a plan on a controller and write the sweep directory; the command's and the API's one path.

    Parameters
    ----------
    policy : path-like, ``"lqr"`` or Policy
        A policy file, a run directory (its champion), the LQR baseline, or a loaded policy (written
        into the sweep directory as ``policy.json``, which its replay commands name).
    plan : path-like
        The sweep plan (TOML).
    out : path-like, optional
        A new (or empty) directory; default :func:`default_out`.
    baseline : bool
        Also run the plan on the LQR baseline, side by side.
    workers, dask
        Where the episodes run (:func:`pretrial.sim.execution.make_executor`).
    log : callable, optional
        Receives progress lines.
    progress : bool
        Show a progress bar on stderr.
    command : sequence of str
        The command line recorded in ``manifest.json``.

    Returns
    -------
    (SweepResults, list of Path)
        The results, and every file of the sweep directory.
    """
    from pretrial.controller.policy import Policy, save_policy
    from pretrial.sim.execution import make_executor

    plan = str(plan)
    loaded = policy if isinstance(policy, Policy) else None
    out_dir = Path(out) if out is not None else default_out(plan, "policy.json" if loaded else str(policy))
    check_new_dir(out_dir)
    label = str(out_dir / "policy.json") if loaded is not None else str(policy)
    prepared = prepare(label, plan, baseline, policy=loaded)  # refused now, not after the policy's sweep
    started = time.time()
    with staged(out_dir) as stage:
        if loaded is not None:
            save_policy(stage / "policy.json", loaded)
        with make_executor(workers, dask) as executor:
            results, samples = sweep(label, plan, executor, baseline=baseline, log=log, progress=progress,
                                     prepared=prepared, stage=stage)
            ex = executor.describe()
        manifest = {
            "pretrial": __version__, "platform": platform.platform(), "command": list(command),
            "started_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(started)),
            "seconds": round(time.time() - started, 3), "executor": ex, "results_sha256": results["content_sha256"],
            "versions": versions(),
        }
        files = write_outputs(out_dir, results, samples, manifest, stage)
    return SweepResults(results, out_dir), files
