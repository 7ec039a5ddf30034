"""Run configs: TOML in, validated dataclasses out, and one-line errors that name file and key.

References: the TOML 1.0 grammar as implemented by the standard library's ``tomllib`` (every
text ``dump_toml`` writes must parse back to the same data), and neat-python 2.0's own
``neat.Config`` parser (the merged ``[neat]`` settings must be accepted by it and mean the
same there).
"""

from __future__ import annotations

import tomllib
from pathlib import Path

import neat
import pytest
from helpers import ENVS, fuzz_toml, scalars
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pretrial.errors import InputError, PretrialError
from pretrial.evolution.config import (
    Config,
    RunConfig,
    TaskConfig,
    build_neat_ini,
    load_config,
    neat_key_sections,
)
from pretrial.tomlfile import dump_toml

GOOD = """
[task]
env = "pretrial/CartPole-v0"
episodes = 6
horizon = 12.5

[task.options]
poles = 2

[task.params]
cart_mass = 1.5
pole2_half_length = 0.1

[task.randomize]
pole_mass = [0.05, 0.2]
sensor_noise_std = [0.0, 0.01]

[neat]
pop_size = 50
activation_options = ["tanh", "sigmoid"]
feed_forward = false

[run]
generations = 7
seed = 12345
fitness_target = 950.0
"""


def write(tmp_path: Path, text: str | bytes, name: str = "run.toml") -> Path:
    p = tmp_path / name
    if isinstance(text, bytes):
        p.write_bytes(text)
    else:
        p.write_text(text)
    return p


def refused(path: Path) -> str:
    """Load ``path`` expecting an InputError; return its message after checking it names the file."""
    with pytest.raises(InputError) as info:
        load_config(path)
    msg = str(info.value)
    assert msg.startswith(f"{path}: "), msg
    assert "\n" not in msg
    return msg


def neat_config(text: str, tmp_path: Path) -> neat.Config:
    p = tmp_path / "neat.ini"
    p.write_text(text)
    return neat.Config(neat.DefaultGenome, neat.DefaultReproduction, neat.DefaultSpeciesSet,
                       neat.DefaultStagnation, str(p))


# --------------------------------------------------------------------------- #
# a valid config
# --------------------------------------------------------------------------- #
def test_valid_config_loads_into_dataclasses(tmp_path):
    p = write(tmp_path, GOOD)
    cfg = load_config(p)
    assert isinstance(cfg, Config) and isinstance(cfg.task, TaskConfig) and isinstance(cfg.run, RunConfig)
    assert cfg.path == str(p) and cfg.name == "run" and cfg.source_text == GOOD
    assert cfg.task.env == "pretrial/CartPole-v0"
    assert cfg.task.env_options == {"poles": 2}
    assert cfg.task.params == {"cart_mass": 1.5, "pole2_half_length": 0.1}
    assert cfg.task.episodes == 6 and cfg.task.horizon == 12.5 and cfg.task.network == "whole"
    assert cfg.task.randomize == {"pole_mass": (0.05, 0.2), "sensor_noise_std": (0.0, 0.01)}
    assert cfg.neat == {"pop_size": 50, "activation_options": ["tanh", "sigmoid"], "feed_forward": False}
    assert (cfg.run.generations, cfg.run.seed, cfg.run.fitness_target) == (7, 12345, 950.0)
    # unset keys take the documented defaults
    assert cfg.run.checkpoint_every == 10 and cfg.run.workers == "auto" and cfg.run.dask is None


def test_minimal_config_takes_defaults(tmp_path):
    cfg = load_config(write(tmp_path, '[task]\nenv = "pretrial/GantryCrane-v0"\n'))
    assert cfg.task == TaskConfig("pretrial/GantryCrane-v0")
    assert cfg.run == RunConfig() and cfg.neat == {}


def test_integer_where_a_number_is_expected_is_a_float(tmp_path):
    cfg = load_config(write(tmp_path, BASE_TASK + "horizon = 5\n[task.params]\ncart_mass = 2\n"))
    assert cfg.task.horizon == 5.0 and isinstance(cfg.task.horizon, float)
    assert isinstance(cfg.task.params["cart_mass"], float)


