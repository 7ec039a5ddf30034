"""What training for the verdict buys: each shipped config evolved with and without its plan, then swept.

Run: ``python benchmarks/verdict_training.py [--configs cartpole gantry ...] [--objective OBJECTIVE]
[--generations N] [--workers W]``

For each config (default: every shipped one) this runs, in temporary
directories, the same commands a user would:

1. ``pretrial evolve configs/NAME.toml`` without a plan (a ``[task] plan`` key
   dropped): nominal training, or the config's own ``[task.randomize]``;
2. ``pretrial evolve configs/NAME.toml --plan PLAN`` with ``[task.randomize]``
   dropped (the plan's dispersions replace it), ``[task] objective`` replaced
   when ``--objective`` is given;
3. ``pretrial sweep RUN --plan PLAN`` on each champion,

and prints one row per config and variant: evolve and sweep wall times, the
predicted verdict (with ``--plan``), the sweep's verdict, its Monte Carlo
successes and the requirements that failed. The plan is the one ``pretrial
evolve`` names for the config (``configs/sweeps/``). Every command runs with
``--workers W`` (default 1: the figures in the configs' comments were measured so
on 2 shared cores). Expect minutes per config (the drone pair: about 8 minutes
per evolve on 2 cores); ``--generations`` shortens every run alike.

The last line is ``passed: K of N`` (sweeps whose verdict is PASS).

Measured (2 shared cores, ``--configs cartpole --workers 1``): no plan, evolve 20 s, sweep 9 s,
FAIL 389/2000; ``--plan``, evolve 45 s, sweep 16 s, predicted PASS, PASS 2000/2000.
``--configs gantry --workers 1`` (2026-12-05, the machine shared): no plan, evolve 216 s, sweep
16 s, FAIL 564/1000 (Monte Carlo and worst case); ``--plan``, evolve 520 s, sweep 16 s,
predicted PASS, PASS 990/1000.
``--configs double-pole double-pole-positions --workers 1`` (same day): double-pole no plan 3 s +
13 s, FAIL 606/1000 (sampled loop unstable); ``--plan`` (the config's 1 episode per genome, 100
generations) 19 s + 13 s, FAIL 0/1000; double-pole-positions no plan 32 s + 6 s, FAIL 0/1000;
``--plan`` 20 s + 4 s, FAIL 0/1000.
``--configs drone-pair --workers 1`` (same day): no plan 155 s + 13 s, FAIL 2/1000; ``--plan``
308 s + 14 s, FAIL 16/1000 (and the integrator check).
Measured by hand with the same commands (see each config's comment): double-pole with
``--plan`` (16 episodes, ``"mean"``, 300 generations), evolve 593 s, sweep 34 s, FAIL 718/1000,
sampled loop stable (2.36 dB / 28.5 deg); drone-pair-wide with ``--plan``, 1100 generations at
``--workers 2``, 30 min, FAIL 36/1000; the two-pole LQR (``pretrial sweep lqr``) FAIL only on the
sampled phase margin, 40.85 deg < 45.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
import tomllib
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
CONFIGS = ("cartpole", "gantry", "double-pole", "double-pole-positions", "drone-pair", "drone-pair-wide")


def _plan_for(name: str) -> Path:
    sys.path.insert(0, str(ROOT / "src"))
    from pretrial.evolution.config import plan_beside

    plan = plan_beside(str(ROOT / "configs" / f"{name}.toml"), name)
    if plan is None:
        raise SystemExit(f"no plan for {name} in configs/sweeps/")
    return plan


def _write_variant(src: Path, dst: Path, plan: Path | None, objective: str | None, generations: int | None) -> None:
    lines, skip, section = [], False, ""
    for line in src.read_text(encoding="utf-8").splitlines():
        head = line.strip()
        if head.startswith("["):
            section = head
            skip = plan is not None and head == "[task.randomize]"
        key = head.split("=")[0].strip() if section == "[task]" else ""
        if skip or key == "plan" or (plan is not None and (key in ("randomize_ramp", "fitness_target")
                                                            or (objective is not None and key == "objective"))):
            continue
        if generations is not None and head.startswith("generations"):
            line = f"generations = {generations}"
        lines.append(line)
        if plan is not None and head == "[task]":
            lines.append(f'plan = "{plan}"')
            if objective is not None:
                lines.append(f'objective = "{objective}"')
    dst.write_text("\n".join(lines) + "\n", encoding="utf-8")
    tomllib.loads(dst.read_text(encoding="utf-8"))  # still a valid config


def _run(words: list[str]) -> tuple[int, str, float]:
    t0 = time.perf_counter()
    p = subprocess.run(words, capture_output=True, text=True, cwd=ROOT)
    return p.returncode, p.stdout, time.perf_counter() - t0


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--configs", nargs="+", default=list(CONFIGS))
    ap.add_argument("--objective", default=None, help="replace the config's objective with --plan")
    ap.add_argument("--generations", type=int, default=None)
    ap.add_argument("--workers", default="1")
    args = ap.parse_args()
    exe = [sys.executable, "-m", "pretrial"]
    workers = ["--workers", str(args.workers)]
    rows, passed, total = [], 0, 0
    with tempfile.TemporaryDirectory() as tmp:
        for name in args.configs:
            plan = _plan_for(name)
            for variant in ("no plan", "--plan"):
                cfg = Path(tmp) / f"{name}-{'plan' if variant == '--plan' else 'own'}.toml"
                _write_variant(ROOT / "configs" / f"{name}.toml", cfg, plan if variant == "--plan" else None,
                               args.objective, args.generations)
                run = Path(tmp) / f"run-{cfg.stem}"
                code, out, secs = _run([*exe, "evolve", str(cfg), "--out", str(run), "--json", *workers])
                if code != 0:
                    rows.append((name, variant, f"{secs:.0f}", "-", "-", "evolve failed", "-", "-"))
                    continue
                summary = json.loads(out)
                predicted = summary.get("predicted_verdict", "-")
                code, out, sweep_secs = _run([*exe, "sweep", str(run), "--plan", str(plan), "--out",
                                              str(run) + "-sweep", "--json", *workers])
                res = json.loads(out) if out.strip().startswith("{") else {}
                verdict = res.get("verdict", f"exit {code}")
                mc = res.get("montecarlo") or {}
                failing = [r["name"] for r in res.get("requirements", []) if r.get("pass") is False]
                total += 1
                passed += verdict == "pass"
                rows.append((name, variant, f"{secs:.0f}", f"{sweep_secs:.0f}", predicted, verdict,
                             f"{mc.get('successes', '-')}/{mc.get('samples', '-')}", "; ".join(failing) or "-"))
    head = ("config", "training", "evolve s", "sweep s", "predicted", "verdict", "Monte Carlo", "failing")
    widths = [max(len(str(r[i])) for r in [head, *rows]) for i in range(len(head))]
    for r in [head, *rows]:
        print("  ".join(str(c).ljust(w) for c, w in zip(r, widths, strict=True)))
    print(f"passed: {passed} of {total}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
