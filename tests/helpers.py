"""Helpers shared by the test modules (test modules never import each other).

Builders of reference objects (neat-python configs and genomes, a balancing cart-pole policy,
a results document) and the checks several test files make (a refused command, a directory
snapshot).
"""

from __future__ import annotations

import math
import random
from pathlib import Path

import neat
import numpy as np
import scipy.linalg
from hypothesis import assume
from hypothesis import strategies as st
from neat.innovation import InnovationTracker

from pretrial.cli.main import main
from pretrial.console import CAUTIONS
from pretrial.controller.network import ACTIVATIONS, AGGREGATIONS
from pretrial.controller.policy import IOMap, policy_from_genome, save_policy
from pretrial_envs import make_physics
from pretrial_envs.core import jacobians

#: env ids the config fuzzing draws from (three of ours, one of gymnasium's, one unknown)
ENVS = ["pretrial/CartPole-v0", "pretrial/DronePair-v0", "pretrial/GantryCrane-v0", "CartPole-v1", "x"]

ROOT = Path(__file__).resolve().parents[1]


def config_text(feed_forward: bool, num_inputs: int = 3, num_outputs: int = 2, activations: str = " ".join(ACTIVATIONS),
                aggregations: str = " ".join(AGGREGATIONS), num_hidden: int = 1) -> str:
    """A neat-python config with high structural mutation rates."""
    return f"""
[NEAT]
fitness_criterion = max
fitness_threshold = 1e9
pop_size = 10
reset_on_extinction = False
no_fitness_termination = True

[DefaultGenome]
num_inputs = {num_inputs}
num_outputs = {num_outputs}
num_hidden = {num_hidden}
feed_forward = {feed_forward}
initial_connection = partial_direct 0.5
activation_default = random
activation_mutate_rate = 0.3
activation_options = {activations}
aggregation_default = random
aggregation_mutate_rate = 0.2
aggregation_options = {aggregations}
bias_init_mean = 0.0
bias_init_stdev = 1.0
bias_max_value = 5.0
bias_min_value = -5.0
bias_mutate_power = 0.5
bias_mutate_rate = 0.7
bias_replace_rate = 0.1
response_init_mean = 1.0
response_init_stdev = 0.5
response_max_value = 3.0
response_min_value = -3.0
response_mutate_power = 0.3
response_mutate_rate = 0.5
response_replace_rate = 0.1
weight_init_mean = 0.0
weight_init_stdev = 1.0
weight_max_value = 4.0
weight_min_value = -4.0
weight_mutate_power = 0.5
weight_mutate_rate = 0.8
weight_replace_rate = 0.1
enabled_default = True
enabled_mutate_rate = 0.1
conn_add_prob = 0.7
conn_delete_prob = 0.1
node_add_prob = 0.5
node_delete_prob = 0.1
compatibility_disjoint_coefficient = 1.0
compatibility_weight_coefficient = 0.5
single_structural_mutation = False
structural_mutation_surer = default

[DefaultSpeciesSet]
compatibility_threshold = 3.0

[DefaultStagnation]
species_fitness_func = max
max_stagnation = 20
species_elitism = 2

[DefaultReproduction]
elitism = 2
survival_threshold = 0.2
min_species_size = 2
"""


def make_config(path: Path, feed_forward: bool, **kwargs) -> neat.Config:
    path.write_text(config_text(feed_forward, **kwargs))
    return neat.Config(neat.DefaultGenome, neat.DefaultReproduction, neat.DefaultSpeciesSet,
                       neat.DefaultStagnation, str(path))


def random_genome(config: neat.Config, seed: int, mutations: int = 30) -> neat.DefaultGenome:
    """A genome grown by neat-python's own mutation operators from Python's ``random`` seeded with ``seed``."""
    gc = config.genome_config
    gc.innovation_tracker = InnovationTracker()
    gc.node_indexer = None  # node keys depend on this genome only
    random.seed(seed)
    genome = neat.DefaultGenome(seed)
    genome.configure_new(gc)
    for _ in range(mutations):
        genome.mutate(gc)
    return genome


