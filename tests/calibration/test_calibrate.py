"""pretrial calibrate against outside references: gymnasium's CartPole-v1, scipy's binomial law, known plants.

References: gymnasium's own CartPole-v1 (its Euler step and constants, read from
gymnasium.envs.classic_control.cartpole); scipy.stats.binom for the coverage tolerance; logs of
pretrial's gantry and drone pair simulated at known parameters (the truth is what we set).
"""

from __future__ import annotations

import csv
import json
import math
from pathlib import Path

import gymnasium as gym
import numpy as np
import pytest
from scipy.stats import binom

import pretrial_envs
from pretrial.calibration.benchlog import Segment
from pretrial.calibration.fit import Model, calibrate, make_windows
from pretrial.calibration.report import load_calibration
from pretrial.cli.main import main
from pretrial.errors import FileFormatError


def write_log(path: Path, header: list[str], rows: np.ndarray) -> Path:
    with open(path, "w", newline="") as f:
        w = csv.writer(f)
        w.writerow(header)
        w.writerows([[repr(float(v)) for v in row] for row in rows])
    return path


def run_json(capsys, argv: list[str]) -> dict:
    capsys.readouterr()
    code = main(argv)
    out, err = capsys.readouterr()
    assert code == 0, err
    return json.loads(out)


def gymnasium_log(path: Path, episodes: int, seed: int) -> Path:
    """gymnasium's CartPole-v1 driven by random actions, restarted at every termination (a gap in t)."""
    env = gym.make("CartPole-v1")
    rng = np.random.default_rng(seed)
    rows, t = [], 0.0

    def noise(obs: np.ndarray) -> np.ndarray:
        # the logger's white noise, 1e-4 in each state's unit: it dominates the float32 rounding of
        # gymnasium's observations, which is not random and which no sampling interval covers
        return rng.normal(0.0, 1e-4, obs.shape)

    obs, _ = env.reset(seed=seed)
    for ep in range(episodes):
        if ep:
            obs, _ = env.reset()
            t += 1.0  # a gap: a new segment
        for _ in range(500):
            a = int(rng.integers(2))
            rows.append([t, *(obs + noise(obs)), 10.0 if a == 1 else -10.0])  # CartPole-v1: force_mag 10 N
            obs, _, term, trunc, _ = env.step(a)
            t = round(t + 0.02, 10)  # CartPole-v1: tau 0.02 s
            if term or trunc:
                rows.append([t, *(obs + noise(obs)), 0.0])
                break
    return write_log(path, ["t", "x", "x_dot", "theta", "theta_dot", "force"], np.array(rows))


@pytest.mark.slow
def test_recovers_gymnasium_cartpole(tmp_path, capsys):
    # Reference: gymnasium's CartPole-v1 (Euler, tau 0.02 s, masscart 1.0, masspole 0.1, length 0.5
    # (half the pole), gravity 9.8, frictionless, force +-10 N). Its observations, with the logger's noise
    # added; the fit starts far from the truth (--guess).
    log = gymnasium_log(tmp_path / "gym.csv", episodes=40, seed=5)
    out = run_json(capsys, [
        "calibrate", str(log), "--env", "pretrial/CartPole-v0", "--option", "integrator=euler",
        "--option", "dt=0.02", "--option", "substeps=1", "--set", "gravity=9.8", "--set", "cart_friction=0",
        "--set", "pole_friction=0", "--fit", "cart_mass,pole_mass,pole_half_length", "--guess", "cart_mass=2",
        "--guess", "pole_mass=0.3", "--guess", "pole_half_length=0.8", "--bootstrap", "100",
        "--out", str(tmp_path / "cal"), "--json"])
    truth = {"cart_mass": 1.0, "pole_mass": 0.1, "pole_half_length": 0.5}
    for name, value in truth.items():
        p = out["params"][name]
        assert abs(p["estimate"] - value) <= 0.01 * value, (name, p)
        assert p["ci95"][0] <= value <= p["ci95"][1], (name, p)
    assert out["warnings"] == []
    saved = load_calibration(tmp_path / "cal")
    assert saved == out
    for f in ("calibration.json", "params.toml", "dispersion.toml", "report.md", "fit.png", "residuals.png",
              "bootstrap.png"):
        assert (tmp_path / "cal" / f).is_file(), f


