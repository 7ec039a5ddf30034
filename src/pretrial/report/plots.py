"""Plots of an evolution run: fitness, species and the champion's network.

matplotlib only, drawn off-screen (Agg) and saved atomically.
"""

from __future__ import annotations

import io
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from pretrial.files import atomic_write_bytes


def new_figure(width: float = 7.0, height: float = 4.0):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), dpi=110)
    FigureCanvasAgg(fig)
    return fig


def save_figure(fig: Any, path: str | Path) -> None:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", bbox_inches="tight")
    atomic_write_bytes(path, buf.getvalue())


def plot_fitness(history: Sequence[Mapping[str, Any]], path: str | Path, target: float | None = None) -> None:
    """Best and mean fitness (with one standard deviation band) per generation."""
    gen = np.array([r["generation"] for r in history])
    best = np.array([r["best"] for r in history], float)
    mean = np.array([r["mean"] for r in history], float)
    std = np.array([r["stdev"] for r in history], float)
    fig = new_figure()
    ax = fig.add_subplot(1, 1, 1)
    ax.plot(gen, best, label="best", color="C0", lw=2)
    ax.plot(gen, mean, label="mean", color="C1")
    ax.fill_between(gen, mean - std, mean + std, color="C1", alpha=0.2, label="mean ± 1 sd")
    if target is not None:
        ax.axhline(target, color="k", ls="--", lw=1, label="target")
    ax.set_xlabel("generation")
    ax.set_ylabel("fitness (mean episode return)")
    ax.grid(alpha=0.3)
    ax.legend(loc="lower right")
    save_figure(fig, path)


def plot_species(sizes: Sequence[Mapping[int, int]], path: str | Path) -> None:
    """Stacked species sizes per generation (one band per species id)."""
    ids = sorted({k for row in sizes for k in row})
    table = np.array([[row.get(i, 0) for i in ids] for row in sizes], float).T if ids else np.zeros((1, len(sizes)))
    fig = new_figure()
    ax = fig.add_subplot(1, 1, 1)
    ax.stackplot(np.arange(len(sizes)), table, linewidth=0.3, edgecolor="white")
    ax.set_xlabel("generation")
    ax.set_ylabel("genomes per species")
    ax.set_title(f"{len(ids)} species over the run")
    ax.margins(x=0)
    save_figure(fig, path)


def plot_network(spec: Mapping[str, Any], path: str | Path, input_names: Sequence[str] = (),
                 output_names: Sequence[str] = ()) -> None:
    """The champion's topology: inputs left, outputs right, hidden nodes by depth.

    ``spec`` holds ``inputs`` and ``outputs`` (node keys), ``nodes`` (dicts with
    ``key`` and ``activation``) and ``connections`` (dicts with ``in``, ``out``,
    ``weight``).
    """
    inputs, outputs = list(spec["inputs"]), list(spec["outputs"])
    conns = [(c["in"], c["out"], c["weight"]) for c in spec["connections"]]
    hidden = [n["key"] for n in spec["nodes"] if n["key"] not in outputs]
    act = {n["key"]: n.get("activation", "") for n in spec["nodes"]}
    # depth = longest path from an input (cycles cut by a visit bound)
    depth = {k: 0 for k in inputs}
    for _ in range(len(hidden) + 2):
        for a, b, _w in conns:
            if b in hidden and a in depth and a != b:
                depth[b] = max(depth.get(b, 1), depth[a] + 1)
    max_d = max([depth.get(h, 1) for h in hidden], default=0) + 1
    pos: dict[int, tuple[float, float]] = {}
    for i, k in enumerate(inputs):
        pos[k] = (0.0, -(i - (len(inputs) - 1) / 2))
    by_depth: dict[int, list[int]] = {}
    for h in hidden:
        by_depth.setdefault(depth.get(h, 1), []).append(h)
    for d, keys in by_depth.items():
        for i, k in enumerate(sorted(keys)):
            pos[k] = (float(d), -(i - (len(keys) - 1) / 2) * 0.9 + 0.25 * (d % 2))
    for i, k in enumerate(outputs):
        pos[k] = (float(max_d), -(i - (len(outputs) - 1) / 2))
    fig = new_figure(7.0, max(3.0, 0.45 * max(len(inputs), len(outputs), 4)))
    ax = fig.add_subplot(1, 1, 1)
    wmax = max([abs(w) for *_, w in conns], default=1.0) or 1.0
    for a, b, w in conns:
        if a not in pos or b not in pos:
            continue
        (x0, y0), (x1, y1) = pos[a], pos[b]
        color = "tab:red" if w < 0 else "tab:blue"
        lw = 0.5 + 2.5 * abs(w) / wmax
        if a == b:
            ax.add_patch(_loop_patch(x0, y0, color, lw))
        else:
            ax.annotate("", xy=(x1, y1), xytext=(x0, y0),
                        arrowprops={"arrowstyle": "->", "color": color, "lw": lw, "alpha": 0.7,
                                    "connectionstyle": "arc3,rad=0.25" if x1 <= x0 else "arc3,rad=0.05"})
    for k, (x, y) in pos.items():
        kind = "input" if k in inputs else "output" if k in outputs else "hidden"
        face = {"input": "#d9d9d9", "output": "#9ecae1", "hidden": "white"}[kind]
        ax.scatter([x], [y], s=420, c=face, edgecolors="k", zorder=3)
        label = act.get(k, "")[:4] if kind != "input" else ""
        ax.text(x, y, label, ha="center", va="center", fontsize=6, zorder=4)
    for names, keys, dx, ha in ((input_names, inputs, -0.15, "right"), (output_names, outputs, 0.15, "left")):
        for name, k in zip(names, keys):
            ax.text(pos[k][0] + dx, pos[k][1], name, ha=ha, va="center", fontsize=8)
    ax.set_title(f"{len(hidden)} hidden nodes, {len(conns)} enabled connections (blue +, red -)")
    ax.set_xlim(-1.5, max_d + 1.5)
    ax.axis("off")
    save_figure(fig, path)


def _loop_patch(x: float, y: float, color: str, lw: float):
    from matplotlib.patches import Circle

    return Circle((x, y + 0.22), 0.12, fill=False, color=color, lw=lw, alpha=0.7)
