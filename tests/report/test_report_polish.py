"""What a reader of a sweep report and a replay plot sees: intervals beside every rate, plain tick
labels, short wrapped titles, target lines and tolerance bands, tidy numbers in margins.csv.

The results dicts are the synthetic ones of tests/report/test_report.py; intervals are checked against
scipy.stats.binomtest(k, n).proportion_ci(method="wilson") (Wilson 1927), an outside reference.
"""

from __future__ import annotations

import copy
import csv
import io

import numpy as np
from helpers import make_results, samples
from PIL import Image
from scipy.stats import binomtest

from pretrial.playback import traces
from pretrial.playback.replay import lqr_policy, run_replay
from pretrial.report import sweep_plots
from pretrial.report.document import to_markdown
from pretrial.report.sweep_report import build_document, write_report
from pretrial.sim.perturb import apply_settings
from pretrial_envs import make_physics


def wilson_text(k: int, n: int) -> str:
    """The report's form of an interval: per cent to 4 significant digits (scipy's bounds)."""
    ref = binomtest(k, n).proportion_ci(confidence_level=0.95, method="wilson")
    return f"{100 * ref.low:.4g} % – {100 * ref.high:.4g} %"


def markdown(results: dict) -> str:
    return to_markdown(build_document(results))


# --------------------------------------------------------------------------- #
# intervals in the report
# --------------------------------------------------------------------------- #
def test_margin_edges_show_their_evidence():
    md = markdown(make_results())
    # track_offset's low edge -0.4 m: 18 of 20 there; the first failing value past it, -0.5 m: 4 of 20
    row = next(line for line in md.splitlines() if line.startswith("| track_offset | low |"))
    assert "-0.4 m" in row and f"18 of 20: 90 % \\[{wilson_text(18, 20)}\\]" in row
    assert "-0.5 m" in row and f"4 of 20: 20 % \\[{wilson_text(4, 20)}\\]" in row
    # pole_mass reached the end of its range going down: evidence at the edge, nothing failing past it
    row = next(line for line in md.splitlines() if line.startswith("| pole_mass | low |"))
    assert f"20 of 20: 100 % \\[{wilson_text(20, 20)}\\]" in row and row.endswith("| – | – |")


def test_a_margin_failing_at_nominal_says_so():
    r = make_results()
    m = r["margins"][1]
    m["fails_at_nominal"], m["low"], m["high"] = True, 0.0, 0.0
    row = next(line for line in markdown(r).splitlines() if line.startswith("| track_offset | high |"))
    assert "none (fails at nominal)" in row and f"20 of 20: 100 % \\[{wilson_text(20, 20)}\\]" in row


def test_worst_case_and_map_cells_show_intervals():
    r = make_results()
    md = markdown(r)
    # worst case: success rate 0 over 8 episodes
    assert f"successes there 0 of 8: 0 % \\[{wilson_text(0, 8)}\\]" in md
    assert "| pole_mass | 0.3 kg |" in md  # its values in a table, 4 significant digits
    # the synthetic map has no counts (results from before they were kept): no cell table, no error
    assert "(rows) / " not in md
    sm = r["success_map"]
    n = sm["episodes"]
    wins = (np.array(sm["success_rate"]) * n).round().astype(int)
    sm["successes"] = wins.tolist()
    refs = [[binomtest(int(k), n).proportion_ci(method="wilson") for k in row] for row in wins]
    sm["lower_bound"] = [[c.low for c in row] for row in refs]
    sm["upper_bound"] = [[c.high for c in row] for row in refs]
    md = markdown(r)
    table = [line for line in md.splitlines() if line.startswith("| -0.3 m |") or line.startswith("| 0 m |")]
    assert len(table) == 2
    # row y = -0.3 m, column x = 0.2 kg: 0.7 of 20 = 14
    assert f"14 of 20: 70 % \\[{wilson_text(14, 20)}\\]" in table[0]


