"""A sweep's readable output: ``margins.csv``, the plots, ``report.md`` and a self-contained ``report.html``.

Everything is drawn from the ``results.json`` dict (schema "pretrial.sweep",
version 1) plus, for the Monte Carlo histograms, the per-sample arrays. The
report is built once as a list of blocks (headings, paragraphs, tables, code
lines, images) and rendered twice, to Markdown and to HTML, so both always say
the same thing in the same order: verdict, requirements, evidence, baseline
comparison, reproduction commands, cautions, how to read it.

The HTML file opens offline: inline CSS, images as base64 data URIs, no
scripts, no links. Every text that came from the results is escaped.
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

from pretrial.analysis.loop_margins import GAIN_SCAN_LIMIT
from pretrial.analysis.samples import SampleHistograms, sample_histograms
from pretrial.console import CAUTIONS
from pretrial.errors import FileFormatError
from pretrial.files import atomic_write_bytes, atomic_write_text
from pretrial.report import sweep_plots
from pretrial.report.csv_format import csv_text
from pretrial.report.document import (
    DASH,
    INF,
    Block,
    Code,
    Heading,
    Image,
    Items,
    Para,
    Table,
    Verdict,
    cell,
    evidence,
    interval,
    num,
    passed,
    rate,
    ratio,
    to_html,
    to_markdown,
    word,
)
from pretrial.report.samples_csv import check_samples, varied_names

MARGIN_COLUMNS = ("name", "unit", "nominal", "low", "high", "low_ratio", "high_ratio", "low_failure",
                  "high_failure", "low_limit_reached", "high_limit_reached")


# --------------------------------------------------------------------------- #
# document blocks
# --------------------------------------------------------------------------- #


# --------------------------------------------------------------------------- #
# number and word formatting (None never shows as "None")
# --------------------------------------------------------------------------- #


def _units(results: Mapping[str, Any]) -> dict[str, str]:
    """Unit of every varied name mentioned anywhere in the results."""
    units: dict[str, str] = {}
    for part in (results, results.get("baseline") or {}):
        for m in part.get("margins") or []:
            units.setdefault(m["name"], m.get("unit") or "")
        for v in (part.get("montecarlo") or {}).get("varied") or []:
            units.setdefault(v["name"], v.get("unit") or "")
        sm = part.get("success_map") or {}
        for axis in ("x", "y"):
            if sm.get(axis):
                units.setdefault(sm[axis], sm.get(f"{axis}_unit") or "")
    return units


def _values(values: Mapping[str, Any] | None, units: Mapping[str, str]) -> str:
    if not values:
        return DASH
    return "; ".join(f"{k} = {num(v, units.get(k))}" for k, v in values.items())


# --------------------------------------------------------------------------- #
# the document
# --------------------------------------------------------------------------- #
def _verdict(results: Mapping[str, Any]) -> Verdict:
    reqs = results.get("requirements") or []
    failing = [r for r in reqs if r.get("pass") is False]
    verdict = results.get("verdict")
    if verdict == "pass":
        why = f"all {len(reqs)} requirements met" if reqs else "no requirement failed (none were set)"
        box = Verdict(True, "PASS", [why])
    elif verdict == "fail":
        if failing:
            why = f"{len(failing)} of {len(reqs)} requirements not met: " + "; ".join(
                f"{r.get('name')} (required {cell(r.get('required'))}, measured {cell(r.get('measured'))})"
                for r in failing)
        else:
            why = "the sweep failed without a failing requirement listed (see the evidence below)"
        box = Verdict(False, "FAIL", [why])
    else:
        box = Verdict(None, "NO VERDICT", ["the results carry no verdict"])
    base = results.get("baseline")
    if base:
        box.lines.append(f"LQR baseline, for comparison: {str(base.get('verdict') or DASH).upper()}")
    return box


def _requirements(reqs: Sequence[Mapping[str, Any]] | None) -> list[Block]:
    out: list[Block] = [Heading(2, "Requirements")]
    if not reqs:
        return [*out, Para("No requirements were set.")]
    rows = [[str(r.get("name")), cell(r.get("required")), _measured(r), passed(r.get("pass"))] for r in reqs]
    return [*out, Table(["requirement", "required", "measured", "pass"], rows)]


def _measured(r: Mapping[str, Any]) -> str:
    """A requirement's measured value; a rate requirement that carries its interval shows it too."""
    text = cell(r.get("measured"))
    ci = r.get("interval")
    if isinstance(ci, (list, tuple)) and len(ci) == 2:
        point = f"rate {rate(r['point'])}, " if r.get("point") is not None else ""
        text += f" ({point}Wilson 95 % interval {interval(ci)})"
    return text


