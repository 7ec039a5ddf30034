"""Training for the verdict: a sweep plan as the training distribution, risk-aware fitness.

A plan states what the controller will be judged on: the scenario (env options,
physics overrides, start ranges, horizon), the dispersions of ``[[vary]]`` and the
loop-quality limits of ``[require.quality]``. :class:`PlanDistribution` draws
training scenarios from exactly those dispersions (with each name's own
distribution), from streams keyed by the *run's* seed, so training never sees the
samples the sweep will verify on (those come from the plan's own seed).

:func:`objective_fitness` turns a generation's episodes into one number per
genome:

* ``"mean"``: the mean episode return (the env's shaped reward);
* ``"cvar:A"``: the mean return of the worst ``A`` share of episodes
  (conditional value at risk; ``A`` in (0, 1]): a genome is as good as its bad days;
* ``"success_lower_bound"``: the Wilson 95% lower bound of the success rate (loop
  quality included), ties broken by the mean episode score (in [-1, 1], scaled by
  1e-3 so it never outweighs one more success); with a plan a success's score is
  also capped by its slack to the chatter limit (:func:`quality_score`), since the
  constraint slack alone rewards stiff loops that chatter at the box's corners.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from pretrial.analysis.plan import Calibrated, Vary, unit_to_value
from pretrial.sim.perturb import CONTROL_PERIOD, nominal_value
from pretrial.sim.rollout import Scenarios, keyed_scenarios
from pretrial_envs.core import Physics

OBJECTIVES = ("mean", "cvar:A", "success_lower_bound")

#: weight of the mean episode score in the success-lower-bound objective (a tie-breaker only)
SCORE_TIEBREAK = 1e-3


@dataclass(frozen=True)
class Objective:
    """A parsed ``[task] objective``: ``kind`` is "mean", "cvar" or "success_lower_bound"."""

    kind: str
    alpha: float = 1.0

    @property
    def text(self) -> str:
        return f"cvar:{self.alpha:g}" if self.kind == "cvar" else self.kind

    @property
    def needs_score(self) -> bool:
        return self.kind == "success_lower_bound"


def parse_objective(text: str) -> Objective:
    """``"mean"``, ``"cvar:0.2"`` or ``"success_lower_bound"`` -> :class:`Objective`.

    Raises ValueError naming the value and the valid forms.
    """
    valid = "mean, cvar:A (0 < A <= 1, e.g. cvar:0.2) or success_lower_bound"
    if not isinstance(text, str):
        raise ValueError(f"{text!r} is not one of {valid}")
    if text in ("mean", "success_lower_bound"):
        return Objective(text)
    if text.startswith("cvar:"):
        try:
            alpha = float(text[5:])
        except ValueError:
            raise ValueError(f"{text!r}: the share after cvar: is not a number ({valid})") from None
        if not (0 < alpha <= 1):
            raise ValueError(f"{text!r}: the share must be in (0, 1] ({valid})")
        return Objective("cvar", alpha)
    raise ValueError(f"{text!r} is not one of {valid}")


def objective_fitness(objective: Objective, returns: np.ndarray, success: np.ndarray,
                      score: np.ndarray | None = None) -> np.ndarray:
    """One fitness per genome from (G, S) episode returns, successes and (for the lower bound) scores."""
    returns = np.asarray(returns, dtype=float)
    s = returns.shape[1]
    if objective.kind == "mean":
        return returns.mean(axis=1)
    if objective.kind == "cvar":
        k = max(1, math.ceil(objective.alpha * s - 1e-9))
        return np.sort(returns, axis=1)[:, :k].mean(axis=1)
    if score is None:
        raise ValueError("success_lower_bound needs the episode scores")
    from pretrial.analysis.stats import wilson_interval

    lower = wilson_interval(np.asarray(success).sum(axis=1), s)[0]
    return lower + SCORE_TIEBREAK * np.asarray(score, dtype=float).mean(axis=1)


def quality_score(score: np.ndarray, success: np.ndarray, measures: Mapping[str, np.ndarray],
                  limits) -> np.ndarray:
    """Episode scores with each success's slack to the chatter limit folded in (training only).

    A success scores the smaller of its constraint slack and ``1 - chatter_hz / limit``
    (command reversals per second against the plan's ``chatter_hz``), so among genomes
    that succeed equally often the one further from chattering ranks first; failures
    keep their score. Without a chatter limit the scores are returned unchanged.
    """
    if limits.chatter_hz is None or "chatter_hz" not in measures:
        return score
    slack = 1.0 - np.asarray(measures["chatter_hz"], dtype=float) / limits.chatter_hz
    return np.where(success, np.minimum(score, slack), score)


# --------------------------------------------------------------------------- #
# the plan's dispersions as a training distribution
# --------------------------------------------------------------------------- #


@dataclass(frozen=True)
class PlanDistribution:
    """The plan's ``[[vary]]`` dispersions as a training distribution (picklable, small).

    ``control_period_s`` is left out of training: a batch runs at one control
    period (the sweep still varies it).
    """

    vary: tuple[Vary, ...]
    nominal: Mapping[str, float]
    #: a plan's calibration: whole bootstrap rows drawn per scenario (the fitted names move together)
    calibration: Calibrated | None = None
    #: share of each generation's scenarios put on random corners of the dispersion box (every name at
    #: one end of its dispersion): the worst-case search looks there, so training can too
    corner_share: float = 0.0

    @classmethod
    def from_plan(cls, vary: Sequence[Vary], physics: Physics, params: Mapping[str, float],
                  calibration: Calibrated | None = None, corner_share: float = 0.0) -> PlanDistribution:
        kept = tuple(v for v in vary if v.name != CONTROL_PERIOD)
        return cls(kept, {v.name: nominal_value(physics, params, v.name) for v in kept}, calibration, corner_share)

    def draw(self, physics: Physics, n: int, seed: int, params: np.ndarray, ramp: float = 1.0) -> Scenarios:
        """``n`` scenarios drawn from the dispersions, a pure function of ``seed``.

        ``ramp`` in [0, 1] shrinks every draw toward its nominal value (the
        curriculum of ``randomize_ramp``); 1 is the plan's full distribution.
        """
        rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(0,)))
        settings = self.values(rng, n, ramp)
        return keyed_scenarios(physics, np.full(n, seed, dtype=np.uint64), np.arange(n), params, settings)

    def values(self, rng: np.random.Generator, n: int, ramp: float = 1.0) -> dict[str, np.ndarray]:
        """``n`` values of every varied (and calibrated) name, drawn from ``rng``; see :meth:`draw`."""
        u = rng.random((n, len(self.vary)))  # one column per name, in plan order
        corners = round(self.corner_share * n)
        if corners:  # the last rows: each name at the low or the high end of its dispersion
            u[n - corners:] = rng.integers(0, 2, (corners, len(self.vary)))
        settings = {}
        for j, v in enumerate(self.vary):
            x = unit_to_value(v, u[:, j])
            c = min(max(self.nominal[v.name], v.box_low), v.box_high)
            settings[v.name] = c + ramp * (x - c) if ramp < 1.0 else x
        if self.calibration is not None:  # whole bootstrap rows: the fitted names move together
            boot = self.calibration.rows()
            pick = boot[rng.integers(0, len(boot), n)]
            for j, (name, est) in enumerate(zip(self.calibration.names, self.calibration.estimates, strict=True)):
                settings[name] = est + ramp * (pick[:, j] - est) if ramp < 1.0 else pick[:, j]
        return settings


# --------------------------------------------------------------------------- #
# a short form of the plan, to choose the champion by
# --------------------------------------------------------------------------- #
def short_verdict(plan, physics: Physics, base_params: Mapping[str, float], policy, executor, samples: int,
                  seed: int) -> dict:
    """The plan's verdict predicted from a short run: Monte Carlo on fresh draws, the linear loops, quality.

    Margins, worst case, sensitivity and the integrator check are left to the
    sweep (too costly per finalist); their requirement rows are not counted here.

    Returns
    -------
    dict
        ``requirements`` (rows as the sweep writes them), ``met`` and ``judged``
        (counts of passing and applicable rows), ``verdict`` ("pass"/"fail") and
        ``montecarlo`` (samples, successes, success_rate, ci95, failure_modes).
    """
    from pretrial.analysis.campaign import Campaign, linear_analysis, requirements, verdict
    from pretrial.analysis.stats import wilson_interval

    c = Campaign(physics, policy, dict(base_params), plan, executor, "policy")
    dist = PlanDistribution.from_plan(plan.vary, physics, base_params, plan.calibration)  # no corners: the plan
    values = dist.values(np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(0,))), samples)
    batch = c.evaluate(values, np.full(samples, seed, dtype=np.uint64), np.arange(samples))
    k = int(batch.success.sum())
    lo, hi = wilson_interval(k, samples)
    names, counts = np.unique(batch.failure[batch.failure != ""], return_counts=True)
    res: dict = {"montecarlo": {"samples": samples, "successes": k, "success_rate": k / samples,
                                "ci95": [float(lo), float(hi)],
                                "failure_modes": {str(a): int(b) for a, b in zip(names, counts, strict=True)}},
                 "linear": None, "linear_sampled": None, "linear_details": {"continuous": None, "sampled": None}}
    for key, sampled in (("linear", False), ("linear_sampled", True)):
        if key in plan.analyses:
            res[key], res["linear_details"]["sampled" if sampled else "continuous"] = linear_analysis(c, sampled)
    res["envelope"] = c.envelope()  # a hybrid plant: the share of time outside its residual's data
    rows = [r for r in requirements(plan, res) if not r["name"].startswith("margin ")]
    # A short run cannot show a high rate at 95% confidence; predict the plan's own test instead: the
    # lower bound the sweep's sample count would give at the rate measured here.
    full = int(plan.budgets.get("montecarlo_samples", samples))
    predicted = float(wilson_interval(k / samples * full, full)[0])
    for r in rows:
        if r["name"].startswith("success rate (Monte Carlo"):
            r.update({"name": f"success rate (Monte Carlo, Wilson 95% lower bound predicted at {full} samples "
                              f"from {samples})", "measured": predicted,
                      "pass": predicted >= plan.required_success_rate})
    for r in rows:  # JSON-friendly, as champion.json keeps them
        for key in ("required", "measured", "point"):
            if isinstance(r.get(key), (np.floating, np.integer)):
                r[key] = r[key].item()
    judged = [r for r in rows if r["pass"] is not None]
    return {"requirements": rows, "met": sum(bool(r["pass"]) for r in judged), "judged": len(judged),
            "verdict": verdict(rows), "montecarlo": res["montecarlo"]}


def linear_shortfall(plan, physics: Physics, params: Mapping[str, float], policy) -> float:
    """How far ``policy``'s linearized loops fall short of the plan's gain and phase margin requirements.

    The sum over the loops the plan analyses (continuous, sampled) and their
    channels of each missing share (``(required - measured) / required`` when
    below); an unstable or unlinearizable loop counts as missing each
    requirement whole (1 each). A recurrent controller's loops are not
    analysed (0), as the sweep marks them not applicable.
    """
    from pretrial.analysis.linear import loop_report

    if not getattr(policy, "feed_forward", True):
        return 0.0
    wanted = [(key, req) for key, req in (("gain_margin_db", plan.gain_margin_db),
                                          ("phase_margin_deg", plan.phase_margin_deg)) if req]
    p = physics.param_table.resolve(dict(params))
    total = 0.0
    for sampled in [s for s, name in ((False, "linear"), (True, "linear_sampled")) if name in plan.analyses]:
        delay = plan.budgets["delay_steps"] if sampled else 0
        rep = loop_report(physics, policy, p, sampled=sampled, delay_steps=delay)
        if not rep.linearizable or rep.stable is False:
            total += len(wanted)
            continue
        for ch in rep.channel_dicts():
            for key, req in wanted:
                got = ch.get(key)
                if got is not None and got < req:
                    total += (req - got) / req
    return total
