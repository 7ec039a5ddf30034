"""``pretrial envs``: list the environments, or show one's parameters, spaces and success rule."""

from __future__ import annotations

import argparse

from pretrial.cli.args import parse_assignments
from pretrial.console import emit_json, table
from pretrial.errors import InputError
from pretrial.sim.plant import resolve_env_id


def configure(p: argparse.ArgumentParser) -> None:
    p.add_argument("env_id", nargs="?", help="environment id (full or short, e.g. GantryCrane-v0)")
    p.add_argument(
        "--option",
        action="append",
        metavar="NAME=VALUE",
        help="environment keyword argument, e.g. poles=2 or hoist=true (repeatable)",
    )
    p.add_argument("--json", action="store_true", help="print JSON instead of text")


def run(args: argparse.Namespace) -> int:
    import pretrial_envs

    if args.env_id is None:
        rows = []
        for env_id in pretrial_envs.env_ids():
            phys = pretrial_envs.physics_type(env_id)
            rows.append({"id": env_id, "summary": phys.summary})
        if args.json:
            emit_json({"environments": rows})
        else:
            table(["id", "summary"], [[r["id"], r["summary"]] for r in rows])
            print("\n`pretrial envs ID` shows an environment's parameters, spaces and success rule.")
        return 0
    env_id = resolve_env_id(args.env_id)
    options = parse_assignments(args.option, "--option")
    try:
        physics = pretrial_envs.make_physics(env_id, **options)
    except (TypeError, ValueError) as exc:
        raise InputError(f"{env_id}: {exc}") from None
    info = physics.describe()
    from pretrial.sim.perturb import perturbation_specs

    info["perturbations"] = [s.as_dict() for s in perturbation_specs(physics)]
    if args.json:
        emit_json(info)
        return 0
    print(f"{env_id}: {info['summary']}")
    opts = ", ".join(f"{k}={v}" for k, v in info["options"].items() if k != "start_spread")
    print(f"options: {opts}\n")
    print("Parameters")
    table(
        ["name", "unit", "nominal", "valid range", "role", "meaning"],
        [[s["name"], s["unit"], s["nominal"], f"[{s['low']:g}, {s['high']:g}]", s["role"], s["doc"]]
         for s in info["params"]],
    )
    for title, key in (("State", "state"), ("Observation", "observation")):
        print(f"\n{title} ({len(info[key])})")
        table(["#", "name", "unit"], [[i, d["name"], d["unit"]] for i, d in enumerate(info[key])])
    print(f"\nAction ({len(info['action'])}, each in [-1, 1])")
    table(["#", "name", "physical unit"], [[i, d["name"], d["unit"]] for i, d in enumerate(info["action"])])
    print("\nGeneric perturbations (NAME.CHANNEL sets one channel, in its unit; plain NAME is every channel)")
    table(["name", "unit", "nominal", "valid range", "meaning"],
          [[s["name"], s["unit"], s["nominal"], f"[{s['low']:g}, {s['high']:g}]", s["doc"]]
           for s in info["perturbations"]])
    print(f"\nSuccess: {info['success_rule']}")
    print(f"Failure words: {', '.join(info['failure_modes'])}")
    from pretrial.sim.quality import QUALITY_WORDS

    regulated = ", ".join(f"{r['name']} (band {r['band']:g} {r['unit']})" for r in info.get("regulated", []))
    print(f"Loop quality (a sweep's success also needs it): {', '.join(QUALITY_WORDS)}; regulated: "
          f"{regulated or 'none declared (saturation and chatter only)'}")
    print(f"Reward: {info['reward']}")
    return 0
