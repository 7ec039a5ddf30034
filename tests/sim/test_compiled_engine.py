"""The compiled engine against the numpy engine (``run_episodes``), the reference.

The engine repeats the cart-pole core's operations in the same order; its networks use the C
library's ``tanh``/``exp`` as neat-python does. So with the numpy networks' kernels swapped for
the C library's (as tests/controller/test_network.py does to prove them against neat-python)
and a plant without a ``tanh`` (no cart friction), every outcome must be equal bit for bit;
with the shipping numpy kernels, or cart friction, equal to rounding.
"""

from __future__ import annotations

import math
from contextlib import contextmanager
from unittest import mock

import numpy as np
import pytest
from helpers import make_config, random_genome

from pretrial.controller import network
from pretrial.controller.network import NetworkStack, PopulationNetwork
from pretrial.controller.policy import IOMap, PopulationPolicy
from pretrial.sim.compiled import run_compiled, unsupported
from pretrial.sim.plant import make_plant
from pretrial.sim.quality import QualityLimits
from pretrial.sim.rollout import draw_scenarios, run_episodes
from pretrial_envs.cartpole import CartPolePhysics

pytest.importorskip("numba")

FIELDS = ("returns", "success", "failure", "steps")
FRICTIONLESS = {"cart_friction": 0.0}


def power(p: float):
    def f(z: float) -> float:
        try:
            return z**p  # the C library's pow, as neat-python's z ** 2 and z ** 3
        except OverflowError:  # the library raises; the compiled networks (both) return inf
            return math.copysign(math.inf, z) if p == 3 else math.inf
    return f


@contextmanager
def c_library_networks():
    """numpy networks with neat-python's functions (math.tanh, math.exp, ...) in place of numpy's."""
    def vectorized(fn):
        v = np.vectorize(fn, otypes=[float])
        return lambda z: v(z) if np.size(z) else np.array(z, dtype=float)

    kernels = {"exp": math.exp, "tanh": math.tanh, "sin": math.sin, "log": math.log,
               "square": power(2), "cube": power(3)}
    with mock.patch.dict(network._KERNELS, {k: vectorized(f) for k, f in kernels.items()}):
        yield


@pytest.fixture(scope="module")
def populations(tmp_path_factory):
    """Mutated neat-python populations with every built-in activation and aggregation, by input count."""
    d = tmp_path_factory.mktemp("neat")
    out = {}
    for n_in in (2, 3, 4, 6):
        for ff in (True, False):
            cfg = make_config(d / f"c{n_in}{ff}.ini", ff, num_inputs=n_in, num_outputs=1)
            out[n_in, ff] = cfg, [random_genome(cfg, seed, 25) for seed in range(24)]
    return out


def both(physics, cfg, genomes, io, scenarios, horizon, score=False):
    stack = NetworkStack.of_genomes(genomes, cfg)
    compiled = run_compiled(physics, stack, io, scenarios, horizon, score=score)
    policy = PopulationPolicy(PopulationNetwork.of_stack(stack), io)
    return compiled, run_episodes(physics, policy, scenarios, horizon, score=score)


def io_for(physics):
    return IOMap(physics.obs_dim, 1, obs_scale=[1.0 / s for s in physics.obs_scale])


CASES = [  # (physics options, physics overrides, inputs, horizon)
    ({"integrator": "euler", "dt": 0.02, "substeps": 1}, {**FRICTIONLESS, "gravity": 9.8}, 4, 500),  # gymnasium's
    ({}, FRICTIONLESS, 4, 300),  # RK4, two substeps, pivot friction
    ({"poles": 2}, {"cart_friction_force": 0.0}, 6, 400),
    ({"observe": "positions"}, FRICTIONLESS, 2, 200),
    ({"poles": 2, "observe": "positions", "integrator": "euler", "substeps": 3}, {"cart_friction_force": 0.0}, 3,
     150),
]


@pytest.mark.parametrize("feed_forward", [True, False])
@pytest.mark.parametrize(("options", "params", "n_in", "horizon"), CASES)
def test_equal_bit_for_bit_with_the_c_library(populations, options, params, n_in, horizon, feed_forward):
    physics = CartPolePhysics(**options)
    cfg, genomes = populations[n_in, feed_forward]
    # a spread of starts and physics per scenario, so that rows fail at many different steps
    scenarios = draw_scenarios(physics, 6, 11, base_params=params,
                               ranges={"pole_mass": (0.05, 0.3), "cart_mass": (0.5, 2.0)})
    with c_library_networks():
        compiled, numpy_run = both(physics, cfg, genomes, io_for(physics), scenarios, horizon, score=True)
    for name in (*FIELDS, "score"):
        np.testing.assert_array_equal(getattr(compiled, name), getattr(numpy_run, name), err_msg=name)
    assert compiled.failure_words == numpy_run.failure_words
    assert len(np.unique(compiled.steps)) > 5  # the batch really ended at many steps


def test_friction_and_numpy_kernels_agree_to_rounding(populations):
    """Shipping set-up: numpy's tanh in the networks and in the cart's friction. Outcomes match."""
    physics = CartPolePhysics()
    cfg, genomes = populations[4, True]
    scenarios = draw_scenarios(physics, 8, 5)
    compiled, numpy_run = both(physics, cfg, genomes, io_for(physics), scenarios, 500)
    same = (compiled.steps == numpy_run.steps) & (compiled.failure == numpy_run.failure)
    assert same.mean() >= 0.99
    np.testing.assert_allclose(compiled.returns[same], numpy_run.returns[same], rtol=1e-9)


def test_horizon_and_time_limit(populations):
    """Survivors end at the run's horizon (success) or the plant's own time limit, whichever is first."""
    physics = CartPolePhysics(time_limit=1.0)  # 50 periods
    cfg, genomes = populations[4, True]
    scenarios = draw_scenarios(physics, 4, 2, base_params={"gravity": 0.0, "max_force": 0.0})  # nothing moves
    for horizon, steps in ((30, 30), (80, 50)):
        compiled = run_compiled(physics, NetworkStack.of_genomes(genomes, cfg), io_for(physics), scenarios, horizon)
        assert compiled.success.all() and (compiled.steps == steps).all() and (compiled.failure == 0).all()


def test_what_it_refuses(tmp_path):
    cart = CartPolePhysics()
    assert unsupported(cart) is None
    assert "cart-pole only" in unsupported(make_plant("pretrial/GantryCrane-v0"))
    assert "perturbations (sensor_noise_std)" in unsupported(cart, perturbations={"sensor_noise_std": 1})
    assert "loop quality" in unsupported(cart, quality=QualityLimits())
    assert "2 actions" in unsupported(cart, IOMap(4, 2))
    scenarios = draw_scenarios(cart, 2, 0, ranges={"actuator_gain": (0.9, 1.1)})
    cfg = make_config(tmp_path / "c.ini", True, num_inputs=4, num_outputs=1)
    with pytest.raises(ValueError, match="cannot run this: it runs the nominal loop only"):
        run_compiled(cart, NetworkStack.of_genomes([random_genome(cfg, 1)], cfg), io_for(cart), scenarios)
