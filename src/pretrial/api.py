"""The Python API: the command line's jobs as functions that take objects or paths and return objects.

Library code never prints: progress goes to an optional ``log`` callable, warnings to the
``"pretrial"`` :mod:`logging` logger. Bad input raises :class:`~pretrial.errors.InputError`
(one line naming the file, key or value), as the command line reports it.
"""

from __future__ import annotations

import os
import re
import time
from collections.abc import Callable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from pretrial.analysis.results import SweepResults
    from pretrial.controller.policy import Policy
    from pretrial.evolution.config import Config
    from pretrial.playback.replay import Replay

PathLike = str | os.PathLike[str]

#: command-line flags in shared error messages -> the API's keyword for the same input
_KEYWORDS = {"--set": "settings", "--option": "options", "--safe-action": "safe_action", "--residual-degree":
             "residual_degree", "--residual-margin": "residual_margin"}
_FLAG = re.compile(r"--([a-z][a-z-]*)")


@contextmanager
def _in_api_words() -> Iterator[None]:
    """Re-raise an InputError with its command-line flags named as this API's keywords (``--set`` -> ``settings``)."""
    from pretrial.errors import PretrialError

    try:
        yield
    except PretrialError as exc:
        text = _FLAG.sub(lambda m: _KEYWORDS.get(m.group(0), m.group(1).replace("-", "_")), exc.message)
        if text == exc.message:
            raise
        raise type(exc)(text) from None


@dataclass
class Run:
    """A finished evolution run.

    Attributes
    ----------
    directory : Path
        The run directory (``champion.json``, ``history.csv``, checkpoints, plots, manifest).
    summary : dict
        What ``pretrial evolve --json`` prints: champion, validation success, evaluations, seconds and,
        when trained against a plan, the predicted verdict and the command that confirms it.
    """

    directory: Path
    summary: dict[str, Any]

    @property
    def champion_path(self) -> Path:
        """The champion's policy file."""
        from pretrial.controller.policy import CHAMPION_FILE

        return self.directory / CHAMPION_FILE

    @property
    def champion(self) -> Policy:
        """The champion, read (and checked) from its policy file."""
        from pretrial.controller.policy import load_policy

        return load_policy(self.champion_path)


def evolve(config: PathLike | Config, *, plan: PathLike | None = None, out: PathLike | None = None,
           seed: int | None = None, generations: int | None = None, workers: int | str | None = None,
           dask: str | None = None, engine: str | None = None, resume: bool = False,
           log: Callable[[str], None] | None = None, reporters: Sequence[Any] = ()) -> Run:
    """Evolve a controller with NEAT from a run config.

    Parameters
    ----------
    config : path-like or Config
        A run config file (TOML) or one loaded with :func:`pretrial.evolution.config.load_config`.
    plan : path-like, optional
        Train against this sweep plan (as ``--plan``; a config's ``[task] plan`` does the same).
    out : path-like, optional
        The run directory (default ``runs/<config>-<UTC time>``); with ``resume``, the run to continue.
    seed, generations, workers, dask, engine : optional
        Override the config's ``[run]`` settings (None keeps them); ``engine="compiled"`` runs the
        episodes on :mod:`pretrial.sim.compiled` (numba).
    resume : bool
        Continue the run in ``out`` from its last checkpoint.
    log : callable, optional
        Receives one line per generation and the closing lines (default: nothing).
    reporters : sequence of Reporter, optional
        Observers of the run (subclasses of :class:`pretrial.evolution.reporters.Reporter`), e.g. to
        collect each generation's row as it finishes.

    Returns
    -------
    Run
        The run directory and the summary; ``run.champion`` is the evolved policy.
    """
    with _in_api_words():
        from pretrial.errors import InputError
        from pretrial.evolution.config import Config, load_config, with_overrides
        from pretrial.evolution.loop import Evolution
        from pretrial.evolution.task import with_plan
        from pretrial.sim.compiled import ENGINES
        from pretrial.sim.execution import make_executor

        cfg = config if isinstance(config, Config) else load_config(config)
        if plan is not None:
            cfg = with_plan(cfg, plan, label="plan")
        if engine is not None and engine not in ENGINES:
            raise InputError(f"engine: {engine!r} not one of {', '.join(ENGINES)}")
        cfg = with_overrides(cfg, seed=seed, generations=generations, workers=workers, dask=dask, engine=engine)
        if resume and out is None:
            raise ValueError("resume=True needs out= (the run directory to continue)")
        run_dir = Path(out) if out is not None else \
            Path("runs") / f"{cfg.name}-{time.strftime('%Y%m%d-%H%M%S', time.gmtime())}"
        with make_executor(cfg.run.workers, cfg.run.dask) as executor:
            evo = Evolution(cfg, run_dir, executor, log or (lambda _line: None), command_line=["pretrial.evolve"],
                            reporters=reporters)
            if resume:
                evo.resume()
            else:
                evo.create()
            summary = evo.run(cfg.run.generations)
        return Run(run_dir, summary)


