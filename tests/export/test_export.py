"""`pretrial export`: the C99 and Python exports compute what the policy computes.

References:

* neat-python 2.0 (``neat.nn.FeedForwardNetwork`` / ``RecurrentNetwork``): the golden actions equal the
  library's own networks (``test_golden_actions_are_neat_pythons``), so "exported code == numpy policy"
  below also means "exported code == neat-python". pretrial's numpy network (tests/controller/test_network.py ties it
  to the library) is the reference the exports are compared with, within 1e-12 (double) / 1e-5 (float).
* ISO C99 (ISO/IEC 9899:1999) as the system compiler enforces it with ``-std=c99 -pedantic-errors``; the
  compiler's own ``sizeof`` checks the memory figures.
* The plants' published actuator maps, via pretrial_envs' parameter tables: cart-pole force =
  action x max_force (Barto, Sutton and Anderson 1983 use a bang-bang +-10 N; pretrial's continuous
  version scales it), gymnasium's Pendulum-v1 torque Box [-2, 2] (gymnasium documentation).
"""

from __future__ import annotations

import ast
import importlib.util
import json
import re
import shutil
import subprocess
import sys
from pathlib import Path

import neat
import numpy as np
import pytest
from helpers import library_outputs, make_config, random_genome
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pretrial.cli.main import main
from pretrial.console import CAUTIONS
from pretrial.controller.network import ACTIVATIONS, AGGREGATIONS
from pretrial.controller.policy import IOMap, policy_from_genome, save_policy
from pretrial.export.exporter import export_policy, step_cost
from pretrial.export.golden import FAULT_VALUES, golden_actions, golden_steps, read_golden, write_golden
from pretrial.export.program import build_program
from pretrial.export.python_code import PythonSyntax
from pretrial.export.python_code import render as render_python
from pretrial.sim.plant import make_plant

CC = shutil.which("cc") or shutil.which("gcc")
needs_cc = pytest.mark.skipif(CC is None, reason="no C compiler (cc or gcc) on PATH: the C export cannot be built")
#: the contract's warning flags; the exports must also pass -Wextra -Werror
FLAGS = ["-std=c99", "-pedantic-errors", "-Wall", "-Wextra", "-Werror"]
# Float rounding (6e-8 relative) stays within 1e-5 only where the network's slope stays moderate. Left
# out of the float checks: exp, square, cube (slope grows without bound), inv and log (slope 1/z near 0
# resp. 1e-7) and sin (sin(5z): slope 5 and periodic, so recurrent loops of it are chaotic and amplify any
# rounding step by step). The rest are at most 2.5-Lipschitz (tanh(2.5 z)) and saturating or piecewise linear.
BOUNDED = "sigmoid tanh gauss relu elu lelu selu softplus identity clamped abs hat"

GANTRY = "pretrial/GantryCrane-v0"  # with hoist: 6 observations, 2 actions
DRONES = "pretrial/DronePair-v0"  # 2 shared blocks of 12 observations, 2 actions


@pytest.fixture(scope="module")
def cfgs(tmp_path_factory):
    """neat-python configs by (feed_forward, inputs, outputs, activation set)."""
    d = tmp_path_factory.mktemp("neat")
    cache: dict[tuple, neat.Config] = {}

    def get(ff: bool, n_in: int, n_out: int, activations: str = " ".join(ACTIVATIONS)) -> neat.Config:
        key = (ff, n_in, n_out, activations)
        if key not in cache:
            cache[key] = make_config(d / f"c{len(cache)}.ini", ff, num_inputs=n_in, num_outputs=n_out,
                                     activations=activations)
        return cache[key]

    return get


def _policy(cfg, seed: int, env_id: str = GANTRY, blocks: int = 1, **env):
    """A random genome (neat-python's own mutations) as a policy with the env's input scaling."""
    plant = make_plant(env_id, **env)
    gc = cfg.genome_config
    scale = [1.0 / s for s in plant.obs_scale]
    rng = np.random.default_rng(seed)
    # non-trivial offsets and an affine action map exercise every term of the IOMap
    io = IOMap(gc.num_inputs, gc.num_outputs, blocks, obs_offset=rng.normal(0, 0.1, plant.obs_dim).tolist(),
               obs_scale=scale, action_scale=[1.5] * plant.action_dim, action_offset=[-0.25] * plant.action_dim)
    return policy_from_genome(random_genome(cfg, seed, 40), cfg, env_id=env_id, env_options=env, io=io)


def _compile(out: Path, prefix: str = "pretrial_policy") -> Path:
    exe = out / f"{prefix}_check"
    r = subprocess.run([CC, *FLAGS, "-O2", "-o", str(exe), str(out / f"{prefix}_check.c"), str(out / f"{prefix}.c"),
                        "-lm"], capture_output=True, text=True)
    assert r.returncode == 0 and not r.stderr, r.stderr  # clean: no warning at all
    return exe


def _check(exe: Path, golden: Path, *tolerance: str) -> tuple[int, float, str]:
    r = subprocess.run([str(exe), str(golden), *tolerance], capture_output=True, text=True)
    m = re.search(r"largest absolute difference (\S+)", r.stdout)
    return r.returncode, float(m.group(1)) if m else float("nan"), r.stdout + r.stderr


