"""The ``pretrial`` command line.

Each sub-command is a ``configure(parser)`` / ``run(args) -> int`` pair. Any
:class:`~pretrial.errors.PretrialError` becomes one line on stderr and exit
code 2 (``--debug`` shows the traceback too).
"""

from __future__ import annotations

import argparse
import sys
import traceback
from collections.abc import Callable, Sequence

from pretrial.errors import PretrialError
from pretrial.log import install_cli_handler
from pretrial.sim.signals import EXIT_INTERRUPTED, EXIT_TERMINATED, Terminated, stop_on_signals
from pretrial.version import __version__

# --------------------------------------------------------------------------- #
# entry point
# --------------------------------------------------------------------------- #
Command = tuple[str, Callable[[argparse.ArgumentParser], None], Callable[[argparse.Namespace], int]]

def _lazy(module: str) -> tuple[Callable[[argparse.ArgumentParser], None], Callable[[argparse.Namespace], int]]:
    """A command's (configure, run) pair from ``pretrial.cli.<module>``, imported only when used.

    Each command module holds argparse and printing only; the work is in the domain packages.
    """
    import importlib

    def configure(p: argparse.ArgumentParser) -> None:
        importlib.import_module(f"pretrial.cli.{module}").configure(p)

    def run(args: argparse.Namespace) -> int:
        return importlib.import_module(f"pretrial.cli.{module}").run(args)

    return configure, run


COMMANDS: list[Command] = [(name, *_lazy(name)) for name in
                           ("envs", "evolve", "replay", "sweep", "export", "calibrate", "report")]

HELP = {
    "envs": "list the environments, or show one's parameters, spaces and success rule",
    "evolve": "evolve a controller with NEAT from a run config",
    "replay": "replay a policy (or the LQR baseline) and measure what it does",
    "sweep": "run a perturbation plan: margins, Monte Carlo, worst case, linear margins, verdict",
    "export": "write a policy as dependency-free C99 or Python for the target",
    "calibrate": "estimate plant parameters from bench logs, with bootstrap intervals",
    "report": "rebuild a sweep's report from its results.json, or set several sweeps of one plan side by side",
}


class _Parser(argparse.ArgumentParser):
    """argparse that reports usage errors as one line with exit code 2."""

    def error(self, message: str) -> None:  # type: ignore[override]
        self.exit(2, f"{self.prog}: error: {message} (see --help)\n")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="pretrial",
        description="Evolve neural controllers with NEAT and measure how far they can be trusted "
        "before a hardware trial.",
    )
    parser.add_argument("--version", action="version", version=f"pretrial {__version__}")
    parser.add_argument("--debug", action="store_true", help="show a traceback on errors")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for name, configure, run in COMMANDS:
        p = sub.add_parser(name, help=HELP[name], description=HELP[name])
        configure(p)
        p.set_defaults(_run=run)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return 2
    # what the manifest records: the words actually given, also when main() is called with a list
    args.argv = list(sys.argv[1:] if argv is None else argv)
    install_cli_handler()
    try:
        with stop_on_signals():
            return int(args._run(args) or 0)
    except PretrialError as exc:
        if args.debug:
            traceback.print_exc()
        print(f"pretrial: error: {exc.message}", file=sys.stderr)
        return exc.exit_code
    except Terminated:
        print("pretrial: terminated (SIGTERM)", file=sys.stderr)
        return EXIT_TERMINATED
    except KeyboardInterrupt:
        print("pretrial: interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED
    except BrokenPipeError:
        # output piped into e.g. `head`, which closed early: not an error of ours
        sys.stderr.close()
        return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
