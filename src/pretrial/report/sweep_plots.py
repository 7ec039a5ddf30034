"""Plots of a perturbation sweep, drawn from the ``results.json`` dict (schema "pretrial.sweep").

Each function draws one figure off-screen (Agg) and saves it atomically as a
PNG; the caller decides which ones have data. JSON nulls (``None``) in the
results become NaN here so gaps are simply not drawn.
"""

from __future__ import annotations

import functools
import math
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from pretrial.analysis.loop_margins import disk_ranges
from pretrial.analysis.samples import SampleHistograms
from pretrial.report.plots import new_figure, save_figure

Array = np.ndarray
#: colours of the compared controllers (policy first, LQR baseline second)
COLORS = ("C0", "C3", "C2", "C1")


def floats(values: Sequence[Any] | None) -> Array:
    """JSON numbers to a float array, None -> NaN."""
    return np.array([math.nan if v is None else float(v) for v in (values or [])], dtype=float)


def _unit(unit: str | None) -> str:
    return f" ({unit})" if unit else ""


def plain_text(draw: Callable[..., None]) -> Callable[..., None]:
    """Draw with mathtext off: names and failure words from the results are shown as typed (``$`` too)."""

    @functools.wraps(draw)
    def wrapper(*args: Any, **kwargs: Any) -> None:
        import matplotlib

        with matplotlib.rc_context({"text.parse_math": False}):
            draw(*args, **kwargs)

    return wrapper


def log_x(ax: Any, axis: str = "x") -> None:
    """Logarithmic x (or y) axis labelled with plain numbers (0.1, 1, 10; minor ticks 2 and 5 too).

    matplotlib's own log labels are mathtext (``$\\mathdefault{10^{1}}$``), which shows raw under
    :func:`plain_text`; these are plain text. Minor labels are left out over more than two decades,
    where they would crowd into the major ones.
    """
    from matplotlib.ticker import FuncFormatter

    getattr(ax, f"set_{axis}scale")("log")
    which = ax.xaxis if axis == "x" else ax.yaxis

    def minor(v: float, _pos: int) -> str:
        lo, hi = sorted(which.get_view_interval())
        if lo <= 0 or hi / lo > 100.0:
            return ""
        lead = round(v / 10.0 ** math.floor(math.log10(v))) if v > 0 else 0
        return f"{v:g}" if lead in (2, 5) else ""

    which.set_major_formatter(FuncFormatter(lambda v, _pos: f"{v:g}"))
    which.set_minor_formatter(FuncFormatter(minor))


# --------------------------------------------------------------------------- #
# margins
# --------------------------------------------------------------------------- #
@plain_text
def plot_margins(sets: Sequence[tuple[str, Sequence[Mapping[str, Any]]]], path: str | Path) -> None:
    """One horizontal bar per varied name from the low to the high margin edge, nominal at ratio 1.

    ``sets`` is ``[(label, margins entries), ...]`` (the policy, then the baseline if any); the bars of
    one name sit side by side. Names with a zero nominal have no ratio: they get their own panel in
    units. A triangle at a bar end means the search reached the end of its range without failing.
    """
    names: list[str] = []
    for _label, entries in sets:
        for e in entries:
            if e["name"] not in names:
                names.append(e["name"])
    by = [{e["name"]: e for e in entries} for _label, entries in sets]
    ratio_names = [n for n in names if _first(by, n, "nominal") not in (0, 0.0, None)
                   and (_first(by, n, "low_ratio") is not None or _first(by, n, "high_ratio") is not None)]
    unit_names = [n for n in names if n not in ratio_names]
    panels = [(group, ratio) for group, ratio in ((ratio_names, True), (unit_names, False)) if group]
    heights = [max(1.0, 0.5 * len(p[0]) * len(sets)) for p in panels]
    fig = new_figure(7.5, 1.4 + sum(heights) * 0.9)
    gs = fig.add_gridspec(len(panels), 1, height_ratios=heights)
    for k, (panel_names, ratio) in enumerate(panels):
        ax = fig.add_subplot(gs[k, 0])
        _margin_panel(ax, panel_names, sets, by, ratio, legend=k == 0)
    save_figure(fig, path)


