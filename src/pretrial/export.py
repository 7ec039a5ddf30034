"""``pretrial export``: a policy as dependency-free C99 or Python for the target, with a golden file.

:func:`export_policy` writes, into one directory:

* ``--to c``: ``PREFIX.h`` and ``PREFIX.c`` (C99, ``<math.h>`` only, no dynamic
  allocation; ``PREFIX_INPUTS``/``PREFIX_OUTPUTS``, ``PREFIX_state``,
  ``PREFIX_reset`` and ``PREFIX_step``), and ``PREFIX_check.c``, which replays
  the golden file on the target's own toolchain;
* ``--to python``: ``PREFIX.py`` (imports :mod:`math` only; ``INPUTS``,
  ``OUTPUTS``, ``new_state``, ``PREFIX_reset``, ``PREFIX_step``,
  ``check_golden``);
* ``PREFIX_golden.txt``: seeded observation sequences and the actions
  :meth:`pretrial.policy.Policy.act` gives for them (:mod:`pretrial.export_golden`).

The exported step computes what ``Policy.act`` computes (input scaling,
network, output mapping with the final clip, each shared block with its own
recurrent state), operation by operation (:mod:`pretrial.export_code`); the
header comment says what the numbers mean on the plant. :func:`step_cost`
gives the operation count and memory as data.
"""

from __future__ import annotations

import argparse
import io as _io
import json
import keyword
import os
import re
import textwrap
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from . import __version__
from .console import CAUTIONS, emit_json, print_cautions, table
from .errors import InputError
from .export_code import Program, Syntax, build_program
from .files import atomic_write_text
from .policy import Policy

TARGETS = ("c", "python")
PRECISIONS = ("double", "float")
DEFAULT_PREFIX = "pretrial_policy"
#: check tolerance (largest absolute action difference) per precision
TOLERANCE = {"double": 1e-12, "float": 1e-5}
#: golden file defaults: sequences, steps per sequence, seed
GOLDEN_SEQUENCES, GOLDEN_STEPS, GOLDEN_SEED = 16, 50, 0

_IDENTIFIER = re.compile(r"[A-Za-z_][A-Za-z0-9_]*\Z")
_C_KEYWORDS = frozenset(
    "auto break case char const continue default do double else enum extern float for goto if inline int long "
    "register restrict return short signed sizeof static struct switch typedef union unsigned void volatile while "
    "_Bool _Complex _Imaginary".split())
#: names the generated files would shadow (they include <math.h>, <stdio.h>, <stdlib.h>; Python imports math)
_SHADOWED = frozenset({"math", "stdio", "stdlib"})

#: the cautions (pretrial.console.CAUTIONS) in the short form the generated files carry
SHORT_CAUTIONS = (
    "CAUTION: generated code is not certified, and simulation margins do not certify safety: the plant",
    "model, its parameters and the disturbances are assumptions. Make first hardware trials restrained:",
    "tether or net, travel limits, reduced power, a tested emergency stop within reach. Drones and cranes",
    "can hurt people: follow local aviation and lifting regulations and licensed practice.",
)


def check_prefix(prefix: Any, flag: str = "prefix") -> str:
    """``prefix`` if it can name the files, macros, struct and functions; InputError naming ``flag`` else."""
    if not isinstance(prefix, str) or not _IDENTIFIER.match(prefix):
        raise InputError(f"{flag} {prefix!r}: not a C identifier (letters, digits and _, not starting with a digit)")
    if prefix in _C_KEYWORDS or keyword.iskeyword(prefix) or prefix in _SHADOWED:
        raise InputError(f"{flag} {prefix!r}: is a C or Python keyword or a standard header/module name; "
                         "choose another")
    return prefix


def _check_choice(value: Any, choices: tuple[str, ...], flag: str) -> str:
    if value not in choices:
        raise InputError(f"{flag} {value!r}: expected one of {', '.join(choices)}")
    return value


def prepare_out_dir(out_dir: str | os.PathLike[str], flag: str = "out_dir") -> Path:
    """Create ``out_dir`` if missing; InputError naming ``flag`` if it is a file or cannot be created."""
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise InputError(f"{flag} {out}: is an existing file, not a directory")
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"{flag} {out}: cannot create the directory ({exc.strerror or exc})") from None
    return out


