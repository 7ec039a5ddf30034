"""A sweep is a pure function of (plan, seed): the same bytes serially, on local processes and on Dask.

The plan is configs/sweeps/cartpole.toml cut down to seconds: three varied names, 16 episodes per
point, small budgets, but every analysis that draws random numbers (margins, Monte Carlo, worst case,
sensitivity, success map). The LQR baseline is the controller, so no evolved policy is needed.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from pretrial.cli.main import main

PLAN = """
[scenario]
env = "pretrial/CartPole-v0"
episodes = 16          # a rate of 0.8 needs >= 16 (Wilson bound with all succeeding: K >= 3.84 p / (1 - p))
horizon = 2.0
seed = 4

[scenario.start]
x = 0.05
theta = 0.05

[[vary]]
name = "pole_mass"
units = "ratio"
range = [0.2, 5.0]
dispersion = [0.8, 1.5]

[[vary]]
name = "actuator_gain"
range = [0.05, 5.0]
dispersion = [0.8, 1.2]

[[vary]]
name = "sensor_noise_std"     # noise: a random stream per episode
range = [0.0, 0.5]
dispersion = [0.0, 0.05]

[analysis]
run = ["margins", "montecarlo", "worstcase", "sensitivity", "map"]
tolerance = 0.05
montecarlo_samples = 64
worstcase_iterations = 2
worstcase_population = 2
worstcase_episodes = 4
sensitivity_samples = 8
sensitivity_episodes = 1
map = ["pole_mass", "actuator_gain"]
map_points = 3
map_episodes = 8

[require]
success_rate = 0.8
"""

COMPARED = ("results.json", "montecarlo.csv")


def sweep(root: Path, name: str, *executor: str) -> Path:
    plan = root / "small.toml"
    if not plan.exists():
        plan.write_text(PLAN, encoding="utf-8")
    out = root / name
    # exit 0 (PASS) or 1 (FAIL): the verdict is not the point here, the bytes are
    assert main(["sweep", "lqr", "--plan", str(plan), "--out", str(out), "--json", *executor]) in (0, 1)
    return out


@pytest.fixture(scope="module")
def serial(tmp_path_factory) -> Path:
    root = tmp_path_factory.mktemp("determinism")
    out = sweep(root, "serial", "--workers", "1")
    results = json.loads((out / "results.json").read_text())
    # every random analysis ran and produced something to compare
    assert len(results["margins"]) == 3 and results["montecarlo"]
    assert results["worstcase"] and results["sensitivity"] and results["success_map"]
    assert len((out / "montecarlo.csv").read_text().splitlines()) == 1 + 64
    return out


@pytest.mark.parametrize(
    ("where", "executor"),
    [("processes", ["--workers", "2"]), ("dask", ["--dask", "local", "--workers", "2"])],
    ids=["processes", "dask"],
)
def test_same_plan_and_seed_give_the_same_bytes_everywhere(where, executor, serial, capsys):
    if where == "dask":
        pytest.importorskip("dask.distributed", reason="dask.distributed is not installed (pretrial[cluster])")
    out = sweep(serial.parent, where, *executor)
    capsys.readouterr()
    ran_on = json.loads((out / "manifest.json").read_text())["executor"]
    assert ran_on["executor"] == where and ran_on["workers"] == 2
    for name in COMPARED:
        assert (out / name).read_bytes() == (serial / name).read_bytes(), name