def test_map_plot_labels_each_cell(monkeypatch, tmp_path):
    figures = []
    monkeypatch.setattr(sweep_plots, "save_figure", lambda fig, _path: figures.append(fig))
    r = make_results()
    sm = copy.deepcopy(r["success_map"])
    n = sm["episodes"]
    wins = (np.array(sm["success_rate"]) * n).round().astype(int)
    refs = [[binomtest(int(k), n).proportion_ci(method="wilson") for k in row] for row in wins]
    sm |= {"successes": wins.tolist(), "lower_bound": [[c.low for c in row] for row in refs],
           "upper_bound": [[c.high for c in row] for row in refs]}
    sweep_plots.plot_success_map([("policy", sm)], 0.8, tmp_path / "map.png")
    (fig,) = figures
    texts = [t.get_text() for t in fig.axes[0].texts]
    low, high = refs[0][2].low, refs[0][2].high
    assert f"14/20\n{100 * low:.0f}–{100 * high:.0f} %" in texts
    assert len([t for t in texts if "/20" in t]) == wins.size
    # boxed: the cells whose Wilson lower bound meets the required 0.8 (20 of 20: 0.839)
    boxes = len(fig.axes[0].patches)
    assert boxes == sum(c.low >= 0.8 for row in refs for c in row) > 0


# --------------------------------------------------------------------------- #
# plots: plain tick labels
# --------------------------------------------------------------------------- #
def test_bode_ticks_are_plain_numbers(monkeypatch, tmp_path):
    figures = []
    monkeypatch.setattr(sweep_plots, "save_figure", lambda fig, _path: figures.append(fig))
    w = np.geomspace(0.01, 1000.0, 200)
    s = 1j * w
    loop = 4.0 / (s * (s + 1.0))  # a textbook loop, L(s) = 4 / (s (s + 1))
    details = {"response": {"omega": w.tolist(), "channels": {"u": {"re": loop.real.tolist(),
                                                                    "im": loop.imag.tolist()}}}}
    sweep_plots.plot_bode([("policy", details, [])], tmp_path / "bode.png")
    (fig,) = figures
    fig.canvas.draw()
    for ax in fig.axes:
        labels = [t.get_text() for t in ax.get_xticklabels() if t.get_text()]
        assert labels and not any("$" in t or "mathdefault" in t for t in labels), labels
        # matplotlib's log locator puts the major ticks at the decades, here as plain numbers
        assert {"0.01", "1", "1000"} <= set(labels)


# --------------------------------------------------------------------------- #
# margins.csv
# --------------------------------------------------------------------------- #
def test_margins_csv_rounds_binary_noise(tmp_path):
    r = make_results()
    r["margins"][0]["low"] = 0.1 * 0.1  # 0.010000000000000002 in binary floating point
    r["margins"][0]["high_ratio"] = 1 / 3
    write_report(r, tmp_path, samples())
    rows = list(csv.DictReader(io.StringIO((tmp_path / "margins.csv").read_text())))
    # 12 significant digits (common practice: well above a double's ~16-digit noise, below its precision)
    assert rows[0]["low"] == "0.01" and rows[0]["high_ratio"] == "0.333333333333"
    assert rows[0]["nominal"] == "0.1" and rows[1]["low_ratio"] == ""


# --------------------------------------------------------------------------- #
# replay plots
# --------------------------------------------------------------------------- #
def test_plot_title_shortens_values_and_wraps():
    # the worst case of a six-parameter plan, as its replay command names it
    title = ("lqr on pretrial/CartPole-v0: pole_mass=0.10377244701195128 cart_mass=1.0465361907393422 "
             "pole_half_length=0.549019384151906 actuator_gain=1.0766146458132007 "
             "actuator_delay_s=0.010227821944979145 sensor_noise_std=1.9887404004591915e-05")
    short = traces.plot_title(title)
    assert "pole_mass=0.1038" in short and "cart_mass=1.047" in short and "sensor_noise_std=1.989e-05" in short
    assert "CartPole-v0" in short  # names keep their digits: only name=value numbers are shortened
    assert all(len(line) <= traces.TITLE_WIDTH for line in short.splitlines()) and "\n" in short