def _import(path: Path):
    spec = importlib.util.spec_from_file_location(f"exported_{abs(hash(str(path)))}", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def _python_worst(module, prefix: str, golden: Path) -> float:
    """Replay the golden file through the Python export, independently of its own check_golden."""
    g = read_golden(golden)
    step, reset = getattr(module, f"{prefix}_step"), getattr(module, f"{prefix}_reset")
    state, worst = module.new_state(), 0.0
    for obs, want, codes in zip(g.observations, g.actions, g.codes, strict=True):
        reset(state)
        got = np.zeros_like(want)
        assert [step(state, row.tolist(), action) for row, action in zip(obs, got)] == codes.tolist()
        assert np.array_equal(np.isnan(got), np.isnan(want))
        worst = max(worst, float(np.nanmax(np.abs(got - want), initial=0.0)))
    return worst


def _c_worst(policy, out: Path, precision: str = "double", **golden) -> float:
    export_policy(policy, "c", out, precision, **golden)
    code, worst, text = _check(_compile(out), out / "pretrial_policy_golden.txt")
    tol = 1e-12 if precision == "double" else 1e-5
    assert code == 0 and worst <= tol, text
    return worst


# --------------------------------------------------------------------------- #
# exactness
# --------------------------------------------------------------------------- #
@needs_cc
@pytest.mark.parametrize("feed_forward", [True, False], ids=["feed_forward", "recurrent"])
def test_c_and_python_double_match_the_policy(tmp_path, cfgs, feed_forward):
    # every activation and aggregation enabled in neat-python's mutations; 1000 sequences per policy
    cfg = cfgs(feed_forward, 6, 2)
    for seed in range(4):
        policy = _policy(cfg, seed, hoist=True)
        _c_worst(policy, tmp_path / f"c{seed}", sequences=1000, steps=8)
        files = export_policy(policy, "python", tmp_path / f"py{seed}", sequences=1000, steps=8)
        assert _python_worst(_import(files[0]), "pretrial_policy", files[-1]) <= 1e-12


@needs_cc
@pytest.mark.parametrize("feed_forward", [True, False], ids=["feed_forward", "recurrent"])
def test_c_float_matches_the_policy(tmp_path, cfgs, feed_forward):
    cfg = cfgs(feed_forward, 6, 2, BOUNDED)  # see BOUNDED for the activations left out and why
    for seed in range(4):
        _c_worst(_policy(cfg, seed, hoist=True), tmp_path / f"f{seed}", "float", sequences=1000, steps=8)


@needs_cc
@pytest.mark.parametrize("precision", ["double", "float"])
def test_shared_blocks_each_with_its_own_state(tmp_path, cfgs, precision):
    # DronePair: one recurrent network flies both drones, each block with its own state
    cfg = cfgs(False, 12, 2, "tanh sigmoid relu identity clamped")
    for seed in (3, 5):
        policy = _policy(cfg, seed, DRONES, blocks=2)
        assert policy.io.layout == "shared_blocks" and policy.network.spec.num_inputs == 12
        out = tmp_path / f"{precision}{seed}"
        _c_worst(policy, out, precision, sequences=1000, steps=5)
        header = (out / "pretrial_policy.h").read_text()
        assert "#define PRETRIAL_POLICY_INPUTS 24 " in header and "#define PRETRIAL_POLICY_OUTPUTS 4 " in header
        n = len(policy.network.spec.node_keys)
        assert f"node[2][{n}];" in header


def _probe_genome(cfg, outputs: list[tuple[str, str, list[float]]]) -> neat.DefaultGenome:
    """Output j = activation_j(aggregation_j(w * x_i for its weights)), bias 0, response 1 (bias 0.3 if no inputs)."""
    g = neat.DefaultGenome(0)
    innovation = 0
    for j, (act, agg, weights) in enumerate(outputs):
        node = neat.genes.DefaultNodeGene(j)
        node.bias, node.response = (0.0 if weights else 0.3), 1.0
        node.activation, node.aggregation, node.time_constant = act, agg, 1.0
        g.nodes[j] = node
        for i, w in enumerate(weights):
            innovation += 1
            cg = neat.genes.DefaultConnectionGene((-1 - i, j), innovation=innovation)
            cg.weight, cg.enabled = w, True
            g.connections[cg.key] = cg
    return g


#: inputs around every clamp and branch point of neat.activations, plus signed zeros, infinities and NaN
_EDGES = [-1e200, -200.0, -80.0, -60.5, -12.5, -12.0, -3.5, -3.4, -1.0, -1e-7, -0.0, 0.0, 1e-8, 1e-7, 0.3, 1.0,
          3.4, 3.5, 12.0, 12.5, 60.0, 60.5, 80.0, 200.0, 1e200, np.inf, -np.inf, np.nan]


@needs_cc
@pytest.mark.parametrize("feed_forward", [True, False], ids=["feed_forward", "recurrent"])
@pytest.mark.parametrize("spread", ["narrow", "wide"])
def test_every_activation_and_aggregation_at_its_edges(tmp_path, cfgs, feed_forward, spread):
    outputs = [(a, "sum", [1.0]) for a in ACTIVATIONS]
    outputs += [("identity", g, [1.0, -0.5, 2.0, 0.25]) for g in AGGREGATIONS]
    outputs += [("identity", "median", [1.0, -0.5, 2.0]), ("identity", "median", [1.0, -0.5]),
                ("identity", "median", [1.0]), ("identity", "max", [1.0, 1.0]), ("tanh", "sum", [])]
    cfg = cfgs(feed_forward, 4, len(outputs))
    genome = _probe_genome(cfg, outputs)
    rng = np.random.default_rng(7)
    grid = np.array(_EDGES) if spread == "wide" else np.linspace(-3.6, 3.6, 37)
    q, t = 12, len(grid)
    obs = rng.normal(0.0, 1.5 if spread == "narrow" else 30.0, (q, t, 4))
    obs[:, :, 0] = [rng.permutation(grid) for _ in range(q)]
    if spread == "wide":
        obs[rng.random((q, t, 4)) < 0.05] = np.nan  # NaN anywhere, also among aggregated inputs
    # action scale 0.5 / (largest finite |raw output|): no action clips, and a missing clamp shows as > 0.5
    plain = policy_from_genome(genome, cfg, env_id="probe/Activations-v0")
    raw = np.array([plain.network.activate(step) for step in obs.transpose(1, 0, 2)])
    finite = np.where(np.isfinite(raw), np.abs(raw), 0.0).max(axis=(0, 1))
    scale = (0.5 / np.where(finite > 0, finite, 1.0)).tolist()
    policy = policy_from_genome(genome, cfg, env_id="probe/Activations-v0",
                                io=IOMap(4, len(outputs), action_scale=scale))
    spec = policy.network.spec
    assert {ACTIVATIONS[c] for c in spec.activation} == set(ACTIVATIONS)
    assert {AGGREGATIONS[c] for c in spec.aggregation} == set(AGGREGATIONS)

    out = tmp_path / "probe"
    files = export_policy(policy, "c", out, sequences=1, steps=1)
    golden = out / "pretrial_policy_golden.txt"
    write_golden(golden, obs, *golden_steps(policy, obs), ["probe"])  # our own edge-case observations
    code, worst, text = _check(_compile(out), golden)
    assert code == 0 and worst <= 1e-12, text
    files = export_policy(policy, "python", out / "py", sequences=1, steps=1)
    assert _python_worst(_import(files[0]), "pretrial_policy", golden) <= 1e-12
    assert "could not be built here" in (out / "pretrial_policy.h").read_text()  # an env unknown here is said


def test_golden_actions_are_neat_pythons(tmp_path, cfgs):
    # the file the exports are checked against holds neat-python's own outputs (through the documented map)
    for ff in (True, False):
        cfg = cfgs(ff, 6, 2)
        for seed in range(3):
            policy = _policy(cfg, 10 + seed, hoist=True)
            files = export_policy(policy, "python", tmp_path / f"{ff}{seed}", sequences=6, steps=7, seed=seed)
            g = read_golden(files[-1])
            assert not np.any(g.codes[:6]) and len(g.codes) == 6 + len(FAULT_VALUES)  # 6 finite, then faults
            obs = np.stack(g.observations[:6], axis=1)  # (steps, sequences, obs)
            io = policy.io
            net_in = (obs - np.array(io.obs_offset)) * np.array(io.obs_scale)
            raw = library_outputs(random_genome(cfg, 10 + seed, 40), cfg, net_in)
            expected = np.clip(raw * np.array(io.action_scale) + np.array(io.action_offset), -1.0, 1.0)
            np.testing.assert_allclose(np.stack(g.actions[:6], axis=1), expected, rtol=1e-12, atol=1e-12)


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow,
                                                                  HealthCheck.function_scoped_fixture])
