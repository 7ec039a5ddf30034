"""One policy step as straight-line statements, for any target language (the exporters' shared core).

:func:`build_program` walks a :class:`~pretrial.controller.policy.Policy` (its
:class:`~pretrial.controller.policy.IOMap` and :class:`~pretrial.controller.network.NetworkSpec`)
and writes, through a :class:`Syntax`, the statements of three pieces: the
input scaling, the per-block network function and the output mapping. It
counts the arithmetic while it writes, so the operation count describes the
code exactly. The C and Python exporters only differ in their
:class:`Syntax` and in how they wrap these statements into files.

The statements reproduce :mod:`pretrial.controller.network`'s arithmetic operation by
operation: node order, summation order (``edge_position``), the scaling and
clamping inside every activation, the tie and NaN rules of every aggregation,
and ``(obs - offset) * scale`` / ``clip(out * scale + offset, -1, 1)`` around
them. Three exact shortcuts: ``* 1.0`` and ``+ 0.0`` are left out (they can
only change the sign of a zero, which no later operation tells apart), and
constants the numpy network would compute from constants alone (a term whose
source is a never-evaluated recurrent node, the aggregate of a node without
inputs) are folded with the same double arithmetic. Every product that feeds
an addition is a statement of its own, so a C compiler that contracts within
expressions only (the C99 rule) cannot fuse it into a multiply-add.

Around the three pieces the renderers put the fault guard (:data:`FAULTS`):
a NaN or infinite observation, or a network output that is NaN or infinite,
gives the :attr:`Program.safe_action` and a nonzero code, and leaves the
recurrent state as it was. The guard's finiteness tests are counted in
:attr:`Ops.finite_checks`.
"""

from __future__ import annotations

import re
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from pretrial.controller.network import ACTIVATIONS, AGGREGATIONS, SELU_LAMBDA, SELU_LAMBDA_ALPHA, NetworkSpec
from pretrial.errors import InputError

#: neat.aggregations on an empty list (sum 0, product 1, every other 0.0)
_EMPTY = {"sum": 0.0, "product": 1.0}
#: counted math library functions (fmin/fmax count as comparisons, fabs as nothing: a sign-bit clear)
MATH_FUNCTIONS = ("exp", "tanh", "sin", "log", "pow")
#: the step's return codes: (name suffix, value, meaning); 0 is a computed action, the rest give the safe action
FAULTS = (
    ("OK", 0, "the action was computed"),
    ("FAULT_OBSERVATION", 1, "an observation value is NaN or infinite"),
    ("FAULT_OUTPUT", 2, "a network output is NaN or infinite (e.g. overflow) although the observation is finite"),
)


@dataclass
class Ops:
    """Arithmetic of a piece of code, worst case over its branches.

    ``adds`` include subtractions; ``comparisons`` include the ``fmin``/``fmax``
    of the clamps, branch conditions and the NaN-aware ordering tests of a
    median sort (at most n(n-1)/2 for n values); ``math_calls`` are the
    :data:`MATH_FUNCTIONS` calls; ``activations`` the node activations
    evaluated, ``activation_kinds`` the same per function name;
    ``finite_checks`` the NaN/infinity tests of the fault guard (one per
    observation and one per network output).
    """

    multiplies: int = 0
    divisions: int = 0
    adds: int = 0
    comparisons: int = 0
    math_calls: int = 0
    activations: int = 0
    activation_kinds: dict[str, int] = field(default_factory=dict)
    finite_checks: int = 0

    _COUNTS = ("multiplies", "divisions", "adds", "comparisons", "math_calls", "activations", "finite_checks")

    def plus(self, other: Ops, times: int = 1) -> Ops:
        """``self + times * other``."""
        out = Ops(**{k: getattr(self, k) + times * getattr(other, k) for k in self._COUNTS})
        out.activation_kinds = dict(self.activation_kinds)
        for k, v in other.activation_kinds.items():
            out.activation_kinds[k] = out.activation_kinds.get(k, 0) + times * v
        return out

    def worst(self, other: Ops) -> Ops:
        """Element-wise maximum (the costlier of two branches)."""
        out = Ops(**{k: max(getattr(self, k), getattr(other, k)) for k in self._COUNTS})
        for k in set(self.activation_kinds) | set(other.activation_kinds):
            out.activation_kinds[k] = max(self.activation_kinds.get(k, 0), other.activation_kinds.get(k, 0))
        return out

    def as_dict(self) -> dict[str, Any]:
        d = {k: getattr(self, k) for k in self._COUNTS}
        d["activation_kinds"] = dict(sorted(self.activation_kinds.items()))
        return d