def _noisy_cartpole(seed: int, physics, truth: np.ndarray, segments: int = 8, rows: int = 51,
                    noise: float = 2e-3) -> list[Segment]:
    """Segments of the cart-pole under random +-10 N pushes, every state measured with white noise."""
    rng = np.random.default_rng(seed)
    x = np.zeros((rows, segments, 4))
    x[0] = rng.normal(0.0, 0.05, (segments, 4))
    a = rng.choice([-1.0, 1.0], size=(rows, segments, 1))
    p = np.tile(truth, (segments, 1))
    for k in range(rows - 1):  # the simulated rig, every segment at once
        x[k + 1] = physics.integrate(x[k], physics.actuate(a[k], p), p)
    x += rng.normal(0.0, noise, x.shape)
    return [Segment("synthetic", 2, np.arange(rows) * physics.dt, x[:, s], 10.0 * a[:, s]) for s in range(segments)]


@pytest.mark.slow
def test_coverage_of_the_95_intervals():
    # Reference: scipy.stats.binom. With 40 data sets and intervals that cover with p = 0.95, the count
    # of covering intervals lies in binom(40, 0.95)'s central 99% range (34 to 40, i.e. 85-100%).
    physics = pretrial_envs.make_physics("pretrial/CartPole-v0", integrator="euler", dt=0.02, substeps=1)
    table = physics.param_table
    truth = table.resolve({"pole_half_length": 0.4, "cart_friction": 0.0, "pole_friction": 0.0})
    base = truth.copy()
    model = Model(physics, base, ("pole_half_length",), {"actuator_gain": 1.0, "actuator_lag_s": 0.0,
                  "actuator_delay_s": 0.0}, np.array([True]), np.array([0.5]))
    trials = 40
    covered = 0
    for seed in range(trials):
        est = calibrate(model, make_windows(_noisy_cartpole(seed, physics, truth), 25), 60, seed)
        lo, hi = est.ci95[0]
        covered += lo <= 0.4 <= hi
    low, high = binom.ppf(0.005, trials, 0.95), binom.ppf(0.995, trials, 0.95)
    assert low <= covered <= high, (covered, low, high)


@pytest.mark.slow
def test_gantry_recovers_masses_and_friction(tmp_path, capsys):
    # The truth is what the logs were simulated with (pretrial's gantry, Euler-free RK4 at its defaults);
    # 1 mm and 2 mrad white noise on the measured states.
    physics = pretrial_envs.make_physics("pretrial/GantryCrane-v0")
    truth = {"trolley_mass": 4.0, "load_mass": 1.5, "trolley_friction": 0.6}
    p = physics.param_table.resolve({**truth, "trolley_coulomb": 0.0})[None, :]
    rng = np.random.default_rng(3)
    n = 300
    t = np.arange(n) * physics.dt
    force = np.clip(6.0 * np.sin(2 * math.pi * 0.4 * t) + 3.0 * np.sign(np.sin(2 * math.pi * 1.3 * t)), -10, 10)
    x = np.zeros((n, 4))
    for k in range(n - 1):  # the simulated rig, one step at a time
        x[k + 1] = physics.integrate(x[k:k + 1], np.array([[force[k]]]), p)[0]
    x += rng.normal(0.0, 1.0, x.shape) * np.array([1e-3, 1e-3, 2e-3, 2e-3])
    log = write_log(tmp_path / "gantry.csv", ["t", "x", "x_dot", "phi", "phi_dot", "trolley_force"],
                    np.column_stack([t, x, force]))
    out = run_json(capsys, ["calibrate", str(log), "--env", "GantryCrane-v0", "--set", "trolley_coulomb=0",
                            "--fit", "trolley_mass,load_mass,trolley_friction", "--bootstrap", "40",
                            "--out", str(tmp_path / "cal"), "--json"])
    for name, value in truth.items():
        est = out["params"][name]
        assert abs(est["estimate"] - value) <= 0.05 * value, (name, est)
    assert out["validation"]["segments"] >= 1