def _setup(results: Mapping[str, Any]) -> list[Block]:
    pol = results.get("policy") or {}
    env = results.get("env") or {}
    plan = results.get("plan") or {}
    sha = pol.get("content_sha256")
    items = [
        f"policy: {word(pol.get('kind'))} {pol.get('path') or ''}".rstrip()
        + (f" (sha256 {sha[:16]}…)" if sha else ""),
        f"plant: {word(env.get('id'))}" + (f", options {cell(env.get('options'))}" if env.get("options") else "")
        + (f", parameters {cell(env.get('params'))}" if env.get("params") else ""),
        f"plan: {word(plan.get('path'))}" + (f" (sha256 {plan['content_sha256'][:16]}…)"
                                             if plan.get("content_sha256") else ""),
        f"seed {cell(results.get('seed'))}, {cell(results.get('episodes_per_point'))} episodes per point, "
        f"required success rate {rate(results.get('required_success_rate'))}",
    ]
    quality = ((plan.get("resolved") or {}).get("require") or {}).get("quality")
    if quality:
        items.append(_quality_line(quality))
    for name, why in (results.get("skipped") or {}).items():
        items.append(f"{name} skipped: {why}")
    cal = (plan.get("resolved") or {}).get("calibration")
    if cal:
        items.append(f"calibrated plant: {', '.join(cal['names'])} at their estimates from {cal['path']} "
                     f"(sha256 {cal['content_sha256'][:16]}…) in every analysis; Monte Carlo draws them jointly "
                     f"from its {cal['replicates']} bootstrap replicates, so their correlations are kept")
    res = results.get("residual")
    if res:
        items.append(_residual_line(res))
    if results.get("content_sha256"):
        items.append(f"results content sha256 {results['content_sha256']}")
    from pretrial.sim.perturb import simulation_notes  # how each varied perturbation was simulated (roundings stated

    varied = [v.get("name") for v in ((plan.get("resolved") or {}).get("vary") or [])]
    items += [f"simulated: {note}" for note in simulation_notes(varied)]
    return [Heading(2, "What was tested"), Items(items)]


def _residual_line(res: Mapping[str, Any]) -> str:
    """The hybrid plant: which residual it was swept on, and which one the policy was trained on."""
    line = (f"hybrid plant: the physics plus the learned residual {res.get('path')} (sha256 {res.get('sha256')}); "
            f"its trust region is the fitted data's range of each state and action widened by "
            f"{num(res.get('margin'))} of its span")
    trained = res.get("trained_on")
    if trained:
        line += f"; the policy was trained on {trained.get('path')} (sha256 {trained.get('sha256')})"
    return line


def _envelope(env: Mapping[str, Any] | None, who: str = "") -> list[Block]:
    """Per analysis, the share of the simulated time outside the residual's data."""
    if not env:
        return []
    rows = [[name, cell(c.get("episodes")), rate(c.get("share")), cell(c.get("episodes_outside")),
             rate(c.get("max_episode_share")), ", ".join(list(c.get("first_variables") or {})[:3]) or DASH]
            for name, c in [*(env.get("analyses") or {}).items(), ("all", env.get("all") or {})]]
    judged = "the Monte Carlo" if env.get("judged_on") == "montecarlo" else "every episode of the sweep"
    return [Heading(2, f"Trust region of the hybrid plant{who}"),
            Para(f"Share of the simulated time (control steps) that started outside the data the residual was "
                 f"fitted on; the requirement is judged on {judged}: {rate(env.get('share'))}. Outside it the "
                 "learned correction is extrapolated, and results there rest on a guess."),
            Table(["analysis", "episodes", "time outside", "episodes outside", "worst episode", "first out"], rows)]


def _quality_line(q: Mapping[str, Any]) -> str:
    """What 'success' meant: the plan's loop-quality limits, in words."""
    parts = []
    if q.get("chatter_hz") is not None:
        parts.append(f"at most {cell(q['chatter_hz'])} command reversals per second (swings past "
                     f"{cell(q.get('chatter_level'))} of full scale)")
    if q.get("saturated_fraction") is not None:
        parts.append(f"a command at its limit in at most {rate(q['saturated_fraction'])} of the periods")
    if q.get("settled"):
        parts.append(f"regulated quantities inside their bands over the last {rate(q.get('settle_window'))} of the "
                     "horizon (reach tasks: the goal hold)" + (f", bands {cell(q['band'])}" if q.get("band") else ""))
    parts.append("mean error over that window within " + (cell(q["offset"]) if q.get("offset") else "half the band"))
    if q.get("growth"):
        parts.append("no error still growing at the horizon")
    return ("success: no failure limit broken and the loop behaved: " + "; ".join(parts)
            + " (failure words chatter, saturated, not_settled, growing, offset)")


