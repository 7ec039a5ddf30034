"""The noise-stream version of a sweep: recorded in results.json, named by replay commands, replayed.

References: the sweep's own Monte Carlo rows (a replay of one sample must reproduce its outcome,
the determinism contract of DESIGN.md) and results files written before the version was recorded
(no ``stream_version`` key: version 1, the draws they were made with).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from helpers import make_results

from pretrial.analysis import results as results_module
from pretrial.analysis.campaign import Campaign
from pretrial.analysis.results import read_results, seal, stream_version, write_results
from pretrial.analysis.sweep import controlled
from pretrial.errors import InputError
from pretrial.playback.replay import replay
from pretrial.sim import streams
from pretrial.sim.execution import Executor

# a noisy sensor on every row, so that the two stream versions draw different noise
PLAN = """
[scenario]
env = "pretrial/CartPole-v0"
episodes = 4
horizon = 2.0
seed = 3
[[vary]]
name = "sensor_noise_std"
range = [0.0, 0.5]
dispersion = [0.2, 0.4]
[analysis]
run = ["montecarlo"]
montecarlo_samples = 6
"""


def _campaign(tmp_path: Path, version: int) -> Campaign:
    plan = tmp_path / "noisy.toml"
    plan.write_text(PLAN, encoding="utf-8")
    ctl = controlled("lqr", str(plan))
    return Campaign(ctl.physics, ctl.controller, ctl.base_params, ctl.plan, Executor(), "lqr",
                    stream_version=version)


@pytest.mark.parametrize("version", streams.STREAM_VERSIONS)
def test_a_replay_with_the_recorded_version_reproduces_the_sample(tmp_path, version):
    c = _campaign(tmp_path, version)
    noise = np.array([0.25, 0.3, 0.35])
    seeds = streams.episode_keys(np.uint64(11), np.arange(3))
    batch = c.evaluate({"sensor_noise_std": noise}, seeds, np.zeros(3, dtype=np.int64))
    for i in range(3):
        command = c.replay_command({"sensor_noise_std": noise[i]}, int(seeds[i]), 1)
        assert ("--stream-version" in command) == (version != 1)  # commands without it mean version 1
        rep = replay("lqr", plan=c.plan.path, settings={"sensor_noise_std": float(noise[i])},
                     seed=int(seeds[i]), stream_version=version)
        assert int(rep.outcome.steps[0, 0]) == int(batch.steps[i])
        assert bool(rep.outcome.success[0, 0]) == bool(batch.success[i])


def test_the_versions_draw_different_noise(tmp_path):
    # otherwise the test above could not tell a replay with the wrong version from the right one
    steps = {}
    for version in streams.STREAM_VERSIONS:
        rep = replay("lqr", plan=str(_write(tmp_path)), settings={"sensor_noise_std": 0.3}, seed=5,
                     stream_version=version)
        steps[version] = rep.outcome.trace["obs"][:, 0].copy()
    assert not np.array_equal(steps[1], steps[2])


def _write(tmp_path: Path) -> Path:
    plan = tmp_path / "noisy.toml"
    plan.write_text(PLAN, encoding="utf-8")
    return plan


def _results(**extra) -> dict:
    return seal({**make_results(), "diverged": None, **extra})  # the helper's document lacks only 'diverged'


def test_results_without_a_version_read_as_version_1(tmp_path):
    old = _results()
    assert "stream_version" not in old
    write_results(tmp_path / "results.json", old)
    assert stream_version(read_results(tmp_path / "results.json")) == 1
    new = _results(stream_version=2)
    write_results(tmp_path / "results.json", new)
    assert stream_version(read_results(tmp_path / "results.json")) == 2


@pytest.mark.parametrize("bad", [3, 0, "2", True, None])
def test_an_unknown_version_is_refused_in_one_line(tmp_path, bad):
    doc = _results(stream_version=bad)
    (tmp_path / "results.json").write_text(json.dumps(doc), encoding="utf-8")
    with pytest.raises(InputError, match=r"results\.json: 'stream_version'") as err:
        read_results(tmp_path / "results.json")
    assert "\n" not in str(err.value)


def test_the_sweep_records_its_version(tmp_path):
    from pretrial.analysis.sweep import SWEEP_STREAM_VERSION, run_sweep

    res, _ = run_sweep("lqr", _write(tmp_path), tmp_path / "out", workers=1)
    assert res.doc["stream_version"] == SWEEP_STREAM_VERSION
    assert SWEEP_STREAM_VERSION in streams.STREAM_VERSIONS
    assert results_module.stream_version(res.doc) == SWEEP_STREAM_VERSION
