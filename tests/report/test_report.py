"""The sweep's output directory: margins.csv, plots, report.md and a self-contained report.html.

The results dicts here are small and clearly synthetic, written by hand after the
results.json schema ("pretrial.sweep" version 1): these tests check the
rendering, not the analyses that produce the numbers.
"""

from __future__ import annotations

import copy
import csv
import io
import re
from html.parser import HTMLParser

import numpy as np
import pytest
from helpers import EVIL, EVIL_WORD, make_results, samples, wilson
from hypothesis import given, settings
from hypothesis import strategies as st
from PIL import Image

from pretrial.console import CAUTIONS
from pretrial.errors import FileFormatError, InputError
from pretrial.report.document import Table, to_html, to_markdown
from pretrial.report.samples_csv import write_samples_csv
from pretrial.report.sweep_report import write_report


@pytest.fixture(scope="module")
def plain(tmp_path_factory):
    out = tmp_path_factory.mktemp("plain")
    files = write_report(make_results(), out, samples())
    return out, files


@pytest.fixture(scope="module")
def with_baseline(tmp_path_factory):
    out = tmp_path_factory.mktemp("base")
    return out, write_report(make_results(baseline=True), out, samples())


class Tags(HTMLParser):
    """Collect start tags and text with the standard library's HTML parser (an outside reference)."""

    def __init__(self):
        super().__init__()
        self.tags, self.text, self.cells = [], [], []
        self._in_cell = False

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))
        if tag in ("td", "th"):
            self._in_cell = True
            self.cells.append("")

    def handle_endtag(self, tag):
        if tag in ("td", "th"):
            self._in_cell = False

    def handle_data(self, data):
        self.text.append(data)
        if self._in_cell:
            self.cells[-1] += data


def parse(text: str) -> Tags:
    p = Tags()
    p.feed(text)
    p.close()
    return p


def test_files_written_and_pngs_valid(plain):
    out, files = plain
    names = {f.name for f in files}
    expected = {"margins.csv", "margins.png", "success_pole_mass.png", "success_track_offset.png",
                "montecarlo.png", "success_map.png", "nyquist.png", "bode.png", "report.md", "report.html"}
    assert expected <= names
    assert all(f.exists() for f in files)
    assert not list(out.glob(".*.tmp"))  # atomic writes leave no temporary files behind
    for f in files:
        if f.suffix == ".png":
            with Image.open(f) as im:  # PIL as the outside judge of a valid PNG
                im.verify()
                assert im.format == "PNG"


def test_html_self_contained(plain):
    out, _ = plain
    text = (out / "report.html").read_text()
    assert 'src="http' not in text and "<script" not in text.lower() and "<link" not in text.lower()
    tags = parse(text).tags
    imgs = [a for t, a in tags if t == "img"]
    assert len(imgs) == 7  # margins, two success curves, Monte Carlo, map, Nyquist, Bode
    assert all(a["src"].startswith("data:image/png;base64,") for a in imgs)
    assert not [t for t, a in tags if t in ("script", "link", "iframe", "a")]


def test_verdict_first_with_failing_requirements(plain):
    out, _ = plain
    for name in ("report.md", "report.html"):
        text = (out / name).read_text()
        verdict = text.index("VERDICT: FAIL")
        assert verdict < text.index("Requirements") < text.index("Margins (one parameter")
        line = text[verdict:text.index("Requirements")]
        assert "margin pole_mass high_ratio" in line and "required 4" in line and "measured 3.5" in line
        assert "success_rate (" not in line  # only the failing requirements are named


