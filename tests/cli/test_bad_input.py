"""Every command against bad input: one line naming the file, key or value, exit 2, nothing left behind.

The rule is the tool's own contract (README, "Errors"): ``pretrial: error: <one line>`` on stderr, exit
code 2, no traceback unless ``--debug``, and the working directory exactly as it was. Each case is run
in-process through :func:`pretrial.cli.main`; file kinds (missing, a directory, empty, binary, malformed,
another kind of file) are crossed with every argument that names a file.
"""

from __future__ import annotations

import json
import shutil
from collections.abc import Callable
from pathlib import Path

import pytest
from helpers import balancing_policy_file, cli_refused, fuzz_toml, scalars, snapshot

from pretrial.cli.main import main

REPO = Path(__file__).resolve().parents[2]
PLAN = REPO / "configs" / "sweeps" / "cartpole.toml"
DRONE_PLAN = REPO / "configs" / "sweeps" / "drone-pair.toml"
CONFIG = REPO / "configs" / "cartpole.toml"


@pytest.fixture(scope="module")
def policy(tmp_path_factory) -> Path:
    return balancing_policy_file(tmp_path_factory.mktemp("bad_input_policy"))


@pytest.fixture
def work(tmp_path, monkeypatch):
    """An empty working directory (default output paths would land here)."""
    monkeypatch.chdir(tmp_path)
    return tmp_path


# --------------------------------------------------------------------------- #
# files: every kind of bad file in every argument that names one
# --------------------------------------------------------------------------- #
def _missing(d: Path, suffix: str) -> Path:
    return d / f"missing{suffix}"


def _directory(d: Path, suffix: str) -> Path:
    p = d / f"folder{suffix}"
    p.mkdir()
    return p


def _empty(d: Path, suffix: str) -> Path:
    p = d / f"empty{suffix}"
    p.write_bytes(b"")
    return p


def _binary(d: Path, suffix: str) -> Path:
    p = d / f"binary{suffix}"
    p.write_bytes(bytes(range(256)) * 4)
    return p


def _latin1(d: Path, suffix: str) -> Path:
    p = d / f"latin1{suffix}"
    p.write_bytes('# mass in kg, measured by Müller\n[scenario]\nenv = "pretrial/CartPole-v0"\n'.encode("latin-1"))
    return p


def _malformed(d: Path, suffix: str) -> Path:
    p = d / f"malformed{suffix}"
    p.write_text('[scenario\nenv = "pretrial/CartPole-v0"\n' if suffix == ".toml" else '{"schema": "pretrial.po')
    return p


def _other_kind(d: Path, suffix: str) -> Path:
    """A well-formed file of the wrong kind: JSON where TOML is expected and the other way round."""
    p = d / f"other{suffix}"
    p.write_text('{"name": "pole_mass", "range": [0.1, 2.0]}\n' if suffix == ".toml" else 'x = 1\n[task]\n')
    return p


def _json_array(d: Path, suffix: str) -> Path:
    p = d / f"array{suffix}"
    p.write_text("[1, 2, 3]\n" if suffix == ".json" else "values = [1, 2, 3]\n")
    return p


FILE_KINDS: list[Callable[[Path, str], Path]] = [
    _missing, _directory, _empty, _binary, _latin1, _malformed, _other_kind, _json_array,
]


def _slots(policy: Path, out: Path) -> dict[str, tuple[str, Callable[[Path], list[str]]]]:
    """Argument slot -> (file suffix, argv with the bad file in that slot)."""
    return {
        "evolve CONFIG": (".toml", lambda f: ["evolve", str(f), "--out", str(out), "--workers", "1", "--quiet"]),
        "evolve --resume": (".json", lambda f: ["evolve", str(CONFIG), "--resume", str(f), "--workers", "1"]),
        "replay POLICY": (".json", lambda f: ["replay", str(f)]),
        "replay --plan": (".toml", lambda f: ["replay", str(policy), "--plan", str(f)]),
        "sweep POLICY": (".json", lambda f: ["sweep", str(f), "--plan", str(PLAN), "--out", str(out),
                                             "--workers", "1"]),
        "sweep --plan": (".toml", lambda f: ["sweep", str(policy), "--plan", str(f), "--out", str(out),
                                             "--workers", "1"]),
        "sweep lqr --plan": (".toml", lambda f: ["sweep", "lqr", "--plan", str(f), "--out", str(out),
                                                 "--workers", "1"]),
        "export POLICY": (".json", lambda f: ["export", str(f), "--to", "c", "--out", str(out)]),
    }


SLOTS = list(_slots(Path("p"), Path("o")))


@pytest.mark.parametrize("kind", FILE_KINDS, ids=lambda k: k.__name__.strip("_"))
@pytest.mark.parametrize("slot", SLOTS)
def test_bad_file_in_every_slot(capsys, work, policy, slot, kind):
    files = work / "files"
    files.mkdir()
    suffix, argv_of = _slots(policy, work / "out")[slot]
    bad = kind(files, suffix)
    before = snapshot(work)
    line = cli_refused(capsys, argv_of(bad))
    assert bad.name in line, line  # the error names the file
    assert snapshot(work) == before  # nothing written, nothing half-made


