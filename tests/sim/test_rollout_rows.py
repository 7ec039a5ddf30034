"""Ended rows dropped from the batch change no result, row by row, bit for bit.

Reference: the same batch with nothing dropped (recording keeps every row stepped to the end), and
each policy run alone. Rows are independent (DEVELOPERS.md, conventions), so the rollout may drop
any ended row from the plant's batch, and whole policies from the networks' grid, at any step.
Policies are neat-python genomes grown by the library's own mutation operators, feed-forward
and recurrent (whose state must survive its neighbours' rows being dropped).
"""

from __future__ import annotations

import numpy as np
import pytest
from helpers import make_config, random_genome

from pretrial.controller.network import stack_genomes
from pretrial.controller.policy import IOMap, PopulationPolicy
from pretrial.sim import perturb, rollout
from pretrial.sim.quality import QualityLimits
from pretrial.sim.rollout import draw_scenarios, run_episodes
from pretrial_envs import make_physics

FIELDS = ("returns", "success", "failure", "steps", "score")
SCALE = (1 / 2.4, 1.0, 1 / 0.21, 1.0)  # the cart-pole's typical magnitudes, so the networks do not saturate


@pytest.mark.parametrize("perturbed", [False, True])
@pytest.mark.parametrize("feed_forward", [True, False])
def test_dropping_ended_rows_changes_no_result(tmp_path, monkeypatch, feed_forward, perturbed):
    config = make_config(tmp_path / "neat.ini", feed_forward, num_inputs=4, num_outputs=1,
                         activations="tanh sigmoid relu clamped", aggregations="sum max mean")
    genomes = [random_genome(config, seed) for seed in range(10)]

    def policy(chosen: list = genomes) -> PopulationPolicy:
        return PopulationPolicy(stack_genomes(chosen, config), IOMap(4, 1, obs_scale=SCALE))

    cart = make_physics("pretrial/CartPole-v0")
    ranges = {"actuator_lag_s": (0.0, 0.05), "sensor_noise_std": (0.0, 0.02)} if perturbed else None
    sc = draw_scenarios(cart, 8, 11, ranges=ranges, fixed={"start_scale": 4.0})  # wide starts: ragged endings
    if perturbed:
        sc.perturb["sensor_noise_std"][:3] = 0.0  # nominal rows beside perturbed ones
    quality = QualityLimits(saturated_fraction=0.9, chatter_hz=5.0)
    whole = run_episodes(cart, policy(), sc, max_steps=150, record=True, score=True, quality=quality)
    drops = []
    take = perturb.Loop.take
    monkeypatch.setattr(perturb.Loop, "take", lambda self, rows: (drops.append(len(rows)), take(self, rows)))
    monkeypatch.setattr(rollout, "DROP_ROWS", 2)
    monkeypatch.setattr(rollout, "COMPACT_ROWS", 8)
    out = run_episodes(cart, policy(), sc, max_steps=150, score=True, quality=quality)
    assert len(drops) >= 3  # rows were dropped several times, down to a few
    ended_early = out.steps < out.steps.max(axis=1, keepdims=True)
    assert ended_early.any(axis=1).sum() >= 3  # within a policy, some rows ended before others (ragged sets)
    for name in FIELDS:
        np.testing.assert_array_equal(getattr(out, name), getattr(whole, name), err_msg=name)
    for name in out.quality:
        np.testing.assert_array_equal(out.quality[name], whole.quality[name], err_msg=name)
    for g in (0, 4, 9):
        alone = run_episodes(cart, policy(genomes[g:g + 1]), sc, max_steps=150, score=True, quality=quality)
        for name in FIELDS:
            np.testing.assert_array_equal(getattr(out, name)[g], getattr(alone, name)[0], err_msg=name)