class Syntax:
    """How a target language spells the pieces :class:`Writer` emits (subclasses fill these in)."""

    #: bytes of one real number on the target
    real_bytes = 8

    def round(self, value: float) -> float:
        """``value`` as the target's real type holds it."""
        return float(value)

    def literal(self, value: float) -> str:
        raise NotImplementedError

    def function(self, name: str) -> str:
        """Spelling of ``exp``, ``tanh``, ``sin``, ``log``, ``fabs``, ``fmin``, ``fmax``."""
        raise NotImplementedError

    def cube(self, z: str) -> str:
        raise NotImplementedError

    def median(self, array: str, n: int) -> str:
        raise NotImplementedError

    def ternary(self, cond: str, a: str, b: str) -> str:
        raise NotImplementedError

    def assign(self, target: str, expr: str) -> list[str]:
        raise NotImplementedError

    def assign_if(self, cond: str, target: str, expr: str) -> list[str]:
        raise NotImplementedError

    def comment(self, text: str) -> str:
        raise NotImplementedError


def strip_parens(expr: str) -> str:
    """``expr`` without one pair of parentheses that encloses all of it."""
    while expr.startswith("(") and expr.endswith(")"):
        depth = 0
        for i, ch in enumerate(expr):
            depth += ch == "("
            depth -= ch == ")"
            if depth == 0 and i < len(expr) - 1:
                return expr
        expr = expr[1:-1]
    return expr


_SCALAR = re.compile(r"[A-Za-z_][A-Za-z0-9_]*$")


class Writer:
    """Collects statements, counts their arithmetic and the distinct constants they use."""

    def __init__(self, syntax: Syntax):
        self.syntax = syntax
        self.lines: list[str] = []
        self.ops = Ops()
        self.literals: set[float] = set()
        self.scalars: list[str] = []  # local scalar variables in order of first assignment
        self.medians = 0  # size of the median scratch array (0: none)

    # ---------------------------------------------------------------- expressions
    def lit(self, value: float) -> str:
        v = self.syntax.round(float(value))
        self.literals.add(v)
        return self.syntax.literal(v)

    @staticmethod
    def _operand(expr: str) -> str:
        return f"({expr})" if expr.startswith("-") else expr

    def _binary(self, a: str, op: str, b: str) -> str:
        return f"({self._operand(a)} {op} {self._operand(b)})"

    def mul(self, a: str, b: str) -> str:
        self.ops.multiplies += 1
        return self._binary(a, "*", b)

    def div(self, a: str, b: str) -> str:
        self.ops.divisions += 1
        return self._binary(a, "/", b)

    def add(self, a: str, b: str) -> str:
        self.ops.adds += 1
        return self._binary(a, "+", b)

    def sub(self, a: str, b: str) -> str:
        self.ops.adds += 1
        return self._binary(a, "-", b)

    def neg(self, a: str) -> str:
        return f"(-{self._operand(a)})"

    def compare(self, a: str, op: str, b: str) -> str:
        self.ops.comparisons += 1
        return self._binary(a, op, b)

    def call(self, name: str, *args: str) -> str:
        if name in MATH_FUNCTIONS:
            self.ops.math_calls += 1
        elif name in ("fmin", "fmax"):
            self.ops.comparisons += 1
        return f"{self.syntax.function(name)}({', '.join(strip_parens(a) for a in args)})"

    def cube(self, z: str) -> str:
        self.ops.math_calls += 1  # pow(z, 3.0), as neat-python's z ** 3
        self.lit(3.0)
        return self.syntax.cube(z)

    def clamp(self, z: str, low: float, high: float) -> str:
        # network._clamp: fmin first, then fmax (NaN becomes the upper bound)
        return self.call("fmax", self.call("fmin", z, self.lit(high)), self.lit(low))

    def choose(self, cond: str, if_true: Callable[[], str], if_false: Callable[[], str]) -> str:
        """``cond ? if_true() : if_false()``, counting the costlier branch only."""
        outer, branches = self.ops, []
        exprs = []
        for build in (if_true, if_false):
            self.ops = Ops()
            exprs.append(build())
            branches.append(self.ops)
        self.ops = outer.plus(branches[0].worst(branches[1]))
        return f"({self.syntax.ternary(strip_parens(cond), strip_parens(exprs[0]), strip_parens(exprs[1]))})"

    # ---------------------------------------------------------------- statements
    def _target(self, target: str) -> None:
        if _SCALAR.match(target) and target not in self.scalars:
            self.scalars.append(target)

    def set(self, target: str, expr: str) -> None:
        self._target(target)
        self.lines.extend(self.syntax.assign(target, strip_parens(expr)))

    def set_if(self, cond: str, target: str, expr: str) -> None:
        self._target(target)
        self.lines.extend(self.syntax.assign_if(strip_parens(cond), target, strip_parens(expr)))

    def comment(self, text: str) -> None:
        self.lines.append(self.syntax.comment(text))


