"""The accepted range of every quantity a user gives, declared once.

Configs, sweep plans, ``--option``, ``--set`` and the command-line flags check
the same rows (:class:`pretrial_envs.core.Limit`), so a value refused in one
place is refused everywhere, in the same words. The plant's own quantities
(``dt``, ``substeps``, ``time_limit``, ``start_spread``, integration steps per
episode) are declared in :mod:`pretrial_envs.core`, which knows nothing of
pretrial; the rows here are the tool's own. The caps are our choice: far above
any shipped config or plan, low enough that a typing slip (``1e-300`` for
``1e-3``) is refused up front instead of running for ever.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import replace
from typing import Any

from pretrial_envs.core import DT, EPISODE_STEPS, START_SPREAD, SUBSTEPS, TIME_LIMIT, Limit, check_episode_steps

__all__ = [
    "COMMAND_STEPS", "CONTROL_PERIOD", "DT", "EPISODES", "EPISODE_STEPS", "GENERATIONS", "HORIZON", "NEAT",
    "RECORDED_STEPS", "REPLAY_EPISODES", "SEED", "START_SPREAD", "SUBSTEPS", "TIME_LIMIT", "Limit",
    "check_episode_steps", "check_horizon", "check_total",
]

#: the control period as a setting (``--set``, ``[[vary]]``) is the plant's ``dt``
CONTROL_PERIOD = replace(DT, name="control_period_s")
#: simulated seconds of an episode: a horizon is a time limit (and no longer than the env's own)
HORIZON = replace(TIME_LIMIT, name="horizon")
#: episode keys are made from the seed as an unsigned 64-bit integer (numpy.iinfo(numpy.uint64).max), and a
#: sweep's sample seeds, which replay takes back, span that whole range
SEED = Limit("seed", 0, 2**64 - 1, whole=True)
#: episodes per genome per generation, and per sweep point
EPISODES = Limit("episodes", 1, 1_000_000, whole=True)
#: a replay records every step of every episode; beyond this many, a sweep is the tool
REPLAY_EPISODES = Limit("episodes", 1, 1000, whole=True)
GENERATIONS = Limit("generations", 1, 1_000_000, whole=True)
#: what a replay holds in memory: episodes x control periods
RECORDED_STEPS = Limit("recorded control periods", 1, 1_000_000, whole=True)
#: integration steps one command may ask for: about a day of simulation at 1e7 steps/s
COMMAND_STEPS = Limit("integration steps", 1, 10**12, whole=True)

#: [neat] settings neat-python takes without a check of its own (read in its source: a population of 0 is
#: empty, a negative num_hidden adds no node, a negative elitism slices members off the end)
NEAT = {
    "pop_size": Limit("neat.pop_size", 1, 1_000_000, whole=True),
    "num_hidden": Limit("neat.num_hidden", 0, 100_000, whole=True),
    "elitism": Limit("neat.elitism", 0, 1_000_000, whole=True),
    "species_elitism": Limit("neat.species_elitism", 0, 1_000_000, whole=True),
    "min_species_size": Limit("neat.min_species_size", 1, 1_000_000, whole=True),
    "max_stagnation": Limit("neat.max_stagnation", 1, 1_000_000, whole=True),
}


def check_horizon(horizon: Any, physics: Any, label: str = "horizon") -> float:
    """``horizon`` in seconds, inside :data:`HORIZON` and no longer than ``physics.time_limit``.

    An episode ends at the env's time limit whatever the horizon, so a longer one
    would promise simulated time that never runs. Raises ValueError naming ``label``.
    """
    h = HORIZON.check(horizon, label)
    if h > physics.time_limit + 1e-12:
        raise ValueError(f"{label}: {h:g} s is longer than the env's time limit ({physics.time_limit:g} s; "
                         "set time_limit in the env options)")
    return h


def check_total(what: str, factors: Sequence[tuple[int, str]], cap: Limit = COMMAND_STEPS) -> int:
    """The product of ``factors`` (count, word); ValueError naming each and ``cap`` when it passes ``cap.high``.

    Examples
    --------
    >>> check_total("replay", [(10, "episodes"), (500, "control periods")], RECORDED_STEPS)
    5000
    """
    total = math.prod(int(n) for n, _ in factors)
    if total > cap.high:
        words = " x ".join(f"{int(n)} {word}" for n, word in factors)
        raise ValueError(f"{what}: {words} = {total:.3g} {cap.name}, more than the cap of {cap.high:.3g} "
                         "per command")
    return total
