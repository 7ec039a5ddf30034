"""NEAT networks as numba-compiled row kernels: the compiled engine's networks.

The numpy networks (:mod:`pretrial.controller.network`) advance every network in
every scenario with a few numpy calls per topological level; this module
evaluates one network for one row in compiled code, node by node, which is what
the compiled engine (:mod:`pretrial.sim.compiled`) runs inside its per-row
episode loop. Both read the same :class:`~pretrial.controller.network.NetworkStack`.

Semantics are neat-python 2.0's, as in the numpy module, with one difference
that brings this module closer to the library: transcendental functions are the
C library's (numba calls it, as neat-python does through :mod:`math`), where
numpy's vectorized ``tanh`` and ``exp`` may differ from it by an ulp. So a
network here returns exactly what ``neat.nn.FeedForwardNetwork.activate`` returns
(sums left to right, as CPython 3.11's ``sum``), and the numpy network with its
kernels swapped for the C library's returns the same (both are tested).

numba is an optional dependency (``pip install "pretrial[fast]"``), so this
module is imported only by the compiled engine, which checks for numba first.
numba compiles each function on its first call and caches it on disk.

``forward(g, n_in, <arrays>, values, v, buf, out)`` evaluates network ``g`` on
the inputs in ``values[v, 1 : 1 + n_in]`` (row ``v`` of ``values`` holds its
slots, twice: the second half carries a recurrent network's previous values;
``buf``: scratch for the largest fan-in) and writes its outputs into ``out``;
``activate_all`` runs it over (G, B) rows; ``act(code, z)`` and ``aggregate``
are single nodes.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from numba import njit

from pretrial.controller.network import ACTIVATIONS, AGGREGATIONS, SELU_LAMBDA, SELU_LAMBDA_ALPHA, NetworkStack

__all__ = ["KernelNetworks", "act", "activate_all", "aggregate", "forward"]


@dataclass(frozen=True)
class KernelNetworks:
    """A :class:`NetworkStack` laid out for row kernels: nodes in evaluation order, inputs by node.

    A network's values sit in one row of ``n_slots``: slot 0 is a constant 0.0,
    slots ``1 .. n_in`` the inputs, slot ``1 + n_in + j`` its evaluated node ``j``.

    Attributes
    ----------
    node_ptr : (G + 1,) int array
        Network ``g``'s nodes are ``node_ptr[g] .. node_ptr[g + 1] - 1``, in evaluation order.
    bias, response : (n,) float arrays
    activation, aggregation : (n,) int arrays
        Codes into :data:`~pretrial.controller.network.ACTIVATIONS` and ``AGGREGATIONS``.
    edge_ptr : (n + 1,) int array
        Node ``j``'s inputs are edges ``edge_ptr[j] .. edge_ptr[j + 1] - 1``, in its summation order.
    edge_slot : (e,) int array
        Value slot each edge reads.
    edge_weight : (e,) float array
    output_slot : (G, n_out) int array
    plain : (G,) int array
        1: feed-forward with every node a sum (the fast path); 0: feed-forward; 2: neat-python
        ``RecurrentNetwork`` semantics (one synchronous update per call).
    n_in, n_out, n_slots, max_fan : int
        Inputs, outputs, value slots of the largest network, most inputs of any node.
    """

    node_ptr: np.ndarray
    bias: np.ndarray
    response: np.ndarray
    activation: np.ndarray
    aggregation: np.ndarray
    edge_ptr: np.ndarray
    edge_slot: np.ndarray
    edge_weight: np.ndarray
    output_slot: np.ndarray
    plain: np.ndarray
    n_in: int
    n_out: int
    n_slots: int
    max_fan: int

    @classmethod
    def of_stack(cls, stack: NetworkStack) -> KernelNetworks:
        g, n_in, n_out = len(stack), stack.num_inputs, stack.num_outputs
        counts = stack.node_counts
        node_ptr = np.concatenate([[0], np.cumsum(counts)]).astype(np.int64)
        n_nodes = int(node_ptr[-1])
        edge_genome = np.repeat(np.arange(g), stack.edge_counts)
        dst = stack.edge_node + node_ptr[edge_genome]
        order = np.lexsort((stack.edge_position, dst))  # by node, then input position
        fan = np.bincount(dst, minlength=n_nodes)
        edge_ptr = np.concatenate([[0], np.cumsum(fan)]).astype(np.int64)
        node_genome = np.repeat(np.arange(g), counts)
        other = np.bincount(node_genome, weights=stack.aggregation != SUM, minlength=g) > 0
        plain = np.where(~stack.feed_forward.astype(bool), 2, np.where(other, 0, 1)).astype(np.int64)
        # local value index -> slot: -1 (a constant 0.0) -> 0, input i -> 1 + i, node j -> 1 + n_in + j
        return cls(node_ptr, stack.bias.astype(float), stack.response.astype(float),
                   stack.activation.astype(np.int64), stack.aggregation.astype(np.int64), edge_ptr,
                   (stack.edge_source[order] + 1).astype(np.int64), stack.edge_weight[order].astype(float),
                   (stack.output_source + 1).astype(np.int64).reshape(g, n_out), plain,
                   n_in, n_out, 1 + n_in + int(counts.max(initial=0)), int(fan.max(initial=0)))

    def __len__(self) -> int:
        return len(self.node_ptr) - 1

    def arrays(self) -> tuple[Any, ...]:
        """What :func:`forward` takes after ``g`` and before its buffers, in order."""
        return (self.n_in, self.node_ptr, self.bias, self.response, self.activation, self.aggregation, self.edge_ptr,
                self.edge_slot, self.edge_weight, self.output_slot, self.plain)

    def activate(self, inputs: np.ndarray, state: np.ndarray | None = None) -> np.ndarray:
        """Outputs (G, B, n_out) for inputs (G, B, n_in): every network on its own B rows, one step.

        ``state`` (G * B, 2 n_slots), kept by the caller between calls, carries recurrent values
        (zeros: a fresh network); feed-forward networks ignore it.
        """
        x = np.ascontiguousarray(inputs, dtype=float)
        if x.ndim != 3 or x.shape[0] != len(self) or x.shape[2] != self.n_in:
            raise ValueError(f"inputs of shape {x.shape}: expected ({len(self)}, B, {self.n_in})")
        if state is None:
            state = np.zeros((x.shape[0] * x.shape[1], 2 * self.n_slots))
        out = np.empty((*x.shape[:2], self.n_out))
        activate_all(*self.arrays(), x, state, np.empty(max(self.max_fan, 1)), np.empty(self.n_out), out)
        return out


#: activation and aggregation codes, as the kernels branch on them (numba reads module constants once)
_A = {name: i for i, name in enumerate(ACTIVATIONS)}
_G = {name: i for i, name in enumerate(AGGREGATIONS)}
SIGMOID, TANH, SIN, GAUSS, RELU, ELU, LELU, SELU = (_A[n] for n in ("sigmoid", "tanh", "sin", "gauss", "relu", "elu",
                                                                     "lelu", "selu"))
SOFTPLUS, IDENTITY, CLAMPED, INV, LOG, EXP = (_A[n] for n in ("softplus", "identity", "clamped", "inv", "log", "exp"))
ABS, HAT, SQUARE, CUBE = (_A[n] for n in ("abs", "hat", "square", "cube"))
SUM, PRODUCT, MAX, MIN, MAXABS, MEDIAN, MEAN = (_G[n] for n in AGGREGATIONS)

# ``_nrt=False`` throughout: no reference counting. The kernels allocate nothing, and numba would
# otherwise count references (atomic operations) on every array handed to an inlined function on
# every call: measured 170 ns per network evaluation, more than the network itself. ``cache=True``:
# each function here inlines only functions of this file, whose changes numba's cache notices.
_JIT = {"cache": True, "_nrt": False}


@njit(inline="always", **_JIT)
def clamp(z: float, low: float, high: float) -> float:
    z = z if z < high else high  # min(high, z)
    return z if z > low else low  # max(low, z)


@njit(inline="always", **_JIT)
def power2(z: float) -> float:
    """``z ** 2`` as Python computes it: the C library's ``pow``, which is not always ``z * z``.

    The exponent is made a runtime value (``2 + 0 z``) because LLVM rewrites ``pow(z, 2.0)`` into
    ``z * z`` (measured: 162 of 200,000 normal draws then differ from Python's by an ulp).
    """
    if math.isinf(z):
        return math.inf
    return math.pow(z, 2.0 + 0.0 * z)


@njit(**_JIT)
def act(code: int, z: float) -> float:
    if code == TANH:
        return math.tanh(clamp(2.5 * z, -60.0, 60.0))
    if code == SIGMOID:
        return 1.0 / (1.0 + math.exp(-clamp(5.0 * z, -60.0, 60.0)))
    if code == IDENTITY:
        return z
    if code == RELU:
        return z if z > 0.0 else 0.0
    if code == SIN:
        return math.sin(clamp(5.0 * z, -60.0, 60.0))
    if code == GAUSS:
        return math.exp(-5.0 * power2(clamp(z, -3.4, 3.4)))
    if code == ELU:
        return z if z > 0.0 else math.exp(z) - 1.0
    if code == LELU:
        return z if z > 0.0 else 0.005 * z
    if code == SELU:
        return SELU_LAMBDA * z if z > 0.0 else SELU_LAMBDA_ALPHA * (math.exp(z) - 1.0)
    if code == SOFTPLUS:
        return 0.2 * math.log(1.0 + math.exp(clamp(5.0 * z, -60.0, 60.0)))
    if code == CLAMPED:
        return clamp(z, -1.0, 1.0)
    if code == INV:
        return 1.0 / z if z != 0.0 else 0.0  # the library catches ZeroDivisionError
    if code == LOG:
        return math.log(z if z > 1e-7 else 1e-7)
    if code == EXP:
        return math.exp(clamp(z, -60.0, 60.0))
    if code == ABS:
        return abs(z)
    if code == HAT:
        h = 1.0 - abs(z)
        return h if h > 0.0 else 0.0
    if code == SQUARE:
        return power2(z)
    if code == CUBE:
        return math.pow(z, 3.0)
    return math.nan  # not reached: codes come from ACTIVATIONS


@njit(**_JIT)
def aggregate(code: int, values: np.ndarray, v: int, read: int, slots: np.ndarray, weights: np.ndarray, lo: int,
              hi: int, buf: np.ndarray) -> float:
    n = hi - lo
    if code == SUM or code == MEAN:
        s = 0.0  # Python's sum: 0 + x0 + x1 + ..., left to right
        for e in range(lo, hi):
            s += values[v, read + slots[e]] * weights[e]
        if code == MEAN and n:
            s /= n
        return s
    if code == PRODUCT:
        p = 1.0  # reduce(mul, x, 1.0)
        for e in range(lo, hi):
            p *= values[v, read + slots[e]] * weights[e]
        return p
    if n == 0:
        return 0.0
    if code == MEDIAN:  # neat.math_util.median2: the mean of one or two values, else the middle
        for e in range(lo, hi):  # insertion sort into buf (same values as any sort, without NaN)
            x = values[v, read + slots[e]] * weights[e]
            i = e - lo
            while i > 0 and buf[i - 1] > x:
                buf[i] = buf[i - 1]
                i -= 1
            buf[i] = x
        if n <= 2:
            return (buf[0] + buf[1]) / 2 if n == 2 else buf[0] / 1
        half = n // 2
        return buf[half] if n % 2 else (buf[half - 1] + buf[half]) / 2.0
    best = values[v, read + slots[lo]] * weights[lo]
    for e in range(lo + 1, hi):
        x = values[v, read + slots[e]] * weights[e]
        # Python's max / min / max(key=abs): the first of equals stays
        if (code == MAX and x > best) or (code == MIN and x < best) or (
                code == MAXABS and abs(x) > abs(best)):
            best = x
    return best


@njit(inline="always", **_JIT)
def forward(g: int, n_in: int, node_ptr: np.ndarray, bias: np.ndarray, response: np.ndarray,
            activation: np.ndarray, aggregation: np.ndarray, edge_ptr: np.ndarray, edge_slot: np.ndarray,
            edge_weight: np.ndarray, output_slot: np.ndarray, plain: np.ndarray, values: np.ndarray,
            v: int, buf: np.ndarray, out: np.ndarray) -> None:
    lo, hi = node_ptr[g], node_ptr[g + 1]
    base = 1 + n_in - lo  # node j's slot is base + j
    values[v, 0] = 0.0
    # Rows by index (`values[v, k]`), never as views, and no array variable rebound: with reference
    # counting on, each would cost an atomic operation per call.
    if plain[g] == 1:  # feed-forward, every node a sum (the common case, kept short)
        for j in range(lo, hi):
            s = 0.0  # Python's sum: 0 + x0 + x1 + ..., left to right
            for e in range(edge_ptr[j], edge_ptr[j + 1]):
                s += values[v, edge_slot[e]] * edge_weight[e]
            z = bias[j] + response[j] * s
            # tanh (the shipped default) inline; the other activations by a call, which compiles faster
            values[v, base + j] = math.tanh(clamp(2.5 * z, -60.0, 60.0)) if activation[j] == TANH else act(
                activation[j], z)
    else:
        # Nodes read slot `read + k`. A recurrent network (plain 2) reads the previous call's values
        # (its inputs are this call's), copied to the second half of its row; a feed-forward one
        # reads its own row, whose nodes come in evaluation order.
        read = 0
        if plain[g] == 2:
            read = values.shape[1] // 2
            for i in range(1 + n_in + hi - lo):
                values[v, read + i] = values[v, i]
        for j in range(lo, hi):
            s = aggregate(aggregation[j], values, v, read, edge_slot, edge_weight, edge_ptr[j], edge_ptr[j + 1],
                          buf)
            values[v, base + j] = act(activation[j], bias[j] + response[j] * s)
    for o in range(out.shape[0]):
        out[o] = values[v, output_slot[g, o]]


@njit(**_JIT)
def activate_all(n_in: int, node_ptr: np.ndarray, bias: np.ndarray, response: np.ndarray,
                 activation: np.ndarray, aggregation: np.ndarray, edge_ptr: np.ndarray, edge_slot: np.ndarray,
                 edge_weight: np.ndarray, output_slot: np.ndarray, plain: np.ndarray, x: np.ndarray,
                 state: np.ndarray, buf: np.ndarray, y: np.ndarray, out: np.ndarray) -> None:
    for g in range(x.shape[0]):
        for b in range(x.shape[1]):
            v = g * x.shape[1] + b
            for i in range(n_in):
                state[v, 1 + i] = x[g, b, i]
            forward(g, n_in, node_ptr, bias, response, activation, aggregation, edge_ptr, edge_slot,
                    edge_weight, output_slot, plain, state, v, buf, y)
            for o in range(y.shape[0]):
                out[g, b, o] = y[o]
