"""One set of limits per quantity (pretrial.limits, pretrial_envs.core.Limit), the same in every entry point.

References outside the project: IEEE 754 binary64 as numpy reports it (``numpy.finfo(float)``: the
smallest normal number, the largest finite one) and numpy's integer ranges (``numpy.iinfo``: uint64, in
which the episode keys hold the seed; int64, which step counts must fit).
"""

from __future__ import annotations

import math
import re
from pathlib import Path

import numpy as np
import pytest
from helpers import cli_refused

from pretrial import limits
from pretrial.cli.main import main
from pretrial.errors import InputError
from pretrial.evolution.config import load_config
from pretrial_envs import make_physics

F64 = np.finfo(np.float64)
BASE = '[task]\nenv = "pretrial/CartPole-v0"\nepisodes = 2\nhorizon = 0.2\n'




# --------------------------------------------------------------------------- #
# the table against IEEE 754 doubles and numpy's integers
# --------------------------------------------------------------------------- #
def test_seed_fits_the_uint64_the_episode_keys_hold():
    assert limits.SEED.low == 0 and limits.SEED.high == np.iinfo(np.uint64).max
    with pytest.raises(OverflowError):  # what `--seed 2**64` used to reach: numpy cannot hold it
        np.asarray(2**64, dtype=np.uint64)


def test_no_ratio_of_accepted_values_overflows_or_reaches_subnormals():
    # the largest episode asked for, time_limit / dt, stays a finite double and far inside int64
    assert limits.TIME_LIMIT.high / limits.DT.low < F64.max
    assert limits.TIME_LIMIT.high / limits.DT.low < np.iinfo(np.int64).max
    # the smallest period is a normal double (1e-320, refused, is subnormal: below finfo.tiny)
    assert limits.DT.low > F64.tiny and 1e-320 < F64.tiny
    assert limits.EPISODE_STEPS.high * limits.RECORDED_STEPS.high < np.iinfo(np.int64).max


@pytest.mark.parametrize("limit", [limits.DT, limits.SUBSTEPS, limits.TIME_LIMIT, limits.SEED, limits.EPISODES,
                                   limits.CONTROL_PERIOD, limits.HORIZON, limits.START_SPREAD])
def test_limit_accepts_its_ends_and_refuses_just_past_them(limit):
    step = 1 if limit.whole else None
    if not limit.above:
        assert limit.check(limit.low) == limit.low
    assert limit.check(limit.high) == limit.high
    past_high = limit.high + 1 if step else math.nextafter(limit.high, math.inf)
    below = limit.low - 1 if step else (limit.low if limit.above else math.nextafter(limit.low, -math.inf))
    for bad in (past_high, below, math.nan, math.inf, True, "x", None):
        with pytest.raises(ValueError, match=re.escape(f"not allowed ({limit.allowed()})")):
            limit.check(bad, limit.name)


# --------------------------------------------------------------------------- #
# the same bounds in the env core (pretrial_envs knows nothing of pretrial)
# --------------------------------------------------------------------------- #
@pytest.mark.parametrize("option, value, limit", [
    ("dt", 1e-320, limits.DT), ("dt", 0.5e-6, limits.DT), ("dt", math.inf, limits.DT),
    ("time_limit", 1e308, limits.TIME_LIMIT), ("time_limit", 0.0, limits.TIME_LIMIT),
    ("substeps", 0, limits.SUBSTEPS), ("substeps", 10_001, limits.SUBSTEPS), ("substeps", 2.0, limits.SUBSTEPS),
])
def test_env_core_raises_value_error_with_the_bounds(option, value, limit):
    with pytest.raises(ValueError) as exc:
        make_physics("pretrial/CartPole-v0", **{option: value})
    assert str(exc.value).startswith(f"{option}:") and limit.allowed() in str(exc.value)


def test_env_core_caps_integration_steps_per_episode():
    cap = limits.EPISODE_STEPS.high
    # 10 s at 1 microsecond, 2 substeps: 2e7 integration steps, twice the cap
    with pytest.raises(ValueError, match=f"= 20000000 integration steps per episode, more than the cap of {cap}"):
        make_physics("pretrial/CartPole-v0", dt=1e-6, time_limit=10.0, substeps=2)
    ok = make_physics("pretrial/CartPole-v0", dt=1e-6, time_limit=10.0, substeps=1)  # exactly the cap
    assert ok.max_steps * ok.substeps == cap


def test_start_spread_must_be_a_table():
    for bad in (5, "x", [0.1]):
        with pytest.raises(ValueError, match="start_spread: expected a table"):
            make_physics("pretrial/CartPole-v0", start_spread=bad)


