"""Sweep plan validation: every bad plan is one line naming file and key, exit 2, nothing written."""

from __future__ import annotations

import math
from pathlib import Path

import pytest

from pretrial.analysis import plan as plan_mod
from pretrial.cli.main import main
from pretrial_envs import make_physics

HEAD = """
[scenario]
env = "pretrial/CartPole-v0"
episodes = 80
horizon = 1.0
"""
GAIN = """
[[vary]]
name = "actuator_gain"
range = [0.5, 2.0]
"""


def refused(capsys, tmp_path: Path, text: str, policy: str = "lqr") -> str:
    """Run ``sweep`` on a plan that must be refused; return its one error line."""
    path = tmp_path / "bad.toml"
    path.write_text(text, encoding="utf-8")
    out = tmp_path / "sweep-out"
    code = main(["sweep", policy, "--plan", str(path), "--out", str(out), "--workers", "1"])
    cap = capsys.readouterr()
    assert code == 2
    lines = cap.err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("pretrial: error: "), cap.err
    assert "Traceback" not in cap.err and cap.out == ""
    # nothing written: no sweep directory, no temporary .partial sibling
    assert not out.exists()
    assert not [p for p in tmp_path.iterdir() if ".partial" in p.name]
    assert str(path) in lines[0]  # names the file
    return lines[0]


def test_unknown_top_level_key_suggests_nearest(capsys, tmp_path):
    msg = refused(capsys, tmp_path, HEAD + GAIN + "[analysys]\nrun = ['margins']\n")
    assert "analysys" in msg and "analysis" in msg.replace("analysys", "")


def test_unknown_analysis_name_suggests_nearest(capsys, tmp_path):
    msg = refused(capsys, tmp_path, HEAD + GAIN + "[analysis]\nrun = ['margin']\n")
    assert "analysis.run[0]" in msg and "'margin'" in msg and "did you mean 'margins'" in msg


def test_unknown_vary_name_suggests_nearest(capsys, tmp_path):
    msg = refused(capsys, tmp_path, HEAD + "[[vary]]\nname = 'pole_mas'\nrange = [0.05, 0.2]\n")
    assert "vary[0].name" in msg and "pole_mas" in msg and "pole_mass" in msg.replace("pole_mas'", "")


@pytest.mark.parametrize("rng", ["[1.0, 1.0]", "[2.0, 0.5]"])
def test_empty_or_reversed_range(capsys, tmp_path, rng):
    msg = refused(capsys, tmp_path, HEAD + f"[[vary]]\nname = 'actuator_gain'\nrange = {rng}\n")
    assert "vary[0].range" in msg and "empty or reversed" in msg


def test_range_outside_valid_range(capsys, tmp_path):
    # a pole mass below zero is no plant at all
    msg = refused(capsys, tmp_path, HEAD + "[[vary]]\nname = 'pole_mass'\nrange = [-0.1, 0.2]\n")
    assert "vary[0].range" in msg and "valid range of pole_mass" in msg


def test_ratio_units_with_zero_nominal(capsys, tmp_path):
    # sensor noise is 0 at nominal: "twice nothing" is meaningless
    msg = refused(capsys, tmp_path, HEAD + "[[vary]]\nname = 'sensor_noise_std'\nunits = 'ratio'\nrange = [0.0, 2.0]\n")
    assert "vary[0].units" in msg and "sensor_noise_std" in msg and "ratio" in msg


def test_too_few_episodes_suggests_k(capsys, tmp_path):
    text = HEAD.replace("episodes = 80", "episodes = 100") + GAIN + "[require]\nsuccess_rate = 0.99\n"
    msg = refused(capsys, tmp_path, text)
    # K >= 3.84 p / (1 - p) (Wilson 1927, all succeeding) gives 381 for p = 0.99
    assert "scenario.episodes" in msg and "381" in msg


def test_dispersion_outside_range(capsys, tmp_path):
    text = HEAD + "[[vary]]\nname = 'actuator_gain'\nrange = [0.5, 2.0]\ndispersion = [0.4, 1.2]\n"
    msg = refused(capsys, tmp_path, text)
    assert "vary[0].dispersion" in msg


def test_required_margin_of_a_name_not_varied(capsys, tmp_path):
    text = HEAD + GAIN + "[require.margins]\npole_mass = { high_ratio = 2.0 }\n"
    msg = refused(capsys, tmp_path, text)
    assert "require.margins.pole_mass" in msg and "not varied" in msg


def test_unknown_key_inside_vary(capsys, tmp_path):
    msg = refused(capsys, tmp_path, HEAD + GAIN + "distrbution = 'normal'\n")
    assert "vary[0]" in msg and "distrbution" in msg and "distribution" in msg.replace("distrbution", "")


def test_lqr_with_a_plan_without_env(capsys, tmp_path):
    msg = refused(capsys, tmp_path, HEAD.replace('env = "pretrial/CartPole-v0"\n', "") + GAIN)
    assert "lqr" in msg and "scenario.env" in msg


def test_episodes_needed_matches_the_all_success_wilson_rule():
    # Wilson (1927): with all K succeeding the 95% lower bound is K / (K + z^2), z = 1.959964
    # (two-sided 95% normal quantile, any statistics table), so K >= z^2 p / (1 - p).
    assert plan_mod.episodes_needed(0.99) == 381  # 3.8415 * 99 = 380.3 -> 381
    assert plan_mod.episodes_needed(0.95) == 73  # 3.8415 * 19 = 72.99 -> 73
    for p in (0.5, 0.9, 0.95, 0.99, 0.999):
        k = plan_mod.episodes_needed(p)
        assert k / (k + plan_mod.Z2) >= p > (k - 1) / (k - 1 + plan_mod.Z2)


def test_ratio_units_are_multiples_of_the_nominal(tmp_path):
    path = tmp_path / "ok.toml"
    path.write_text(HEAD + "[[vary]]\nname = 'pole_mass'\nunits = 'ratio'\nrange = [0.5, 3.0]\n"
                    "dispersion = [0.8, 1.5]\n", encoding="utf-8")
    physics = make_physics("pretrial/CartPole-v0")
    p = plan_mod.load_plan(path, physics)
    nominal = physics.param_table["pole_mass"].nominal
    v = p.vary[0]
    assert v.nominal == nominal and v.given_as == "ratio"
    assert math.isclose(v.low, 0.5 * nominal) and math.isclose(v.high, 3.0 * nominal)
    assert math.isclose(v.box_low, 0.8 * nominal) and math.isclose(v.box_high, 1.5 * nominal)
