"""Policy files: exact round trips, the documented observation/action mapping, refusal of damage.

References: neat-python 2.0 (``neat.nn.FeedForwardNetwork`` / ``RecurrentNetwork``) for what the
network computes; the JSON standard as implemented by Python's :mod:`json` and SHA-256 from
:mod:`hashlib` for the file and its hash; the mapping formulas are the ones pretrial.policy documents.
"""

from __future__ import annotations

import hashlib
import json
import os

import neat
import numpy as np
import pytest
from helpers import library_outputs, make_config, random_genome
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pretrial.controller.policy import (
    IOMap,
    Policy,
    PopulationPolicy,
    load_policy,
    policy_from_genome,
    policy_to_dict,
    save_policy,
    stack_policies,
)
from pretrial.errors import FileFormatError, InputError, PretrialError

TOL = {"rtol": 1e-12, "atol": 1e-12}


@pytest.fixture(scope="module")
def configs(tmp_path_factory) -> dict[bool, neat.Config]:
    d = tmp_path_factory.mktemp("neat")
    return {ff: make_config(d / f"ff_{ff}.ini", ff) for ff in (True, False)}


def _doc(genome, cfg, **kwargs):
    kwargs.setdefault("env_id", "pretrial/CartPole-v0")
    kwargs.setdefault("env_options", {"poles": 2, "integrator": "rk4"})
    kwargs.setdefault("env_params", {"cart_mass": 1.0, "pole_length": 0.5, "friction": 0.0})
    kwargs.setdefault("training", {"seed": 7, "generations": 12, "fitness": 123.25, "notes": ["a", 1, None]})
    return policy_to_dict(genome, cfg, **kwargs)


def _rehash(doc):
    """Recompute the content hash the way the file format defines it (canonical JSON, SHA-256)."""
    body = {k: v for k, v in doc.items() if k != "content_sha256"}
    text = json.dumps(body, sort_keys=True, separators=(",", ":"), allow_nan=False)
    doc["content_sha256"] = hashlib.sha256(text.encode("utf-8")).hexdigest()
    return doc


def _neat_genome_from_file(topology, cfg):
    """Rebuild a neat-python genome from the file's network entry (connections keep file order)."""
    g = neat.DefaultGenome(0)
    for n in topology["nodes"]:
        node = neat.genes.DefaultNodeGene(n["key"])
        node.bias, node.response = n["bias"], n["response"]
        node.activation, node.aggregation, node.time_constant = n["activation"], n["aggregation"], 1.0
        g.nodes[n["key"]] = node
    for i, c in enumerate(topology["connections"]):
        cg = neat.genes.DefaultConnectionGene((c["in"], c["out"]), innovation=i + 1)
        cg.weight, cg.enabled = c["weight"], True
        g.connections[cg.key] = cg
    return g


# --------------------------------------------------------------------------- #
# round trips
# --------------------------------------------------------------------------- #
@pytest.mark.parametrize("feed_forward", [True, False])
def test_round_trip_is_exact(tmp_path, configs, feed_forward):
    cfg = configs[feed_forward]
    genome = random_genome(cfg, 11)
    io = IOMap(3, 2, obs_offset=[0.1, -0.2, 0.3], obs_scale=[2.0, 0.5, 1.0 / 3.0], action_scale=[0.7, 1.3],
               action_offset=[0.05, -0.1])
    memory = policy_from_genome(genome, cfg, env_id="pretrial/CartPole-v0", io=io, training={"seed": 1})
    path = tmp_path / "champion.json"
    save_policy(path, memory)
    loaded = load_policy(path)
    assert loaded.to_dict() == memory.to_dict()
    assert loaded.content_hash == memory.content_hash
    assert loaded.io == io and loaded.feed_forward == feed_forward
    # every float of the genome comes back bit for bit
    by_key = {n["key"]: n for n in loaded.topology["nodes"]}
    for key, n in by_key.items():
        assert (n["bias"], n["response"]) == (genome.nodes[key].bias, genome.nodes[key].response)
    for c in loaded.topology["connections"]:
        assert c["weight"] == genome.connections[(c["in"], c["out"])].weight
    obs = np.random.default_rng(0).normal(0.0, 2.0, (6, 8, 3))
    memory.reset(8)
    loaded.reset(8)
    for step in obs:  # recurrent policies carry state: compare several steps
        np.testing.assert_array_equal(loaded.act(step), memory.act(step))


