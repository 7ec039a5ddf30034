"""``pretrial export``: a policy as dependency-free C99 or Python for the target, with a golden file.

:func:`export_policy` writes, into one directory:

* ``--to c``: ``PREFIX.h`` and ``PREFIX.c`` (C99, ``<math.h>`` only, no dynamic
  allocation; ``PREFIX_INPUTS``/``PREFIX_OUTPUTS``, ``PREFIX_state``,
  ``PREFIX_reset``, ``int PREFIX_step`` and ``PREFIX_safe_action``), and
  ``PREFIX_check.c``, which replays the golden file on the target's own toolchain;
* ``--to python``: ``PREFIX.py`` (imports :mod:`math` only; ``INPUTS``,
  ``OUTPUTS``, ``SAFE_ACTION``, the fault codes, ``new_state``,
  ``PREFIX_reset``, ``PREFIX_step``, ``check_golden``);
* ``PREFIX_golden.txt``: seeded observation sequences, the actions
  :meth:`pretrial.controller.policy.Policy.act` gives for them, and fault sequences
  (NaN, +inf, -inf) with the safe action and code (:mod:`pretrial.export.golden`).

The exported step computes what ``Policy.act`` computes (input scaling,
network, output mapping with the final clip, each shared block with its own
recurrent state), operation by operation (:mod:`pretrial.export.program`), and
returns 0. On bad input it returns a fault code instead and writes the safe
action: 1 if an observation value is NaN or infinite, 2 if a network output
is (overflow); the recurrent state stays as it was before the call. The safe
action is the env's (:meth:`pretrial_envs.core.Physics.safe_action`: zero
command, hover thrust for the drones) unless the caller gives one. The header
comment says what the numbers mean on the plant. :func:`step_cost` gives the
operation count and memory as data.
"""

from __future__ import annotations

import io as _io
import json
import keyword
import os
import re
import textwrap
from dataclasses import dataclass
from pathlib import Path
from typing import Any, NamedTuple

import numpy as np

from pretrial.console import table
from pretrial.controller.policy import Policy
from pretrial.errors import InputError
from pretrial.export.program import FAULTS, Program, Syntax, build_program
from pretrial.files import atomic_write_text, check_creatable
from pretrial.version import __version__

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


#: longest prefix: ``PREFIX_reset`` must fit the 31 significant initial characters C99 (5.2.4.1)
#: guarantees for external identifiers
MAX_PREFIX = 31 - len("_reset")


def check_prefix(prefix: Any, flag: str = "prefix") -> str:
    """``prefix`` if it can name the files, macros, struct and functions; InputError naming ``flag`` else."""
    if not isinstance(prefix, str) or not _IDENTIFIER.match(prefix):
        raise InputError(f"{flag} {prefix!r}: not a C identifier (letters, digits and _, not starting with a digit)")
    if prefix in _C_KEYWORDS or keyword.iskeyword(prefix) or prefix in _SHADOWED:
        raise InputError(f"{flag} {prefix!r}: is a C or Python keyword or a standard header/module name; "
                         "choose another")
    if len(prefix) > MAX_PREFIX:
        raise InputError(f"{flag} {prefix[:12]!r}... is {len(prefix)} characters; at most {MAX_PREFIX}, so the "
                         f"functions {prefix[:4]}..._reset and _step stay within the 31 significant characters C99 "
                         "guarantees for external names (5.2.4.1)")
    return prefix


def _check_choice(value: Any, choices: tuple[str, ...], flag: str) -> str:
    if value not in choices:
        raise InputError(f"{flag} {value!r}: expected one of {', '.join(choices)}")
    return value


#: Phrases one of the first lines of every exported file carries: a file holding none of them was not
#: written by an export and is never overwritten.
_EXPORT_MARKS = (b"exported by pretrial", b"generated by pretrial", b"pretrial golden file")