# --------------------------------------------------------------------------- #
# values: NaN, infinities, negatives, zeros, reversed and out-of-range ranges
# --------------------------------------------------------------------------- #
@pytest.mark.parametrize(
    "setting, needle",
    [
        ("pole_mass=nan", "pole_mass"), ("pole_mass=inf", "pole_mass"), ("pole_mass=-0.1", "pole_mass"),
        ("pole_mass=0", "pole_mass"), ("cart_mass=1e400", "cart_mass"), ("sensor_noise_std=-0.01", "sensor_noise_std"),
        ("sensor_noise_std=nan", "sensor_noise_std"), ("actuator_gain=-inf", "actuator_gain"),
        ("actuator_delay_s=-0.02", "actuator_delay_s"), ("control_period_s=0", "control_period_s"),
        ("control_period_s=nan", "control_period_s"), ("control_period_s=-0.02", "control_period_s"),
        ("wind=2", "wind"), ("=3", "--set"), ("pole_mass=", "--set"),
    ],
)
def test_replay_bad_setting(capsys, work, policy, setting, needle):
    before = snapshot(work)
    line = cli_refused(capsys, ["replay", str(policy), "--set", setting, "--csv", str(work / "trace.csv")])
    assert needle in line, line
    assert snapshot(work) == before


@pytest.mark.parametrize("start", ["nan,0,0,0", "0,inf,0,0", "theta=nan", "1,2,3", "x=1e999", "speed=0.1"])
def test_replay_bad_start(capsys, work, policy, start):
    line = cli_refused(capsys, ["replay", str(policy), "--start", start])
    assert "--start" in line, line


def _plan_with(tmp: Path, old: str, new: str) -> Path:
    text = PLAN.read_text()
    assert old in text, old
    p = tmp / "plan.toml"
    p.write_text(text.replace(old, new, 1))
    return p


PLAN_EDITS = [
    ("range = [0.1, 10.0]", "range = [10.0, 0.1]", "range"),
    ("range = [0.1, 10.0]", "range = [0.1, nan]", "range"),
    ("range = [0.1, 10.0]", "range = [-inf, 10.0]", "range"),
    ("range = [0.1, 10.0]", "range = [0.1]", "range"),
    ("range = [0.1, 10.0]", 'range = ["light", "heavy"]', "range"),
    ("range = [0.05, 5.0]", "range = [-1.0, 5.0]", "actuator_gain"),
    ("dispersion = [0.8, 1.5]", "dispersion = [1.5, 0.8]", "dispersion"),
    ("episodes = 80", "episodes = 0", "episodes"),
    ("episodes = 80", "episodes = -5", "episodes"),
    ("episodes = 80", "episodes = 8.5", "episodes"),
    ("episodes = 80", 'episodes = "80"', "episodes"),
    ("horizon = 10.0", "horizon = nan", "horizon"),
    ("horizon = 10.0", "horizon = inf", "horizon"),
    ("horizon = 10.0", "horizon = -1.0", "horizon"),
    ("horizon = 10.0", "horizon = 0.0", "horizon"),
    ("seed = 1", "seed = -1", "seed"),
    ("x = 0.05", "x = -0.05", "x"),
    ("x = 0.05", "x = nan", "x"),
    ("x = 0.05", "speed = 0.05", "speed"),
    ("success_rate = 0.95", "success_rate = 1.5", "success_rate"),
    ("success_rate = 0.95", "success_rate = nan", "success_rate"),
    ("gain_margin_db = 6.0", "gain_margin_db = -inf", "gain_margin_db"),
    ("tolerance = 0.002", "tolerance = 0.0", "tolerance"),
    ("montecarlo_samples = 2000", "montecarlo_samples = 0", "montecarlo_samples"),
    ("map_points = 6", "map_points = 1", "map_points"),
    ('map = ["pole_mass", "actuator_delay_s"]', 'map = ["pole_mass", "wind"]', "wind"),
    ('name = "pole_mass"', 'name = "pole_mas"', "pole_mas"),
    ('env = "pretrial/CartPole-v0"', 'env = "pretrial/CartPole-v9"', "CartPole-v9"),
    ('env = "pretrial/CartPole-v0"', "env = 3", "env"),
    ("[analysis]", "[analysis]\nworstcase_iteration = 3", "worstcase_iteration"),
    ("pole_mass = { high_ratio = 2.0 }", "pole_mass = { high_ratio = -2.0 }", "high_ratio"),
    # hardening round two: extreme values and odd structures
    ("horizon = 10.0", "horizon = 1e308", "horizon"),
    ("seed = 1", "seed = 18446744073709551616", "seed"),
    ('map = ["pole_mass", "actuator_delay_s"]', "map = [[1], [2]]", "analysis.map"),
    ('map = ["pole_mass", "actuator_delay_s"]', 'map = [{a = 1}, "pole_mass"]', "analysis.map"),
    ("[scenario.start]", "[scenario.options]\ndt = 1e-320\n\n[scenario.start]", "dt"),
]