def test_build_neat_ini_is_accepted_by_neat_python(tmp_path):
    cfg = load_config(write(tmp_path, GOOD))
    text = build_neat_ini(cfg, 6, 1)
    nc = neat_config(text, tmp_path)  # reference: neat-python's own parser
    g = nc.genome_config
    assert (g.num_inputs, g.num_outputs) == (6, 1)
    assert nc.pop_size == 50
    assert g.activation_options == ["tanh", "sigmoid"] and g.feed_forward is False
    # untouched settings keep the shipped defaults
    assert g.initial_connection == "full_direct" and nc.species_set_config.compatibility_threshold == 3.0


def test_build_neat_ini_sets_every_known_key_where_neat_reads_it(tmp_path):
    # each advertised [neat] key lands in the section neat-python reads it from
    cfg = load_config(write(tmp_path, '[task]\nenv = "pretrial/CartPole-v0"\n[neat]\nmax_stagnation = 7\n'
                                      'elitism = 3\ncompatibility_threshold = 2.5\nconn_add_prob = 0.45\n'))
    nc = neat_config(build_neat_ini(cfg, 3, 2), tmp_path)
    assert nc.stagnation_config.max_stagnation == 7
    assert nc.reproduction_config.elitism == 3
    assert nc.species_set_config.compatibility_threshold == 2.5
    assert nc.genome_config.conn_add_prob == 0.45
    assert (nc.genome_config.num_inputs, nc.genome_config.num_outputs) == (3, 2)


# --------------------------------------------------------------------------- #
# unreadable files
# --------------------------------------------------------------------------- #
def test_missing_file(tmp_path):
    assert "no such file" in refused(tmp_path / "absent.toml")


def test_directory(tmp_path):
    d = tmp_path / "adir"
    d.mkdir()
    assert "directory" in refused(d)


@pytest.mark.parametrize("text", ["", "   \n\t\n"])
def test_empty_file(tmp_path, text):
    assert "empty" in refused(write(tmp_path, text))


def test_binary_file(tmp_path):
    assert "not a text file" in refused(write(tmp_path, b"\x89PNG\r\n\x1a\n\xff\xfe\x00\x00"))


def test_malformed_toml(tmp_path):
    msg = refused(write(tmp_path, '[task\nenv = "pretrial/CartPole-v0"\n'))
    assert "malformed TOML" in msg and "line 1" in msg


# --------------------------------------------------------------------------- #
# bad keys and values: each names the exact key
# --------------------------------------------------------------------------- #
BASE_TASK = '[task]\nenv = "pretrial/CartPole-v0"\n'

