"""The calibration directory: calibration.json, params.toml, dispersion.toml, plots, report.md.

``calibration.json`` (schema ``pretrial.calibration``, version 1) holds no clock times, paths or host
facts, and a content hash over the rest (:func:`pretrial.files.canonical_json`), so a rerun on the same
logs gives an equal file and :func:`load_calibration` refuses an edited or damaged one.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np

from pretrial.errors import FileFormatError
from pretrial.files import atomic_write_text, canonical_json, sha256_hex, write_json
from pretrial.report.plots import save_figure
from pretrial.tomlfile import dump_toml

SCHEMA = "pretrial.calibration"
VERSION = 1
#: keys every calibration.json carries (the contract other tools read)
REQUIRED = ("schema", "version", "env", "fixed", "params", "correlation", "bootstrap", "fit", "content_sha256")
#: dispersion.toml: the margin search range reaches this many 95%-interval widths past the interval on each
#: side, and at least this share of the estimate (room for a margin search; our choice)
RANGE_WIDTHS = 3.0
RANGE_SHARE = 0.25


def with_hash(summary: dict[str, Any]) -> dict[str, Any]:
    """``summary`` with its ``content_sha256`` (over everything else, as the project's other files)."""
    body = {k: v for k, v in summary.items() if k != "content_sha256"}
    return {**body, "content_sha256": sha256_hex(canonical_json(body))}


def load_calibration(path: str | Path) -> dict[str, Any]:
    """Read a ``calibration.json`` (or the directory holding one) and check its schema and hash.

    Raises
    ------
    FileFormatError
        One line saying exactly what is wrong: missing file, not JSON, another kind of file, another
        version, a missing or malformed key, a bootstrap set that does not match the parameters, or
        content that no longer matches its hash (edited or damaged).
    """
    p = Path(path)
    if p.is_dir():
        p = p / "calibration.json"
    if not p.is_file():
        raise FileFormatError(f"{p}: no such file (expected a calibration.json from pretrial calibrate)")
    try:
        data = json.loads(p.read_text(encoding="utf-8"), parse_constant=_refuse_constant)
    except (UnicodeDecodeError, ValueError) as exc:
        raise FileFormatError(f"{p}: not a calibration file (not valid JSON: {exc})") from None
    if not isinstance(data, dict) or data.get("schema") != SCHEMA:
        found = data.get("schema") if isinstance(data, dict) else type(data).__name__
        raise FileFormatError(f"{p}: not a calibration file (schema {found!r}, expected {SCHEMA!r})")
    if data.get("version") != VERSION:
        raise FileFormatError(f"{p}: calibration version {data.get('version')!r}; this pretrial reads {VERSION}")
    for key in REQUIRED:
        if key not in data:
            raise FileFormatError(f"{p}: missing key {key!r}")
    _check_shapes(p, data)
    if data["content_sha256"] != with_hash(data)["content_sha256"]:
        raise FileFormatError(f"{p}: content does not match its content_sha256 (edited or damaged); "
                              "run pretrial calibrate again")
    return data


def _refuse_constant(name: str) -> float:
    raise ValueError(f"{name} is not a number JSON allows")


def _check_shapes(p: Path, data: dict[str, Any]) -> None:
    params = data["params"]
    if not isinstance(params, dict) or not params:
        raise FileFormatError(f"{p}: params: expected a table of fitted names")
    for name, v in params.items():
        if not isinstance(v, dict) or not {"estimate", "std", "ci95"} <= set(v):
            raise FileFormatError(f"{p}: params.{name}: expected estimate, std and ci95")
    k = len(params)
    boot = data["bootstrap"]
    if not isinstance(boot, list) or not all(isinstance(r, list) and len(r) == k for r in boot):
        raise FileFormatError(f"{p}: bootstrap: expected rows of {k} values (one per fitted name)")
    corr = data["correlation"]
    if not isinstance(corr, list) or len(corr) != k or not all(isinstance(r, list) and len(r) == k for r in corr):
        raise FileFormatError(f"{p}: correlation: expected a {k} x {k} matrix")


# --------------------------------------------------------------------------- #
# TOML outputs
# --------------------------------------------------------------------------- #
def params_toml(summary: dict[str, Any], physics_names: set[str]) -> str:
    """A ``[task.params]`` block to paste into a run config: the fitted physics values, then the fixed ones.

    Each estimate's unit, bootstrap std and 95% interval are listed in the comment lines above it;
    a fitted generic perturbation (e.g. ``actuator_gain``) is listed there only, since a run config
    varies it in ``[task.randomize]`` or a sweep plan, not in ``[task.params]``.
    """
    opts = ", ".join(f"{k} = {json.dumps(v)}" for k, v in summary["env"]["options"].items() if k != "start_spread")
    lines = [
        f"# pretrial calibrate: {summary['env']['id']} fitted to {summary['fit']['samples']} samples in "
        f"{summary['fit']['segments']} segments",
        f"# calibration.json content_sha256 {summary['content_sha256']}",
        f"# the plant was built with: {opts}; give the config's [task.options] the same",
    ]
    params: dict[str, float] = {}
    for name, v in summary["params"].items():
        note = (f"{name}: {v['estimate']!r} {summary['units'][name]}, std {v['std']:.3g}, 95% interval "
                f"[{v['ci95'][0]:.8g}, {v['ci95'][1]:.8g}]")
        if name in physics_names:
            params[name] = float(v["estimate"])
            lines.append(f"# {note}")
        else:
            lines.append(f"# {note}: a generic perturbation, not a [task.params] key: vary it in [task.randomize] "
                         "or a sweep plan (dispersion.toml)")
    fixed = {n: float(v) for n, v in summary["fixed"].items() if n in physics_names}
    if fixed:
        lines.append(f"# fixed (--set): {', '.join(fixed)}")
    params.update(fixed)
    return "\n".join(lines) + "\n" + dump_toml({"task": {"params": params}})


def vary_range(estimate: float, ci: tuple[float, float], low: float, high: float) -> tuple[list[float], list[float]]:
    """``(range, dispersion)`` for a ``[[vary]]`` block: the 95% interval, and a wider search range."""
    lo, hi = float(ci[0]), float(ci[1])
    if hi <= lo:  # the bootstrap did not move: the smallest interval a plan accepts
        pad = 1e-9 * max(abs(estimate), 1.0)
        lo, hi = max(low, estimate - pad), min(high, estimate + pad)
    reach = max(RANGE_WIDTHS * (hi - lo), RANGE_SHARE * abs(estimate))
    rng = [max(low, lo - reach), min(high, hi + reach)]
    return rng, [lo, hi]


def dispersion_toml(summary: dict[str, Any], bounds: dict[str, tuple[float, float]]) -> str:
    """``[[vary]]`` blocks for a sweep plan: ``dispersion`` = the 95% interval, ``range`` wider."""
    lines = [
        f"# pretrial calibrate: [[vary]] blocks for a sweep plan of {summary['env']['id']}",
        "# dispersion: the bootstrap 95% interval; range: wider, where the margins are searched",
        f"# ({RANGE_WIDTHS:g} interval widths past it on each side, at least {RANGE_SHARE:.0%} of the estimate,"
        " within the valid range). Put the estimates in [scenario.params] too (params.toml).",
        "# The names vary independently here; calibration.json keeps the bootstrap set, which holds their",
        "# correlation.",
    ]
    vary = []
    for name, v in summary["params"].items():
        rng, box = vary_range(v["estimate"], v["ci95"], *bounds[name])
        vary.append({"name": name, "units": "physical", "range": rng, "dispersion": box, "distribution": "uniform"})
    return "\n".join(lines) + "\n" + dump_toml({"vary": vary})


# --------------------------------------------------------------------------- #
# plots
# --------------------------------------------------------------------------- #
def _grid(rows: int, cols: int, size: tuple[float, float]):
    """A figure (the project's own, :func:`pretrial.report.plots._figure`) with a rows x cols grid of axes."""
    from pretrial.report.plots import new_figure

    fig = new_figure(*size)
    return fig, fig.subplots(rows, cols, squeeze=False)


def _state_panels(states: int, panel_height: float):
    """One panel per state, two columns when there are several; the spare panel hidden."""
    cols = 2 if states > 1 else 1
    rows = -(-states // cols)
    fig, axes = _grid(rows, cols, (11, panel_height * rows + 0.6))
    for ax in axes.flat[states:]:
        ax.set_visible(False)
    return fig, axes


def plot_windows(path: Path, names: list[str], units: list[str], time: np.ndarray, target: np.ndarray,
                 pred: np.ndarray, mask: np.ndarray, t0: np.ndarray, x0: np.ndarray, title: str) -> None:
    """Measured states against windows simulated from starts fitted near the measured ones, a panel per state."""
    fig, axes = _state_panels(len(names), 2.2)
    for j, ax in enumerate(axes.flat[: len(names)]):
        t = np.concatenate([t0[:, None], time], axis=1)
        meas = np.concatenate([x0[:, None, j], target[:, :, j]], axis=1)
        sim = np.concatenate([x0[:, None, j], pred[:, :, j]], axis=1)
        keep = np.concatenate([np.ones((len(t0), 1), bool), mask], axis=1)
        ax.plot(t[keep], meas[keep], ".", ms=2, color="0.3", label="measured")
        for w in range(len(t0)):
            ax.plot(t[w][keep[w]], sim[w][keep[w]], "-", lw=1, color="C1", label="simulated" if w == 0 else None)
        ax.set_ylabel(f"{names[j]} [{units[j]}]", fontsize=8)
        ax.tick_params(labelsize=7)
    axes.flat[0].legend(fontsize=7)
    for ax in axes[-1]:
        ax.set_xlabel("t [s]", fontsize=8)
    fig.suptitle(title, fontsize=9)
    fig.tight_layout()
    save_figure(fig, path)


def plot_residuals(path: Path, names: list[str], units: list[str], time: np.ndarray, resid: np.ndarray,
                   mask: np.ndarray, title: str) -> None:
    """Simulated minus measured state against time, one panel per state."""
    fig, axes = _state_panels(len(names), 2.0)
    for j, ax in enumerate(axes.flat[: len(names)]):
        ax.plot(time[mask], resid[:, :, j][mask], ".", ms=2, color="C0")
        ax.axhline(0.0, color="0.5", lw=0.8)
        ax.set_ylabel(f"{names[j]} [{units[j]}]", fontsize=8)
        ax.tick_params(labelsize=7)
    for ax in axes[-1]:
        ax.set_xlabel("t [s]", fontsize=8)
    fig.suptitle(title, fontsize=9)
    fig.tight_layout()
    save_figure(fig, path)


def plot_bootstrap(path: Path, names: list[str], units: list[str], boot: np.ndarray, estimate: np.ndarray) -> None:
    """Bootstrap refits: a histogram per parameter, each pair as a scatter."""
    k = len(names)
    fig, axes = _grid(k, k, (2.6 * k + 1, 2.4 * k + 0.6))
    for i in range(k):
        for j in range(k):
            ax = axes[i, j]
            if i == j:
                ax.hist(boot[:, i], bins=20, color="C0")
                ax.axvline(estimate[i], color="C1")
            else:
                ax.plot(boot[:, j], boot[:, i], ".", ms=3, color="C0")
                ax.plot(estimate[j], estimate[i], "x", color="C1")
            ax.tick_params(labelsize=6)
            if i == k - 1:
                ax.set_xlabel(f"{names[j]} [{units[j]}]", fontsize=7)
            if j == 0:
                ax.set_ylabel(f"{names[i]} [{units[i]}]", fontsize=7)
    fig.suptitle(f"bootstrap refits ({len(boot)}), x = estimate", fontsize=9)
    fig.tight_layout()
    save_figure(fig, path)


# --------------------------------------------------------------------------- #
# report and the directory
# --------------------------------------------------------------------------- #
def report_md(summary: dict[str, Any]) -> str:
    """report.md: the estimates, warnings, fit and validation errors, and the method as run."""
    m = summary["method"]
    out = [f"# Calibration of {summary['env']['id']}", ""]
    out.append(f"{summary['fit']['samples']} samples in {summary['fit']['segments']} segments "
               f"({', '.join(log['name'] for log in summary['logs'])}) at a control period of "
               f"{summary['env']['options']['dt']:g} s.")
    if m["estimated_velocities"]:
        out.append(f"Estimated from positions (Savitzky-Golay derivative, {m['savgol_window']} samples, quadratic): "
                   f"{', '.join(m['estimated_velocities'])}.")
    out += ["", "| name | unit | estimate | std | 95% interval |", "|---|---|---|---|---|"]
    for name, v in summary["params"].items():
        out.append(f"| {name} | {summary['units'][name]} | {v['estimate']:.6g} | {v['std']:.3g} | "
                   f"[{v['ci95'][0]:.6g}, {v['ci95'][1]:.6g}] |")
    if summary["fixed"]:
        out += ["", "Fixed: " + ", ".join(f"{k} = {v:g}" for k, v in summary["fixed"].items()) + "."]
    out += ["", "## Warnings", ""]
    out += [f"- {w}" for w in summary["warnings"]] or ["None."]
    out += ["", "## Simulation error (RMS, windows from starts fitted near the measured states)", "",
            "| state | unit | fit | validation |", "|---|---|---|---|"]
    val = summary.get("validation") or {}
    for name, v in summary["fit"]["rmse"].items():
        vv = val.get("rmse", {}).get(name)
        out.append(f"| {name} | {summary['state_units'][name]} | {v:.4g} | {'n/a' if vv is None else f'{vv:.4g}'} |")
    if val:
        out += ["", f"Validation: {val['source']} ({val['segments']} segments, {val['samples']} samples), not used "
                    "in the fit."]
    out += ["", "## Method", "", *(f"- {line}" for line in method_lines(summary)), "",
            "## Files", "",
            "- `params.toml`: a `[task.params]` block to paste into a run config (then `pretrial evolve`).",
            "- `dispersion.toml`: `[[vary]]` blocks for a sweep plan (`pretrial sweep`).",
            "- `calibration.json`: everything here, with the bootstrap set and a content hash.",
            "- `fit.png`, `residuals.png`: measured against simulated windows, and their residuals.",
            "- `bootstrap.png`: the bootstrap refits by pairs.", ""]
    return "\n".join(out)


def method_lines(summary: dict[str, Any]) -> list[str]:
    """The method as run, in words (report.md and --help agree with the code's constants)."""
    m = summary["method"]
    th = m["thresholds"]
    scales = ", ".join(f"{k} {v:.3g}" for k, v in m["residual_scale"].items())
    return [
        f"Multiple shooting: windows of {m['window_steps']} control periods ({m['window_s']:g} s), each simulated "
        "from a start state fitted for it (Gauss-Newton from the measured state, inside every evaluation) with the "
        "logged actions held over each period, all windows in one batch through the plant's own transition.",
        f"Residuals weighted per state by a robust scale (1.4826 x the median absolute deviation of that state's "
        f"residuals at a first fit, floored at {th['scale_floor']:g} of the state's own spread): {scales}.",
        "Fit: scipy.optimize.least_squares (trust-region reflective) within each parameter's valid range, from "
        "the nominal values (or --guess).",
        f"Uncertainty: block bootstrap, {m['bootstrap']['replicates']} replicates (seed {m['bootstrap']['seed']}) "
        f"resampling {m['bootstrap']['units']} {m['bootstrap']['unit_kind']} with replacement, each refitted from "
        "the estimate; std and percentile 95% interval of the refits.",
        f"Not identifiable when the bootstrap 95% interval spans more than {th['flat_range_share']:.0%} of the "
        f"valid range or is wider than {th['flat_relative']:.0%} of the estimate or ends on a bound, or the "
        f"range-scaled Jacobian has a singular value below {th['singular_ratio']:g} of the "
        f"largest and the parameter loads on it by more than {th['flat_loading']:g}.",
    ]


def write_directory(stage: Path, summary: dict[str, Any], physics_names: set[str],
                    bounds: dict[str, tuple[float, float]], plots: dict[str, Any]) -> None:
    """Write every file of the calibration directory into ``stage``."""
    write_json(stage / "calibration.json", summary)
    atomic_write_text(stage / "params.toml", params_toml(summary, physics_names))
    atomic_write_text(stage / "dispersion.toml", dispersion_toml(summary, bounds))
    atomic_write_text(stage / "report.md", report_md(summary))
    plot_windows(stage / "fit.png", **plots["windows"])
    plot_residuals(stage / "residuals.png", **plots["residuals"])
    plot_bootstrap(stage / "bootstrap.png", **plots["bootstrap"])