@pytest.mark.parametrize("old, new, needle", PLAN_EDITS, ids=[e[1] for e in PLAN_EDITS])
@pytest.mark.parametrize("command", ["sweep", "replay"])
def test_bad_plan_values(capsys, work, policy, command, old, new, needle):
    plans = work / "plans"
    plans.mkdir()
    plan = _plan_with(plans, old, new)
    before = snapshot(work)
    if command == "sweep":
        argv = ["sweep", str(policy), "--plan", str(plan), "--out", str(work / "out"), "--workers", "1"]
    else:
        argv = ["replay", str(policy), "--plan", str(plan)]
    line = cli_refused(capsys, argv)
    assert "plan.toml" in line and needle in line, line
    assert snapshot(work) == before


# --------------------------------------------------------------------------- #
# a policy that does not fit
# --------------------------------------------------------------------------- #
def test_policy_for_another_env(capsys, work, policy):
    line = cli_refused(capsys, ["sweep", str(policy), "--plan", str(DRONE_PLAN), "--out", str(work / "o"),
                            "--workers", "1"])
    assert "CartPole" in line and "DronePair" in line, line
    line = cli_refused(capsys, ["replay", str(policy), "--plan", str(DRONE_PLAN)])
    assert "CartPole" in line and "DronePair" in line, line
    assert not (work / "o").exists()


def test_policy_whose_inputs_do_not_fit(capsys, work, policy):
    plan = _plan_with(work, "[scenario.start]", "[scenario.options]\npoles = 2\n\n[scenario.start]")
    line = cli_refused(capsys, ["sweep", str(policy), "--plan", str(plan), "--out", str(work / "o"), "--workers", "1"])
    assert "poles" in line, line


def test_policy_whose_input_count_was_edited_consistently(capsys, work, policy):
    """A file whose hash was recomputed after cutting an input: refused at load or as not fitting the env."""
    from pretrial.files import canonical_json, sha256_hex

    doc = json.loads(policy.read_text())
    doc["network"]["inputs"] = doc["network"]["inputs"][:3] if "inputs" in doc.get("network", {}) else None
    doc.pop("content_sha256", None)
    doc["content_sha256"] = sha256_hex(canonical_json(doc))
    bad = work / "cut.json"
    bad.write_text(json.dumps(doc))
    for argv in (["replay", str(bad)], ["export", str(bad), "--to", "python", "--out", str(work / "x")]):
        assert "cut.json" in cli_refused(capsys, argv)
    assert not (work / "x").exists()


# --------------------------------------------------------------------------- #
# the other commands' arguments
# --------------------------------------------------------------------------- #
@pytest.mark.parametrize(
    "argv, needle",
    [
        (["envs", "CartPole-v9"], "CartPole-v9"),
        (["envs", "CartPole-v0", "--option", "poles=3"], "poles"),
        (["envs", "CartPole-v0", "--option", "polls=2"], "polls"),
        (["envs", "CartPole-v0", "--option", "poles"], "--option"),
        (["sweep", "lqr", "--plan", str(PLAN), "--workers", "0"], "--workers"),
        (["sweep", "lqr", "--plan", str(PLAN), "--baseline", "pid"], "--baseline"),
        (["sweep", "lqr", "--plan", str(CONFIG)], "run config"),
        (["evolve", str(PLAN)], "scenario"),
        (["evolve", str(CONFIG), "--seed", "-1"], "--seed"),
        (["evolve", str(CONFIG), "--generations", "0"], "--generations"),
        (["evolve", str(CONFIG), "--workers", "two"], "--workers"),
        (["replay", "lqr"], "--env"),
        (["replay", "lqr", "--env", "Pendulum-v1"], "Pendulum-v1"),
        (["replay", "lqr", "--env", "CartPole-v0", "--seed", "-4"], "--seed"),
        (["replay", "lqr", "--env", "CartPole-v0", "--plot", "trace.bmp"], "trace.bmp"),
    ],
)
def test_other_arguments(capsys, work, argv, needle):
    before = snapshot(work)
    assert needle in cli_refused(capsys, argv)
    assert snapshot(work) == before


@pytest.mark.parametrize("prefix", ["1policy", "my-policy", "int", "", "x" * 200])
def test_export_bad_prefix(capsys, work, policy, prefix):
    out = work / "out"
    argv = ["export", str(policy), "--to", "c", "--out", str(out), "--prefix", prefix]
    assert "--prefix" in cli_refused(capsys, argv)
    assert not out.exists()


def test_outputs_that_cannot_be_written(capsys, work, policy):
    (work / "afile").write_text("notes\n")
    before = snapshot(work)
    assert "afile" in cli_refused(capsys, ["sweep", "lqr", "--plan", str(PLAN), "--out", str(work / "afile")])
    assert "afile" in cli_refused(capsys, ["sweep", "lqr", "--plan", str(PLAN), "--out", str(work / "afile" / "s")])
    assert "afile" in cli_refused(capsys, ["export", str(policy), "--to", "c", "--out", str(work / "afile")])
    assert "afile" in cli_refused(capsys, ["evolve", str(CONFIG), "--out", str(work / "afile" / "run")])
    assert "afile" in cli_refused(capsys, ["replay", str(policy), "--csv", str(work / "afile" / "t.csv")])
    assert snapshot(work) == before