def test_replays_cautions_and_how_to_read(plain):
    out, _ = plain
    r = make_results()
    md, page = (out / "report.md").read_text(), (out / "report.html").read_text()
    commands = [r["montecarlo"]["worst"][0]["replay"], r["margins"][0]["replay_high"], r["margins"][1]["replay_low"],
                r["margins"][1]["replay_high"], r["worstcase"]["replay"]]
    for cmd in commands:
        assert f"\n{cmd}\n" in md  # its own line in a fenced block: copyable verbatim
        assert f"<code>{cmd}</code>" in page
    assert r["montecarlo"]["worst"][1]["replay"] not in md  # a successful sample is not a failure to reproduce
    for c in CAUTIONS:
        assert c in md and c in page  # plain text, nothing to escape in the cautions
    assert md.index("Reproduce") < md.index("Cautions") < md.index("How to read this")
    assert "not a certification" in md and "one parameter at a time" in md.lower()


def test_wilson_interval_shown(plain):
    out, _ = plain
    # 1950 of 2000: Wilson 95 % interval [0.9672, 0.9810] (Wilson 1927 formula, computed by hand)
    lo, hi = wilson(1950, 2000)
    assert lo == pytest.approx(0.9672, abs=1e-4) and hi == pytest.approx(0.9810, abs=1e-4)
    text = (out / "report.md").read_text()
    assert "Wilson 95 % interval 96.72 % – 98.1 %" in text
    assert "97.5 %" in text


def test_escaping_of_hostile_names(plain):
    out, _ = plain
    page = (out / "report.html").read_text()
    assert EVIL not in page and "<script>" not in page
    assert "&lt;b&gt;evil&lt;/b&gt;" in page and "&lt;script&gt;" in page
    assert EVIL in "".join(parse(page).text)  # shown literally as text
    md = (out / "report.md").read_text()
    assert EVIL not in md and r"\<b\>evil\</b\>" in md
    # the hostile name gets a safe file name, if it had points: here it has none, so no file at all
    assert not [p for p in out.iterdir() if "<" in p.name or ">" in p.name]


def test_hostile_names_in_plots_and_file_names(tmp_path):
    r = make_results()
    r["margins"][0]["name"] = "../$\\frac{$"  # a path escape and broken mathtext, drawn as typed
    r["margins"][1]["name"] = "map"  # must not overwrite the 2-D success map
    files = {f.name for f in write_report(r, tmp_path)}
    assert {"success____frac__.png", "success_map_2.png", "success_map.png"} <= files
    assert all(f.parent == tmp_path for f in tmp_path.rglob("*"))


def test_nulls_rendered_as_dash_or_none(plain):
    out, _ = plain
    page_text = "".join(parse((out / "report.html").read_text()).text)  # the text, not the base64 images
    for text in ((out / "report.md").read_text(), page_text):
        assert "None" not in text and "nan" not in text
    md = (out / "report.md").read_text()
    assert "| track\\_offset" not in md  # underscores are not escaped (intraword: no emphasis)
    row = next(line for line in md.splitlines() if line.startswith("| track_offset"))
    assert "| – | –" in row  # zero nominal: no ratios
    assert "none (passed to the range end)" in md and "∞" in md  # limit reached; unlimited gain margin
    assert "not linearizable: saturated" in md


def test_margins_csv(plain, with_baseline):
    out, _ = plain
    rows = list(csv.DictReader(io.StringIO((out / "margins.csv").read_text())))
    r = make_results()
    assert [row["name"] for row in rows] == [m["name"] for m in r["margins"]]
    assert list(rows[0]) == ["name", "unit", "nominal", "low", "high", "low_ratio", "high_ratio", "low_failure",
                             "high_failure", "low_limit_reached", "high_limit_reached"]
    assert float(rows[0]["high"]) == 0.35 and rows[0]["unit"] == "kg" and rows[0]["low_limit_reached"] == "true"
    assert rows[1]["low_ratio"] == "" and rows[0]["low_failure"] == ""  # nulls are empty cells
    assert rows[2]["name"] == EVIL and rows[2]["low_failure"] == EVIL_WORD  # data, kept exactly
    out_b, _ = with_baseline
    rows_b = list(csv.DictReader(io.StringIO((out_b / "margins.csv").read_text())))
    assert [row["controller"] for row in rows_b] == ["policy"] * 3 + ["lqr"] * 3
    assert float(rows_b[3]["high_ratio"]) == pytest.approx(3.5 * 1.3)


