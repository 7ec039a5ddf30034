"""``pretrial report``: a report rebuilt from results.json equals the sweep's own; sweeps of one plan side by side."""

from __future__ import annotations

import pytest
from helpers import balancing_policy_file, quick_plan, snapshot

from pretrial.cli.main import main

PLAN = quick_plan(seed=7)


@pytest.fixture(scope="module")
def two_sweeps(tmp_path_factory):
    d = tmp_path_factory.mktemp("sweeps")
    (d / "plan.toml").write_text(PLAN)
    (d / "other.toml").write_text(PLAN.replace("seed = 7", "seed = 8"))
    policy = balancing_policy_file(d)
    for name, who, plan in (("lqr", "lqr", "plan.toml"), ("nn", str(policy), "plan.toml"),
                            ("other", "lqr", "other.toml")):
        code = main(["sweep", who, "--plan", str(d / plan), "--out", str(d / name), "--workers", "1", "--json"])
        assert code in (0, 1)
    return d


def test_rebuilt_report_equals_the_sweeps_own(two_sweeps, tmp_path, capsys):
    src = two_sweeps / "lqr"
    original = snapshot(src)
    assert main(["report", str(src), "--out", str(tmp_path / "again")]) == 0
    rebuilt = snapshot(tmp_path / "again")
    for name in ("report.md", "report.html", "margins.csv", "montecarlo.png", "margins.png"):
        # the Monte Carlo histogram is redrawn from montecarlo.csv: same bins, same counts, same bytes
        assert rebuilt[name] == original[name], name
    assert "wrote" in capsys.readouterr().out


def test_rebuild_in_place_restores_deleted_files(two_sweeps, tmp_path):
    import shutil

    work = tmp_path / "copy"
    shutil.copytree(two_sweeps / "nn", work)
    before = snapshot(work)
    for name in ("report.md", "report.html", "montecarlo.png"):
        (work / name).unlink()
    assert main(["report", str(work / "results.json")]) == 0
    assert snapshot(work) == before


def test_edited_results_are_refused(two_sweeps, tmp_path, capsys):
    import shutil

    work = tmp_path / "edited"
    shutil.copytree(two_sweeps / "lqr", work)
    text = (work / "results.json").read_text().replace('"seed": 7', '"seed": 9', 1)
    (work / "results.json").write_text(text)
    (work / "report.md").unlink()
    assert main(["report", str(work)]) == 2
    err = capsys.readouterr().err.strip()
    assert err.count("\n") == 0 and "content hash mismatch" in err
    assert not (work / "report.md").exists()  # nothing written from an edited file


def test_comparison_sets_sweeps_of_one_plan_side_by_side(two_sweeps, tmp_path, capsys):
    out = tmp_path / "cmp"
    assert main(["report", str(two_sweeps / "lqr"), str(two_sweeps / "nn"), "--out", str(out),
                 "--label", "LQR", "--label", "network"]) == 0
    assert sorted(p.name for p in out.iterdir()) == ["comparison.html", "comparison.md"]
    md = (out / "comparison.md").read_text()
    assert "| LQR | network |" in md.replace("  ", " ")
    from pretrial.analysis.results import SweepResults

    for name in ("lqr", "nn"):
        res = SweepResults.read(two_sweeps / name)
        mc = res.doc["montecarlo"]
        assert f"{mc['successes']} of {mc['samples']}" in md  # each column's own evidence
    for word in ("Requirements", "Parameter edges", "pole_mass", "actuator_gain"):
        assert word in md
    text = capsys.readouterr().out
    assert "LQR" in text and "network" in text


def test_comparison_of_different_plans_is_refused(two_sweeps, tmp_path, capsys):
    out = tmp_path / "cmp"
    assert main(["report", str(two_sweeps / "lqr"), str(two_sweeps / "other"), "--out", str(out)]) == 2
    err = capsys.readouterr().err.strip()
    assert err.count("\n") == 0 and "same plan" in err and "other" in err
    assert not out.exists()


@pytest.mark.parametrize("argv, needle", [
    (["--label", "a"], "--label"),
    (["{nn}", "--label", "a"], "one per sweep"),
    (["{nn}", "--label", "a", "--label", "a"], "its own name"),
])
def test_bad_labels_are_refused(two_sweeps, capsys, argv, needle):
    args = ["report", str(two_sweeps / "lqr"), *[a.replace("{nn}", str(two_sweeps / "nn")) for a in argv]]
    assert main(args) == 2
    assert needle in capsys.readouterr().err


def test_a_directory_without_results_is_refused(tmp_path, capsys):
    assert main(["report", str(tmp_path)]) == 2
    assert "no results.json" in capsys.readouterr().err
