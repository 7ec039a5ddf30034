"""``pretrial replay``: reproduction of sweep episodes, outputs, errors, and the task metrics.

References: the metric values on crafted traces are computed by hand from each metric's
documented definition (RMS, maxima, distance of a point to a segment); the file formats are
checked against their published signatures (PNG: ISO/IEC 15948 8-byte signature; GIF89a header)
and read back with Pillow and Python's :mod:`csv`; the controller under test is a linear state
feedback whose gain comes from scipy's discrete algebraic Riccati solver (LQR on the linearized
cart-pole), built as a neat-python genome.
"""

from __future__ import annotations

import csv
import json
import math
import shutil
from pathlib import Path

import numpy as np
import pytest
from helpers import balancing_policy_file

from pretrial.cli.main import main
from pretrial.console import CAUTIONS
from pretrial.playback import animation
from pretrial_envs import make_physics
from pretrial_envs.core import holds_from

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


# --------------------------------------------------------------------------- #
# a working controller without an evolution: LQR gains in a one-node genome
# --------------------------------------------------------------------------- #
@pytest.fixture(scope="module")
def policy_file(tmp_path_factory) -> Path:
    """A cart-pole policy file: one identity output node, u = -K x with K from scipy's DARE."""
    return balancing_policy_file(tmp_path_factory.mktemp("replay_policy"))


def replay_json(capsys, *args) -> dict:
    assert main(["replay", *map(str, args), "--json"]) == 0
    out = capsys.readouterr().out
    return json.loads(out)  # stdout is one JSON object and nothing else


def refused(capsys, *args) -> str:
    assert main(["replay", *map(str, args)]) == 2
    cap = capsys.readouterr()
    assert cap.out == ""
    lines = cap.err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("pretrial: error: ") and "Traceback" not in cap.err
    return lines[0]


# --------------------------------------------------------------------------- #
# the contract with the sweep: episode e of seed N does not depend on K
# --------------------------------------------------------------------------- #
def test_one_episode_replays_episode_zero_of_a_batch(capsys, policy_file):
    sets = ["--set", "sensor_noise_std=0.05", "--set", "pole_mass=0.4", "--set", "actuator_lag_s=0.03"]
    batch = replay_json(capsys, policy_file, "--seed", 5, "--episodes", 8, *sets)
    alone = replay_json(capsys, policy_file, "--seed", 5, "--episodes", 1, *sets)
    for key in ("returns", "success", "failure", "steps"):
        assert alone[key][0] == batch[key][0]
    for name, m in batch["metrics"].items():
        assert alone["metrics"][name]["per_episode"][0] == m["per_episode"][0], name
    assert batch["episodes"] == 8 and len(set(batch["returns"])) > 1  # the batch's episodes do differ


def test_same_seed_gives_identical_json(capsys, policy_file):
    args = (policy_file, "--seed", 3, "--episodes", 3, "--set", "sensor_noise_std=0.02")
    assert main(["replay", *map(str, args), "--json"]) == 0
    first = capsys.readouterr().out
    assert main(["replay", *map(str, args), "--json"]) == 0
    assert capsys.readouterr().out == first


def test_json_document(capsys, policy_file):
    doc = replay_json(capsys, policy_file, "--episodes", 2, "--set", "control_period_s=0.04")
    for key in ("episodes", "success_rate", "failure_modes", "metrics", "cautions", "policy", "env", "settings",
                "seed", "returns", "success", "files", "command"):
        assert key in doc
    assert doc["cautions"] == list(CAUTIONS)
    assert doc["env"] == "pretrial/CartPole-v0" and doc["seed"] == 0 and doc["episodes"] == 2
    assert doc["settings"] == {"control_period_s": 0.04} and doc["control_period_s"] == 0.04
    assert doc["policy"] == str(policy_file) and len(doc["policy_sha256"]) == 64
    assert doc["success"] == [True, True] and doc["success_rate"] == 1.0 and doc["failure_modes"] == {}
    m = doc["metrics"]["peak_angle"]
    assert m["unit"] == "rad" and len(m["per_episode"]) == 2 and m["worst"] == max(m["per_episode"])
    assert {"effort_rms_force", "saturated_fraction", "settling_time", "peak_cart_excursion",
            "residual_angle_rms"} <= set(doc["metrics"])
    assert "--set control_period_s=0.04" in doc["command"]


def test_reproduce_command_round_trips(capsys, policy_file):
    doc = replay_json(capsys, policy_file, "--seed", 4, "--episodes", 2, "--set", "pole_mass=0.25",
                      "--start", "theta=0.1")
    words = doc["command"].split()
    assert words[:2] == ["pretrial", "replay"]
    again = replay_json(capsys, *words[2:])
    assert again["returns"] == doc["returns"] and again["start"] == doc["start"]