BAD = [
    # (toml text, key the message must name, further text it must contain)
    ('[tasks]\nenv = "pretrial/CartPole-v0"\n', "tasks", "did you mean 'task'"),
    (BASE_TASK + "episdoes = 3\n", "task.episdoes", "did you mean 'task.episodes'"),
    (BASE_TASK + "[run]\ngeneratoins = 3\n", "run.generatoins", "did you mean 'run.generations'"),
    (BASE_TASK + "[run]\nfitnes_target = 3.0\n", "run.fitnes_target", "did you mean 'run.fitness_target'"),
    ("task = 5\n", "task", "expected a table"),
    ("[task]\nepisodes = 3\n", "task.env", "missing"),
    (BASE_TASK + 'episodes = "8"\n', "task.episodes", "expected an integer, got string"),
    (BASE_TASK + "episodes = true\n", "task.episodes", "got boolean"),
    (BASE_TASK + "episodes = 2.5\n", "task.episodes", "got number"),
    (BASE_TASK + "[run]\ngenerations = true\n", "run.generations", "got boolean"),
    (BASE_TASK + "[run]\nseed = 1.0\n", "run.seed", "expected an integer"),
    (BASE_TASK + 'horizon = "long"\n', "task.horizon", "expected a number"),
    (BASE_TASK + "horizon = true\n", "task.horizon", "got boolean"),
    (BASE_TASK + "horizon = nan\n", "task.horizon", "not a finite number"),
    (BASE_TASK + "[run]\nfitness_target = inf\n", "run.fitness_target", "not a finite number"),
    (BASE_TASK + "[run]\nfitness_target = -inf\n", "run.fitness_target", "not a finite number"),
    (BASE_TASK + "episodes = 0\n", "task.episodes", "not allowed"),
    (BASE_TASK + "episodes = -3\n", "task.episodes", "not allowed"),
    (BASE_TASK + "horizon = 0.0\n", "task.horizon", "> 0"),
    (BASE_TASK + "horizon = -1.0\n", "task.horizon", "> 0"),
    (BASE_TASK + "[run]\ngenerations = 0\n", "run.generations", "not allowed"),
    (BASE_TASK + "[run]\nseed = -1\n", "run.seed", ">= 0"),
    (BASE_TASK + "[run]\ncheckpoint_every = 0\n", "run.checkpoint_every", ">= 1"),
    (BASE_TASK + "[run]\nworkers = 0\n", "run.workers", "'auto' or >= 1"),
    (BASE_TASK + '[run]\nworkers = "many"\n', "run.workers", "'auto' or >= 1"),
    (BASE_TASK + "[run]\nworkers = true\n", "run.workers", "got boolean"),
    (BASE_TASK + '[run]\ndask = "   "\n', "run.dask", "scheduler address"),
    (BASE_TASK + "[run]\nfinalists = 0\n", "run.finalists", ">= 1"),
    (BASE_TASK + "[run]\nvalidation_episodes = -2\n", "run.validation_episodes", ">= 1"),
    (BASE_TASK + 'network = "tree"\n', "task.network", "whole or shared"),
    (BASE_TASK + 'network = "shared"\n', "task.network", "repeated observation blocks"),
    ('[task]\nenv = "pretrial/CartPol-v0"\n', "task.env", "did you mean 'pretrial/CartPole-v0'"),
    ('[task]\nenv = "nobody/Nothing-v9"\n', "task.env", "unknown environment"),
    ("[task]\nenv = 3\n", "task.env", "expected a string"),
    (BASE_TASK + "[task.options]\npoles = 3\n", "task.options", "poles"),
    (BASE_TASK + "[task.options]\npolse = 2\n", "task.options", "polse"),
    (BASE_TASK + "options = 4\n", "task.options", "expected a table"),
    (BASE_TASK + "[task.options]\nstart_spread = 5\n", "task.options.start_spread", "expected a table"),
    (BASE_TASK + "[task.options]\nstart_spread = {q = 0.1}\n", "task.options", "unknown state 'q'"),
    (BASE_TASK + '[task.options]\nintegrator = "leapfrog"\n', "task.options", "integrator"),
    (BASE_TASK + "[task.options]\ndt = -0.01\n", "task.options", "dt"),
    (BASE_TASK + "[task.params]\ncart_mas = 1.0\n", "task.params.cart_mas", "did you mean 'cart_mass'"),
    (BASE_TASK + "[task.params]\ncart_mass = 1000.0\n", "task.params.cart_mass", "outside its valid range"),
    (BASE_TASK + "[task.params]\ncart_mass = 0.0\n", "task.params.cart_mass", "outside its valid range"),
    (BASE_TASK + "[task.params]\ncart_mass = -1.0\n", "task.params.cart_mass", "outside its valid range"),
    (BASE_TASK + "[task.params]\ncart_mass = nan\n", "task.params.cart_mass", "outside its valid range"),
    (BASE_TASK + "[task.params]\ncart_mass = inf\n", "task.params.cart_mass", "outside its valid range"),
    (BASE_TASK + '[task.params]\ncart_mass = "1"\n', "task.params.cart_mass", "not a number"),
    (BASE_TASK + "[task.params]\ncart_mass = true\n", "task.params.cart_mass", "not a number"),
    # pole2_* exist only with poles = 2
    (BASE_TASK + "[task.params]\npole2_mass = 0.01\n", "task.params.pole2_mass", "unknown parameter"),
    (BASE_TASK + "[task.randomize]\npole_mass = [0.2, 0.05]\n", "task.randomize.pole_mass", "reversed"),
    (BASE_TASK + "[task.randomize]\npole_mass = [0.05, 20.0]\n", "task.randomize.pole_mass", "leaves the valid range"),
    (BASE_TASK + "[task.randomize]\nsensor_noise_std = [-0.1, 0.1]\n", "task.randomize.sensor_noise_std",
     "leaves the valid range"),
    (BASE_TASK + "[task.randomize]\nactuator_gain = [0.5, inf]\n", "task.randomize.actuator_gain", "not finite"),
    (BASE_TASK + "[task.randomize]\nactuator_gain = [nan, 1.0]\n", "task.randomize.actuator_gain", "not finite"),
    (BASE_TASK + "[task.randomize]\npole_mass = [0.1]\n", "task.randomize.pole_mass", "expected [low, high]"),
    (BASE_TASK + "[task.randomize]\npole_mass = 0.1\n", "task.randomize.pole_mass", "expected [low, high]"),
    (BASE_TASK + "[task.randomize]\npole_mass = [0.1, 0.2, 0.3]\n", "task.randomize.pole_mass",
     "expected [low, high]"),
    (BASE_TASK + '[task.randomize]\npole_mass = ["a", "b"]\n', "task.randomize.pole_mass", "expected [low, high]"),
    (BASE_TASK + "[task.randomize]\npole_mass = [true, false]\n", "task.randomize.pole_mass", "expected [low, high]"),
    (BASE_TASK + "[task.randomize]\nsensor_nosie_std = [0.0, 0.1]\n", "task.randomize.sensor_nosie_std",
     "did you mean 'sensor_noise_std'"),
    (BASE_TASK + "randomize_ramp = 10\n", "task.randomize_ramp", "add [task.randomize]"),
    (BASE_TASK + "randomize_ramp = -1\n[task.randomize]\npole_mass = [0.05, 0.2]\n", "task.randomize_ramp",
     "not allowed"),
    (BASE_TASK + "randomize_ramp = 2.5\n[task.randomize]\npole_mass = [0.05, 0.2]\n", "task.randomize_ramp",
     "expected"),
    (BASE_TASK + "randomize_ramp = true\n[task.randomize]\npole_mass = [0.05, 0.2]\n", "task.randomize_ramp",
     "expected"),
    (BASE_TASK + "[neat]\npop_szie = 50\n", "neat.pop_szie", "did you mean 'neat.pop_size'"),
    (BASE_TASK + "[neat]\nnum_inputs = 4\n", "neat.num_inputs", "derived from the environment"),
    (BASE_TASK + "[neat]\nnum_outputs = 1\n", "neat.num_outputs", "derived from the environment"),
    (BASE_TASK + "[neat]\nfitness_threshold = 3.0\n", "neat.fitness_threshold", "[run].fitness_target"),
    (BASE_TASK + "[neat]\nseed = 3\n", "neat.seed", "[run].seed"),
    (BASE_TASK + "[neat]\nconn_add_prob = nan\n", "neat.conn_add_prob", "not a finite number"),
    (BASE_TASK + "[neat.pop_size]\na = 1\n", "neat.pop_size", "got a table"),
    # values only neat-python itself can judge
    (BASE_TASK + '[neat]\ninitial_connection = "bogus"\n', "neat.initial_connection", "bogus"),
    (BASE_TASK + '[neat]\npop_size = "fifty"\n', "neat.pop_size", "fifty"),
    (BASE_TASK + '[neat]\nconn_add_prob = "often"\n', "neat.conn_add_prob", "often"),
    (BASE_TASK + '[neat]\npop_size = 50\nfeed_forward = "sometimes"\n', "neat.feed_forward", "sometimes"),
    # configparser treats '%' as interpolation and newlines as continuation lines
    (BASE_TASK + '[neat]\nactivation_default = "tanh%"\n', "neat.activation_default", "%"),
    (BASE_TASK + '[neat]\nactivation_default = "tanh\\nnum_hidden = 4"\n', "neat.activation_default", "one line"),
]