# --------------------------------------------------------------------------- #
# what the numbers mean on the plant
# --------------------------------------------------------------------------- #
@dataclass(frozen=True)
class EnvFacts:
    """Names, units and physical scaling of a policy's observation and action (from its env)."""

    available: bool
    note: str
    dt: float | None
    obs_names: tuple[str, ...]
    obs_units: tuple[str, ...]
    action_names: tuple[str, ...]
    action_units: tuple[str, ...]
    #: per action channel: physical input at action -1, 0 and +1 (None: unknown), and whether it is linear
    physical: tuple[tuple[float, float, float] | None, ...]
    linear: tuple[bool, ...]
    #: (name, value, unit, trained) of every env parameter
    params: tuple[tuple[str, float, str, bool], ...]


def env_facts(policy: Policy) -> EnvFacts:
    """What the policy's env says about its observation and action.

    Uses :func:`pretrial.generic.make_plant` with the policy's env options:
    names and units from the plant; the physical input at action -1, 0, +1 per
    channel from ``physics.actuate`` on the parameters the policy was trained
    with (the rest nominal); for a plain gymnasium env, its Box action bounds
    as pretrial's generic path maps them. An env that is not installed here
    gives generic names and says so.
    """
    io = policy.io
    n_obs, n_act = io.obs_dim, io.action_dim
    generic = (tuple(f"obs{i}" for i in range(n_obs)), ("?",) * n_obs,
               tuple(f"action{i}" for i in range(n_act)), ("?",) * n_act)
    try:
        from .generic import GymnasiumPlant, make_plant

        plant = make_plant(policy.env_id, **policy.env_options)
    except (InputError, ValueError, TypeError, ImportError) as exc:
        msg = exc.message if isinstance(exc, InputError) else str(exc)
        return EnvFacts(False, f"the env could not be built here ({' '.join(msg.split())}): names, units and "
                        "physical scaling are unknown", None, *generic, (None,) * n_act, (False,) * n_act, ())
    if (plant.obs_dim, plant.action_dim) != (n_obs, n_act):
        raise InputError(f"{policy.env_id}: the env has {plant.obs_dim} observations and {plant.action_dim} actions, "
                         f"the policy maps {n_obs} and {n_act}; it was not trained on this env configuration")
    try:
        values = plant.param_table.resolve(policy.env_params)
    except ValueError as exc:
        raise InputError(f"{policy.env_id}: policy env params: {exc}") from None
    params = tuple((s.name, float(v), s.unit, s.name in policy.env_params) for s, v in zip(plant.param_table, values))
    levels = np.array([-1.0, 0.0, 1.0, 0.5])[:, None] * np.ones((1, n_act))
    note = ""
    if isinstance(plant, GymnasiumPlant):
        import gymnasium as gym

        env = gym.make(plant.env_id, **plant.make_kwargs)
        low = np.broadcast_to(env.action_space.low.astype(float).reshape(-1), (n_act,))
        high = np.broadcast_to(env.action_space.high.astype(float).reshape(-1), (n_act,))
        env.close()
        force = low + (levels + 1.0) * 0.5 * (high - low)
        note = "plain gymnasium env: physical action = low + (action + 1) / 2 * (high - low) of its Box"
    else:
        force = np.asarray(plant.actuate(levels, np.tile(values, (len(levels), 1))), dtype=float)
    physical = tuple((float(force[0, k]), float(force[1, k]), float(force[2, k])) for k in range(n_act))
    linear = tuple(bool(np.isclose(force[1, k], (force[0, k] + force[2, k]) / 2, rtol=1e-12, atol=1e-12)
                        and np.isclose(force[3, k], (force[1, k] + force[2, k]) / 2, rtol=1e-12, atol=1e-12))
                   for k in range(n_act))
    return EnvFacts(True, note, float(plant.dt), tuple(plant.obs_names), tuple(plant.obs_units),
                    tuple(plant.action_names), tuple(plant.action_units), physical, linear, params)


