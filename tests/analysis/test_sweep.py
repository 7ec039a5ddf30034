"""``pretrial sweep``: Wilson bounds, margins against linear theory, determinism, replay, verdict, output dir."""

from __future__ import annotations

import json
import math
import shlex
from pathlib import Path

import numpy as np
import pytest
from helpers import balancing_policy_file
from scipy.stats import binomtest

from pretrial.analysis import campaign as sweep
from pretrial.analysis.linear import loop_report
from pretrial.analysis.lqr import design_lqr
from pretrial.analysis.plan import episodes_needed, load_plan
from pretrial.analysis.results import read_results
from pretrial.analysis.stats import Z2
from pretrial.cli.main import main
from pretrial.console import CAUTIONS
from pretrial.errors import InputError
from pretrial.files import sha256_hex
from pretrial_envs import make_physics

SCHEMA_KEYS = ("schema", "schema_version", "policy", "env", "plan", "seed", "required_success_rate",
               "episodes_per_point", "margins", "montecarlo", "worstcase", "sensitivity", "success_map", "linear",
               "linear_sampled", "linear_details", "integrator_check", "requirements", "verdict", "baseline",
               "cautions", "content_sha256")

# margins + Monte Carlo + linear + integrator check on the LQR cart-pole; 0.95 needs K >= 73
LQR_PLAN = """
[scenario]
env = "pretrial/CartPole-v0"
episodes = 73
horizon = 5.0
seed = 3
[scenario.start]
x = 0.05
theta = 0.05
[[vary]]
name = "actuator_gain"
range = [0.05, 5.0]
dispersion = [0.1, 1.2]
[[vary]]
name = "actuator_delay_s"
range = [0.0, 0.2]
dispersion = [0.0, 0.05]
[analysis]
run = ["margins", "montecarlo", "linear", "integrator_check"]
tolerance = 0.002
montecarlo_samples = 64
[require]
success_rate = 0.95
[require.margins]
actuator_gain = { low = 0.5 }
"""

SMALL_PLAN = """
[scenario]
episodes = 73
horizon = 2.0
seed = 5
[[vary]]
name = "pole_mass"
units = "ratio"
range = [0.5, 4.0]
[[vary]]
name = "actuator_gain"
range = [0.3, 2.0]
dispersion = [0.4, 1.5]
[analysis]
run = ["margins", "montecarlo"]
tolerance = 0.05
montecarlo_samples = 32
"""


def run_sweep(capsys, tmp_path: Path, name: str, policy: str, plan_text: str, *extra: str) -> tuple[dict, Path]:
    plan = tmp_path / f"{name}.toml"
    plan.write_text(plan_text, encoding="utf-8")
    out = tmp_path / f"{name}-out"
    # exit 0 (PASS) or 1 (FAIL), as the results' verdict says; the tests using this look at the rest
    code = main(["sweep", policy, "--plan", str(plan), "--out", str(out), "--workers", "1", "--json", *extra])
    capsys.readouterr()
    res = json.loads((out / "results.json").read_text(encoding="utf-8"))
    assert code == {"pass": 0, "fail": 1}[res["verdict"]], (code, res["verdict"])
    return res, out


@pytest.fixture(scope="module")
def lqr_sweep(tmp_path_factory) -> tuple[dict, Path]:
    d = tmp_path_factory.mktemp("lqr_sweep")
    plan = d / "lqr.toml"
    plan.write_text(LQR_PLAN, encoding="utf-8")
    out = d / "out"
    # exit 1: the verdict is FAIL, since the dispersion reaches gains below the loop's margin (see below)
    assert main(["sweep", "lqr", "--plan", str(plan), "--out", str(out), "--workers", "1", "--json"]) == 1
    return json.loads((out / "results.json").read_text(encoding="utf-8")), out


def replay(capsys, command: str) -> dict:
    words = shlex.split(command)
    assert words[:2] == ["pretrial", "replay"]
    assert main([*words[1:], "--json"]) == 0
    return json.loads(capsys.readouterr().out)


# --------------------------------------------------------------------------- #
# Wilson interval
# --------------------------------------------------------------------------- #
def test_wilson_hand_worked_value():
    # Wilson (1927) score interval, 8 of 10, z^2 = 3.841459:
    # centre = (0.8 + z^2/20) / (1 + z^2/10) = 0.992073 / 1.384146 = 0.716740
    # half = z sqrt(0.8*0.2/10 + z^2/400) / (1 + z^2/10) = 1.959964 * 0.160011 / 1.384146 = 0.226578
    lo, hi = sweep.wilson_interval(8, 10)
    assert float(lo) == pytest.approx(0.716740 - 0.226578, abs=3e-6)  # 0.4902
    assert float(hi) == pytest.approx(0.716740 + 0.226578, abs=3e-6)  # 0.9433


