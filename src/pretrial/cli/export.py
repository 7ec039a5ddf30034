"""``pretrial export``: write a policy as dependency-free C99 or Python for the target."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from pretrial.console import CAUTIONS, emit_json, print_cautions
from pretrial.export.exporter import (
    DEFAULT_PREFIX,
    GOLDEN_SEED,
    GOLDEN_SEQUENCES,
    GOLDEN_STEPS,
    PRECISIONS,
    TARGETS,
    check_command,
    check_export_options,
    describe_memory,
    describe_ops,
    number_text,
    parse_safe_action,
    write_export,
)


def configure(parser: argparse.ArgumentParser) -> None:
    """Arguments of ``pretrial export``."""
    parser.add_argument("policy", help="policy file (champion.json) or run directory")
    parser.add_argument("--to", required=True, choices=TARGETS, help="target language: c (C99) or python")
    parser.add_argument("--out", required=True, metavar="DIR",
                        help="output directory (created if missing; files an earlier export wrote are replaced, "
                        "others never)")
    parser.add_argument("--precision", choices=PRECISIONS, default="double",
                        help="C real type (default double; the Python export computes in double)")
    parser.add_argument("--prefix", default=DEFAULT_PREFIX, metavar="NAME",
                        help=f"C identifier naming files, macros, struct and functions (default {DEFAULT_PREFIX})")
    parser.add_argument("--safe-action", metavar="V[,V...]",
                        help="action on a fault (NaN/inf observation or network output): one value in [-1, 1] per "
                        "action, in action order (default the env's: zero command, hover thrust for the drones); "
                        "write --safe-action=-0.5,0 when the first value is negative")
    parser.add_argument("--json", action="store_true", help="print one JSON object instead of text")


def run(args: argparse.Namespace) -> int:
    """Run ``pretrial export``."""
    from pretrial.controller.policy import open_policy

    check_export_options(args.to, args.precision, args.prefix)
    safe = None if args.safe_action is None else parse_safe_action(args.safe_action)
    policy = open_policy(args.policy)
    files, prog, source = write_export(policy, args.to, args.out, args.precision, args.prefix, GOLDEN_SEQUENCES,
                                       GOLDEN_STEPS, GOLDEN_SEED, safe, "--out", "--safe-action")
    if source.startswith("zeros:"):
        print(f"pretrial: warning: safe action {source}", file=sys.stderr)
    if args.json:
        emit_json({"files": [str(f) for f in files], "operations": prog.ops.as_dict(),
                   "memory_bytes": dict(prog.memory_bytes), "content_sha256": policy.content_hash,
                   "safe_action": list(prog.safe_action), "cautions": list(CAUTIONS)})
        return 0
    lang = f"C99 ({args.precision})" if args.to == "c" else "Python"
    print(f"exported policy {policy.content_hash[:16]} ({policy.env_id}) as {lang} to {args.out}:")
    for f in files:
        print(f"  {f}")
    print(f"per step: {describe_ops(prog)}")
    print(f"memory: {describe_memory(prog, 8 if args.precision == 'double' else 4)}")
    print(f"on a fault (NaN/inf observation or network output): code 1 or 2 and the safe action "
          f"{', '.join(map(number_text, prog.safe_action))}, {source}")
    print("check on the target's toolchain:")
    print(f"  {check_command(args.to, args.prefix, Path(args.out))}")
    print_cautions()
    return 0