def sweep(policy: PathLike | Policy, plan: PathLike, *, out: PathLike | None = None, baseline: bool = False,
          workers: int | str | None = "auto", dask: str | None = None,
          log: Callable[[str], None] | None = None) -> SweepResults:
    """Run a perturbation plan on a controller and write its sweep directory.

    Parameters
    ----------
    policy : path-like, ``"lqr"`` or Policy
        A policy file, a run directory (its champion), the LQR baseline, or a loaded policy
        (written into the sweep directory as ``policy.json``, which the report's replay commands name).
    plan : path-like
        The sweep plan (TOML; see the README's "Sweep plans").
    out : path-like, optional
        A new (or empty) directory (default ``sweeps/<plan>-<policy>-<UTC time>``).
    baseline : bool
        Also run the plan on the LQR baseline, side by side.
    workers, dask : optional
        Local worker processes (N or ``"auto"``), or a Dask scheduler address (``"local"`` starts one).
    log : callable, optional
        Receives progress lines.

    Returns
    -------
    SweepResults
        The verdict (``.passed``, ``.verdict``, ``.failing``), every requirement and the whole
        ``results.json`` document (``.doc``); ``.directory`` holds the report.
    """
    with _in_api_words():
        from pretrial.analysis.sweep import run_sweep

        policy_arg = policy if not isinstance(policy, os.PathLike) else os.fspath(policy)
        results, _files = run_sweep(policy_arg, plan, out, baseline=baseline, workers=workers, dask=dask, log=log,
                                    command=["pretrial.sweep"])
        return results


def replay(policy: PathLike | Policy, *, env: str | None = None, plan: PathLike | None = None,
           settings: Mapping[str, Any] | None = None, episodes: int = 1, seed: int = 0,
           start: str | Sequence[float] | None = None, stream_version: int = 1) -> Replay:
    """Replay a controller on chosen conditions and measure what it does.

    Parameters
    ----------
    policy : path-like, ``"lqr"`` or Policy
        A policy file, a run directory, the LQR baseline (needs ``env`` or ``plan``), or a loaded policy.
    env : str, optional
        Environment id; must fit the policy.
    plan : path-like, optional
        Run under a sweep plan's scenario, as a sweep report's replay commands do.
    settings : mapping, optional
        Physics parameters, generic perturbations or ``control_period_s`` by name.
    episodes, seed : int
        The same episodes a sweep draws for that seed.
    start : str or sequence of float, optional
        An exact start state (numbers in state order, or ``"name=value,..."``).
    stream_version : int
        Version of the noise draws: a sweep's ``results.json`` records it (``stream_version``;
        absent means 1), and its replay commands name it when it is not 1.

    Returns
    -------
    Replay
        ``.outcome`` (success, failure words, returns, the recorded trace), ``.metrics`` (task and
        loop-quality measures with units); :func:`pretrial.playback.replay.summary` gives the JSON form.
    """
    with _in_api_words():
        from pretrial.playback.replay import replay as run

        if start is not None and not isinstance(start, str):
            start = ",".join(repr(float(v)) for v in start)
        given = policy if not isinstance(policy, os.PathLike) else os.fspath(policy)
        return run(given, env=env, plan=None if plan is None else os.fspath(plan), settings=dict(settings or {}),
                   episodes=episodes, seed=seed, start=start, stream_version=stream_version)


