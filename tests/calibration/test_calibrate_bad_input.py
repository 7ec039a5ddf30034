"""pretrial calibrate against bad input: one line naming the file, row and column (or the key), exit 2,
nothing written. The rule is the tool's own contract (README, "Errors" and "Calibrating from bench logs")."""

from __future__ import annotations

from pathlib import Path

import pytest
from helpers import cli_refused, snapshot

HEADER = "t,x,x_dot,theta,theta_dot,force\n"
GOOD = [f"{0.02 * k:.2f},0.0,0.0,0.01,0.0,{10.0 if k % 2 else -10.0}\n" for k in range(30)]
FIT = ["--env", "CartPole-v0", "--fit", "pole_mass"]


def log(tmp_path: Path, text: str, name: str = "log.csv") -> str:
    p = tmp_path / name
    p.write_text(text)
    return str(p)


def check(capsys, tmp_path: Path, argv: list[str], *words: str) -> str:
    before = snapshot(tmp_path)
    line = cli_refused(capsys, ["calibrate", *argv, "--out", str(tmp_path / "out")])
    assert snapshot(tmp_path) == before  # nothing written, not even a hidden directory
    for w in words:
        assert w in line, line
    return line


@pytest.mark.parametrize(("rows", "words"), [
    (["t,x,x_dot,force\n", *[",".join(r.strip().split(",")[i] for i in (0, 1, 2, 5)) + "\n" for r in GOOD]],
     ["row 1", "missing column 'theta'"]),  # no pole angle at all (a velocity alone may be estimated)
    (["t,x,x_dot,theta,theta_dot,force,volts\n", *[r.strip() + ",1.0\n" for r in GOOD]], ["row 1", "column 7",
                                                                                          "volts"]),
    (["t,x,x_dot,theta,theta_dot\n", *[r.rsplit(",", 1)[0] + "\n" for r in GOOD]], ["row 1", "force"]),
    ([HEADER, *GOOD[:5], "0.04,0,0,0.01,0,10\n", *GOOD[5:]], ["row 7", "column t", "does not increase"]),
    ([HEADER, *GOOD[:5], "0.10,0,nan,0.01,0,10\n", *GOOD[6:]], ["row 7", "column x_dot", "not a finite number"]),
    ([HEADER, *GOOD[:5], "0.10,0,,0.01,0,10\n", *GOOD[6:]], ["row 7", "column x_dot"]),
    ([HEADER, *GOOD[:5], "0.105,0,0,0.01,0,10\n", *GOOD[6:]], ["row 7", "column t", "uniform"]),
    ([HEADER, *GOOD[:5], "0.10,0,0\n", *GOOD[6:]], ["row 7", "3 values"]),
    ([HEADER, *GOOD[:5], "0.10,0,0,0.01,0,25\n", *GOOD[6:]], ["row 7", "column force", "beyond"]),
])
def test_bad_rows(capsys, tmp_path, rows, words):
    check(capsys, tmp_path, [log(tmp_path, "".join(rows)), *FIT], "log.csv", *words)


@pytest.mark.parametrize(("extra", "words"), [
    (["--fit", "pole_mas"], ["--fit pole_mas", "did you mean 'pole_mass'"]),
    (["--fit", "sensor_bias"], ["--fit sensor_bias", "actuator_gain"]),
    (["--fit", "cart_mass", "--set", "cart_mass=1.1"], ["--fit cart_mass", "--set"]),
    (["--fit", "cart_mass,cart_mass"], ["named twice"]),
    (["--fit", "cart_mass", "--set", "cart_mass_x=1"], ["cart_mass_x"]),
    (["--fit", "cart_mass", "--set", "gravity=-3"], ["--set gravity", "valid range"]),
    (["--fit", "cart_mass", "--guess", "pole_mass=0.2"], ["--guess pole_mass", "not a --fit name"]),
    (["--fit", "cart_mass", "--option", "dt=0.05"], ["--option dt=0.05", "agree"]),
    (["--fit", "cart_mass", "--window", "0"], ["--window"]),
    (["--fit", "cart_mass", "--holdout", "1.5"], ["--holdout"]),
])
def test_bad_names_and_values(capsys, tmp_path, extra, words):
    check(capsys, tmp_path, [log(tmp_path, HEADER + "".join(GOOD)), "--env", "CartPole-v0", *extra], *words)


def test_missing_and_unreadable_logs(capsys, tmp_path):
    check(capsys, tmp_path, [str(tmp_path / "nope.csv"), *FIT], "nope.csv", "no such file")
    check(capsys, tmp_path, [log(tmp_path, ""), *FIT], "log.csv", "empty")
    (tmp_path / "bin.csv").write_bytes(b"\xff\xfe\x00\x01")
    check(capsys, tmp_path, [str(tmp_path / "bin.csv"), *FIT], "bin.csv", "not a text file")


def test_existing_output_directory_is_refused(capsys, tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    (out / "keep.txt").write_text("mine")
    line = check(capsys, tmp_path, [log(tmp_path, HEADER + "".join(GOOD)), *FIT], "not empty")
    assert (out / "keep.txt").read_text() == "mine", line