def _gantry_replay(settings: dict):
    physics = make_physics("pretrial/GantryCrane-v0")
    setup = apply_settings(physics, base_params={}, settings=settings)
    return run_replay(lqr_policy(setup), setup, episodes=1, seed=0, max_steps=60)


def test_long_title_does_not_widen_the_figure(tmp_path):
    settings = {"rope_length": 1.23456789012345, "trolley_mass": 2.3456789123456, "actuator_gain": 0.912345678901,
                "sensor_noise_std": 0.0123456789012, "actuator_delay_s": 0.0123456789012}
    rep = _gantry_replay(settings)
    args = (rep.physics, rep.outcome.trace, rep.scenarios.params, rep.outcome.steps[0])
    words = " ".join(f"{k}={v!r}" for k, v in settings.items())
    traces.plot_traces(tmp_path / "long.png", *args, title=f"lqr on {rep.env_id}: {words}")
    traces.plot_traces(tmp_path / "short.png", *args, title="lqr")
    with Image.open(tmp_path / "long.png") as a, Image.open(tmp_path / "short.png") as b:  # PIL as the judge
        assert a.size[0] == b.size[0]


def test_replay_plot_draws_targets_and_bands(monkeypatch, tmp_path):
    figures = []
    real = traces.new_figure

    def keep(*a, **k):
        fig = real(*a, **k)
        figures.append(fig)
        return fig

    monkeypatch.setattr(traces, "new_figure", keep)
    rep = _gantry_replay({})
    traces.plot_traces(tmp_path / "g.png", rep.physics, rep.outcome.trace, rep.scenarios.params,
                       rep.outcome.steps[0])
    (fig,) = figures
    by_label = {}
    for ax in fig.axes:
        for artist in [*ax.lines, *ax.patches]:
            by_label.setdefault(artist.get_label(), []).append(artist)
    p = rep.physics.param_table.resolve({})
    col = rep.physics.param_table.names.index
    # the trolley's target is target_x (the env's target_state), drawn as a horizontal line there
    (x_target,) = by_label["x target"]
    assert np.allclose(x_target.get_ydata(), rep.physics.target_state(p[None, :])[0][0])
    # the sway tolerance band spans +-sway_tolerance (a "band" trace limit)
    (band,) = by_label["sway_tolerance"]
    ys = band.get_patch_transform().transform(band.get_path().vertices)[:, 1]  # data y (Rectangle or Polygon)
    tol = p[col("sway_tolerance")]
    assert np.isclose(ys.min(), -tol) and np.isclose(ys.max(), tol)


def test_replay_plot_bands_the_regulated_states(monkeypatch, tmp_path):
    figures = []
    real = traces.new_figure
    monkeypatch.setattr(traces, "new_figure", lambda *a, **k: figures.append(real(*a, **k)) or figures[-1])
    physics = make_physics("pretrial/CartPole-v0")
    setup = apply_settings(physics, base_params={}, settings={})
    rep = run_replay(lqr_policy(setup), setup, episodes=1, seed=0, max_steps=50)
    traces.plot_traces(tmp_path / "c.png", rep.physics, rep.outcome.trace, rep.scenarios.params, rep.outcome.steps[0])
    (fig,) = figures
    bands = {p.get_label(): p for ax in fig.axes for p in ax.patches}
    half = dict(zip(physics.regulated(), physics.regulation_band(rep.scenarios.params[:1])[0], strict=True))
    for name in ("x", "theta"):  # the plant's regulated states, banded about their target 0
        ys = bands[f"{name} band"].get_patch_transform().transform(bands[f"{name} band"].get_path().vertices)[:, 1]
        assert np.isclose(ys.min(), -half[name]) and np.isclose(ys.max(), half[name])