@given(seed=st.integers(0, 2**31 - 1), feed_forward=st.booleans())
def test_python_export_matches_the_policy_on_random_genomes(cfgs, seed, feed_forward):
    cfg = cfgs(feed_forward, 6, 2)
    policy = _policy(cfg, seed, hoist=True)
    text = render_python(build_program(policy, PythonSyntax()), "probe", ["facts"], 1e-12)["probe.py"]
    module: dict = {}
    exec(compile(text, "probe.py", "exec"), module)  # our own generated module
    obs = np.random.default_rng(seed).normal(0.0, 2.0, (6, 5, 6))
    want = np.array([golden_actions(policy, obs[q : q + 1])[0] for q in range(len(obs))])
    for q in range(len(obs)):
        state = module["new_state"]()
        module["probe_reset"](state)
        got = np.array([module["probe_step"](state, row.tolist()) for row in obs[q]])
        np.testing.assert_allclose(got, want[q], rtol=0, atol=1e-12)


# --------------------------------------------------------------------------- #
# the files and their contract
# --------------------------------------------------------------------------- #
def _tiny_policy(cfgs, feed_forward: bool):
    """CartPole, 4 inputs: one tanh output node summing x0 and x1 (response 1.5, bias 0.2)."""
    cfg = cfgs(feed_forward, 4, 1)
    g = _probe_genome(cfg, [("tanh", "sum", [0.7, -1.1])])
    g.nodes[0].response, g.nodes[0].bias = 1.5, 0.2
    io = IOMap(4, 1, obs_scale=[0.5, 2.0, 4.0, 1.0], action_scale=[2.0], action_offset=[-1.0])
    return policy_from_genome(g, cfg, env_id="pretrial/CartPole-v0", env_options={"poles": 1},
                              env_params={"max_force": 7.5}, io=io)


def test_operation_count_and_memory_worked_example(cfgs):
    # Counted by hand from the formulas: inputs (obs - 0) * scale for the 3 scales != 1: 3 multiplies.
    # Node: 2 weight products + 1 add, * response, + bias (1 multiply, 1 add), tanh(fmin(2.5 z, 60)):
    # 1 multiply, 1 comparison, 1 math call. Output: * 2, + (-1), clip: 1 multiply, 1 add, 2 comparisons.
    for ff in (True, False):
        cost = step_cost(_tiny_policy(cfgs, ff))
        ops = cost.operations
        assert (ops["multiplies"], ops["adds"], ops["divisions"]) == (3 + 2 + 1 + 1 + 1, 1 + 1 + 1, 0)
        assert (ops["comparisons"], ops["math_calls"], ops["activations"]) == (1 + 2, 1, 1)
        assert ops["activation_kinds"] == {"tanh": 1}
        # distinct literals: 0.5 2.0 4.0 | 0.7 -1.1 1.5 0.2 2.5 60.0 | 1.0 -1.0 (2.0 again): 11 doubles,
        # plus the safe-action table (1 action): 12
        assert cost.memory_bytes["constants"] == 12 * 8
        assert ops["finite_checks"] == 4 + 1  # the fault guard: each observation, each network output
        assert cost.memory_bytes["state"] == (1 if ff else 8)  # placeholder / one node value
    assert step_cost(_tiny_policy(cfgs, True), precision="float").memory_bytes["constants"] == 12 * 4