def _count(n: int, word: str, plural: str = "") -> str:
    return f"{n} {word}" if n == 1 else f"{n} {plural or word + 's'}"


def _num(x: float) -> str:
    return f"{x:.6g}"


def _table_lines(headers: list[str], rows: list[list[str]]) -> list[str]:
    buf = _io.StringIO()
    table(headers, rows, out=buf)
    return ["  " + line.rstrip() for line in buf.getvalue().splitlines()]


def describe_ops(prog: Program) -> str:
    o = prog.ops
    kinds = ", ".join(f"{k} x{v}" for k, v in sorted(o.activation_kinds.items()))
    return (f"{_count(o.multiplies, 'multiply', 'multiplies')}, {_count(o.divisions, 'division')}, "
            f"{_count(o.adds, 'add/subtract', 'adds/subtracts')}, {_count(o.comparisons, 'comparison')}, "
            f"{_count(o.activations, 'activation function call')} ({kinds or 'none'}), "
            f"{_count(o.math_calls, 'math library call')}")


def describe_memory(prog: Program, real_bytes: int) -> str:
    m = prog.memory_bytes
    state = f"{m['state']} bytes of state" if prog.net.state else "no state (a 1-byte placeholder)"
    return (f"{m['constants']} bytes of constants ({m['constants'] // real_bytes} distinct literals of "
            f"{real_bytes} bytes), {state}, about {m['stack']} bytes of stack locals")


def header_facts(policy: Policy, prog: Program, facts: EnvFacts, target: str, precision: str,
                 prefix: str) -> list[str]:
    """The comment at the top of the generated code: provenance, plant meaning, cost, cautions."""
    io, spec = policy.io, policy.network.spec
    up = prefix.upper()
    sizes = (f"{up}_INPUTS", f"{up}_OUTPUTS") if target == "c" else ("INPUTS", "OUTPUTS")
    real = {"c": precision, "python": "Python float (IEEE double)"}[target]
    lines = [
        f"NEAT controller exported by pretrial {__version__} (`pretrial export --to {target}`), computing in {real}.",
        "",
        *SHORT_CAUTIONS,
        "",
        f"Policy content sha256: {policy.content_hash}",
        f"Trained on: {policy.env_id}" + (f" (control period dt = {facts.dt:g} s: call the step once per period)"
                                          if facts.dt else ""),
        f"  env options: {json.dumps(policy.env_options, sort_keys=True)}",
    ]
    if facts.params:
        lines.append("  env parameters (* = the value it was trained with, else nominal):")
        lines += _table_lines(["name", "value", "unit", ""],
                              [[n, _num(v), u, "*" if trained else ""] for n, v, u, trained in facts.params])
    else:
        lines.append(f"  env params: {json.dumps(policy.env_params, sort_keys=True)}")
    if facts.note:
        lines.append(f"  note: {facts.note}")
    kind = "feed-forward" if spec.feed_forward else "recurrent"
    lines += [
        "",
        f"Network: {kind} (neat-python {'FeedForward' if spec.feed_forward else 'Recurrent'}Network), "
        f"{_count(spec.num_inputs, 'input')} -> {_count(spec.num_outputs, 'output')}, "
        f"{_count(len(spec.node_keys), 'evaluated node')}, {_count(len(spec.edge_node), 'connection')}.",
    ]
    if io.blocks > 1:
        lines.append(f"Layout shared_blocks: the one network drives each of {io.blocks} blocks of "
                     f"{io.num_inputs} observations -> {io.num_outputs} actions, each block with its own state.")
    lines += ["", f"Observation obs[{sizes[0]} = {io.obs_dim}], in this order; network input = (obs - offset) * scale:"]
    lines += _table_lines(["#", "name", "unit", "offset", "scale"],
                          [[str(i), facts.obs_names[i], facts.obs_units[i], _num(io.obs_offset[i]),
                            _num(io.obs_scale[i])] for i in range(io.obs_dim)])
    lines += ["", f"Action action[{sizes[1]} = {io.action_dim}], in this order, each in [-1, 1]; "
              "action = clip(output * scale + offset, -1, 1):"]
    rows = []
    for k in range(io.action_dim):
        phys = facts.physical[k]
        unit = facts.action_units[k]
        if phys is None:
            shown = "unknown"
        else:
            shown = " / ".join(_num(v) for v in phys) + ("" if unit in ("-", "?") else f" {unit}") \
                + (" (linear)" if facts.linear[k] else " (not linear)")
        rows.append([str(k), facts.action_names[k], unit, _num(io.action_scale[k]), _num(io.action_offset[k]), shown])
    lines += _table_lines(["#", "name", "unit", "scale", "offset", "physical at -1 / 0 / +1"], rows)
    lines += [
        "",
        f"Per step (worst case over branches): {describe_ops(prog)}.",
        f"Memory: {describe_memory(prog, 8 if precision == 'double' else 4)}.",
    ]
    lines = [wrapped for line in lines for wrapped in
             ([line] if len(line) <= 110 else textwrap.wrap(line, 110, subsequent_indent="  ", break_on_hyphens=False))]
    if target == "c":
        lines += [
            "",
            "Use:",
            f"  {prefix}_state s;",
            f"  {prefix}_reset(&s);              before the first step of every episode",
            f"  {prefix}_step(&s, obs, action);  once per control period",
            "Build as plain C99 with <math.h> (link -lm). For last-bit agreement with pretrial keep floating-point",
            "contraction off (-std=c99 does in GCC; or -ffp-contract=off) and no -ffast-math.",
            f"{prefix}_check.c replays {prefix}_golden.txt through this code on the target's toolchain.",
        ]
    return lines


