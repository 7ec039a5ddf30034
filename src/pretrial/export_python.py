"""A policy as one dependency-free Python module (the Python half of ``pretrial export``).

The module imports :mod:`math` only and computes in Python floats (IEEE
double), mirroring the C pair: ``INPUTS``, ``OUTPUTS``, ``new_state()``,
``PREFIX_reset(state)``, ``PREFIX_step(state, obs) -> list``, plus
``check_golden(path)`` and ``python PREFIX.py [GOLDEN [TOLERANCE]]`` to replay
the golden file.
"""

from __future__ import annotations

from .export_code import Program, Syntax
from .export_golden import MAGIC, VERSION

_NAMES = {"exp": "math.exp", "tanh": "math.tanh", "sin": "math.sin", "log": "math.log", "fabs": "abs",
          "fmin": "_fmin", "fmax": "_fmax"}


class PythonSyntax(Syntax):
    """Python spelling (floats are IEEE doubles, as the numpy network's)."""

    real_bytes = 8

    def literal(self, value: float) -> str:
        return repr(value)

    def function(self, name: str) -> str:
        return _NAMES[name]

    def cube(self, z: str) -> str:
        return f"_cube({z})"

    def median(self, array: str, n: int) -> str:
        return f"_median({array}[:{n}])"

    def ternary(self, cond: str, a: str, b: str) -> str:
        return f"{a} if {cond} else {b}"

    def assign(self, target: str, expr: str) -> list[str]:
        return [f"{target} = {expr}"]

    def assign_if(self, cond: str, target: str, expr: str) -> list[str]:
        return [f"if {cond}:", f"    {target} = {expr}"]

    def comment(self, text: str) -> str:
        return f"# {' '.join(text.split())}"


_MIN_MAX = '''

def _fNAME(a, b):
    """C99 fNAME (numpy's fNAME): the WHICH value, the other one where one is NaN."""
    if a != a:
        return b
    if b != b:
        return a
    return a if a OP b else b
'''

_HELPERS = {
    "_fmin": _MIN_MAX.replace("NAME", "min").replace("WHICH", "smaller").replace("OP", "<="),
    "_fmax": _MIN_MAX.replace("NAME", "max").replace("WHICH", "larger").replace("OP", ">="),
    "_cube": '''

def _cube(z):
    """z ** 3 as C's pow(z, 3.0), inf where Python would raise OverflowError (as pretrial's network)."""
    try:
        return math.pow(z, 3.0)
    except OverflowError:
        return math.copysign(math.inf, z)
''',
    "_median": '''

def _median(m):
    """neat-python's median of n >= 3 values: sort (NaN last, as numpy sorts), middle or mean of the two middles."""
    for i in range(1, len(m)):
        key = m[i]
        j = i - 1
        while j >= 0 and (key < m[j] or (m[j] != m[j] and key == key)):
            m[j + 1] = m[j]
            j -= 1
        m[j + 1] = key
    h = len(m) // 2
    return m[h] if len(m) % 2 else (m[h - 1] + m[h]) / 2.0
''',
}


def _docstring(text: str) -> str:
    return text.replace("\\", "\\\\").replace('"""', '\\"\\"\\"')


def _block(lines: list[str], indent: str = "    ") -> str:
    return "".join(f"{indent}{line}\n" for line in lines)