@pytest.mark.parametrize("k,n", [(0, 5), (1, 5), (3, 7), (50, 73), (72, 73), (73, 73), (995, 1000), (381, 381)])
def test_wilson_matches_scipy(k, n):
    # independent reference: scipy.stats.binomtest(...).proportion_ci(method="wilson"), 95%
    ref = binomtest(k, n).proportion_ci(confidence_level=0.95, method="wilson")
    lo, hi = sweep.wilson_interval(k, n)
    assert float(lo) == pytest.approx(ref.low, abs=1e-9)
    assert float(hi) == pytest.approx(ref.high, abs=1e-9)


@pytest.mark.parametrize("n", [1, 10, 73, 381, 5000])
def test_wilson_all_success_bound(n):
    # Wilson (1927) with k = n: lower bound n / (n + z^2), z^2 = 3.84 (1.959964^2)
    lo, hi = sweep.wilson_interval(n, n)
    assert float(lo) == pytest.approx(n / (n + 1.959963984540054**2), rel=1e-12)
    assert float(hi) == 1.0


def test_wilson_vectorized_and_episodes_needed():
    lo, hi = sweep.wilson_interval(np.array([0, 5, 10]), np.array([10, 10, 10]))
    assert lo.shape == (3,) and lo[0] == 0.0 and hi[2] == 1.0 and np.all(lo <= hi)
    # the rule K >= 3.84 p / (1 - p): 0.99 needs 381 episodes (3.84 * 99 = 380.2)
    assert episodes_needed(0.99) == 381
    assert float(sweep.wilson_interval(381, 381)[0]) >= 0.99 > float(sweep.wilson_interval(380, 380)[0])
    assert Z2 == pytest.approx(3.8415, abs=1e-4)


# --------------------------------------------------------------------------- #
# margins
# --------------------------------------------------------------------------- #
def test_gain_margin_edge_agrees_with_linear_gain_margin(lqr_sweep):
    res, _ = lqr_sweep
    # the continuous loop's lower gain margin from pretrial.analysis.linear.loop_report (checked against
    # python-control in tests/analysis/test_linear.py): below it the linearized loop is unstable.
    physics = make_physics("pretrial/CartPole-v0", start_spread={"x": 0.05, "theta": 0.05})
    lqr = design_lqr(physics)
    gm_low = loop_report(physics, lqr, None).channels[0].gain_margin_low
    assert res["linear"][0]["gain_margin_low"] == pytest.approx(gm_low, rel=1e-9)
    edge = next(m for m in res["margins"] if m["name"] == "actuator_gain")
    # Expected relation: actuator_gain scales the loop gain, so the sweep's low edge sits near gm_low.
    # Above gm_low the loop is stable and every small-start episode survives; just below it the
    # divergence is slow (growth rate ~ 0 at the boundary), so a 5 s horizon still survives a little
    # below gm_low; and the sampled 50 Hz loop shifts the boundary a little. Hence a bracket, not equality.
    # The simulated loop is sampled (50 Hz), so its stability limit is the sampled loop's margin
    # (a little above gm_low). Survival alone put the edge 30% below it (a slow divergence outlives a
    # 5 s horizon); with loop quality judged, gains below the limit fail as growing and those just
    # above it, still poorly damped at the horizon, as not settled or offset: the edge sits just above.
    gm_sampled = loop_report(physics, lqr, None, sampled=True).channels[0].gain_margin_low
    assert gm_sampled <= edge["low"] <= 1.06 * gm_sampled
    assert not edge["low_limit_reached"] and edge["low_failure"] in ("growing", "not_settled", "offset")
    # the dispersion [0.1, 1.2] holds unstable gains: Monte Carlo fails them, so the verdict fails
    assert res["verdict"] == "fail" and res["montecarlo"]["failure_modes"].get("growing", 0) > 0
    # the first failing value is just below the edge, within the plan's tolerance of the range
    failing = [p["value"] for p in edge["points"] if not p["pass"]]
    past = max(v for v in failing if v < edge["low"])
    assert edge["low"] - past <= 0.002 * (5.0 - 0.05) + 1e-12


