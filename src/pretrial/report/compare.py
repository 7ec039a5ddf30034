"""Several sweeps of one plan side by side: verdicts, requirements, Monte Carlo, edges and loop margins.

Sweeps compare only when they ran the same plan (equal resolved-plan hashes): the same
requirements, dispersions and seed, so a difference in a row is a difference of the controllers.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path
from typing import Any

from pretrial.analysis.results import SweepResults
from pretrial.console import CAUTIONS
from pretrial.errors import InputError
from pretrial.files import atomic_write_bytes, atomic_write_text
from pretrial.report.document import (
    DASH,
    Block,
    Heading,
    Items,
    Para,
    Table,
    cell,
    evidence,
    passed,
    to_html,
    to_markdown,
)


def check_same_plan(sweeps: Sequence[SweepResults], labels: Sequence[str]) -> None:
    """InputError naming the first sweep whose plan differs from the first one's."""
    first = sweeps[0]
    for s, label in zip(sweeps[1:], labels[1:]):
        if s.plan_hash != first.plan_hash:
            raise InputError(f"{label}: ran plan {s['plan'].get('path')} (sha256 {s.plan_hash[:12]}), not the plan of "
                             f"{labels[0]} ({first['plan'].get('path')}, sha256 {first.plan_hash[:12]}); a comparison "
                             "needs sweeps of the same plan")


def _who(s: SweepResults) -> str:
    pol = s["policy"]
    if pol.get("kind") == "lqr":
        return "LQR baseline"
    digest = pol.get("content_sha256") or ""
    return f"{pol.get('path')} ({digest[:12]})" if digest else str(pol.get("path"))


def _requirement_rows(sweeps: Sequence[SweepResults]) -> list[list[str]]:
    names: list[str] = []
    for s in sweeps:
        names += [r.name for r in s.requirements if r.name not in names]
    rows = []
    for name in names:
        required = next((cell(r.required) for s in sweeps for r in s.requirements if r.name == name), DASH)
        row = [name, required]
        for s in sweeps:
            r = next((r for r in s.requirements if r.name == name), None)
            row.append(DASH if r is None else f"{cell(r.measured)} ({passed(r.passed)})")
        rows.append(row)
    return rows


def _montecarlo_row(sweeps: Sequence[SweepResults]) -> list[str]:
    out = ["Monte Carlo success"]
    for s in sweeps:
        mc = s.doc.get("montecarlo")
        out.append(evidence(mc["successes"], mc["samples"], mc.get("ci95")) if mc else DASH)
    return out


def _worstcase_row(sweeps: Sequence[SweepResults]) -> list[str]:
    out = ["worst case found (score, failure)"]
    for s in sweeps:
        wc = s.doc.get("worstcase")
        out.append(f"{cell(wc['score'])}, {wc.get('failure') or 'no failure'}" if wc else DASH)
    return out


def _edge_rows(sweeps: Sequence[SweepResults]) -> list[list[str]]:
    names: list[str] = []
    for s in sweeps:
        names += [m["name"] for m in s.doc.get("margins") or [] if m["name"] not in names]
    rows = []
    for name in names:
        row = [name]
        for s in sweeps:
            m = next((m for m in s.doc.get("margins") or [] if m["name"] == name), None)
            row.append(DASH if m is None else f"{cell(m['low'])} to {cell(m['high'])} {m.get('unit') or ''}".rstrip())
        rows.append(row)
    return rows


def _loop_rows(sweeps: Sequence[SweepResults]) -> list[list[str]]:
    rows = []
    for key, title in (("linear", "continuous"), ("linear_sampled", "sampled")):
        channels: list[str] = []
        for s in sweeps:
            channels += [c["channel"] for c in s.doc.get(key) or [] if c["channel"] not in channels]
        for ch in channels:
            row = [f"{ch} ({title})"]
            for s in sweeps:
                c = next((c for c in s.doc.get(key) or [] if c["channel"] == ch), None)
                row.append(DASH if c is None else f"{cell(c['gain_margin_db'])} dB, {cell(c['phase_margin_deg'])} deg")
            rows.append(row)
    return rows


def comparison_document(sweeps: Sequence[SweepResults], labels: Sequence[str]) -> list[Block]:
    """The comparison's blocks in reading order (one column per sweep, in the order given)."""
    check_same_plan(sweeps, labels)
    first = sweeps[0]
    heads = ["", *labels]
    blocks: list[Block] = [
        Heading(1, "pretrial sweep comparison"),
        Para(f"Plan {first['plan'].get('path')} (sha256 {first.plan_hash[:12]}), environment {first['env']['id']}, "
             f"seed {first['seed']}: every sweep below ran this plan, so the samples and requirements are the same."),
        Heading(2, "Verdicts"),
        Table(heads, [["controller", *[_who(s) for s in sweeps]],
                      ["verdict", *[s.verdict.upper() for s in sweeps]],
                      _montecarlo_row(sweeps), _worstcase_row(sweeps)]),
        Heading(2, "Requirements"),
        Table(["requirement", "required", *labels], _requirement_rows(sweeps)),
    ]
    edges = _edge_rows(sweeps)
    if edges:
        blocks += [Heading(2, "Parameter edges (one at a time; last value meeting the required rate)"),
                   Table(["name", *labels], edges)]
    loops = _loop_rows(sweeps)
    if loops:
        blocks += [Heading(2, "Loop margins (gain margin, phase margin)"), Table(["loop", *labels], loops)]
    cautions = list(dict.fromkeys([c for s in sweeps for c in s.doc.get("cautions") or []] + list(CAUTIONS)))
    blocks += [Heading(2, "Cautions"), Items(cautions)]
    return blocks


def write_comparison(sweeps: Sequence[SweepResults], labels: Sequence[str], out_dir: str | Path) -> list[Path]:
    """Write ``comparison.md`` and a self-contained ``comparison.html`` into ``out_dir`` (each atomically)."""
    blocks = comparison_document(sweeps, labels)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    atomic_write_text(out / "comparison.md", to_markdown(blocks))
    atomic_write_bytes(out / "comparison.html", to_html(blocks, {}, title="pretrial sweep comparison").encode("utf-8"))
    return [out / "comparison.md", out / "comparison.html"]


def default_labels(paths: Sequence[str | Path]) -> list[str]:
    """A short label per sweep: its directory name, made unique with a counter where two are equal."""
    labels: list[str] = []
    for p in paths:
        q = Path(p)
        base = (q if q.is_dir() else q.parent).name or str(q)
        label, k = base, 2
        while label in labels:
            label, k = f"{base} ({k})", k + 1
        labels.append(label)
    return labels


def summary_rows(sweeps: Sequence[SweepResults], labels: Sequence[str]) -> list[dict[str, Any]]:
    """One plain row per sweep (label, verdict, failing requirements, Monte Carlo rate) for text or JSON."""
    return [{"label": lab, "verdict": s.verdict, "failing": s.failing, "montecarlo_success_rate":
             s.montecarlo_success_rate, "directory": str(s.directory) if s.directory else None}
            for s, lab in zip(sweeps, labels)]
