"""A policy as C99: one header, one source and a check program (the C half of ``pretrial export``).

The source needs ``<math.h>`` only and allocates nothing; the check program
replays the golden file (:mod:`pretrial.export.golden`) with ``<stdio.h>``,
``<stdlib.h>`` and ``<math.h>``. Both compile clean with
``-std=c99 -pedantic-errors -Wall -Wextra -Werror``.
"""

from __future__ import annotations

import numpy as np

from pretrial.errors import InputError
from pretrial.export.golden import MAGIC, VERSION
from pretrial.export.program import FAULTS, NetPiece, Program, Syntax
from pretrial.version import __version__

_FLOAT_FUNCTIONS = ("exp", "tanh", "sin", "log", "fabs", "fmin", "fmax", "pow")


class CSyntax(Syntax):
    """C99 spelling, in ``double`` or ``float``."""

    def __init__(self, precision: str, prefix: str):
        self.precision = precision
        self.prefix = prefix
        self.real = precision
        self.real_bytes = 8 if precision == "double" else 4
        self._suffix = "" if precision == "double" else "f"

    def round(self, value: float) -> float:
        if self.precision == "double":
            return float(value)
        with np.errstate(over="ignore"):
            v = np.float32(value)
        if not np.isfinite(v):
            raise InputError(f"--precision float: the policy's constant {value!r} exceeds the float range "
                             "(export with --precision double)")
        return float(v)

    def literal(self, value: float) -> str:
        if self.precision == "double":
            return repr(value)  # shortest text that reads back as exactly this double
        return f"{np.float32(value)}f"  # numpy's shortest text that reads back as exactly this float

    def function(self, name: str) -> str:
        return name + self._suffix if name in _FLOAT_FUNCTIONS else name

    def cube(self, z: str) -> str:
        return f"{self.function('pow')}({z}, {self.literal(3.0)})"

    def median(self, array: str, n: int) -> str:
        return f"{self.prefix}_median({array}, {n})"

    def ternary(self, cond: str, a: str, b: str) -> str:
        return f"{cond} ? {a} : {b}"

    def assign(self, target: str, expr: str) -> list[str]:
        return [f"{target} = {expr};"]

    def assign_if(self, cond: str, target: str, expr: str) -> list[str]:
        return [f"if ({cond}) {target} = {expr};"]

    def comment(self, text: str) -> str:
        return f"/* {safe_comment(text)} */"


def safe_comment(text: str) -> str:
    """``text`` that cannot end a C comment or break a line."""
    return " ".join(text.replace("*/", "* /").replace("/*", "/ *").split())


def _comment_block(lines: list[str]) -> str:
    # keep the spacing of tables; only what could end the comment or break a line goes
    clean = [" ".join(line.replace("*/", "* /").replace("/*", "/ *").splitlines()).rstrip() for line in lines]
    body = "\n".join(f" * {line}" if line else " *" for line in clean)
    return f"/*\n{body}\n */\n"


def _declare(real: str, names: list[str], width: int = 100) -> list[str]:
    """``real a, b, c;`` wrapped to ``width`` characters."""
    out, line = [], ""
    for name in names:
        if line and len(line) + len(name) + 2 > width:
            out.append(line + ";")
            line = ""
        line = f"{line}, {name}" if line else f"{real} {name}"
    if line:
        out.append(line + ";")
    return out


def _body(lines: list[str], indent: str = "    ") -> str:
    return "".join(f"{indent}{line}\n" for line in lines)


def _fault_macros(up: str) -> str:
    return "".join(f"#define {up}_{name} {value} /* {meaning} */\n" for name, value, meaning in FAULTS)