def _margin_panel(ax: Any, names: list[str], sets: Sequence[tuple[str, Any]], by: list[dict[str, Any]],
                  ratio: bool, legend: bool) -> None:
    n_sets = len(sets)
    width = 0.7 / n_sets
    lows_seen: list[float] = []
    highs_seen: list[float] = []
    for s, ((label, _entries), table) in enumerate(zip(sets, by)):
        legend_label = label
        for i, name in enumerate(names):
            e = table.get(name)
            if e is None:
                continue
            y = i + (s - (n_sets - 1) / 2) * width
            if ratio:
                lo, hi, centre = e.get("low_ratio"), e.get("high_ratio"), 1.0
            else:
                lo, hi, centre = e.get("low"), e.get("high"), e.get("nominal")
            lo = centre if lo is None else lo
            hi = centre if hi is None else hi
            lows_seen.append(lo)
            highs_seen.append(hi)
            ax.barh(y, hi - lo, left=lo, height=width * 0.9, color=COLORS[s % len(COLORS)], alpha=0.45,
                    label=legend_label)
            legend_label = None
            ax.plot([lo, hi], [y, y], "|", color="k", ms=10, mew=1.5)
            if e.get("low_limit_reached"):
                ax.plot([lo], [y], "<", color="k", ms=7)
            if e.get("high_limit_reached"):
                ax.plot([hi], [y], ">", color="k", ms=7)
            if not ratio and centre is not None:
                ax.plot([centre], [y], "D", color="k", ms=4)
            for value, word, limit, ha in ((lo, e.get("low_failure"), e.get("low_limit_reached"), "right"),
                                           (hi, e.get("high_failure"), e.get("high_limit_reached"), "left")):
                text = "range end" if limit else (word or "")
                if text:
                    ax.annotate(f" {text} ", (value, y), ha=ha, va="center", fontsize=7,
                                xytext=(-4 if ha == "right" else 4, 0), textcoords="offset points")
    ax.set_yticks(range(len(names)))
    ax.set_yticklabels(names if ratio else [f"{n}{_unit(_first(by, n, 'unit'))}" for n in names])
    ax.set_ylim(-0.7, len(names) - 0.3)
    ax.invert_yaxis()
    ends = [v for v in lows_seen + highs_seen if v is not None and math.isfinite(v)]
    if ratio:
        ax.axvline(1.0, color="k", lw=1, ls="--")
        ends.append(1.0)
        if all(v > 0 for v in ends):
            log_x(ax)
            ax.set_xlim(min(ends) / 3.0, max(ends) * 3.0)  # room for the failure words
        ax.set_xlabel("edge / nominal (1 = nominal; triangles: range end reached without failing)")
    else:
        ax.set_xlabel("value in units (diamond: nominal 0, where a ratio is not defined)")
    if ends and not (ratio and ax.get_xscale() == "log"):
        span = (max(ends) - min(ends)) or 1.0
        ax.set_xlim(min(ends) - 0.45 * span, max(ends) + 0.45 * span)
    ax.grid(axis="x", alpha=0.3, which="both")
    if len(sets) > 1 and legend:
        ax.legend(loc="best", fontsize=8)


def _first(by: list[dict[str, Any]], name: str, key: str) -> Any:
    for table in by:
        if name in table:
            return table[name].get(key)
    return None


@plain_text
def plot_success_curve(curves: Sequence[tuple[str, Mapping[str, Any]]], required: float | None,
                       path: str | Path) -> None:
    """Success rate against the varied value with its Wilson 95 % band, the required rate and the edges.

    ``curves`` is ``[(label, margins entry), ...]`` for one varied name (the policy, then the baseline).
    """
    fig = new_figure(7.0, 4.0)
    ax = fig.add_subplot(1, 1, 1)
    values_all = []
    first = curves[0][1]
    for s, (label, e) in enumerate(curves):
        pts = e.get("points") or []
        x = floats([p.get("value") for p in pts])
        values_all.extend(x.tolist())
        c = COLORS[s % len(COLORS)]
        ax.fill_between(x, floats([p.get("lower_bound") for p in pts]), floats([p.get("upper_bound") for p in pts]),
                        color=c, alpha=0.2, label=f"{label}: Wilson 95 % interval")
        ax.plot(x, floats([p.get("success_rate") for p in pts]), "o-", color=c, ms=3, label=f"{label}: success rate")
        for key, ls in (("low", ":"), ("high", ":")):
            if e.get(key) is not None:
                ax.axvline(e[key], color=c, ls=ls, lw=1.2)
    if first.get("nominal") is not None:
        ax.axvline(first["nominal"], color="k", lw=1, label="nominal")
    if required is not None:
        ax.axhline(required, color="tab:red", ls="--", lw=1, label=f"required {required:g}")
    finite = [v for v in values_all if math.isfinite(v)]
    if finite and min(finite) > 0 and max(finite) / min(finite) > 20:
        log_x(ax)
    ax.set_ylim(-0.03, 1.03)
    ax.set_xlabel(f"{first['name']}{_unit(first.get('unit'))}  (dotted: margin edges)")
    ax.set_ylabel("success rate")
    ax.grid(alpha=0.3)
    ax.legend(fontsize=7, loc="best")
    save_figure(fig, path)