def _margins(margins: Sequence[Mapping[str, Any]] | None, images: Mapping[str, str]) -> list[Block]:
    if not margins:
        return []
    rows = []
    for m in margins:
        u = m.get("unit")

        def edge(side: str, m: Mapping[str, Any] = m, u: str | None = u) -> str:
            return num(m.get(side), u) + (" (range end)" if m.get(f"{side}_limit_reached") else "")

        def past(side: str, m: Mapping[str, Any] = m) -> str:
            if m.get(f"{side}_limit_reached"):
                return "none (passed to the range end)"
            return word(m.get(f"{side}_failure")) if m.get(f"{side}_failure") else "none found"

        rng = m.get("range") or [None, None]
        rows.append([m["name"], num(m.get("nominal"), u), edge("low"), edge("high"), ratio(m.get("low_ratio")),
                     ratio(m.get("high_ratio")), past("low"), past("high"),
                     f"{num(rng[0], u)} to {num(rng[1], u)}"])
    out: list[Block] = [
        Heading(2, "Margins (one parameter at a time)"),
        Para("Each parameter was moved away from its nominal value with every other parameter at nominal, until "
             "it no longer passed the success requirement. The edges are the last passing values; the failure "
             "named is the commonest one just past the edge."),
        Table(["parameter", "nominal", "low edge", "high edge", "low ratio", "high ratio", "failure past low",
               "failure past high", "searched range"], rows),
    ]
    edges = _edge_evidence(margins)
    if edges is not None:
        out += [Para("The evidence at each edge: successes of the episodes, success rate and its Wilson 95 % "
                     "interval, at the last passing value and at the first failing value past it (a point passes "
                     "when the interval's lower bound reaches the required rate)."), edges]
    out += [Image(f, c) for f, c in images.items()
            if f == "margins.png" or (f.startswith("success_") and f != "success_map.png")]
    return out


def _point_evidence(p: Mapping[str, Any] | None) -> str:
    if not p:
        return DASH
    return evidence(p.get("successes"), p.get("episodes"), [p.get("lower_bound"), p.get("upper_bound")])


def _edge_points(m: Mapping[str, Any], side: str) -> tuple[Mapping[str, Any] | None, Mapping[str, Any] | None]:
    """The margin search's point at the ``side`` edge and the first failing point past it (None if none)."""
    pts = [p for p in m.get("points") or [] if p.get("value") is not None]
    edge = m.get(side)
    at = next((p for p in pts if edge is not None and math.isclose(p["value"], edge, rel_tol=1e-12, abs_tol=0.0)),
              None)
    if m.get("fails_at_nominal"):
        return None, at  # no passing value on either side: the start itself failed
    outward = [p for p in pts if edge is not None and (p["value"] < edge if side == "low" else p["value"] > edge)]
    failing = [p for p in outward if p.get("pass") is False]
    past = (max if side == "low" else min)(failing, key=lambda p: p["value"]) if failing else None
    return at, past


def _edge_evidence(margins: Sequence[Mapping[str, Any]]) -> Table | None:
    rows = []
    for m in margins:
        if not m.get("points"):
            continue
        u = m.get("unit")
        for side in ("low", "high"):
            at, past = _edge_points(m, side)
            first = num(at.get("value"), u) if at else "none (fails at nominal)" if m.get("fails_at_nominal") else DASH
            rows.append([m["name"], side, first, _point_evidence(at),
                         num(past.get("value"), u) if past else DASH, _point_evidence(past)])
    if not rows:
        return None
    return Table(["parameter", "side", "last passing value", "there: successes, rate [Wilson 95 %]",
                  "first failing value", "there: successes, rate [Wilson 95 %]"], rows)


def _montecarlo(mc: Mapping[str, Any] | None, required: Any, units: Mapping[str, str],
                images: Mapping[str, str]) -> list[Block]:
    if not mc:
        return []
    out: list[Block] = [Heading(2, "Monte Carlo"), Para(
        f"{cell(mc.get('successes'))} of {cell(mc.get('samples'))} samples succeeded: success rate "
        f"{rate(mc.get('success_rate'))}, Wilson 95 % interval {interval(mc.get('ci95'))} "
        f"(required {rate(required)}).")]
    varied = mc.get("varied") or []
    if varied:
        out.append(Table(["parameter", "distribution", "low", "high"],
                         [[v["name"], word(v.get("distribution")), num(v.get("low"), v.get("unit")),
                           num(v.get("high"), v.get("unit"))] for v in varied]))
    modes = mc.get("failure_modes") or {}
    n = mc.get("samples") or 0
    if modes:
        out.append(Table(["failure", "samples", "share"],
                         [[str(k), cell(v), rate(v / n) if n and v is not None else DASH]
                          for k, v in modes.items()]))
    quant = mc.get("score_quantiles") or {}
    if quant:
        out.append(Table(["score quantile", "episode score"], [[str(q), num(v)] for q, v in quant.items()]))
    worst = mc.get("worst") or []
    if worst:
        out.append(Para("Lowest-scoring samples:"))
        out.append(Table(["score", "outcome", "values", "seed"],
                         [[num(w.get("score")), "success" if w.get("success") else f"failure: {word(w.get('failure'))}",
                           _values(w.get("values"), units), cell(w.get("seed"))] for w in worst]))
    if mc.get("samples_file"):
        out.append(Para(f"Every sample (values, seed, outcome, score): {mc['samples_file']}"))
    if "montecarlo.png" in images:
        out.append(Image("montecarlo.png", images["montecarlo.png"]))
    return out