def test_debug_shows_the_traceback(capsys, work):
    capsys.readouterr()
    assert main(["--debug", "replay", str(work / "nothing.json")]) == 2
    err = capsys.readouterr().err
    assert "Traceback" in err and err.strip().splitlines()[-1].startswith("pretrial: error:")


def test_existing_output_is_never_overwritten(capsys, work, policy):
    out = work / "exported"
    out.mkdir()
    (out / "pretrial_policy.c").write_text("/* hand-tuned, keep */\n")
    before = snapshot(work)
    # export writes into a directory; a file of the same name that is already there is kept
    code = main(["export", str(policy), "--to", "c", "--out", str(out)])
    err = capsys.readouterr().err
    if code == 0:
        pytest.fail("export overwrote an existing file without being asked")
    assert "pretrial_policy.c" in err and snapshot(work) == before
    shutil.rmtree(out)


# --------------------------------------------------------------------------- #
# fuzzing the plan and results loaders: nothing but the tool's own errors escapes
# --------------------------------------------------------------------------- #
from hypothesis import HealthCheck, given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

from pretrial.errors import InputError, PretrialError  # noqa: E402

_FUZZ = settings(max_examples=120, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])

_PLAN_KEYS = sorted({
    "analysis", "baseline", "delay_steps", "dispersion", "distribution", "env", "episodes", "gain_margin_db",
    "horizon", "map", "map_episodes", "map_points", "margins", "mean", "montecarlo_sampler", "montecarlo_samples",
    "name", "options", "params", "phase_margin_deg", "q", "r", "range", "require", "run", "scenario", "seed",
    "sensitivity_episodes", "sensitivity_samples", "start", "std", "success_rate", "tolerance", "units",
    "worstcase_episodes", "worstcase_iterations", "worstcase_population", "pole_mass", "x", "theta", "force",
    "actuator_gain", "control_period_s", "high", "low", "high_ratio", "low_ratio", "poles", "rnage", "ratio",
    "normal", "sobol", "linear", "montecarlo",
})
_plan_values = st.recursive(
    st.one_of(scalars, st.sampled_from(["pole_mass", "actuator_gain", "ratio", "normal", "sobol", "margins",
                                         "pretrial/CartPole-v0", "x"])),
    lambda inner: st.one_of(st.lists(inner, max_size=3),
                            st.dictionaries(st.sampled_from(_PLAN_KEYS), inner, max_size=3)),
    max_leaves=10,
)
_plan_tables = st.dictionaries(
    st.sampled_from(["scenario", "scenario.start", "scenario.params", "scenario.options", "analysis", "require",
                     "require.margins", "baseline", "baseline.q", "baseline.r", "[vary]", "[vary] ", "sceanrio"]),
    st.dictionaries(st.sampled_from(_PLAN_KEYS), _plan_values, max_size=5),
    max_size=6,
)


def _plan_only_input_errors(path: Path) -> None:
    from pretrial.analysis.sweep import controlled

    try:
        controlled("lqr", str(path), "CartPole-v0")
    except PretrialError as exc:
        assert isinstance(exc, InputError), exc
        assert "\n" not in str(exc) and str(path) in str(exc), exc


@_FUZZ
@given(st.binary(max_size=300))
def test_fuzz_plan_random_bytes(tmp_path, data):
    path = tmp_path / "plan.toml"
    path.write_bytes(data)
    _plan_only_input_errors(path)


@_FUZZ
@given(_plan_tables)
def test_fuzz_plan_tomlish_text(tmp_path, tables):
    lines = ["[scenario]", 'env = "pretrial/CartPole-v0"', "episodes = 80"] if "scenario" not in tables else []
    for name, table in tables.items():
        lines.append(f"[{name.strip()}]")
        lines += [f"{k} = {fuzz_toml(v)}" for k, v in table.items()]
    path = tmp_path / "plan.toml"
    path.write_text("\n".join(lines), encoding="utf-8")
    _plan_only_input_errors(path)


def _results_only_input_errors(path: Path) -> None:
    from pretrial.analysis.results import read_results

    try:
        read_results(path)
    except PretrialError as exc:
        assert isinstance(exc, InputError) and "\n" not in str(exc) and str(path) in str(exc), exc
    else:
        pytest.fail("a made-up file was accepted as sweep results")


@_FUZZ
@given(st.one_of(st.binary(max_size=200), st.recursive(
    st.one_of(st.none(), st.booleans(), st.floats(allow_nan=False), st.text(max_size=8)),
    lambda inner: st.one_of(st.lists(inner, max_size=3), st.dictionaries(
        st.sampled_from(["schema", "schema_version", "content_sha256", "verdict", "x"]), inner, max_size=4)),
    max_leaves=8)))
def test_fuzz_results_loader(tmp_path, value):
    path = tmp_path / "results.json"
    if isinstance(value, bytes):
        path.write_bytes(value)
    else:
        if isinstance(value, dict) and "schema" in value:
            value["schema"] = "pretrial.sweep"
        path.write_text(json.dumps(value))
    _results_only_input_errors(path)


