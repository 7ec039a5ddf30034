"""``pretrial sweep`` as a pipeline gate: exit 0 on PASS, 1 on FAIL, 2 on bad input, checked up front.

Also the sweep's intervals: the success map's per-cell Wilson bounds (against scipy) and replay's
interval; and the sweep directory's mode under the umask.
"""

from __future__ import annotations

import json
import os
import stat
from pathlib import Path

import neat
import numpy as np
import pytest
from helpers import make_config, snapshot
from scipy.stats import binomtest

from pretrial.analysis import sweep as sweep_run
from pretrial.cli.main import main
from pretrial.controller.policy import IOMap, policy_from_genome, save_policy
from pretrial_envs import make_physics

REPO = Path(__file__).resolve().parents[2]

# the continuous-loop margins of the LQR cart-pole only: no episodes, a fraction of a second
LINEAR_PLAN = """
[scenario]
env = "pretrial/CartPole-v0"
episodes = 10
seed = 1
[[vary]]
name = "pole_mass"
range = [0.05, 0.2]
[analysis]
run = ["linear"]
[require]
success_rate = 0.5
gain_margin_db = 0.0
phase_margin_deg = {pm}
"""

# a 3 x 3 success map over the margin search ranges (dispersion boxes deliberately narrower)
MAP_PLAN = """
[scenario]
env = "pretrial/CartPole-v0"
episodes = 12
horizon = 3.0
seed = 4
[[vary]]
name = "pole_mass"
range = [0.05, 0.8]
dispersion = [0.08, 0.12]
[[vary]]
name = "actuator_delay_s"
range = [0.0, 0.16]
dispersion = [0.0, 0.01]
[analysis]
run = ["map"]
map = ["pole_mass", "actuator_delay_s"]
map_points = 3
map_episodes = 12
[require]
success_rate = 0.5
"""


def write_plan(d: Path, text: str, name: str = "plan.toml") -> Path:
    path = d / name
    path.write_text(text, encoding="utf-8")
    return path


def sweep_code(argv: list[str]) -> int:
    try:
        return main(argv)
    except SystemExit as exc:  # argparse's own exits (--help)
        return int(exc.code or 0)


# --------------------------------------------------------------------------- #
# exit codes
# --------------------------------------------------------------------------- #
def test_pass_exits_0_and_fail_exits_1(capsys, tmp_path):
    # Safonov & Athans (1977), "Gain and phase margin for multiloop LQG regulators": a continuous LQR
    # loop broken at the plant input has at least 60 deg of phase margin, so 45 deg is met (PASS);
    # phase margin is at most 180 deg by its definition (e.g. Ogata, Modern Control Engineering,
    # "phase margin"), so a loop with a gain crossover cannot meet 180 (FAIL).
    for pm, verdict, code in ((45.0, "pass", 0), (180.0, "fail", 1)):
        plan = write_plan(tmp_path, LINEAR_PLAN.format(pm=pm), f"pm{pm:g}.toml")
        out = tmp_path / f"out{pm:g}"
        capsys.readouterr()
        assert main(["sweep", "lqr", "--plan", str(plan), "--out", str(out), "--workers", "1", "--json"]) == code
        doc = json.loads(capsys.readouterr().out)  # --json output unchanged: one object on stdout
        assert doc["verdict"] == verdict and doc["directory"] == str(out)
        assert json.loads((out / "results.json").read_text())["verdict"] == verdict  # written on FAIL too
    # the text form exits the same way
    plan = write_plan(tmp_path, LINEAR_PLAN.format(pm=180.0), "text.toml")
    assert main(["sweep", "lqr", "--plan", str(plan), "--out", str(tmp_path / "text"), "--workers", "1"]) == 1
    assert "verdict: FAIL" in capsys.readouterr().out


