"""A population of feed-forward neat-python genomes compiled in one pass of array operations.

Compiling genome by genome (:func:`pretrial.controller.network._spec_lists`) costs
about 15 us per genome in Python: as much as a whole rollout step when one
episode per genome is evaluated. Here the genomes' nodes and enabled connections
are read into flat arrays once, and the checks, the nodes required for the
outputs (``neat.graphs.required_for_output``), the levels (longest path from the
inputs, as ``neat.graphs.feed_forward_layers`` places nodes), the evaluation order
(level, then key) and every connection's input position (connection order) are
found for all genomes together. The arrays are those the per-genome path builds,
value for value; the tests compare the two on mutated populations.

Anything the fast path does not handle, or any genome the per-genome path would
refuse (an unknown activation, a dangling or repeated connection, a cycle), makes
:func:`population_arrays` return None: the caller then compiles genome by genome,
which names the problem.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from itertools import chain, repeat
from operator import attrgetter
from typing import Any

import numpy as np

_BIAS, _RESPONSE, _ACTIVATION, _AGGREGATION = (attrgetter(a) for a in ("bias", "response", "activation",
                                                                      "aggregation"))
_ENABLED, _KEY, _WEIGHT = attrgetter("enabled"), attrgetter("key"), attrgetter("weight")

def population_arrays(genomes: Sequence[Any], input_keys: Sequence[int], output_keys: Sequence[int],
                      act_code: Mapping[str, int], agg_code: Mapping[str, int]
                      ) -> tuple[np.ndarray, np.ndarray, dict[str, np.ndarray]] | None:
    """Per-genome node and edge counts and the concatenated :class:`~pretrial.controller.network.NetworkSpec`
    arrays (by field name, as :class:`~pretrial.controller.network.NetworkStack` holds them), or None.

    Parameters
    ----------
    genomes : sequence of neat-python genomes
        Feed-forward genomes (``nodes``: bias, response, activation, aggregation;
        ``connections``: key, weight, enabled).
    input_keys, output_keys : sequence of int
        The genome config's pins, in network order.
    act_code, agg_code : mapping of str to int
        Activation and aggregation name -> code.

    Returns
    -------
    (node_counts, edge_counts, arrays) or None
        None where the per-genome path must decide (see the module's docstring).
    """
    ins, outs = [int(k) for k in input_keys], [int(k) for k in output_keys]
    if len(set(ins)) != len(ins) or len(set(outs)) != len(outs) or not genomes:
        return None
    n_in, n_out, g = len(ins), len(outs), len(genomes)
    # --- the genomes' genes read into flat arrays (C-level iteration: map, attrgetter, fromiter)
    try:
        node_maps = [genome.nodes for genome in genomes]
        conn_maps = [genome.connections for genome in genomes]
        nodes = list(chain.from_iterable(m.values() for m in node_maps))
        conns = list(chain.from_iterable(m.values() for m in conn_maps))
        n_nodes, n_conns = len(nodes), len(conns)
        node_key = np.fromiter(chain.from_iterable(node_maps), np.int64, n_nodes)
        node_bias = np.fromiter(map(_BIAS, nodes), float, n_nodes)
        node_resp = np.fromiter(map(_RESPONSE, nodes), float, n_nodes)
        node_act = np.fromiter(map(act_code.get, map(_ACTIVATION, nodes), repeat(-1)), np.int64, n_nodes)
        node_agg = np.fromiter(map(agg_code.get, map(_AGGREGATION, nodes), repeat(-1)), np.int64, n_nodes)
        enabled = np.fromiter(map(_ENABLED, conns), bool, n_conns)
        pair = np.fromiter(chain.from_iterable(map(_KEY, conns)), np.int64, 2 * n_conns).reshape(n_conns, 2)
        weight = np.fromiter(map(_WEIGHT, conns), float, n_conns)
        conn_count = np.fromiter(map(len, conn_maps), np.int64, g)
    except (TypeError, ValueError, AttributeError, OverflowError):
        return None  # not plain numbers and names: the per-genome path says what is wrong
    n_count = np.fromiter(map(len, node_maps), np.int64, g)
    edge_genome = np.repeat(np.arange(g), conn_count)
    if not enabled.all():
        pair, weight, edge_genome = pair[enabled], weight[enabled], edge_genome[enabled]
    if node_act.size and (node_act.min() < 0 or node_agg.min() < 0):
        return None
    node_genome = np.repeat(np.arange(g), n_count)
    src, dst = pair[:, 0], pair[:, 1]
    pins = np.array(ins, dtype=np.int64)
    everything = np.concatenate([node_key, pair.ravel(), pins, np.array(outs, dtype=np.int64)])
    lo, hi = int(everything.min()), int(everything.max())
    span = hi - lo + 1
    if g * span * span >= 2**62 or span > 2**20:
        return None  # keys too far apart for one combined integer (or a pin table)
    is_pin = np.zeros(span, dtype=bool)
    is_pin[pins - lo] = True
    if is_pin[node_key - lo].any():
        return None  # a key both a pin and a node
    from_pin = is_pin[src - lo]
    # --- lookups by (genome, key), one combined integer per pair; one search for every lookup
    node_id = node_genome * span + (node_key - lo)
    by_id = np.argsort(node_id, kind="stable")
    sorted_id = node_id[by_id]
    n_edges = len(src)
    want = np.concatenate([edge_genome * span + (dst - lo), edge_genome * span + (src - lo),
                           np.repeat(np.arange(g) * span, n_out) + np.tile(np.array(outs, dtype=np.int64) - lo, g)])
    if not len(sorted_id):
        return None
    at = np.minimum(np.searchsorted(sorted_id, want), len(sorted_id) - 1)
    row = np.where(sorted_id[at] == want, by_id[at], -1)
    dst_node, src_node, out_node = row[:n_edges], row[n_edges : 2 * n_edges], row[2 * n_edges :]
    src_node[from_pin] = -1
    if (out_node < 0).any():
        return None  # an output without its node
    if (dst_node < 0).any() or (~from_pin & (src_node < 0)).any():
        return None  # a connection to or from nowhere
    pair_id = np.sort(want[n_edges : 2 * n_edges] * span + (dst - lo))
    if n_edges and (pair_id[1:] == pair_id[:-1]).any():
        return None  # a connection repeated
    # --- nodes required for the outputs: walk back from the outputs along enabled connections
    required = np.zeros(n_nodes, dtype=bool)
    required[out_node] = True
    inner = ~from_pin
    while True:
        reach = src_node[inner & required[dst_node]]
        if required[reach].all():
            break
        required[reach] = True
    # --- levels: longest path from the inputs; a DAG of n nodes settles within n rounds
    link = inner & required[dst_node]
    s, d = src_node[link], dst_node[link]
    level = np.ones(n_nodes, dtype=np.int64)
    for _ in range(int(n_count.max()) + 1):
        new = level.copy()
        np.maximum.at(new, d, level[s] + 1)
        if np.array_equal(new, level):
            break
        level = new
    else:
        return None  # a cycle: the per-genome path leaves its nodes out, as the library does
    # --- evaluation order per genome: level, then key
    keep = required.nonzero()[0]
    order = keep[np.lexsort((node_key[keep], level[keep], node_genome[keep]))]
    counts = np.bincount(node_genome[order], minlength=g)
    first = np.concatenate([[0], np.cumsum(counts)[:-1]])
    local = np.full(n_nodes, -1, dtype=np.int64)
    local[order] = np.arange(len(order)) - first[node_genome[order]]
    # --- edges into required nodes, by destination in evaluation order, then connection order
    used = required[dst_node].nonzero()[0]
    e_order = used[np.lexsort((used, local[dst_node[used]], edge_genome[used]))]
    e_node = local[dst_node[e_order]]
    e_gen = edge_genome[e_order]
    starts = np.ones(len(e_order), dtype=bool)
    if len(e_order):
        starts[1:] = (e_node[1:] != e_node[:-1]) | (e_gen[1:] != e_gen[:-1])
    run_start = np.maximum.accumulate(np.where(starts, np.arange(len(e_order)), 0))
    e_pos = np.arange(len(e_order)) - run_start
    pin_sort = np.argsort(pins, kind="stable")
    e_src_key = src[e_order]
    pin_pos = pin_sort[np.minimum(np.searchsorted(pins[pin_sort], e_src_key), n_in - 1)] if n_in else e_src_key * 0
    e_src = np.where(from_pin[e_order], pin_pos, n_in + local[src_node[e_order]])
    arrays = {
        "node_keys": node_key[order], "level": level[order], "bias": node_bias[order],
        "response": node_resp[order], "activation": node_act[order], "aggregation": node_agg[order],
        "edge_node": e_node, "edge_position": e_pos, "edge_source": e_src, "edge_weight": weight[e_order],
        "output_source": n_in + local[out_node],
    }
    return counts.astype(np.int64), np.bincount(e_gen, minlength=g).astype(np.int64), arrays