def _worstcase(wc: Mapping[str, Any] | None, units: Mapping[str, str]) -> list[Block]:
    if not wc:
        return []
    n = wc.get("episodes")
    wins = round(wc["success_rate"] * n) if wc.get("success_rate") is not None and n else None
    items = [
        f"search: {word(wc.get('method'))}, {cell(wc.get('evaluations'))} evaluations of "
        f"{cell(n)} episodes each",
        f"lowest score {num(wc.get('score'))}, successes there {evidence(wins, n)}, "
        f"failure {word(wc.get('failure'))}, seed {cell(wc.get('seed'))}",
    ]
    confirm = wc.get("confirm")
    if confirm:
        items.append(f"confirmed on fresh episodes (seed {cell(confirm.get('seed'))}): "
                     f"{evidence(confirm.get('successes'), confirm.get('episodes'), confirm.get('ci95'))}")
    # the values in a table, 4 significant digits (the replay command below holds them exactly)
    values = wc.get("values") or {}
    out: list[Block] = [Heading(2, "Worst case"), Items(items)]
    if values:
        out.append(Table(["parameter", "value at the worst case"],
                         [[k, num(v, units.get(k))] for k, v in values.items()]))
    return out


def _sensitivity(sens: Mapping[str, Any] | None) -> list[Block]:
    if not sens:
        return []
    rows = [[i["name"], f"{num(i.get('S1'), digits=3)} ± {num(i.get('S1_conf'), digits=2)}",
             f"{num(i.get('ST'), digits=3)} ± {num(i.get('ST_conf'), digits=2)}"] for i in sens.get("indices") or []]
    return [Heading(2, "Sensitivity (Sobol indices)"),
            Para(f"{word(sens.get('method'))} of the {word(sens.get('score'))}, {cell(sens.get('samples'))} "
                 "samples. S1: share of the score variance due to the parameter alone; ST: including its "
                 "interactions; ± the 95 % confidence half-width."),
            Table(["parameter", "S1", "ST"], rows)]


def _success_map(sm: Mapping[str, Any] | None, images: Mapping[str, str]) -> list[Block]:
    if not sm:
        return []
    out: list[Block] = [Heading(2, "Success map"), Para(
        f"Success rate over {word(sm.get('x'))} and {word(sm.get('y'))} together, "
        f"{cell(sm.get('episodes'))} episodes per cell, every other parameter at nominal, over each "
        "parameter's margin search range.")]
    if "success_map.png" in images:
        out.append(Image("success_map.png", images["success_map.png"]))
    grid = _map_table(sm)
    if grid is not None:
        out += [Para("Each cell: successes of the episodes, success rate [Wilson 95 % interval]."), grid]
    return out


def _map_table(sm: Mapping[str, Any]) -> Table | None:
    """The map's cells as a table: rows the y values, columns the x values (None without counts)."""
    xs, ys, wins = sm.get("x_values") or [], sm.get("y_values") or [], sm.get("successes")
    if not wins or len(wins) != len(ys):
        return None
    lo, hi = sm.get("lower_bound") or [], sm.get("upper_bound") or []
    n = sm.get("episodes")

    def ci(i: int, j: int) -> list[Any] | None:
        return [lo[i][j], hi[i][j]] if i < len(lo) and i < len(hi) else None

    xu, yu = sm.get("x_unit"), sm.get("y_unit")
    head = [f"{sm.get('y')} (rows) / {sm.get('x')} (columns)", *(num(x, xu) for x in xs)]
    rows = [[num(y, yu), *(evidence(wins[i][j], n, ci(i, j)) for j in range(len(xs)))] for i, y in enumerate(ys)]
    return Table(head, rows)


def _unbounded(value: Any) -> str:
    # in the linear entries null means no limit was found (infinite margin)
    return INF if value is None else num(value)


