"""Training for the verdict: objectives and the plan's dispersions as a training distribution.

References: the Wilson (1927) score interval (``sweep.wilson_interval``, checked against scipy in
tests/analysis/test_sweep.py); conditional value at risk as the mean of the worst share of outcomes
(Rockafellar & Uryasev 2000, for a finite sample of equally likely outcomes).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from pretrial.analysis.plan import load_plan
from pretrial.evolution.plan_training import (
    Objective,
    PlanDistribution,
    objective_fitness,
    parse_objective,
    quality_score,
)
from pretrial.sim.quality import QualityLimits
from pretrial_envs import make_physics

ROOT = Path(__file__).resolve().parents[2]


@pytest.mark.parametrize(("text", "kind", "alpha"), [("mean", "mean", 1.0), ("cvar:0.2", "cvar", 0.2),
                                                     ("cvar:1", "cvar", 1.0),
                                                     ("success_lower_bound", "success_lower_bound", 1.0)])
def test_objectives_parse(text, kind, alpha):
    o = parse_objective(text)
    assert (o.kind, o.alpha) == (kind, alpha)


@pytest.mark.parametrize("text", ["cvar", "cvar:0", "cvar:1.5", "cvar:x", "median", "", 3])
def test_bad_objectives_say_what_is_valid(text):
    with pytest.raises(ValueError, match="success_lower_bound"):
        parse_objective(text)


def test_cvar_is_the_mean_of_the_worst_share():
    returns = np.array([[5.0, 1.0, 3.0, 2.0, 4.0], [1.0, 1.0, 1.0, 1.0, 1.0]])
    got = objective_fitness(Objective("cvar", 0.4), returns, np.ones_like(returns, bool))
    assert got.tolist() == [1.5, 1.0]  # worst 2 of 5: (1 + 2) / 2
    assert objective_fitness(Objective("mean"), returns, returns > 0).tolist() == [3.0, 1.0]


def test_success_lower_bound_orders_by_successes_then_score():
    success = np.array([[True] * 8, [True] * 7 + [False], [True] * 7 + [False]])
    score = np.array([[0.0] * 8, [1.0] * 8, [0.5] * 8])
    f = objective_fitness(Objective("success_lower_bound"), np.zeros((3, 8)), success, score)
    assert f[0] > f[1] > f[2]  # one more success beats any score; then the score breaks the tie


def test_quality_score_folds_the_chatter_slack_into_successes_only():
    # slack to the chatter limit: 1 - rate / limit (4 reversals/s of 5 allowed leaves 0.2)
    score = np.array([[0.9, 0.9, -0.5, 0.1]])
    success = np.array([[True, True, False, True]])
    measures = {"chatter_hz": np.array([[0.0, 4.0, 9.0, 1.0]])}
    got = quality_score(score, success, measures, QualityLimits(chatter_hz=5.0))
    np.testing.assert_allclose(got, [[0.9, 0.2, -0.5, 0.1]])
    # no chatter limit: the scores as they were
    assert quality_score(score, success, measures, QualityLimits(chatter_hz=None)) is score
    # the tie-break then prefers the genome further from chattering, at equal successes
    two = np.vstack([quality_score(score, success, {"chatter_hz": m}, QualityLimits(chatter_hz=5.0))
                     for m in (np.array([[0.0, 0.0, 0.0, 0.0]]), measures["chatter_hz"])])
    f = objective_fitness(Objective("success_lower_bound"), np.zeros((2, 4)), np.vstack([success, success]), two)
    assert f[0] > f[1]


def test_plan_distribution_follows_the_plan_and_its_own_streams():
    physics = make_physics("pretrial/CartPole-v0", start_spread={"x": 0.05, "theta": 0.05})
    plan = load_plan(ROOT / "configs" / "sweeps" / "cartpole.toml", physics)
    dist = PlanDistribution.from_plan(plan.vary, physics, plan.params)
    base = physics.param_table.resolve_batch(plan.params, 400)
    sc = dist.draw(physics, 400, 12345, base)
    for v in plan.vary:
        x = sc.params[:, physics.param_table.index(v.name)] if v.name in physics.param_table else sc.perturb[v.name]
        assert v.box_low <= x.min() and x.max() <= v.box_high  # inside the dispersion
        assert x.max() - x.min() > 0.8 * (v.box_high - v.box_low)  # and spread over it
    again = dist.draw(physics, 400, 12345, base)
    np.testing.assert_array_equal(sc.params, again.params)
    other = dist.draw(physics, 400, 12346, base)
    assert not np.array_equal(sc.params, other.params)
    # the curriculum shrinks draws toward nominal
    half = dist.draw(physics, 400, 12345, base, ramp=0.5)
    i = physics.param_table.index("pole_mass")
    nominal = dist.nominal["pole_mass"]
    np.testing.assert_allclose(half.params[:, i] - nominal, 0.5 * (sc.params[:, i] - nominal), rtol=1e-12)


class _Serial:
    workers = 1

    def map(self, fn, items):
        return [fn(i) for i in items]


class _Scaled:
    """The LQR command times a factor (below the loop's lower gain margin the loop is unstable)."""

    feed_forward = True
    n_policies = 1

    def __init__(self, inner, factor):
        self.inner, self.factor = inner, factor

    def reset(self, batch_size):
        self.inner.reset(batch_size)

    def act(self, obs):
        return self.factor * self.inner.act(obs)


def test_short_verdict_agrees_with_the_linear_loop():
    from pretrial.analysis.sweep import controlled
    from pretrial.evolution.plan_training import short_verdict

    ctl = controlled("lqr", str(ROOT / "configs" / "sweeps" / "cartpole.toml"))
    good = short_verdict(ctl.plan, ctl.physics, ctl.base_params, ctl.controller, _Serial(), 128, 99)
    # the LQR meets the plan (tests/sim/test_quality.py, the sweep itself): the short form must say so too
    assert good["verdict"] == "pass" and good["met"] == good["judged"] >= 5
    assert good["montecarlo"]["samples"] == 128
    assert not any(r["name"].startswith("margin ") for r in good["requirements"])
    # at a tenth of its gain the sampled loop is unstable (lower gain margin 0.24, from pretrial.linear,
    # checked against python-control in tests/analysis/test_linear.py)
    bad = short_verdict(ctl.plan, ctl.physics, ctl.base_params, _Scaled(ctl.controller, 0.1), _Serial(), 64, 99)
    assert bad["verdict"] == "fail" and bad["met"] < good["met"]


def test_linear_shortfall_zero_for_the_lqr_and_whole_when_unstable():
    from pretrial.analysis.sweep import controlled
    from pretrial.evolution.plan_training import linear_shortfall

    ctl = controlled("lqr", str(ROOT / "configs" / "sweeps" / "cartpole.toml"))
    # the LQR's margins exceed the plan's 6 dB / 45 deg on both loops (the sweep shows 12.4 dB / 54.8 deg)
    assert linear_shortfall(ctl.plan, ctl.physics, ctl.base_params, ctl.controller) == 0.0
    # a tenth of the gain: both loops unstable, each of the two requirements missed whole on each loop
    assert linear_shortfall(ctl.plan, ctl.physics, ctl.base_params, _Scaled(ctl.controller, 0.1)) == 4.0


def test_training_streams_never_meet_the_plans_own(tmp_path):
    from pretrial.analysis.campaign import _SEED_KEYS
    from pretrial.analysis.stats import derive_seed
    from pretrial.evolution.config import load_config
    from pretrial.evolution.task import SCENARIO_STREAM, make_task, training_scenarios
    from pretrial.sim import streams

    plan_path = ROOT / "configs" / "sweeps" / "cartpole.toml"
    cfg_path = tmp_path / "c.toml"
    cfg_path.write_text(f'[task]\nenv = "pretrial/CartPole-v0"\nepisodes = 16\nplan = "{plan_path}"\n'
                        "[run]\nseed = 1\n", encoding="utf-8")  # the plan's own seed is 1 too
    cfg = load_config(cfg_path)
    task = make_task(cfg)
    assert task.distribution is not None and task.quality is not None
    train = np.concatenate([training_scenarios(task, 16, 1, SCENARIO_STREAM, k, generation=k).keys for k in range(20)])
    mc_seed = derive_seed(1, _SEED_KEYS["montecarlo"])
    mc = streams.episode_keys(streams.episode_keys(np.uint64(mc_seed), np.arange(2000)), np.zeros(2000, np.int64))
    assert len(set(train.tolist()) & set(mc.tolist())) == 0
    assert len(set(train.tolist())) == len(train)


def test_evolve_against_a_plan_records_the_predicted_verdict(tmp_path, capsys):
    import json

    from pretrial.cli.main import main

    cfg = tmp_path / "c.toml"
    cfg.write_text('[task]\nenv = "pretrial/CartPole-v0"\nepisodes = 4\nobjective = "cvar:0.5"\n'
                   "[neat]\npop_size = 12\n[run]\ngenerations = 2\nseed = 3\nlinear_every = 1\nlinear_top = 2\n"
                   "verdict_samples = 16\nfinalists = 2\nvalidation_episodes = 4\nworkers = 1\n", encoding="utf-8")
    full = (ROOT / "configs" / "sweeps" / "cartpole.toml").read_text(encoding="utf-8")
    plan = tmp_path / "small.toml"
    plan.write_text(full.split("[analysis]")[0] + '[analysis]\nrun = ["montecarlo", "linear"]\n'
                    "montecarlo_samples = 32\n[require]\nsuccess_rate = 0.9\n", encoding="utf-8")
    assert main(["evolve", str(cfg), "--plan", str(plan), "--out", str(tmp_path / "run"), "--json"]) == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["predicted_verdict"] in ("pass", "fail") and summary["confirm"].startswith("pretrial sweep ")
    doc = json.loads((tmp_path / "run" / "champion.json").read_text(encoding="utf-8"))
    tr = doc["training"]
    assert tr["objective"] == "cvar:0.5" and tr["plan"]["name"] == "small.toml"
    assert tr["plan"]["vary"] == ["pole_mass", "cart_mass", "pole_half_length", "actuator_gain",
                                  "actuator_delay_s", "sensor_noise_std"]
    rows = tr["predicted_verdict"]["requirements"]
    assert rows and all({"name", "required", "measured", "pass"} <= set(r) for r in rows)
    assert all("requirements_met" in f for f in tr["finalists"])
    # the sweep of that champion with that plan says it was trained on the plan's distribution
    capsys.readouterr()
    words = ["sweep", str(tmp_path / "run"), "--plan", str(plan), "--out", str(tmp_path / "sw"), "--json"]
    assert main(words) in (0, 1)
    res = json.loads((tmp_path / "sw" / "results.json").read_text(encoding="utf-8"))
    assert res["cautions"][0].startswith("This controller was trained against this plan's distribution")


def test_next_steps_name_the_plan_trained_against(tmp_path, capsys):
    from pretrial.cli.main import main

    full = (ROOT / "configs" / "sweeps" / "cartpole.toml").read_text(encoding="utf-8")
    plan = tmp_path / "mine.toml"
    plan.write_text(full.split("[analysis]")[0] + '[analysis]\nrun = ["montecarlo"]\nmontecarlo_samples = 16\n',
                    encoding="utf-8")
    cfg = tmp_path / "c.toml"
    cfg.write_text('[task]\nenv = "pretrial/CartPole-v0"\nepisodes = 2\nplan = "mine.toml"\n[neat]\npop_size = 8\n'
                   "[run]\ngenerations = 1\nfinalists = 1\nvalidation_episodes = 2\nverdict_samples = 16\n"
                   "workers = 1\n", encoding="utf-8")
    assert main(["evolve", str(cfg), "--out", str(tmp_path / "run"), "--quiet"]) == 0
    nxt = capsys.readouterr().out.split("next:")[1]
    sweep_line = next(line for line in nxt.splitlines() if "pretrial sweep" in line)
    assert f"--plan {plan}" in sweep_line  # not the placeholder, nor a plan guessed from the config's name


@pytest.mark.parametrize(("text", "needle"), [
    ('plan = "nope.toml"', "task.plan"),
    ('objective = "median"', "task.objective"),
    ('plan = "PLAN"\n[task.randomize]\npole_mass = [0.08, 0.12]', "task.randomize"),
])
def test_training_config_errors_name_the_key(tmp_path, text, needle):
    from pretrial.errors import InputError
    from pretrial.evolution.config import load_config

    plan = ROOT / "configs" / "sweeps" / "cartpole.toml"
    path = tmp_path / "c.toml"
    path.write_text('[task]\nenv = "pretrial/CartPole-v0"\n' + text.replace("PLAN", str(plan)) + "\n",
                    encoding="utf-8")
    with pytest.raises(InputError) as err:
        load_config(path)
    assert needle in str(err.value) and "\n" not in str(err.value)


def test_corner_share_puts_rows_on_the_box_corners():
    physics = make_physics("pretrial/CartPole-v0", start_spread={"x": 0.05, "theta": 0.05})
    plan = load_plan(ROOT / "configs" / "sweeps" / "cartpole.toml", physics)
    dist = PlanDistribution.from_plan(plan.vary, physics, plan.params, corner_share=0.5)
    sc = dist.draw(physics, 40, 5, physics.param_table.resolve_batch(plan.params, 40))
    for v in plan.vary:
        x = sc.params[:, physics.param_table.index(v.name)] if v.name in physics.param_table else sc.perturb[v.name]
        ends = np.isclose(x[20:], v.box_low, rtol=1e-12) | np.isclose(x[20:], v.box_high, rtol=1e-12)
        assert ends.all()  # the last half: every name at one end of its dispersion
        assert not np.isclose(x[:20], v.box_low).all()  # the first half: the plan's own distribution