@dataclass
class Calibration:
    """A finished calibration.

    Attributes
    ----------
    directory : Path
        The calibration directory (``calibration.json``, ``params.toml``, ``dispersion.toml``, plots,
        ``report.md``, and ``residual.json`` when a residual was fitted).
    summary : dict
        ``calibration.json``: estimates with bootstrap std and 95% intervals, fit and validation errors,
        identifiability flags, the bootstrap set.
    """

    directory: Path
    summary: dict[str, Any]

    @property
    def estimates(self) -> dict[str, float]:
        """Each fitted name's estimate, in its unit."""
        return {n: float(v["estimate"]) for n, v in self.summary["params"].items()}

    @property
    def intervals(self) -> dict[str, tuple[float, float]]:
        """Each fitted name's bootstrap 95% interval (it covers noise, not model error)."""
        return {n: (float(v["ci95"][0]), float(v["ci95"][1])) for n, v in self.summary["params"].items()}


def calibrate(logs: Sequence[PathLike], env: str, fit: Sequence[str], *, out: PathLike | None = None,
              options: Mapping[str, Any] | None = None, fixed: Mapping[str, Any] | None = None,
              guess: Mapping[str, Any] | None = None, window: float = 0.5, bootstrap: int = 100, seed: int = 0,
              validate: Sequence[PathLike] = (), holdout: float = 0.2, residual: bool = False,
              residual_degree: int = 2, residual_margin: float = 0.1) -> Calibration:
    """Estimate plant parameters from bench logs, with block-bootstrap uncertainty (as ``pretrial calibrate``).

    Parameters
    ----------
    logs : sequence of path-like
        CSV logs: ``t``, the env's states by name, its actions.
    env : str
        Environment id.
    fit : sequence of str
        Physics parameters (or ``actuator_gain``, ``actuator_lag_s``, ``actuator_delay_s``) to estimate.
    out : path-like, optional
        A new calibration directory (default ``calibrations/<env>-<UTC time>``).
    options, fixed, guess : mapping, optional
        Env options; values held fixed; where the fit of a name starts.
    window, bootstrap, seed, validate, holdout
        Multiple-shooting window (s), bootstrap replicates and seed, held-out logs or share.
    residual, residual_degree, residual_margin
        Also fit a residual of the derivatives the physics misses, and its trust region.

    Returns
    -------
    Calibration
    """
    with _in_api_words():
        from pretrial.calibration.calibrate import CalibrationRequest, run_calibration

        req = CalibrationRequest(env=env, logs=[os.fspath(p) for p in logs], fit=list(fit), options=dict(options or {}),
                                 fixed=dict(fixed or {}), guess=dict(guess or {}), window=window, bootstrap=bootstrap,
                                 seed=seed, validate=[os.fspath(p) for p in validate], holdout=holdout,
                                 out=None if out is None else os.fspath(out), residual=residual,
                                 residual_degree=residual_degree, residual_margin=residual_margin)
        summary, directory = run_calibration(req)
        return Calibration(directory, summary)


def load_policy(path: PathLike) -> Policy:
    """Read a policy file or a run directory's champion (schema and content hash checked)."""
    from pretrial.controller.policy import open_policy

    return open_policy(path)


def export_policy(policy: PathLike | Policy, to: str, out_dir: PathLike, *, precision: str = "double",
                  prefix: str | None = None, safe_action: Sequence[float] | None = None) -> list[Path]:
    """Write a policy as dependency-free C99 (``to="c"``) or Python (``to="python"``) with its golden file.

    Returns the files written (code first, golden file last); see the README's ``pretrial export``
    for what the generated step does on a fault.
    """
    with _in_api_words():
        from pretrial.export.exporter import DEFAULT_PREFIX
        from pretrial.export.exporter import export_policy as write

        pol = policy if not isinstance(policy, (str, os.PathLike)) else load_policy(policy)
        return write(pol, to, out_dir, precision, prefix or DEFAULT_PREFIX, safe_action=safe_action)


def read_sweep(path: PathLike) -> SweepResults:
    """Read a sweep's ``results.json`` (or its directory), refusing an edited or foreign file."""
    from pretrial.analysis.results import SweepResults

    return SweepResults.read(path)