def _linear_table(entries: Sequence[Mapping[str, Any]]) -> Table:
    rows = []
    for e in entries:
        low = e.get("gain_margin_low")
        low_text = DASH if low is None else "0 (no limit)" if low == 0 else num(low)
        rows.append([str(e.get("channel")), low_text, _unbounded(e.get("gain_margin_high")),
                     _unbounded(e.get("gain_margin_db")), _unbounded(e.get("phase_margin_deg")),
                     _unbounded(e.get("delay_margin_s")), _unbounded(e.get("disk_margin")),
                     f"{num(e.get('disk_gain_low'))} to {_unbounded(e.get('disk_gain_high'))}"
                     if "disk_gain_low" in e else DASH,
                     _unbounded(e.get("disk_phase_deg")) if "disk_phase_deg" in e else DASH])
    return Table(["channel", "gain margin low (×)", "gain margin high (×)", "gain margin (dB)",
                  "phase margin (deg)", "delay margin (s)", "disk margin", "disk gain range (×)",
                  "disk phase (± deg)"], rows)


def _linear_loop(title: str, entries: Sequence[Mapping[str, Any]] | None,
                 details: Mapping[str, Any] | None) -> list[Block]:
    if entries is None and details is None:
        return []
    out: list[Block] = [Heading(3, title)]
    if (details is not None and details.get("linearizable") is False) or not entries:
        reason = (details or {}).get("reason") or "no linear model was produced"
        return [*out, Para(f"not linearizable: {reason}")]
    out.append(_linear_table(entries))
    items = []
    if details:
        if details.get("dt") is not None:
            items.append(f"sample period {num(details['dt'], 's')}, {cell(details.get('delay_steps', 0))} "
                         "period(s) of input delay")
        items.append(f"nominal closed loop stable: {cell(details.get('stable'))}")
        if "multi_loop_disk_margin" in details and len(entries) > 1:
            items.append(f"multi-loop disk margin (all channels at once, lower bound): "
                         f"{_unbounded(details.get('multi_loop_disk_margin'))}")
        items += [f"note: {n}" for n in details.get("notes") or []]
    return [*out, Items(items)] if items else out


def _linear(results: Mapping[str, Any], images: Mapping[str, str]) -> list[Block]:
    details = results.get("linear_details") or {}
    body = _linear_loop("Continuous loop", results.get("linear"), details.get("continuous"))
    body += _linear_loop("Sampled loop (zero-order hold)", results.get("linear_sampled"), details.get("sampled"))
    if not body:
        return []
    out: list[Block] = [Heading(2, "Linear margins (per channel, loop broken at the plant input)"), *body]
    out += [Image(f, images[f]) for f in ("nyquist.png", "bode.png") if f in images]
    return out


def _integrator(ic: Mapping[str, Any] | None) -> list[Block]:
    if not ic:
        return []
    runs = [("nominal", ic.get("nominal") or {})] + [("variant", v) for v in ic.get("variants") or []]
    n = ic.get("episodes")

    def success(r: Mapping[str, Any]) -> str:
        if not n or r.get("success_rate") is None:
            return rate(r.get("success_rate"))
        return evidence(round(r["success_rate"] * n), n)

    rows = [[kind, word(r.get("integrator")), cell(r.get("substeps")), success(r),
             num(r.get("mean_score"))] for kind, r in runs]
    verdict = "Results change with the integrator: FLAGGED" if ic.get("flagged") else "No material change"
    out: list[Block] = [Heading(2, "Integrator check"),
                        Table(["run", "integrator", "substeps", "successes, rate [Wilson 95 %]", "mean score"],
                              rows),
                        Para(f"{verdict}." + (f" {ic['note']}" if ic.get("note") else ""))]
    return out


def _diverged(d: Mapping[str, Any] | None) -> list[Block]:
    if not d:
        return []
    return [Heading(2, "Diverged episodes"),
            Para(f"{d.get('episodes')} episodes diverged: the simulation blew up (a state became infinite or "
                 f"not a number) at {d.get('where')}. They count as failures. Numbers this far out are the model's "
                 "limits as much as the controller's: check the parameter values before reading them as margins."),
            Code("replay one", str((d.get("first") or {}).get("replay", "")))]


def _summary_rows(part: Mapping[str, Any]) -> dict[str, str]:
    """Comparable one-line summaries of one controller's results (row label -> text)."""
    rows = {"verdict": str(part.get("verdict") or DASH).upper()}
    for r in part.get("requirements") or []:
        rows[f"requirement {r.get('name')}"] = f"{cell(r.get('measured'))} ({passed(r.get('pass'))})"
    mc = part.get("montecarlo")
    if mc:
        rows["Monte Carlo success rate"] = f"{rate(mc.get('success_rate'))} [{interval(mc.get('ci95'))}]"
    for m in part.get("margins") or []:
        if m.get("nominal") not in (0, None) and (m.get("low_ratio") is not None or m.get("high_ratio") is not None):
            text = f"{ratio(m.get('low_ratio'))} to {ratio(m.get('high_ratio'))}"
        else:
            text = f"{num(m.get('low'), m.get('unit'))} to {num(m.get('high'), m.get('unit'))}"
        rows[f"margin {m['name']}"] = text
    wc = part.get("worstcase")
    if wc:
        rows["worst-case score"] = f"{num(wc.get('score'))} ({word(wc.get('failure'))})"
    for key, label in (("linear", "continuous"), ("linear_sampled", "sampled")):
        entries = part.get(key)
        if entries == [] or (part.get("linear_details") or {}).get(label, {}).get("linearizable") is False:
            rows[f"linear, {label}"] = "not linearizable"
        for e in entries or []:
            rows[f"linear {e.get('channel')}, {label}"] = (
                f"GM {_unbounded(e.get('gain_margin_db'))} dB, PM {_unbounded(e.get('phase_margin_deg'))} deg, "
                f"disk {_unbounded(e.get('disk_margin'))}")
    ic = part.get("integrator_check")
    if ic:
        rows["integrator check"] = "FLAGGED" if ic.get("flagged") else "no material change"
    return rows