# --------------------------------------------------------------------------- #
# activations and aggregations (network.py's arithmetic, operation by operation)
# --------------------------------------------------------------------------- #
def _activation(w: Writer, name: str, z: str) -> str:
    """Expression of neat-python activation ``name`` of variable ``z`` (may emit a statement into ``t``)."""
    lit = w.lit

    def zero() -> str:  # registered only where used, so the constant count stays exact
        return lit(0.0)
    if name == "sigmoid":
        e = w.call("exp", w.neg(w.clamp(w.mul(lit(5.0), z), -60.0, 60.0)))
        return w.div(lit(1.0), w.add(e, lit(1.0)))
    if name == "tanh":
        return w.call("tanh", w.call("fmin", w.mul(lit(2.5), z), lit(60.0)))
    if name == "sin":
        return w.call("sin", w.clamp(w.mul(lit(5.0), z), -60.0, 60.0))
    if name == "gauss":
        w.set("t", w.clamp(z, -3.4, 3.4))
        return w.call("exp", w.mul(lit(-5.0), w.mul("t", "t")))
    if name == "relu":
        return w.call("fmax", z, zero())
    if name == "elu":
        return w.choose(w.compare(z, ">", zero()), lambda: z, lambda: w.sub(w.call("exp", z), lit(1.0)))
    if name == "lelu":
        return w.choose(w.compare(z, ">", zero()), lambda: z, lambda: w.mul(lit(0.005), z))
    if name == "selu":
        return w.choose(w.compare(z, ">", zero()), lambda: w.mul(lit(SELU_LAMBDA), z),
                        lambda: w.mul(lit(SELU_LAMBDA_ALPHA), w.sub(w.call("exp", z), lit(1.0))))
    if name == "softplus":
        e = w.call("exp", w.clamp(w.mul(lit(5.0), z), -60.0, 60.0))
        return w.mul(lit(0.2), w.call("log", w.add(e, lit(1.0))))
    if name == "identity":
        return z
    if name == "clamped":
        return w.clamp(z, -1.0, 1.0)
    if name == "inv":
        return w.choose(w.compare(z, "!=", zero()), lambda: w.div(lit(1.0), z), zero)
    if name == "log":
        return w.call("log", w.call("fmax", z, lit(1e-7)))
    if name == "exp":
        return w.call("exp", w.clamp(z, -60.0, 60.0))
    if name == "abs":
        return w.call("fabs", z)
    if name == "hat":
        return w.call("fmax", w.sub(lit(1.0), w.call("fabs", z)), zero())
    if name == "square":
        return w.mul(z, z)
    if name == "cube":
        return w.cube(z)
    raise InputError(f"activation {name!r} cannot be exported")  # unreachable: specs hold built-ins only