@pytest.mark.parametrize("feed_forward", [True, False])
def test_act_applies_the_documented_mapping_around_neat_python(configs, feed_forward):
    cfg = configs[feed_forward]
    genome = random_genome(cfg, 5)
    offset, scale = np.array([0.5, -1.0, 2.0]), np.array([0.25, 2.0, -1.5])
    a_scale, a_offset = np.array([3.0, -0.5]), np.array([0.2, 0.1])
    policy = policy_from_genome(genome, cfg, env_id="e/x-v0",
                                io=IOMap(3, 2, 1, offset, scale, a_scale, a_offset))
    obs = np.random.default_rng(1).normal(0.0, 3.0, (4, 6, 3))
    # network_input = (obs - offset) * scale; action = clip(out * scale + offset, -1, 1)
    raw = library_outputs(genome, cfg, (obs - offset) * scale)
    expected = np.clip(raw * a_scale + a_offset, -1.0, 1.0)
    got = np.array([policy.act(step) for step in obs])
    np.testing.assert_allclose(got, expected, **TOL)


def test_shared_blocks_drive_each_block_with_its_own_state(configs):
    cfg = configs[False]  # recurrent: each block must keep its own state
    genome = random_genome(cfg, 21)
    io = IOMap(3, 2, blocks=2, obs_scale=[1.0, 2.0, 3.0, 1.0, 2.0, 3.0], action_scale=[0.5] * 4)
    path_doc = _doc(genome, cfg, env_id="pretrial/DronePair-v0", io=io)
    assert path_doc["layout"] == {"kind": "shared_blocks", "blocks": 2}
    policy = Policy.from_dict(path_doc)
    obs = np.random.default_rng(2).normal(0.0, 1.0, (5, 3, 6))  # (steps, B, 2 blocks of 3)
    scaled = obs * np.array(io.obs_scale)
    # one library network per (scenario, block)
    per_block = [library_outputs(genome, cfg, scaled[:, :, 3 * k : 3 * k + 3]) for k in range(2)]
    expected = np.clip(np.concatenate(per_block, axis=2) * 0.5, -1.0, 1.0)
    policy.reset(3)
    np.testing.assert_allclose(np.array([policy.act(step) for step in obs]), expected, **TOL)


@pytest.mark.parametrize("feed_forward", [True, False])
def test_file_network_rebuilt_in_neat_python_gives_the_same_outputs(configs, feed_forward):
    # The file is self-sufficient: neat-python itself, on a genome rebuilt from the file alone,
    # reproduces the original genome's outputs exactly.
    cfg = configs[feed_forward]
    for seed in range(15):
        genome = random_genome(cfg, 100 + seed)
        topology = _doc(genome, cfg)["network"]
        x = np.random.default_rng(seed).normal(0.0, 2.0, (3, 4, 3))
        np.testing.assert_array_equal(library_outputs(_neat_genome_from_file(topology, cfg), cfg, x),
                                      library_outputs(genome, cfg, x))


def test_hash_is_sha256_of_the_canonical_json(configs):
    doc = _doc(random_genome(configs[True], 3), configs[True])
    assert doc["content_sha256"] == _rehash(dict(doc))["content_sha256"]


def test_same_controller_gives_the_same_bytes_anywhere(tmp_path, configs):
    genome = random_genome(configs[True], 8)
    paths = [tmp_path / "a" / "champion.json", tmp_path / "b" / "other_name.json"]
    for p in paths:
        p.parent.mkdir()
        save_policy(p, _doc(genome, configs[True]))
    data = [p.read_bytes() for p in paths]
    assert data[0] == data[1]
    assert str(tmp_path).encode() not in data[0]
    assert sorted(p.name for p in tmp_path.rglob("*")) == ["a", "b", "champion.json", "other_name.json"]  # no temp