def _baseline(results: Mapping[str, Any]) -> list[Block]:
    base = results.get("baseline")
    if not base:
        return []
    mine, theirs = _summary_rows(results), _summary_rows(base)
    labels = list(dict.fromkeys([*mine, *theirs]))
    out: list[Block] = [
        Heading(2, "Policy vs LQR baseline"),
        Para("The same sweep run with a linear-quadratic regulator designed on the nominal model, as a yardstick: "
             "a policy well below it has room to improve."),
        Table(["", "policy", "LQR baseline"], [[lab, mine.get(lab, DASH), theirs.get(lab, DASH)] for lab in labels]),
    ]
    ctrl = base.get("controller") or {}
    gain = (ctrl.get("gain") or {}).get("rows") or {}
    if gain:
        states = list(dict.fromkeys(s for row in gain.values() for s in row))
        out.append(Para(f"LQR gains K ({(ctrl.get('gain') or {}).get('units', 'u = u* - K (x - x*)')}):"))
        out.append(Table(["action", *states], [[a, *(num(row.get(s)) for s in states)] for a, row in gain.items()]))
    extra = [f"{k.upper()} weights: {cell(ctrl[k])}" for k in ("q", "r") if ctrl.get(k)]
    extra += [f"note: {n}" for n in ctrl.get("notes") or []]
    if extra:
        out.append(Items(extra))
    return out


def _replays(part: Mapping[str, Any], units: Mapping[str, str]) -> list[Code]:
    codes = []
    for w in (part.get("montecarlo") or {}).get("worst") or []:
        if w.get("success") is False and w.get("replay"):
            codes.append(Code(f"Monte Carlo sample, score {num(w.get('score'))}, {word(w.get('failure'))}, "
                              f"seed {cell(w.get('seed'))}: {_values(w.get('values'), units)}", w["replay"]))
    for m in part.get("margins") or []:
        for side in ("low", "high"):
            cmd = m.get(f"replay_{side}")
            if cmd:
                what = "range end, no failure found" if m.get(f"{side}_limit_reached") else \
                    f"failure {word(m.get(f'{side}_failure'))}"
                codes.append(Code(f"{m['name']} just past the {side} margin edge ({what})", cmd))
    wc = part.get("worstcase") or {}
    if wc.get("replay"):
        codes.append(Code(f"worst case, score {num(wc.get('score'))}, {word(wc.get('failure'))}, "
                          f"seed {cell(wc.get('seed'))}", wc["replay"]))
    return codes


def _reproduce(results: Mapping[str, Any], units: Mapping[str, str]) -> list[Block]:
    out: list[Block] = [Heading(2, "Reproduce"), Para(
        "Each command replays one case with its parameter values and seed.")]
    mine = _replays(results, units)
    out += mine or [Para("No failing case or edge to replay.")]
    if results.get("baseline"):
        theirs = _replays(results["baseline"], units)
        if theirs:
            out += [Heading(3, "LQR baseline"), *theirs]
    return out


def _how_to_read() -> list[Block]:
    db = 20.0 * math.log10(GAIN_SCAN_LIMIT)
    return [Heading(2, "How to read this"), Items([
        "Success rates carry a Wilson score 95 % interval. Its lower bound is the rate the episodes support with "
        "about 95 % confidence; a measured rate above the requirement whose lower bound is below it is not yet "
        "evidence of meeting it — run more episodes.",
        "Margins move one parameter at a time with the rest at nominal. Several modest changes together can fail "
        "sooner: the Monte Carlo and worst-case sections cover combinations. \"range end\" means the search "
        "stopped at the end of its range without failing, so the true margin is at least that.",
        "Linear margins hold only near the closed-loop equilibrium for small signals; saturation, large "
        f"disturbances and other nonlinear effects are outside them. {INF} means no limit was found (gains are "
        f"scanned to {db:g} dB).",
        "The numbers are not a certification: they hold for this plant model, these ranges and these seeds only.",
    ])]