def prepare_out_dir(out_dir: str | os.PathLike[str], flag: str = "out_dir") -> Path:
    """Check that ``out_dir`` can be created or written; InputError naming ``flag`` if not.

    Nothing is created here: the directory appears only when the files are written.
    """
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise InputError(f"{flag} {out}: is an existing file, not a directory")
    check_creatable(out, f"{flag} {out}")
    return out


def _refuse_foreign_files(out: Path, names: list[str], flag: str) -> None:
    """Refuse to replace a file an export did not write (a hand-edited copy, a user's own code)."""
    for name in names:
        path = out / name
        if not path.exists():
            continue
        if path.is_dir():
            raise InputError(f"{flag} {path}: is a directory where the export writes a file")
        try:
            with open(path, "rb") as f:
                head = f.read(512)
        except OSError as exc:
            raise InputError(f"{flag} {path}: cannot read the existing file ({exc.strerror})") from None
        if not any(mark in head for mark in _EXPORT_MARKS):
            raise InputError(f"{flag} {path}: exists and was not written by pretrial export; move it or choose "
                             "another directory (nothing was written)")


def _write_export(out: Path, files: dict[str, str], flag: str) -> list[Path]:
    """Write every file (each atomically), creating ``out``; a directory made here is removed on failure."""
    _refuse_foreign_files(out, list(files), flag)
    made = not out.exists()
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"{flag} {out}: cannot create the directory ({exc.strerror or exc})") from None
    written: list[Path] = []
    try:
        for name, text in files.items():
            atomic_write_text(out / name, text)
            written.append(out / name)
    except BaseException:
        if made:
            for path in written:
                path.unlink(missing_ok=True)
            try:
                out.rmdir()
            except OSError:
                pass
        raise
    return written


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
    #: the env's safe action on these parameters (None: the env could not be built here) and where it came from
    safe_action: tuple[float, ...] | None = None
    safe_source: str = ""


def env_facts(policy: Policy) -> EnvFacts:
    """What the policy's env says about its observation and action.

    Uses :func:`pretrial.sim.plant.make_plant` with the policy's env options:
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
        from pretrial.sim.plant import GymnasiumPlant, make_plant

        plant = make_plant(policy.env_id, **policy.env_options)
    except (InputError, ValueError, TypeError, ImportError) as exc:
        msg = exc.message if isinstance(exc, InputError) else str(exc)
        return EnvFacts(False, f"the env could not be built here ({' '.join(msg.split())}): names, units, "
                        "physical scaling and safe action are unknown", None, *generic, (None,) * n_act,
                        (False,) * n_act, ())
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
    safe, source = _env_safe_action(plant, values, policy.env_id)
    return EnvFacts(True, note, float(plant.dt), tuple(plant.obs_names), tuple(plant.obs_units),
                    tuple(plant.action_names), tuple(plant.action_units), physical, linear, params, safe, source)


def _env_safe_action(plant: Any, values: np.ndarray, env_id: str) -> tuple[tuple[float, ...], str]:
    """The plant's ``safe_action`` on ``values``, checked, and a sentence saying where it came from."""
    from pretrial.sim.plant import GymnasiumPlant
    from pretrial_envs.core import Physics

    try:
        safe = np.asarray(plant.safe_action(values), dtype=float)
    except ValueError as exc:
        raise InputError(f"{env_id}: safe_action: {exc}") from None
    if safe.shape != (plant.action_dim,) or not np.all(np.abs(safe) <= 1.0):  # also refuses NaN
        raise InputError(f"{env_id}: safe_action gave {safe.tolist()!r}; expected {plant.action_dim} values in "
                         "[-1, 1] (or give --safe-action)")
    method = type(plant).safe_action
    if method is Physics.safe_action:
        doc = "the zero command (the env declares no safe action of its own"
        doc += "; for a plain gymnasium env, the middle of its action Box: check it)" \
            if isinstance(plant, GymnasiumPlant) else ")"
        return tuple(safe.tolist()), f"from Physics.safe_action, the default: {doc}."
    summary = " ".join((method.__doc__ or "").strip().split("\n\n")[0].replace("``", "").split())
    return tuple(safe.tolist()), f"from {method.__qualname__} with the policy's env parameters. {summary}"


