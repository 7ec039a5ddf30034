"""A policy as one dependency-free Python module (the Python half of ``pretrial export``).

The module imports :mod:`math` only and computes in Python floats (IEEE
double), mirroring the C pair: ``INPUTS``, ``OUTPUTS``, ``SAFE_ACTION``, the
fault codes ``OK``, ``FAULT_OBSERVATION``, ``FAULT_OUTPUT``, ``new_state()``,
``PREFIX_reset(state)``, ``PREFIX_step(state, obs, action) -> code`` (as C:
fills ``action``, returns the fault code) or ``PREFIX_step(state, obs) ->
list`` (the earlier form: the action, the code dropped), plus
``check_golden(path)`` and ``python PREFIX.py [GOLDEN [TOLERANCE]]`` to replay
the golden file.
"""

from __future__ import annotations

from pretrial.export.golden import MAGIC, VERSION
from pretrial.export.program import FAULTS, Program, Syntax

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
        f"    action = [0.0] * {prefix}.OUTPUTS",
        f"    code = {prefix}.{prefix}_step(state, obs, action)  # once per control period; 0 or a fault code",
        "",
        f"``obs`` is a sequence of INPUTS = {prog.inputs} numbers in the observation order above; ``action``, a list",
        f"of OUTPUTS = {prog.outputs} numbers, receives the actions in [-1, 1]; the step returns OK (0), or",
        "FAULT_OBSERVATION (1) / FAULT_OUTPUT (2) having written SAFE_ACTION and left the state as it was.",
        f"``action = {prefix}_step(state, obs)`` (no action list) returns a new list instead and drops the code,",
        "as a C caller ignoring the return value: a fault still gives the safe action. Computes in Python floats",
        "(IEEE double).",
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
    faults = "".join(f"{name} = {value}  # {meaning}\n" for name, value, meaning in FAULTS)
    safe = repr(tuple(float(v) for v in prog.safe_action))
    if prog.net.state:
        keep = ["kept = [list(values) for values in state]  # restored if the network output is not finite"]
        restore = ["    for values, old in zip(state, kept):", "        values[:] = old"]
    else:
        keep, restore = [], []
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
#: the action every fault gives (the docstring above says where the values came from)
SAFE_ACTION = {safe}
#: what the step returns: 0, or a fault code (it then writes SAFE_ACTION)
{faults}

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


def {prefix}_step(state, obs, action=None):
    """One control period: obs (INPUTS numbers) -> OUTPUTS actions in [-1, 1].

    With ``action`` (a list of OUTPUTS numbers): fills it and returns OK (0), or FAULT_OBSERVATION (1) for a NaN
    or infinite observation / FAULT_OUTPUT (2) for a NaN or infinite network output, having written SAFE_ACTION
    and left the state as it was before the call. Without: returns a new list of the actions (the code dropped).
    """
    if len(obs) != INPUTS:
        raise ValueError(f"expected {{INPUTS}} observation values, got {{len(obs)}}")
    if action is None:
        action = [0.0] * OUTPUTS
        _step(state, [float(value) for value in obs], action)
        return action
    if len(action) != OUTPUTS:
        raise ValueError(f"expected a list of {{OUTPUTS}} action values, got {{len(action)}}")
    return _step(state, [float(value) for value in obs], action)


def _fault(action, code):
    """A fault: the safe action, and the code for the caller."""
    action[:] = SAFE_ACTION
    return code


def _step(state, obs, action):
    # a NaN or infinite observation: the safe action, the state untouched
    if not all(map(math.isfinite, obs)):
        return _fault(action, FAULT_OBSERVATION)
{_block(keep)}    x = [0.0] * INPUTS
    # network input = (obs - offset) * scale
{_block(prog.scale_inputs.lines)}    y = {" + ".join(calls)}
    # a NaN or infinite network output (overflow): the safe action, the state as before this step
    if not all(map(math.isfinite, y)):
{_block(restore, "    ")}        return _fault(action, FAULT_OUTPUT)
    # action = clip(output * scale + offset, -1, 1)
{_block(prog.map_outputs.lines)}    return OK


def check_golden(path="{golden}"):
    """Replay a golden file through {prefix}_step; return (largest absolute difference, steps replayed).

    A NaN on one side only, or a fault code that differs from the file's, counts as an infinite difference.
    """
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
            if len(row) != INPUTS + OUTPUTS or not words[at + INPUTS + OUTPUTS :]:
                raise ValueError(f"{{path}}: truncated")
            want_code = int(words[at + INPUTS + OUTPUTS])
            at += INPUTS + OUTPUTS + 1
            action = [0.0] * OUTPUTS
            if {prefix}_step(state, row[:INPUTS], action) != want_code:
                worst = math.inf
            for got, want in zip(action, row[INPUTS:]):
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