def build_document(results: Mapping[str, Any], images: Mapping[str, str] | None = None) -> list[Block]:
    """The report's blocks in reading order (``images``: written PNG file name -> caption)."""
    images = images or {}
    units = _units(results)
    cautions = list(dict.fromkeys([*(results.get("cautions") or []), *CAUTIONS]))
    return [
        Heading(1, "pretrial sweep report"),
        _verdict(results),
        *_requirements(results.get("requirements")),
        *_setup(results),
        *_margins(results.get("margins"), images),
        *_montecarlo(results.get("montecarlo"), results.get("required_success_rate"), units, images),
        *_worstcase(results.get("worstcase"), units),
        *_sensitivity(results.get("sensitivity")),
        *_success_map(results.get("success_map"), images),
        *_linear(results, images),
        *_integrator(results.get("integrator_check")),
        *_diverged(results.get("diverged")),
        *_envelope(results.get("envelope")),
        *_envelope((results.get("baseline") or {}).get("envelope"), " (LQR baseline)"),
        *_baseline(results),
        *_reproduce(results, units),
        Heading(2, "Cautions"), Items(cautions),
        *_how_to_read(),
    ]


# --------------------------------------------------------------------------- #
# renderers
# --------------------------------------------------------------------------- #


# --------------------------------------------------------------------------- #
# CSV files
# --------------------------------------------------------------------------- #
#: significant digits of the numbers in margins.csv: a bisection edge like 0.1 * 0.1 prints as 0.01,
#: not 0.010000000000000002 (the exact values are in results.json and the replay commands)
MARGIN_DIGITS = 12


def write_margins_csv(path: str | Path, results: Mapping[str, Any]) -> bool:
    """``margins.csv``: one row per margin entry (a ``controller`` column first when there is a baseline).

    Empty cells are nulls (no ratio for a zero nominal, no failure found); numbers have
    :data:`MARGIN_DIGITS` significant digits. Returns False (nothing written) when the results have
    no margins.
    """
    base = results.get("baseline")
    sets = [("policy", results.get("margins") or [])]
    if base:
        sets.append(("lqr", base.get("margins") or []))
    if not any(entries for _, entries in sets):
        return False
    headers = (["controller"] if base else []) + list(MARGIN_COLUMNS)
    rows = [([label] if base else []) + [m.get(k) for k in MARGIN_COLUMNS] for label, entries in sets for m in entries]
    atomic_write_text(path, csv_text(headers, rows, MARGIN_DIGITS))
    return True


# --------------------------------------------------------------------------- #
# plots and the whole directory
# --------------------------------------------------------------------------- #
def _file_stem(name: str, taken: set[str]) -> str:
    """A safe file-name part for a parameter name (unique among ``taken``)."""
    stem = re.sub(r"[^A-Za-z0-9_.-]", "_", name).lstrip(".") or "parameter"
    out, k = stem, 2
    while out in taken:
        out, k = f"{stem}_{k}", k + 1
    taken.add(out)
    return out


def _loops(results: Mapping[str, Any]) -> list[tuple[str, Mapping[str, Any], Sequence[Mapping[str, Any]]]]:
    loops = []
    parts = [("policy", results)] + ([("LQR", results["baseline"])] if results.get("baseline") else [])
    for who, part in parts:
        details = part.get("linear_details") or {}
        for kind, key in (("continuous", "linear"), ("sampled", "linear_sampled")):
            d = details.get(kind)
            if d and sweep_plots.loop_curves(d):
                loops.append((f"{who}, {kind}", d, part.get(key) or []))
    return loops


def _histograms(samples: Mapping[str, Any] | SampleHistograms | None) -> SampleHistograms | None:
    """The Monte Carlo histograms, from per-sample arrays (checked) or as the sweep computed them."""
    if samples is None or isinstance(samples, SampleHistograms):
        return samples
    check_samples(samples)
    return sample_histograms(lambda: [samples], ["score", *varied_names(samples)])