def test_baseline_side_by_side_only_with_baseline(plain, with_baseline):
    out, _ = plain
    assert "LQR baseline" not in (out / "report.md").read_text()
    out_b, _ = with_baseline
    md = (out_b / "report.md").read_text()
    assert "LQR baseline, for comparison: PASS" in md
    section = md[md.index("## Policy vs LQR baseline"):md.index("## Reproduce")]
    assert "| verdict | FAIL | PASS |" in section
    assert "| margin pole\\_mass" not in section
    assert re.search(r"\| margin pole_mass \| 0\.2× to 3\.5× \| 0\.2× to 4\.55× \|", section)
    assert "| force | -1 | 30 |" in section  # the LQR gain rows
    cells = parse((out_b / "report.html").read_text()).cells
    assert "policy" in cells and "LQR baseline" in cells


def test_missing_analyses_skipped(tmp_path):
    r = make_results()
    for key in ("margins", "montecarlo", "worstcase", "sensitivity", "success_map", "linear", "linear_sampled",
                "linear_details", "integrator_check"):
        r[key] = None
    r["requirements"], r["verdict"] = [], "pass"
    files = write_report(r, tmp_path, samples())
    assert sorted(f.name for f in files) == ["report.html", "report.md"]
    md = (tmp_path / "report.md").read_text()
    assert "VERDICT: PASS" in md and "## Monte Carlo" not in md and "## Margins" not in md
    assert "No failing case or edge to replay." in md and "None" not in md
    assert "<img" not in (tmp_path / "report.html").read_text()


def test_montecarlo_plot_needs_samples(tmp_path):
    files = write_report(make_results(), tmp_path)
    assert "montecarlo.png" not in {f.name for f in files}
    assert "montecarlo.png" not in (tmp_path / "report.md").read_text()


def test_bad_input(tmp_path):
    r = make_results()
    r["schema"] = "something.else"
    with pytest.raises(FileFormatError, match="schema"):
        write_report(r, tmp_path)
    bad = samples(10)
    bad["score"] = bad["score"][:5]
    with pytest.raises(InputError, match="differ in length"):
        write_report(make_results(), tmp_path, bad)


def test_samples_csv(tmp_path):
    s = samples(50)
    write_samples_csv(tmp_path / "montecarlo.csv", s, {"pole_mass": "kg"})
    rows = list(csv.reader(io.StringIO((tmp_path / "montecarlo.csv").read_text())))
    assert rows[0] == ["pole_mass [kg]", "seed", "success", "failure", "score"]
    assert len(rows) == 51
    back = np.array([float(r[0]) for r in rows[1:]])
    np.testing.assert_array_equal(back, s["pole_mass"])  # full precision round trip
    assert {r[2] for r in rows[1:]} <= {"true", "false"}
    assert [r[2] == "true" for r in rows[1:]] == s["success"].tolist()


def test_baseline_copy_is_not_mutated():
    r = make_results(baseline=True)
    before = copy.deepcopy(r)
    from pretrial.report.sweep_report import build_document

    build_document(r)
    assert r == before


@settings(max_examples=40, deadline=None)
@given(st.text(min_size=1, max_size=20))
def test_any_text_survives_both_renderers(text):
    # whatever a name holds, the HTML parser reads back exactly that cell text and the table stays intact
    page = to_html([Table(["name", "x"], [[text, "1"]])])
    cells = parse(page).cells
    assert cells == ["name", "x", text, "1"]
    md = to_markdown([Table(["name", "x"], [[text, "1"]])])
    body = md.strip().splitlines()
    assert len(body) == 3 and body[2].endswith(" | 1 |")