# --------------------------------------------------------------------------- #
# every entry point: config, plan, --option, --set, the flags
# --------------------------------------------------------------------------- #
def test_the_same_dt_words_from_every_entry_point(capsys, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    words = limits.DT.allowed()
    assert words in cli_refused(capsys, ["envs", "CartPole-v0", "--option", "dt=1e-320"])
    config = tmp_path / "c.toml"
    config.write_text(BASE + "[task.options]\ndt = 1e-320\n")
    assert words in cli_refused(capsys, ["evolve", str(config), "--out", str(tmp_path / "run")])
    plan = tmp_path / "p.toml"
    plan.write_text('[scenario]\nenv = "pretrial/CartPole-v0"\n[scenario.options]\ndt = 1e-320\n')
    assert words in cli_refused(capsys, ["replay", "lqr", "--plan", str(plan)])
    line = cli_refused(capsys, ["replay", "lqr", "--env", "CartPole-v0", "--set", "control_period_s=1e-320"])
    assert "control_period_s" in line and words in line
    assert set(tmp_path.iterdir()) == {config, plan}  # no run directory


def test_horizon_has_the_same_bounds_in_config_and_plan(tmp_path):
    from pretrial.analysis.sweep import controlled

    config = tmp_path / "c.toml"
    config.write_text(BASE.replace("horizon = 0.2", "horizon = 1e308"))
    with pytest.raises(InputError, match=r"task\.horizon: 1e\+308 not allowed"):
        load_config(config)
    config.write_text(BASE.replace("horizon = 0.2", "horizon = 10.5"))  # CartPole's time limit is 10 s
    with pytest.raises(InputError, match=r"task\.horizon: 10.5 s is longer than the env's time limit \(10 s"):
        load_config(config)
    plan = tmp_path / "p.toml"
    plan.write_text('[scenario]\nenv = "pretrial/CartPole-v0"\nhorizon = 1e308\n')
    with pytest.raises(InputError, match=r"scenario\.horizon: 1e\+308 not allowed"):
        controlled("lqr", str(plan))


@pytest.mark.parametrize("argv", [
    ["evolve", "CONFIG", "--seed", str(2**64)],
    ["evolve", "CONFIG", "--seed", str(10**30)],
    ["replay", "lqr", "--env", "CartPole-v0", "--seed", "18446744073709551616"],
])
def test_seed_flags_take_the_config_range(capsys, tmp_path, argv):
    argv = [str(Path(__file__).parents[2] / "configs" / "cartpole.toml") if a == "CONFIG" else a for a in argv]
    line = cli_refused(capsys, argv)
    assert "--seed" in line and limits.SEED.allowed() in line


def test_seed_at_the_top_of_the_range_runs(capsys):
    assert main(["replay", "lqr", "--env", "CartPole-v0", "--seed", str(limits.SEED.high), "--json"]) == 0
    assert f'"seed": {limits.SEED.high}' in capsys.readouterr().out


def test_config_seed_past_uint64_is_refused(tmp_path):
    config = tmp_path / "c.toml"
    config.write_text(BASE + f"[run]\nseed = {2**64 - 1}\n")  # past TOML's int64, but tomllib reads any size
    assert load_config(config).run.seed == np.iinfo(np.uint64).max
    for bad in (-1, 2**64, 10**30):
        config.write_text(BASE + f"[run]\nseed = {bad}\n")
        with pytest.raises(InputError, match=re.escape(f"run.seed: {bad} not allowed ({limits.SEED.allowed()})")):
            load_config(config)


# --------------------------------------------------------------------------- #
# the caps per command name their factors
# --------------------------------------------------------------------------- #
def test_replay_caps_recorded_steps(capsys):
    # 1000 episodes x 20000 periods (a 400 s episode at 0.02 s): 2e7 recorded periods
    line = cli_refused(capsys, ["replay", "lqr", "--env", "CartPole-v0", "--episodes", "1000", "--set",
                             "control_period_s=0.0005"])
    assert "1000 episodes x 20000 control periods" in line and f"{limits.RECORDED_STEPS.high:.3g}" in line


def test_evolve_caps_integration_steps_before_writing(capsys, tmp_path):
    config = tmp_path / "big.toml"
    config.write_text('[task]\nenv = "pretrial/CartPole-v0"\nepisodes = 1000\n\n[neat]\npop_size = 1000\n\n'
                      "[run]\ngenerations = 100000\nworkers = 1\n")
    line = cli_refused(capsys, ["evolve", str(config), "--out", str(tmp_path / "run")])
    # CartPole: 10 s / 0.02 s = 500 periods, 2 substeps
    assert "100000 generations x 1000 genomes x 1000 episodes x 500 control periods x 2 substeps" in line
    assert "1e+14 integration steps" in line and "big.toml" in line
    assert not (tmp_path / "run").exists()


def test_sweep_caps_integration_steps(tmp_path):
    from pretrial.analysis.sweep import controlled

    plan = tmp_path / "p.toml"
    plan.write_text('[scenario]\nenv = "pretrial/CartPole-v0"\n[[vary]]\nname = "control_period_s"\n'
                    'range = [1e-5, 0.02]\n[analysis]\nrun = ["montecarlo"]\nmontecarlo_samples = 10000000\n')
    # at the shortest period, 10 s / 1e-5 s = 1e6 periods of 1 substep (the step never grows), 1e7 samples
    with pytest.raises(InputError, match=r"sweep: 10000000 episodes x 1000000 control periods x 1 substeps = 1e\+13"):
        controlled("lqr", str(plan))


def test_control_period_rebuild_past_the_episode_cap_names_the_setting():
    from pretrial.sim.perturb import with_control_period

    physics = make_physics("pretrial/CartPole-v0", time_limit=1000.0)  # 50000 periods x 2 substeps
    with pytest.raises(ValueError, match=r"^control_period_s: 1e-05: time_limit 1000 s / dt 1e-05 s"):
        with_control_period(physics, 1e-5)