@pytest.mark.parametrize("text", [
    '{"schema": "pretrial.sweep", "schema_version": Infinity}',  # found by the fuzzer above: json reads it
    '{"schema": "pretrial.sweep", "schema_version": NaN}',
    '{"schema": "pretrial.sweep", "schema_version": 1' + "0" * 5000 + "}",  # past Python's int-digits limit
])
def test_results_with_numbers_json_does_not_allow(tmp_path, text):
    path = tmp_path / "results.json"
    path.write_text(text)
    _results_only_input_errors(path)


def test_resume_into_another_out_is_refused(capsys, work):
    (work / "run").mkdir()
    line = cli_refused(capsys, ["evolve", str(CONFIG), "--resume", str(work / "run"), "--out", str(work / "elsewhere")])
    assert "--out" in line and "--resume" not in line.split(":")[0]
    assert not (work / "elsewhere").exists()


def test_neat_settings_it_cannot_breed_with(capsys, work):
    # Every genome its own species (a tiny compatibility threshold) needs pop_size >=
    # species x min_species_size, which neat-python refuses at the first breeding: the dry run
    # of generation 0 finds it, so one line naming the config and the key, and no run directory.
    config = work / "crowded.toml"
    config.write_text(
        '[task]\nenv = "pretrial/CartPole-v0"\nepisodes = 2\nhorizon = 0.2\n\n'
        "[neat]\npop_size = 6\ncompatibility_threshold = 1e-9\n\n[run]\ngenerations = 3\nworkers = 1\n"
    )
    line = cli_refused(capsys, ["evolve", str(config), "--out", str(work / "run")])
    assert "crowded.toml" in line and "compatibility_threshold" in line and "--resume" not in line
    assert "population size 6 " in line  # neat-python's words about the user's settings
    assert not (work / "run").exists()


# --------------------------------------------------------------------------- #
# hardening round two: extreme values, odd structures, neat settings, outputs that would replace files
# --------------------------------------------------------------------------- #
@pytest.mark.parametrize("argv, needle", [
    (["envs", "CartPole-v0", "--option", "time_limit=1e308"], "time_limit"),
    (["envs", "CartPole-v0", "--option", "dt=1e-320"], "dt"),
    (["envs", "CartPole-v0", "--option", "dt=1e-300"], "dt"),
    (["envs", "CartPole-v0", "--option", "substeps=1000000"], "substeps"),
    (["envs", "CartPole-v0", "--option", "time_limit=1e6"], "integration steps per episode"),
    (["envs", "CartPole-v0", "--option", "start_spread=5"], "start_spread"),
    (["replay", "lqr", "--env", "CartPole-v0", "--set", "control_period_s=1e-320"], "control_period_s"),
    (["replay", "lqr", "--env", "CartPole-v0", "--set", "control_period_s=1e-300"], "control_period_s"),
    (["replay", "lqr", "--env", "CartPole-v0", "--set", "control_period_s=1e308"], "control_period_s"),
    (["replay", "lqr", "--env", "CartPole-v0", "--seed", "18446744073709551616"], "--seed"),
    (["evolve", str(CONFIG), "--seed", "18446744073709551616"], "--seed"),
])
def test_extreme_but_finite_values(capsys, work, argv, needle):
    before = snapshot(work)
    assert needle in cli_refused(capsys, argv)
    assert snapshot(work) == before


def _config_with(tmp: Path, text: str) -> Path:
    p = tmp / "run.toml"
    p.write_text('[task]\nenv = "pretrial/CartPole-v0"\nepisodes = 2\nhorizon = 0.2\n' + text)
    return p


@pytest.mark.parametrize("text, needle", [
    ("[task.options]\ndt = 1e-320\n", "dt"),
    ("[task.options]\ntime_limit = 1e308\n", "time_limit"),
    ("[task.options]\nstart_spread = 5\n", "start_spread"),
    ("[run]\nseed = 18446744073709551616\n", "run.seed"),
    ("[neat]\npop_size = 0\n", "neat.pop_size"),
    ("[neat]\npop_size = 1\n", "neat.pop_size"),
    ("[neat]\nelitism = 1000\n", "neat.elitism"),
    ('[neat]\nactivation_options = ["tanh", "bogus"]\n', "neat.activation_options"),
    ('[neat]\nactivation_options = "tanh bogus"\nactivation_mutate_rate = 0.5\n', "neat.activation_options"),
    ('[neat]\naggregation_options = ["sum", "average"]\n', "neat.aggregation_options"),
    ("[neat]\nnum_hidden = -1\n", "neat.num_hidden"),
])
def test_bad_config_values_write_nothing(capsys, work, text, needle):
    config = _config_with(work, text)
    before = snapshot(work)
    line = cli_refused(capsys, ["evolve", str(config), "--out", str(work / "run"), "--workers", "1", "--quiet"])
    assert "run.toml" in line and needle in line, line
    assert snapshot(work) == before  # no run directory


