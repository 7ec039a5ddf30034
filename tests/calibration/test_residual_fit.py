"""The hybrid plant (physics plus a learned residual) against an independent reference rig.

Reference: the cart-pole equations with friction of R. V. Florian, "Correct equations for the dynamics
of the cart-pole system" (Center for Cognitive and Neural Studies, Romania, 2007), written out below
independently of pretrial's own implementation, for a cart with *viscous* track friction
``-b x_dot`` (a force that does not depend on the normal force, so Florian's equations take the form
of Barto, Sutton & Anderson 1983 with the friction term linear in the speed) and a viscously damped
pivot ``-mu_p theta_dot``. pretrial's cart-pole has no viscous track friction at all, and the
calibrated model is told the pivot is frictionless: the residual must learn both.
"""

from __future__ import annotations

import json
import math

import gymnasium as gym
import numpy as np
import pytest

import pretrial_envs
import pretrial_envs.core
from pretrial.calibration.benchlog import Segment
from pretrial.calibration.fit import Model, make_windows, rmse
from pretrial.calibration.residual_fit import envelope_of, fit_residual, validate
from pretrial_envs.residual import Envelope, Library, Residual, content_hash, residual_document

G, M_CART, M_POLE, HALF = 9.81, 1.2, 0.15, 0.4
B_CART = 0.8  # N s/m, viscous track friction (not in pretrial's model)
MU_POLE = 4e-3  # N m s, pivot damping (the model is told 0)
DT = 0.02
NOISE = np.array([5e-4, 2e-3, 1e-3, 4e-3])  # measurement noise of x, x_dot, theta, theta_dot (1 sigma)


def reference_derivatives(s: np.ndarray, force: np.ndarray, b: float = B_CART, mu_p: float = MU_POLE) -> np.ndarray:
    """Florian (2007), eqs. for the pole angle and cart acceleration with friction forces that do not
    depend on the normal force (here viscous): theta from upright, positive the same way as x."""
    x_dot, th, w = s[:, 1], s[:, 2], s[:, 3]
    total = M_CART + M_POLE
    sin, cos = np.sin(th), np.cos(th)
    tmp = (force[:, 0] + M_POLE * HALF * w ** 2 * sin - b * x_dot) / total
    th_acc = (G * sin - cos * tmp - mu_p * w / (M_POLE * HALF)) / (HALF * (4.0 / 3.0 - M_POLE * cos ** 2 / total))
    x_acc = tmp - M_POLE * HALF * th_acc * cos / total
    return np.column_stack([x_dot, x_acc, w, th_acc])


def rk4(s: np.ndarray, u: np.ndarray, h: float, f=reference_derivatives) -> np.ndarray:
    """Classical fourth-order Runge-Kutta (the textbook form), the input held over the step."""
    k1 = f(s, u)
    k2 = f(s + 0.5 * h * k1, u)
    k3 = f(s + 0.5 * h * k2, u)
    k4 = f(s + h * k3, u)
    return s + h / 6.0 * (k1 + 2 * k2 + 2 * k3 + k4)


def rig_segments(seed: int, segments: int = 6, rows: int = 300) -> list[Segment]:
    """The rig (pole hanging, multisine force plus a centring loop), simulated at 8 RK4 substeps, all
    states measured with white noise."""
    rng = np.random.default_rng(seed)
    t = np.arange(rows) * DT
    freqs = np.linspace(0.3, 3.0, 8)
    phases = rng.uniform(0, 2 * math.pi, (segments, freqs.size))
    drive = 2.0 * np.sin(2 * math.pi * freqs[None, :, None] * t[None, None, :] + phases[:, :, None]).sum(axis=1)
    x = np.zeros((rows, segments, 4))
    x[0, :, 2] = math.pi + rng.normal(0.0, 0.1, segments)
    u = np.zeros((rows, segments, 1))
    for k in range(rows - 1):  # the rig, every segment at once
        u[k, :, 0] = np.clip(drive[:, k] - 8.0 * x[k, :, 0] - 4.0 * x[k, :, 1], -10.0, 10.0)
        s = x[k]
        for _ in range(8):
            s = rk4(s, u[k], DT / 8)
        x[k + 1] = s
    u[-1] = u[-2]
    meas = x + rng.normal(0.0, 1.0, x.shape) * NOISE
    return [Segment(f"rig{seed}", 2, t, meas[:, j], u[:, j]) for j in range(segments)]


def _model(physics, **params) -> Model:
    base = physics.param_table.resolve({"gravity": G, "cart_mass": M_CART, "pole_mass": M_POLE,
                                        "pole_half_length": HALF, "cart_friction": 0.0, **params})
    return Model(physics, base, (), {"actuator_gain": 1.0, "actuator_lag_s": 0.0, "actuator_delay_s": 0.0},
                 np.array([True]), np.zeros(0))