# --------------------------------------------------------------------------- #
# the entry points
# --------------------------------------------------------------------------- #
@dataclass(frozen=True)
class StepCost:
    """What one exported step costs: ``operations`` (see :class:`pretrial.export_code.Ops`) and ``memory_bytes``
    (``constants``, ``state``, ``stack``)."""

    operations: dict[str, Any]
    memory_bytes: dict[str, int]


def _syntax(to: str, precision: str, prefix: str) -> Syntax:
    if to == "c":
        from .export_c import CSyntax

        return CSyntax(precision, prefix)
    from .export_python import PythonSyntax

    return PythonSyntax()


def _checked(to: str, precision: str, prefix: str) -> None:
    _check_choice(to, TARGETS, "--to")
    _check_choice(precision, PRECISIONS, "--precision")
    check_prefix(prefix, "--prefix")
    if to == "python" and precision != "double":
        raise InputError(f"--precision {precision}: the Python export computes in Python floats (double); "
                         "use --to c for float")


def step_cost(policy: Policy, to: str = "c", precision: str = "double") -> StepCost:
    """Operation count and memory of one exported step of ``policy`` (language-independent but for sizes)."""
    _checked(to, precision, DEFAULT_PREFIX)
    prog = build_program(policy, _syntax(to, precision, DEFAULT_PREFIX))
    return StepCost(prog.ops.as_dict(), dict(prog.memory_bytes))


def export_policy(policy: Policy, to: str, out_dir: str | os.PathLike[str], precision: str = "double",
                  prefix: str = DEFAULT_PREFIX, *, sequences: int = GOLDEN_SEQUENCES, steps: int = GOLDEN_STEPS,
                  seed: int = GOLDEN_SEED) -> list[Path]:
    """Write ``policy`` as C99 or Python plus its golden file into ``out_dir``.

    Parameters
    ----------
    policy : Policy
    to : {"c", "python"}
    out_dir : path-like
        Created if missing; an existing file is refused.
    precision : {"double", "float"}
        The C real type (Python computes in double only).
    prefix : str
        A C identifier naming the files, macros, struct and functions.
    sequences, steps, seed : int
        Golden file: observation sequences, steps per sequence, random seed.

    Returns
    -------
    list of Path
        The files written (each atomically), code first, golden file last.

    Raises
    ------
    InputError
        Bad ``to``/``precision``/``prefix``/``out_dir``, a constant out of the
        float range, or an env that does not fit the policy.
    """
    return _export(policy, to, out_dir, precision, prefix, sequences, steps, seed)[0]


