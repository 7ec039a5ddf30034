"""The house rules of the source tree, checked: no import cycles, no private names across modules,
domain code never imports the command line, and every module says what it holds.

DEVELOPERS.md ("Layout") states the rules; this reads every module's imports with :mod:`ast`
(the standard library's parser), function-level imports included.
"""

from __future__ import annotations

import ast
from collections import defaultdict
from pathlib import Path

from helpers import ROOT

SRC = ROOT / "src"


def _modules() -> dict[str, Path]:
    out = {}
    for f in (SRC / "pretrial").rglob("*.py"):
        name = ".".join(f.relative_to(SRC).with_suffix("").parts)
        out[name.removesuffix(".__init__")] = f
    return out


def _imports(mods: dict[str, Path]) -> dict[str, list[tuple[str, str]]]:
    """module -> [(imported module, imported name or "")] for every pretrial import in it."""
    found: dict[str, list[tuple[str, str]]] = defaultdict(list)
    for m, f in mods.items():
        for node in ast.walk(ast.parse(f.read_text())):
            if isinstance(node, ast.ImportFrom) and node.module and node.module.split(".")[0] == "pretrial":
                for a in node.names:
                    sub = f"{node.module}.{a.name}"
                    found[m].append((sub if sub in mods else node.module, a.name))
            elif isinstance(node, ast.Import):
                found[m] += [(a.name, "") for a in node.names if a.name.split(".")[0] == "pretrial"]
    return found


def test_no_private_names_cross_modules():
    bad = [f"{m}: {target}.{name}" for m, deps in _imports(_modules()).items() for target, name in deps
           if name.startswith("_") and name != "__version__" and target != m]
    assert bad == []


def test_domain_code_never_imports_the_command_line():
    bad = [m for m, deps in _imports(_modules()).items()
           if not m.startswith("pretrial.cli") and m != "pretrial.__main__"
           and any(t.startswith("pretrial.cli") for t, _ in deps)]
    assert bad == []


def test_no_import_cycles():
    mods = _modules()
    graph = {m: {t for t, _ in deps if t in mods and t != m} for m, deps in _imports(mods).items()}
    # Tarjan-free check: a cycle exists iff a depth-first search meets a node on its own stack
    state: dict[str, int] = {}
    cycles: list[list[str]] = []

    def visit(n: str, stack: list[str]) -> None:
        state[n] = 1
        stack.append(n)
        for d in sorted(graph.get(n, ())):
            if state.get(d) == 1:
                cycles.append(stack[stack.index(d):] + [d])
            elif d not in state:
                visit(d, stack)
        stack.pop()
        state[n] = 2

    for n in sorted(mods):
        if n not in state:
            visit(n, [])
    assert cycles == []


def test_every_module_says_what_it_holds():
    missing = [m for m, f in _modules().items() if ast.get_docstring(ast.parse(f.read_text())) is None
               and m != "pretrial.__main__"]
    assert missing == []
