"""`pretrial envs`: listings, JSON, and one-line errors with exit code 2."""

from __future__ import annotations

import json

import pytest

from pretrial.cli.main import main


def test_list_text_and_json(capsys):
    assert main(["envs"]) == 0
    out = capsys.readouterr().out
    for env_id in ("pretrial/CartPole-v0", "pretrial/DronePair-v0", "pretrial/GantryCrane-v0"):
        assert env_id in out
    assert main(["envs", "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert {e["id"] for e in data["environments"]} >= {"pretrial/CartPole-v0", "pretrial/GantryCrane-v0"}


@pytest.mark.parametrize("env_id", ["pretrial/CartPole-v0", "DronePair-v0", "gantrycrane-v0"])
def test_show_one(env_id, capsys):
    assert main(["envs", env_id]) == 0
    out = capsys.readouterr().out
    assert "Parameters" in out and "gravity" in out and "Success:" in out
    assert main(["envs", env_id, "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    names = [p["name"] for p in data["params"]]
    assert "gravity" in names
    for p in data["params"]:
        assert p["low"] <= p["nominal"] <= p["high"] and p["unit"] and p["doc"]


def test_options_change_the_table(capsys):
    assert main(["envs", "CartPole-v0", "--option", "poles=2", "--json"]) == 0
    names = [p["name"] for p in json.loads(capsys.readouterr().out)["params"]]
    assert any(n.startswith("pole2_") for n in names)


@pytest.mark.parametrize(
    ("argv", "needle"),
    [
        (["envs", "NoSuchEnv-v9"], "NoSuchEnv-v9"),
        (["envs", "CartPole-v0", "--option", "poles=7"], "poles"),
        (["envs", "CartPole-v0", "--option", "poles"], "NAME=VALUE"),
    ],
)
def test_bad_input_is_one_line_exit_2(argv, needle, capsys):
    assert main(argv) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and needle in err and "Traceback" not in err
