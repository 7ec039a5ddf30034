"""A report as a list of blocks (headings, paragraphs, tables, code lines, images, a verdict), rendered
to Markdown and to self-contained HTML so both always say the same thing in the same order.

The HTML opens offline: inline CSS, images as base64 data URIs, no scripts, no links. Every
text that came from a results file is escaped.
"""

from __future__ import annotations

import base64
import html
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

from pretrial.console import fmt_number

DASH = "–"


INF = "∞"


@dataclass
class Heading:
    level: int
    text: str


@dataclass
class Para:
    text: str


@dataclass
class Items:
    items: list[str]


@dataclass
class Table:
    headers: list[str]
    rows: list[list[str]]


@dataclass
class Code:
    label: str
    command: str


@dataclass
class Image:
    file: str
    caption: str


@dataclass
class Verdict:
    passed: bool | None
    headline: str
    lines: list[str] = field(default_factory=list)


Block = Heading | Para | Items | Table | Code | Image | Verdict


def num(value: Any, unit: str | None = None, digits: int = 4, none: str = DASH) -> str:
    """A number with its unit; ``None`` becomes ``none`` (default "–")."""
    if value is None:
        return none
    text = fmt_number(value, digits)
    return f"{text} {unit}" if unit else text


def ratio(value: Any) -> str:
    return DASH if value is None else f"{fmt_number(value, 3)}×"


def rate(value: Any) -> str:
    """A success rate in per cent."""
    return DASH if value is None else f"{fmt_number(100.0 * float(value), 4)} %"


def word(value: Any) -> str:
    return "none" if value in (None, "") else str(value)


def passed(value: Any) -> str:
    return {True: "pass", False: "FAIL"}.get(value, DASH)


def cell(value: Any) -> str:
    """Generic table cell for a JSON value."""
    if value is None:
        return DASH
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, (int, float)):
        return num(value)
    if isinstance(value, (list, tuple)):
        return ", ".join(cell(v) for v in value)
    if isinstance(value, dict):
        return "; ".join(f"{k} = {cell(v)}" for k, v in value.items())
    return str(value)


def interval(ci: Sequence[Any] | None) -> str:
    if not ci or len(ci) != 2:
        return DASH
    return f"{rate(ci[0])} – {rate(ci[1])}"


def evidence(successes: Any, n: Any, ci: Sequence[Any] | None = None) -> str:
    """``"19 of 20: 95 % [76.39 % – 99.11 %]"``: a count, its rate and its Wilson 95 % interval.

    ``ci`` gives the bounds when the results hold them; otherwise they are computed
    (:func:`pretrial.analysis.stats.wilson_interval`).
    """
    if successes is None or not n:
        return DASH
    if ci is None or len(ci) != 2 or None in ci:
        from pretrial.analysis.stats import wilson_interval

        lo, hi = wilson_interval(int(successes), int(n))
        ci = [float(lo), float(hi)]
    return f"{cell(successes)} of {cell(n)}: {rate(successes / n)} [{interval(ci)}]"


_MD_SPECIAL = re.compile(r"([\\`*\[\]<>|#])")


_LINE_BREAKS = re.compile("[\r\n\x0b\x0c\x1c-\x1e\x85\u2028\u2029]")  # whatever str.splitlines splits on


def _md(text: str) -> str:
    """Backslash-escape Markdown syntax so names like ``<b>`` show literally and cannot break a table."""
    return _LINE_BREAKS.sub(" ", _MD_SPECIAL.sub(r"\\\1", str(text)))


def to_markdown(blocks: Sequence[Block]) -> str:
    """Render the blocks as Markdown (images referenced by their file name beside report.md)."""
    parts = []
    for b in blocks:
        if isinstance(b, Heading):
            parts.append(f"{'#' * b.level} {_md(b.text)}")
        elif isinstance(b, Verdict):
            parts.append("\n".join([f"> **VERDICT: {b.headline}**", *(f"> {_md(line)}" for line in b.lines)]))
        elif isinstance(b, Para):
            parts.append(_md(b.text))
        elif isinstance(b, Items):
            parts.append("\n".join(f"- {_md(i)}" for i in b.items))
        elif isinstance(b, Table):
            lines = ["| " + " | ".join(_md(h) for h in b.headers) + " |", "|" + "---|" * len(b.headers)]
            lines += ["| " + " | ".join(_md(c) for c in row) + " |" for row in b.rows]
            parts.append("\n".join(lines))
        elif isinstance(b, Code):
            fence = "`" * max(3, 1 + max((len(r) for r in re.findall(r"`+", b.command)), default=0))
            parts.append(f"{_md(b.label)}:\n\n{fence}\n{b.command}\n{fence}")
        elif isinstance(b, Image):
            parts.append(f"![{_md(b.caption)}]({b.file})")
    return "\n\n".join(parts) + "\n"