@pytest.mark.parametrize(("text", "key", "detail"), BAD, ids=[f"{i}:{b[1]}" for i, b in enumerate(BAD)])
def test_bad_input_names_file_and_key(tmp_path, text, key, detail):
    msg = refused(write(tmp_path, text))
    assert f": {key}: " in msg, msg
    assert detail in msg, msg


def test_first_bad_neat_key_is_named_among_good_ones(tmp_path):
    text = BASE_TASK + '[neat]\npop_size = 40\nconn_add_prob = 0.2\ninitial_connection = "nowhere"\nelitism = 1\n'
    msg = refused(write(tmp_path, text))
    assert ": neat.initial_connection: " in msg and "nowhere" in msg


def test_neat_settings_refused_only_together_are_both_named(tmp_path):
    # neat-python accepts each alone but refuses a minimum above the maximum
    text = BASE_TASK + "[neat]\npop_size = 40\nbias_min_value = 5.0\nelitism = 1\nbias_max_value = -5.0\n"
    msg = refused(write(tmp_path, text))
    assert ": neat.bias_min_value, neat.bias_max_value: " in msg and "together" in msg


def test_node_time_constant_settings_reach_neat_python(tmp_path):
    # advertised by neat_key_sections for neat-python 2.0's node genes (reference: neat.genes.DefaultNodeGene)
    cfg = load_config(write(tmp_path, BASE_TASK + "[neat]\ntime_constant_init_mean = 2.0\n"))
    assert neat_config(build_neat_ini(cfg, 4, 1), tmp_path).genome_config.time_constant_init_mean == 2.0