def check_safe_action(values: Any, n_actions: int, flag: str = "safe_action") -> tuple[float, ...]:
    """``values`` as one finite number in [-1, 1] per action; InputError naming ``flag`` else."""
    try:
        out = tuple(float(v) for v in values)
    except (TypeError, ValueError):
        raise InputError(f"{flag} {values!r}: expected {n_actions} numbers in [-1, 1]") from None
    if len(out) != n_actions:
        raise InputError(f"{flag} {', '.join(map(repr, out))}: {_count(len(out), 'value')}, the policy has "
                         f"{_count(n_actions, 'action')} (give one per action, in action order)")
    bad = [v for v in out if not -1.0 <= v <= 1.0]  # also NaN
    if bad:
        raise InputError(f"{flag} {', '.join(map(repr, out))}: {bad[0]!r} is outside [-1, 1] (actions are "
                         "normalized)")
    return out


def parse_safe_action(text: str, flag: str = "--safe-action") -> tuple[float, ...]:
    """``V[,V...]`` as numbers (the count and range are checked against the policy by :func:`check_safe_action`)."""
    try:
        return tuple(float(v) for v in text.split(","))
    except ValueError:
        raise InputError(f"{flag} {text!r}: expected numbers separated by commas, e.g. 0,-0.2") from None


def _count(n: int, word: str, plural: str = "") -> str:
    return f"{n} {word}" if n == 1 else f"{n} {plural or word + 's'}"


def number_text(x: float) -> str:
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
            f"{_count(o.math_calls, 'math library call')}, {_count(o.finite_checks, 'NaN/infinity test')}")


def describe_memory(prog: Program, real_bytes: int) -> str:
    m = prog.memory_bytes
    state = f"{m['state']} bytes of state" if prog.net.state else "no state (a 1-byte placeholder)"
    return (f"{m['constants']} bytes of constants ({m['constants'] // real_bytes} distinct literals of "
            f"{real_bytes} bytes), {state}, about {m['stack']} bytes of stack locals")


def _fault_lines(prog: Program, facts: EnvFacts, target: str, prefix: str, safe_source: str) -> list[str]:
    """The header's fault section: the codes, what a fault does, the safe action and its source, the caution."""
    up = prefix.upper()
    name = (lambda n: f"{up}_{n}") if target == "c" else (lambda n: n)
    codes = "; ".join(f"{value} ({name(n)}) when {meaning}" for n, value, meaning in FAULTS)
    lines = [
        "",
        f"Faults: {prefix}_step returns {codes}. On a fault it writes the safe action and leaves the recurrent "
        "state as it was before the call (the step is skipped: NaN never enters the state, and the next good "
        "step goes on from the last good one). A caller that ignores the return value still gets the safe "
        "action; act on the code: log it, and stop the machine when faults persist.",
        f"Safe action, {safe_source}",
    ]
    rows = []
    for k, value in enumerate(prog.safe_action):
        phys, unit = facts.physical[k], facts.action_units[k]
        shown = "unknown"
        if phys is not None and facts.linear[k]:
            shown = number_text(phys[1] + value * (phys[2] - phys[0]) / 2) + ("" if unit in ("-", "?") else f" {unit}")
        rows.append([str(k), facts.action_names[k], number_text(value), shown])
    lines += _table_lines(["#", "name", "action", "physical"], rows)
    lines.append("CAUTION: the safe action is an open-loop fallback for a bad step, not a recovery: it holds no "
                 "position or attitude, so on persistent faults the plant drifts (a drone can tip and fall, a "
                 "crane load keeps swinging). Pair it with a tested emergency stop or landing procedure.")
    return lines