def test_failed_save_leaves_the_old_file_intact(tmp_path, configs):
    path = tmp_path / "champion.json"
    save_policy(path, _doc(random_genome(configs[True], 1), configs[True]))
    before = path.read_bytes()
    bad = _doc(random_genome(configs[True], 2), configs[True])
    bad["network"]["connections"][0]["weight"] += 1.0  # hash no longer matches
    with pytest.raises(FileFormatError, match="hash"):
        save_policy(path, bad)
    assert path.read_bytes() == before
    assert os.listdir(tmp_path) == ["champion.json"]


def test_stack_policies_equals_each_policy(configs):
    cfg = configs[False]
    policies = [Policy.from_dict(_doc(random_genome(cfg, s), cfg)) for s in range(5)]
    batch = stack_policies(policies)
    assert isinstance(batch, PopulationPolicy) and batch.n_policies == 5
    obs = np.random.default_rng(3).normal(0.0, 1.0, (3, 5 * 4, 3))
    batch.reset(4)
    for p in policies:
        p.reset(4)
    for step in obs:
        expected = np.concatenate([p.act(step[4 * i : 4 * i + 4]) for i, p in enumerate(policies)])
        np.testing.assert_array_equal(batch.act(step), expected)


def test_writing_refuses_values_json_cannot_hold(configs):
    g = random_genome(configs[True], 1)
    with pytest.raises(InputError, match=r"training\.loss"):
        _doc(g, configs[True], training={"loss": float("nan")})
    with pytest.raises(InputError, match="set"):
        _doc(g, configs[True], training={"ids": {1, 2}})
    with pytest.raises(InputError, match="io map"):
        _doc(g, configs[True], io=IOMap(4, 2))
    # numpy values are converted, exactly
    doc = _doc(g, configs[True], training={"best": np.float64(0.1), "gens": np.arange(3)})
    assert doc["training"]["best"] == 0.1 and doc["training"]["gens"] == [0, 1, 2]


# --------------------------------------------------------------------------- #
# damaged files
# --------------------------------------------------------------------------- #
@pytest.fixture
def saved(tmp_path, configs):
    path = tmp_path / "champion.json"
    save_policy(path, _doc(random_genome(configs[False], 4), configs[False]))
    return path


def _refused(path, *fragments):
    with pytest.raises(FileFormatError) as info:
        load_policy(path)
    message = str(info.value)
    assert "\n" not in message and str(path) in message
    for f in fragments:
        assert f in message, message
    return message


def test_edited_weight_is_refused_naming_the_hash(saved):
    doc = json.loads(saved.read_text())
    doc["network"]["connections"][0]["weight"] *= 1.0000001
    saved.write_text(json.dumps(doc, indent=2))
    _refused(saved, "content hash mismatch")


def test_reformatting_keeps_the_file_valid(saved):
    # the hash covers content, not layout: re-indenting or reordering keys is fine
    doc = json.loads(saved.read_text())
    saved.write_text(json.dumps(doc, separators=(",", ":")))
    assert load_policy(saved).content_hash == doc["content_sha256"]


def _edit(saved, change):
    doc = json.loads(saved.read_text())
    change(doc)
    saved.write_text(json.dumps(_rehash(doc)))


@pytest.mark.parametrize(("change", "fragment"), [
    (lambda d: d.pop("action"), "missing entry 'action'"),
    (lambda d: d["network"]["nodes"][0].pop("bias"), "network.nodes[0]: missing 'bias'"),
    (lambda d: d["network"]["connections"][0].update(weight="0.5"), "network.connections[0].weight"),
    (lambda d: d["network"]["connections"][0].update({"in": 999}), "999"),
    (lambda d: d["network"]["nodes"][0].update(activation="swish"), "swish"),
    (lambda d: d["network"].update(feed_forward=1), "network.feed_forward"),
    (lambda d: d["observation"]["scale"].pop(), "observation.scale: has 2 values, expected 3"),
    (lambda d: d["layout"].update(kind="flat", blocks=2), "layout.blocks"),
    (lambda d: d["env"].update(id=""), "env.id"),
    (lambda d: d["env"]["params"].update(mass=True), "env.params.mass"),
    (lambda d: d.update(extra=1), "unknown entry 'extra'"),
    (lambda d: d.update(schema_version=2), "schema version 2"),
    (lambda d: d.update(schema="something.else"), "not a pretrial policy file"),
])
def test_malformed_entries_are_refused_by_path(saved, change, fragment):
    _edit(saved, change)
    _refused(saved, fragment)


