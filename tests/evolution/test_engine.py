"""``[run] engine`` and ``pretrial evolve --engine``: which engine runs evolution's episodes.

The compiled engine must give the numpy engine's evolution (same selections, fitness equal to
rounding), be recorded in the run, refuse with one line what it cannot run, and leave the
content hash of configs that do not name it as it was (checkpoints of earlier runs resume).
"""

from __future__ import annotations

import csv
import re
from pathlib import Path

import numpy as np
import pytest
from helpers import cli_refused, snapshot

from pretrial.cli.main import main
from pretrial.errors import InputError
from pretrial.evolution.config import load_config, with_overrides
from pretrial.evolution.task import make_task

pytest.importorskip("numba")

REPO = Path(__file__).resolve().parents[2]

CONFIG = """
[task]
env = "pretrial/CartPole-v0"
episodes = 4
horizon = 2.0
{extra}
[neat]
pop_size = 20

[run]
generations = 3
seed = 3
{run}
"""


def write(tmp_path: Path, extra: str = "", run: str = "", name: str = "c.toml") -> Path:
    p = tmp_path / name
    p.write_text(CONFIG.format(extra=extra, run=run))
    return p


def test_default_engine_keeps_the_hash(tmp_path):
    plain = load_config(write(tmp_path, name="a.toml"))
    named = load_config(write(tmp_path, run='engine = "numpy"', name="b.toml"))
    compiled = load_config(write(tmp_path, run='engine = "compiled"', name="d.toml"))
    assert plain.run.engine == "numpy" and "engine" not in plain.to_dict()["run"]
    assert plain.content_hash() == named.content_hash() != compiled.content_hash()
    assert compiled.to_dict()["run"]["engine"] == "compiled"
    assert with_overrides(plain, engine="compiled").content_hash() == compiled.content_hash()


def test_engine_value_checked(tmp_path):
    with pytest.raises(InputError, match=r"c\.toml: run\.engine: 'fast'.*'numpy' or 'compiled'"):
        load_config(write(tmp_path, run='engine = "fast"'))


@pytest.mark.parametrize(("text", "needle"), [
    ('[task]\nenv = "pretrial/GantryCrane-v0"\n[run]\nengine = "compiled"\n', "cart-pole only"),
    ('[task]\nenv = "pretrial/CartPole-v0"\n[task.randomize]\nsensor_noise_std = [0, 0.01]\n'
     '[run]\nengine = "compiled"\n', "perturbations (sensor_noise_std)"),
])
def test_what_the_compiled_engine_refuses(tmp_path, text, needle):
    p = tmp_path / "r.toml"
    p.write_text(text)
    pattern = rf"r\.toml: run\.engine: 'compiled' cannot run this config: .*{re.escape(needle)}"
    with pytest.raises(InputError, match=pattern):
        make_task(load_config(p))


def test_physics_randomization_is_fine(tmp_path):
    cfg = load_config(write(tmp_path, "[task.randomize]\npole_mass = [0.05, 0.2]\n", 'engine = "compiled"'))
    assert make_task(cfg).engine == "compiled"


def history(run_dir: Path) -> list[list[str]]:
    with open(run_dir / "history.csv", newline="") as f:
        return list(csv.reader(f))


def test_evolve_with_either_engine(tmp_path, capsys, monkeypatch):
    """The same run on both engines: same selections, fitness statistics equal to rounding."""
    monkeypatch.chdir(tmp_path)
    cfg = write(tmp_path, "[task.params]\ncart_friction = 0.0\n")
    assert main(["evolve", str(cfg), "--out", "a", "--workers", "1", "--quiet"]) == 0
    assert main(["evolve", str(cfg), "--out", "b", "--workers", "1", "--quiet", "--engine", "compiled"]) == 0
    a, b = history(tmp_path / "a"), history(tmp_path / "b")
    assert a[0] == b[0] and len(a) == len(b) == 4
    for ra, rb in zip(a[1:], b[1:], strict=True):
        assert ra[:2] == rb[:2] and ra[5:] == rb[5:]  # generation, evaluations, species, champion's size
        np.testing.assert_allclose([float(v) for v in rb[2:5]], [float(v) for v in ra[2:5]], rtol=1e-9)
    assert 'engine = "compiled"' in (tmp_path / "b" / "config.resolved.toml").read_text()
    assert "engine" not in (tmp_path / "a" / "config.resolved.toml").read_text()


def test_evolve_refuses_a_plan_on_the_compiled_engine(tmp_path, capsys, monkeypatch):
    monkeypatch.chdir(tmp_path)
    cfg = write(tmp_path)
    before = snapshot(tmp_path)
    line = cli_refused(capsys, ["evolve", str(cfg), "--plan", str(REPO / "configs" / "sweeps" / "cartpole.toml"),
                                "--engine", "compiled", "--out", "x"])
    assert "run.engine: 'compiled' cannot train against a plan" in line
    assert snapshot(tmp_path) == before


def test_python_api_takes_the_engine(tmp_path):
    import pretrial

    cfg = write(tmp_path)
    run = pretrial.evolve(cfg, generations=1, workers=1, engine="compiled", out=tmp_path / "run")
    assert 'engine = "compiled"' in (run.directory / "config.resolved.toml").read_text()
    with pytest.raises(InputError, match="engine: 'fast' not one of numpy, compiled"):
        pretrial.evolve(cfg, engine="fast", out=tmp_path / "other")
    assert not (tmp_path / "other").exists()
