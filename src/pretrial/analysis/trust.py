"""A sweep's trust region: how much of its simulated time ran outside the residual's data.

Every episode of a sweep on a hybrid plant reports the share of its control steps that started
outside its residual's envelope (:mod:`pretrial.sim.envelope`). :class:`EnvelopeTally` adds them up
per analysis; :func:`envelope_summary` is ``results.json``'s ``envelope``; the requirement
``max_outside_envelope`` is judged on the Monte Carlo (the plan's own distribution) when it ran, else
on every episode of the sweep; :func:`envelope_caution` is what the verdict says when results rest
on extrapolation.
"""

from __future__ import annotations

from collections import Counter
from dataclasses import dataclass, field
from typing import Any

import numpy as np

#: default of ``[require] max_outside_envelope`` on a hybrid plant: the share of simulated time a sweep may
#: spend outside the residual's data (our choice: a few stray steps are tolerable, a regime is not)
DEFAULT_MAX_OUTSIDE = 0.05
#: the analysis the requirement is judged on, when it ran
JUDGED_ON = "montecarlo"


@dataclass
class _Counts:
    episodes: int = 0
    steps: int = 0
    outside_steps: int = 0
    episodes_outside: int = 0
    max_episode_share: float = 0.0
    first_variables: Counter[str] = field(default_factory=Counter)

    def add(self, share: np.ndarray, outside: np.ndarray, steps: np.ndarray, first: list[str]) -> None:
        self.episodes += len(share)
        self.steps += int(steps.sum())
        self.outside_steps += int(outside.sum())
        self.episodes_outside += int((outside > 0).sum())
        if len(share):
            self.max_episode_share = max(self.max_episode_share, float(share.max()))
        self.first_variables.update(first)

    def to_dict(self) -> dict[str, Any]:
        return {"episodes": self.episodes, "steps": self.steps, "outside_steps": self.outside_steps,
                "share": self.outside_steps / self.steps if self.steps else 0.0,
                "episodes_outside": self.episodes_outside, "max_episode_share": self.max_episode_share,
                "first_variables": dict(sorted(self.first_variables.items(), key=lambda kv: (-kv[1], kv[0])))}


@dataclass
class EnvelopeTally:
    """Steps outside the envelope, per analysis of one campaign.

    Parameters
    ----------
    names : tuple of str
        The envelope's variables (states, then actions).
    """

    names: tuple[str, ...]
    by_analysis: dict[str, _Counts] = field(default_factory=dict)

    def add(self, analysis: str, share: np.ndarray, outside: np.ndarray, steps: np.ndarray,
            first_var: np.ndarray) -> None:
        """Episodes of ``analysis``: per row its share, outside steps, steps and first variable out (-1: none)."""
        first = [self.names[int(v)] for v in first_var if v >= 0]
        self.by_analysis.setdefault(analysis, _Counts()).add(share, outside, steps, first)

    def summary(self) -> dict[str, Any]:
        """Per analysis and over all of them (see :func:`envelope_summary`)."""
        total = _Counts()
        for c in self.by_analysis.values():
            total.episodes += c.episodes
            total.steps += c.steps
            total.outside_steps += c.outside_steps
            total.episodes_outside += c.episodes_outside
            total.max_episode_share = max(total.max_episode_share, c.max_episode_share)
            total.first_variables.update(c.first_variables)
        return {"analyses": {k: c.to_dict() for k, c in self.by_analysis.items()}, "all": total.to_dict()}


def envelope_summary(tally: EnvelopeTally | None, record: dict[str, Any] | None) -> dict[str, Any] | None:
    """``results.json``'s ``envelope``: the residual (path, sha256, margin), per-analysis shares, and which
    one the requirement is judged on; None on a plant without a residual."""
    if tally is None or record is None:
        return None
    s = tally.summary()
    judged = JUDGED_ON if JUDGED_ON in s["analyses"] else "all"
    measured = s["all"] if judged == "all" else s["analyses"][judged]
    return {"residual": record, "names": list(tally.names), **s, "judged_on": judged, "share": measured["share"]}


def envelope_requirement(max_outside: float | None, envelope: dict[str, Any] | None) -> dict[str, Any] | None:
    """The requirement row of ``[require] max_outside_envelope`` (None when the plan asks nothing of it)."""
    if max_outside is None:
        return None
    name = "time outside the residual's data envelope"
    if envelope is None:
        return {"name": name, "required": max_outside,
                "measured": "not applicable: the plant has no learned residual", "pass": None}
    where = "Monte Carlo" if envelope["judged_on"] == JUDGED_ON else "all episodes"
    share = envelope["share"]
    return {"name": f"{name} ({where}, share of simulated time, at most)", "required": max_outside,
            "measured": share, "pass": bool(share <= max_outside)}


def envelope_caution(envelope: dict[str, Any] | None, who: str = "") -> str | None:
    """What the verdict says when some simulated time ran outside the residual's data; None when none did."""
    if not envelope or envelope["all"]["outside_steps"] == 0:
        return None
    rec = envelope["residual"]
    a = envelope["all"]
    first = ", ".join(list(a["first_variables"])[:3])
    whose = f"{who}: " if who else ""
    return (f"{whose}results rest on extrapolation of the learned residual: {a['share']:.1%} of the simulated time "
            f"({a['episodes_outside']} of {a['episodes']} episodes) ran outside the data it was fitted on "
            f"({rec['path']}, sha256 {rec['sha256'][:16]}…, bounds widened by {rec['margin']:g} of each span; "
            f"first out: {first}). There the correction is a guess, not a measurement: the hybrid plant is no "
            "better grounded than the physics alone; take bench data in that regime before trusting these figures.")
