"""The README keeps its promises: job paragraph, two commands, CI runs the second."""

from __future__ import annotations

import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]


def _blocks(text: str) -> list[str]:
    return [b.strip() for b in re.findall(r"```\n(.*?)```", text, flags=re.S)]


def test_readme_opens_with_job_then_two_commands():
    text = (ROOT / "README.md").read_text()
    body = text.split("\n", 1)[1].lstrip()
    first_para = body.split("\n\n", 1)[0]
    assert len(first_para.split()) > 60 and "```" not in first_para
    blocks = _blocks(text)
    install_demo, tests = blocks[0], blocks[1]
    assert "pip install" in install_demo and ".venv/bin/pretrial" in install_demo
    assert "pip install" in tests and "pytest" in tests
    # nothing but prose between the paragraph and the two commands
    before_second = text.index(tests)
    assert text[:before_second].count("```") == 3


def test_ci_runs_the_readme_test_command():
    tests = _blocks((ROOT / "README.md").read_text())[1]
    ci = (ROOT / ".ci" / "run").read_text()
    assert tests in ci.splitlines()


def test_readme_carries_the_cautions():
    from pretrial.console import CAUTIONS

    text = " ".join((ROOT / "README.md").read_text().split())
    for caution in CAUTIONS:
        assert " ".join(caution.split()) in text


def _synopsis() -> dict[str, str]:
    """README's CLI synopsis block: command -> its (joined) usage text."""
    text = (ROOT / "README.md").read_text()
    block = next(b for b in _blocks(text) if b.startswith("pretrial envs"))
    out: dict[str, str] = {}
    current = None
    for line in block.splitlines():
        if line.startswith("pretrial "):
            current = line.split()[1]
            out[current] = line
        elif current:
            out[current] += " " + line.strip()
    return out


def _flags(text: str) -> set[str]:
    return set(re.findall(r"--[a-z][a-z0-9-]*", text))


def test_readme_cli_reference_matches_help():
    # the parser is the reference: every flag --help lists is in the README synopsis and back
    from pretrial.cli.main import COMMANDS, build_parser

    parser = build_parser()
    sub = next(a for a in parser._actions if a.__class__.__name__ == "_SubParsersAction")
    synopsis = _synopsis()
    assert set(synopsis) == {name for name, *_ in COMMANDS}
    for name, text in synopsis.items():
        helped = _flags(sub.choices[name].format_help()) - {"--help"}
        assert _flags(text) == helped, name
