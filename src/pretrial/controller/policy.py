"""Controllers on the env's side of the loop, and their files (``champion.json``).

:class:`IOMap` turns env observations into network inputs and network outputs
into env actions; :class:`PopulationPolicy` drives G stacked networks through
one map (the rollout engine's batch policy); :class:`Policy` is one controller
as a policy file describes it.

A policy file holds everything needed to fly the controller without
neat-python: the expressed network (nodes and enabled connections, in the
genome's summation order), how env observations become network inputs and
network outputs become env actions, the env it was trained on, a training
summary, and a SHA-256 over all of that. Layout (schema version 1)::

    {
      "schema": "pretrial.policy",
      "schema_version": 1,
      "env": {"id": "pretrial/CartPole-v0", "options": {...}, "params": {"name": value, ...}},
      "network": {"feed_forward": true, "inputs": [-1, -2, ...], "outputs": [0, ...],
                  "nodes": [{"key", "bias", "response", "activation", "aggregation"}, ...],
                  "connections": [{"in", "out", "weight"}, ...]},
      "layout": {"kind": "flat" | "shared_blocks", "blocks": k},
      "observation": {"offset": [...], "scale": [...]},
      "action": {"scale": [...], "offset": [...]},
      "training": {...},
      "content_sha256": "<hex>"
    }

Semantics: ``network_input = (obs - observation.offset) * observation.scale``;
the network is neat-python's ``FeedForwardNetwork`` or ``RecurrentNetwork``
for that genome; ``action = clip(output * action.scale + action.offset, -1, 1)``.
With ``"shared_blocks"`` the observation and the action are ``blocks`` equal
blocks and the one network drives each block (own recurrent state per block);
observation and action vectors then cover the whole observation and action.

``content_sha256`` is the SHA-256 of the canonical JSON
(``sort_keys=True, separators=(",", ":"), allow_nan=False``) of every other
entry, so it covers the content, not the formatting. The file holds no clock
times, paths, host or worker facts: the same controller gives the same bytes.
Floats are written by ``repr`` and read back exactly.
"""

from __future__ import annotations

import copy
import json
import os
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from pretrial.controller.network import (
    Network,
    PopulationNetwork,
    expect,
    expect_float,
    expect_int,
    expect_keys,
    genome_topology,
    spec_from_topology,
)
from pretrial.errors import FileFormatError, InputError, PretrialError
from pretrial.files import atomic_write_text, canonical_json, sha256_hex

SCHEMA = "pretrial.policy"
SCHEMA_VERSION = 1
HASH_KEY = "content_sha256"
_TOP_KEYS = ("schema", "schema_version", "env", "network", "layout", "observation", "action", "training", HASH_KEY)
_LAYOUTS = ("flat", "shared_blocks")
_MAX_BYTES = 64 * 2**20  # far above any evolved controller; refuses to parse a misnamed data dump


def _vector(values: Sequence[float] | None, size: int, default: float, name: str) -> tuple[float, ...]:
    if values is None:
        return (default,) * size
    out = tuple(expect_float(v, f"{name}[{i}]") for i, v in enumerate(values))
    if len(out) != size:
        raise InputError(f"{name}: has {len(out)} values, expected {size}")
    return out