@pytest.mark.parametrize(("content", "fragment"), [
    (b"", "empty"),
    (b"   \n", "empty"),
    (bytes(range(256)) * 4, "UTF-8"),
    (b"\x89PNG\r\n\x1a\n\x00\x00", "UTF-8"),
    (b"[1, 2, 3]", "top level is list"),
    (b'{"a": 1, "a": 2}', "appears twice"),
    (b'{"a": NaN}', "NaN"),
    (b'{"a": 1e999}', "out of range"),
    (b"[" * 100000 + b"]" * 100000, "JSON"),
])
def test_files_that_are_not_policies_are_refused(tmp_path, content, fragment):
    path = tmp_path / "champion.json"
    path.write_bytes(content)
    _refused(path, fragment)


def test_truncated_file_is_refused(saved):
    data = saved.read_bytes()
    for cut in (1, len(data) // 3, len(data) - 3):
        saved.write_bytes(data[:cut])
        _refused(saved, "not valid JSON")


def test_directory_and_missing_paths_are_refused(tmp_path):
    _refused(tmp_path, "is a directory")
    _refused(tmp_path / "nope.json", "no such file")


# --------------------------------------------------------------------------- #
# fuzzing the loader: PretrialError or a working policy, nothing else
# --------------------------------------------------------------------------- #
JSON = st.recursive(st.none() | st.booleans() | st.integers() | st.floats(allow_nan=False, allow_infinity=False)
                    | st.text(max_size=8),
                    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=8), inner, max_size=4),
                    max_leaves=12)
FUZZ = settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])


def _load_or_refuse(path):
    try:
        policy = load_policy(path)
    except PretrialError as exc:
        assert "\n" not in str(exc) and str(path) in str(exc)
        return None
    policy.reset(2)
    assert policy.act(np.zeros((2, policy.io.obs_dim))).shape == (2, policy.io.action_dim)
    return policy


@FUZZ
@given(data=st.binary(max_size=300))
def test_fuzz_random_bytes(tmp_path, data):
    path = tmp_path / "fuzz.json"
    path.write_bytes(data)
    _load_or_refuse(path)


@FUZZ
@given(value=JSON)
def test_fuzz_random_json(tmp_path, value):
    path = tmp_path / "fuzz.json"
    path.write_text(json.dumps(value))
    _load_or_refuse(path)


def _paths(obj, prefix=()):
    yield prefix
    if isinstance(obj, dict):
        for k, v in obj.items():
            yield from _paths(v, (*prefix, k))
    elif isinstance(obj, list):
        for i, v in enumerate(obj):
            yield from _paths(v, (*prefix, i))


@pytest.fixture(scope="module")
def valid_doc(configs):
    return _doc(random_genome(configs[False], 9), configs[False])


@FUZZ
@given(data=st.data())
def test_fuzz_edited_documents_with_a_valid_hash(tmp_path, valid_doc, data):
    # the hardest case for the loader: structurally edited content whose hash was recomputed
    doc = json.loads(json.dumps(valid_doc))
    for _ in range(data.draw(st.integers(1, 3))):
        paths = [p for p in _paths(doc) if p and p[0] != "content_sha256"]
        where = data.draw(st.sampled_from(paths))
        parent = doc
        for k in where[:-1]:
            parent = parent[k]
        if data.draw(st.booleans()) and isinstance(parent, dict):
            del parent[where[-1]]
        else:
            parent[where[-1]] = data.draw(JSON)
    path = tmp_path / "fuzz.json"
    path.write_text(json.dumps(_rehash(doc)))
    _load_or_refuse(path)
