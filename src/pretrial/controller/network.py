"""NEAT genomes compiled to batched numpy networks.

A genome is compiled once into arrays (:class:`NetworkSpec`: node order, biases,
responses, activation and aggregation codes, connection sources and weights).
:class:`PopulationNetwork` stacks any number of compiled networks into one value
array and advances all of them, in every scenario, with a few numpy calls per
topological level: one gather of source values, one multiply by the weights,
one in-place add per input position (so every node sums its inputs in the same
order as neat-python), one call per activation kind present. :class:`Network`
is the same machinery for one genome.

Semantics are those of neat-python 2.0, which is the reference:

* ``feed_forward = True``: :class:`neat.nn.FeedForwardNetwork`. Only nodes
  required for the outputs (``neat.graphs.required_for_output`` over the enabled
  connections) are evaluated, level by level as ``neat.graphs.feed_forward_layers``
  orders them. A required node with no incoming connection (a "bias neuron",
  including an output with no connection) outputs ``act(bias + response * agg([]))``.
* ``feed_forward = False``: :class:`neat.nn.RecurrentNetwork`. One synchronous
  update per call: every node computes from the values of the previous call,
  the inputs of the current call are visible at once, and the state persists
  between calls until :meth:`Network.reset`. A node with no enabled incoming
  connection is never evaluated and stays 0.0.
* Activations scale and clamp their input exactly as ``neat.activations`` does
  (e.g. ``tanh(max(-60, min(60, 2.5 z)))``, including the way Python's
  ``min``/``max`` turn NaN into the clamp bound); aggregations follow
  ``neat.aggregations`` (empty input: sum 0, product 1, every other 0.0;
  median is ``neat.math_util.median2``).

Deviations from the library, each for a stated reason:

* numpy's vectorized ``exp``, ``tanh``, ``log`` and ``power`` may differ from
  the C library (which neat-python reaches through :mod:`math`) by an ulp or
  two; vectorizing is the point of this module. Everything else (clamps, order
  of summation, tie and NaN rules of max/min) mirrors the library bit for bit;
  the tests prove it by swapping the C library into :data:`_KERNELS`.
* Where the library raises ``OverflowError`` (``z ** 2`` or ``z ** 3`` of a
  huge value) the compiled network returns ``inf``: a diverging controller
  should show up as such in a rollout, not stop it.
* Recurrent networks skip nodes that cannot influence any output (the library
  evaluates some of them); the outputs are identical.
* Python 3.12+ ``sum()`` adds floats with compensation; the compiled network
  adds left to right as CPython 3.11 does, so on 3.12+ sums of three or more
  terms may differ in the last bits.
* Median of inputs that contain NaN: numpy sorts NaN last, Python's sort is
  order dependent there.

Only neat-python's built-in activation and aggregation functions can be
compiled; a custom function registered with ``add_activation`` is refused with
an :class:`~pretrial.errors.InputError` naming it.

The policy side (:class:`~pretrial.controller.policy.IOMap`, :class:`~pretrial.controller.policy.Policy`,
:class:`~pretrial.controller.policy.PopulationPolicy`, :func:`~pretrial.controller.policy.policy_to_dict`,
:func:`~pretrial.controller.policy.save_policy`, :func:`~pretrial.controller.policy.load_policy`, ...)
lives in :mod:`pretrial.controller.policy` and is reachable from this module too.
"""

from __future__ import annotations

import itertools
import math
import numbers
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from pretrial.controller.genome_arrays import population_arrays
from pretrial.errors import InputError

__all__ = [
    "ACTIVATIONS",
    "AGGREGATIONS",
    "Network",
    "NetworkSpec",
    "NetworkStack",
    "PopulationNetwork",
    "compile_genome",
    "compile_topology",
    "genome_topology",
    "spec_from_genome",
    "spec_from_topology",
    "stack_genomes",
]

# --------------------------------------------------------------------------- #
# activation and aggregation kernels
# --------------------------------------------------------------------------- #
#: Transcendental kernels. Routing them through one table keeps numpy-vs-C-library
#: rounding the only difference from neat-python, and lets the tests swap in the
#: C library to check everything else bit for bit.
_KERNELS: dict[str, Callable[[np.ndarray], np.ndarray]] = {
    "exp": np.exp,
    "tanh": np.tanh,
    "sin": np.sin,
    "log": np.log,
    "square": np.square,  # neat-python: z ** 2
    "cube": lambda z: np.power(z, 3.0),  # neat-python: z ** 3
}

# neat.activations.selu_activation's constants, written as the library writes them
SELU_LAMBDA = 1.0507009873554804934193349852946
_SELU_ALPHA = 1.6732632423543772848170429916717
SELU_LAMBDA_ALPHA = SELU_LAMBDA * _SELU_ALPHA  # the library evaluates lam * alpha first


def _clamp(z: np.ndarray, low: float, high: float) -> np.ndarray:
    # Python's max(low, min(high, z)) keeps the bound when z is NaN, as fmin/fmax do.
    np.fmin(z, high, out=z)
    return np.fmax(z, low, out=z)


def _sigmoid(z: np.ndarray) -> np.ndarray:
    z *= 5.0
    e = _KERNELS["exp"](-_clamp(z, -60.0, 60.0))
    e += 1.0
    return np.divide(1.0, e, out=e)


def _into(name: str, z: np.ndarray, out: np.ndarray | None) -> np.ndarray:
    """Kernel ``name`` of ``z``, written into ``out`` if given (directly when the kernel is a ufunc)."""
    kernel = _KERNELS[name]
    if out is None:
        return kernel(z)
    if isinstance(kernel, np.ufunc):
        return kernel(z, out=out)
    out[...] = kernel(z)
    return out