def render_header(prog: Program, prefix: str, precision: str, facts: list[str]) -> str:
    """``PREFIX.h``: the facts as a comment block, the size macros, the state struct, the safe action and the pair."""
    up = prefix.upper()
    real = precision
    codes = ", ".join(f"{up}_{name} ({value})" for name, value, _ in FAULTS[1:])
    if prog.net.state:
        state = (f"/* Recurrent state: each block's node values from the previous step ({prog.blocks} block(s) x "
                 f"{prog.net.state} values, evaluation order). */\n"
                 f"typedef struct {prefix}_state {{\n    {real} node[{prog.blocks}][{prog.net.state}];\n}} "
                 f"{prefix}_state;\n")
    else:
        state = ("/* Feed-forward: the policy keeps no state; C99 has no empty struct, hence a placeholder. */\n"
                 f"typedef struct {prefix}_state {{\n    char unused;\n}} {prefix}_state;\n")
    return (
        _comment_block(facts)
        + f"#ifndef {up}_H\n#define {up}_H\n\n"
        + "#ifdef __cplusplus\nextern \"C\" {\n#endif\n\n"
        + f"#define {up}_INPUTS {prog.inputs} /* env observation values per step (the whole vector) */\n"
        + f"#define {up}_OUTPUTS {prog.outputs} /* env action values per step (whole vector), in [-1, 1] */\n\n"
        + f"typedef {real} {prefix}_real; /* the real type of this export */\n\n"
        + state
        + "\n/* Clear the state: call before the first step of every episode. */\n"
        + f"void {prefix}_reset({prefix}_state *s);\n\n"
        + "/* What the step returns: 0, or a fault code (it then writes the safe action). */\n"
        + _fault_macros(up)
        + "\n/* The action every fault gives (the comment at the top says where the values came from). */\n"
        + f"extern const {real} {prefix}_safe_action[{up}_OUTPUTS];\n\n"
        + f"/* One control period: obs[{up}_INPUTS] in the order above -> action[{up}_OUTPUTS] in [-1, 1].\n"
        + f" * Returns {up}_OK (0); or {codes}, having written\n"
        + f" * {prefix}_safe_action to action and left the state as it was before the call. */\n"
        + f"int {prefix}_step({prefix}_state *s, const {real} *obs, {real} *action);\n\n"
        + "#ifdef __cplusplus\n}\n#endif\n\n"
        + f"#endif /* {up}_H */\n"
    )


def _median_helper(prefix: str, real: str, syntax: CSyntax) -> str:
    return (
        "/* neat-python's median of n >= 3 values (neat.math_util.median2): sort, NaN last as numpy sorts,\n"
        " * then the middle value or the mean of the two middle ones. Sorts m in place. */\n"
        f"static {real} {prefix}_median({real} *m, int n)\n"
        "{\n"
        "    int i, j;\n"
        f"    {real} key;\n"
        "    for (i = 1; i < n; i++) {\n"
        "        key = m[i];\n"
        "        for (j = i - 1; j >= 0 && (key < m[j] || (isnan(m[j]) && !isnan(key))); j--)\n"
        "            m[j + 1] = m[j];\n"
        "        m[j + 1] = key;\n"
        "    }\n"
        f"    return n % 2 ? m[n / 2] : (m[n / 2 - 1] + m[n / 2]) / {syntax.literal(2.0)};\n"
        "}\n\n"
    )


def _net_function(net: NetPiece, prefix: str, real: str) -> str:
    params = (f"{real} *v, " if net.state else "") + f"const {real} *x, {real} *y"
    decl = _declare(real, net.scalars)
    if net.medians:
        decl.append(f"{real} m[{net.medians}];")
    if not net.reads_inputs:
        decl.append("(void)x; /* no node reads an input */")
    kind = ("neat-python RecurrentNetwork: every node from the previous step's values" if net.state
            else "neat-python FeedForwardNetwork")
    return (f"/* One network evaluation, network inputs x -> network outputs y ({kind}). */\n"
            + f"static void {prefix}_net({params})\n{{\n" + _body(decl) + ("\n" if decl else "")
            + _body(net.lines) + "}\n\n")


def _fault_function(prog: Program, prefix: str, real: str, syntax: CSyntax) -> str:
    """The safe-action table and the function every fault exit returns through."""
    up = prefix.upper()
    values = ",\n".join(f"    {syntax.literal(v)}" for v in prog.safe_action)
    return (f"const {real} {prefix}_safe_action[{up}_OUTPUTS] = {{\n{values}\n}};\n\n"
            "/* A fault: the safe action, and the code for the caller. */\n"
            f"static int {prefix}_fault({real} *action, int code)\n{{\n"
            "    int i;\n"
            f"    for (i = 0; i < {up}_OUTPUTS; i++)\n"
            f"        action[i] = {prefix}_safe_action[i];\n"
            "    return code;\n}\n\n")


def _guards(prog: Program, prefix: str) -> tuple[list[str], list[str]]:
    """The step's two fault checks: before the network (observations) and after it (network outputs)."""
    up = prefix.upper()
    before = ["/* a NaN or infinite observation: the safe action, the state untouched */",
              f"for (i = 0; i < {up}_INPUTS; i++)",
              "    if (!isfinite(obs[i]))",
              f"        return {prefix}_fault(action, {up}_FAULT_OBSERVATION);"]
    restore = []
    if prog.net.state:
        before.append("kept = *s; /* restored if the network output is not finite: NaN must not enter the state */")
        restore = ["        *s = kept;"]
    after = ["/* a NaN or infinite network output (overflow): the safe action, the state as before this step */",
             f"for (i = 0; i < {up}_OUTPUTS; i++)",
             "    if (!isfinite(y[i])) {", *restore,
             f"        return {prefix}_fault(action, {up}_FAULT_OUTPUT);",
             "    }"]
    return before, after