_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",sans-serif;max-width:72em;margin:1.5em auto;padding:0 1em;
color:#1a1a1a;line-height:1.45}
h1{font-size:1.6em}h2{margin-top:1.8em;border-bottom:1px solid #ccc;padding-bottom:.2em}h3{margin-top:1.2em}
.verdict{border:3px solid;border-radius:6px;padding:.8em 1.2em;margin:1em 0}
.verdict .head{font-size:1.8em;font-weight:700;letter-spacing:.05em}
.pass{border-color:#1b7f3b;background:#e9f7ee}.pass .head{color:#1b7f3b}
.fail{border-color:#b3261e;background:#fdecea}.fail .head{color:#b3261e}
.none{border-color:#777;background:#f2f2f2}
table{border-collapse:collapse;margin:.6em 0;font-size:.92em}
th,td{border:1px solid #bbb;padding:.25em .6em;text-align:left;vertical-align:top}th{background:#f0f0f0}
td.fail{color:#b3261e;font-weight:700;background:none}
pre{background:#f6f6f6;border:1px solid #ddd;padding:.5em .8em;overflow-x:auto;margin:.2em 0 .9em}
.label{margin:.5em 0 .1em}
figure{margin:1em 0}img{max-width:100%;height:auto;border:1px solid #eee}figcaption{font-size:.9em;color:#555}
"""


def to_html(blocks: Sequence[Block], images: Mapping[str, bytes] | None = None, title: str = "pretrial sweep report"
            ) -> str:
    """Render the blocks as one self-contained HTML page (``images``: file name -> PNG bytes to embed)."""
    images = images or {}
    esc = html.escape
    parts = []
    for b in blocks:
        if isinstance(b, Heading):
            parts.append(f"<h{b.level}>{esc(b.text)}</h{b.level}>")
        elif isinstance(b, Verdict):
            kind = {True: "pass", False: "fail"}.get(b.passed, "none")
            lines = "".join(f"<p>{esc(line)}</p>" for line in b.lines)
            parts.append(f'<div class="verdict {kind}"><div class="head">VERDICT: {esc(b.headline)}</div>'
                         f"{lines}</div>")
        elif isinstance(b, Para):
            parts.append(f"<p>{esc(b.text)}</p>")
        elif isinstance(b, Items):
            parts.append("<ul>" + "".join(f"<li>{esc(i)}</li>" for i in b.items) + "</ul>")
        elif isinstance(b, Table):
            head = "".join(f"<th>{esc(h)}</th>" for h in b.headers)
            body = "".join("<tr>" + "".join(
                f'<td class="fail">{esc(c)}</td>' if c == "FAIL" else f"<td>{esc(c)}</td>" for c in row) + "</tr>"
                for row in b.rows)
            parts.append(f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>")
        elif isinstance(b, Code):
            parts.append(f'<p class="label">{esc(b.label)}:</p><pre><code>{esc(b.command)}</code></pre>')
        elif isinstance(b, Image) and b.file in images:
            data = base64.b64encode(images[b.file]).decode("ascii")
            parts.append(f'<figure><img alt="{esc(b.caption)}" src="data:image/png;base64,{data}">'
                         f"<figcaption>{esc(b.caption)}</figcaption></figure>")
    body = "\n".join(parts)
    return (f'<!DOCTYPE html>\n<html lang="en">\n<head>\n<meta charset="utf-8">\n<title>{esc(title)}</title>\n'
            f"<style>{_CSS}</style>\n</head>\n<body>\n{body}\n</body>\n</html>\n")