# --------------------------------------------------------------------------- #
# fuzzing: nothing but InputError escapes
# --------------------------------------------------------------------------- #
_FUZZ = settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])


def _load_expecting_only_input_errors(path: Path) -> None:
    try:
        load_config(path)
    except PretrialError as exc:
        assert isinstance(exc, InputError)
        assert str(exc).startswith(f"{path}: ") and "\n" not in str(exc)


@_FUZZ
@given(st.binary(max_size=300))
def test_fuzz_random_bytes(tmp_path, data):
    _load_expecting_only_input_errors(write(tmp_path, data))


_KEYS = sorted(
    {"task", "neat", "run", "env", "episodes", "horizon", "network", "options", "params", "randomize", "generations",
     "randomize_ramp",
     "seed", "fitness_target", "checkpoint_every", "workers", "dask", "finalists", "validation_episodes", "poles",
     "observe", "dt", "substeps", "integrator", "time_limit", "start_spread", "hold_time", "hoist", "x", "theta",
     "cart_mass", "pole_mass", "gravity", "mass", "gust_std", "sensor_noise_std", "actuator_gain", "actuator_lag_s",
     "start_scale", "num_inputs", "pop_size", "bogus", "epsiodes"}
    | set(neat_key_sections())
)

_values = st.recursive(
    scalars,
    lambda inner: st.one_of(st.lists(inner, max_size=3), st.dictionaries(st.sampled_from(_KEYS), inner, max_size=4)),
    max_leaves=12,
)


_tables = st.dictionaries(
    st.sampled_from(["task", "neat", "run", "task.options", "task.params", "task.randomize", "tsak"]),
    st.dictionaries(st.sampled_from(_KEYS), _values, max_size=5),
    max_size=5,
)


@_FUZZ
@given(_tables, st.sampled_from(ENVS + [None]), st.text(max_size=20))
def test_fuzz_tomlish_text(tmp_path, tables, env, junk):
    lines = []
    if env is not None:
        lines += ["[task]", f'env = "{env}"']
    for name, table in tables.items():
        if name == "task" and env is not None:
            lines += [f"{k} = {fuzz_toml(v)}" for k, v in table.items() if k != "env"]
            continue
        lines.append(f"[{name}]")
        lines += [f"{k} = {fuzz_toml(v)}" for k, v in table.items()]
    lines.append(junk)  # sometimes valid, mostly not
    _load_expecting_only_input_errors(write(tmp_path, "\n".join(lines)))


