"""Sweeps of hybrid plants: the trust region in the verdict, residual_scale as a perturbation, and the
linear model of physics plus residual.

References: the requirement rule of the README (a share of simulated time outside the residual's data,
at most ``max_outside_envelope``); numpy central differences of ``physics.derivatives + residual`` for the
Jacobians (the textbook second-order formula (f(x + h) - f(x - h)) / 2h).
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from helpers import balancing_policy_file, residual_file

import pretrial_envs
from pretrial.analysis.campaign import Campaign
from pretrial.analysis.linear import plant_model
from pretrial.analysis.lqr import design_lqr
from pretrial.analysis.plan import load_plan
from pretrial.analysis.sweep import controlled, run_sweep
from pretrial.errors import InputError
from pretrial.sim.execution import Executor
from pretrial_envs.residual import Library

#: an envelope that holds every upright episode of the plan below
WIDE_LOW = (-5.0, -5.0, -1.0, -10.0, -10.0)
WIDE_HIGH = (5.0, 5.0, 1.0, 10.0, 10.0)


def _plan(d, residual: str | None = "r.json", extra: str = "", samples: int = 40):
    options = f'[scenario.options]\nresidual = "{residual}"\n' if residual else ""
    text = f"""[scenario]
env = "pretrial/CartPole-v0"
episodes = 80
horizon = 2.0
seed = 3

{options}
[[vary]]
name = "actuator_gain"
range = [0.5, 2.0]
dispersion = [0.9, 1.1]

[analysis]
run = ["montecarlo", "linear"]
montecarlo_samples = {samples}

