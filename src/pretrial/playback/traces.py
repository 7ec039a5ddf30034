"""Recorded episodes as files: a CSV table per step and a plot of states and actions against time.

Both read the trace of :func:`pretrial.sim.rollout.run_episodes` with
``record=True``: ``state`` (T+1, N, S), ``obs`` (T, N, O) and ``action``
(T, N, A), of which episode i owns the first ``steps[i]`` periods.
"""

from __future__ import annotations

import csv
import io
import re
import textwrap
from collections.abc import Mapping, Sequence
from pathlib import Path

import numpy as np

from pretrial.errors import InputError
from pretrial.files import atomic_write_bytes, atomic_write_text
from pretrial.report.plots import new_figure
from pretrial_envs.core import Physics, TraceLimit

#: file suffixes the plot writer accepts, and matplotlib's format name for each
PLOT_FORMATS = {".png": "png", ".pdf": "pdf", ".svg": "svg"}

#: at most this many episodes are drawn on one plot (the first in full colour, the rest faint)
MAX_PLOTTED_EPISODES = 20
#: a plot title wraps at this many characters (a worst-case replay sets several parameters at once)
TITLE_WIDTH = 100
#: significant digits of a number in a title (the reproducing command holds the exact values)
TITLE_DIGITS = 4
_SETTING_NUMBER = re.compile(r"(?<==)[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?(?=\s|$)")


def plot_title(title: str) -> str:
    """``title`` with the numbers of its ``name=value`` words to 4 significant digits, wrapped to lines."""
    from pretrial.console import fmt_number

    short = _SETTING_NUMBER.sub(lambda m: fmt_number(float(m[0]), TITLE_DIGITS), title)
    return "\n".join(textwrap.wrap(short, TITLE_WIDTH, break_on_hyphens=False)) or short


def physical_inputs(physics: Physics, actions: np.ndarray, params: np.ndarray) -> np.ndarray | None:
    """Actions (T, N, A) in physical units via ``physics.actuate``, or None if the plant has no such map."""
    t, n, a = actions.shape
    try:
        out = physics.actuate(actions.reshape(t * n, a), np.tile(params, (t, 1)))
    except NotImplementedError:
        return None
    return np.asarray(out, dtype=float).reshape(t, n, a)


def trace_csv(physics: Physics, trace: Mapping[str, np.ndarray], params: np.ndarray, steps: np.ndarray) -> str:
    """CSV text: one row per control period of each episode, plus its final state.

    Columns: ``episode``, ``step``, ``time [s]``, the state (``x [m]``, ...),
    the observation the policy measured (``obs.x [m]``), the applied action in
    [-1, 1] (``action.force [full scale]``) and, where the plant maps actions
    to physical inputs, that input (``input.force [N]``). The last row of an
    episode holds its final state with the other cells empty. Numbers are
    written with ``repr`` (they read back exactly).
    """
    states, obs, actions = trace["state"], trace["obs"], trace["action"]
    inputs = physical_inputs(physics, actions, params)
    header = ["episode", "step", "time [s]"]
    header += [f"{n} [{u}]" for n, u in zip(physics.state_names, physics.state_units)]
    header += [f"obs.{n} [{u}]" for n, u in zip(physics.obs_names, physics.obs_units)]
    header += [f"action.{n} [full scale]" for n in physics.action_names]
    if inputs is not None:
        header += [f"input.{n} [{u}]" for n, u in zip(physics.action_names, physics.action_units)]
    width = len(header) - 3 - physics.state_dim
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(header)
    dt = physics.dt
    for i, n in enumerate(np.asarray(steps, dtype=np.int64)):
        parts = [obs[:n, i], actions[:n, i]] + ([inputs[:n, i]] if inputs is not None else [])
        body = np.concatenate(parts, axis=1) if n else np.zeros((0, width))
        for k in range(n + 1):
            cells = [repr(float(v)) for v in states[k, i]]
            rest = [repr(float(v)) for v in body[k]] if k < n else [""] * width
            writer.writerow([i, k, repr(k * dt), *cells, *rest])
    return buf.getvalue()


def write_trace_csv(path: str | Path, physics: Physics, trace: Mapping[str, np.ndarray], params: np.ndarray,
                    steps: np.ndarray) -> None:
    """Write :func:`trace_csv` to ``path`` atomically."""
    atomic_write_text(path, trace_csv(physics, trace, params, steps))


def plot_format(path: str | Path) -> str:
    """matplotlib format of a plot file by its suffix; InputError naming the valid ones otherwise."""
    fmt = PLOT_FORMATS.get(Path(path).suffix.lower())
    if fmt is None:
        raise InputError(f"--plot {path}: unknown suffix; use one of {', '.join(PLOT_FORMATS)}")
    return fmt


def state_groups(physics: Physics) -> list[tuple[str, list[int]]]:
    """States grouped by unit, in state order: (unit, state indices) per subplot."""
    groups: dict[str, list[int]] = {}
    for i, unit in enumerate(physics.state_units):
        groups.setdefault(unit, []).append(i)
    return list(groups.items())