_OPTION_KEYS = ["poles", "observe", "dt", "substeps", "integrator", "time_limit", "start_spread", "hold_time",
                "hoist", "polse"]


@_FUZZ
@given(st.sampled_from(ENVS[:3]), st.dictionaries(st.sampled_from(_OPTION_KEYS), _values, max_size=4))
def test_fuzz_env_options(tmp_path, env, options):
    # the env's keyword arguments reach its constructor: whatever it objects to must come back as InputError
    body = "\n".join(f"{k} = {fuzz_toml(v)}" for k, v in options.items())
    _load_expecting_only_input_errors(write(tmp_path, f'[task]\nenv = "{env}"\n[task.options]\n{body}\n'))


# --------------------------------------------------------------------------- #
# writing the resolved config
# --------------------------------------------------------------------------- #
def test_dump_toml_round_trips_to_dict(tmp_path):
    cfg = load_config(write(tmp_path, GOOD + 'workers = 2\ndask = "tcp://10.0.0.1:8786"\n'))
    data = cfg.to_dict()
    text = dump_toml(data)
    assert tomllib.loads(text) == data
    # the resolved file is itself a valid config that resolves to the same thing
    again = load_config(write(tmp_path, text, "resolved.toml"))
    assert again.to_dict() == data and again.content_hash() == cfg.content_hash()


def test_randomize_ramp_is_read_and_resolved(tmp_path):
    text = GOOD.replace("horizon = 12.5\n", "horizon = 12.5\nrandomize_ramp = 40\n")
    cfg = load_config(write(tmp_path, text))
    assert cfg.task.randomize_ramp == 40
    assert cfg.to_dict()["task"]["randomize_ramp"] == 40
    assert load_config(write(tmp_path, dump_toml(cfg.to_dict()), "resolved.toml")).task.randomize_ramp == 40
    assert load_config(write(tmp_path, GOOD, "plain.toml")).task.randomize_ramp == 0  # default: full ranges at once
    assert "randomize_ramp" not in load_config(write(tmp_path, GOOD, "plain.toml")).to_dict()["task"]


def test_dump_toml_round_trips_awkward_strings(tmp_path):
    # control characters, quotes and backslashes in a string the config accepts verbatim
    awkward = "tcp://a\\b\"c\u0007d\te\u007ff\u00e9"
    cfg = load_config(write(tmp_path, BASE_TASK + f"[run]\ndask = {fuzz_toml(awkward)}\n"))
    assert cfg.run.dask == awkward
    assert tomllib.loads(dump_toml(cfg.to_dict())) == cfg.to_dict()


_dump_scalars = st.one_of(
    st.integers(min_value=-(2**63), max_value=2**63 - 1), st.floats(allow_nan=False), st.booleans(), st.text(),
)
_dump_tables = st.recursive(
    st.dictionaries(st.text(min_size=1), st.one_of(_dump_scalars, st.lists(_dump_scalars, max_size=4)), max_size=4),
    lambda inner: st.dictionaries(st.text(min_size=1), inner, max_size=3),
    max_leaves=10,
)


@settings(max_examples=200, deadline=None)
@given(_dump_tables)
def test_dump_toml_round_trips_any_nested_tables(data):
    assert tomllib.loads(dump_toml(data)) == data


def test_content_hash_tracks_content(tmp_path):
    a = load_config(write(tmp_path, GOOD, "a.toml"))
    b = load_config(write(tmp_path, GOOD.replace("seed = 12345", "seed = 12346"), "b.toml"))
    c = load_config(write(tmp_path, "# same settings, other layout\n" + GOOD, "c.toml"))
    assert a.content_hash() != b.content_hash()
    assert a.content_hash() == c.content_hash()