[require]
success_rate = 0.5
{extra}
"""
    p = d / "plan.toml"
    p.write_text(text)
    return p


def _size() -> int:
    plain = pretrial_envs.make_physics("pretrial/CartPole-v0")
    return Library(plain.state_names, plain.state_units, plain.action_names, 2).size


def _row(results):
    return next(r for r in results["requirements"] if r["name"].startswith("time outside"))


def test_upright_sweep_on_hanging_bench_data_fails_and_cautions(tmp_path):
    # the shipped bench logs hang the pole: the upright task is all extrapolation
    path = residual_file(tmp_path / "r.json")
    plan = _plan(tmp_path)
    res, _ = run_sweep("lqr", plan, tmp_path / "out", workers=1)
    doc = res.doc
    row = _row(doc)
    assert row["pass"] is False and row["measured"] == 1.0 and row["required"] == 0.05
    assert doc["verdict"] == "fail"
    sha = json.loads(path.read_text())["content_sha256"]
    assert doc["residual"]["sha256"] == sha and doc["residual"]["path"] == str(path.resolve())
    assert doc["envelope"]["judged_on"] == "montecarlo"
    assert doc["envelope"]["analyses"]["montecarlo"]["episodes_outside"] == 40
    assert doc["envelope"]["all"]["first_variables"] == {"theta": 40}
    assert "extrapolation" in doc["cautions"][0] and "theta" in doc["cautions"][0]
    report = (tmp_path / "out" / "report.md").read_text()
    assert "Trust region of the hybrid plant" in report and sha in report


def test_sweep_inside_the_data_passes_the_requirement_without_caution(tmp_path):
    residual_file(tmp_path / "r.json", WIDE_LOW, WIDE_HIGH)
    run_sweep("lqr", _plan(tmp_path), tmp_path / "out", workers=1)
    doc = json.loads((tmp_path / "out" / "results.json").read_text())
    row = _row(doc)
    assert row["pass"] is True and row["measured"] == 0.0
    assert not any("extrapolation" in c for c in doc["cautions"])


def test_a_plan_may_allow_more_time_outside(tmp_path):
    residual_file(tmp_path / "r.json")
    run_sweep("lqr", _plan(tmp_path, extra="max_outside_envelope = 1.0"), tmp_path / "out", workers=1)
    doc = json.loads((tmp_path / "out" / "results.json").read_text())
    assert _row(doc)["pass"] is True  # judged as asked...
    assert "extrapolation" in doc["cautions"][0]  # ...and still said


def test_max_outside_envelope_is_validated_and_defaults_only_on_hybrid_plants(tmp_path):
    residual_file(tmp_path / "r.json")
    hybrid = pretrial_envs.make_physics("pretrial/CartPole-v0", residual=str(tmp_path / "r.json"))
    plain = pretrial_envs.make_physics("pretrial/CartPole-v0")
    assert load_plan(_plan(tmp_path), hybrid).max_outside_envelope == 0.05
    assert load_plan(_plan(tmp_path, residual=None), plain).max_outside_envelope is None
    for bad in ("1.5", "-0.1", "nan", '"much"'):
        with pytest.raises(InputError) as err:
            load_plan(_plan(tmp_path, extra=f"max_outside_envelope = {bad}"), hybrid)
        msg = err.value.message
        assert "plan.toml" in msg and "require.max_outside_envelope" in msg and "\n" not in msg, msg


def test_relative_residual_paths_resolve_against_the_plan(tmp_path, monkeypatch):
    (tmp_path / "plans").mkdir()
    residual_file(tmp_path / "plans" / "r.json")
    plan = _plan(tmp_path / "plans")
    monkeypatch.chdir(tmp_path)  # not the plan's directory
    ctl = controlled("lqr", str(plan))
    assert ctl.physics.residual.source == str((tmp_path / "plans" / "r.json").resolve())


def test_residual_scale_zero_is_the_physics_alone_bit_for_bit(tmp_path):
    coef = np.random.default_rng(7).normal(0.0, 0.2, (2, _size()))
    residual_file(tmp_path / "r.json", WIDE_LOW, WIDE_HIGH, coefficients=coef)
    plan_path = _plan(tmp_path)
    hybrid = pretrial_envs.make_physics("pretrial/CartPole-v0", residual=str(tmp_path / "r.json"))
    plain = pretrial_envs.make_physics("pretrial/CartPole-v0")
    lqr = design_lqr(plain)
    k = 24
    episodes = np.arange(k)

    def run(physics, values):
        c = Campaign(physics, lqr, {}, load_plan(plan_path, physics), Executor(), "lqr")
        return c.evaluate(values, 5, episodes)

    alone = run(plain, {})
    zero = run(hybrid, {"residual_scale": np.zeros(k)})
    for key in ("success", "score", "steps"):
        assert getattr(zero, key).tobytes() == getattr(alone, key).tobytes(), key
    assert (zero.failure == alone.failure).all()
    assert (zero.outside == 0).all()
    one = run(hybrid, {"residual_scale": np.ones(k)})  # the residual does act at 1
    assert one.score.tobytes() != alone.score.tobytes()


def test_policy_refuses_a_residual_other_than_its_training_one(tmp_path):
    residual_file(tmp_path / "r.json")
    doc = json.loads(balancing_policy_file(tmp_path).read_text())
    doc["env"]["options"]["residual"] = str(tmp_path / "r.json")
    doc["training"]["residual"] = {"path": "bench/residual.json", "sha256": "0" * 64}
    from pretrial.controller.policy import content_hash, save_policy

    doc["content_sha256"] = content_hash(doc)
    save_policy(tmp_path / "trained.json", doc)
    with pytest.raises(InputError) as err:
        controlled(str(tmp_path / "trained.json"), str(_plan(tmp_path)))
    msg = err.value.message
    assert "bench/residual.json" in msg and str(tmp_path / "r.json") in msg and "0000000000000000" in msg, msg
    # the same file, recorded with its own hash: accepted
    doc["training"]["residual"]["sha256"] = json.loads((tmp_path / "r.json").read_text())["content_sha256"]
    doc["content_sha256"] = content_hash(doc)
    save_policy(tmp_path / "trained.json", doc)
    assert controlled(str(tmp_path / "trained.json"), str(_plan(tmp_path))).physics.residual is not None


def _central(f, x, h):
    """(f(x + h e_j) - f(x - h e_j)) / 2h, column by column."""
    cols = []
    for j in range(x.size):
        e = np.zeros_like(x)
        e[j] = h[j]
        cols.append((f(x + e) - f(x - e)) / (2 * h[j]))
    return np.stack(cols, axis=1)


@pytest.mark.parametrize("theta", [0.0, 0.3, np.pi])
def test_linearization_of_a_hybrid_plant_is_the_jacobian_of_physics_plus_residual(tmp_path, theta):
    rng = np.random.default_rng(11)
    plain = pretrial_envs.make_physics("pretrial/CartPole-v0")
    lib = Library(plain.state_names, plain.state_units, plain.action_names, 2, 0.0)  # no smooth signs
    coef = rng.normal(0.0, 0.5, (2, lib.size))
    residual_file(tmp_path / "r.json", WIDE_LOW, WIDE_HIGH, coefficients=coef, sign_scale=0.0)
    hybrid = pretrial_envs.make_physics("pretrial/CartPole-v0", residual=str(tmp_path / "r.json"))
    p = plain.param_table.resolve({"cart_friction": 0.0})
    x = np.array([0.1, -0.2, theta, 0.4])
    u = np.array([1.5])

    def f(z):  # physics + residual, the reference written out: correction added to x_ddot and theta_ddot
        s, a = z[None, :4], z[None, 4:]
        d = plain.derivatives(s, a, p[None, :])[0].copy()
        d[[1, 3]] += coef @ lib.features(s, a)[0]
        return d

    z = np.concatenate([x, u])
    ref = _central(f, z, 1e-6 * np.maximum(1.0, np.abs(z)))
    model = plant_model(hybrid, x, u / p[plain.param_table.index("max_force")], p, [0, 1, 2, 3], [])
    np.testing.assert_allclose(model.a, ref[:, :4], rtol=1e-6, atol=1e-6)
    np.testing.assert_allclose(model.b, ref[:, 4:] * p[plain.param_table.index("max_force")], rtol=1e-6, atol=1e-6)
    # and the residual matters here: the plain plant's Jacobian differs
    plain_model = plant_model(plain, x, u / 10.0, p, [0, 1, 2, 3], [])
    assert not np.allclose(plain_model.a, model.a, atol=1e-3)


def test_smooth_signs_are_left_out_of_the_linear_model_as_coulomb_friction_is(tmp_path):
    # a residual of one dry-friction-shaped term: tanh(x_dot / 0.01) on x_ddot; its slope at rest (100 x the
    # coefficient) is not a viscous term, so the LQR designs on the physics alone and says so
    plain = pretrial_envs.make_physics("pretrial/CartPole-v0")
    lib = Library(plain.state_names, plain.state_units, plain.action_names, 2)
    coef = np.zeros((2, lib.size))
    coef[0, lib.names.index("tanh(x_dot/0.01)")] = 0.3
    residual_file(tmp_path / "r.json", coefficients=coef)
    hybrid = pretrial_envs.make_physics("pretrial/CartPole-v0", residual=str(tmp_path / "r.json"))
    a, b = design_lqr(hybrid), design_lqr(plain)
    assert a.describe()["gain"] == b.describe()["gain"]
    assert any("smooth signs" in n for n in a.describe()["notes"])


def test_residual_scale_is_swept_like_any_perturbation(tmp_path):
    # a residual that pushes the cart along its motion (negative damping, 1 1/s): scaled up enough, the
    # LQR designed on the physics alone loses the pole; scale 0 is the physics alone, which it holds
    coef = np.zeros((2, _size()))
    lib = Library(*(lambda p: (p.state_names, p.state_units, p.action_names))(
        pretrial_envs.make_physics("pretrial/CartPole-v0")), 2)
    coef[0, lib.names.index("x_dot")] = 1.0
    residual_file(tmp_path / "r.json", WIDE_LOW, WIDE_HIGH, coefficients=coef)
    text = _plan(tmp_path).read_text().replace('name = "actuator_gain"\nrange = [0.5, 2.0]\ndispersion = [0.9, 1.1]',
                                               'name = "residual_scale"\nrange = [0.0, 20.0]\ndispersion = [0.0, 1.0]')
    text = text.replace('run = ["montecarlo", "linear"]', 'run = ["margins", "montecarlo"]\ntolerance = 0.05')
    text = text.replace("horizon = 2.0", "horizon = 5.0").replace("episodes = 80", "episodes = 8")
    (tmp_path / "plan.toml").write_text(text)
    run_sweep("lqr", tmp_path / "plan.toml", tmp_path / "out", workers=1)
    doc = json.loads((tmp_path / "out" / "results.json").read_text())
    (m,) = doc["margins"]
    assert m["name"] == "residual_scale" and m["low"] == 0.0 and 1.0 < m["high"] < 20.0, m
    assert doc["montecarlo"]["varied"][0]["name"] == "residual_scale"
    # a plain plant has nothing to scale: the plan is refused, naming the entry
    with pytest.raises(InputError) as err:
        load_plan(tmp_path / "plan.toml", pretrial_envs.make_physics("pretrial/CartPole-v0"))
    assert "residual_scale" in err.value.message and "no learned residual" in err.value.message
