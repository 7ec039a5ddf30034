"""The sweep's output directory: margins.csv, plots, report.md and a self-contained report.html.

The results dicts here are small and clearly synthetic, written by hand after the
results.json schema ("pretrial.sweep" version 1): these tests check the
rendering, not the analyses that produce the numbers.
"""

from __future__ import annotations

import copy
import csv
import io
import math
import re
from html.parser import HTMLParser

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from PIL import Image

from pretrial.console import CAUTIONS
from pretrial.errors import FileFormatError, InputError
from pretrial.report.document import Table, to_html, to_markdown
from pretrial.report.samples_csv import write_samples_csv
from pretrial.report.sweep_report import write_report

EVIL = "<b>evil</b>"  # a hostile parameter name
EVIL_WORD = "<script>x()</script>"  # a hostile failure word


def wilson(k: int, n: int, z: float = 1.959964) -> tuple[float, float]:
    # Wilson (1927), "Probable inference...", JASA 22:209, score interval
    p = k / n
    centre = (p + z * z / (2 * n)) / (1 + z * z / n)
    half = z / (1 + z * z / n) * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n))
    return centre - half, centre + half


def points(values, successes, n=20, required=0.8):
    out = []
    for v, k in zip(values, successes):
        lo, hi = wilson(k, n)
        out.append({"value": v, "episodes": n, "successes": k, "success_rate": k / n, "lower_bound": lo,
                    "upper_bound": hi, "pass": lo >= required, "failure_modes": {"pole_fell": n - k}, "seed": 7})
    return out


def response(gain: float, dt: float | None = None):
    # synthetic loop L(s) = gain / (s (s + 1)) (continuous) or its value at s = exp(j w dt) (sampled)
    w = np.geomspace(0.05, 50.0 if dt is None else math.pi / dt, 120)
    s = 1j * w if dt is None else (np.exp(1j * w * dt) - 1) / dt
    L = gain / (s * (s + 1))
    return {"omega": w.tolist(), "channels": {"force": {"re": L.real.tolist(), "im": L.imag.tolist()}}}


def linear_entry(pm: float, gm_db: float | None):
    return {"channel": "force", "gain_margin_low": 0.0, "gain_margin_high": None if gm_db is None else 10 ** (
        gm_db / 20), "gain_margin_db": gm_db, "phase_margin_deg": pm, "delay_margin_s": 0.3, "disk_margin": 0.9,
        "disk_gain_low": 0.38, "disk_gain_high": 2.6, "disk_phase_deg": 48.0, "crossover_rad_s": 1.2}