def test_text_report_ends_with_cautions(capsys, policy_file):
    assert main(["replay", str(policy_file), "--episodes", "2", "--set", "pole_mass=0.3"]) == 0
    out = capsys.readouterr().out
    assert "success rate" in out and "peak_angle" in out and "rad" in out
    assert "reproduce: pretrial replay" in out and "--set pole_mass=0.3" in out
    assert out.rstrip().endswith(CAUTIONS[-1])


def test_failures_are_counted(capsys, policy_file):
    doc = replay_json(capsys, policy_file, "--set", "max_force=0", "--start", "theta=0.15", "--episodes", 2)
    assert doc["success_rate"] == 0.0 and doc["failure_modes"] == {"pole_fell": 2}
    assert doc["failure"] == ["pole_fell", "pole_fell"] and doc["steps"][0] < 100
    assert doc["metrics"]["settling_time"]["never"] == 2 and doc["metrics"]["settling_time"]["mean"] is None


def test_run_directory_is_its_champion(capsys, policy_file, tmp_path):
    run = tmp_path / "run"
    run.mkdir()
    shutil.copy(policy_file, run / "champion.json")
    a = replay_json(capsys, run, "--seed", 2)
    b = replay_json(capsys, policy_file, "--seed", 2)
    assert a["returns"] == b["returns"] and a["policy_sha256"] == b["policy_sha256"]


def test_lqr_baseline(capsys):
    doc = replay_json(capsys, "lqr", "--env", "CartPole-v0", "--episodes", 2)
    assert doc["policy"] == "lqr" and doc["policy_sha256"] is None and doc["env"] == "pretrial/CartPole-v0"
    assert doc["success_rate"] == 1.0  # LQR balances the nominal cart-pole from small starts (common practice)


# --------------------------------------------------------------------------- #
# --start
# --------------------------------------------------------------------------- #
def test_start_numbers_and_names(capsys, policy_file):
    doc = replay_json(capsys, policy_file, "--start", "0.1,0,-0.05,0.2", "--episodes", 2)
    assert doc["start"] == [0.1, 0.0, -0.05, 0.2]
    doc = replay_json(capsys, policy_file, "--start", "theta=0.12, x=-0.3")
    assert doc["start"] == [-0.3, 0.0, 0.12, 0.0]  # names not given: the start centre (the origin)


@pytest.mark.parametrize("text,word", [("1,2,3", "expected 4 numbers"), ("phi=0.1", "unknown state 'phi'"),
                                       ("theta=abc", "'abc' is not a number"), ("0,0,nan,0", "not a finite")])
def test_start_errors(capsys, policy_file, text, word):
    line = refused(capsys, policy_file, "--start", text)
    assert "--start" in line and word in line and "x, x_dot, theta, theta_dot" in line


# --------------------------------------------------------------------------- #
# files
# --------------------------------------------------------------------------- #
def test_csv_rows_and_units(capsys, policy_file, tmp_path):
    path = tmp_path / "trace.csv"
    doc = replay_json(capsys, policy_file, "--csv", path, "--episodes", 2, "--start", "theta=0.1",
                      "--set", "max_force=0")
    assert doc["files"] == {"csv": str(path)}
    with open(path, newline="") as f:
        rows = list(csv.reader(f))
    header = rows[0]
    assert header[:7] == ["episode", "step", "time [s]", "x [m]", "x_dot [m/s]", "theta [rad]", "theta_dot [rad/s]"]
    assert "obs.theta [rad]" in header and "action.force [full scale]" in header and "input.force [N]" in header
    body = rows[1:]
    assert len(body) == sum(n + 1 for n in doc["steps"])
    first = [r for r in body if r[0] == "0"]
    assert [float(v) for v in first[0][3:7]] == [0.0, 0.0, 0.1, 0.0]
    assert float(first[3][2]) == pytest.approx(3 * 0.02, abs=1e-15)
    assert first[-1][7:] == [""] * (len(header) - 7)  # the final state row has no action
    assert all(float(r[header.index("input.force [N]")]) == 0.0 for r in first[:-1])  # max_force = 0


@pytest.mark.parametrize("suffix,magic", [(".png", PNG_SIGNATURE), (".svg", b"<?xml"), (".pdf", b"%PDF")])
def test_plot_formats(capsys, policy_file, tmp_path, suffix, magic):
    path = tmp_path / f"trace{suffix}"
    doc = replay_json(capsys, policy_file, "--plot", path, "--set", "max_force=0", "--start", "theta=0.1")
    assert path.read_bytes().startswith(magic) and doc["files"] == {"plot": str(path)}