def _aggregate(w: Writer, name: str, terms: list[str]) -> None:
    """``s = aggregation(terms)`` for at least one term (each a product or a folded constant)."""
    n = len(terms)
    if name == "median" and n >= 3:
        w.medians = max(w.medians, n)
        for k, term in enumerate(terms):
            w.set(f"m[{k}]", term)
        # insertion sort (worst case), then the middle or the mean of the two middles
        w.ops.comparisons += n * (n - 1) // 2
        if n % 2 == 0:
            w.ops.adds += 1
            w.ops.divisions += 1
            w.lit(2.0)
        w.set("s", w.syntax.median("m", n))
        return
    w.set("s", terms[0])
    for term in terms[1:]:
        w.set("t", term)
        if name in ("sum", "mean", "median"):
            w.set("s", w.add("s", "t"))
        elif name == "product":
            w.set("s", w.mul("s", "t"))
        elif name == "max":
            w.set_if(w.compare("t", ">", "s"), "s", "t")
        elif name == "min":
            w.set_if(w.compare("t", "<", "s"), "s", "t")
        elif name == "maxabs":
            w.set_if(w.compare(w.call("fabs", "t"), ">", w.call("fabs", "s")), "s", "t")
    if name == "mean":
        w.set("s", w.div("s", w.lit(float(n))))
    elif name == "median" and n == 2:
        w.set("s", w.div("s", w.lit(2.0)))


# --------------------------------------------------------------------------- #
# the three pieces
# --------------------------------------------------------------------------- #
@dataclass
class Piece:
    """Statements of one piece of the step, what they cost and which constants they use."""

    lines: list[str]
    ops: Ops
    literals: set[float]
    scalars: list[str]
    medians: int = 0


@dataclass
class NetPiece(Piece):
    """The per-block network function: reads ``x`` (inputs) and ``v`` (state), writes ``y`` and ``v``.

    Locals are the node values ``n0 .. n{nodes-1}`` (evaluation order), the
    scratch scalars ``s`` and ``t`` and the median scratch array ``m``.
    """

    nodes: int = 0
    state: int = 0  # values kept per block between steps (0: stateless)
    reads_inputs: bool = False


def _piece(w: Writer, cls: type = Piece, **extra: Any) -> Any:
    return cls(w.lines, w.ops, w.literals, w.scalars, w.medians, **extra)


def net_piece(spec: NetworkSpec, syntax: Syntax) -> NetPiece:
    """Statements of one network evaluation (neat-python FeedForward or Recurrent semantics)."""
    w = Writer(syntax)
    n_in, n = spec.num_inputs, len(spec.node_keys)
    stateful = not spec.feed_forward and n > 0
    edges: list[list[tuple[int, float]]] = [[] for _ in range(n)]
    for e in np.lexsort((spec.edge_position, spec.edge_node)).tolist():  # each node's inputs in summation order
        edges[int(spec.edge_node[e])].append((int(spec.edge_source[e]), float(spec.edge_weight[e])))
    reads_inputs = False

    def value(src: int, previous: bool) -> str:
        nonlocal reads_inputs
        if src < n_in:
            reads_inputs = True
            return f"x[{src}]"
        j = src - n_in
        return f"v[{j}]" if previous else f"n{j}"

    for j in range(n):
        act, agg = ACTIVATIONS[int(spec.activation[j])], AGGREGATIONS[int(spec.aggregation[j])]
        bias, response = float(spec.bias[j]), float(spec.response[j])
        w.comment(f"node {int(spec.node_keys[j])}: {act}({bias!r} + {response!r} * {agg} of {len(edges[j])} inputs)")
        if not edges[j]:
            w.set("s", w.lit(bias + response * _EMPTY.get(agg, 0.0)))  # numpy folds nothing, but it is all constant
        else:
            # a source of -1 is a recurrent node that is never evaluated: the constant 0.0
            terms = [w.mul(value(src, stateful), w.lit(weight)) if src >= 0 else w.lit(0.0 * weight)
                     for src, weight in edges[j]]
            _aggregate(w, agg, terms)
            if response != 1.0:
                w.set("s", w.mul("s", w.lit(response)))
            if bias != 0.0:
                w.set("s", w.add("s", w.lit(bias)))
        w.ops.activations += 1
        w.ops.activation_kinds[act] = w.ops.activation_kinds.get(act, 0) + 1
        w.set(f"n{j}", _activation(w, act, "s"))
    if stateful:
        w.comment("keep this step's values for the next one")
        for j in range(n):
            w.set(f"v[{j}]", f"n{j}")
    for k, src in enumerate(spec.output_source.tolist()):
        w.set(f"y[{k}]", value(src, False) if src >= 0 else w.lit(0.0))
    return _piece(w, NetPiece, nodes=n, state=n if stateful else 0, reads_inputs=reads_inputs)


