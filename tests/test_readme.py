"""The README keeps its promises: job paragraph, two commands, CI runs the second."""

from __future__ import annotations

import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


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
