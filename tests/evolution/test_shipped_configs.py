"""Every run config and sweep plan in configs/ loads, runs and fits the others.

One generation of each shipped run config (on one worker) must write a champion,
and the sweep plan for it (the one whose name its own starts with) must accept
that champion; each plan must build its LQR baseline. What each config reaches in
a full run is measured by hand and stated in its comment; this only keeps the
files from rotting.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from pretrial.analysis.sweep import controlled
from pretrial.cli.main import main
from pretrial.evolution.config import plan_beside

CONFIGS = Path(__file__).resolve().parents[2] / "configs"
RUN_CONFIGS = sorted(CONFIGS.glob("*.toml"))
PLANS = sorted((CONFIGS / "sweeps").glob("*.toml"))


def test_the_shipped_files_are_there():
    names = {p.stem for p in RUN_CONFIGS}
    assert {"cartpole", "double-pole", "double-pole-positions", "drone-pair", "gantry"} <= names
    assert {p.stem for p in PLANS} <= names  # each plan is named for the config it sweeps


@pytest.mark.parametrize("config", RUN_CONFIGS, ids=lambda p: p.stem)
def test_shipped_config_runs_and_fits_its_plan(config, tmp_path):
    out = tmp_path / "run"
    assert main(["evolve", str(config), "--generations", "1", "--workers", "1", "--out", str(out), "--quiet"]) == 0
    champion = json.loads((out / "champion.json").read_text())
    plan = plan_beside(config, config.stem)  # the plan evolve names in its closing "next:" lines
    assert plan is not None, f"no sweep plan for {config.name} in configs/sweeps/"
    ctl = controlled(str(out), str(plan))
    assert ctl.env_id == champion["env"]["id"]
    assert ctl.plan is not None and ctl.plan.vary


@pytest.mark.parametrize("plan", PLANS, ids=lambda p: p.stem)
def test_shipped_plan_builds_its_lqr_baseline(plan):
    ctl = controlled("lqr", str(plan))
    assert ctl.policy_kind == "lqr" and ctl.controller is not None