def input_piece(obs_offset: tuple[float, ...], obs_scale: tuple[float, ...], syntax: Syntax) -> Piece:
    """``x[i] = (obs[i] - offset[i]) * scale[i]`` (IOMap.network_inputs)."""
    w = Writer(syntax)
    for i, (offset, scale) in enumerate(zip(obs_offset, obs_scale, strict=True)):
        e = f"obs[{i}]"
        if offset != 0.0:
            e = w.sub(e, w.lit(offset))
        if scale != 1.0:
            e = w.mul(e, w.lit(scale))
        w.set(f"x[{i}]", e)
    return _piece(w)


def output_piece(action_scale: tuple[float, ...], action_offset: tuple[float, ...], syntax: Syntax) -> Piece:
    """``action[k] = clip(y[k] * scale[k] + offset[k], -1, 1)`` (IOMap.actions; NaN passes, as np.clip)."""
    w = Writer(syntax)
    one, minus_one = w.lit(1.0), w.lit(-1.0)
    for k, (scale, offset) in enumerate(zip(action_scale, action_offset, strict=True)):
        a = f"y[{k}]"
        if scale != 1.0:
            w.set("a", w.mul(a, w.lit(scale)))
            a = "a"
        if offset != 0.0:
            w.set("a", w.add(a, w.lit(offset)))
            a = "a"
        w.set(f"action[{k}]", w.choose(w.compare(a, "<", minus_one), lambda: minus_one,
                                       lambda a=a: w.choose(w.compare(a, ">", one), lambda: one, lambda a=a: a)))
    return _piece(w)


@dataclass
class Program:
    """Everything a renderer needs for one policy, plus the step's cost."""

    blocks: int
    inputs: int  # env observation size (whole vector)
    outputs: int  # env action size (whole vector)
    net_inputs: int
    net_outputs: int
    scale_inputs: Piece
    net: NetPiece
    map_outputs: Piece
    ops: Ops
    memory_bytes: dict[str, int]
    #: the action a fault gives, as the target's real type holds it
    safe_action: tuple[float, ...] = ()


def build_program(policy: Any, syntax: Syntax, safe_action: Any = None) -> Program:
    """The statements of ``policy``'s step in ``syntax`` and what one step costs.

    ``safe_action`` (one value per action, checked by the caller; default
    zeros) is what a fault gives.

    Memory: ``constants`` is the distinct numeric literals times the size of
    a real (a compiler may keep fewer as immediates, or repeat some per
    function) plus the safe-action table; ``state`` the recurrent values of
    every block (a feed-forward policy's state struct is a 1-byte
    placeholder); ``stack`` the locals of the step (with the copy of the
    recurrent state a fault restores) and of one network call.
    """
    io = policy.io
    inputs = input_piece(io.obs_offset, io.obs_scale, syntax)
    net = net_piece(policy.network.spec, syntax)
    outputs = output_piece(io.action_scale, io.action_offset, syntax)
    ops = inputs.ops.plus(net.ops, io.blocks).plus(outputs.ops)
    ops.finite_checks += io.obs_dim + io.action_dim  # the guard: every observation, every network output
    safe = tuple(syntax.round(v) for v in (np.zeros(io.action_dim) if safe_action is None else safe_action))
    size = syntax.real_bytes
    literals = inputs.literals | net.literals | outputs.literals
    state = io.blocks * net.state * size
    step_locals = io.obs_dim + io.action_dim + 1  # x, y, a
    net_locals = len(net.scalars) + net.medians
    memory = {
        "constants": (len(literals) + len(safe)) * size,
        "state": state if net.state else 1,
        "stack": (step_locals + net_locals) * size + state,
    }
    return Program(io.blocks, io.obs_dim, io.action_dim, io.num_inputs, io.num_outputs, inputs, net, outputs,
                   ops, memory, safe)