def hand_genome(config: neat.Config, nodes: dict, connections: list) -> neat.DefaultGenome:
    """A hand-built genome: nodes {key: (bias, response, activation, aggregation)}, connections (in, out, w, on)."""
    gc = config.genome_config
    gc.innovation_tracker = InnovationTracker()
    g = neat.DefaultGenome(0)
    for key, (bias, response, act, agg) in nodes.items():
        node = neat.DefaultGenome.create_node(gc, key)
        node.bias, node.response, node.activation, node.aggregation = bias, response, act, agg
        g.nodes[key] = node
    for i, (a, b, w, enabled) in enumerate(connections):
        g.add_connection(gc, a, b, w, enabled, innovation=i + 1)
    return g


def library_outputs(genome, config, inputs: np.ndarray) -> np.ndarray:
    """neat-python's outputs for inputs (steps, B, n_in): one library network per scenario, state carried."""
    kind = neat.nn.FeedForwardNetwork if config.genome_config.feed_forward else neat.nn.RecurrentNetwork
    nets = [kind.create(genome, config) for _ in range(inputs.shape[1])]
    return np.array([[net.activate(list(x)) for net, x in zip(nets, step, strict=True)] for step in inputs.tolist()])


def library_outputs_or_skip(genome, config, inputs: np.ndarray) -> np.ndarray:
    """As :func:`library_outputs`, discarding the example where the library itself fails.

    neat-python raises OverflowError for ``z ** 2`` / ``z ** 3`` of a huge value (the compiled
    network returns inf there, a documented deviation), so there is nothing to compare.
    """
    try:
        return library_outputs(genome, config, inputs)
    except OverflowError:
        assume(False)
        raise


def balancing_policy_file(d: Path) -> Path:
    """A cart-pole policy file: one identity output node, u = -K x with K from scipy's DARE.

    Shared with tests/playback/test_replay.py (its ``policy_file`` fixture).
    """
    physics = make_physics("pretrial/CartPole-v0")
    p = physics.param_table.resolve({})
    a, b = jacobians(physics, np.zeros(4), np.zeros(1), p)
    # zero-order-hold discretization by the block matrix exponential (Van Loan's method)
    m = np.zeros((5, 5))
    m[:4, :4], m[:4, 4:] = a, b
    e = scipy.linalg.expm(m * physics.dt)
    ad, bd = e[:4, :4], e[:4, 4:]
    q, r = np.diag([1.0, 0.1, 10.0, 0.1]), np.array([[0.01]])
    x = scipy.linalg.solve_discrete_are(ad, bd, q, r)
    k = np.linalg.solve(r + bd.T @ x @ bd, bd.T @ x @ ad)[0]  # force [N] = -k . state
    cfg = make_config(d / "neat.ini", True, num_inputs=4, num_outputs=1, activations="identity",
                      aggregations="sum", num_hidden=0)
    genome = neat.DefaultGenome(0)
    node = neat.genes.DefaultNodeGene(0)
    node.bias, node.response, node.activation, node.aggregation = 0.0, 1.0, "identity", "sum"
    genome.nodes[0] = node
    scale = physics.obs_scale
    for i in range(4):
        conn = neat.genes.DefaultConnectionGene((-(i + 1), 0), innovation=i + 1)
        # network input i is obs_i / scale_i and the action is force / max_force (10 N)
        conn.weight, conn.enabled = float(-k[i] / 10.0 * scale[i]), True
        genome.connections[conn.key] = conn
    io = IOMap(4, 1, obs_scale=[1.0 / s for s in scale])
    policy = policy_from_genome(genome, cfg, env_id="pretrial/CartPole-v0", env_options=physics.options(), io=io)
    path = d / "linear.json"
    save_policy(path, policy)
    return path


def snapshot(root: Path) -> dict[str, bytes | None]:
    """Every entry under ``root`` with its bytes (None for directories), hidden ones included."""
    return {str(p.relative_to(root)): (None if p.is_dir() else p.read_bytes()) for p in sorted(root.rglob("*"))}


