"""The Python API: the README's example runs as written, and each function agrees with its command."""

from __future__ import annotations

import json
import re
import shutil

import pytest
from helpers import ROOT, balancing_policy_file, quick_plan

import pretrial
from pretrial.cli.main import main

SMALL_PLAN = quick_plan(seed=5, samples=32, required=0.5)


def _replays(doc) -> list[str]:
    """Every replay command in a results document."""
    if isinstance(doc, dict):
        return [v for k, v in doc.items() if k.startswith("replay") and isinstance(v, str)] + [
            c for v in doc.values() for c in _replays(v)]
    if isinstance(doc, list):
        return [c for v in doc for c in _replays(v)]
    return []


def _readme_python() -> str:
    text = (ROOT / "README.md").read_text()
    return re.search(r"## Python API\n.*?```python\n(.*?)```", text, flags=re.S).group(1)


@pytest.mark.slow
def test_readme_example_runs_as_written(tmp_path, monkeypatch, capsys):
    shutil.copytree(ROOT / "configs", tmp_path / "configs")
    monkeypatch.chdir(tmp_path)
    exec(compile(_readme_python(), "README.md (Python API)", "exec"), {})
    out = capsys.readouterr().out.splitlines()
    assert out[0].split()[0] in ("pass", "fail")  # the predicted verdict
    assert out[1].split()[0] in ("pass", "fail")  # the sweep's verdict
    assert (tmp_path / "sweeps" / "api-demo" / "report.html").is_file()
    assert (tmp_path / "export" / "api-demo" / "pretrial_policy.c").is_file()
    res = pretrial.read_sweep(tmp_path / "sweeps" / "api-demo")
    assert res.doc["policy"]["path"].endswith("policy.json")  # the in-memory champion, kept beside the report


def test_replay_function_equals_the_command(capsys):
    rep = pretrial.replay("lqr", env="CartPole-v0", settings={"pole_mass": 0.3}, episodes=3, seed=2)
    assert main(["replay", "lqr", "--env", "CartPole-v0", "--set", "pole_mass=0.3", "--episodes", "3",
                 "--seed", "2", "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    from pretrial.playback.replay import summary

    mine = summary(rep)
    assert mine["returns"] == doc["returns"] and mine["success"] == doc["success"]
    assert rep.outcome.success.shape[-1] == 3


def test_sweep_of_a_loaded_policy_keeps_it_beside_the_report(tmp_path):
    plan = tmp_path / "plan.toml"
    plan.write_text(SMALL_PLAN)
    policy = pretrial.load_policy(balancing_policy_file(tmp_path))
    res = pretrial.sweep(policy, plan, out=tmp_path / "s", workers=1)
    assert res.directory == tmp_path / "s"
    saved = pretrial.load_policy(tmp_path / "s" / "policy.json")
    assert saved.content_hash == policy.content_hash
    assert res.doc["policy"]["content_sha256"] == policy.content_hash
    # the report's replay commands name the saved file, so they run as printed
    commands = _replays(res.doc)
    assert commands and all(c.startswith(f"pretrial replay {tmp_path / 's' / 'policy.json'} ") for c in commands)
    again = pretrial.read_sweep(tmp_path / "s" / "results.json")
    assert again.doc == res.doc and again.passed == (res.verdict == "pass")
    assert [r.name for r in res.requirements] == [r["name"] for r in res.doc["requirements"]]
    # the same sweep by path gives the same verdict and Monte Carlo counts (same plan, seed and controller)
    by_path = pretrial.sweep(tmp_path / "s" / "policy.json", plan, out=tmp_path / "t", workers=1)
    assert by_path.verdict == res.verdict
    assert by_path.doc["montecarlo"]["successes"] == res.doc["montecarlo"]["successes"]


def test_bad_input_raises_the_one_line_error(tmp_path):
    with pytest.raises(pretrial.InputError, match="no such file"):
        pretrial.sweep("lqr", tmp_path / "missing.toml", out=tmp_path / "s")
    assert not (tmp_path / "s").exists()
    with pytest.raises(pretrial.InputError, match="nosuch"):
        pretrial.replay("lqr", env="CartPole-v0", settings={"nosuch": 1.0})


def test_export_function_writes_what_the_command_writes(tmp_path):
    policy = balancing_policy_file(tmp_path)
    files = pretrial.export_policy(policy, "python", tmp_path / "a")
    assert main(["export", str(policy), "--to", "python", "--out", str(tmp_path / "b")]) == 0
    for f in files:
        assert f.read_bytes() == (tmp_path / "b" / f.name).read_bytes()


def test_library_warnings_go_through_logging(tmp_path, caplog):
    from pretrial.log import warn

    with caplog.at_level("WARNING", logger="pretrial"):
        warn("pretrial: warning: 3 episodes diverged")
    assert [r.getMessage() for r in caplog.records] == ["3 episodes diverged"]


def test_calibrate_function_equals_the_command(tmp_path, capsys):
    logs = [ROOT / "configs" / "bench" / "run1.csv", ROOT / "configs" / "bench" / "run2.csv"]
    names = ["cart_mass", "pole_mass", "pole_half_length"]
    cal = pretrial.calibrate(logs, "CartPole-v0", names, fixed={"gravity": 9.81}, bootstrap=0, out=tmp_path / "api")
    argv = ["calibrate", *map(str, logs), "--env", "CartPole-v0", "--set", "gravity=9.81", "--fit", ",".join(names),
            "--bootstrap", "0", "--out", str(tmp_path / "cli"), "--json"]
    assert main(argv) == 0
    doc = json.loads(capsys.readouterr().out)
    assert cal.summary["content_sha256"] == doc["content_sha256"]  # the same file, byte for byte
    assert (tmp_path / "api" / "calibration.json").read_bytes() == (tmp_path / "cli" / "calibration.json").read_bytes()
    assert cal.estimates == {n: v["estimate"] for n, v in doc["params"].items()}
    assert set(cal.intervals) == set(names)


def test_evolve_reports_each_generation_to_an_observer(tmp_path):
    from pretrial.evolution.reporters import Reporter

    class Rows(Reporter):
        def __init__(self):
            self.rows = []

        def generation_done(self, row, seconds, eta_s, best_success):
            self.rows.append(row)

    rows = Rows()
    run = pretrial.evolve(ROOT / "configs" / "cartpole.toml", generations=2, workers=1, out=tmp_path / "run",
                          reporters=[rows])
    assert [r["generation"] for r in rows.rows] == [0, 1]
    history = (tmp_path / "run" / "history.csv").read_text().splitlines()
    assert len(history) == 3 and history[1].startswith("0,")  # the rows the observer saw are the run's history
    assert run.champion.content_hash == pretrial.load_policy(tmp_path / "run").content_hash


def test_api_errors_name_keywords_not_flags(tmp_path):
    with pytest.raises(pretrial.InputError) as err:
        pretrial.replay("lqr", env="CartPole-v0", episodes=0)
    assert err.value.message.startswith("episodes: 0 not allowed") and "--" not in err.value.message
    with pytest.raises(pretrial.InputError) as err:
        pretrial.replay("lqr", env="CartPole-v0", settings={"nosuch": 1.0})
    assert err.value.message.startswith("settings ") and "--" not in err.value.message
