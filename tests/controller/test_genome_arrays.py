"""The population compiler (all genomes at once) against the per-genome compiler.

The reference is neat-python 2.0 through the per-genome path, which ``test_network.py``
checks against ``neat.nn.FeedForwardNetwork`` bit for bit; here the two paths must give
the same arrays, value for value, and hand the genomes they cannot take to the per-genome
path (which names the problem).
"""

from __future__ import annotations

import numpy as np
import pytest
from helpers import hand_genome, library_outputs, make_config, random_genome
from hypothesis import given, settings
from hypothesis import strategies as st

from pretrial.controller import network
from pretrial.controller.genome_arrays import population_arrays
from pretrial.controller.network import stack_genomes
from pretrial.errors import InputError


@pytest.fixture(scope="module")
def config(tmp_path_factory):
    return make_config(tmp_path_factory.mktemp("neat") / "ff.ini", True)


def per_genome(genomes, config) -> network.NetworkStack:
    gc = config.genome_config
    ins, outs = list(gc.input_keys), list(gc.output_keys)
    parts = [network._spec_lists(True, ins, outs, *network._genome_parts(g, gc)[1:]) for g in genomes]
    return network.NetworkStack.of_lists(True, ins, outs, parts)


def at_once(genomes, config):
    gc = config.genome_config
    return population_arrays(genomes, gc.input_keys, gc.output_keys, network._ACT_CODE, network._AGG_CODE)


@settings(max_examples=40, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), size=st.integers(1, 40))
def test_the_same_arrays_as_genome_by_genome(config, seed, size):
    # neat-python's own mutations with every built-in activation and aggregation enabled (helpers.config_text)
    genomes = [random_genome(config, seed + i, mutations=(seed + 11 * i) % 60) for i in range(size)]
    found = at_once(genomes, config)
    assert found is not None
    node_counts, edge_counts, arrays = found
    ref = per_genome(genomes, config)
    np.testing.assert_array_equal(node_counts, ref.node_counts)
    np.testing.assert_array_equal(edge_counts, ref.edge_counts)
    assert arrays.keys() == ref.arrays.keys()
    for name, values in ref.arrays.items():
        assert arrays[name].dtype == values.dtype, name
        np.testing.assert_array_equal(arrays[name], values, err_msg=name)


def test_a_cycle_goes_to_the_per_genome_path(config):
    # a hand-built feed-forward genome with a cycle (7 <-> 8): the library leaves the cycle unevaluated
    nodes = {0: (0.1, 1.0, "tanh", "sum"), 1: (0.2, 1.0, "tanh", "sum"), 7: (0.3, 1.0, "tanh", "sum"),
             8: (0.0, 1.0, "sigmoid", "sum")}
    cyclic = hand_genome(config, nodes, [(-1, 0, 1.0, True), (-1, 7, 0.5, True), (7, 8, 1.0, True),
                                     (8, 7, 1.0, True), (8, 1, 1.0, True)])
    plain = random_genome(config, 3)
    assert at_once([plain, cyclic], config) is None
    x = np.random.default_rng(0).normal(0.0, 1.0, (1, 4, 3))
    y = stack_genomes([plain, cyclic], config).activate(np.stack([x[0], x[0]]))
    np.testing.assert_allclose(y[1], library_outputs(cyclic, config, x)[0], rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("spoil", ["activation", "dangling", "pin_node"])
def test_a_faulty_genome_is_named_by_the_per_genome_path(config, spoil):
    genomes = [random_genome(config, s) for s in range(5)]
    bad = genomes[2]
    if spoil == "activation":
        bad.nodes[0].activation = "my_swish"
        message = "my_swish"
    elif spoil == "dangling":
        conn = next(iter(bad.connections.values()))
        conn.key = (conn.key[0], 99)
        conn.enabled = True
        message = "99"
    else:
        bad.nodes[-1] = bad.nodes[0]
        message = "both input pins and nodes"
    assert at_once(genomes, config) is None
    with pytest.raises(InputError, match=message):
        stack_genomes(genomes, config)