def header_facts(policy: Policy, prog: Program, facts: EnvFacts, target: str, precision: str,
                 prefix: str, safe_source: str = "") -> list[str]:
    """The comment at the top of the generated code: provenance, plant meaning, faults, cost, cautions."""
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
                              [[n, number_text(v), u, "*" if trained else ""] for n, v, u, trained in facts.params])
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
                          [[str(i), facts.obs_names[i], facts.obs_units[i], number_text(io.obs_offset[i]),
                            number_text(io.obs_scale[i])] for i in range(io.obs_dim)])
    lines += ["", f"Action action[{sizes[1]} = {io.action_dim}], in this order, each in [-1, 1]; "
              "action = clip(output * scale + offset, -1, 1):"]
    rows = []
    for k in range(io.action_dim):
        phys = facts.physical[k]
        unit = facts.action_units[k]
        if phys is None:
            shown = "unknown"
        else:
            shown = " / ".join(number_text(v) for v in phys) + ("" if unit in ("-", "?") else f" {unit}") \
                + (" (linear)" if facts.linear[k] else " (not linear)")
        rows.append([str(k), facts.action_names[k], unit, number_text(io.action_scale[k]),
                     number_text(io.action_offset[k]), shown])
    lines += _table_lines(["#", "name", "unit", "scale", "offset", "physical at -1 / 0 / +1"], rows)
    lines += _fault_lines(prog, facts, target, prefix, safe_source or facts.safe_source)
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
            f"  code = {prefix}_step(&s, obs, action);  once per control period; 0 or a fault code",
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
    """What one exported step costs: ``operations`` (see :class:`pretrial.export.program.Ops`) and ``memory_bytes``
    (``constants``, ``state``, ``stack``)."""

    operations: dict[str, Any]
    memory_bytes: dict[str, int]


def _syntax(to: str, precision: str, prefix: str) -> Syntax:
    if to == "c":
        from pretrial.export.c_code import CSyntax

        return CSyntax(precision, prefix)
    from pretrial.export.python_code import PythonSyntax

    return PythonSyntax()


def check_export_options(to: str, precision: str, prefix: str) -> None:
    """Refuse a target, precision or prefix the export cannot write (InputError naming the flag)."""
    _check_choice(to, TARGETS, "--to")
    _check_choice(precision, PRECISIONS, "--precision")
    check_prefix(prefix, "--prefix")
    if to == "python" and precision != "double":
        raise InputError(f"--precision {precision}: the Python export computes in Python floats (double); "
                         "use --to c for float")


def step_cost(policy: Policy, to: str = "c", precision: str = "double") -> StepCost:
    """Operation count and memory of one exported step of ``policy`` (language-independent but for sizes)."""
    check_export_options(to, precision, DEFAULT_PREFIX)
    prog = build_program(policy, _syntax(to, precision, DEFAULT_PREFIX))
    return StepCost(prog.ops.as_dict(), dict(prog.memory_bytes))