def cli_refused(capsys, argv: list[str]) -> str:
    """Run ``pretrial ARGV``; assert the contract; return the one error line."""
    capsys.readouterr()
    try:
        code = main(argv)
    except SystemExit as exc:  # argparse usage errors
        code = exc.code
    out, err = capsys.readouterr()
    lines = err.strip().splitlines()
    assert code == 2, (argv, code, out, err)
    assert len(lines) == 1, err
    assert lines[0].startswith("pretrial"), err
    assert "error:" in lines[0] and "Traceback" not in out + err
    return lines[0]


def part(scale: float = 1.0, verdict: str = "fail"):
    """The per-controller keys of a results dict (policy or baseline)."""
    lo, hi = wilson(1950, 2000)
    return {
        "margins": [
            {"name": "pole_mass", "unit": "kg", "nominal": 0.1, "low": 0.02, "high": 0.35 * scale,
             "low_ratio": 0.2, "high_ratio": 3.5 * scale, "low_failure": None, "high_failure": "off_track",
             "low_limit_reached": True, "high_limit_reached": False, "range": [0.02, 1.0],
             "points": points([0.02, 0.05, 0.1, 0.2, 0.35, 0.5], [20, 20, 20, 19, 17, 3]),
             "replay_low": None,
             "replay_high": "pretrial replay runs/a/champion.json --set pole_mass=0.37 --seed 123 --episodes 20"},
            {"name": "track_offset", "unit": "m", "nominal": 0.0, "low": -0.4, "high": 0.3, "low_ratio": None,
             "high_ratio": None, "low_failure": "pole_fell", "high_failure": "pole_fell",
             "low_limit_reached": False, "high_limit_reached": False, "range": [-1.0, 1.0],
             "points": points([-0.5, -0.4, 0.0, 0.3, 0.4], [4, 18, 20, 17, 2]),
             "replay_low": "pretrial replay runs/a/champion.json --set track_offset=-0.41 --seed 5 --episodes 20",
             "replay_high": "pretrial replay runs/a/champion.json --set track_offset=0.31 --seed 6 --episodes 20"},
            {"name": EVIL, "unit": "N", "nominal": 1.0, "low": 0.5, "high": 2.0, "low_ratio": 0.5,
             "high_ratio": 2.0, "low_failure": EVIL_WORD, "high_failure": None, "low_limit_reached": False,
             "high_limit_reached": False, "range": [0.1, 4.0], "points": [], "replay_low": None, "replay_high": None},
        ],
        "montecarlo": {
            "samples": 2000, "successes": 1950, "success_rate": 0.975, "ci95": [lo, hi],
            "failure_modes": {"pole_fell": 40, "off_track": 10},
            "varied": [{"name": "pole_mass", "unit": "kg", "distribution": "uniform", "low": 0.05, "high": 0.3}],
            "score_quantiles": {"0.01": -0.2, "0.05": 0.1, "0.5": 0.8},
            "worst": [
                {"values": {"pole_mass": 0.29}, "seed": 987654321, "score": -0.4, "success": False,
                 "failure": "pole_fell",
                 "replay": "pretrial replay runs/a/champion.json --set pole_mass=0.29 --seed 987654321"},
                {"values": {"pole_mass": 0.28}, "seed": 11, "score": 0.5, "success": True, "failure": None,
                 "replay": "pretrial replay runs/a/champion.json --set pole_mass=0.28 --seed 11"}],
            "samples_file": "montecarlo.csv"},
        "worstcase": {"method": "scipy.optimize.differential_evolution", "evaluations": 300, "episodes": 8,
                      "score": -0.8, "values": {"pole_mass": 0.3}, "seed": 42, "success_rate": 0.0,
                      "failure": "pole_fell",
                      "replay": "pretrial replay runs/a/champion.json --set pole_mass=0.3 --seed 42 --episodes 8"},
        "sensitivity": {"method": "Sobol (scipy, Saltelli 2010)", "score": "episode score", "samples": 1024,
                        "indices": [{"name": "pole_mass", "S1": 0.4, "S1_conf": 0.05, "ST": 0.5, "ST_conf": 0.06}]},
        "success_map": {"x": "pole_mass", "y": "track_offset", "x_unit": "kg", "y_unit": "m",
                        "x_values": [0.05, 0.1, 0.2, 0.3], "y_values": [-0.3, 0.0, 0.3],
                        "success_rate": [[1.0, 1.0, 0.7, 0.2], [1.0, 1.0, 0.9, 0.5], [0.9, 0.8, 0.6, 0.1]],
                        "episodes": 20},
        "linear": [linear_entry(63.0 * scale, None)],
        "linear_sampled": [],
        "linear_details": {
            "continuous": {"linearizable": True, "reason": None, "notes": ["synthetic loop"], "stable": True,
                           "equilibrium_state": [0, 0, 0, 0], "equilibrium_action": [0],
                           "multi_loop_disk_margin": None, "response": response(1.5 * scale)},
            "sampled": {"linearizable": False, "reason": "saturated: the output is at the actuator limit",
                        "notes": [], "stable": None, "dt": 0.02, "delay_steps": 0, "response": None}},
        "integrator_check": {"nominal": {"integrator": "rk4", "substeps": 1, "success_rate": 1.0, "mean_score": 0.8},
                             "variants": [{"integrator": "euler", "substeps": 4, "success_rate": 0.95,
                                           "mean_score": 0.79}],
                             "flagged": False, "note": "largest change 0.05 in success rate"},
        "requirements": [
            {"name": "success_rate", "required": 0.95, "measured": 0.975, "pass": True},
            {"name": "margin pole_mass high_ratio", "required": 4.0, "measured": 3.5 * scale,
             "pass": 3.5 * scale >= 4.0},
            {"name": "gain_margin_db force", "required": 6.0, "measured": None, "pass": True},
            {"name": "integrator_check", "required": "no change", "measured": "no change", "pass": True}],
        "verdict": verdict,
    }