def test_config_horizon_has_the_plans_upper_limit(capsys, work):
    config = work / "long.toml"
    config.write_text('[task]\nenv = "pretrial/CartPole-v0"\nhorizon = 1e308\n')
    assert "task.horizon" in cli_refused(capsys, ["evolve", str(config), "--out", str(work / "run")])
    assert not (work / "run").exists()


def _deep(nesting: str) -> str:
    # far past CPython's recursion limit; tomllib (3.11) recurses once per level
    return "a = " + {"array": "[" * 5000 + "]" * 5000, "table": "{b = " * 5000 + "1" + "}" * 5000}[nesting] + "\n"


@pytest.mark.parametrize("nesting", ["array", "table"])
@pytest.mark.parametrize("slot", ["evolve CONFIG", "replay --plan", "sweep --plan", "sweep lqr --plan"])
def test_deeply_nested_toml(capsys, work, policy, slot, nesting):
    import tomllib

    bad = work / "deep.toml"
    bad.write_text(_deep(nesting))
    with pytest.raises((RecursionError, tomllib.TOMLDecodeError)):  # what the library itself does with it
        tomllib.loads(bad.read_text())
    before = snapshot(work)
    line = cli_refused(capsys, _slots(policy, work / "out")[slot][1](bad))
    assert "deep.toml" in line, line
    assert snapshot(work) == before


@pytest.mark.parametrize("kind", ["csv", "plot", "gif"])
def test_replay_never_replaces_its_policy(capsys, work, policy, kind):
    own = work / f"c.{'png' if kind == 'plot' else kind}"
    shutil.copy(policy, own)  # a policy file may have any name, even one that looks like an output
    link = work / f"link.{own.suffix[1:]}"
    link.symlink_to(own)
    hard = work / f"hard.{own.suffix[1:]}"
    hard.hardlink_to(own)
    before = snapshot(work)
    for out in (own, link, hard):
        for force in ([], ["--force"]):
            line = cli_refused(capsys, ["replay", str(own), f"--{kind}", str(out), *force])
            assert f"--{kind}" in line and "input" in line, line
    assert snapshot(work) == before


def test_replay_never_replaces_its_plan_or_a_run_directorys_champion(capsys, work, policy):
    run = work / "run"
    run.mkdir()
    shutil.copy(policy, run / "champion.json")
    plan = work / "plan.csv"
    shutil.copy(PLAN, plan)
    before = snapshot(work)
    assert "input" in cli_refused(capsys, ["replay", str(run), "--csv", str(run / "champion.json"), "--force"])
    assert "input" in cli_refused(capsys, ["replay", str(policy), "--plan", str(plan), "--csv", str(plan), "--force"])
    assert snapshot(work) == before


def test_replay_refuses_an_existing_output_unless_forced(capsys, work, policy):
    kept = work / "notes.csv"
    kept.write_text("measured by hand, keep\n")
    before = snapshot(work)
    line = cli_refused(capsys, ["replay", str(policy), "--csv", str(kept)])
    assert "notes.csv" in line and "--force" in line
    assert "same file" in cli_refused(capsys, ["replay", str(policy), "--csv", str(work / "t.csv"),
                                           "--gif", str(work / "t.csv")])
    assert snapshot(work) == before
    capsys.readouterr()
    assert main(["replay", str(policy), "--csv", str(kept), "--force"]) == 0
    assert kept.read_text().startswith("episode,step,time")  # replaced by the trace, as asked


@pytest.mark.parametrize("argv", [
    ["replay", "lqr", "--env", "CartPole-v0", "--set", "pole_mass=0.2", "--set", "pole_mass=0.3"],
    ["envs", "CartPole-v0", "--option", "poles=2", "--option", "poles=1"],
])
def test_a_name_given_twice(capsys, work, argv):
    assert "given twice" in cli_refused(capsys, argv)


# --------------------------------------------------------------------------- #
# --dask addresses, a config's scheduler, and a damaged run directory on --resume
# --------------------------------------------------------------------------- #
import hashlib as _hashlib  # noqa: E402
import pickle as _pickle  # noqa: E402

_BAD_DASK = ["tcp://", ":::", "tcp://host:notaport", "tcp://host:99999", "tcp://host", "nosuch://host:8786"]


@pytest.mark.parametrize("command", ["evolve", "sweep"])
@pytest.mark.parametrize("address", _BAD_DASK)
def test_malformed_dask_address(capsys, work, command, address):
    pytest.importorskip("dask.distributed", reason="dask.distributed is not installed (pretrial[cluster])")
    out = work / "out"
    argv = (["evolve", str(CONFIG), "--out", str(out)] if command == "evolve"
            else ["sweep", "lqr", "--plan", str(PLAN), "--out", str(out)])
    before = snapshot(work)
    line = cli_refused(capsys, [*argv, "--dask", address])
    assert f"--dask {address!r}" in line and "not a scheduler address" in line, line
    assert snapshot(work) == before  # no run or sweep directory


def _with_run_key(text: str, line: str) -> str:
    assert "[run]\n" in text
    return text.replace("[run]\n", f"[run]\n{line}\n", 1)