def export_policy(policy: Policy, to: str, out_dir: str | os.PathLike[str], precision: str = "double",
                  prefix: str = DEFAULT_PREFIX, *, sequences: int = GOLDEN_SEQUENCES, steps: int = GOLDEN_STEPS,
                  seed: int = GOLDEN_SEED, safe_action: Any = None) -> list[Path]:
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
        Golden file: observation sequences, steps per sequence, random seed
        (the three fault sequences come on top).
    safe_action : sequence of float, optional
        What the step gives on a fault: one value in [-1, 1] per action, in
        action order. Default: the env's ``Physics.safe_action`` on the
        policy's env parameters (zero command; hover thrust for the drones),
        zeros if the env cannot be built here.

    Returns
    -------
    list of Path
        The files written (each atomically), code first, golden file last.

    Raises
    ------
    InputError
        Bad ``to``/``precision``/``prefix``/``out_dir``/``safe_action``, a
        constant out of the float range, or an env that does not fit the policy.
    """
    return write_export(policy, to, out_dir, precision, prefix, sequences, steps, seed, safe_action).files


def _safe_action(policy: Policy, facts: EnvFacts, given: Any, flag: str) -> tuple[tuple[float, ...], str]:
    """The safe action to export and where it came from: the caller's, else the env's, else zeros."""
    if given is not None:
        return check_safe_action(given, policy.io.action_dim, flag), f"given by {flag} at export."
    if facts.safe_action is not None:
        return facts.safe_action, facts.safe_source
    return (0.0,) * policy.io.action_dim, (f"zeros: {policy.env_id} could not be built here to say what is safe; "
                                           "check them, or export again with --safe-action.")


class Exported(NamedTuple):
    """What :func:`write_export` wrote: the files, the program they hold, and where the safe action came from."""

    files: list[Path]
    program: Program
    safe_source: str


def write_export(policy: Policy, to: str, out_dir: str | os.PathLike[str], precision: str, prefix: str,
                 sequences: int, steps: int, seed: int, safe_action: Any = None, flag: str = "out_dir",
                 safe_flag: str = "safe_action") -> Exported:
    """:func:`export_policy` with every setting explicit and what was written (the CLI's entry).

    ``flag``/``safe_flag`` name the output directory and safe action in error messages.
    """
    check_export_options(to, precision, prefix)
    if min(sequences, steps) < 1:
        raise InputError(f"golden file: sequences {sequences} and steps {steps} must be >= 1")
    if safe_action is not None:
        check_safe_action(safe_action, policy.io.action_dim, safe_flag)  # before the env is built: fail fast
    out = prepare_out_dir(out_dir, flag)
    syntax = _syntax(to, precision, prefix)
    env = env_facts(policy)
    safe, source = _safe_action(policy, env, safe_action, safe_flag)
    prog = build_program(policy, syntax, safe)
    facts = header_facts(policy, prog, env, to, precision, prefix, source)
    tolerance = TOLERANCE[precision]
    if to == "c":
        from pretrial.export.c_code import render

        provenance = f"pretrial {__version__} from policy {policy.content_hash[:16]}"
        files = render(prog, prefix, precision, syntax, facts, provenance, tolerance)  # type: ignore[arg-type]
    else:
        from pretrial.export.python_code import render as render_python

        files = render_python(prog, prefix, facts, tolerance)
    from pretrial.export.golden import fault_observations, golden_observations, golden_steps, golden_text

    single = precision == "float"
    obs = golden_observations(policy, sequences, steps, seed, float32=single)
    actions, codes = golden_steps(policy, obs, prog.safe_action)
    obs, actions, codes = list(obs), list(actions), list(codes)
    for seq in fault_observations(policy, seed, float32=single):
        a, c = golden_steps(policy, seq[None], prog.safe_action)
        obs.append(seq)
        actions.append(a[0])
        codes.append(c[0])
    about = [f"Policy content sha256: {policy.content_hash} ({policy.env_id}); export {prefix} "
             f"--to {to} --precision {precision}.",
             f"Safe action (on a fault): {', '.join(map(repr, prog.safe_action))}.",
             f"{sequences} sequences x {steps} steps, then 3 fault sequences; numpy default_rng seed {seed}"
             + ("; observations rounded to float (the export's precision)." if single else ".")]
    files[f"{prefix}_golden.txt"] = golden_text(obs, actions, codes, about)
    return Exported(_write_export(out, files, flag), prog, source)


def check_command(to: str, prefix: str, out_dir: Path) -> str:
    """The shell command that builds and runs the check on the export in ``out_dir``."""
    where = f"cd {out_dir} && "
    if to == "c":
        return (f"{where}cc -std=c99 -O2 -o {prefix}_check {prefix}_check.c {prefix}.c -lm && "
                f"./{prefix}_check {prefix}_golden.txt")
    return f"{where}python3 {prefix}.py {prefix}_golden.txt"