def test_gif_is_thinned_and_small(capsys, policy_file, tmp_path):
    from PIL import Image

    path = tmp_path / "replay.gif"
    doc = replay_json(capsys, policy_file, "--gif", path, "--set", "max_force=0", "--start", "theta=0.1")
    assert path.read_bytes()[:6] == b"GIF89a"
    steps = doc["steps"][0]
    idx, fps = animation.frame_steps(steps, 0.02)
    with Image.open(path) as im:
        assert im.n_frames == len(idx) and im.size[0] <= 640
        assert im.info["duration"] == 40  # 25 fps: every second 50 Hz step
    assert fps == pytest.approx(25.0) and idx[0] == 0 and idx[-1] == steps


def test_frame_steps():
    idx, fps = animation.frame_steps(7, 0.02)
    assert idx.tolist() == [0, 2, 4, 6, 7] and fps == pytest.approx(25.0)
    idx, fps = animation.frame_steps(3, 0.1)
    assert idx.tolist() == [0, 1, 2, 3] and fps == pytest.approx(10.0)


def test_mp4_without_ffmpeg_says_how(capsys, policy_file, tmp_path, monkeypatch):
    from matplotlib.animation import FFMpegWriter

    monkeypatch.setattr(FFMpegWriter, "isAvailable", classmethod(lambda cls: False))
    line = refused(capsys, policy_file, "--mp4", tmp_path / "a.mp4", "--csv", tmp_path / "a.csv")
    assert "ffmpeg" in line and "install" in line
    assert list(tmp_path.iterdir()) == []  # refused before anything was written


def test_show_on_a_headless_machine(capsys, policy_file):
    assert main(["replay", str(policy_file), "--show", "--set", "max_force=0"]) == 0
    cap = capsys.readouterr()
    assert "--show skipped" in cap.err and len(cap.err.strip().splitlines()) == 1


# --------------------------------------------------------------------------- #
# errors
# --------------------------------------------------------------------------- #
def test_input_errors(capsys, policy_file, tmp_path):
    assert "did you mean 'pole_mass'" in refused(capsys, policy_file, "--set", "pole_mas=0.2")
    assert "--set" in refused(capsys, policy_file, "--set", "pole_mass=-1")
    assert "--set" in refused(capsys, policy_file, "--set", "pole_mass=heavy")
    assert "--set" in refused(capsys, policy_file, "--set", "pole_mass")
    assert "no such file" in refused(capsys, tmp_path / "missing.json")
    assert "--env" in refused(capsys, "lqr")
    line = refused(capsys, policy_file, "--env", "DronePair-v0")
    assert "pretrial/DronePair-v0" in line and "pretrial/CartPole-v0" in line and "24" in line
    assert "does not exist" in refused(capsys, policy_file, "--gif", tmp_path / "no" / "a.gif")
    assert "suffix" in refused(capsys, policy_file, "--plot", tmp_path / "a.jpg")
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize("value", ["0", "-3", "two", "1001"])
def test_bad_episodes(capsys, policy_file, value):
    with pytest.raises(SystemExit) as exc:  # argparse's usage error: one line, exit 2
        main(["replay", str(policy_file), f"--episodes={value}"])
    assert exc.value.code == 2
    err = capsys.readouterr().err
    assert "--episodes" in err and len(err.strip().splitlines()) == 1


# --------------------------------------------------------------------------- #
# metrics on crafted traces (expected values by hand from the definitions)
# --------------------------------------------------------------------------- #
def test_holds_from():
    ok = np.array([[0, 1, 1], [1, 1, 1], [0, 1, 1], [1, 1, 0], [1, 1, 0], [0, 0, 0]], dtype=bool)
    # row 0: last failure at state 2 -> settled from state 3; row 1: always; row 2 (ends at 4): last state fails
    assert holds_from(ok, np.array([4, 4, 4]), 0.5).tolist() == [1.5, 0.0, math.inf]
    assert holds_from(ok, np.array([2, 2, 2]), 0.5).tolist() == [math.inf, 0.0, 0.0]  # later states ignored


