"""Compiled networks against the reference library, neat-python 2.0.

Every expected value here comes from neat-python itself: ``neat.nn.FeedForwardNetwork``,
``neat.nn.RecurrentNetwork``, ``neat.activations`` and ``neat.aggregations``, run on the same
genomes and inputs. Genomes are grown with neat-python's own ``configure_new`` and ``mutate``
with every built-in activation and aggregation enabled.

Two tolerances: with numpy's vectorized exp/tanh/sin/log/power (the shipping kernels) outputs
must agree to 1e-12; with the C library's functions swapped into ``network._KERNELS`` (the
functions neat-python calls through :mod:`math`) they must agree bit for bit, which proves
the order of summation, the clamps and the tie/NaN rules are the library's.
"""

from __future__ import annotations

import math
from contextlib import contextmanager
from unittest import mock

import neat
import numpy as np
import pytest
from helpers import hand_genome, library_outputs, library_outputs_or_skip, make_config, random_genome
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pretrial.controller import network
from pretrial.controller.network import (
    ACTIVATIONS,
    AGGREGATIONS,
    PopulationNetwork,
    compile_genome,
    compile_topology,
    genome_topology,
    spec_from_genome,
    stack_genomes,
)
from pretrial.errors import InputError

TOL = {"rtol": 1e-12, "atol": 1e-12}


# --------------------------------------------------------------------------- #
# neat-python genomes (also used by test_policy_file.py)
# --------------------------------------------------------------------------- #


def compiled_outputs(net, inputs: np.ndarray) -> np.ndarray:
    return np.array([net.activate(step) for step in inputs])


def _vectorized(fn):
    v = np.vectorize(fn, otypes=[float])
    return lambda z: v(z) if np.size(z) else np.array(z, dtype=float)


def _power(p):
    def f(x):
        try:
            return x**p
        except OverflowError:  # the library raises here; the compiled network returns inf
            return math.inf
    return f


@contextmanager
def c_library_kernels():
    """Swap the functions neat-python uses (math.exp, math.tanh, ..., float ** 2 and ** 3) into the network."""
    kernels = {"exp": math.exp, "tanh": math.tanh, "sin": math.sin, "log": math.log, "square": _power(2),
               "cube": _power(3)}
    with mock.patch.dict(network._KERNELS, {k: _vectorized(f) for k, f in kernels.items()}):
        yield


@pytest.fixture(scope="module")
def configs(tmp_path_factory) -> dict[bool, neat.Config]:
    d = tmp_path_factory.mktemp("neat")
    return {ff: make_config(d / f"ff_{ff}.ini", ff) for ff in (True, False)}


def _inputs(seed: int, steps: int, batch: int, n_in: int, magnitude: float) -> np.ndarray:
    return np.random.default_rng(seed).normal(0.0, magnitude, (steps, batch, n_in))


SEEDS = st.integers(0, 2**32 - 1)
SETTINGS = settings(max_examples=100, deadline=None, suppress_health_check=[HealthCheck.too_slow])


# --------------------------------------------------------------------------- #
# one genome vs the library
# --------------------------------------------------------------------------- #
@SETTINGS
@given(seed=SEEDS, mutations=st.integers(0, 40), magnitude=st.sampled_from([0.5, 3.0, 1e3]))
def test_feed_forward_matches_neat_python(configs, seed, mutations, magnitude):
    cfg = configs[True]
    genome = random_genome(cfg, seed, mutations)
    x = _inputs(seed, 1, 6, 3, magnitude)  # 1e3 drives every activation into its clamps
    ref = library_outputs_or_skip(genome, cfg, x)
    np.testing.assert_allclose(compiled_outputs(compile_genome(genome, cfg), x), ref, **TOL)


@SETTINGS
@given(seed=SEEDS, mutations=st.integers(0, 40), magnitude=st.sampled_from([0.5, 3.0, 1e3]))
def test_recurrent_matches_neat_python_over_steps(configs, seed, mutations, magnitude):
    cfg = configs[False]
    genome = random_genome(cfg, seed, mutations)
    x = _inputs(seed, 5, 4, 3, magnitude)
    net = compile_genome(genome, cfg)
    ref = library_outputs_or_skip(genome, cfg, x)
    np.testing.assert_allclose(compiled_outputs(net, x), ref, **TOL)
    # reset clears the state: a replay equals fresh library networks again
    net.reset(4)
    np.testing.assert_allclose(compiled_outputs(net, x), ref, **TOL)


@settings(max_examples=150, deadline=None)
@given(seed=SEEDS, mutations=st.integers(0, 40), feed_forward=st.booleans(),
       magnitude=st.sampled_from([0.5, 3.0, 1e3]))
def test_bit_for_bit_with_the_c_library_functions(configs, seed, mutations, feed_forward, magnitude):
    cfg = configs[feed_forward]
    genome = random_genome(cfg, seed, mutations)
    x = _inputs(seed, 1 if feed_forward else 4, 3, 3, magnitude)
    ref = library_outputs_or_skip(genome, cfg, x)
    with c_library_kernels():
        ours = compiled_outputs(compile_genome(genome, cfg), x)
    np.testing.assert_array_equal(ours, ref)