def make_results(baseline: bool = False):
    r = {"schema": "pretrial.sweep", "schema_version": 1,
         "policy": {"kind": "file", "path": "runs/a/champion.json", "content_sha256": "ab" * 32},
         "env": {"id": "pretrial/CartPole-v0", "options": {"poles": 1}, "params": {}},
         "plan": {"path": "configs/sweeps/cartpole.toml", "content_sha256": "cd" * 32, "resolved": {}},
         "seed": 0, "required_success_rate": 0.8, "episodes_per_point": 20, **part(),
         "baseline": None, "cautions": list(CAUTIONS), "content_sha256": "ef" * 32}
    if baseline:
        r["baseline"] = {"kind": "lqr", "controller": {
            "kind": "lqr", "gain": {"units": "N per state unit", "rows": {"force": {"x": -1.0, "theta": 30.0}}},
            "q": {"x": 1.0, "theta": 10.0}, "r": {"force": 0.1}, "notes": []}, **part(1.3, "pass")}
    return r


def samples(n: int = 200):
    rng = np.random.default_rng(0)
    m = rng.uniform(0.05, 0.3, n)
    ok = m < 0.27
    return {"pole_mass": m, "seed": np.arange(n), "success": ok,
            "failure": np.where(ok, "", "pole_fell"), "score": np.where(ok, 0.8, -0.3) + 0.1 * rng.standard_normal(n)}


scalars = st.one_of(
    st.integers(min_value=-(2**63), max_value=2**63 - 1),
    st.sampled_from([0, 1, 2, 3, 50, -1]),
    st.floats(allow_nan=True, allow_infinity=True),
    st.booleans(),
    st.text(max_size=12),
    st.sampled_from(ENVS + ["tanh", "auto", "full", "rk4", "euler", "shared", "whole", "%", "\n", "positions"]),
)


def fuzz_toml(v) -> str:
    """TOML inline syntax for generated values (independent of the code under test)."""
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, float):
        if math.isnan(v):
            return "nan"
        if math.isinf(v):
            return "inf" if v > 0 else "-inf"
        return repr(v)
    if isinstance(v, int):
        return str(v)
    if isinstance(v, str):
        return '"' + "".join(c if c.isprintable() and c not in '"\\' else f"\\u{ord(c):04x}" for c in v) + '"'
    if isinstance(v, list):
        return "[" + ", ".join(fuzz_toml(x) for x in v) + "]"
    return "{" + ", ".join(f"{k} = {fuzz_toml(x)}" for k, x in v.items()) + "}"