def write_plots(results: Mapping[str, Any], out_dir: Path,
                samples: Mapping[str, Any] | SampleHistograms | None = None) -> dict[str, str]:
    """Draw every plot that has data into ``out_dir``; returns written file name -> caption, in report order.

    ``samples``: the Monte Carlo samples as arrays, or their histograms
    (:class:`~pretrial.analysis.samples.SampleHistograms`).
    """
    base = results.get("baseline") or {}
    required = results.get("required_success_rate")
    sets = [(label, part.get("margins") or []) for label, part in (("policy", results), ("LQR baseline", base))]
    sets = [s for s in sets if s[1]]
    written: dict[str, str] = {}
    if sets:
        sweep_plots.plot_margins(sets, out_dir / "margins.png")
        written["margins.png"] = "Margins around nominal (ratio edge / nominal; zero-nominal parameters in units)"
        by_name: dict[str, list[tuple[str, Mapping[str, Any]]]] = {}
        for label, entries in sets:
            for m in entries:
                if m.get("points"):
                    by_name.setdefault(m["name"], []).append((label, m))
        taken = {"map"}  # success_map.png is the 2-D map
        for name, curves in by_name.items():
            file = f"success_{_file_stem(name, taken)}.png"
            sweep_plots.plot_success_curve(curves, required, out_dir / file)
            written[file] = f"Success rate against {name} with the Wilson 95 % interval"
    mc = results.get("montecarlo")
    hist = _histograms(samples) if mc else None
    if hist is not None and hist.samples > 0:
        varied = mc.get("varied") or [{"name": n, "unit": ""} for n in hist.columns if n != "score"]
        sweep_plots.plot_montecarlo(hist, varied, out_dir / "montecarlo.png")
        written["montecarlo.png"] = "Monte Carlo: score and varied values, successes vs failures"
    maps = [(label, part["success_map"]) for label, part in (("policy", results), ("LQR baseline", base))
            if part.get("success_map")]
    if maps:
        sweep_plots.plot_success_map(maps, required, out_dir / "success_map.png")
        written["success_map.png"] = ("Success rate over two parameters (white line: the required rate; each cell: "
                                      "successes of the episodes and the Wilson 95 % interval; boxed: its lower "
                                      "bound meets the required rate)")
    loops = _loops(results)
    if loops:
        sweep_plots.plot_nyquist(loops, out_dir / "nyquist.png")
        written["nyquist.png"] = "Nyquist plot of each loop (red cross: -1; dash-dot: disk-margin exclusion disk)"
        sweep_plots.plot_bode(loops, out_dir / "bode.png")
        written["bode.png"] = "Bode plot of each loop (dots: gain crossover)"
    return written


def _check_results(results: Any) -> None:
    if not isinstance(results, Mapping):
        raise FileFormatError(f"sweep results: expected a JSON object, got {type(results).__name__}")
    if results.get("schema", "pretrial.sweep") != "pretrial.sweep" or results.get("schema_version", 1) != 1:
        raise FileFormatError(f"sweep results: schema {results.get('schema')!r} version "
                              f"{results.get('schema_version')!r} is not pretrial.sweep version 1")


def write_report(results: dict, out_dir: Path, samples: Mapping[str, Any] | SampleHistograms | None = None
                 ) -> list[Path]:
    """Write ``margins.csv``, the plots, ``report.md`` and a self-contained ``report.html`` into ``out_dir``.

    Parameters
    ----------
    results : dict
        The sweep results (``results.json``, schema "pretrial.sweep" version 1); analyses not run are None.
    out_dir : Path
        Output directory (created if missing).
    samples : dict of arrays or SampleHistograms, optional
        The Monte Carlo samples (one array per varied name plus "seed", "success", "failure",
        "score"), or their histograms as :func:`pretrial.analysis.campaign.montecarlo` returns them; without
        them the Monte Carlo plot is left out.

    Returns
    -------
    list of Path
        Every file written, each atomically.
    """
    _check_results(results)
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    paths = []
    if write_margins_csv(out_dir / "margins.csv", results):
        paths.append(out_dir / "margins.csv")
    images = write_plots(results, out_dir, samples)
    paths += [out_dir / f for f in images]
    blocks = build_document(results, images)
    atomic_write_text(out_dir / "report.md", to_markdown(blocks))
    png = {f: (out_dir / f).read_bytes() for f in images}
    atomic_write_bytes(out_dir / "report.html", to_html(blocks, png).encode("utf-8"))
    return [*paths, out_dir / "report.md", out_dir / "report.html"]


def rebuild_report(path: str | Path, out_dir: str | Path | None = None) -> list[Path]:
    """Rebuild a sweep's ``margins.csv``, plots, ``report.md`` and ``report.html`` from its ``results.json``.

    Parameters
    ----------
    path : path-like
        The sweep directory or its ``results.json`` (checked: schema, version and content hash).
    out_dir : path-like, optional
        Where to write (default: the sweep directory itself, each file replaced atomically).
        The Monte Carlo plot is drawn from ``montecarlo.csv`` beside the results when it is there.

    Returns
    -------
    list of Path
        Every file written.
    """
    from pretrial.analysis.results import SweepResults
    from pretrial.analysis.samples import sample_histograms
    from pretrial.report.samples_csv import read_sample_blocks

    res = SweepResults.read(path)
    assert res.directory is not None
    out = Path(out_dir) if out_dir is not None else res.directory
    mc = res.doc.get("montecarlo")
    csv_path = res.directory / "montecarlo.csv"
    samples = None
    if mc and csv_path.is_file():
        names = ["score", *[v["name"] for v in mc.get("varied") or []]]
        samples = sample_histograms(lambda: read_sample_blocks(csv_path), names)
    return write_report(res.doc, out, samples)