def _single_node(activation: str, aggregation: str, n_inputs: int, feed_forward: bool = True, bias: float = 0.0,
                 response: float = 1.0):
    """Topology: node 0 gets input pins -1..-n with weight 1.0 (products are then the inputs exactly)."""
    return {"feed_forward": feed_forward, "inputs": [-i - 1 for i in range(max(n_inputs, 1))], "outputs": [0],
            "nodes": [{"key": 0, "bias": bias, "response": response, "activation": activation,
                       "aggregation": aggregation}],
            "connections": [{"in": -i - 1, "out": 0, "weight": 1.0} for i in range(n_inputs)]}


# values around every clamp bound (5 z = 60, 2.5 z = 60, 3.4, 1e-7, +-1), zeros, huge, inf and NaN
EDGE_VALUES = [0.0, -0.0, 1e-9, -1e-9, 1e-7, 0.5, -0.5, 1.0, -1.0, 3.4, -3.4, 3.5, 11.9, 12.0, 12.1, 23.9, 24.0,
               24.1, 59.9, 60.0, 61.0, -61.0, 709.0, 1e10, -1e10, 1e200, -1e200, math.inf, -math.inf, math.nan]


@pytest.mark.parametrize("name", ACTIVATIONS)
def test_each_activation_matches_neat_activations(name):
    fn = neat.activations.ActivationFunctionSet().get(name)
    xs, ref = [], []
    for v in EDGE_VALUES + list(np.random.default_rng(1).normal(0, 5, 200)):
        try:
            ref.append(fn(v))
        except OverflowError:  # neat-python's z ** 2 / z ** 3 of 1e200; see the module's deviations
            continue
        xs.append(v)
    net = compile_topology(_single_node(name, "sum", 1))
    x = np.array(xs)[:, None]
    with c_library_kernels():
        np.testing.assert_array_equal(net.activate(x)[:, 0], np.array(ref))
    # sum([x]) = x, bias 0, response 1: the output is the activation itself
    np.testing.assert_allclose(net.activate(x)[:, 0], np.array(ref), **TOL)


@pytest.mark.parametrize("name", AGGREGATIONS)
@pytest.mark.parametrize("n_inputs", [0, 1, 2, 3, 4, 5, 8])
def test_each_aggregation_matches_neat_aggregations(name, n_inputs):
    fn = neat.aggregations.AggregationFunctionSet().get(name)
    rng = np.random.default_rng(n_inputs)
    # few distinct magnitudes of both signs: ties for max/min/maxabs/median, plus sign-order effects
    x = rng.choice([-2.0, -1.0, -0.5, 0.0, 0.5, 1.0, 2.0, 0.1, 1e16, -1e16], size=(300, max(n_inputs, 1)))
    ref = np.array([0.0 + 1.0 * fn(list(row[:n_inputs])) for row in x.tolist()])  # bias + response * agg
    net = compile_topology(_single_node("identity", name, n_inputs))
    np.testing.assert_array_equal(net.activate(x)[:, 0], ref)


def test_sum_runs_left_to_right_like_python():
    # sum([1.0, 1e16, -1e16]) is 0.0 left to right but 1.0 in numpy's pairwise order
    net = compile_topology(_single_node("identity", "sum", 3))
    x = np.array([[1.0, 1e16, -1e16], [1e16, 1.0, -1e16], [-1e16, 1e16, 1.0]])
    np.testing.assert_array_equal(net.activate(x)[:, 0], [sum(row) for row in x.tolist()])


@pytest.mark.parametrize("feed_forward", [True, False])
def test_structural_corner_cases_match_neat_python(tmp_path, feed_forward):
    cfg = make_config(tmp_path / "c.ini", feed_forward, num_outputs=3)
    nodes = {0: (0.3, 1.5, "tanh", "sum"),    # fed by input, hidden 3 and bias neuron 4
             1: (-0.7, 2.0, "sigmoid", "sum"),  # no connection at all
             2: (0.2, 1.0, "relu", "max"),     # fed only through a disabled connection and dangling node 5
             3: (0.0, 1.0, "sin", "product"),
             4: (1.2, -0.5, "gauss", "mean"),  # bias neuron: no incoming connection
             5: (0.5, 1.0, "exp", "sum"),      # reaches no output
             6: (0.1, 1.0, "identity", "sum")}  # feeds nothing
    conns = [(-1, 3, 0.8, True), (-2, 3, -1.1, True), (3, 0, 0.9, True), (4, 0, -0.6, True), (-1, 0, 0.4, True),
             (-2, 2, 1.3, False), (5, 6, 1.0, True), (-3, 5, 0.7, True)]
    if not feed_forward:
        conns += [(0, 3, 0.5, True), (3, 3, -0.4, True), (5, 2, 0.3, True)]
    g = hand_genome(cfg, nodes, conns)
    x = _inputs(0, 1 if feed_forward else 4, 5, 3, 2.0)
    ref = library_outputs(g, cfg, x)
    with c_library_kernels():
        np.testing.assert_array_equal(compiled_outputs(compile_genome(g, cfg), x), ref)
    if feed_forward:  # output 1 (no connection) is a bias neuron in FeedForwardNetwork: sigmoid(bias)
        assert ref[0, 0, 1] == neat.activations.sigmoid_activation(-0.7)
    else:  # ... and never evaluated in RecurrentNetwork
        assert np.all(ref[:, :, 1] == 0.0)