@needs_cc
@pytest.mark.parametrize("feed_forward", [True, False], ids=["feed_forward", "recurrent"])
def test_state_size_is_the_compilers_sizeof(tmp_path, cfgs, feed_forward):
    policy = _policy(cfgs(feed_forward, 12, 2), 3, DRONES, blocks=2)
    out = tmp_path / "e"
    export_policy(policy, "c", out, sequences=1, steps=1)
    (out / "size.c").write_text('#include <stdio.h>\n#include "pretrial_policy.h"\n'
                                'int main(void) { printf("%lu\\n", (unsigned long)sizeof(pretrial_policy_state));'
                                ' return 0; }\n')
    subprocess.run([CC, *FLAGS, "-o", str(out / "size"), str(out / "size.c")], check=True)
    size = int(subprocess.run([str(out / "size")], capture_output=True, text=True, check=True).stdout)
    assert size == step_cost(policy).memory_bytes["state"]


@needs_cc
def test_header_states_what_the_numbers_mean(tmp_path, cfgs):
    policy = _tiny_policy(cfgs, False)
    out = tmp_path / "e"
    files = export_policy(policy, "c", out)
    assert [f.name for f in files] == ["pretrial_policy.h", "pretrial_policy.c", "pretrial_policy_check.c",
                                       "pretrial_policy_golden.txt"]
    header = files[0].read_text()
    top = header[: header.index("*/")]
    assert "pretrial/CartPole-v0" in top and policy.content_hash in top and '"poles": 1' in top
    # observation order with names and units, as the env lists them
    rows = re.findall(r"^ \*\s+(\d)\s+(\S+)\s+(\S+)\s+0\s", top.split("Action action[")[0], re.M)
    assert rows == [("0", "x", "m"), ("1", "x_dot", "m/s"), ("2", "theta", "rad"), ("3", "theta_dot", "rad/s")]
    # cart-pole force = action * max_force, with the max_force it was trained with
    assert re.search(r"0\s+force\s+N\s+2\s+-1\s+-7\.5 / 0 / 7\.5 N \(linear\)", top)
    assert re.search(r"max_force\s+7\.5\s+N\s+\*", top)
    cost = step_cost(policy)
    assert f"{cost.operations['multiplies']} multiplies" in " ".join(top.split())
    assert f"{cost.memory_bytes['constants']} bytes of constants" in " ".join(top.split())
    assert "not certified" in top and "restrained" in top
    assert "dt = 0.02 s" in top
    # the contract's declarations
    assert re.search(r"^#define PRETRIAL_POLICY_INPUTS 4\b", header, re.M)
    assert re.search(r"^#define PRETRIAL_POLICY_OUTPUTS 1\b", header, re.M)
    assert "void pretrial_policy_reset(pretrial_policy_state *s);" in header
    assert "int pretrial_policy_step(pretrial_policy_state *s, const double *obs, double *action);" in header
    source = files[1].read_text()
    assert re.findall(r"#include\s*(\S+)", source) == ["<math.h>", '"pretrial_policy.h"']
    assert re.findall(r"#include\s*(\S+)", files[2].read_text()) == ["<math.h>", "<stdio.h>", "<stdlib.h>",
                                                                     '"pretrial_policy.h"']
    assert not re.search(r"\b(malloc|calloc|realloc|free)\b", source)
    _compile(out)
    # the gantry's hoist channel: speed = action * max_hoist_speed (m/s)
    gantry = _policy(cfgs(True, 6, 2), 1, hoist=True)
    export_policy(gantry, "c", tmp_path / "g", sequences=1, steps=1)
    v = make_plant(GANTRY, hoist=True).param_table["max_hoist_speed"].nominal
    assert re.search(rf"hoist_speed\s+m/s\s+1\.5\s+-0\.25\s+{-v:g} / 0 / {v:g} m/s \(linear\)",
                     (tmp_path / "g" / "pretrial_policy.h").read_text())


def test_plain_gymnasium_env_uses_its_box(tmp_path, cfgs):
    # gymnasium's Pendulum-v1: 3 observations, torque in the Box [-2, 2] (gymnasium documentation)
    cfg = cfgs(True, 3, 1)
    policy = policy_from_genome(random_genome(cfg, 1, 10), cfg, env_id="Pendulum-v1")
    files = export_policy(policy, "python", tmp_path, sequences=1, steps=1)
    doc = ast.get_docstring(ast.parse(files[0].read_text()))
    assert re.search(r"0\s+action0\s+-\s+1\s+0\s+-2 / 0 / 2 \(linear\)", doc)
    assert re.search(r"2\s+obs2\s+-\s", doc) and "Pendulum-v1" in doc


def test_python_module_imports_math_only(tmp_path, cfgs):
    files = export_policy(_policy(cfgs(False, 6, 2), 2, hoist=True), "python", tmp_path, sequences=2, steps=3)
    tree = ast.parse(files[0].read_text())
    top = [n for n in tree.body if isinstance(n, (ast.Import, ast.ImportFrom))]
    assert [a.name for n in top for a in n.names] == ["math"]
    module = _import(files[0])
    assert (module.INPUTS, module.OUTPUTS) == (6, 2)
    worst, rows = module.check_golden(str(files[-1]))
    assert worst <= 1e-12 and rows == 6 + 3 * (2 * 6 + 3)  # 2 x 3 finite steps, 3 fault sequences of 2 n + 3
    with pytest.raises(ValueError, match="expected 6 observation values"):
        module.pretrial_policy_step(module.new_state(), [0.0] * 5)
    r = subprocess.run([sys.executable, files[0].name, files[-1].name], cwd=tmp_path, capture_output=True, text=True)
    assert r.returncode == 0 and "largest absolute difference" in r.stdout