@plain_text
def plot_success_map(maps: Sequence[tuple[str, Mapping[str, Any]]], required: float | None,
                     path: str | Path) -> None:
    """Success rate over two varied names (one panel per controller) with the required-rate contour.

    Each cell is labelled with its successes of the episodes and its Wilson 95 % interval (in per
    cent) when the map carries them; a cell whose lower bound meets the required rate is boxed.
    Axes whose grid is geometric are drawn logarithmic.
    """
    fig = new_figure(6.0 * len(maps), 4.6)
    for k, (label, m) in enumerate(maps):
        ax = fig.add_subplot(1, len(maps), k + 1)
        x, y = floats(m.get("x_values")), floats(m.get("y_values"))
        z = _grid(m.get("success_rate"), len(y), len(x))
        # cells centred on the grid values, geometric midpoints on a geometric grid (as the boxes below)
        mesh = ax.pcolormesh(_cell_edges(x), _cell_edges(y), z, shading="flat", vmin=0.0, vmax=1.0, cmap="viridis")
        fig.colorbar(mesh, ax=ax, label="success rate")
        if required is not None and len(x) > 1 and len(y) > 1 and np.nanmin(z) < required < np.nanmax(z):
            cs = ax.contour(x, y, z, levels=[required], colors="white", linewidths=1.5)
            if not _label_cells(ax, m, x, y, z, required):  # the cell labels leave no room for the contour's
                ax.clabel(cs, fmt={required: f"required {required:g}"}, fontsize=7)
        else:
            _label_cells(ax, m, x, y, z, required)
        for axis, v in (("x", x), ("y", y)):
            if _geometric(v):
                log_x(ax, axis)
        ax.set_xlabel(f"{m.get('x')}{_unit(m.get('x_unit'))}")
        ax.set_ylabel(f"{m.get('y')}{_unit(m.get('y_unit'))}")
        ax.set_title(f"{label}: {m.get('episodes')} episodes per cell", fontsize=9)
    save_figure(fig, path)


def _grid(rows: Sequence[Sequence[Any]] | None, ny: int, nx: int) -> Array:
    return np.array([floats(row) for row in rows or []], dtype=float).reshape(ny, nx)


def _geometric(v: Array) -> bool:
    """A grid of at least 3 positive values with equal ratios (the map's geomspace)."""
    if len(v) < 3 or not np.all(v > 0):
        return False
    r = v[1:] / v[:-1]
    return bool(np.ptp(r) < 1e-6 * r[0] and abs(r[0] - 1.0) > 1e-6)


def _label_cells(ax: Any, m: Mapping[str, Any], x: Array, y: Array, z: Array, required: float | None) -> bool:
    """Write ``k/n`` and ``lo-hi %`` (Wilson 95 %) in each cell; box the cells whose lower bound passes.

    Returns whether it labelled them (not for results without counts, nor for cells too small to read).
    """
    if "successes" not in m or len(x) * len(y) > 144:
        return False
    from matplotlib.patches import Rectangle

    wins = _grid(m.get("successes"), len(y), len(x))
    lo, hi = _grid(m.get("lower_bound"), len(y), len(x)), _grid(m.get("upper_bound"), len(y), len(x))
    n = m.get("episodes")
    xe, ye = _cell_edges(x), _cell_edges(y)
    size = 6 if max(len(x), len(y)) <= 8 else 5
    for i in range(len(y)):
        for j in range(len(x)):
            if not math.isfinite(wins[i, j]):
                continue
            ink = "black" if z[i, j] > 0.6 else "white"  # readable on viridis' yellow and its blue
            ax.text(x[j], y[i], f"{int(wins[i, j])}/{n}\n{100 * lo[i, j]:.0f}–{100 * hi[i, j]:.0f} %",
                    ha="center", va="center", fontsize=size, color=ink)
            if required is not None and lo[i, j] >= required:
                ax.add_patch(Rectangle((xe[j], ye[i]), xe[j + 1] - xe[j], ye[i + 1] - ye[i], fill=False,
                                       edgecolor=ink, lw=1.0))
    return True


