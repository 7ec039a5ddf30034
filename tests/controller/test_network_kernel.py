"""The compiled engine's networks against the reference library, neat-python 2.0, bit for bit.

Every expected value comes from neat-python itself (``neat.nn.FeedForwardNetwork`` and
``neat.nn.RecurrentNetwork`` on the same genomes and inputs), with genomes grown by the
library's own ``configure_new`` and ``mutate`` with every built-in activation and aggregation
enabled. The kernels call the C library's functions, as the library does through :mod:`math`,
and sum left to right as CPython 3.11's ``sum``: so outputs must be equal, not close.
"""

from __future__ import annotations

import sys

import numpy as np
import pytest
from helpers import library_outputs_or_skip, make_config, random_genome
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pretrial.controller.network import NetworkStack, PopulationNetwork

pytest.importorskip("numba")
from pretrial.controller.network_kernel import KernelNetworks

SETTINGS = settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow])
# CPython 3.12 sums floats with compensation (neat-python's sum), the kernels left to right as 3.11
EXACT_SUM = sys.version_info < (3, 12)


@pytest.fixture(scope="module")
def configs(tmp_path_factory):
    d = tmp_path_factory.mktemp("neat")
    return {ff: make_config(d / f"ff_{ff}.ini", ff) for ff in (True, False)}


def kernel_outputs(genomes, config, inputs: np.ndarray) -> np.ndarray:
    """Outputs (steps, G, B, n_out) of the kernels for inputs (steps, G, B, n_in), recurrent state carried."""
    nets = KernelNetworks.of_stack(NetworkStack.of_genomes(genomes, config))
    state = np.zeros((inputs.shape[1] * inputs.shape[2], 2 * nets.n_slots))
    return np.array([nets.activate(x, state) for x in inputs])


def assert_same(got: np.ndarray, ref: np.ndarray) -> None:
    if EXACT_SUM:
        np.testing.assert_array_equal(got, ref)  # NaN where NaN, -0.0 == 0.0
    else:
        np.testing.assert_allclose(got, ref, rtol=1e-12, atol=1e-12)


@SETTINGS
@given(seed=st.integers(0, 2**32 - 1), mutations=st.integers(0, 40), magnitude=st.sampled_from([0.5, 3.0, 1e3]),
       feed_forward=st.booleans())
def test_kernel_equals_neat_python(configs, seed, mutations, magnitude, feed_forward):
    cfg = configs[feed_forward]
    genome = random_genome(cfg, seed, mutations)
    steps = 1 if feed_forward else 4  # recurrent: the state carried over calls matters too
    x = np.random.default_rng(seed).normal(0.0, magnitude, (steps, 5, 3))  # 1e3 drives activations into clamps
    ref = library_outputs_or_skip(genome, cfg, x)  # (steps, B, n_out)
    got = kernel_outputs([genome], cfg, x[:, None])[:, 0]
    assert_same(got, ref)


def test_population_mixes_kinds_and_sizes(configs):
    """Networks of different sizes side by side: each evaluates as it would alone (no slot leaks)."""
    cfg = configs[True]
    genomes = [random_genome(cfg, seed, m) for seed, m in zip(range(12), (0, 3, 40, 7, 25, 1, 33, 12, 5, 40, 18, 2),
                                                                strict=True)]
    x = np.random.default_rng(3).normal(0.0, 2.0, (1, len(genomes), 6, 3))
    got = kernel_outputs(genomes, cfg, x)[0]
    for g, genome in enumerate(genomes):
        assert_same(got[g], library_outputs_or_skip(genome, cfg, x[:, g])[0])


def test_numpy_networks_agree_to_rounding(configs):
    """The numpy networks (numpy's own tanh and exp) and the kernels: equal to 1e-12."""
    cfg = configs[True]
    genomes = [random_genome(cfg, seed, 30) for seed in range(20)]
    x = np.random.default_rng(4).normal(0.0, 1.0, (len(genomes), 7, 3))
    numpy_out = PopulationNetwork.of_stack(NetworkStack.of_genomes(genomes, cfg)).activate(x)
    np.testing.assert_allclose(kernel_outputs(genomes, cfg, x[None])[0], numpy_out, rtol=1e-12, atol=1e-12)


def test_activate_checks_the_shape(configs):
    nets = KernelNetworks.of_stack(NetworkStack.of_genomes([random_genome(configs[True], 1, 5)], configs[True]))
    with pytest.raises(ValueError, match=r"expected \(1, B, 3\)"):
        nets.activate(np.zeros((2, 4, 3)))