def test_reference_matches_pretrial_without_the_unmodelled_effects():
    # With b = 0 the reference is the plain Florian / Barto form that pretrial's cart-pole implements
    # (pivot friction included): they must agree to rounding.
    physics = pretrial_envs.make_physics("pretrial/CartPole-v0")
    rng = np.random.default_rng(1)
    s = rng.normal(0.0, 1.0, (50, 4))
    f = rng.normal(0.0, 5.0, (50, 1))
    p = np.tile(_model(physics, pole_friction=MU_POLE).base, (50, 1))
    np.testing.assert_allclose(physics.derivatives(s, f, p), reference_derivatives(s, f, b=0.0), rtol=1e-10,
                               atol=1e-12)


class TruePlant(pretrial_envs.core.Physics):
    """The rig's own equations (reference above) as a plant: the best any model of these logs can do."""

    env_id = "test/TrueCartPole-v0"
    param_table = pretrial_envs.make_physics("pretrial/CartPole-v0").param_table
    state_names = ("x", "x_dot", "theta", "theta_dot")
    state_units = ("m", "m/s", "rad", "rad/s")
    obs_names, obs_units = state_names, state_units
    action_names, action_units = ("force",), ("N",)
    default_substeps = 2

    def derivatives(self, state, force, params):
        return reference_derivatives(state, force)

    def actuate(self, action, params):
        return action * params[:, 4:5]

    def check(self, state, force, params):
        return np.zeros(state.shape[0], dtype=np.int64)

    def reward(self, state, action, params, failure, success):
        return np.zeros(state.shape[0])


def test_hybrid_cuts_the_multistep_error_to_a_third():
    # The claim of the method: on held-out segments the hybrid's simulation error over the calibration's
    # windows is at most a third of the physics-only error, and close to that of the rig's own equations.
    physics = pretrial_envs.make_physics("pretrial/CartPole-v0", dt=DT)
    model = _model(physics, pole_friction=0.0)
    found = fit_residual(model, np.zeros(0), rig_segments(1, segments=4), NOISE.copy(), 25, degree=2)
    val = make_windows(rig_segments(2, segments=3), 25)
    plain, hybrid = validate(model, np.zeros(0), found.residual, val)
    _, true = rmse(_model(TruePlant(dt=DT)), val, np.zeros(0))
    assert np.all(hybrid <= plain / 3.0), (plain, hybrid)
    assert np.all(hybrid <= 1.5 * true), (hybrid, true)
    # the dominant learned term is the viscous track friction: -b / (M + m) on x_dot's derivative at the
    # hanging pole (cos theta = -1 folds part of it into x_dot*cos(theta)), within 20 %
    c = dict(zip(found.residual.library.names, found.residual.coefficients[0]))
    assert c["x_dot"] - c["x_dot*cos(theta)"] == pytest.approx(-B_CART / (M_CART + M_POLE), rel=0.2)


def _zeros_file(tmp_path, physics, **changes):
    lib = Library(physics.state_names, physics.state_units, physics.action_names, 2)
    env = Envelope(physics.state_names + physics.action_names, -np.ones(5), np.ones(5))
    doc = residual_document(Residual(lib, (1, 3), np.zeros((2, lib.size)), env), physics)
    return doc


def _write(path, doc, rehash=True):
    if rehash:
        doc = {**doc, "content_sha256": content_hash(doc)}
    path.write_text(json.dumps(doc))
    return str(path)


def _episode(env, steps=200):
    obs, _ = env.reset(seed=3)
    out = [obs]
    for k in range(steps):
        obs, *_ = env.step(np.array([math.sin(0.1 * k)]))
        out.append(obs)
    return np.array(out)


def test_zero_residual_and_scale_zero_change_nothing(tmp_path):
    # a residual of zeros adds +0.0: the trajectory is the physics-only one (equal values)
    physics = pretrial_envs.make_physics("pretrial/CartPole-v0")
    path = _write(tmp_path / "zero.json", _zeros_file(tmp_path, physics))
    plain = _episode(gym.make("pretrial/CartPole-v0"))
    np.testing.assert_array_equal(_episode(gym.make("pretrial/CartPole-v0", residual=path)), plain)
    # a random residual at scale 0, row by row in a batch beside rows at 1 and 2: scale-0 rows are the
    # physics alone bit for bit; the others move
    doc = _zeros_file(tmp_path, physics)
    doc["coefficients"] = np.random.default_rng(0).normal(0, 0.3, np.shape(doc["coefficients"])).tolist()
    hybrid = pretrial_envs.make_physics("pretrial/CartPole-v0", residual=_write(tmp_path / "r.json", doc))
    rng = np.random.default_rng(1)
    x = rng.normal(0, 0.2, (6, 4))
    u = rng.normal(0, 3, (6, 1))
    p = np.tile(physics.param_table.nominal, (6, 1))
    scale = np.array([[0.0], [1.0], [2.0], [0.0], [1.0], [0.0]])
    a, b = x.copy(), x.copy()
    for _ in range(50):
        a = hybrid.integrate(a, u, p, residual_scale=scale)
        b = physics.integrate(b, u, p)
    zero = scale[:, 0] == 0
    assert a[zero].tobytes() == b[zero].tobytes()
    assert not np.allclose(a[~zero], b[~zero])
    # scale 1 given explicitly is the same as none
    one = hybrid.integrate(x, u, p, residual_scale=np.ones((6, 1)))
    assert one.tobytes() == hybrid.integrate(x, u, p).tobytes()