def test_feed_forward_cycle_is_left_unevaluated_like_the_library(tmp_path):
    # neat-python's mutations never make a cycle in a feed-forward genome, but a hand-built one can:
    # feed_forward_layers never places the cycle, so the output it feeds keeps its initial 0.0
    cfg = make_config(tmp_path / "c.ini", True)
    nodes = {0: (0.1, 1.0, "tanh", "sum"), 1: (0.2, 1.0, "tanh", "sum"), 7: (0.3, 1.0, "tanh", "sum"),
             8: (0.0, 1.0, "sigmoid", "sum")}
    g = hand_genome(cfg, nodes, [(-1, 0, 1.0, True), (-1, 7, 0.5, True), (7, 8, 1.0, True), (8, 7, 1.0, True),
                             (8, 1, 1.0, True)])
    x = _inputs(1, 1, 4, 3, 1.0)
    ref = library_outputs(g, cfg, x)
    assert np.all(ref[..., 1] == 0.0) and np.all(ref[..., 0] != 0.0)
    np.testing.assert_allclose(compiled_outputs(compile_genome(g, cfg), x), ref, **TOL)


def test_genome_topology_compiles_to_the_same_network(configs):
    for ff in (True, False):
        cfg = configs[ff]
        for seed in range(20):
            g = random_genome(cfg, seed)
            x = _inputs(seed, 3, 4, 3, 2.0)
            a = compiled_outputs(compile_genome(g, cfg), x)
            b = compiled_outputs(compile_topology(genome_topology(g, cfg)), x)
            np.testing.assert_array_equal(a, b)


# --------------------------------------------------------------------------- #
# population stacking
# --------------------------------------------------------------------------- #
@settings(max_examples=25, deadline=None)
@given(seed=SEEDS, feed_forward=st.booleans(), size=st.integers(1, 30), batch=st.integers(1, 9))
def test_population_equals_each_genome_alone(configs, seed, feed_forward, size, batch):
    cfg = configs[feed_forward]
    genomes = [random_genome(cfg, seed + i, mutations=(seed + 7 * i) % 40) for i in range(size)]
    pop = stack_genomes(genomes, cfg)
    singles = [compile_genome(g, cfg) for g in genomes]
    rng = np.random.default_rng(seed)
    for _ in range(1 if feed_forward else 4):
        x = rng.normal(0.0, 3.0, (size, batch, 3))
        y = pop.activate(x)
        assert y.shape == (size, batch, 2)
        np.testing.assert_array_equal(y, np.stack([n.activate(x[i]) for i, n in enumerate(singles)]))


def test_mixed_population_flat_rows_and_reset(configs):
    genomes = [(random_genome(configs[ff], s), configs[ff]) for s in range(12) for ff in (True, False)]
    pop = PopulationNetwork([spec_from_genome(g, c) for g, c in genomes])
    x = _inputs(3, 4, 5, 3, 2.0)  # (steps, B, n_in), the same scenarios for every genome
    ref = np.stack([library_outputs(g, c, x) for g, c in genomes], axis=1)  # (steps, G, B, n_out)
    for _ in range(2):
        pop.reset(5)
        for t in range(4):
            flat = np.tile(x[t], (len(genomes), 1))  # (G * B, n_in), genome-major rows
            np.testing.assert_allclose(pop.activate(flat), ref[t], **TOL)


def test_population_refuses_a_batch_change_mid_episode(configs):
    pop = stack_genomes([random_genome(configs[False], s) for s in range(3)], configs[False])
    pop.activate(np.zeros((3, 4, 3)))
    with pytest.raises(ValueError, match="reset"):
        pop.activate(np.zeros((3, 5, 3)))
    pop.reset(5)
    assert pop.activate(np.zeros((3, 5, 3))).shape == (3, 5, 2)
    with pytest.raises(ValueError, match="expected"):
        pop.activate(np.zeros((3, 5, 4)))


def test_custom_activation_is_refused_by_name(configs):
    cfg = configs[True]
    g = random_genome(cfg, 1)
    g.nodes[0].activation = "my_swish"
    with pytest.raises(InputError, match="my_swish"):
        compile_genome(g, cfg)


def test_feed_forward_network_is_stateless_across_batch_sizes(configs):
    cfg = configs[True]
    g = random_genome(cfg, 4)
    net = compile_genome(g, cfg)
    x = _inputs(4, 1, 7, 3, 2.0)[0]
    first = net.activate(x)
    np.testing.assert_array_equal(net.activate(x[:2]), first[:2])
    np.testing.assert_array_equal(net.activate(x), first)