@needs_cc
def test_check_programs_fail_on_a_damaged_golden_file(tmp_path, cfgs):
    out = tmp_path / "e"
    export_policy(_tiny_policy(cfgs, False), "c", out, sequences=3, steps=4)
    export_policy(_tiny_policy(cfgs, False), "python", out / "py", sequences=3, steps=4)
    exe = _compile(out)
    golden = out / "pretrial_policy_golden.txt"
    assert _check(exe, golden)[0] == 0
    lines = golden.read_text().splitlines()
    row = next(i for i, line in enumerate(lines) if line.count(" ") == 5 and not line.startswith("#"))
    values = lines[row].split()  # 4 observations, 1 action, the fault code
    values[-2] = repr(float(values[-2]) + 1e-9)  # one action off by 1e-9
    bad = out / "bad.txt"
    bad.write_text("\n".join([*lines[:row], " ".join(values), *lines[row + 1 :]]) + "\n")
    code, worst, text = _check(exe, bad)
    assert code == 1 and "FAILED" in text and 0.9e-9 < worst < 1.1e-9
    assert _check(exe, bad, "1e-8")[0] == 0  # the tolerance is the command line's
    assert _check(exe, bad, "lots")[0] == 2
    r = subprocess.run([sys.executable, "pretrial_policy.py", str(bad)], cwd=out / "py", capture_output=True)
    assert r.returncode == 1
    truncated = out / "truncated.txt"
    truncated.write_text("\n".join(lines[: row + 2]) + "\n")
    code, _, text = _check(exe, truncated)
    assert code == 2 and "truncated or damaged" in text
    assert _check(exe, out / "missing.txt")[0] == 2


@needs_cc
def test_prefix_renames_everything(tmp_path, cfgs):
    policy = _policy(cfgs(False, 6, 2, BOUNDED), 4, hoist=True)
    out = tmp_path / "e"
    files = export_policy(policy, "c", out, "float", "crane_ctl", sequences=200, steps=5)
    assert [f.name for f in files] == ["crane_ctl.h", "crane_ctl.c", "crane_ctl_check.c", "crane_ctl_golden.txt"]
    code = "".join(f.read_text() for f in files[:3])
    assert "pretrial_policy" not in code and "PRETRIAL_POLICY" not in code
    header = files[0].read_text()
    for decl in ("#define CRANE_CTL_INPUTS 6", "#define CRANE_CTL_OUTPUTS 2", "} crane_ctl_state;",
                 "void crane_ctl_reset(crane_ctl_state *s);",
                 "int crane_ctl_step(crane_ctl_state *s, const float *obs, float *action);"):
        assert decl in header
    rc, worst, text = _check(_compile(out, "crane_ctl"), files[-1])
    assert rc == 0 and worst <= 1e-5, text
    py = export_policy(policy, "python", out / "py", prefix="crane_ctl", sequences=2, steps=2)
    assert py[0].name == "crane_ctl.py" and hasattr(_import(py[0]), "crane_ctl_step")


# --------------------------------------------------------------------------- #
# command line
# --------------------------------------------------------------------------- #
@pytest.fixture()
def policy_file(tmp_path, cfgs):
    path = tmp_path / "run" / "champion.json"
    path.parent.mkdir()
    save_policy(path, _tiny_policy(cfgs, True))
    return path