EVIL = "<b>evil</b>"  # a hostile parameter name


EVIL_WORD = "<script>x()</script>"  # a hostile failure word


def wilson(k: int, n: int, z: float = 1.959964) -> tuple[float, float]:
    # Wilson (1927), "Probable inference...", JASA 22:209, score interval
    p = k / n
    centre = (p + z * z / (2 * n)) / (1 + z * z / n)
    half = z / (1 + z * z / n) * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n))
    return centre - half, centre + half


def points(values, successes, n=20, required=0.8):
    out = []
    for v, k in zip(values, successes):
        lo, hi = wilson(k, n)
        out.append({"value": v, "episodes": n, "successes": k, "success_rate": k / n, "lower_bound": lo,
                    "upper_bound": hi, "pass": lo >= required, "failure_modes": {"pole_fell": n - k}, "seed": 7})
    return out


def response(gain: float, dt: float | None = None):
    # synthetic loop L(s) = gain / (s (s + 1)) (continuous) or its value at s = exp(j w dt) (sampled)
    w = np.geomspace(0.05, 50.0 if dt is None else math.pi / dt, 120)
    s = 1j * w if dt is None else (np.exp(1j * w * dt) - 1) / dt
    L = gain / (s * (s + 1))
    return {"omega": w.tolist(), "channels": {"force": {"re": L.real.tolist(), "im": L.imag.tolist()}}}


def linear_entry(pm: float, gm_db: float | None):
    return {"channel": "force", "gain_margin_low": 0.0, "gain_margin_high": None if gm_db is None else 10 ** (
        gm_db / 20), "gain_margin_db": gm_db, "phase_margin_deg": pm, "delay_margin_s": 0.3, "disk_margin": 0.9,
        "disk_gain_low": 0.38, "disk_gain_high": 2.6, "disk_phase_deg": 48.0, "crossover_rad_s": 1.2}


def quick_plan(seed: int = 7, samples: int = 48, required: float = 0.8) -> str:
    """A cart-pole sweep plan that runs in seconds: margins and Monte Carlo over pole mass and actuator gain.

    The gain's range reaches far below what the LQR tolerates, so its sweeps have failures to replay.
    """
    return f"""
[scenario]
env = "pretrial/CartPole-v0"
episodes = 20
horizon = 2.0
seed = {seed}
[[vary]]
name = "pole_mass"
units = "ratio"
range = [0.5, 4.0]
dispersion = [0.8, 1.5]
[[vary]]
name = "actuator_gain"
range = [0.01, 2.0]
dispersion = [0.05, 1.2]
[analysis]
run = ["margins", "montecarlo"]
tolerance = 0.05
montecarlo_samples = {samples}
[require]
success_rate = {required}
"""


#: the shipped bench logs' region (configs/bench: the pole hanging at theta = pi): x, x_dot, theta, theta_dot, force
HANGING_LOW = (-0.3, -0.6, 2.6, -2.4, -4.0)
HANGING_HIGH = (0.3, 0.7, 3.7, 2.9, 4.0)


def residual_file(path: Path, low=HANGING_LOW, high=HANGING_HIGH, coefficients=None, degree: int = 2,
                  sign_scale: float = 0.01, margin: float = 0.1) -> Path:
    """A cart-pole ``residual.json`` (pretrial_envs.residual's own writer) correcting x_ddot and theta_ddot.

    ``coefficients`` (2, F) default to zeros, so the plant moves as the physics alone and only the
    envelope matters; callers give their own to change the dynamics.
    """
    import json

    from pretrial_envs.residual import Envelope, Library, Residual, residual_document

    physics = make_physics("pretrial/CartPole-v0")
    lib = Library(physics.state_names, physics.state_units, physics.action_names, degree, sign_scale)
    coef = np.zeros((2, lib.size)) if coefficients is None else np.asarray(coefficients, float)
    env = Envelope(physics.state_names + physics.action_names, np.array(low, float), np.array(high, float), margin)
    doc = residual_document(Residual(lib, (1, 3), coef, env), physics)
    path.write_text(json.dumps(doc))
    return path