def part(scale: float = 1.0, verdict: str = "fail"):
    """The per-controller keys of a results dict (policy or baseline)."""
    lo, hi = wilson(1950, 2000)
    return {
        "margins": [
            {"name": "pole_mass", "unit": "kg", "nominal": 0.1, "low": 0.02, "high": 0.35 * scale,
             "low_ratio": 0.2, "high_ratio": 3.5 * scale, "low_failure": None, "high_failure": "off_track",
             "low_limit_reached": True, "high_limit_reached": False, "range": [0.02, 1.0],
             "points": points([0.02, 0.05, 0.1, 0.2, 0.35, 0.5], [20, 20, 20, 19, 17, 3]),
             "replay_low": None,
             "replay_high": "pretrial replay runs/a/champion.json --set pole_mass=0.37 --seed 123 --episodes 20"},
            {"name": "track_offset", "unit": "m", "nominal": 0.0, "low": -0.4, "high": 0.3, "low_ratio": None,
             "high_ratio": None, "low_failure": "pole_fell", "high_failure": "pole_fell",
             "low_limit_reached": False, "high_limit_reached": False, "range": [-1.0, 1.0],
             "points": points([-0.5, -0.4, 0.0, 0.3, 0.4], [4, 18, 20, 17, 2]),
             "replay_low": "pretrial replay runs/a/champion.json --set track_offset=-0.41 --seed 5 --episodes 20",
             "replay_high": "pretrial replay runs/a/champion.json --set track_offset=0.31 --seed 6 --episodes 20"},
            {"name": EVIL, "unit": "N", "nominal": 1.0, "low": 0.5, "high": 2.0, "low_ratio": 0.5,
             "high_ratio": 2.0, "low_failure": EVIL_WORD, "high_failure": None, "low_limit_reached": False,
             "high_limit_reached": False, "range": [0.1, 4.0], "points": [], "replay_low": None, "replay_high": None},
        ],
        "montecarlo": {
            "samples": 2000, "successes": 1950, "success_rate": 0.975, "ci95": [lo, hi],
            "failure_modes": {"pole_fell": 40, "off_track": 10},
            "varied": [{"name": "pole_mass", "unit": "kg", "distribution": "uniform", "low": 0.05, "high": 0.3}],
            "score_quantiles": {"0.01": -0.2, "0.05": 0.1, "0.5": 0.8},
            "worst": [
                {"values": {"pole_mass": 0.29}, "seed": 987654321, "score": -0.4, "success": False,
                 "failure": "pole_fell",
                 "replay": "pretrial replay runs/a/champion.json --set pole_mass=0.29 --seed 987654321"},
                {"values": {"pole_mass": 0.28}, "seed": 11, "score": 0.5, "success": True, "failure": None,
                 "replay": "pretrial replay runs/a/champion.json --set pole_mass=0.28 --seed 11"}],
            "samples_file": "montecarlo.csv"},
        "worstcase": {"method": "scipy.optimize.differential_evolution", "evaluations": 300, "episodes": 8,
                      "score": -0.8, "values": {"pole_mass": 0.3}, "seed": 42, "success_rate": 0.0,
                      "failure": "pole_fell",
                      "replay": "pretrial replay runs/a/champion.json --set pole_mass=0.3 --seed 42 --episodes 8"},
        "sensitivity": {"method": "Sobol (scipy, Saltelli 2010)", "score": "episode score", "samples": 1024,
                        "indices": [{"name": "pole_mass", "S1": 0.4, "S1_conf": 0.05, "ST": 0.5, "ST_conf": 0.06}]},
        "success_map": {"x": "pole_mass", "y": "track_offset", "x_unit": "kg", "y_unit": "m",
                        "x_values": [0.05, 0.1, 0.2, 0.3], "y_values": [-0.3, 0.0, 0.3],
                        "success_rate": [[1.0, 1.0, 0.7, 0.2], [1.0, 1.0, 0.9, 0.5], [0.9, 0.8, 0.6, 0.1]],
                        "episodes": 20},
        "linear": [linear_entry(63.0 * scale, None)],
        "linear_sampled": [],
        "linear_details": {
            "continuous": {"linearizable": True, "reason": None, "notes": ["synthetic loop"], "stable": True,
                           "equilibrium_state": [0, 0, 0, 0], "equilibrium_action": [0],
                           "multi_loop_disk_margin": None, "response": response(1.5 * scale)},
            "sampled": {"linearizable": False, "reason": "saturated: the output is at the actuator limit",
                        "notes": [], "stable": None, "dt": 0.02, "delay_steps": 0, "response": None}},
        "integrator_check": {"nominal": {"integrator": "rk4", "substeps": 1, "success_rate": 1.0, "mean_score": 0.8},
                             "variants": [{"integrator": "euler", "substeps": 4, "success_rate": 0.95,
                                           "mean_score": 0.79}],
                             "flagged": False, "note": "largest change 0.05 in success rate"},
        "requirements": [
            {"name": "success_rate", "required": 0.95, "measured": 0.975, "pass": True},
            {"name": "margin pole_mass high_ratio", "required": 4.0, "measured": 3.5 * scale,
             "pass": 3.5 * scale >= 4.0},
            {"name": "gain_margin_db force", "required": 6.0, "measured": None, "pass": True},
            {"name": "integrator_check", "required": "no change", "measured": "no change", "pass": True}],
        "verdict": verdict,
    }


def make_results(baseline: bool = False):
    r = {"schema": "pretrial.sweep", "schema_version": 1,
         "policy": {"kind": "file", "path": "runs/a/champion.json", "content_sha256": "ab" * 32},
         "env": {"id": "pretrial/CartPole-v0", "options": {"poles": 1}, "params": {}},
         "plan": {"path": "configs/sweeps/cartpole.toml", "content_sha256": "cd" * 32, "resolved": {}},
         "seed": 0, "required_success_rate": 0.8, "episodes_per_point": 20, **part(),
         "baseline": None, "cautions": list(CAUTIONS), "content_sha256": "ef" * 32}
    if baseline:
        r["baseline"] = {"kind": "lqr", "controller": {
            "kind": "lqr", "gain": {"units": "N per state unit", "rows": {"force": {"x": -1.0, "theta": 30.0}}},
            "q": {"x": 1.0, "theta": 10.0}, "r": {"force": 0.1}, "notes": []}, **part(1.3, "pass")}
    return r


def samples(n: int = 200):
    rng = np.random.default_rng(0)
    m = rng.uniform(0.05, 0.3, n)
    ok = m < 0.27
    return {"pole_mass": m, "seed": np.arange(n), "success": ok,
            "failure": np.where(ok, "", "pole_fell"), "score": np.where(ok, 0.8, -0.3) + 0.1 * rng.standard_normal(n)}


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