def test_margin_signs_ratios_and_limits(lqr_sweep):
    res, _ = lqr_sweep
    for m in res["margins"]:
        assert m["low"] <= m["nominal"] <= m["high"]
        assert m["range"][0] <= m["low"] and m["high"] <= m["range"][1]
        values = [p["value"] for p in m["points"]]
        assert values == sorted(values)
        for p in m["points"]:
            # a point passes exactly when its Wilson lower bound reaches the required rate
            lo, _ = sweep.wilson_interval(p["successes"], p["episodes"])
            assert p["lower_bound"] == pytest.approx(float(lo)) and p["pass"] == (float(lo) >= 0.95)
        for side in ("low", "high"):
            if m[f"{side}_limit_reached"]:
                assert m[side] == m["range"][0 if side == "low" else 1] and m[f"replay_{side}"] is None
            else:
                assert m[f"replay_{side}"] is not None
    gain = next(m for m in res["margins"] if m["name"] == "actuator_gain")
    assert gain["low_ratio"] == pytest.approx(gain["low"] / gain["nominal"])
    assert gain["high_ratio"] == pytest.approx(gain["high"] / gain["nominal"])
    # a loop with a lower gain margin only: any larger gain keeps it stable, so the range end passes
    assert res["linear"][0]["gain_margin_high"] is None and gain["high_limit_reached"] and gain["high"] == 5.0
    delay = next(m for m in res["margins"] if m["name"] == "actuator_delay_s")
    assert delay["nominal"] == 0.0 and delay["low_ratio"] is None and delay["high_ratio"] is None
    assert delay["low"] == 0.0 and delay["low_limit_reached"]  # nominal sits on the range end
    # 0.2 s of delay is far past the continuous loop's delay margin (~0.075 s): the high side must fail.
    # The 50 Hz zero-order hold already costs about half a period (0.01 s) of delay, so the sampled
    # edge sits a little below the continuous delay margin: a bracket again.
    assert not delay["high_limit_reached"] and delay["high"] < 0.2
    dm = res["linear"][0]["delay_margin_s"]
    assert 0.6 * dm <= delay["high"] <= 1.1 * dm


# --------------------------------------------------------------------------- #
# replay reproduces
# --------------------------------------------------------------------------- #
def test_montecarlo_worst_and_margin_replay(capsys, lqr_sweep):
    res, _ = lqr_sweep
    mc = res["montecarlo"]
    assert mc["successes"] < mc["samples"] and mc["worst"]  # gains down to 0.1 fail
    worst = mc["worst"][0]
    doc = replay(capsys, worst["replay"])
    assert doc["success"] == [worst["success"]] == [False]
    assert doc["failure_modes"] == {worst["failure"]: 1}
    delay = next(m for m in res["margins"] if m["name"] == "actuator_delay_s")
    doc = replay(capsys, delay["replay_high"])
    failed_value = float(delay["replay_high"].split("actuator_delay_s=")[1].split()[0])
    point = next(p for p in delay["points"] if p["value"] == failed_value)
    assert not point["pass"] and doc["episodes"] == point["episodes"]
    assert sum(doc["success"]) == point["successes"]


# --------------------------------------------------------------------------- #
# verdict
# --------------------------------------------------------------------------- #
@pytest.fixture
def verdict_plan(tmp_path):
    path = tmp_path / "v.toml"
    text = LQR_PLAN.replace('"montecarlo", ', "").replace(
        "success_rate = 0.95\n", "success_rate = 0.95\ngain_margin_db = 6.0\nphase_margin_deg = 45.0\n")
    path.write_text(text, encoding="utf-8")
    return load_plan(path, make_physics("pretrial/CartPole-v0"))


def _res(gm_db=12.0, linearizable=True, flagged=False, gain_low=0.3):
    channel = {"channel": "force", "gain_margin_low": 0.25, "gain_margin_high": None, "gain_margin_db": gm_db,
               "phase_margin_deg": 60.0}
    return {
        "margins": [{"name": "actuator_gain", "low": gain_low, "high": 5.0}],
        "linear": [channel] if linearizable else [],
        "linear_details": {"continuous": {"linearizable": linearizable,
                                          "reason": None if linearizable else "output saturated at equilibrium"},
                           "sampled": None},
        "integrator_check": {"episodes": 73, "nominal": {"success_rate": 1.0}, "flagged": flagged},
    }


def test_verdict_passes_when_all_requirements_pass(verdict_plan):
    reqs = sweep.requirements(verdict_plan, _res())
    assert {r["name"] for r in reqs} >= {"margin actuator_gain low", "gain_margin_db force (continuous loop)",
                                         "integrator check"}
    assert sweep.verdict(reqs) == "pass"


def test_verdict_fails_on_each_failing_requirement(verdict_plan):
    # low edge 0.6 > required 0.5: too little gain reduction tolerated
    assert sweep.verdict(sweep.requirements(verdict_plan, _res(gain_low=0.6))) == "fail"
    assert sweep.verdict(sweep.requirements(verdict_plan, _res(gm_db=3.0))) == "fail"
    reqs = sweep.requirements(verdict_plan, _res(linearizable=False))
    linear = [r for r in reqs if "continuous loop" in r["name"]]
    assert linear and not any(r["pass"] for r in linear) and "not linearizable" in linear[0]["measured"]
    assert sweep.verdict(reqs) == "fail"
    assert sweep.verdict(sweep.requirements(verdict_plan, _res(flagged=True))) == "fail"
    assert sweep.verdict([]) == "fail"  # nothing checked is no pass