@dataclass(frozen=True)
class IOMap:
    """How env observations become network inputs and network outputs become env actions.

    ``network_input = (obs - obs_offset) * obs_scale`` per observation element,
    ``action = clip(output * action_scale + action_offset, -1, 1)`` per action
    element. With ``blocks = k > 1`` (layout ``"shared_blocks"``) the
    observation is k equal blocks and the action k equal blocks: one network of
    ``obs_dim / k`` inputs and ``action_dim / k`` outputs drives every block,
    with its own recurrent state per block.

    Parameters
    ----------
    num_inputs, num_outputs : int
        The network's inputs and outputs.
    blocks : int
        1 (layout ``"flat"``) or the number of shared blocks.
    obs_offset, obs_scale : sequence of float, optional
        Length ``blocks * num_inputs``; default 0 and 1.
    action_scale, action_offset : sequence of float, optional
        Length ``blocks * num_outputs``; default 1 and 0.
    """

    num_inputs: int
    num_outputs: int
    blocks: int = 1
    obs_offset: Sequence[float] | None = None
    obs_scale: Sequence[float] | None = None
    action_scale: Sequence[float] | None = None
    action_offset: Sequence[float] | None = None
    _arrays: tuple[np.ndarray, ...] = field(init=False, repr=False, compare=False)
    _skip: tuple[bool, bool, bool] = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        for name in ("num_inputs", "num_outputs", "blocks"):
            v = getattr(self, name)
            if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < 1:
                raise InputError(f"{name}: {v!r} must be a whole number >= 1")
            object.__setattr__(self, name, int(v))
        obs_dim, act_dim = self.obs_dim, self.action_dim
        vectors = (_vector(self.obs_offset, obs_dim, 0.0, "obs_offset"),
                   _vector(self.obs_scale, obs_dim, 1.0, "obs_scale"),
                   _vector(self.action_scale, act_dim, 1.0, "action_scale"),
                   _vector(self.action_offset, act_dim, 0.0, "action_offset"))
        for name, v in zip(("obs_offset", "obs_scale", "action_scale", "action_offset"), vectors, strict=True):
            object.__setattr__(self, name, v)
        arrays = tuple(np.array(v, dtype=float) for v in vectors)
        object.__setattr__(self, "_arrays", arrays)
        # steps that change no value and can be skipped: x - (+0.0) and x * 1.0 are x for every float
        offset, scale, a_scale = arrays[0], arrays[1], arrays[2]
        object.__setattr__(self, "_skip", (bool(np.all(offset == 0.0) and not np.signbit(offset).any()),
                                           bool(np.all(scale == 1.0)), bool(np.all(a_scale == 1.0))))

    @property
    def layout(self) -> str:
        """``"flat"`` (one network sees the whole observation) or ``"shared_blocks"``."""
        return "flat" if self.blocks == 1 else "shared_blocks"

    @property
    def obs_dim(self) -> int:
        return self.blocks * self.num_inputs

    @property
    def action_dim(self) -> int:
        return self.blocks * self.num_outputs

    def network_inputs(self, obs: np.ndarray) -> np.ndarray:
        """Network inputs (..., R * blocks, num_inputs) for observations (..., R, obs_dim)."""
        obs = np.asarray(obs, dtype=float)
        if obs.ndim < 2 or obs.shape[-1] != self.obs_dim:
            raise ValueError(f"observations of shape {obs.shape}: expected (..., B, {self.obs_dim})")
        offset, scale = self._arrays[0], self._arrays[1]
        skip_offset, skip_scale = self._skip[0], self._skip[1]
        # on 2-D rows numpy broadcasts a short last axis far faster than on 3-D
        x = obs.reshape(-1, self.obs_dim)
        if not skip_offset:
            x = x - offset
            if not skip_scale:
                x *= scale
        else:
            x = x.copy() if skip_scale else x * scale
        return x.reshape(*obs.shape[:-2], obs.shape[-2] * self.blocks, self.num_inputs)

    def actions(self, outputs: np.ndarray) -> np.ndarray:
        """Env actions (..., R, action_dim) in [-1, 1] for network outputs (..., R * blocks, num_outputs)."""
        out = np.asarray(outputs, dtype=float)
        if out.ndim < 2 or out.shape[-1] != self.num_outputs or out.shape[-2] % self.blocks:
            raise ValueError(f"outputs of shape {out.shape}: expected (..., B * {self.blocks}, {self.num_outputs})")
        shape = (*out.shape[:-2], out.shape[-2] // self.blocks, self.action_dim)
        return self._action_rows(out.reshape(-1, self.action_dim)).reshape(shape)

    def _action_rows(self, out: np.ndarray) -> np.ndarray:
        # on 2-D rows (R, action_dim) numpy broadcasts a short last axis far faster than on 3-D
        if self._skip[2]:
            a = out + self._arrays[3]
        else:
            a = out * self._arrays[2]
            a += self._arrays[3]
        np.maximum(a, -1.0, out=a)  # np.clip, at half its call overhead (same values, NaN kept)
        return np.minimum(a, 1.0, out=a)


class PopulationPolicy:
    """G networks acting on env observations: the rollout engine's batch policy.

    Parameters
    ----------
    network : PopulationNetwork
        The stacked networks (one per policy).
    io : IOMap
        The observation and action mapping shared by all of them.
    """

    #: :meth:`act` returns a new array within [-1, 1] on every call (the rollout skips its own clip)
    clips_actions = True

    def __init__(self, network: PopulationNetwork, io: IOMap):
        if (network.num_inputs, network.num_outputs) != (io.num_inputs, io.num_outputs):
            raise ValueError(f"networks map {network.num_inputs} -> {network.num_outputs} values, the io map "
                             f"{io.num_inputs} -> {io.num_outputs}")
        self.network = network
        self.io = io
        self.n_policies = network.num_genomes

    def reset(self, batch_size: int) -> None:
        """Clear recurrent state for ``batch_size`` scenarios per policy."""
        self.network.reset(batch_size * self.io.blocks)

    def select(self, keep: np.ndarray) -> PopulationPolicy | None:
        """The policies ``keep`` (indices) alone, or None where state would be lost (recurrent)."""
        if self.network.recurrent:
            return None
        return PopulationPolicy(self.network.subset(keep), self.io)

    def act(self, obs: np.ndarray) -> np.ndarray:
        """Env actions (G * B, action_dim) for observations (G * B, obs_dim), policy-major rows."""
        obs = np.asarray(obs, dtype=float)
        g = self.n_policies
        if obs.ndim != 2 or obs.shape[0] % g:
            raise ValueError(f"observations of shape {obs.shape}: expected ({g} * B, {self.io.obs_dim})")
        obs = obs.reshape(g, obs.shape[0] // g, obs.shape[1])
        io, net = self.io, self.network
        if io.blocks == 1 and io._skip[0] and io._skip[1] and obs.shape[2] == io.obs_dim:
            x = obs  # identity inputs: the network copies them into its own values, no copy needed here
        else:
            x = io.network_inputs(obs)
        # a rollout steps one batch size: the network's checks are then skipped
        y = net.advance(x) if net.batch_size == x.shape[1] and x.shape[2] == net.num_inputs else net.activate(x)
        return io._action_rows(y.reshape(-1, io.action_dim))


def content_hash(document: Mapping[str, Any]) -> str:
    """SHA-256 (hex) of the canonical JSON of ``document`` without its hash entry."""
    return sha256_hex(canonical_json({k: v for k, v in document.items() if k != HASH_KEY}))


def _plain(value: Any, where: str) -> Any:
    """``value`` as JSON data (numpy scalars and arrays, tuples accepted); non-finite floats refused."""
    if isinstance(value, np.ndarray):
        value = value.tolist()
    elif isinstance(value, np.generic):
        value = value.item()
    if value is None or isinstance(value, (bool, str)):
        return value
    if isinstance(value, int):
        return int(value)
    if isinstance(value, float):
        return expect_float(value, where)
    if isinstance(value, Mapping):
        out = {}
        for k, v in value.items():
            if not isinstance(k, str):
                raise InputError(f"{where}: key {k!r} is not a string")
            out[k] = _plain(v, f"{where}.{k}")
        return out
    if isinstance(value, (list, tuple)):
        return [_plain(v, f"{where}[{i}]") for i, v in enumerate(value)]
    raise InputError(f"{where}: {type(value).__name__} cannot be stored in a policy file")


def policy_to_dict(genome: Any, neat_config: Any, *, env_id: str, env_options: Mapping[str, Any] | None = None,
                   env_params: Mapping[str, float] | None = None, io: IOMap | None = None,
                   training: Mapping[str, Any] | None = None) -> dict[str, Any]:
    """The policy-file document of a neat-python genome.

    Parameters
    ----------
    genome : neat.DefaultGenome
    neat_config : neat.Config or neat.genome.DefaultGenomeConfig
    env_id : str
        The gymnasium id the controller was trained on.
    env_options : mapping, optional
        The env's constructor options (e.g. ``{"poles": 2}``).
    env_params : mapping of str to float, optional
        The physical parameters it was trained with.
    io : IOMap, optional
        Observation and action mapping; default: identity inputs, outputs
        clipped to [-1, 1].
    training : mapping, optional
        Free-form summary of deterministic values (seed, generations,
        fitness, ...). No clock times, paths or host facts: they would make
        identical runs give different files.

    Returns
    -------
    dict
        JSON-ready document including its content hash.
    """
    topology = genome_topology(genome, neat_config)
    n_in, n_out = len(topology["inputs"]), len(topology["outputs"])
    io = IOMap(n_in, n_out) if io is None else io
    if (io.num_inputs, io.num_outputs) != (n_in, n_out):
        raise InputError(f"io map is for {io.num_inputs} -> {io.num_outputs} networks, "
                         f"the genome has {n_in} -> {n_out}")
    doc: dict[str, Any] = {
        "schema": SCHEMA,
        "schema_version": SCHEMA_VERSION,
        "env": {"id": expect(env_id, str, "env_id", "a string"),
                "options": _plain(dict(env_options or {}), "env_options"),
                "params": {expect(k, str, "env_params", "string keys"): expect_float(v, f"env_params.{k}")
                           for k, v in (env_params or {}).items()}},
        "network": topology,
        "layout": {"kind": io.layout, "blocks": io.blocks},
        "observation": {"offset": list(io.obs_offset), "scale": list(io.obs_scale)},
        "action": {"scale": list(io.action_scale), "offset": list(io.action_offset)},
        "training": _plain(dict(training or {}), "training"),
    }
    doc[HASH_KEY] = content_hash(doc)
    Policy.from_dict(doc)  # refuse now what load_policy would refuse later
    return doc


class Policy:
    """A controller from a policy file: env observations (B, obs_dim) -> env actions (B, action_dim).

    Build one with :meth:`from_dict`, :func:`load_policy` or
    :func:`policy_from_genome`; it needs no neat-python objects.

    Attributes
    ----------
    env_id : str
    env_options : dict
    env_params : dict of str to float
    training : dict
    io : IOMap
    network : Network
        The raw network (network inputs -> raw outputs).
    topology : dict
        The ``network`` entry of the file (as :func:`pretrial.report.plots.plot_network` reads it).
    content_hash : str
    n_policies : int
        Always 1 (so a policy is also a batch policy for the rollout engine).
    """

    n_policies = 1

    def __init__(self, document: Mapping[str, Any], network: Network, io: IOMap):
        self._doc = copy.deepcopy(dict(document))
        env = self._doc["env"]
        self.env_id: str = env["id"]
        self.env_options: dict[str, Any] = env["options"]
        self.env_params: dict[str, float] = {k: float(v) for k, v in env["params"].items()}
        self.training: dict[str, Any] = self._doc["training"]
        self.topology: dict[str, Any] = self._doc["network"]
        self.content_hash: str = self._doc[HASH_KEY]
        self.network = network
        self.io = io

    @property
    def feed_forward(self) -> bool:
        return self.network.feed_forward

    @classmethod
    def from_dict(cls, document: Any, source: str = "policy") -> Policy:
        """Check a policy document and build the policy.

        Raises
        ------
        FileFormatError
            One line starting with ``source``, saying what is wrong.
        """
        try:
            return cls._checked(document)
        except PretrialError as exc:
            raise FileFormatError(f"{source}: {exc.message}") from None
        except RecursionError:
            raise FileFormatError(f"{source}: nested too deeply to be a policy file") from None

    @classmethod
    def _checked(cls, doc: Any) -> Policy:
        if not isinstance(doc, dict):
            raise InputError(f"not a policy file (top level is {type(doc).__name__}, expected an object)")
        if doc.get("schema") != SCHEMA:
            raise InputError(f"not a pretrial policy file (no \"schema\": \"{SCHEMA}\" entry)")
        version = doc.get("schema_version")
        if version != SCHEMA_VERSION or not isinstance(version, int) or isinstance(version, bool):
            raise InputError(f"schema version {version!r} is not supported (this pretrial reads {SCHEMA_VERSION})")
        stored = doc.get(HASH_KEY)
        if not isinstance(stored, str):
            raise InputError(f"missing content hash {HASH_KEY!r}")
        try:
            actual = content_hash(doc)
        except (TypeError, ValueError, RecursionError) as exc:
            raise InputError(f"content is not JSON data ({exc})") from None
        if actual != stored:
            raise InputError(f"content hash mismatch (file says {stored[:16]}..., content gives {actual[:16]}...): "
                             "the file was edited or damaged")
        missing = [k for k in _TOP_KEYS if k not in doc]
        if missing:
            raise InputError(f"missing entry {missing[0]!r}")
        extra = sorted(set(doc) - set(_TOP_KEYS))
        if extra:
            raise InputError(f"unknown entry {extra[0]!r}")
        env = expect_keys(doc["env"], "env", ("id", "options", "params"))
        if not expect(env["id"], str, "env.id", "a string"):
            raise InputError("env.id: is empty")
        expect(env["options"], dict, "env.options", "an object")
        for k, v in expect(env["params"], dict, "env.params", "an object").items():
            expect_float(v, f"env.params.{k}")
        expect(doc["training"], dict, "training", "an object")
        spec = spec_from_topology(doc["network"], "network")
        layout = expect_keys(doc["layout"], "layout", ("kind", "blocks"))
        kind = expect(layout["kind"], str, "layout.kind", "a layout name")
        if kind not in _LAYOUTS:
            raise InputError(f"layout.kind: {kind!r} is not one of {', '.join(_LAYOUTS)}")
        blocks = expect_int(layout["blocks"], "layout.blocks")
        if blocks < 1 or (kind == "flat") != (blocks == 1):
            raise InputError(f"layout.blocks: {blocks} does not fit layout {kind!r} (flat: 1, shared_blocks: >= 2)")
        vectors = {}
        for section, names, size in (("observation", ("offset", "scale"), blocks * spec.num_inputs),
                                     ("action", ("scale", "offset"), blocks * spec.num_outputs)):
            entry = expect_keys(doc[section], section, names)
            for name in names:
                where = f"{section}.{name}"
                values = expect(entry[name], list, where, "a list of numbers")
                if len(values) != size:
                    raise InputError(f"{where}: has {len(values)} values, expected {size}")
                vectors[where] = [expect_float(v, f"{where}[{i}]") for i, v in enumerate(values)]
        io = IOMap(spec.num_inputs, spec.num_outputs, blocks, vectors["observation.offset"],
                   vectors["observation.scale"], vectors["action.scale"], vectors["action.offset"])
        return cls(doc, Network(spec), io)

    def to_dict(self) -> dict[str, Any]:
        """The policy document (a copy), content hash included."""
        return copy.deepcopy(self._doc)

    def reset(self, batch_size: int) -> None:
        """Clear recurrent state for ``batch_size`` scenarios."""
        self.network.reset(batch_size * self.io.blocks)

    def act(self, obs: np.ndarray) -> np.ndarray:
        """Env actions (B, action_dim) in [-1, 1] for env observations (B, obs_dim)."""
        obs = np.asarray(obs, dtype=float)
        if obs.ndim != 2:
            raise ValueError(f"observations of shape {obs.shape}: expected (B, {self.io.obs_dim})")
        return self.io.actions(self.network.activate(self.io.network_inputs(obs)))


def policy_from_genome(genome: Any, neat_config: Any, **kwargs: Any) -> Policy:
    """A :class:`Policy` straight from a genome (keyword arguments as :func:`policy_to_dict`)."""
    return Policy.from_dict(policy_to_dict(genome, neat_config, **kwargs))


def stack_policies(policies: Sequence[Policy]) -> PopulationPolicy:
    """One batch policy of several policies that share an observation/action mapping."""
    if not policies:
        raise ValueError("stack_policies needs at least one policy")
    io = policies[0].io
    for p in policies[1:]:
        if p.io != io:
            raise InputError("policies map observations and actions differently; they cannot be stacked")
    return PopulationPolicy(PopulationNetwork([p.network.spec for p in policies]), io)


def save_policy(path: str | os.PathLike[str], policy: Policy | Mapping[str, Any]) -> Policy:
    """Write a policy file atomically (temporary file in the same directory, then rename).

    Parameters
    ----------
    path : path-like
    policy : Policy or mapping
        A policy, or a document from :func:`policy_to_dict`; it is checked
        (hash included) before anything is written.

    Returns
    -------
    Policy
        The policy as written.
    """
    doc = policy.to_dict() if isinstance(policy, Policy) else policy
    checked = Policy.from_dict(doc, str(path))
    atomic_write_text(path, _pretty(checked.to_dict()) + "\n")
    return checked


def _pretty(value: Any, indent: str = "") -> str:
    """JSON for people: sorted keys, short objects and lists of numbers on one line (one node per line)."""
    flat = json.dumps(value, sort_keys=True, allow_nan=False, separators=(", ", ": "))
    nested = isinstance(value, (dict, list)) and any(isinstance(v, (dict, list)) for v in
                                                     (value.values() if isinstance(value, dict) else value))
    if not isinstance(value, (dict, list)) or (len(indent) + len(flat) <= 118 and not nested) or not value:
        return flat
    inner = indent + "  "
    if isinstance(value, dict):
        items = [f"{inner}{json.dumps(k)}: {_pretty(value[k], inner)}" for k in sorted(value)]
        return "{\n" + ",\n".join(items) + "\n" + indent + "}"
    return "[\n" + ",\n".join(inner + _pretty(v, inner) for v in value) + "\n" + indent + "]"


class _Refused(ValueError):
    """A JSON construct a policy file may not contain."""


def _no_duplicates(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for k, v in pairs:
        if k in out:
            raise _Refused(f"key {k!r} appears twice in one object")
        out[k] = v
    return out


def _finite_float(text: str) -> float:
    value = float(text)
    if value in (float("inf"), float("-inf")):
        raise _Refused(f"number {text[:30]} is out of range")
    return value


def _no_constant(text: str) -> Any:
    raise _Refused(f"{text} is not a number a policy file may hold")


def load_policy(path: str | os.PathLike[str]) -> Policy:
    """Read a policy file.

    Raises
    ------
    FileFormatError
        One line naming the file and what is wrong: missing, a directory,
        unreadable, empty, not UTF-8 text, not JSON (e.g. truncated), another
        kind of file or schema version, edited (content hash mismatch), or a
        missing or malformed entry.
    """
    p = Path(path)
    name = str(p)
    if p.is_dir():
        raise FileFormatError(f"{name}: is a directory, not a policy file")
    try:
        with open(p, "rb") as f:
            data = f.read(_MAX_BYTES + 1)
    except FileNotFoundError:
        raise FileFormatError(f"{name}: no such file") from None
    except OSError as exc:
        raise FileFormatError(f"{name}: cannot read ({exc.strerror or exc})") from None
    if len(data) > _MAX_BYTES:
        raise FileFormatError(f"{name}: larger than {_MAX_BYTES // 2**20} MiB, not a policy file")
    if not data.strip():
        raise FileFormatError(f"{name}: is empty")
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise FileFormatError(f"{name}: not UTF-8 text (byte {exc.start}); damaged or not a policy file") from None
    try:
        doc = json.loads(text, object_pairs_hook=_no_duplicates, parse_float=_finite_float,
                         parse_constant=_no_constant)
    except json.JSONDecodeError as exc:
        raise FileFormatError(f"{name}: not valid JSON at line {exc.lineno} column {exc.colno} ({exc.msg}); "
                              "truncated or damaged") from None
    except _Refused as exc:
        raise FileFormatError(f"{name}: {exc}") from None
    except (ValueError, RecursionError) as exc:  # e.g. an integer of thousands of digits, absurd nesting
        raise FileFormatError(f"{name}: not a usable JSON document ({type(exc).__name__}: {exc})") from None
    return Policy.from_dict(doc, name)


#: the file a run directory keeps its champion in
CHAMPION_FILE = "champion.json"


def open_policy(path: str | os.PathLike[str]) -> Policy:
    """A policy from a policy file or a run directory (its ``champion.json``).

    Raises
    ------
    FileFormatError
        As :func:`load_policy`; for a directory without a champion, says so.
    """
    p = Path(path)
    if p.is_dir():
        champion = p / CHAMPION_FILE
        if not champion.is_file():
            raise FileFormatError(f"{p}: is a directory without a {CHAMPION_FILE} (not a finished run directory)")
        return load_policy(champion)
    return load_policy(p)