def test_bad_input_exits_2_with_nothing_written(capsys, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    plan = write_plan(tmp_path, LINEAR_PLAN.format(pm=45.0).replace("success_rate = 0.5", "success_rate = 1.5"))
    before = snapshot(tmp_path)
    assert main(["sweep", "lqr", "--plan", str(plan), "--workers", "1"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "success_rate" in err[0] and "Traceback" not in err[0]
    assert snapshot(tmp_path) == before  # no sweeps/ directory, no hidden partial one


def test_help_epilog_names_the_exit_codes(capsys):
    assert sweep_code(["sweep", "--help"]) == 0
    text = capsys.readouterr().out
    for line in ("0  verdict PASS", "1  verdict FAIL", "2  bad input", "130  interrupted"):
        assert line in text
    # the README's command-line reference says the same (its sweep bullet)
    readme = " ".join((REPO / "README.md").read_text(encoding="utf-8").split())
    bullet = readme[readme.index("- `pretrial sweep POLICY --plan PLAN.toml` runs"):]
    bullet = bullet[:bullet.index("- `pretrial export")]
    for words in ("0 PASS", "1 FAIL", "2 bad input", "130 Ctrl-C"):
        assert words in bullet


# --------------------------------------------------------------------------- #
# compatibility checked before any work
# --------------------------------------------------------------------------- #
def positions_policy_file(d: Path) -> Path:
    """A cart-pole policy trained (here: made) for observe="positions": it sees x and theta only."""
    physics = make_physics("pretrial/CartPole-v0", observe="positions")
    n_in = physics.obs_dim
    cfg = make_config(d / "neat.ini", True, num_inputs=n_in, num_outputs=1, activations="identity",
                      aggregations="sum", num_hidden=0)
    genome = neat.DefaultGenome(0)
    node = neat.genes.DefaultNodeGene(0)
    node.bias, node.response, node.activation, node.aggregation = 0.0, 1.0, "identity", "sum"
    genome.nodes[0] = node
    for i in range(n_in):
        conn = neat.genes.DefaultConnectionGene((-(i + 1), 0), innovation=i + 1)
        conn.weight, conn.enabled = 0.5, True
        genome.connections[conn.key] = conn
    policy = policy_from_genome(genome, cfg, env_id="pretrial/CartPole-v0", env_options=physics.options(),
                                io=IOMap(n_in, 1))
    path = d / "positions.json"
    save_policy(path, policy)
    return path


@pytest.fixture
def no_episodes(monkeypatch):
    """Fail the test if any analysis starts (the refusal must come before the first episode)."""
    from pretrial.analysis import campaign as sweep
    def refuse(*_args, **_kwargs):
        raise AssertionError("an analysis ran before the inputs were refused")

    monkeypatch.setattr(sweep, "run_analyses", refuse)


def test_baseline_lqr_infeasible_is_refused_before_any_episode(capsys, tmp_path, monkeypatch, no_episodes):
    # LQR is state feedback: with only positions measured it has no velocities to feed back
    # (common practice: an observer would be needed, which the baseline does not build)
    monkeypatch.chdir(tmp_path)
    policy = positions_policy_file(tmp_path)
    plan = write_plan(tmp_path, MAP_PLAN.replace('env = "pretrial/CartPole-v0"\n', ""))
    before = snapshot(tmp_path)
    code = main(["sweep", str(policy), "--plan", str(plan), "--baseline", "lqr", "--workers", "1"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1, err
    assert err[0].startswith("pretrial: error: --baseline lqr:") and "plan.toml" in err[0]
    assert "full-state" in err[0] and "x_dot" in err[0]
    assert snapshot(tmp_path) == before


def test_baseline_on_the_baseline_is_refused_before_any_episode(capsys, tmp_path, monkeypatch, no_episodes):
    monkeypatch.chdir(tmp_path)
    plan = write_plan(tmp_path, MAP_PLAN)
    before = snapshot(tmp_path)
    assert main(["sweep", "lqr", "--plan", str(plan), "--baseline", "lqr", "--workers", "1"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "already the LQR baseline" in err[0]
    assert snapshot(tmp_path) == before


def test_prepare_designs_the_baseline_once_the_sweep_uses(tmp_path):
    from test_sweep import balancing_policy_file

    policy = balancing_policy_file(tmp_path)
    plan = write_plan(tmp_path, MAP_PLAN.replace('env = "pretrial/CartPole-v0"\n', ""))
    prep = sweep_run.prepare(str(policy), str(plan), baseline=True)
    assert prep.ctl.policy_kind == "file" and prep.baseline is not None
    assert sweep_run.prepare(str(policy), str(plan)).baseline is None


# --------------------------------------------------------------------------- #
# the success map: search ranges and per-cell intervals
# --------------------------------------------------------------------------- #
@pytest.fixture(scope="module")
def map_sweep(tmp_path_factory):
    d = tmp_path_factory.mktemp("map_sweep")
    plan = write_plan(d, MAP_PLAN)
    out = d / "out"
    code = main(["sweep", "lqr", "--plan", str(plan), "--out", str(out), "--workers", "1", "--json"])
    res = json.loads((out / "results.json").read_text(encoding="utf-8"))
    assert code == {"pass": 0, "fail": 1}[res["verdict"]]
    return res, out


def test_map_spans_the_search_ranges(map_sweep):
    res, _ = map_sweep
    sm = res["success_map"]
    # the plan's range, not its dispersion box: 0.05..0.8 kg is 16x, so geometric (np.geomspace)
    np.testing.assert_allclose(sm["x_values"], np.geomspace(0.05, 0.8, 3), rtol=1e-12)
    np.testing.assert_allclose(sm["y_values"], np.linspace(0.0, 0.16, 3), rtol=1e-12)


def test_map_cells_carry_wilson_bounds(map_sweep):
    res, _ = map_sweep
    sm = res["success_map"]
    n = sm["episodes"]
    wins = np.array(sm["successes"])
    assert wins.shape == (3, 3) and np.all((wins >= 0) & (wins <= n))
    np.testing.assert_array_equal(np.array(sm["success_rate"]), wins / n)
    assert len({int(w) for w in wins.ravel()}) > 1  # the delay range takes the pole down: not all alike
    for k, lo, hi in zip(wins.ravel(), np.ravel(sm["lower_bound"]), np.ravel(sm["upper_bound"]), strict=True):
        # independent reference: scipy.stats.binomtest(k, n).proportion_ci(method="wilson") (Wilson 1927)
        ref = binomtest(int(k), n).proportion_ci(confidence_level=0.95, method="wilson")
        assert lo == pytest.approx(ref.low, abs=1e-9) and hi == pytest.approx(ref.high, abs=1e-9)


def test_map_cells_in_the_report(map_sweep):
    res, out = map_sweep
    sm = res["success_map"]
    md = (out / "report.md").read_text(encoding="utf-8")
    k, n = sm["successes"][0][0], sm["episodes"]
    ref = binomtest(k, n).proportion_ci(confidence_level=0.95, method="wilson")
    # the report's number format: 4 significant digits, in per cent
    assert f"{k} of {n}: " in md and f"{100 * ref.low:.4g} % – {100 * ref.high:.4g} %" in md
    assert "actuator_delay_s (rows) / pole_mass (columns)" in md


# --------------------------------------------------------------------------- #
# the sweep directory follows the umask
# --------------------------------------------------------------------------- #
@pytest.mark.skipif(os.name != "posix", reason="POSIX permission bits")
@pytest.mark.parametrize("mask", [0o022, 0o027, 0o077])
def test_sweep_directory_mode_follows_the_umask(tmp_path, mask):
    # POSIX mkdir(2): a new directory gets mode 0777 & ~umask; the sweep directory should match
    plan = write_plan(tmp_path, LINEAR_PLAN.format(pm=45.0))
    out = tmp_path / "out"
    old = os.umask(mask)
    try:
        assert main(["sweep", "lqr", "--plan", str(plan), "--out", str(out), "--workers", "1", "--json"]) == 0
        (tmp_path / "reference").mkdir()
    finally:
        os.umask(old)
    assert stat.S_IMODE(out.stat().st_mode) == 0o777 & ~mask
    assert stat.S_IMODE(out.stat().st_mode) == stat.S_IMODE((tmp_path / "reference").stat().st_mode)


# --------------------------------------------------------------------------- #
# replay: the rate with its interval
# --------------------------------------------------------------------------- #
def test_replay_prints_and_returns_the_wilson_interval(capsys):
    # sensor noise well past the LQR cart-pole's margin edge: some episodes fail, some do not (30 of 40
    # succeeded when written; the check holds for any count)
    argv = ["replay", "lqr", "--env", "CartPole-v0", "--episodes", "40", "--seed", "2",
            "--set", "sensor_noise_std=0.03"]
    assert main([*argv, "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    k, n = doc["successes"], doc["episodes"]
    # independent reference: scipy.stats.binomtest(k, n).proportion_ci(method="wilson") (Wilson 1927)
    ref = binomtest(k, n).proportion_ci(confidence_level=0.95, method="wilson")
    lo, hi = doc["success_ci95"]
    assert lo == pytest.approx(ref.low, abs=1e-9) and hi == pytest.approx(ref.high, abs=1e-9)
    assert doc["success_rate"] == k / n  # the existing key is unchanged
    assert main(argv) == 0
    text = capsys.readouterr().out
    assert f"{k} of {n}; Wilson 95% interval {ref.low:.1%} to {ref.high:.1%}" in text