def test_a_config_may_not_choose_a_remote_scheduler(capsys, work):
    config = work / "remote.toml"
    config.write_text(_with_run_key(CONFIG.read_text(), 'dask = "tcp://203.0.113.9:8786"'))
    before = snapshot(work)
    line = cli_refused(capsys, ["evolve", str(config), "--out", str(work / "run")])
    assert "remote.toml" in line and "tcp://203.0.113.9:8786" in line and "--trust-config-dask" in line, line
    # confirmed on the command line, the config's address is used (and checked like --dask)
    config.write_text(_with_run_key(CONFIG.read_text(), 'dask = "tcp://"'))
    pytest.importorskip("dask.distributed", reason="dask.distributed is not installed (pretrial[cluster])")
    line = cli_refused(capsys, ["evolve", str(config), "--out", str(work / "run"), "--trust-config-dask"])
    assert "not a scheduler address" in line, line
    assert snapshot(work) == {**before, "remote.toml": config.read_bytes()}


_RUN_CONFIG = ('[task]\nenv = "pretrial/CartPole-v0"\nepisodes = 2\nhorizon = 0.2\n\n[neat]\npop_size = 6\n\n'
               "[run]\ngenerations = 2\nworkers = 1\n")


@pytest.fixture(scope="module")
def finished_run(tmp_path_factory) -> tuple[Path, Path]:
    """A tiny finished run (config, run directory) that each case copies and damages."""
    root = tmp_path_factory.mktemp("resume_run")
    config = root / "tiny.toml"
    config.write_text(_RUN_CONFIG)
    assert main(["evolve", str(config), "--out", str(root / "run"), "--quiet"]) == 0
    return config, root / "run"


class _Loaded:
    """A pickle that leaves a marker file when loaded: the harm a checkpoint from anywhere could do."""

    def __init__(self, marker: str):
        self.marker = marker

    def __reduce__(self):
        return (Path.touch, (Path(self.marker),))


def _sha(data: bytes) -> str:
    return _hashlib.sha256(data).hexdigest()


def _manifest_pointing_at(run: Path, target: str, data: bytes) -> None:
    doc = json.loads((run / "manifest.json").read_text())
    doc["checkpoints"] = {"generation-0.pkl": doc["checkpoints"]["generation-0.pkl"], target: _sha(data)}
    (run / "manifest.json").write_text(json.dumps(doc))


def _escape_dir(run: Path, marker: Path) -> None:
    data = _pickle.dumps(_Loaded(str(marker)))
    (run.parent / "x.pkl").write_bytes(data)  # beside the run, reached as ../../x.pkl from checkpoints/
    _manifest_pointing_at(run, "../../x.pkl", data)


def _absolute(run: Path, marker: Path) -> None:
    data = _pickle.dumps(_Loaded(str(marker)))
    (run.parent / "x.pkl").write_bytes(data)
    _manifest_pointing_at(run, str(run.parent / "x.pkl"), data)


def _symlinked(run: Path, marker: Path) -> None:
    data = _pickle.dumps(_Loaded(str(marker)))
    (run.parent / "x.pkl").write_bytes(data)
    (run / "checkpoints" / "generation-9.pkl").symlink_to(run.parent / "x.pkl")
    _manifest_pointing_at(run, "generation-9.pkl", data)


def _replace(name: str, content: bytes) -> Callable[[Path, Path], None]:
    def damage(run: Path, marker: Path) -> None:
        (run / name).write_bytes(content)

    return damage


def _edit_manifest(edit: Callable[[dict], object]) -> Callable[[Path, Path], None]:
    def damage(run: Path, marker: Path) -> None:
        doc = json.loads((run / "manifest.json").read_text())
        doc = edit(doc) or doc
        (run / "manifest.json").write_text(json.dumps(doc))

    return damage


def _drop_ini_line(key: str) -> Callable[[Path, Path], None]:
    def damage(run: Path, marker: Path) -> None:
        ini = run / "neat.ini"
        lines = [ln for ln in ini.read_text().splitlines(keepends=True) if not ln.startswith(f"{key} ")]
        ini.write_text("".join(lines))

    return damage


def _delete(name: str) -> Callable[[Path, Path], None]:
    def damage(run: Path, marker: Path) -> None:
        (run / name).unlink()

    return damage


