"""Hybrid plants from the command line: calibrate --residual, then replay and sweep on the residual; bad
``residual`` options refused in one line (the bad-input contract of tests/cli/test_bad_input.py: exit 2,
one line naming the file, key or value, nothing written).
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from helpers import balancing_policy_file, cli_refused, residual_file, snapshot

from pretrial.cli.main import main

REPO = Path(__file__).resolve().parents[2]
BENCH = REPO / "configs" / "bench"
CONFIG = REPO / "configs" / "cartpole.toml"


@pytest.fixture
def work(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    return tmp_path


def _share_line(text: str) -> str:
    return next(line for line in text.splitlines() if line.startswith("outside the residual's data envelope"))


def test_replay_prints_the_share_outside_the_envelope(capsys, work):
    residual_file(work / "r.json")  # hanging-pole data: an upright replay is all outside
    assert main(["replay", "lqr", "--env", "CartPole-v0", "--option", "residual=r.json", "--episodes", "2"]) == 0
    out = capsys.readouterr().out
    assert "100.0% of the simulated time (2 of 2 episodes" in _share_line(out)
    assert "--option residual=r.json" in out  # the reproducing command keeps it
    assert main(["replay", "lqr", "--env", "CartPole-v0", "--option", "residual=r.json", "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["envelope"]["share"] == 1.0 and doc["envelope"]["episodes"][0]["first_variable"] == "theta"
    assert doc["envelope"]["episodes"][0]["first_time_s"] == 0.0
    # physics alone: no envelope line at all
    assert main(["replay", "lqr", "--env", "CartPole-v0"]) == 0
    assert "residual's data envelope" not in capsys.readouterr().out


@pytest.mark.slow
def test_calibrate_residual_then_replay_on_it(capsys, work):
    # end to end on the shipped bench logs (about 10 s: the fit and two bootstrap refits)
    argv = ["calibrate", str(BENCH / "run1.csv"), "--env", "CartPole-v0", "--set", "gravity=9.81", "--fit",
            "cart_mass", "--bootstrap", "2", "--residual", "--out", "cal"]
    assert main(argv) == 0
    capsys.readouterr()
    assert main(["replay", "lqr", "--env", "CartPole-v0", "--option", "residual=cal/residual.json"]) == 0
    line = _share_line(capsys.readouterr().out)
    assert "100.0% of the simulated time" in line and "cal/residual.json" in line


def _bad_residual_files(d: Path) -> dict[str, Path]:
    good = residual_file(d / "good.json")
    doc = json.loads(good.read_text())
    edited = dict(doc, coefficients=[[1.0] + row[1:] for row in doc["coefficients"]])
    (d / "edited.json").write_text(json.dumps(edited))
    (d / "other.json").write_text(json.dumps({"schema": "pretrial.calibration", "version": 1}))
    (d / "broken.json").write_text("{\"schema\": ")
    return {"good": good, "edited": d / "edited.json", "other": d / "other.json", "broken": d / "broken.json"}


@pytest.mark.parametrize("value, needle", [
    ("missing.json", "no such file"),
    ("edited.json", "content_sha256"),
    ("other.json", "schema"),
    ("broken.json", "not valid JSON"),
    ("3", "not a path"),
])
def test_replay_bad_residual_option(capsys, work, value, needle):
    _bad_residual_files(work)
    before = snapshot(work)
    line = cli_refused(capsys, ["replay", "lqr", "--env", "CartPole-v0", "--option", f"residual={value}",
                                "--csv", "trace.csv"])
    assert "--option" in line and needle in line and "residual" in line, line
    assert snapshot(work) == before


def test_another_plants_residual_is_refused(capsys, work):
    _bad_residual_files(work)
    line = cli_refused(capsys, ["replay", "lqr", "--env", "GantryCrane-v0", "--option", "residual=good.json"])
    assert "good.json" in line and "fitted on 'pretrial/CartPole-v0'" in line, line


def test_option_with_a_plan_is_refused(capsys, work):
    _bad_residual_files(work)
    (work / "plan.toml").write_text('[scenario]\nenv = "pretrial/CartPole-v0"\n')
    line = cli_refused(capsys, ["replay", "lqr", "--plan", "plan.toml", "--option", "residual=good.json"])
    assert "--option" in line and "scenario.options" in line, line


@pytest.mark.parametrize("value, needle", [("missing.json", "no such file"), ("edited.json", "content_sha256"),
                                           ("7", "not a path")])
def test_sweep_plan_with_a_bad_residual(capsys, work, value, needle):
    plans = work / "plans"
    plans.mkdir()
    _bad_residual_files(plans)
    value_text = value if value.isdigit() else f'"{value}"'
    (plans / "plan.toml").write_text(f'[scenario]\nenv = "pretrial/CartPole-v0"\n\n[scenario.options]\n'
                                     f'residual = {value_text}\n\n[analysis]\nrun = ["linear"]\n')
    before = snapshot(work)
    line = cli_refused(capsys, ["sweep", "lqr", "--plan", str(plans / "plan.toml"), "--out", str(work / "out"),
                                "--workers", "1"])
    assert "plan.toml: scenario.options" in line and needle in line, line
    if not value.isdigit():  # a relative path resolves against the plan's directory, not the working one
        assert str(plans / value) in line, line
    assert snapshot(work) == before


def test_config_with_a_bad_residual(capsys, work):
    text = CONFIG.read_text()
    assert "[task]" in text
    (work / "run.toml").write_text(text + '\n[task.options]\nresidual = "missing.json"\n'
                                   if "[task.options]" not in text else
                                   text.replace("[task.options]", '[task.options]\nresidual = "missing.json"', 1))
    before = snapshot(work)
    line = cli_refused(capsys, ["evolve", "run.toml", "--out", str(work / "run"), "--workers", "1", "--quiet"])
    assert "run.toml: task.options" in line and str(work / "missing.json") in line, line
    assert snapshot(work) == before


def test_a_policy_refuses_a_residual_other_than_its_training_one(capsys, work):
    files = _bad_residual_files(work)
    doc = json.loads(balancing_policy_file(work).read_text())
    doc["training"]["residual"] = {"path": "bench/residual.json", "sha256": "f" * 64}
    from pretrial.controller.policy import content_hash, save_policy

    doc["content_sha256"] = content_hash(doc)
    save_policy(work / "trained.json", doc)
    line = cli_refused(capsys, ["replay", "trained.json", "--option", f"residual={files['good']}"])
    assert "bench/residual.json" in line and "ffffffffffffffff" in line and "good.json" in line, line


def test_evolved_on_a_hybrid_plant_records_its_residual_and_replay_checks_it(capsys, work):
    # the config names its residual relative to itself; the champion records path and hash; replay of
    # the champion runs on that residual, and refuses it once the file holds another residual
    (work / "cfg").mkdir()
    path = residual_file(work / "cfg" / "r.json")
    (work / "cfg" / "run.toml").write_text('[task]\nenv = "pretrial/CartPole-v0"\nepisodes = 2\nhorizon = 1.0\n\n'
                                           '[task.options]\nresidual = "r.json"\n\n[neat]\npop_size = 10\n\n'
                                           '[run]\ngenerations = 1\nseed = 3\nvalidation_episodes = 4\n')
    assert main(["evolve", "cfg/run.toml", "--out", "run", "--workers", "1", "--quiet"]) == 0
    champion = json.loads((work / "run" / "champion.json").read_text())
    sha = json.loads(path.read_text())["content_sha256"]
    assert champion["training"]["residual"] == {"path": str(path.resolve()), "sha256": sha}
    assert champion["env"]["options"]["residual"] == str(path.resolve())
    capsys.readouterr()
    assert main(["replay", "run"]) == 0
    assert "100.0% of the simulated time" in _share_line(capsys.readouterr().out)
    residual_file(path, margin=0.2)  # another residual (its envelope's margin) at the same path
    before = snapshot(work)
    line = cli_refused(capsys, ["replay", "run"])
    assert "env.options" in line and sha[:16] in line and "is not the residual the policy" in line, line
    assert snapshot(work) == before


def test_sweep_prints_the_share_and_the_caution(capsys, work):
    (work / "plans").mkdir()
    residual_file(work / "plans" / "r.json")
    (work / "plans" / "plan.toml").write_text(
        '[scenario]\nenv = "pretrial/CartPole-v0"\nhorizon = 1.0\n\n[scenario.options]\nresidual = "r.json"\n\n'
        '[[vary]]\nname = "residual_scale"\nrange = [0.0, 2.0]\n\n[analysis]\nrun = ["montecarlo"]\n'
        'montecarlo_samples = 20\n')
    assert main(["sweep", "lqr", "--plan", "plans/plan.toml", "--out", "out", "--workers", "1"]) == 1
    out = capsys.readouterr().out
    assert "outside the residual's data envelope: 100.0% of the simulated time (montecarlo)" in out
    assert "caution: results rest on extrapolation" in out