def plot_traces(path: str | Path, physics: Physics, trace: Mapping[str, np.ndarray], params: np.ndarray,
                steps: np.ndarray, title: str = "") -> None:
    """States (one subplot per unit) and actions against time, with the task's limits drawn.

    Limits come from :func:`task_limits` for the first episode's parameters:
    failure limits as dashed red lines, tolerances (kind ``"band"``, and the
    bands of the regulated states) as green bands; each state's target
    (``physics.target_state``) is a dotted line in the state's colour; the actions carry their range
    [-1, 1]. The first episode is drawn in full colour, up to
    :data:`MAX_PLOTTED_EPISODES` others faintly. The title's numbers are
    shortened and it wraps (:func:`plot_title`). The format follows the suffix
    (PNG, PDF or SVG); the file is written atomically.
    """
    fmt = plot_format(path)
    states, actions = trace["state"], trace["action"]
    steps = np.asarray(steps, dtype=np.int64)
    groups = state_groups(physics)
    rows = len(groups) + 1
    fig = new_figure(8.0, 1.9 * rows + 0.6)
    fig.set_layout_engine("constrained")  # keeps the title close to the first subplot
    axes = fig.subplots(rows, 1, sharex=True, squeeze=False)[:, 0]
    target = physics.target_state(params[:1])[0]
    limits = task_limits(physics, params[0], target)
    dt = physics.dt
    shown = range(min(len(steps), MAX_PLOTTED_EPISODES))
    for ax, (unit, idx) in zip(axes, groups):
        for c, j in enumerate(idx):
            for e in shown:
                n = steps[e]
                label = physics.state_names[j] if e == 0 else None
                ax.plot(np.arange(n + 1) * dt, states[: n + 1, e, j], color=f"C{c % 10}", lw=1.2 if e == 0 else 0.6,
                        alpha=1.0 if e == 0 else 0.35, label=label)
        _draw_limits(ax, [lim for j in idx for lim in limits.get(physics.state_names[j], [])])
        _draw_targets(ax, [(target[j], f"C{c % 10}", physics.state_names[j]) for c, j in enumerate(idx)])
        ax.set_ylabel(f"[{unit}]")
        ax.grid(alpha=0.3)
        ax.legend(loc="upper right", fontsize=7, ncol=min(len(idx), 4))
    ax = axes[-1]
    for j, name in enumerate(physics.action_names):
        for e in shown:
            n = steps[e]
            ax.step(np.arange(n) * dt, actions[:n, e, j], where="post", color=f"C{j % 10}", lw=1.0 if e == 0 else 0.5,
                    alpha=1.0 if e == 0 else 0.35, label=f"action {name}" if e == 0 else None)
    _draw_limits(ax, [TraceLimit(-1.0, 1.0, "actuator range")])
    ax.set_ylabel("[full scale]")
    ax.set_xlabel("time [s]")
    ax.grid(alpha=0.3)
    ax.legend(loc="upper right", fontsize=7, ncol=min(physics.action_dim, 4))
    if title:
        fig.suptitle(plot_title(title), fontsize=9)
    buf = io.BytesIO()
    fig.savefig(buf, format=fmt, bbox_inches="tight")
    atomic_write_bytes(path, buf.getvalue())


def task_limits(physics: Physics, params: np.ndarray, target: np.ndarray) -> dict[str, list[TraceLimit]]:
    """``physics.trace_limits`` plus a tolerance band about the target of each regulated state.

    The bands are the plant's own (``regulated`` / ``regulation_band``): what the loop-quality
    checks hold a regulated state to at the end of an episode. ``params`` is one row (P,).
    """
    limits = {k: list(v) for k, v in physics.trace_limits(params).items()}
    names = list(physics.regulated())
    if names:
        half = physics.regulation_band(params[None, :])[0]
        for name, h in zip(names, half, strict=True):
            if name in physics.state_names:
                t = float(target[physics.state_names.index(name)])
                limits.setdefault(name, []).append(TraceLimit(t - float(h), t + float(h), f"{name} band", "band"))
    return limits


def _draw_limits(ax, limits: Sequence[TraceLimit]) -> None:
    seen = set()
    for lim in limits:
        # a band the plant declares twice (a trace limit and a regulation band) is drawn once
        key = (round(lim.low, 12), round(lim.high, 12), lim.kind) if lim.kind == "band" else lim
        if key in seen:
            continue
        seen.add(key)
        if lim.kind == "band":
            ax.axhspan(lim.low, lim.high, color="tab:green", alpha=0.12, label=lim.label)
        else:
            ax.axhline(lim.low, color="tab:red", ls="--", lw=0.8, label=lim.label)
            ax.axhline(lim.high, color="tab:red", ls="--", lw=0.8)


def _draw_targets(ax, targets: Sequence[tuple[float, str, str]]) -> None:
    """A dotted line at each state's target: in the state's colour, or black where states share it."""
    by_value: dict[float, list[tuple[str, str]]] = {}
    for value, color, name in targets:
        if np.isfinite(value):
            by_value.setdefault(float(value), []).append((color, name))
    for value, owners in by_value.items():
        color, name = owners[0] if len(owners) == 1 else ("black", "")
        ax.axhline(value, color=color, ls=":", lw=1.0, alpha=0.9, label=f"{name} target".strip())