def test_cli_text_and_json(tmp_path, policy_file, capsys):
    assert main(["export", str(policy_file), "--to", "c", "--out", str(tmp_path / "c")]) == 0
    out = capsys.readouterr().out
    assert "pretrial_policy.h" in out and "pretrial_policy_golden.txt" in out
    assert "cc -std=c99" in out and "./pretrial_policy_check pretrial_policy_golden.txt" in out
    assert "multiplies" in out and "bytes of constants" in out and CAUTIONS[0] in out
    # a run directory works as well as its champion file
    assert main(["export", str(policy_file.parent), "--to", "python", "--out", str(tmp_path / "p"), "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert set(data) == {"files", "operations", "memory_bytes", "content_sha256", "safe_action", "cautions"}
    assert data["safe_action"] == [0.0]  # cart-pole: zero force
    assert [Path(f).name for f in data["files"]] == ["pretrial_policy.py", "pretrial_policy_golden.txt"]
    assert data["cautions"] == list(CAUTIONS) and data["operations"]["activations"] == 1
    assert data["memory_bytes"]["state"] == 1


@pytest.mark.parametrize("args, words", [
    (["--prefix", "9lives"], ["--prefix", "'9lives'"]),
    (["--prefix", "bad-name"], ["--prefix", "'bad-name'"]),
    (["--prefix", "int"], ["--prefix", "'int'"]),
    (["--to", "python", "--precision", "float"], ["--precision", "float"]),
])
def test_cli_refuses_bad_options(tmp_path, policy_file, capsys, args, words):
    argv = ["export", str(policy_file), "--out", str(tmp_path / "o"), *([] if "--to" in args else ["--to", "c"]), *args]
    assert main(argv) == 2
    err = capsys.readouterr().err.strip()
    assert "\n" not in err and err.startswith("pretrial: error:") and all(w in err for w in words)
    assert not (tmp_path / "o").exists()  # refused before anything was written


def test_cli_refuses_out_file_and_missing_policy(tmp_path, policy_file, capsys):
    a_file = tmp_path / "taken.txt"
    a_file.write_text("keep me\n")
    assert main(["export", str(policy_file), "--to", "c", "--out", str(a_file)]) == 2
    err = capsys.readouterr().err.strip()
    assert "\n" not in err and "--out" in err and "taken.txt" in err and a_file.read_text() == "keep me\n"
    assert main(["export", str(tmp_path / "nope.json"), "--to", "c", "--out", str(tmp_path / "o")]) == 2
    err = capsys.readouterr().err.strip()
    assert "\n" not in err and "nope.json" in err and "no such file" in err



# --------------------------------------------------------------------------- #
# bad input: NaN / inf observations, non-finite network outputs, the safe action
# --------------------------------------------------------------------------- #
_DRIVER = r"""/* test driver: each line of the input file is 'reset' or one observation; prints code and actions */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include "pretrial_policy.h"

int main(int argc, char **argv)
{
    char word[64];
    pretrial_policy_state s;
    pretrial_policy_real obs[PRETRIAL_POLICY_INPUTS], action[PRETRIAL_POLICY_OUTPUTS];
    int i, code;
    FILE *f = argc > 1 ? fopen(argv[1], "r") : NULL;
    if (f == NULL)
        return 2;
    pretrial_policy_reset(&s);
    while (fscanf(f, "%63s", word) == 1) {
        if (strcmp(word, "reset") == 0) {
            pretrial_policy_reset(&s);
            continue;
        }
        obs[0] = (pretrial_policy_real)strtod(word, NULL);
        for (i = 1; i < PRETRIAL_POLICY_INPUTS; i++) {
            if (fscanf(f, "%63s", word) != 1)
                return 2;
            obs[i] = (pretrial_policy_real)strtod(word, NULL);
        }
        for (i = 0; i < PRETRIAL_POLICY_OUTPUTS; i++)
            action[i] = (pretrial_policy_real)12345.0; /* the step must write every action, fault or not */
        code = pretrial_policy_step(&s, obs, action);
        printf("%d", code);
        for (i = 0; i < PRETRIAL_POLICY_OUTPUTS; i++)
            printf(" %.17g", (double)action[i]);
        printf("\n");
    }
    fclose(f);
    return 0;
}
"""


def _run_c(out: Path, rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Codes (T,) and actions (T, A) of the C export in ``out`` stepping through ``rows`` from a reset."""
    (out / "driver.c").write_text(_DRIVER)
    (out / "rows.txt").write_text("\n".join(" ".join(repr(float(v)) for v in row) for row in rows) + "\n")
    exe = out / "driver"
    r = subprocess.run([CC, *FLAGS, "-O2", "-o", str(exe), str(out / "driver.c"), str(out / "pretrial_policy.c"),
                        "-lm"], capture_output=True, text=True)
    assert r.returncode == 0 and not r.stderr, r.stderr
    lines = subprocess.run([str(exe), str(out / "rows.txt")], capture_output=True, text=True, check=True).stdout
    table = np.array([line.split() for line in lines.splitlines()], dtype=float)
    return table[:, 0].astype(int), table[:, 1:]


def _run_python(module, rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Codes and actions of the Python export (the C-like form), checking the list form agrees."""
    state, twin = module.new_state(), module.new_state()
    codes, actions = [], []
    for row in rows:
        action = [12345.0] * module.OUTPUTS
        codes.append(module.pretrial_policy_step(state, row.tolist(), action))
        assert module.pretrial_policy_step(twin, row.tolist()) == action  # the earlier form: same action
        actions.append(action)
    return np.array(codes), np.array(actions)


def _numpy_reference(policy, rows: np.ndarray, bad: np.ndarray, safe) -> tuple[np.ndarray, np.ndarray]:
    """What the brief asks for, from Policy.act alone: the good rows stepped in order, as if the bad ones never
    happened (state kept), the bad rows the safe action."""
    good = ~bad
    fresh = type(policy).from_dict(policy.to_dict())
    fresh.reset(1)
    actions = np.tile(np.asarray(safe, dtype=float), (len(rows), 1))
    actions[good] = np.array([fresh.act(row[None])[0] for row in rows[good]]).reshape(-1, policy.io.action_dim)
    return bad.astype(int), actions


def _fault_rows(n_obs: int, seed: int) -> np.ndarray:
    """Finite rows, each followed by NaN, +inf or -inf in one element (every element in turn) or in all of them,
    and a last finite row."""
    rng = np.random.default_rng(seed)
    rows = []
    for value in (np.nan, np.inf, -np.inf):
        for i in [*range(n_obs), None]:
            rows.append(rng.normal(0.0, 1.0, n_obs))
            bad = rng.normal(0.0, 1.0, n_obs)
            bad[slice(None) if i is None else i] = value
            rows.append(bad)
    rows.append(rng.normal(0.0, 1.0, n_obs))
    return np.array(rows)


@needs_cc
@pytest.mark.parametrize("feed_forward", [True, False], ids=["feed_forward", "recurrent"])
@pytest.mark.parametrize("precision", ["double", "float"])
def test_nan_and_inf_observations_give_the_safe_action_and_code_1(tmp_path, cfgs, feed_forward, precision):
    # the contract of the brief, checked against pretrial's numpy policy (tied to neat-python above)
    cfg = cfgs(feed_forward, 6, 2, BOUNDED)
    safe = (0.25, -0.5)  # not zero, so a skipped write or a wrong table shows
    tol = 1e-12 if precision == "double" else 1e-5
    for seed in (1, 2):
        policy = _policy(cfg, seed, hoist=True)
        rows = _fault_rows(6, seed)
        if precision == "float":
            rows = rows.astype(np.float32).astype(float)  # the float build sees float observations
        bad = ~np.isfinite(rows).all(axis=1)
        want_codes, want = _numpy_reference(policy, rows, bad, safe)
        out = tmp_path / f"{precision}{seed}"
        export_policy(policy, "c", out, precision, sequences=4, steps=5, safe_action=safe)
        codes, got = _run_c(out, rows)
        assert codes.tolist() == want_codes.tolist() and 0 < want_codes.sum() == bad.sum() < len(rows)
        assert np.array_equal(got[bad], np.tile(safe, (bad.sum(), 1)))  # exactly the safe action
        np.testing.assert_allclose(got[~bad], want[~bad], rtol=0, atol=tol)  # the state was kept
        assert _check(_compile(out), out / "pretrial_policy_golden.txt")[0] == 0  # its own golden file too
        if precision == "double":
            files = export_policy(policy, "python", out / "py", sequences=4, steps=5, safe_action=safe)
            module = _import(files[0])
            assert module.SAFE_ACTION == safe and (module.OK, module.FAULT_OBSERVATION) == (0, 1)
            py_codes, py = _run_python(module, rows)
            assert py_codes.tolist() == codes.tolist() and np.array_equal(py, got)  # C and Python agree


def _overflow_policy(cfgs, feed_forward: bool):
    """Gantry (6 inputs, 2 actions): output 0 = identity(2 x0) overflows for huge x0; output 1 =
    tanh(x0 (+ 0.5 times its own previous value if recurrent)) stays finite, so a state that was not
    restored after the overflow would show in the next step."""
    cfg = cfgs(feed_forward, 6, 2)
    g = _probe_genome(cfg, [("identity", "sum", [2.0]), ("tanh", "sum", [0.3])])
    if not feed_forward:
        loop = neat.genes.DefaultConnectionGene((1, 1), innovation=99)
        loop.weight, loop.enabled = 0.5, True
        g.connections[loop.key] = loop
    return policy_from_genome(g, cfg, env_id=GANTRY, env_options={"hoist": True}, io=IOMap(6, 2))


@needs_cc
@pytest.mark.parametrize("feed_forward", [True, False], ids=["feed_forward", "recurrent"])
@pytest.mark.parametrize("precision", ["double", "float"])
def test_an_overflowing_network_output_gives_the_safe_action_and_code_2(tmp_path, cfgs, feed_forward, precision):
    # IEEE 754 overflow (a finite product beyond the largest double 1.8e308 / float 3.4e38 is inf)
    policy = _overflow_policy(cfgs, feed_forward)
    huge = 1e308 if precision == "double" else 3e38  # finite in the real type; times 2 is not
    rows = np.array([[0.5, 0, 0, 0, 0, 0], [-0.2, 0, 0, 0, 0, 0], [huge, 0, 0, 0, 0, 0], [0.7, 0, 0, 0, 0, 0]])
    out = tmp_path / "e"
    export_policy(policy, "c", out, precision, sequences=2, steps=3)
    codes, got = _run_c(out, rows)
    assert codes.tolist() == [0, 0, 2, 0]
    assert got[2].tolist() == [0.0, 0.0]  # the gantry's safe action: zero force, zero hoist speed
    skip = np.array([False, False, True, False])
    _, want = _numpy_reference(policy, rows, skip, (0.0, 0.0))  # as if the overflow step had not happened
    np.testing.assert_allclose(got[~skip], want[~skip], rtol=0, atol=1e-12 if precision == "double" else 1e-5)
    if not feed_forward:  # the kept state matters: with the overflow step's state the last action would differ
        poisoned = type(policy).from_dict(policy.to_dict())
        poisoned.reset(1)
        last = [poisoned.act(row[None].astype(float))[0] for row in rows][-1]
        assert abs(last[1] - got[3][1]) > 1e-3
    if precision == "double":
        files = export_policy(policy, "python", out / "py", sequences=2, steps=3)
        py_codes, py = _run_python(_import(files[0]), rows)
        assert py_codes.tolist() == codes.tolist() and np.array_equal(py, got)
        # golden_steps (what the golden file holds) agrees with the C code on the same rows
        golden = out / "overflow_golden.txt"
        write_golden(golden, rows[None], *golden_steps(policy, rows[None]), ["overflow"])
        assert read_golden(golden).codes[0].tolist() == [0, 0, 2, 0]
        code, worst, text = _check(_compile(out), golden)
        assert code == 0 and worst <= 1e-12, text
        assert _python_worst(_import(files[0]), "pretrial_policy", golden) <= 1e-12


@needs_cc
def test_check_program_fails_on_a_wrong_fault_code(tmp_path, cfgs):
    out = tmp_path / "e"
    files = export_policy(_tiny_policy(cfgs, False), "c", out, sequences=2, steps=3)
    py = export_policy(_tiny_policy(cfgs, False), "python", out / "py", sequences=2, steps=3)
    lines = files[-1].read_text().splitlines()
    row = next(i for i, line in enumerate(lines) if line.startswith("nan ") and line.endswith(" 1"))
    bad = out / "bad.txt"
    bad.write_text("\n".join([*lines[:row], lines[row][:-1] + "0", *lines[row + 1 :]]) + "\n")  # code 1 -> 0
    code, worst, text = _check(_compile(out), bad)
    assert code == 1 and worst == np.inf and "fault code differs on 1 steps" in text and "FAILED" in text
    r = subprocess.run([sys.executable, py[0].name, str(bad)], cwd=py[0].parent, capture_output=True, text=True)
    assert r.returncode == 1 and "difference inf" in r.stdout


def test_golden_file_covers_nan_and_both_infinities(tmp_path, cfgs):
    policy = _policy(cfgs(False, 12, 2), 3, DRONES, blocks=2)
    files = export_policy(policy, "python", tmp_path, sequences=2, steps=4)
    g = read_golden(files[-1])
    assert len(g.observations) == 2 + 3
    for obs, codes, value in zip(g.observations[2:], g.codes[2:], FAULT_VALUES, strict=True):
        hit = ~np.isfinite(obs)
        assert np.all(np.isnan(obs[hit])) if np.isnan(value) else np.all(obs[hit] == value)
        assert hit.any(axis=0).all()  # every observation element is hit at least once
        assert hit.all(axis=1).any()  # and once all of them
        assert codes.tolist() == hit.any(axis=1).astype(int).tolist()
    safe = np.array(_import(files[0]).SAFE_ACTION)
    for acts, codes in zip(g.actions, g.codes, strict=True):
        assert np.array_equal(acts[codes == 1], np.tile(safe, ((codes == 1).sum(), 1)))


def test_drone_safe_action_is_hover_thrust(tmp_path, cfgs):
    # Statics (Newton's first law): a level drone at rest hovers when its rotors' thrusts sum to its weight m g.
    cfg = cfgs(False, 12, 2)
    io = IOMap(12, 2, 2)
    params = {"mass": 1.1, "max_thrust": 9.5, "gravity": 9.81}
    policy = policy_from_genome(random_genome(cfg, 3, 40), cfg, env_id=DRONES, env_params=params, io=io)
    files = export_policy(policy, "python", tmp_path, sequences=1, steps=2)
    module = _import(files[0])
    safe = np.array(module.SAFE_ACTION)
    plant = make_plant(DRONES)
    values = plant.param_table.resolve(params)
    thrust = plant.actuate(safe[None], values[None])[0]  # the plant's own actuator map, per rotor (N)
    weight = params["mass"] * params["gravity"]
    assert thrust[:2].sum() == pytest.approx(weight, rel=1e-12) and thrust[2:].sum() == pytest.approx(weight, rel=1e-12)
    assert np.allclose(thrust, weight / 2, rtol=1e-12)  # shared equally: no pitch torque
    # and the plant's equations agree: level, at rest, no wind or gust, rotors at that thrust -> no acceleration
    state = plant.target_state(values[None])
    state[:, 12:16] = thrust
    d = plant.derivatives(state, thrust[None], values[None])[0]
    np.testing.assert_allclose(d[[3, 4, 5, 9, 10, 11]], 0.0, atol=1e-12)
    doc = ast.get_docstring(ast.parse(files[0].read_text()))
    assert "DronePairPhysics.safe_action" in doc and "m g / max_thrust - 1" in " ".join(doc.split())
    # a drone too heavy for its rotors cannot hover: the command saturates at full thrust
    assert plant.safe_action(plant.param_table.resolve({"mass": 10.0, "max_thrust": 8.0})).tolist() == [1.0] * 4


@needs_cc
def test_header_states_the_fault_behaviour(tmp_path, cfgs):
    out = tmp_path / "e"
    files = export_policy(_tiny_policy(cfgs, True), "c", out, sequences=1, steps=2)
    header = files[0].read_text()
    top = " ".join(" ".join(line.lstrip(" *") for line in header[: header.index("*/")].splitlines()).split())
    assert "returns 0 (PRETRIAL_POLICY_OK)" in top and "1 (PRETRIAL_POLICY_FAULT_OBSERVATION)" in top
    assert "2 (PRETRIAL_POLICY_FAULT_OUTPUT)" in top and "leaves the recurrent state as it was" in top
    assert "from Physics.safe_action, the default: the zero command" in top
    assert re.search(r"0 force 0 0 N", top)  # the safe action and its physical meaning (zero force)
    assert "not certified" in top and "restrained" in top and "open-loop fallback" in top
    assert "#define PRETRIAL_POLICY_FAULT_OBSERVATION 1 " in header
    assert "extern const double pretrial_policy_safe_action[PRETRIAL_POLICY_OUTPUTS];" in header
    # a caller written for the earlier void step still compiles clean (it ignores the code)
    (out / "old.c").write_text('#include "pretrial_policy.h"\nint main(void) { pretrial_policy_state s; '
                               "double obs[4] = {0}, a[1]; pretrial_policy_reset(&s); "
                               "pretrial_policy_step(&s, obs, a); return a[0] == 0.0 ? 1 : 0; }\n")
    r = subprocess.run([CC, *FLAGS, "-o", str(out / "old"), str(out / "old.c"), str(out / "pretrial_policy.c"),
                        "-lm"], capture_output=True, text=True)
    assert r.returncode == 0 and not r.stderr, r.stderr
    # an env that cannot be built here gives zeros and says so
    probe = policy_from_genome(_probe_genome(cfgs(True, 4, 1), [("tanh", "sum", [1.0])]), cfgs(True, 4, 1),
                               env_id="probe/Nothing-v0")
    files = export_policy(probe, "python", tmp_path / "p", sequences=1, steps=1)
    assert "could not be built here to say what is safe" in " ".join(files[0].read_text().split())


def test_cli_safe_action(tmp_path, policy_file, capsys):
    out = tmp_path / "p"
    assert main(["export", str(policy_file), "--to", "python", "--out", str(out), "--safe-action=-0.5"]) == 0
    assert "given by --safe-action" in capsys.readouterr().out
    assert _import(out / "pretrial_policy.py").SAFE_ACTION == (-0.5,)


@pytest.mark.parametrize("value, words", [
    ("0,0", ["2 values", "1 action "]),
    ("1.5", ["1.5", "outside [-1, 1]"]),
    ("-1.01", ["-1.01", "outside [-1, 1]"]),
    ("nan", ["nan", "outside [-1, 1]"]),
    ("half", ["'half'", "numbers"]),
    ("", ["''", "numbers"]),
])
def test_cli_refuses_bad_safe_action(tmp_path, policy_file, capsys, value, words):
    assert main(["export", str(policy_file), "--to", "c", "--out", str(tmp_path / "o"), f"--safe-action={value}"]) == 2
    err = capsys.readouterr().err.strip()
    assert "\n" not in err and err.startswith("pretrial: error: --safe-action") and all(w in err for w in words), err
    assert not (tmp_path / "o").exists()