def _tanh(z: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
    z *= 2.5
    # tanh is exactly -1.0 below -19.1, so only the upper clamp (which also maps NaN to 60) can matter
    np.fmin(z, 60.0, z)
    kernel = _KERNELS["tanh"]
    if out is not None and kernel is np.tanh:  # the common case, spelled out: this runs once per level and step
        return np.tanh(z, out)
    return _into("tanh", z, out)


def _sin(z: np.ndarray) -> np.ndarray:
    z *= 5.0
    return _KERNELS["sin"](_clamp(z, -60.0, 60.0))


def _gauss(z: np.ndarray) -> np.ndarray:
    return _KERNELS["exp"](-5.0 * _KERNELS["square"](_clamp(z, -3.4, 3.4)))


def _relu(z: np.ndarray) -> np.ndarray:
    return np.fmax(z, 0.0, out=z)  # z if z > 0 else 0.0 (NaN -> 0.0)


def _expm1_of_negative(z: np.ndarray) -> np.ndarray:
    # exp(z) - 1 as the library writes it; min(z, 0) only keeps the unused branch from overflowing
    return _KERNELS["exp"](np.minimum(z, 0.0)) - 1.0


def _elu(z: np.ndarray) -> np.ndarray:
    return np.where(z > 0.0, z, _expm1_of_negative(z))


def _lelu(z: np.ndarray) -> np.ndarray:
    return np.where(z > 0.0, z, 0.005 * z)


def _selu(z: np.ndarray) -> np.ndarray:
    return np.where(z > 0.0, SELU_LAMBDA * z, SELU_LAMBDA_ALPHA * _expm1_of_negative(z))


def _softplus(z: np.ndarray) -> np.ndarray:
    z *= 5.0
    e = _KERNELS["exp"](_clamp(z, -60.0, 60.0))
    e += 1.0
    return 0.2 * _KERNELS["log"](e)


def _identity(z: np.ndarray) -> np.ndarray:
    return z


def _clamped(z: np.ndarray) -> np.ndarray:
    return _clamp(z, -1.0, 1.0)


def _inv(z: np.ndarray) -> np.ndarray:
    # the library catches ZeroDivisionError and returns 0.0
    return np.divide(1.0, z, out=np.zeros_like(z), where=z != 0.0)


def _log(z: np.ndarray) -> np.ndarray:
    return _KERNELS["log"](np.fmax(z, 1e-7, out=z))


def _exp(z: np.ndarray) -> np.ndarray:
    return _KERNELS["exp"](_clamp(z, -60.0, 60.0))


def _abs(z: np.ndarray) -> np.ndarray:
    return np.abs(z, out=z)


def _hat(z: np.ndarray) -> np.ndarray:
    h = 1.0 - np.abs(z, out=z)
    return np.fmax(h, 0.0, out=h)


def _square(z: np.ndarray) -> np.ndarray:
    return _KERNELS["square"](z)


def _cube(z: np.ndarray) -> np.ndarray:
    return _KERNELS["cube"](z)


_ACTIVATION_FUNCTIONS: dict[str, Callable[[np.ndarray], np.ndarray]] = {
    "sigmoid": _sigmoid,
    "tanh": _tanh,
    "sin": _sin,
    "gauss": _gauss,
    "relu": _relu,
    "elu": _elu,
    "lelu": _lelu,
    "selu": _selu,
    "softplus": _softplus,
    "identity": _identity,
    "clamped": _clamped,
    "inv": _inv,
    "log": _log,
    "exp": _exp,
    "abs": _abs,
    "hat": _hat,
    "square": _square,
    "cube": _cube,
}
#: neat-python's built-in activation names; a node's activation code indexes this tuple
ACTIVATIONS: tuple[str, ...] = tuple(_ACTIVATION_FUNCTIONS)
#: neat-python's built-in aggregation names; a node's aggregation code indexes this tuple
AGGREGATIONS: tuple[str, ...] = ("sum", "product", "max", "min", "maxabs", "median", "mean")
_ACT_CODE = {name: i for i, name in enumerate(ACTIVATIONS)}
_AGG_CODE = {name: i for i, name in enumerate(AGGREGATIONS)}
_ACT_FN = tuple(_ACTIVATION_FUNCTIONS.values())
#: activations that can write their result into a given array (``fn(z, out)``), saving a copy per level
_WRITES_INTO = frozenset({_tanh})

# A block is the nodes of one level with one aggregation, sorted by fan-in (descending), so that the
# nodes having a k-th input are a prefix of the block. ``slots[k] = (offset, count)``: the products
# of the k-th inputs of the first ``count`` nodes sit at P[offset : offset + count].
_Slots = tuple[tuple[int, int], ...]


def _first_slot(p: np.ndarray, n: int, slots: _Slots, empty: float) -> np.ndarray:
    if not slots:
        return np.full((n, p.shape[1]), empty)
    off, count = slots[0]
    if count == n:
        return p[off : off + n]  # a view: P is this call's scratch
    acc = np.full((n, p.shape[1]), empty)
    acc[:count] = p[off : off + count]
    return acc


def _reduce_sum(p: np.ndarray, n: int, slots: _Slots, extra: Any) -> np.ndarray:
    # left to right, as Python's sum() (its leading int 0 only changes the sign of an all-zero sum,
    # which bias + response * s cannot show)
    acc = _first_slot(p, n, slots, 0.0)
    for off, count in slots[1:]:
        if count == n:
            acc += p[off : off + n]
        else:
            acc[:count] += p[off : off + count]
    return acc


def _reduce_product(p: np.ndarray, n: int, slots: _Slots, extra: Any) -> np.ndarray:
    acc = _first_slot(p, n, slots, 1.0)  # reduce(mul, x, 1.0): 1.0 * x0 == x0 exactly
    for off, count in slots[1:]:
        acc[:count] *= p[off : off + count]
    return acc


def _reduce_max(p: np.ndarray, n: int, slots: _Slots, extra: Any) -> np.ndarray:
    acc = _first_slot(p, n, slots, 0.0)
    for off, count in slots[1:]:
        cur, new = acc[:count], p[off : off + count]
        np.copyto(cur, new, where=new > cur)  # Python's max: replace only if strictly greater
    return acc


def _reduce_min(p: np.ndarray, n: int, slots: _Slots, extra: Any) -> np.ndarray:
    acc = _first_slot(p, n, slots, 0.0)
    for off, count in slots[1:]:
        cur, new = acc[:count], p[off : off + count]
        np.copyto(cur, new, where=new < cur)
    return acc


def _reduce_maxabs(p: np.ndarray, n: int, slots: _Slots, extra: Any) -> np.ndarray:
    acc = _first_slot(p, n, slots, 0.0)
    for off, count in slots[1:]:
        cur, new = acc[:count], p[off : off + count]
        np.copyto(cur, new, where=np.abs(new) > np.abs(cur))  # max(x, key=abs)
    return acc


def _reduce_mean(p: np.ndarray, n: int, slots: _Slots, extra: Any) -> np.ndarray:
    acc = _reduce_sum(p, n, slots, None)
    acc /= extra  # fan-in per node (1 where empty: 0 / 1 is the library's 0.0)
    return acc


def _reduce_median(p: np.ndarray, n: int, slots: _Slots, extra: Any) -> np.ndarray:
    # neat.math_util.median2: mean of <= 2 values, else the middle (average of the two middle) of the sorted values
    acc = np.zeros((n, p.shape[1]))
    for lo, hi, fan, index in extra:
        v = p[index]  # (fan, nodes, B)
        if fan == 1:
            acc[lo:hi] = v[0]
        elif fan == 2:
            acc[lo:hi] = (v[0] + v[1]) / 2
        else:
            v.sort(axis=0, kind="stable")
            half = fan // 2
            acc[lo:hi] = v[half] if fan % 2 else (v[half - 1] + v[half]) / 2.0
    return acc


_REDUCERS = (_reduce_sum, _reduce_product, _reduce_max, _reduce_min, _reduce_maxabs, _reduce_median, _reduce_mean)
_MEDIAN, _MEAN = _AGG_CODE["median"], _AGG_CODE["mean"]


# --------------------------------------------------------------------------- #
# one genome -> arrays
# --------------------------------------------------------------------------- #
@dataclass(frozen=True, eq=False)
class NetworkSpec:
    """One network compiled to arrays; holds no neat-python object.

    Values are numbered locally: ``0 .. n_in - 1`` are the input pins in
    ``input_keys`` order, ``n_in + j`` is evaluated node ``j``, and ``-1`` is a
    constant 0.0 (a recurrent node that is never evaluated, or an output that
    is never computed).

    Attributes
    ----------
    feed_forward : bool
        neat-python ``FeedForwardNetwork`` (True) or ``RecurrentNetwork`` semantics.
    input_keys, output_keys : tuple of int
        neat-python pin keys, in the order of the network's inputs and outputs.
    node_keys : ndarray of int, shape (n,)
        Evaluated nodes, in evaluation order (by level, then key).
    level : ndarray of int, shape (n,)
        Topological level (>= 1); every recurrent node is on level 1.
    bias, response : ndarray of float, shape (n,)
    activation, aggregation : ndarray of int, shape (n,)
        Indices into :data:`ACTIVATIONS` and :data:`AGGREGATIONS`.
    edge_node, edge_position, edge_source : ndarray of int, shape (e,)
        For every used connection: destination node, position among that
        node's inputs (its summation order) and local source value index.
    edge_weight : ndarray of float, shape (e,)
    output_source : ndarray of int, shape (n_out,)
        Local value index of each output (-1: constant 0.0).
    """

    feed_forward: bool
    input_keys: tuple[int, ...]
    output_keys: tuple[int, ...]
    node_keys: np.ndarray
    level: np.ndarray
    bias: np.ndarray
    response: np.ndarray
    activation: np.ndarray
    aggregation: np.ndarray
    edge_node: np.ndarray
    edge_position: np.ndarray
    edge_source: np.ndarray
    edge_weight: np.ndarray
    output_source: np.ndarray

    @property
    def num_inputs(self) -> int:
        return len(self.input_keys)

    @property
    def num_outputs(self) -> int:
        return len(self.output_keys)


#: node key -> (bias, response, activation name, aggregation name)
_NodeTable = Mapping[int, tuple[float, float, str, str]]


def _expressed(input_keys: Sequence[int], output_keys: Sequence[int], nodes: _NodeTable,
               connections: Iterable[tuple[int, int, float]]) -> tuple[set[int], dict[int, list[tuple[int, float]]]]:
    """Check a topology and return (required nodes, their inputs in connection order).

    ``connections`` are the enabled ones, in genome order. Required nodes are the
    outputs and every non-input node with a path to one, as
    ``neat.graphs.required_for_output`` finds them. Using only enabled
    connections here (the library's recurrent network also walks disabled ones)
    only drops nodes that cannot influence an output.
    """
    inputs = set(input_keys)
    if len(inputs) != len(input_keys):
        raise InputError("input keys repeat")
    if len(set(output_keys)) != len(output_keys):
        raise InputError("output keys repeat")
    if inputs & set(nodes):
        raise InputError(f"keys {sorted(inputs & set(nodes))} are both input pins and nodes")
    missing = [k for k in output_keys if k not in nodes]
    if missing:
        raise InputError(f"output keys {missing} have no node")
    incoming: dict[int, list[tuple[int, float]]] = {}
    seen: set[tuple[int, int]] = set()
    for src, dst, weight in connections:
        if dst not in nodes:
            raise InputError(f"connection {src} -> {dst} ends at {dst}, which is not a node")
        if src not in nodes and src not in inputs:
            raise InputError(f"connection {src} -> {dst} starts at {src}, which is neither an input nor a node")
        if (src, dst) in seen:
            raise InputError(f"connection {src} -> {dst} appears twice")
        seen.add((src, dst))
        incoming.setdefault(dst, []).append((src, weight))
    required = set(output_keys)
    frontier = list(output_keys)
    while frontier:
        for src, _ in incoming.get(frontier.pop(), ()):
            if src not in inputs and src not in required:
                required.add(src)
                frontier.append(src)
    return required, {k: incoming.get(k, []) for k in required}


def _levels(required: set[int], preds: Mapping[int, list[tuple[int, float]]]) -> dict[int, int]:
    """Level of each node ``neat.graphs.feed_forward_layers`` can place (longest path from the inputs).

    Nodes on a cycle, and nodes fed by them, are never placed, as in the library.
    """
    waiting = dict.fromkeys(required, 0)
    users: dict[int, list[int]] = {}
    for k in required:
        for src, _ in preds[k]:
            if src in required:
                waiting[k] += 1
                users.setdefault(src, []).append(k)
    level = {k: 1 for k, n in waiting.items() if n == 0}
    ready = list(level)  # a longest path does not depend on the order nodes are taken in
    while ready:
        k = ready.pop()
        for user in users.get(k, ()):
            level[user] = max(level.get(user, 1), level[k] + 1)
            waiting[user] -= 1
            if waiting[user] == 0:
                ready.append(user)
    return {k: v for k, v in level.items() if waiting[k] == 0}


#: One compiled network as plain lists: node keys, levels, biases, responses, activation codes,
#: aggregation codes (per evaluated node); edge nodes, positions, sources, weights (per edge); output sources.
_SpecLists = tuple[list[int], list[int], list[float], list[float], list[int], list[int],
                   list[int], list[int], list[int], list[float], list[int]]


def _spec_lists(feed_forward: bool, input_keys: Sequence[int], output_keys: Sequence[int], nodes: _NodeTable,
                connections: Iterable[tuple[int, int, float]]) -> _SpecLists:
    """The :class:`NetworkSpec` fields of one network as lists (so many networks can share one array each)."""
    required, preds = _expressed(input_keys, output_keys, nodes, connections)
    if feed_forward:
        level = _levels(required, preds)
    else:
        level = {k: 1 for k in required if preds[k]}
    order = sorted(sorted(level), key=level.__getitem__)  # by level, then key
    local = {k: i for i, k in enumerate(input_keys)}
    n_in = len(input_keys)
    local.update({k: n_in + j for j, k in enumerate(order)})
    levels, bias, response, act, agg = [], [], [], [], []
    e_node, e_pos, e_src, e_w = [], [], [], []
    for j, key in enumerate(order):
        b, r, a_name, g_name = nodes[key]
        a_code, g_code = _ACT_CODE.get(a_name), _AGG_CODE.get(g_name)
        if a_code is None:
            raise InputError(f"node {key}: activation {a_name!r} is not a neat-python built-in "
                             f"({', '.join(ACTIVATIONS)})")
        if g_code is None:
            raise InputError(f"node {key}: aggregation {g_name!r} is not a neat-python built-in "
                             f"({', '.join(AGGREGATIONS)})")
        levels.append(level[key])
        bias.append(b)
        response.append(r)
        act.append(a_code)
        agg.append(g_code)
        for pos, (src, weight) in enumerate(preds[key]):
            e_node.append(j)
            e_pos.append(pos)
            e_src.append(local.get(src, -1))  # -1: a recurrent node that is never evaluated
            e_w.append(weight)
    return (order, levels, bias, response, act, agg, e_node, e_pos, e_src, e_w,
            [local.get(k, -1) for k in output_keys])


def _build_spec(feed_forward: bool, input_keys: Sequence[int], output_keys: Sequence[int], nodes: _NodeTable,
                connections: Iterable[tuple[int, int, float]]) -> NetworkSpec:
    order, levels, bias, response, act, agg, e_node, e_pos, e_src, e_w, out = _spec_lists(
        feed_forward, input_keys, output_keys, nodes, connections)
    ints = np.int64
    return NetworkSpec(
        feed_forward=bool(feed_forward),
        input_keys=tuple(input_keys),
        output_keys=tuple(output_keys),
        node_keys=np.array(order, dtype=ints),
        level=np.array(levels, dtype=ints),
        bias=np.array(bias, dtype=float),
        response=np.array(response, dtype=float),
        activation=np.array(act, dtype=ints),
        aggregation=np.array(agg, dtype=ints),
        edge_node=np.array(e_node, dtype=ints),
        edge_position=np.array(e_pos, dtype=ints),
        edge_source=np.array(e_src, dtype=ints),
        edge_weight=np.array(e_w, dtype=float),
        output_source=np.array(out, dtype=ints),
    )


def _genome_parts(genome: Any, neat_config: Any) -> tuple[Any, _NodeTable, list[tuple[int, int, float]]]:
    gc = getattr(neat_config, "genome_config", neat_config)
    nodes = {k: (float(n.bias), float(n.response), str(n.activation), str(n.aggregation))
             for k, n in genome.nodes.items()}
    conns = [(int(cg.key[0]), int(cg.key[1]), float(cg.weight)) for cg in genome.connections.values() if cg.enabled]
    return gc, nodes, conns


def spec_from_genome(genome: Any, neat_config: Any) -> NetworkSpec:
    """Compile a neat-python genome to a :class:`NetworkSpec`.

    Parameters
    ----------
    genome : neat.DefaultGenome
        Any genome with ``nodes`` (bias, response, activation, aggregation) and
        ``connections`` (key, weight, enabled).
    neat_config : neat.Config or neat.genome.DefaultGenomeConfig
        Supplies ``input_keys``, ``output_keys`` and ``feed_forward``.
    """
    gc, nodes, conns = _genome_parts(genome, neat_config)
    return _build_spec(bool(gc.feed_forward), list(gc.input_keys), list(gc.output_keys), nodes, conns)


def genome_topology(genome: Any, neat_config: Any) -> dict[str, Any]:
    """The expressed network of a genome as plain JSON-ready data.

    Keeps the output nodes, every node with a path to an output, and the enabled
    connections into them, in genome order (which is the summation order).
    Compiling the result with :func:`compile_topology` gives the same outputs as
    the genome; so does building a neat-python genome from it.

    Returns
    -------
    dict
        ``feed_forward``, ``inputs`` and ``outputs`` (pin keys in network order),
        ``nodes`` (``key``, ``bias``, ``response``, ``activation``,
        ``aggregation``, sorted by key) and ``connections`` (``in``, ``out``,
        ``weight``).
    """
    gc, nodes, conns = _genome_parts(genome, neat_config)
    inputs, outputs = list(gc.input_keys), list(gc.output_keys)
    required, _ = _expressed(inputs, outputs, nodes, conns)
    return {
        "feed_forward": bool(gc.feed_forward),
        "inputs": inputs,
        "outputs": outputs,
        "nodes": [{"key": k, "bias": nodes[k][0], "response": nodes[k][1], "activation": nodes[k][2],
                   "aggregation": nodes[k][3]} for k in sorted(required)],
        "connections": [{"in": a, "out": b, "weight": w} for a, b, w in conns if b in required],
    }


# --------------------------------------------------------------------------- #
# checking plain data (policy files)
# --------------------------------------------------------------------------- #
def expect(value: Any, kind: type | tuple[type, ...], where: str, what: str) -> Any:
    if isinstance(value, (bool, np.bool_)) and bool not in (kind if isinstance(kind, tuple) else (kind,)):
        raise InputError(f"{where}: expected {what}, got {value!r}")
    if not isinstance(value, kind):
        scalar = value is None or isinstance(value, (bool, int, float, str))
        shown = repr(value) if scalar and len(repr(value)) <= 40 else type(value).__name__
        raise InputError(f"{where}: expected {what}, got {shown}")
    return value


def expect_int(value: Any, where: str) -> int:
    expect(value, int, where, "an integer")
    if abs(value) >= 2**53:
        raise InputError(f"{where}: integer {value} is out of range")
    return int(value)


def expect_float(value: Any, where: str) -> float:
    expect(value, numbers.Real, where, "a number")
    try:
        result = float(value)
    except OverflowError:
        raise InputError(f"{where}: number {value} is out of range") from None
    if not math.isfinite(result):
        raise InputError(f"{where}: expected a finite number, got {result}")
    return result


def expect_keys(obj: Any, where: str, required: Sequence[str], optional: Sequence[str] = ()) -> Mapping[str, Any]:
    expect(obj, dict, where, "an object")
    missing = [k for k in required if k not in obj]
    if missing:
        raise InputError(f"{where}: missing {', '.join(repr(k) for k in missing)}")
    extra = sorted(set(obj) - set(required) - set(optional))
    if extra:
        raise InputError(f"{where}: unknown key {extra[0]!r}")
    return obj


def spec_from_topology(topology: Mapping[str, Any], where: str = "network") -> NetworkSpec:
    """Compile plain topology data (as :func:`genome_topology` writes it) to a :class:`NetworkSpec`.

    Raises
    ------
    InputError
        Naming the offending entry (``where`` prefixes the path) if the data is
        not a valid network.
    """
    t = expect_keys(topology, where, ("feed_forward", "inputs", "outputs", "nodes", "connections"))
    feed_forward = expect(t["feed_forward"], bool, f"{where}.feed_forward", "true or false")
    keys = {}
    for name in ("inputs", "outputs"):
        expect(t[name], list, f"{where}.{name}", "a list of node keys")
        keys[name] = [expect_int(k, f"{where}.{name}[{i}]") for i, k in enumerate(t[name])]
    if not keys["inputs"] or not keys["outputs"]:
        raise InputError(f"{where}: needs at least one input and one output")
    nodes: dict[int, tuple[float, float, str, str]] = {}
    for i, node in enumerate(expect(t["nodes"], list, f"{where}.nodes", "a list")):
        at = f"{where}.nodes[{i}]"
        n = expect_keys(node, at, ("key", "bias", "response", "activation", "aggregation"))
        key = expect_int(n["key"], f"{at}.key")
        if key in nodes:
            raise InputError(f"{at}.key: node {key} appears twice")
        nodes[key] = (expect_float(n["bias"], f"{at}.bias"), expect_float(n["response"], f"{at}.response"),
                      expect(n["activation"], str, f"{at}.activation", "a name"),
                      expect(n["aggregation"], str, f"{at}.aggregation", "a name"))
    conns = []
    for i, conn in enumerate(expect(t["connections"], list, f"{where}.connections", "a list")):
        at = f"{where}.connections[{i}]"
        c = expect_keys(conn, at, ("in", "out", "weight"))
        conns.append((expect_int(c["in"], f"{at}.in"), expect_int(c["out"], f"{at}.out"),
                      expect_float(c["weight"], f"{at}.weight")))
    try:
        return _build_spec(feed_forward, keys["inputs"], keys["outputs"], nodes, conns)
    except InputError as exc:
        raise InputError(f"{where}: {exc.message}") from None


# --------------------------------------------------------------------------- #
# many networks -> one value array
# --------------------------------------------------------------------------- #
@dataclass(frozen=True)
class _Level:
    slot_lo: int  # this level's nodes occupy value rows slot_lo .. slot_hi - 1
    slot_hi: int
    source: np.ndarray  # (E,) value rows feeding the level, block by block, input position by position
    weight: np.ndarray  # (E, 1)
    bias: np.ndarray  # (n, 1)
    response: np.ndarray  # (n, 1)
    blocks: tuple[tuple[Callable[..., np.ndarray], int, int, _Slots, Any], ...]  # (reducer, lo, hi, slots, extra)
    activations: tuple[tuple[Callable[[np.ndarray], np.ndarray], np.ndarray | None], ...]
    unit_response: bool = False  # every response is 1.0: s * 1.0 is s, so the product is skipped
    into: bool = False  # one activation kind, which writes into the level's value rows itself


class NetworkStack:
    """Compiled networks side by side: each :class:`NetworkSpec` array concatenated in network order.

    Node and edge indices stay local to their network, so any subset of the
    networks is a mask away (no recompiling when a rollout drops finished ones).
    """

    _NODE_FIELDS = ("node_keys", "level", "bias", "response", "activation", "aggregation")
    _EDGE_FIELDS = ("edge_node", "edge_position", "edge_source", "edge_weight")

    def __init__(self, io_keys: Sequence[tuple[tuple[int, ...], tuple[int, ...]]], feed_forward: np.ndarray,
                 node_counts: np.ndarray, edge_counts: np.ndarray, arrays: Mapping[str, np.ndarray]):
        self.io_keys = tuple(io_keys)  # (input_keys, output_keys) of each network
        self.num_inputs, self.num_outputs = len(self.io_keys[0][0]), len(self.io_keys[0][1])
        self.feed_forward = feed_forward  # (G,) bool
        self.node_counts, self.edge_counts = node_counts, edge_counts  # (G,) each
        self.arrays = dict(arrays)  # NetworkSpec field -> concatenated values (output_source: G * n_out)
        a = self.arrays
        self.level, self.bias, self.response = a["level"], a["bias"], a["response"]
        self.activation, self.aggregation = a["activation"], a["aggregation"]
        self.edge_node, self.edge_position = a["edge_node"], a["edge_position"]
        self.edge_source, self.edge_weight, self.output_source = a["edge_source"], a["edge_weight"], a["output_source"]

    @classmethod
    def of_specs(cls, specs: Sequence[NetworkSpec]) -> NetworkStack:
        fields = (*cls._NODE_FIELDS, *cls._EDGE_FIELDS, "output_source")
        return cls([(s.input_keys, s.output_keys) for s in specs], np.array([s.feed_forward for s in specs]),
                   np.array([len(s.node_keys) for s in specs], dtype=np.int64),
                   np.array([len(s.edge_node) for s in specs], dtype=np.int64),
                   {f: np.concatenate([getattr(s, f) for s in specs]) for f in fields})

    @classmethod
    def of_lists(cls, feed_forward: bool, input_keys: Sequence[int], output_keys: Sequence[int],
                 parts: Sequence[_SpecLists]) -> NetworkStack:
        """Networks sharing one set of pins, from :func:`_spec_lists` (one numpy array per field, not per network)."""
        ints = np.int64
        kinds = (ints, ints, float, float, ints, ints, ints, ints, ints, float, ints)
        names = (*cls._NODE_FIELDS, *cls._EDGE_FIELDS, "output_source")
        arrays = {name: np.array(list(itertools.chain.from_iterable(p[i] for p in parts)), dtype=kind)
                  for i, (name, kind) in enumerate(zip(names, kinds, strict=True))}
        keys = (tuple(input_keys), tuple(output_keys))
        return cls([keys] * len(parts), np.full(len(parts), bool(feed_forward)),
                   np.array([len(p[0]) for p in parts], dtype=ints), np.array([len(p[6]) for p in parts], dtype=ints),
                   arrays)

    @classmethod
    def of_genomes(cls, genomes: Sequence[Any], neat_config: Any) -> NetworkStack:
        """neat-python genomes compiled (see :func:`stack_genomes`): all at once where the population allows it.

        A feed-forward population is compiled in one pass of array operations
        (:func:`~pretrial.controller.genome_arrays.population_arrays`, the same arrays);
        anything it leaves (a cycle, an unknown activation, ...), and recurrent
        populations, genome by genome, which names what is wrong.
        """
        if not len(genomes):
            raise ValueError("PopulationNetwork needs at least one network")
        gc = getattr(neat_config, "genome_config", neat_config)
        ins, outs, ff = list(gc.input_keys), list(gc.output_keys), bool(gc.feed_forward)
        found = population_arrays(genomes, ins, outs, _ACT_CODE, _AGG_CODE) if ff else None
        if found is None:
            return cls.of_lists(ff, ins, outs, [_spec_lists(ff, ins, outs, *_genome_parts(g, gc)[1:]) for g in genomes])
        node_counts, edge_counts, arrays = found
        return cls([(tuple(ins), tuple(outs))] * len(genomes), np.ones(len(genomes), dtype=bool), node_counts,
                   edge_counts, arrays)

    def __len__(self) -> int:
        return len(self.feed_forward)

    def take(self, keep: np.ndarray) -> NetworkStack:
        """The networks ``keep`` (increasing indices) alone."""
        chosen = np.zeros(len(self.feed_forward), dtype=bool)
        chosen[keep] = True
        node, edge = np.repeat(chosen, self.node_counts), np.repeat(chosen, self.edge_counts)
        masks = dict.fromkeys(self._NODE_FIELDS, node) | dict.fromkeys(self._EDGE_FIELDS, edge)
        masks["output_source"] = np.repeat(chosen, self.num_outputs)
        arrays = {name: values[masks[name]] for name, values in self.arrays.items()}
        return NetworkStack([self.io_keys[i] for i in keep.tolist()], self.feed_forward[keep], self.node_counts[keep],
                      self.edge_counts[keep], arrays)

    def spec(self, i: int) -> NetworkSpec:
        """Network ``i`` as a :class:`NetworkSpec`."""
        n0, e0 = int(self.node_counts[:i].sum()), int(self.edge_counts[:i].sum())
        n1, e1 = n0 + int(self.node_counts[i]), e0 + int(self.edge_counts[i])
        values = {f: self.arrays[f][n0:n1].copy() for f in self._NODE_FIELDS}
        values.update({f: self.arrays[f][e0:e1].copy() for f in self._EDGE_FIELDS})
        o0 = i * self.num_outputs
        values["output_source"] = self.arrays["output_source"][o0 : o0 + self.num_outputs].copy()
        return NetworkSpec(feed_forward=bool(self.feed_forward[i]), input_keys=self.io_keys[i][0],
                           output_keys=self.io_keys[i][1], **values)


class PopulationNetwork:
    """G compiled networks evaluated together on G x B scenarios.

    All networks' values live in one array of rows (value slots) by B columns
    (scenarios). Row 0 is a constant 0.0, then come the G x n_in input pins,
    then every evaluated node of every network, grouped by topological level.
    A level is computed from rows of lower levels only (recurrent networks: from
    the previous call's values), so each level costs one gather, one multiply,
    one in-place add per input position, one activation call per kind present.

    Parameters
    ----------
    specs : sequence of NetworkSpec
        All with the same number of inputs and outputs. Feed-forward and
        recurrent networks may be mixed.
    """

    def __init__(self, specs: Sequence[NetworkSpec]):
        specs = list(specs)
        if not specs:
            raise ValueError("PopulationNetwork needs at least one network")
        n_in, n_out = specs[0].num_inputs, specs[0].num_outputs
        for s in specs:
            if s.num_inputs != n_in or s.num_outputs != n_out:
                raise ValueError(f"networks differ in shape: {n_in} -> {n_out} and {s.num_inputs} -> {s.num_outputs}")
        self._build(NetworkStack.of_specs(specs), tuple(specs))

    @classmethod
    def of_stack(cls, stack: NetworkStack) -> PopulationNetwork:
        """The networks of ``stack`` (a :class:`NetworkStack`), without recompiling them."""
        net = cls.__new__(cls)
        net._build(stack, None)
        return net

    @property
    def specs(self) -> tuple[NetworkSpec, ...]:
        """The networks' :class:`NetworkSpec` (rebuilt from the stacked arrays when not given)."""
        if self._specs is None:
            self._specs = tuple(self._stack.spec(i) for i in range(self.num_genomes))
        return self._specs

    def subset(self, keep: Sequence[int] | np.ndarray) -> PopulationNetwork:
        """A new network of the networks ``keep`` (indices into this one), in that order, without state."""
        keep = np.asarray(keep, dtype=np.int64)
        if keep.ndim != 1 or not len(keep):
            raise ValueError("subset needs a non-empty 1-D sequence of network indices")
        if np.all(keep[1:] > keep[:-1]) and keep[0] >= 0 and keep[-1] < self.num_genomes:
            return PopulationNetwork.of_stack(self._stack.take(keep))
        return PopulationNetwork([self.specs[i] for i in keep.tolist()])

    def _build(self, stack: NetworkStack, specs: tuple[NetworkSpec, ...] | None) -> None:
        self._stack, self._specs = stack, specs
        self.num_genomes = g = len(stack.feed_forward)
        self.num_inputs, self.num_outputs = n_in, n_out = stack.num_inputs, stack.num_outputs
        self.recurrent = not bool(stack.feed_forward.all())
        counts = stack.node_counts
        base = np.concatenate([[0], np.cumsum(counts)])
        n_nodes = int(base[-1])
        genome = np.repeat(np.arange(g), counts)
        local = np.arange(n_nodes) - base[genome]
        level, agg = stack.level, stack.aggregation
        edge_genome = np.repeat(np.arange(g), stack.edge_counts)
        edge_dst = stack.edge_node + base[edge_genome]
        fan = np.bincount(edge_dst, minlength=n_nodes)
        # rows: by level, then aggregation, then fan-in (descending) so input positions are block prefixes
        order = np.lexsort((local, genome, -fan, agg, level))
        rank = np.empty(n_nodes, dtype=np.int64)
        rank[order] = np.arange(n_nodes)
        first = 1 + g * n_in
        self._n_rows = first + n_nodes

        def rows_of(values: np.ndarray, owner: np.ndarray) -> np.ndarray:
            """Global rows of local value indices ``values`` of networks ``owner``."""
            out = np.zeros(len(values), dtype=np.int64)
            is_in = (values >= 0) & (values < n_in)
            out[is_in] = 1 + owner[is_in] * n_in + values[is_in]
            is_node = values >= n_in
            out[is_node] = first + rank[base[owner[is_node]] + values[is_node] - n_in]
            return out

        edge_src = rows_of(stack.edge_source, edge_genome)
        edge_w, edge_pos = stack.edge_weight, stack.edge_position
        out_owner = np.repeat(np.arange(g), n_out)
        self._output_rows = rows_of(stack.output_source, out_owner)
        e_order = np.lexsort((rank[edge_dst], edge_pos, agg[edge_dst], level[edge_dst]))
        edge_src, edge_w, edge_pos = edge_src[e_order], edge_w[e_order], edge_pos[e_order]
        edge_level = level[edge_dst][e_order]

        s_level, s_agg, s_fan = level[order], agg[order], fan[order]
        s_bias, s_resp, s_act = stack.bias[order], stack.response[order], stack.activation[order]
        levels = []
        # every level's node and edge bounds in four searches (rows are sorted by level)
        level_values = np.unique(s_level)
        node_lo, node_hi = (np.searchsorted(s_level, v).tolist() for v in (level_values, level_values + 1))
        edge_lo, edge_hi = (np.searchsorted(edge_level, v).tolist() for v in (level_values, level_values + 1))
        for lo, hi, e_lo, e_hi in zip(node_lo, node_hi, edge_lo, edge_hi, strict=True):
            blocks = []
            e_at = 0
            seg = s_agg[lo:hi]  # sorted within the level
            if seg[0] == seg[-1]:  # one aggregation kind (the usual case): no search
                spans = [(int(seg[0]), lo, hi)]
            else:
                spans = [(int(code), *(lo + np.searchsorted(seg, [code, code + 1])).tolist())
                         for code in np.unique(seg)]
            for code, b_lo, b_hi in spans:
                fans = s_fan[b_lo:b_hi]
                # nodes having a k-th input: a prefix of the block, because fans descend (so the count of
                # fans above k is a search in their negatives, which ascend)
                counts_k = np.searchsorted(-fans, -np.arange(int(fans[0]))).tolist() if len(fans) else []
                offsets = list(itertools.accumulate(counts_k, initial=e_at))  # a few Python ints
                slots = tuple(zip(offsets[:-1], counts_k, strict=True))
                e_at = offsets[-1]
                extra: Any = None
                if code == _MEAN:
                    extra = np.maximum(fans, 1).astype(float)[:, None]
                elif code == _MEDIAN:
                    extra = []
                    for f in np.unique(fans[fans > 0])[::-1].tolist():
                        p0, p1 = (len(fans) - np.searchsorted(fans[::-1], [f + 1, f])).tolist()
                        index = np.array(offsets[:f], dtype=np.int64)[:, None] + np.arange(p0, p1)[None, :]
                        extra.append((p0, p1, f, index))
                blocks.append((_REDUCERS[code], b_lo - lo, b_hi - lo, slots, extra))
            acts = s_act[lo:hi]
            kinds = acts[:1] if not np.count_nonzero(acts != acts[0]) else np.unique(acts)
            activations = tuple((_ACT_FN[k], None if len(kinds) == 1 else np.flatnonzero(acts == k)) for k in kinds)
            levels.append(_Level(first + lo, first + hi, edge_src[e_lo:e_hi].copy(),
                                 edge_w[e_lo:e_hi, None].copy(), s_bias[lo:hi, None].copy(),
                                 s_resp[lo:hi, None].copy(), tuple(blocks), activations,
                                 not np.count_nonzero(s_resp[lo:hi] != 1.0),
                                 len(activations) == 1 and activations[0][0] in _WRITES_INTO))
        self._levels = tuple(levels)
        self._values: np.ndarray | None = None
        self._input_rows: np.ndarray | None = None
        self._program: tuple[_Op, ...] = ()

    @classmethod
    def from_genomes(cls, genomes: Sequence[Any], neat_config: Any) -> PopulationNetwork:
        """Compile and stack neat-python genomes (see :func:`stack_genomes`)."""
        return cls.of_stack(NetworkStack.of_genomes(genomes, neat_config))

    @property
    def batch_size(self) -> int | None:
        """Scenarios per network of the current state (None before the first call)."""
        return None if self._values is None else self._values.shape[1]

    def reset(self, batch_size: int) -> None:
        """Clear all state (recurrent values) for ``batch_size`` scenarios per network."""
        if isinstance(batch_size, bool) or not isinstance(batch_size, (int, np.integer)) or batch_size < 0:
            raise ValueError(f"batch_size: {batch_size!r} must be a whole number >= 0")
        b = int(batch_size)
        self._values = values = np.zeros((self._n_rows, b))
        g, n_in = self.num_genomes, self.num_inputs
        self._input_rows = values[1 : 1 + g * n_in].reshape(g, n_in, b)  # a view: the rows are contiguous
        self._program = _program(self._levels, values)

    def activate(self, inputs: np.ndarray) -> np.ndarray:
        """Advance every network one step.

        Parameters
        ----------
        inputs : array_like, shape (G, B, n_in) or (G * B, n_in)
            Network inputs; in the 2-D form rows are network-major (row
            ``g * B + b`` is network ``g`` in scenario ``b``).

        Returns
        -------
        ndarray, shape (G, B, n_out)
            Raw network outputs.
        """
        x = np.asarray(inputs, dtype=float)
        g, n_in = self.num_genomes, self.num_inputs
        if x.ndim == 2 and x.shape[1] == n_in and x.shape[0] % g == 0:
            x = x.reshape(g, x.shape[0] // g, n_in)
        if x.ndim != 3 or x.shape[0] != g or x.shape[2] != n_in:
            raise ValueError(f"inputs of shape {x.shape}: expected ({g}, B, {n_in}) or ({g} * B, {n_in})")
        b = x.shape[1]
        values = self._values
        if values is None or (values.shape[1] != b and not self.recurrent):
            self.reset(b)
            values = self._values
        elif values.shape[1] != b:
            raise ValueError(f"recurrent state holds {values.shape[1]} scenarios per network, inputs have {b}; "
                             f"call reset({b}) first")
        return self.advance(x)

    def advance(self, x: np.ndarray) -> np.ndarray:
        """:meth:`activate` without its checks, for a caller that steps every call (a rollout).

        ``x`` must be a float array of shape (G, B, n_in) with B the batch size of the current
        state (after :meth:`reset` or a first :meth:`activate`).
        """
        np.copyto(self._input_rows, x.transpose(0, 2, 1))
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            for fn, args in self._program:
                fn(*args)
        g, b = x.shape[0], x.shape[1]
        y = self._values.take(self._output_rows, axis=0).reshape(g, self.num_outputs, b)
        return np.ascontiguousarray(y.transpose(0, 2, 1))


def _reduce_blocks(blocks: tuple[tuple[Callable[..., np.ndarray], int, int, _Slots, Any], ...], p: np.ndarray,
                   acc: np.ndarray) -> None:
    """A level's aggregations into ``acc`` (one block per aggregation kind present)."""
    for reduce, lo, hi, slots, extra in blocks:
        acc[lo:hi] = reduce(p, hi - lo, slots, extra)


def _activate_into(fn: Callable[[np.ndarray], np.ndarray], s: np.ndarray, out: np.ndarray) -> None:
    out[...] = fn(s)


def _activate_kinds(activations: tuple[tuple[Callable[[np.ndarray], np.ndarray], np.ndarray | None], ...],
                    s: np.ndarray, out: np.ndarray) -> None:
    for fn, idx in activations:
        out[idx] = fn(s[idx])


#: one step of evaluation: a function and its arguments (arrays allocated once per batch size)
_Op = tuple[Callable[..., Any], tuple[Any, ...]]


def _program(levels: Sequence[_Level], values: np.ndarray) -> tuple[_Op, ...]:
    """The calls that advance every network one step, on buffers made here for ``values``' batch size.

    Per level: gather the source rows into a scratch array, multiply by the weights, sum input
    position by input position (left to right, as Python's ``sum``) in place, times the responses,
    plus the biases, then the activation into the level's value rows. Every view and repeated
    constant is made here once, so a step allocates nothing and each call is one numpy function.
    """
    b = values.shape[1]
    ops: list[_Op] = []
    for lv in levels:
        n = lv.slot_hi - lv.slot_lo
        source, weight, (reduce, _, _, slots, _) = lv.source, lv.weight, lv.blocks[0]
        plain_sum = len(lv.blocks) == 1 and reduce is _reduce_sum
        if plain_sum:
            # Nodes without inputs (at the end of the block) get a first product 0.0 * 0.0 from row 0, the
            # constant: the 0.0 an empty sum starts from. The sum then starts in place in the products.
            first = slots[0][1] if slots else 0
            if first < n:
                source = np.concatenate([source[:first], np.zeros(n - first, dtype=np.int64), source[first:]])
                weight = np.concatenate([weight[:first], np.zeros((n - first, 1)), weight[first:]])
                slots = ((0, n), *((off + n - first, count) for off, count in slots[1:]))
        p = np.empty((len(source), b))
        if len(source):
            # the bound method, not np.take (whose Python wrapper costs as much as the gather); "clip": no
            # bounds-check copy
            ops.append((values.take, (source, 0, p, "clip")))
            # weights, responses and biases repeated over the batch: broadcasting a column costs more
            ops.append((np.multiply, (p, np.repeat(weight, b, axis=1), p)))
        if plain_sum:
            s = p[:n]
            for off, count in slots[1:]:
                ops.append((np.add, (s[:count], p[off : off + count], s[:count])))
        else:
            s = np.empty((n, b))
            ops.append((_reduce_blocks, (lv.blocks, p, s)))
        if not lv.unit_response:
            ops.append((np.multiply, (s, np.repeat(lv.response, b, axis=1), s)))  # act(bias + response * agg)
        ops.append((np.add, (s, np.repeat(lv.bias, b, axis=1), s)))
        out = values[lv.slot_lo : lv.slot_hi]
        if lv.activations[0][0] is _tanh and lv.into and _KERNELS["tanh"] is np.tanh:
            # _tanh spelled out as three calls on constant arrays: an array operand costs less than a
            # Python float, and the function call goes (same operations, same order, same values)
            ops.append((np.multiply, (s, np.full((n, b), 2.5), s)))
            ops.append((np.fmin, (s, np.full((n, b), 60.0), s)))
            ops.append((np.tanh, (s, out)))
        elif lv.into:
            ops.append((lv.activations[0][0], (s, out)))
        elif len(lv.activations) == 1:
            ops.append((_activate_into, (lv.activations[0][0], s, out)))
        else:
            ops.append((_activate_kinds, (lv.activations, s, out)))
    return tuple(ops)


def stack_genomes(genomes: Sequence[Any], neat_config: Any) -> PopulationNetwork:
    """Compile neat-python genomes into one :class:`PopulationNetwork`.

    ``activate(x)`` with ``x`` of shape (G, B, n_in) then returns (G, B, n_out),
    equal to each genome's own :func:`compile_genome` network.
    """
    return PopulationNetwork.from_genomes(genomes, neat_config)


class Network:
    """One compiled network: ``activate`` maps (B, n_in) network inputs to (B, n_out) raw outputs.

    Parameters
    ----------
    spec : NetworkSpec
        From :func:`spec_from_genome` or :func:`spec_from_topology`.
    """

    def __init__(self, spec: NetworkSpec):
        self.spec = spec
        self._stack = PopulationNetwork([spec])

    @property
    def feed_forward(self) -> bool:
        return self.spec.feed_forward

    @property
    def num_inputs(self) -> int:
        return self.spec.num_inputs

    @property
    def num_outputs(self) -> int:
        return self.spec.num_outputs

    def reset(self, batch_size: int) -> None:
        """Clear recurrent state for ``batch_size`` scenarios."""
        self._stack.reset(batch_size)

    def activate(self, inputs: np.ndarray) -> np.ndarray:
        """Raw outputs (B, n_out) for network inputs (B, n_in); recurrent networks advance one step."""
        x = np.asarray(inputs, dtype=float)
        if x.ndim != 2 or x.shape[1] != self.num_inputs:
            raise ValueError(f"inputs of shape {x.shape}: expected (B, {self.num_inputs})")
        return self._stack.activate(x[None])[0]


def compile_genome(genome: Any, neat_config: Any) -> Network:
    """Compile a neat-python genome into a batched :class:`Network`.

    Parameters
    ----------
    genome : neat.DefaultGenome
    neat_config : neat.Config or neat.genome.DefaultGenomeConfig
        ``genome_config.feed_forward`` selects FeedForwardNetwork or
        RecurrentNetwork semantics.

    Returns
    -------
    Network
        ``activate(obs)`` maps (B, num_inputs) to neat-python's outputs (B, num_outputs).
    """
    return Network(spec_from_genome(genome, neat_config))


def compile_topology(topology: Mapping[str, Any]) -> Network:
    """Compile plain topology data (see :func:`genome_topology`) into a :class:`Network`."""
    return Network(spec_from_topology(topology))
