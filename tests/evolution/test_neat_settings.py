"""[neat] settings checked before a run directory exists, against what neat-python itself does with them.

The reference is neat-python (.venv/lib/python3.11/site-packages/neat): each case first shows what the
library does with the setting (raises at the first breeding, or takes it silently), then that
``load_config`` refuses it in one line naming the ``[neat]`` key.
"""

from __future__ import annotations

import random
from pathlib import Path

import neat
import pytest
from neat.activations import ActivationFunctionSet
from neat.aggregations import AggregationFunctionSet

from pretrial.errors import InputError
from pretrial.evolution.config import _neat_text, load_config, neat_generation_zero

BASE = '[task]\nenv = "pretrial/CartPole-v0"\nepisodes = 2\nhorizon = 0.2\n\n[neat]\n'


def _neat(tmp_path: Path, settings: dict) -> neat.Config:
    ini = tmp_path / "neat.ini"
    ini.write_text(_neat_text(settings, 4, 1))
    return neat.Config(neat.DefaultGenome, neat.DefaultReproduction, neat.DefaultSpeciesSet,
                       neat.DefaultStagnation, str(ini))


def _generation_zero(config: neat.Config):
    """neat-python's own calls for a first population (as the library's Population makes it)."""
    _, population, species, reproduction = neat_generation_zero(config)
    return reproduction, population, species


def _refusal(tmp_path: Path, neat_lines: str) -> str:
    path = tmp_path / "run.toml"
    path.write_text(BASE + neat_lines)
    with pytest.raises(InputError) as exc:
        load_config(path)
    message = exc.value.message
    assert message.startswith(f"{path}: neat.") and "\n" not in message
    return message


@pytest.mark.parametrize("settings, line", [
    ({"elitism": 1000}, "elitism = 1000"),
    ({"pop_size": 1}, "pop_size = 1"),
    ({"pop_size": 6, "compatibility_threshold": 1e-9}, "pop_size = 6\ncompatibility_threshold = 1e-9"),
])
def test_settings_neat_python_cannot_breed_are_refused_up_front(tmp_path, settings, line):
    reproduction, population, species = _generation_zero(_neat(tmp_path, settings))
    for genome in population.values():
        genome.fitness = 0.0
    with pytest.raises(RuntimeError, match="Configuration conflict"):  # neat-python, at the first breeding
        reproduction.reproduce(_neat(tmp_path, settings), species, settings.get("pop_size", 150), 0)
    message = _refusal(tmp_path, line + "\n")
    assert "Configuration conflict" in message and any(f"neat.{k}" in message for k in settings)


def test_pop_size_zero_gives_neat_python_an_empty_population(tmp_path):
    _, population, species = _generation_zero(_neat(tmp_path, {"pop_size": 0}))
    assert population == {} and species.species == {}  # neat-python: nothing to evolve, and no error
    assert "neat.pop_size: 0 not allowed (a whole number >= 1" in _refusal(tmp_path, "pop_size = 0\n")


def test_negative_num_hidden_is_taken_silently_by_neat_python(tmp_path):
    random.seed(3)
    _, minus, _ = _generation_zero(_neat(tmp_path, {"num_hidden": -1}))
    random.seed(3)
    _, zero, _ = _generation_zero(_neat(tmp_path, {"num_hidden": 0}))
    assert [sorted(g.nodes) for g in minus.values()] == [sorted(g.nodes) for g in zero.values()]
    assert "neat.num_hidden: -1 not allowed (a whole number >= 0" in _refusal(tmp_path, "num_hidden = -1\n")


def test_unknown_activation_option_is_taken_silently_by_neat_python(tmp_path):
    config = _neat(tmp_path, {"activation_options": ["tanh", "bogus"], "activation_mutate_rate": 1.0})
    assert "bogus" in config.genome_config.activation_options  # read without complaint
    assert not ActivationFunctionSet().is_valid("bogus")
    message = _refusal(tmp_path, 'activation_options = ["tanh", "bogus"]\nactivation_mutate_rate = 1.0\n')
    assert "neat.activation_options: 'bogus' is not a neat-python built-in activation" in message


def test_every_neat_python_built_in_function_is_accepted(tmp_path):
    activations = sorted(ActivationFunctionSet().functions)
    aggregations = sorted(AggregationFunctionSet().functions)
    path = tmp_path / "run.toml"
    path.write_text(BASE + f"activation_options = {activations!r}\nactivation_mutate_rate = 0.5\n"
                    f"aggregation_options = {aggregations!r}\n".replace("'", '"'))
    cfg = load_config(path)
    assert cfg.neat["activation_options"] == activations and cfg.neat["aggregation_options"] == aggregations


def test_the_dry_run_leaves_the_random_state_alone(tmp_path):
    path = tmp_path / "run.toml"
    path.write_text(BASE + "pop_size = 20\n")
    random.seed(11)
    before = random.getstate()
    load_config(path)
    assert random.getstate() == before
