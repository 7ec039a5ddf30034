"""A plan that draws plant parameters from a calibration: estimates as nominal, bootstrap rows jointly.

Drawing whole bootstrap replicates keeps the dependence between the fitted parameters (Efron &
Tibshirani 1993, An Introduction to the Bootstrap: a replicate is one joint draw of every
statistic), so names fitted together move together in Monte Carlo.
"""

from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np
import pytest

from pretrial.analysis.plan import load_plan
from pretrial.calibration.report import SCHEMA, VERSION, with_hash
from pretrial.cli.main import main
from pretrial.errors import InputError
from pretrial_envs import make_physics


def _calibration(path: Path, env: str = "pretrial/CartPole-v0") -> Path:
    rng = np.random.default_rng(5)
    cart = 1.0 + 0.05 * rng.standard_normal(12)
    rows = [[float(m), float(0.1 * m)] for m in cart]  # pole_mass = 0.1 cart_mass: perfectly correlated
    doc = {"schema": SCHEMA, "version": VERSION, "env": {"id": env, "options": {}}, "fixed": {"gravity": 9.81},
           "names": ["cart_mass", "pole_mass"],
           "params": {"cart_mass": {"estimate": 1.02, "std": 0.05, "ci95": [0.93, 1.1]},
                      "pole_mass": {"estimate": 0.102, "std": 0.005, "ci95": [0.093, 0.11]}},
           "correlation": [[1.0, 1.0], [1.0, 1.0]], "bootstrap": rows, "fit": {"rmse": {}, "segments": 3,
                                                                               "samples": 300}}
    path.write_text(json.dumps(with_hash(doc)), encoding="utf-8")
    return path


PLAN = """
[scenario]
env = "pretrial/CartPole-v0"
episodes = 8
horizon = 1.0
seed = 2
calibration = "cal.json"
[[vary]]
name = "actuator_gain"
range = [0.5, 2.0]
dispersion = [0.9, 1.1]
[analysis]
run = ["montecarlo"]
montecarlo_samples = 64
[require]
success_rate = 0.5
"""


def test_estimates_are_nominal_and_montecarlo_draws_whole_rows(tmp_path, capsys):
    _calibration(tmp_path / "cal.json")
    plan_path = tmp_path / "plan.toml"
    plan_path.write_text(PLAN, encoding="utf-8")
    plan = load_plan(plan_path, make_physics("pretrial/CartPole-v0"))
    assert plan.params["cart_mass"] == 1.02 and plan.params["pole_mass"] == 0.102 and plan.params["gravity"] == 9.81
    assert main(["sweep", "lqr", "--plan", str(plan_path), "--out", str(tmp_path / "sw"), "--workers", "1"]) in (0, 1)
    with (tmp_path / "sw" / "montecarlo.csv").open(encoding="utf-8") as f:
        rows = list(csv.DictReader(f))
    pairs = {(float(r["cart_mass [kg]"]), float(r["pole_mass [kg]"])) for r in rows}
    boot = {tuple(r) for r in json.loads((tmp_path / "cal.json").read_text())["bootstrap"]}
    assert len(rows) == 64 and pairs <= boot and len(pairs) > 6  # every sample is one replicate, many are used
    cm = np.array([p[0] for p in pairs])
    pm = np.array([p[1] for p in pairs])
    assert np.corrcoef(cm, pm)[0, 1] == pytest.approx(1.0, abs=1e-9)  # the dependence is kept
    res = json.loads((tmp_path / "sw" / "results.json").read_text(encoding="utf-8"))
    assert res["plan"]["resolved"]["calibration"]["names"] == ["cart_mass", "pole_mass"]
    assert {v["name"]: v["distribution"] for v in res["montecarlo"]["varied"]}["pole_mass"] == "calibration bootstrap"
    assert "draws them jointly" in (tmp_path / "sw" / "report.md").read_text(encoding="utf-8")


@pytest.mark.parametrize(("edit", "needle"), [
    (lambda t: t.replace('name = "actuator_gain"', 'name = "cart_mass"').replace("[0.5, 2.0]", "[0.5, 2.0]")
     .replace("dispersion = [0.9, 1.1]", "units = \"ratio\""), "bootstrap set"),
    (lambda t: t.replace("cal.json", "nope.json"), "scenario.calibration"),
])
def test_calibration_errors_name_the_key(tmp_path, edit, needle):
    _calibration(tmp_path / "cal.json")
    plan_path = tmp_path / "plan.toml"
    plan_path.write_text(edit(PLAN), encoding="utf-8")
    with pytest.raises(InputError) as err:
        load_plan(plan_path, make_physics("pretrial/CartPole-v0"))
    assert needle in str(err.value) and "\n" not in str(err.value)


def test_a_calibration_of_another_plant_is_refused(tmp_path):
    _calibration(tmp_path / "cal.json", env="pretrial/GantryCrane-v0")
    plan_path = tmp_path / "plan.toml"
    plan_path.write_text(PLAN, encoding="utf-8")
    with pytest.raises(InputError, match="calibrates pretrial/GantryCrane-v0"):
        load_plan(plan_path, make_physics("pretrial/CartPole-v0"))


def test_training_against_a_calibrated_plan_draws_whole_rows(tmp_path):
    from pretrial.evolution.plan_training import PlanDistribution

    _calibration(tmp_path / "cal.json")
    plan_path = tmp_path / "plan.toml"
    plan_path.write_text(PLAN, encoding="utf-8")
    physics = make_physics("pretrial/CartPole-v0")
    plan = load_plan(plan_path, physics)
    dist = PlanDistribution.from_plan(plan.vary, physics, plan.params, plan.calibration)
    sc = dist.draw(physics, 50, 9, physics.param_table.resolve_batch(plan.params, 50))
    i, j = physics.param_table.index("cart_mass"), physics.param_table.index("pole_mass")
    boot = {tuple(r) for r in json.loads((tmp_path / "cal.json").read_text())["bootstrap"]}
    assert {(float(a), float(b)) for a, b in sc.params[:, [i, j]]} <= boot


def test_a_calibration_naming_an_unknown_parameter_is_refused(tmp_path):
    path = _calibration(tmp_path / "cal.json")
    doc = json.loads(path.read_text())
    doc["names"] = ["cart_mass", "no_such_mass"]
    doc["params"]["no_such_mass"] = doc["params"].pop("pole_mass")
    path.write_text(json.dumps(with_hash({k: v for k, v in doc.items() if k != "content_sha256"})), encoding="utf-8")
    plan_path = tmp_path / "plan.toml"
    plan_path.write_text(PLAN, encoding="utf-8")
    with pytest.raises(InputError) as err:
        load_plan(plan_path, make_physics("pretrial/CartPole-v0"))
    assert "scenario.calibration" in str(err.value) and "no_such_mass" in str(err.value)