def test_generic_and_cartpole_metrics():
    physics = make_physics("pretrial/CartPole-v0", dt=0.5)  # a 2 s residual window = the last 5 states
    params = np.tile(physics.param_table.resolve({}), (1, 1))
    fail = float(physics.param(params, "fail_angle")[0])  # 12 degrees
    theta = [0.1, -0.15, 0.01, 0.0, 0.02, 0.0, 0.01, -0.01, 0.5]  # 8 periods; the 9th state is past the end
    x = [0.0, 0.3, -0.5, 0.1, 0.1, 0.0, 0.0, 0.0, 2.0]
    states = np.zeros((9, 1, 4))
    states[:, 0, 0], states[:, 0, 2] = x, theta
    actions = np.array([0.5, -0.5, 1.0, 0.0, 0.0, 0.0, 0.0, -1.0])[:, None, None]
    m = physics.episode_metrics(states, actions, params, np.array([7]))
    # 7 periods: actions 0.5, -0.5, 1, 0, 0, 0, 0 -> RMS sqrt(1.5 / 7); one period saturated
    assert m["effort_rms_force"].values[0] == pytest.approx(math.sqrt(1.5 / 7), rel=1e-15)
    assert m["saturated_fraction"].values[0] == pytest.approx(1 / 7)
    assert m["peak_angle"].values[0] == 0.15 and m["peak_angle"].unit == "rad"
    assert m["peak_cart_excursion"].values[0] == 0.5
    # settled: |theta| <= 0.1 * fail (0.0209) and |x| <= 0.24; the last unsettled state is 2 (x = -0.5),
    # so it settles from state 3, at 1.5 s
    assert 0.1 * fail > 0.02
    assert m["settling_time"].values[0] == pytest.approx(1.5)
    # residual: states 3..7 (2 s / 0.5 s = 4 periods back from state 7): 0, 0.02, 0, 0.01, 0.01
    assert m["residual_angle_rms"].values[0] == pytest.approx(math.sqrt((0.02**2 + 2 * 0.01**2) / 5), rel=1e-14)


def test_two_pole_peak_angle_takes_either_pole():
    physics = make_physics("pretrial/CartPole-v0", poles=2)
    params = physics.param_table.resolve({})[None, :]
    states = np.zeros((3, 1, 6))
    states[1, 0, 2], states[2, 0, 4] = 0.1, -0.3
    m = physics.episode_metrics(states, np.zeros((2, 1, 1)), params, np.array([2]))
    assert m["peak_angle"].values[0] == 0.3


def test_gantry_metrics():
    physics = make_physics("pretrial/GantryCrane-v0", dt=1.0)
    params = physics.param_table.resolve({})[None, :]  # start_x -2, target_x 2, tolerance 0.05 m
    x = [-2.0, 0.0, 2.3, 1.9, 2.0, 2.01, 2.0]
    phi = [0.0, 0.3, 0.0, -0.04, 0.02, 0.01, 0.0]
    states = np.zeros((7, 1, 4))
    states[:, 0, 0], states[:, 0, 2] = x, phi
    m = physics.episode_metrics(states, np.zeros((6, 1, 1)), params, np.array([6]))
    load = np.array(x) + np.sin(phi)  # rope 1 m
    assert m["overshoot"].values[0] == pytest.approx(0.3, abs=1e-12)  # at x = 2.3, phi = 0
    assert m["peak_sway"].values[0] == 0.3
    assert m["residual_sway"].values[0] == 0.02  # the last 2 s are states 4, 5, 6
    # goal: |load - 2| <= 0.05, |phi| <= 0.05, |phi_dot| <= 0.1 (phi_dot is 0): states 4, 5, 6 hold
    assert np.abs(load[3] - 2.0) > 0.05 and np.all(np.abs(load[4:] - 2.0) <= 0.05)
    assert m["settling_time"].values[0] == 4.0


def test_drone_pair_metrics():
    physics = make_physics("pretrial/DronePair-v0")
    params = physics.param_table.resolve({})[None, :]  # starts and goals at (-1.5, 2) and (1.5, 2)
    states = np.zeros((4, 1, 18))
    d0 = [(-1.5, 2.0), (0.0, 2.5), (1.5, 2.0), (0.0, 1.0)]
    d1 = [(1.5, 2.0), (0.0, 1.2), (-1.5, 2.0), (0.0, 1.0)]  # the last state is past the episode's end
    states[:, 0, 0:2], states[:, 0, 6:8] = d0, d1
    m = physics.episode_metrics(states, np.zeros((3, 1, 4)), params, np.array([2]))
    assert m["min_separation"].values[0] == pytest.approx(1.3) and m["min_separation"].worst == "min"
    assert m["peak_path_deviation"].values[0] == pytest.approx(0.8)  # drone 1, 0.8 m below its straight line
    # both at their goals and at rest at the last counted state only: settled at 2 dt
    assert m["settling_time"].values[0] == pytest.approx(2 * physics.dt)
    assert set(m) >= {"effort_rms_d0_rotor_left", "saturated_fraction"}