def test_residual_rows_do_not_depend_on_their_batch(tmp_path):
    # a row's correction is the same alone as in a batch (no BLAS product: it splits batches differently)
    physics = pretrial_envs.make_physics("pretrial/CartPole-v0")
    lib = Library(physics.state_names, physics.state_units, physics.action_names, 3)
    rng = np.random.default_rng(2)
    res = Residual(lib, (1, 3), rng.normal(0, 1, (2, lib.size)),
                   Envelope(physics.state_names + physics.action_names, -np.ones(5), np.ones(5)))
    s, f = rng.normal(0, 1, (1001, 4)), rng.normal(0, 3, (1001, 1))
    whole = res.evaluate(s, f)
    alone = np.concatenate([res.evaluate(s[i:i + 1], f[i:i + 1]) for i in range(len(s))])
    assert whole.tobytes() == alone.tobytes()


def test_envelope_flags_states_outside_the_data():
    physics = pretrial_envs.make_physics("pretrial/CartPole-v0", dt=DT)
    segs = rig_segments(3, segments=2, rows=100)
    u = np.concatenate([s.actions for s in segs])
    env = envelope_of(physics, segs, u, 0.1)
    inside = np.concatenate([s.states for s in segs])
    assert not env.outside(inside, u).any()
    # upright instead of hanging: the pole angle leaves the region the data reached
    upright = inside.copy()
    upright[:, 2] -= math.pi
    assert env.outside(upright, u).all()
    assert env.outside_by(upright, u)[:, 2].all() and not env.outside_by(upright, u)[:, [0, 1, 3, 4]].any()
    # the margin widens each side by its share of the span
    lo, hi = env.bounds()
    np.testing.assert_allclose(env.low - lo, 0.1 * (env.high - env.low))
    span = env.high - env.low
    np.testing.assert_allclose(hi - env.high, 0.1 * span)
    edge = inside[:1].copy()
    edge[0, 0] = env.high[0] + 0.05 * span[0]
    assert not env.outside(edge, u[:1])[0] and env.outside(edge, u[:1], margin=0.0)[0]
    nan = inside[:1].copy()
    nan[0, 1] = np.nan
    assert env.outside(nan, u[:1])[0]


@pytest.mark.parametrize("change, key", [
    (lambda d: d.update(schema="pretrial.calibration"), "schema"),
    (lambda d: d.update(version=2), "version"),
    (lambda d: d.pop("envelope"), "envelope"),
    (lambda d: d.update(state=["x", "x_dot", "phi", "phi_dot"]), "state"),
    (lambda d: d["features"].__setitem__(1, "y"), "features"),
    (lambda d: d["coefficients"][0].__setitem__(0, float("nan")), "coefficients"),
    (lambda d: d.update(coefficients=[[0.0]]), "coefficients"),
    (lambda d: d.update(outputs=["x_dot", "omega"]), "outputs"),
])
def test_bad_residual_files_name_the_file_and_key(tmp_path, change, key):
    physics = pretrial_envs.make_physics("pretrial/CartPole-v0")
    doc = _zeros_file(tmp_path, physics)
    change(doc)
    path = _write(tmp_path / "bad.json", doc, rehash=key != "coefficients")
    with pytest.raises(ValueError) as err:
        gym.make("pretrial/CartPole-v0", residual=path)
    msg = str(err.value)
    assert "\n" not in msg and path in msg and f": {key}" in msg, msg


def test_edited_or_missing_residual_files_are_refused(tmp_path):
    physics = pretrial_envs.make_physics("pretrial/CartPole-v0")
    doc = _zeros_file(tmp_path, physics)
    doc["coefficients"][0][0] = 1.0  # edited after hashing
    path = _write(tmp_path / "edited.json", doc, rehash=False)
    with pytest.raises(ValueError, match="content_sha256"):
        gym.make("pretrial/CartPole-v0", residual=path)
    with pytest.raises(ValueError, match="no such file"):
        gym.make("pretrial/CartPole-v0", residual=str(tmp_path / "none.json"))
    # another plant's residual: the gantry has other states
    with pytest.raises(ValueError, match="env: fitted on"):
        gym.make("pretrial/GantryCrane-v0", residual=_write(tmp_path / "ok.json", _zeros_file(tmp_path, physics)))


def test_residual_hash_is_the_projects_content_hash():
    # one convention for content hashes: pretrial.files.canonical_json + sha256 over all but the hash
    from pretrial.files import canonical_json, sha256_hex

    physics = pretrial_envs.make_physics("pretrial/CartPole-v0")
    doc = _zeros_file(None, physics)
    body = {k: v for k, v in doc.items() if k != "content_sha256"}
    assert doc["content_sha256"] == sha256_hex(canonical_json(body))