def _drone_log(tmp_path: Path, symmetric: bool) -> Path:
    """The drone pair in free flight under rotor commands; symmetric: left = right (no pitch excitation)."""
    physics = pretrial_envs.make_physics("pretrial/DronePair-v0")
    p = physics.param_table.resolve({"mass": 0.9, "drag_linear": 0.4, "gust_std": 0.0})[None, :]
    rng = np.random.default_rng(8)
    n = 150
    t = np.arange(n) * physics.dt
    base = 0.9 * 9.81 / 8.0 - 1.0  # about hover (thrust = (a + 1) / 2 * 8 N per rotor)
    cmd = base + 0.15 * np.sin(2 * math.pi * np.array([0.7, 1.1, 0.9, 1.3])[None, :] * t[:, None])
    if symmetric:
        cmd[:, 1] = cmd[:, 0]
        cmd[:, 3] = cmd[:, 2]
    x = np.zeros((n, physics.state_dim))
    x[0] = physics.start_center(p)[0]
    for k in range(n - 1):
        x[k + 1] = physics.transition(x[k:k + 1], cmd[k:k + 1].copy(), p, np.zeros(1), np.zeros(1, int)).state[0]
    noise = rng.normal(0.0, 1e-3, x.shape)
    noise[:, 16:] = 0.0  # the gust states stay at 0 (gust_std 0)
    return write_log(tmp_path / "drones.csv", ["t", *physics.state_names, *physics.action_names],
                     np.column_stack([t, x + noise, cmd]))


@pytest.mark.slow
def test_drone_pair_recovers_mass_and_drag(tmp_path, capsys):
    # The truth is what the log was simulated with: mass 0.9 kg, drag_linear 0.4 N s/m.
    log = _drone_log(tmp_path, symmetric=False)
    out = run_json(capsys, ["calibrate", str(log), "--env", "DronePair-v0", "--set", "gust_std=0",
                            "--fit", "mass,drag_linear,inertia", "--bootstrap", "30", "--out", str(tmp_path / "c"),
                            "--json"])
    assert abs(out["params"]["mass"]["estimate"] - 0.9) <= 0.02 * 0.9
    assert abs(out["params"]["drag_linear"]["estimate"] - 0.4) <= 0.05 * 0.4
    assert abs(out["params"]["inertia"]["estimate"] - 0.008) <= 0.05 * 0.008
    assert not out["identifiability"]["flags"]


@pytest.mark.slow
def test_unexcited_inertia_is_flagged(tmp_path, capsys):
    # Equal thrust commands on both rotors of each drone: no torque but what measurement noise in the
    # rotor states suggests, so the inertia goes wherever the noise takes it: the output must name it.
    log = _drone_log(tmp_path, symmetric=True)
    capsys.readouterr()
    code = main(["calibrate", str(log), "--env", "DronePair-v0", "--set", "gust_std=0", "--fit", "mass,inertia",
                 "--bootstrap", "20", "--out", str(tmp_path / "c"), "--json"])
    out, err = capsys.readouterr()
    assert code == 0, err
    summary = json.loads(out)
    assert "inertia" in summary["identifiability"]["flags"]
    assert "mass" not in summary["identifiability"]["flags"]
    assert "inertia is not identifiable" in err
    assert abs(summary["params"]["mass"]["estimate"] - 0.9) <= 0.02 * 0.9


def test_load_calibration_refuses_an_edited_file(tmp_path, capsys):
    log = _drone_log(tmp_path, symmetric=False)
    out_dir = tmp_path / "c"
    run_json(capsys, ["calibrate", str(log), "--env", "DronePair-v0", "--set", "gust_std=0", "--fit", "mass",
                      "--bootstrap", "10", "--out", str(out_dir), "--json"])
    path = out_dir / "calibration.json"
    data = json.loads(path.read_text())
    data["params"]["mass"]["estimate"] *= 1.1
    path.write_text(json.dumps(data))
    with pytest.raises(FileFormatError, match="content_sha256"):
        load_calibration(path)
    data["schema"] = "pretrial.sweep"
    path.write_text(json.dumps(data))
    with pytest.raises(FileFormatError, match="schema"):
        load_calibration(path)