DAMAGED_RUN = [
    ("manifest-escapes-the-run", _escape_dir, "../../x.pkl"),
    ("manifest-absolute-path", _absolute, "x.pkl"),
    ("checkpoint-symlink", _symlinked, "symlink"),
    ("manifest-array", _replace("manifest.json", b"[1, 2]\n"), "manifest.json"),
    ("manifest-truncated", _replace("manifest.json", b'{"checkpoints": {"generation-0.pkl": "ab'), "manifest.json"),
    ("manifest-not-utf8", _replace("manifest.json", b'{"seed": "\xff\xfe"}'), "manifest.json"),
    ("manifest-deep", _replace("manifest.json", b"[" * 100_000), "manifest.json"),
    ("manifest-checkpoints-list", _edit_manifest(lambda d: d.update(checkpoints=["generation-0.pkl"])),
     "manifest.json"),
    ("manifest-hash-not-text", _edit_manifest(lambda d: d["checkpoints"].update({"generation-2.pkl": 5})),
     "manifest.json"),
    ("manifest-odd-name", _edit_manifest(lambda d: d["checkpoints"].update({"generation-two.pkl": "0" * 64})),
     "generation-two.pkl"),
    ("neat-ini-empty", _replace("neat.ini", b""), "neat.ini"),
    ("neat-ini-binary", _replace("neat.ini", bytes(range(256))), "neat.ini"),
    ("neat-ini-no-pop-size", _drop_ini_line("pop_size"), "neat.ini"),
    ("neat-ini-missing", _delete("neat.ini"), "neat.ini"),
    ("timing-header", _replace("timing.csv", b"gen,secs\n0,0.1\n"), "timing.csv"),
    ("timing-generation", _replace("timing.csv", b"generation,seconds\nzero,0.1\n"), "timing.csv"),
    ("timing-short-row", _replace("timing.csv", b"generation,seconds\n0\n"), "timing.csv"),
    ("timing-long-row", _replace("timing.csv", b"generation,seconds\n0,0.1,9\n"), "timing.csv"),
    ("timing-seconds", _replace("timing.csv", b"generation,seconds\n0,nan\n"), "timing.csv"),
    ("timing-binary", _replace("timing.csv", b"\xff\xfe\x00\x01" * 20), "timing.csv"),
    ("config-resolved", _replace("config.resolved.toml", b"[task\n"), "config.resolved.toml"),
]


@pytest.mark.parametrize("damage, needle", [c[1:] for c in DAMAGED_RUN], ids=[c[0] for c in DAMAGED_RUN])
def test_resume_of_a_damaged_run_directory(capsys, work, finished_run, damage, needle):
    config, original = finished_run
    run = work / "runs" / "run"
    shutil.copytree(original, run)
    marker = work / "pickle-was-loaded"
    damage(run, marker)
    before = snapshot(work)
    line = cli_refused(capsys, ["evolve", str(config), "--resume", str(run)])
    assert needle in line, line
    assert not marker.exists()  # no pickle from outside checkpoints/ was ever loaded
    assert snapshot(work) == before  # nothing modified


def test_resume_of_the_undamaged_run_works(capsys, work, finished_run):
    # the cases above are refused for their damage, not because this run cannot resume
    config, original = finished_run
    shutil.copytree(original, work / "run")
    assert main(["evolve", str(config), "--resume", str(work / "run"), "--quiet"]) == 0


def _results_doc(**changes) -> dict:
    """A results.json body of schema version 1 (README "results.json"), with its content hash."""
    from pretrial.files import canonical_json, sha256_hex

    doc = {
        "schema": "pretrial.sweep", "schema_version": 1,
        "policy": {"kind": "lqr", "path": None, "content_sha256": None},
        "env": {"id": "pretrial/CartPole-v0", "options": {}, "params": {}},
        "plan": {"path": "p.toml", "content_sha256": "0" * 64, "resolved": {}},
        "seed": 1, "required_success_rate": 0.95, "episodes_per_point": 80,
        "margins": [], "montecarlo": None, "worstcase": None, "sensitivity": None, "success_map": None,
        "linear": None, "linear_sampled": None, "linear_details": None, "integrator_check": None,
        "diverged": None, "requirements": [], "verdict": "fail", "baseline": None, "cautions": ["x"],
    }
    for key, value in changes.items():
        if value is _DROP:
            doc.pop(key)
        else:
            doc[key] = value
    doc["content_sha256"] = sha256_hex(canonical_json(doc))  # a hash anyone can compute: not a check of trust
    return doc


_DROP = object()


@pytest.mark.parametrize("changes, needle", [
    ({"schema_version": 2}, "schema_version 2"),
    ({"schema_version": "1"}, "schema_version '1'"),
    ({"schema_version": True}, "schema_version True"),
    ({"schema_version": _DROP}, "schema_version None"),
    ({"verdict": _DROP}, "'verdict' is missing"),
    ({"verdict": "maybe"}, "'verdict'"),
    ({"seed": 1.5}, "'seed'"),
    ({"margins": {}}, "'margins'"),
    ({"cautions": [1]}, "'cautions'"),
    ({"required_success_rate": False}, "'required_success_rate'"),
])
def test_results_of_another_schema_are_refused(tmp_path, changes, needle):
    from pretrial.analysis.results import read_results

    good = tmp_path / "good.json"
    good.write_text(json.dumps(_results_doc()))
    assert read_results(good)["verdict"] == "fail"  # the complete document is read
    path = tmp_path / "results.json"
    path.write_text(json.dumps(_results_doc(**changes)))
    with pytest.raises(InputError) as info:
        read_results(path)
    assert needle in str(info.value) and "results.json" in str(info.value) and "\n" not in str(info.value)


def test_results_holding_only_a_schema_are_refused(tmp_path):
    from pretrial.analysis.results import read_results
    from pretrial.files import canonical_json, sha256_hex

    path = tmp_path / "results.json"
    body = {"schema": "pretrial.sweep"}
    path.write_text(json.dumps({**body, "content_sha256": sha256_hex(canonical_json(body))}))  # its hash is right
    with pytest.raises(InputError, match="schema_version"):
        read_results(path)