def _export(policy: Policy, to: str, out_dir: str | os.PathLike[str], precision: str, prefix: str, sequences: int,
            steps: int, seed: int) -> tuple[list[Path], Program]:
    _checked(to, precision, prefix)
    if min(sequences, steps) < 1:
        raise InputError(f"golden file: sequences {sequences} and steps {steps} must be >= 1")
    syntax = _syntax(to, precision, prefix)
    prog = build_program(policy, syntax)
    facts = header_facts(policy, prog, env_facts(policy), to, precision, prefix)
    out = prepare_out_dir(out_dir)
    tolerance = TOLERANCE[precision]
    if to == "c":
        from .export_c import render

        provenance = f"pretrial {__version__} from policy {policy.content_hash[:16]}"
        files = render(prog, prefix, precision, syntax, facts, provenance, tolerance)  # type: ignore[arg-type]
    else:
        from .export_python import render as render_python

        files = render_python(prog, prefix, facts, tolerance)
    from .export_golden import golden_actions, golden_observations, write_golden

    obs = golden_observations(policy, sequences, steps, seed, float32=precision == "float")
    about = [f"Policy content sha256: {policy.content_hash} ({policy.env_id}); export {prefix} "
             f"--to {to} --precision {precision}.",
             f"{sequences} sequences x {steps} steps, numpy default_rng seed {seed}"
             + ("; observations rounded to float (the export's precision)." if precision == "float" else ".")]
    written = []
    for name, text in files.items():
        atomic_write_text(out / name, text)
        written.append(out / name)
    golden = out / f"{prefix}_golden.txt"
    write_golden(golden, obs, golden_actions(policy, obs), about)
    written.append(golden)
    return written, prog


def check_command(to: str, prefix: str, out_dir: Path) -> str:
    """The shell command that builds and runs the check on the export in ``out_dir``."""
    where = f"cd {out_dir} && "
    if to == "c":
        return (f"{where}cc -std=c99 -O2 -o {prefix}_check {prefix}_check.c {prefix}.c -lm && "
                f"./{prefix}_check {prefix}_golden.txt")
    return f"{where}python3 {prefix}.py {prefix}_golden.txt"


def configure_cli(parser: argparse.ArgumentParser) -> None:
    """Arguments of ``pretrial export``."""
    parser.add_argument("policy", help="policy file (champion.json) or run directory")
    parser.add_argument("--to", required=True, choices=TARGETS, help="target language: c (C99) or python")
    parser.add_argument("--out", required=True, metavar="DIR", help="output directory (created if missing)")
    parser.add_argument("--precision", choices=PRECISIONS, default="double",
                        help="C real type (default double; the Python export computes in double)")
    parser.add_argument("--prefix", default=DEFAULT_PREFIX, metavar="NAME",
                        help=f"C identifier naming files, macros, struct and functions (default {DEFAULT_PREFIX})")
    parser.add_argument("--json", action="store_true", help="print one JSON object instead of text")


def run_cli(args: argparse.Namespace) -> int:
    """Run ``pretrial export``."""
    from .policy import open_policy

    _checked(args.to, args.precision, args.prefix)
    policy = open_policy(args.policy)
    prepare_out_dir(args.out, "--out")
    files, prog = _export(policy, args.to, args.out, args.precision, args.prefix, GOLDEN_SEQUENCES, GOLDEN_STEPS,
                          GOLDEN_SEED)
    if args.json:
        emit_json({"files": [str(f) for f in files], "operations": prog.ops.as_dict(),
                   "memory_bytes": dict(prog.memory_bytes), "content_sha256": policy.content_hash,
                   "cautions": list(CAUTIONS)})
        return 0
    lang = f"C99 ({args.precision})" if args.to == "c" else "Python"
    print(f"exported policy {policy.content_hash[:16]} ({policy.env_id}) as {lang} to {args.out}:")
    for f in files:
        print(f"  {f}")
    print(f"per step: {describe_ops(prog)}")
    print(f"memory: {describe_memory(prog, 8 if args.precision == 'double' else 4)}")
    print("check on the target's toolchain:")
    print(f"  {check_command(args.to, args.prefix, Path(args.out))}")
    print_cautions()
    return 0