# --------------------------------------------------------------------------- #
# output directory, determinism, baseline, policy files
# --------------------------------------------------------------------------- #
def test_results_document(lqr_sweep):
    res, out = lqr_sweep
    assert set(SCHEMA_KEYS) <= set(res)
    assert res["schema"] == "pretrial.sweep" and res["schema_version"] == 1
    assert res["policy"] == {"kind": "lqr", "path": None, "content_sha256": None}
    assert res["worstcase"] is None and res["sensitivity"] is None and res["baseline"] is None
    assert res["cautions"] == list(CAUTIONS) and res["verdict"] in ("pass", "fail")
    assert (out / "montecarlo.csv").exists() and (out / "manifest.json").exists()
    body = {k: v for k, v in res.items() if k != "content_sha256"}
    assert read_results(out / "results.json")["content_sha256"] == res["content_sha256"]
    assert len(res["content_sha256"]) == 64 and res["content_sha256"] != sha256_hex("")
    assert body["plan"]["content_sha256"] == sha256_hex(LQR_PLAN)


def test_read_results_refuses_an_edited_file(lqr_sweep, tmp_path):
    res, _ = lqr_sweep
    edited = dict(res, verdict="pass" if res["verdict"] == "fail" else "fail")
    path = tmp_path / "results.json"
    path.write_text(json.dumps(edited), encoding="utf-8")
    with pytest.raises(InputError, match="content hash mismatch"):
        read_results(path)


def test_existing_non_empty_out_is_refused(capsys, tmp_path):
    plan = tmp_path / "p.toml"
    plan.write_text(LQR_PLAN, encoding="utf-8")
    out = tmp_path / "taken"
    out.mkdir()
    (out / "keep.txt").write_text("mine", encoding="utf-8")
    assert main(["sweep", "lqr", "--plan", str(plan), "--out", str(out), "--workers", "1"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "--out" in err[0] and str(out) in err[0]
    assert [p.name for p in out.iterdir()] == ["keep.txt"] and (out / "keep.txt").read_text() == "mine"


def test_same_plan_same_bytes_across_worker_counts(tmp_path):
    # one ProcessExecutor run: the chunking is fixed, so 1 and 2 workers must agree to the byte
    plan = tmp_path / "d.toml"
    plan.write_text(SMALL_PLAN.replace("[scenario]", '[scenario]\nenv = "pretrial/CartPole-v0"'), encoding="utf-8")
    blobs = []
    for workers in ("1", "2"):
        out = tmp_path / f"w{workers}"
        # exit 0 or 1 (the verdict of a 2 s horizon is not the point here; the bytes are)
        assert main(["sweep", "lqr", "--plan", str(plan), "--out", str(out), "--workers", workers, "--json"]) in (0, 1)
        blobs.append((out / "results.json").read_bytes())
    assert blobs[0] == blobs[1]
    assert json.loads(blobs[0])["content_sha256"] == json.loads(blobs[1])["content_sha256"]


def test_policy_file_with_baseline(capsys, tmp_path):
    policy = balancing_policy_file(tmp_path)
    # the plan names no env: a policy file brings its own
    res, _ = run_sweep(capsys, tmp_path, "pf", str(policy), SMALL_PLAN, "--baseline", "lqr")
    assert res["policy"]["kind"] == "file" and res["policy"]["path"] == str(policy)
    assert len(res["policy"]["content_sha256"]) == 64 and res["env"]["id"] == "pretrial/CartPole-v0"
    # a balancing controller passes at nominal on both names and its margins bracket the nominal
    for m in res["margins"]:
        assert not m["fails_at_nominal"] and m["low"] <= m["nominal"] <= m["high"]
    pole = next(m for m in res["margins"] if m["name"] == "pole_mass")
    assert pole["low_ratio"] == pytest.approx(pole["low"] / pole["nominal"])
    assert math.isclose(pole["range"][1], 4.0 * pole["nominal"])
    base = res["baseline"]
    assert base["kind"] == "lqr" and base["verdict"] in ("pass", "fail")
    assert base["requirements"] and base["margins"] and base["montecarlo"]["samples"] == 32
    assert base["montecarlo"] != res["montecarlo"]  # a different controller, its own results
    if res["montecarlo"]["worst"]:
        assert res["montecarlo"]["worst"][0]["replay"].startswith(f"pretrial replay {policy}")


def test_every_analysis_a_plan_may_name_has_a_runner():
    from pretrial.analysis.campaign import RUNNERS
    from pretrial.analysis.plan import ANALYSES

    assert set(RUNNERS) == set(ANALYSES)