def render_source(prog: Program, prefix: str, precision: str, syntax: CSyntax, provenance: str) -> str:
    """``PREFIX.c``: the network function, the safe action and the reset/step pair."""
    up = prefix.upper()
    real = precision
    zero = syntax.literal(0.0)
    if prog.net.state:
        reset = ("    int b, i;\n"
                 f"    for (b = 0; b < {prog.blocks}; b++)\n"
                 f"        for (i = 0; i < {prog.net.state}; i++)\n"
                 f"            s->node[b][i] = {zero};\n")
    else:
        reset = "    s->unused = 0;\n"
    calls = []
    for k in range(prog.blocks):
        x = "x" if k == 0 else f"x + {k * prog.net_inputs}"
        y = "y" if k == 0 else f"y + {k * prog.net_outputs}"
        state = f"s->node[{k}], " if prog.net.state else ""
        note = f" /* block {k} */" if prog.blocks > 1 else ""
        calls.append(f"{prefix}_net({state}{x}, {y});{note}")
    locals_ = [f"{real} x[{prog.inputs}]; /* network inputs */", f"{real} y[{prog.outputs}]; /* network outputs */"]
    locals_ += _declare(real, prog.map_outputs.scalars)
    if prog.net.state:
        locals_.append(f"{prefix}_state kept; /* the state before this step */")
    locals_.append("int i;")
    if not prog.net.state:
        locals_.append("(void)s; /* feed-forward: nothing to keep */")
    guard_in, guard_out = _guards(prog, prefix)
    return (
        f"/* {prefix}.c: generated by {provenance}; {prefix}.h says what it computes.\n"
        f" * Export again rather than edit: {prefix}_golden.txt checks exactly this arithmetic. */\n"
        "#include <math.h>\n\n"
        f"#include \"{prefix}.h\"\n\n"
        "/* Every product that feeds a sum is its own statement, so C99 contraction (within an expression)\n"
        " * cannot fuse a multiply-add; GCC in a -std=c99 mode and clang with this pragma do not fuse\n"
        " * across statements either. */\n"
        "#if defined(__clang__)\n#pragma STDC FP_CONTRACT OFF\n#endif\n\n"
        + (_median_helper(prefix, real, syntax) if prog.net.medians else "")
        + _net_function(prog.net, prefix, real)
        + _fault_function(prog, prefix, real, syntax)
        + f"void {prefix}_reset({prefix}_state *s)\n{{\n{reset}}}\n\n"
        + f"int {prefix}_step({prefix}_state *s, const {real} *obs, {real} *action)\n{{\n"
        + _body(locals_) + "\n"
        + _body(guard_in)
        + _body(["/* network input = (obs - offset) * scale */", *prog.scale_inputs.lines])
        + _body(calls)
        + _body(guard_out)
        + _body(["/* action = clip(output * scale + offset, -1, 1) */", *prog.map_outputs.lines])
        + f"    return {up}_OK;\n"
        + "}\n"
    )