def render(prog: Program, prefix: str, facts: list[str], tolerance: float) -> dict[str, str]:
    """File name -> text of the Python export (golden file excluded)."""
    code = "\n".join(prog.net.lines + prog.scale_inputs.lines + prog.map_outputs.lines)
    helpers = "".join(text for name, text in _HELPERS.items() if name + "(" in code)
    golden = f"{prefix}_golden.txt"
    usage = [
        "",
        "Use (mirrors the C export's pair)::",
        "",
        f"    import {prefix}",
        f"    state = {prefix}.new_state()",
        f"    {prefix}.{prefix}_reset(state)                 # before the first step of every episode",
        f"    action = {prefix}.{prefix}_step(state, obs)    # once per control period",
        "",
        f"``obs`` is a sequence of INPUTS = {prog.inputs} numbers in the observation order above; the result is",
        f"a list of OUTPUTS = {prog.outputs} actions in [-1, 1]. Computes in Python floats (IEEE double).",
        f"``check_golden(path)`` or ``python {prefix}.py [{golden} [TOLERANCE]]`` replays the golden file",
        "and reports the largest absolute difference from pretrial's numpy policy.",
    ]
    doc = _docstring("\n".join(facts + usage).strip("\n"))
    if prog.net.state:
        new_state = f"[[0.0] * {prog.net.state} for _ in range({prog.blocks})]"
        state_doc = (f"One list per block ({prog.blocks}) of the {prog.net.state} node values of the previous step "
                     "(recurrent).")
    else:
        new_state = "[]"
        state_doc = "Feed-forward: the policy keeps no state, so the list stays empty."
    net_args = "v, x" if prog.net.state else "x"
    net_pre = [f"y = [0.0] * {prog.net_outputs}"]
    if prog.net.medians:
        net_pre.append(f"m = [0.0] * {prog.net.medians}")
    calls = []
    for k in range(prog.blocks):
        lo, hi = k * prog.net_inputs, (k + 1) * prog.net_inputs
        x = "x" if prog.blocks == 1 else f"x[{lo}:{hi}]"
        calls.append(f"_net(state[{k}], {x})" if prog.net.state else f"_net({x})")
    kind = ("neat-python RecurrentNetwork: every node from the previous step's values" if prog.net.state
            else "neat-python FeedForwardNetwork")
    return {f"{prefix}.py": f'''"""{doc}
"""

import math

INPUTS = {prog.inputs}
OUTPUTS = {prog.outputs}


def new_state():
    """A fresh state for {prefix}_step. {state_doc}"""
    return {new_state}


def {prefix}_reset(state):
    """Clear the state: call before the first step of every episode."""
    for values in state:
        for i in range(len(values)):
            values[i] = 0.0
{helpers}

def _net({net_args}):
    """One network evaluation, network inputs x -> network outputs ({kind})."""
{_block(net_pre)}{_block(prog.net.lines)}    return y


def {prefix}_step(state, obs):
    """One control period: obs (INPUTS numbers) -> list of OUTPUTS actions in [-1, 1]."""
    if len(obs) != INPUTS:
        raise ValueError(f"expected {{INPUTS}} observation values, got {{len(obs)}}")
    obs = [float(value) for value in obs]
    x = [0.0] * INPUTS
    # network input = (obs - offset) * scale
{_block(prog.scale_inputs.lines)}    y = {" + ".join(calls)}
    action = [0.0] * OUTPUTS
    # action = clip(output * scale + offset, -1, 1)
{_block(prog.map_outputs.lines)}    return action


def check_golden(path="{golden}"):
    """Replay a golden file through {prefix}_step; return (largest absolute difference, steps replayed)."""
    with open(path, encoding="utf-8") as f:
        words = [w for line in f if not line.startswith("#") for w in line.split()]
    head = ["{MAGIC}", "{VERSION}", "inputs", str(INPUTS), "outputs", str(OUTPUTS), "sequences"]
    if words[:7] != head:
        raise ValueError(f"{{path}}: not a golden file of this export (first data line)")
    at, worst, rows, state = 8, 0.0, 0, new_state()
    for _ in range(int(words[7])):
        if words[at : at + 1] != ["steps"]:
            raise ValueError(f"{{path}}: missing 'steps' line (truncated or damaged)")
        steps = int(words[at + 1])
        at += 2
        {prefix}_reset(state)
        for _ in range(steps):
            row = [float(w) for w in words[at : at + INPUTS + OUTPUTS]]
            if len(row) != INPUTS + OUTPUTS:
                raise ValueError(f"{{path}}: truncated")
            at += INPUTS + OUTPUTS
            for got, want in zip({prefix}_step(state, row[:INPUTS]), row[INPUTS:]):
                if got != got or want != want:
                    diff = 0.0 if (got != got and want != want) else math.inf
                else:
                    diff = abs(got - want)
                worst = max(worst, diff)
            rows += 1
    if words[at:] != ["end"]:
        raise ValueError(f"{{path}}: missing 'end' line (truncated or damaged)")
    return worst, rows


if __name__ == "__main__":
    import sys  # the command-line replay only: the controller itself needs math alone

    golden = sys.argv[1] if len(sys.argv) > 1 else "{golden}"
    tolerance = float(sys.argv[2]) if len(sys.argv) > 2 else {tolerance!r}
    worst, rows = check_golden(golden)
    print(f"{{golden}}: {{rows}} steps, largest absolute difference {{worst:.6g}} (tolerance {{tolerance:.3g}})")
    sys.exit(0 if worst <= tolerance else 1)
'''}