def _cell_edges(v: Array) -> Array:
    """Edges of cells centred on the grid values (midpoints; geometric midpoints on a geometric grid)."""
    geometric = _geometric(v)
    if len(v) == 1:
        return np.array([v[0] - 0.5, v[0] + 0.5]) if v[0] <= 0 else np.array([v[0] / 1.5, v[0] * 1.5])
    w = np.log(v) if geometric else v
    mid = (w[1:] + w[:-1]) / 2
    e = np.concatenate([[w[0] - (mid[0] - w[0])], mid, [w[-1] + (w[-1] - mid[-1])]])
    return np.exp(e) if geometric else e


# --------------------------------------------------------------------------- #
# Monte Carlo
# --------------------------------------------------------------------------- #
@plain_text
def plot_montecarlo(hist: SampleHistograms, varied: Sequence[Mapping[str, Any]], path: str | Path) -> None:
    """Histogram of the score split by success and failure, then one such histogram per varied name.

    ``hist`` holds the counts (:func:`pretrial.analysis.samples.sample_histograms`), so the samples themselves
    need not be in memory.
    """
    columns = [("score", "episode score")] + [(v["name"], f"{v['name']}{_unit(v.get('unit'))}")
                                              for v in varied if v["name"] in hist.columns]
    cols = min(3, len(columns))
    rows = math.ceil(len(columns) / cols)
    fig = new_figure(4.0 * cols, 3.0 * rows)
    for k, (key, label) in enumerate(columns):
        ax = fig.add_subplot(rows, cols, k + 1)
        counts = hist.columns[key]
        if counts is not None:
            edges, ok, failed = counts
            # one weighted value per bin (its left edge) redraws the counted bars
            ax.hist([edges[:-1], edges[:-1]], bins=edges, weights=[ok, failed], stacked=True,
                    color=["tab:green", "tab:red"],
                    label=[f"success ({int(ok.sum())})", f"failure ({int(failed.sum())})"])
        ax.set_xlabel(label)
        ax.set_ylabel("samples")
        ax.legend(fontsize=7)
    fig.suptitle(f"Monte Carlo: {hist.samples} samples", fontsize=10)
    save_figure(fig, path)


# --------------------------------------------------------------------------- #
# frequency responses
# --------------------------------------------------------------------------- #
def loop_curves(details: Mapping[str, Any] | None) -> dict[str, Array]:
    """The complex loop responses per channel of one ``linear_details`` entry ({} when none)."""
    resp = (details or {}).get("response") or {}
    out = {}
    for name, ch in (resp.get("channels") or {}).items():
        out[name] = floats(ch.get("re")) + 1j * floats(ch.get("im"))
    return out


def _omega(details: Mapping[str, Any]) -> Array:
    return floats(((details or {}).get("response") or {}).get("omega"))


def _channel_names(loops: Sequence[tuple[str, Mapping[str, Any], Sequence[Mapping[str, Any]]]]) -> list[str]:
    names: list[str] = []
    for _label, details, _entries in loops:
        for n in loop_curves(details):
            if n not in names:
                names.append(n)
    return names