def render_check(prefix: str, precision: str, tolerance: float) -> str:
    """``PREFIX_check.c``: replays the golden file through the step function."""
    up = prefix.upper()
    golden = f"{prefix}_golden.txt"
    return f"""/* {prefix}_check.c: generated by pretrial {__version__}; replays {golden} through {prefix}_step
 * and compares each action and fault code with the ones pretrial computed for the same observations
 * (its numpy policy; the safe action and the code where an observation or network output is not finite).
 *
 * Build and run with the target's toolchain (plain C99: stdio, stdlib and math only), e.g.
 *   cc -std=c99 -O2 -o {prefix}_check {prefix}_check.c {prefix}.c -lm
 *   ./{prefix}_check [GOLDEN_FILE [TOLERANCE]]
 * GOLDEN_FILE defaults to {golden}; TOLERANCE, the largest absolute difference allowed, to {tolerance!r}
 * (this export computes in {precision}). Prints the largest absolute difference. Exit status: 0 within
 * the tolerance, 1 above it (a NaN on one side only, or a fault code that differs, counts as an infinite
 * difference), 2 if the file cannot be read or does not fit this export.
 */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>

#include "{prefix}.h"

static int fail(FILE *f, const char *path, const char *what)
{{
    if (f != NULL)
        fclose(f);
    fprintf(stderr, "%s: %s\\n", path, what);
    return 2;
}}

int main(int argc, char **argv)
{{
    const char *path = argc > 1 ? argv[1] : "{golden}";
    double tolerance = {tolerance!r};
    double value, diff, worst = 0.0;
    {prefix}_real obs[{up}_INPUTS], action[{up}_OUTPUTS];
    {prefix}_state state;
    int c, version, inputs, outputs, sequences, steps, q, t, i, code, want, tail = 0;
    int worst_q = -1, worst_t = -1, worst_i = -1, code_q = -1, code_t = -1, code_got = 0, code_want = 0;
    long rows = 0, faults = 0, code_diffs = 0;
    char *end;
    FILE *f;

    if (argc > 2) {{
        tolerance = strtod(argv[2], &end);
        if (end == argv[2] || *end != '\\0' || !(tolerance >= 0.0)) {{
            fprintf(stderr, "tolerance %s: expected a number >= 0\\n", argv[2]);
            return 2;
        }}
    }}
    f = fopen(path, "r");
    if (f == NULL)
        return fail(NULL, path, "cannot open");
    /* the header lines start with '#' */
    while ((c = fgetc(f)) == '#')
        while ((c = fgetc(f)) != '\\n' && c != EOF) {{
        }}
    if (c == EOF)
        return fail(f, path, "no data after the header");
    ungetc(c, f);
    if (fscanf(f, " {MAGIC} %d inputs %d outputs %d sequences %d", &version, &inputs, &outputs, &sequences) != 4)
        return fail(f, path, "not a pretrial golden file (bad first data line)");
    if (version != {VERSION})
        return fail(f, path, "golden file format version is not {VERSION}");
    if (inputs != {up}_INPUTS || outputs != {up}_OUTPUTS)
        return fail(f, path, "observation/action sizes differ from this export's");
    for (q = 0; q < sequences; q++) {{
        if (fscanf(f, " steps %d", &steps) != 1 || steps < 0)
            return fail(f, path, "missing or bad 'steps' line (truncated or damaged)");
        {prefix}_reset(&state);
        for (t = 0; t < steps; t++) {{
            for (i = 0; i < {up}_INPUTS; i++) {{
                if (fscanf(f, "%lf", &value) != 1)
                    return fail(f, path, "missing or bad observation value (truncated or damaged)");
                obs[i] = ({prefix}_real)value;
            }}
            code = {prefix}_step(&state, obs, action);
            for (i = 0; i < {up}_OUTPUTS; i++) {{
                if (fscanf(f, "%lf", &value) != 1)
                    return fail(f, path, "missing or bad action value (truncated or damaged)");
                if (isnan(value) || isnan(action[i]))
                    diff = isnan(value) && isnan(action[i]) ? 0.0 : HUGE_VAL;
                else
                    diff = fabs((double)action[i] - value);
                if (diff > worst) {{
                    worst = diff;
                    worst_q = q;
                    worst_t = t;
                    worst_i = i;
                }}
            }}
            if (fscanf(f, "%d", &want) != 1)
                return fail(f, path, "missing or bad fault code (truncated or damaged)");
            faults += want != 0;
            if (code != want) {{
                if (code_diffs++ == 0) {{
                    code_q = q;
                    code_t = t;
                    code_got = code;
                    code_want = want;
                }}
                worst = HUGE_VAL;
            }}
            rows++;
        }}
    }}
    if (fscanf(f, " end%n", &tail) == EOF || tail == 0)
        return fail(f, path, "missing 'end' line (truncated or damaged)");
    fclose(f);
    printf("%s: %ld steps in %d sequences (%ld with a fault code), largest absolute difference %.6g "
           "(tolerance %.3g)", path, rows, sequences, faults, worst, tolerance);
    if (worst_q >= 0 && code_diffs == 0)
        printf(" at sequence %d step %d action %d", worst_q, worst_t, worst_i);
    printf("\\n");
    if (code_diffs > 0)
        printf("fault code differs on %ld steps, first at sequence %d step %d: returned %d, golden file %d\\n",
               code_diffs, code_q, code_t, code_got, code_want);
    if (worst > tolerance) {{
        printf("FAILED: the exported step does not reproduce the golden actions\\n");
        return 1;
    }}
    printf("ok\\n");
    return 0;
}}
"""


def render(prog: Program, prefix: str, precision: str, syntax: CSyntax, facts: list[str], provenance: str,
           tolerance: float) -> dict[str, str]:
    """File name -> text of the C export (golden file excluded)."""
    return {
        f"{prefix}.h": render_header(prog, prefix, precision, facts),
        f"{prefix}.c": render_source(prog, prefix, precision, syntax, provenance),
        f"{prefix}_check.c": render_check(prefix, precision, tolerance),
    }