@plain_text
def plot_nyquist(loops: Sequence[tuple[str, Mapping[str, Any], Sequence[Mapping[str, Any]]]],
                 path: str | Path) -> None:
    """Nyquist plot per channel: the -1 point, the unit circle and each loop's disk-margin exclusion disk.

    ``loops`` is ``[(label, linear_details entry, linear channel entries), ...]``.
    """
    names = _channel_names(loops)
    fig = new_figure(5.0 * len(names), 5.0)
    for k, name in enumerate(names):
        ax = fig.add_subplot(1, len(names), k + 1)
        t = np.linspace(0, 2 * np.pi, 361)
        ax.plot(np.cos(t), np.sin(t), color="0.6", lw=0.8, ls=":", label="unit circle")
        biggest = 1.0
        for s, (label, details, entries) in enumerate(loops):
            curve = loop_curves(details).get(name)
            if curve is None:
                continue
            c = COLORS[s % len(COLORS)]
            ax.plot(curve.real, curve.imag, color=c, lw=1.4, label=label)
            ax.plot(curve.real, -curve.imag, color=c, lw=0.8, ls="--", alpha=0.5)  # negative frequencies
            mag = np.abs(curve[np.isfinite(curve)])
            biggest = max(biggest, float(mag.max()) if mag.size else 1.0)
            entry = next((e for e in entries if e.get("channel") == name), None)
            alpha = None if entry is None else entry.get("disk_margin")
            if alpha is not None and 0 < alpha < 2:
                # the balanced disk's gains f map to the critical points -1/f: a disk on [-g_hi, -g_lo]
                lo, hi, _ = disk_ranges(alpha)
                ax.plot(-(lo + hi) / 2 + (hi - lo) / 2 * np.cos(t), (hi - lo) / 2 * np.sin(t), color=c, lw=1,
                        ls="-.", label=f"{label}: disk margin {alpha:.3g}")
        ax.plot([-1], [-0], "+", color="tab:red", ms=12, mew=2, label="-1")
        view = min(max(1.6, 1.1 * biggest), 5.0)
        ax.set_xlim(-view, view)
        ax.set_ylim(-view, view)
        ax.set_aspect("equal")
        ax.axhline(0, color="0.8", lw=0.5)
        ax.axvline(0, color="0.8", lw=0.5)
        clipped = " (view clipped)" if biggest * 1.1 > view else ""
        ax.set_title(f"loop broken at {name}{clipped}", fontsize=9)
        ax.set_xlabel("Re L")
        ax.set_ylabel("Im L")
        ax.legend(fontsize=6, loc="lower left")
    save_figure(fig, path)


@plain_text
def plot_bode(loops: Sequence[tuple[str, Mapping[str, Any], Sequence[Mapping[str, Any]]]],
              path: str | Path) -> None:
    """Bode plot per channel (magnitude in dB, phase in degrees) with each loop's gain crossover marked."""
    names = _channel_names(loops)
    fig = new_figure(5.0 * len(names), 5.5)
    for k, name in enumerate(names):
        ax_m = fig.add_subplot(2, len(names), k + 1)
        ax_p = fig.add_subplot(2, len(names), len(names) + k + 1, sharex=ax_m)
        for s, (label, details, entries) in enumerate(loops):
            curve = loop_curves(details).get(name)
            if curve is None:
                continue
            w = _omega(details)
            c = COLORS[s % len(COLORS)]
            with np.errstate(divide="ignore", invalid="ignore"):
                db = 20 * np.log10(np.abs(curve))
            phase = np.degrees(np.unwrap(np.where(np.isfinite(curve), np.angle(curve), 0.0)))
            ax_m.plot(w, db, color=c, label=label)
            ax_p.plot(w, phase, color=c)
            entry = next((e for e in entries if e.get("channel") == name), None)
            wc = None if entry is None else entry.get("crossover_rad_s")
            if wc is not None and wc > 0:
                for ax in (ax_m, ax_p):
                    ax.axvline(wc, color=c, ls=":", lw=1)
                ax_m.plot([wc], [0.0], "o", color=c, ms=5, label=f"{label}: crossover {wc:.3g} rad/s")
            if details.get("dt"):
                ax_m.axvline(math.pi / details["dt"], color=c, ls="--", lw=0.6, alpha=0.6)
        log_x(ax_p)  # shared with ax_m: plain-text tick labels on both
        ax_m.axhline(0, color="k", lw=0.8)
        ax_p.axhline(-180, color="0.6", lw=0.8, ls="--")
        ax_m.set_title(f"loop broken at {name}", fontsize=9)
        ax_m.set_ylabel("|L| (dB)")
        ax_p.set_ylabel("phase of L (deg)")
        ax_p.set_xlabel("frequency (rad/s)")
        ax_m.grid(alpha=0.3, which="both")
        ax_p.grid(alpha=0.3, which="both")
        ax_m.legend(fontsize=6)
    save_figure(fig, path)
