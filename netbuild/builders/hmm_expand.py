"""H∘C∘L∘G built directly: every model arc of C∘L∘G replaced by its chain of arc kinds.

- `ModelChains`: H read back as one chain of arc kinds per model, indexed by model id.
- `model_chains(hfst)`: the chains of an H of `netbuild.builders.hmm.build_hmm`'s shape,
  or None for any other FST.
- `expand_models(clg, chains)`: H∘CLG from CLG (an FST or its arrays), or None when a
  label of CLG is not one H reads: `expand_arrays`, then `expanded_fst`.
- `expand_arrays(arrays, chains)`: the arrays of H∘CLG from CLG's, in bulk.
- `expanded_fst(arrays, connected)`: the FST of those arrays, trimmed if need be.
- `trie_arrays(arrays, chains, pair_labels, quantum)`: a model-level graph expanded
  into per-state tries of kind chains, equal trie nodes merged (expand-hmm).
- `pair_labels(arrays, second)`: arcs that write two words relabelled with pair
  labels, which `trie_arrays` writes as two.

Why composition with H is a substitution. H (see `netbuild.builders.hmm`) has one hub,
state 0, which is its start and only final state; model ``m`` with ``n`` emitting
states is a chain of ``n`` arcs from state 0 back to state 0 whose first arc reads
``kind(s1)`` and writes ``m`` and whose others read ``kind(s2) .. kind(sn)`` and write
epsilon; each auxiliary marker has a ``marker:marker`` loop at state 0. All weights
are 0. In OpenFst's composition H∘CLG (as `pynini.compose` runs it, with its default
epsilon filter; tests/builders/test_hmm_expand.py compares the two machines) a state
is a pair (H state, CLG state), and:

- From (0, q), a CLG arc ``q --m:w/c--> q'`` meets H's first arc of m: the arc
  ``(0, q) --kind(s1):w/c--> (h1(m), q')`` (output label and weight on the first arc,
  where H writes m). With ``n == 1`` it ends at (0, q').
- At (h_i(m), q') H has only its output-epsilon arc and is not final, so the filter
  lets H move alone and blocks CLG's input-epsilon arcs there:
  ``(h_i, q') --kind(s_{i+1}):ε/0--> (h_{i+1}, q')``, the last one to (0, q'). These
  intermediate states are (m, position, q'): one chain per distinct (model,
  destination), shared by every CLG arc with that model and destination.
- A marker arc ``q --x:w/c--> q'`` meets H's loop: ``(0, q) --x':w/c--> (0, q')``, with
  ``x'`` the marker's id in H's input table.
- A CLG arc with epsilon input moves CLG alone (H's state 0 has no output epsilon):
  ``(0, q) --ε:w/c--> (0, q')``. C∘L∘G has such arcs: C's warm-up arcs read nothing
  while it waits for the right context (on the demo, 63 of 72,334 arcs).
- (0, q) is final with CLG's final weight of q; the start state is (0, start).

Here (0, q) keeps CLG's id q and the chain states follow, pair by pair. The arcs of
each state are sorted by input label, as the composition stage leaves them.

Trimming. If CLG is connected (every state accessible and coaccessible) and every
label is expandable, the result is connected too: each (0, q) lies on the image of a
successful path through q, and each chain lies between the images of its arc's ends.
`expand_models` therefore trims only when CLG is not known to be connected and the
result then turns out not to be (OpenFst's connect, as ``compose(..., connect=True)``).
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pynini
import pywrapfst

from ..bulk import (combine_hash, distinct_inverse, hash_classes, stable_order, sum_by_owner,
                    unique_sorted, weight_keys)
from ..io.fstfile import FstArrays, arrays_to_fst, fst_to_arrays, share_arrays
from ..symbols import is_auxiliary

__all__ = ["ModelChains", "expand_arrays", "expand_models", "expanded_fst", "model_chains",
           "pair_labels", "trie_arrays"]

_CONNECTED = pywrapfst.ACCESSIBLE | pywrapfst.COACCESSIBLE


@dataclasses.dataclass(frozen=True)
class ModelChains:
    """H as kind chains, indexed by H's output labels (model ids, CLG's input labels).

    For a model id ``m``: ``length[m]`` states (0: ``m`` is not a model), their kinds
    ``kinds[offset[m] : offset[m] + length[m]]``. `hub_label[m]` is the input label of
    the arc that leaves H's hub writing ``m``: the model's first kind, or for a marker
    its id in H's input table (0: ``m`` is neither). `isymbols` is H's input table (the
    kinds and the markers), the input table of H∘CLG.
    """

    length: np.ndarray  # (labels,) int64
    offset: np.ndarray  # (labels,) int64
    kinds: np.ndarray  # (sum of lengths,) int32
    hub_label: np.ndarray  # (labels,) int32
    isymbols: pynini.SymbolTable

    @property
    def num_labels(self) -> int:
        return int(self.length.shape[0])


def model_chains(hfst: pynini.Fst) -> ModelChains | None:
    """Returns H's kind chains, or None when `hfst` does not have `build_hmm`'s shape.

    The shape (module docstring) is checked in bulk: start state 0, the only final
    state with weight 0, all arc weights 0, no input epsilon; at state 0 one first arc
    per model (output label a model, not a marker) and a ``marker:marker`` loop per
    marker (the same auxiliary symbol in both tables); every other state entered once
    and left once, by an arc with output epsilon; every chain returns to state 0.
    """
    isyms, osyms = hfst.input_symbols(), hfst.output_symbols()
    if isyms is None or osyms is None or hfst.start() != 0:
        return None
    a = fst_to_arrays(hfst)
    ns = a.num_states
    finals = a.final_weights
    if finals[0] != 0.0 or np.isfinite(finals[1:]).any() or (a.weight != 0.0).any() \
            or (a.ilabel == 0).any():
        return None
    num_labels = max(int(a.olabel.max(initial=0)) + 1, 1)
    aux_out = np.zeros(num_labels, dtype=bool)
    # (one test per symbol of the model table, not per arc)
    aux_out_ids = [k for k, s in osyms if k < num_labels and is_auxiliary(s)]
    aux_out[aux_out_ids] = True
    at_hub = a.src == 0
    olab = a.olabel.astype(np.int64)
    loops = at_hub & aux_out[olab]
    firsts = at_hub & ~loops & (olab > 0)
    if not (loops | firsts)[at_hub].all():
        return None  # an arc leaving the hub that writes epsilon
    # Marker loops: back to the hub, the same auxiliary name on both sides.
    if (a.dst[loops] != 0).any():
        return None
    loop_in, loop_out = a.ilabel[loops], olab[loops]
    if unique_sorted(loop_out).shape[0] != loop_out.shape[0]:
        return None
    # (a comparison per marker, not per arc: H has one loop per marker)
    if not all(isyms.find(i) == osyms.find(o)
               for i, o in zip(loop_in.tolist(), loop_out.tolist())):
        return None
    hub_label = np.zeros(num_labels, dtype=np.int32)
    hub_label[loop_out] = loop_in
    # Chain states: one arc out (writing epsilon), one arc in.
    inner = ~at_hub
    out_degree = np.bincount(a.src, minlength=ns)
    in_degree = np.bincount(a.dst[a.dst != 0], minlength=ns)
    if ns > 1 and ((out_degree[1:] != 1).any() or (in_degree[1:] != 1).any()):
        return None
    if (a.olabel[inner] != 0).any():
        return None
    next_state = np.zeros(ns, dtype=np.int64)
    next_kind = np.zeros(ns, dtype=np.int32)
    next_state[a.src[inner]] = a.dst[inner]
    next_kind[a.src[inner]] = a.ilabel[inner]
    models = olab[firsts]
    if unique_sorted(models).shape[0] != models.shape[0]:
        return None
    # Walk every chain at once, one position per pass (passes = the longest model).
    cur = a.dst[firsts].astype(np.int64)
    columns = [a.ilabel[firsts]]
    lengths = np.ones(models.shape[0], dtype=np.int64)
    active = cur != 0
    while active.any():
        columns.append(np.where(active, next_kind[cur], 0))
        lengths += active
        cur = np.where(active, next_state[cur], 0)
        active = cur != 0
    if int(lengths.sum()) - models.shape[0] != ns - 1:
        return None  # a cycle of chain states that no model enters
    table = np.stack(columns, axis=1)  # (models, longest), 0 past each chain's end
    keep = np.arange(table.shape[1])[None, :] < lengths[:, None]
    length = np.zeros(num_labels, dtype=np.int64)
    offset = np.zeros(num_labels, dtype=np.int64)
    length[models] = lengths
    offset[models] = np.cumsum(lengths) - lengths
    hub_label[models] = table[:, 0]
    return ModelChains(length, offset, table[keep].astype(np.int32), hub_label,
                       isyms.copy())


def expand_models(clg: pynini.Fst | FstArrays, chains: ModelChains) -> pynini.Fst | None:
    """Constructively builds H∘CLG by substituting each model arc with its kind chain.

    The same machine as OpenFst's ``compose(H, clg, connect=True)`` up to state
    numbering and the order of arcs with equal input labels (module docstring):
    `expand_arrays`, then `expanded_fst`, trimming unless `clg` is an FST whose stored
    property bits say it is connected.

    Args:
      clg: C∘L∘G (models and markers in, words out), as an FST or its arrays.
      chains: from `model_chains` (H's input table becomes the result's).

    Returns:
      A new FST (see `expanded_fst`), or None when some input label of `clg` is
      neither epsilon nor a model or marker of `chains` (compose with H instead).
    """
    connected = isinstance(clg, (pynini.Fst, pywrapfst.Fst)) \
        and clg.properties(_CONNECTED, False) == _CONNECTED
    out = expand_arrays(clg if isinstance(clg, FstArrays) else fst_to_arrays(clg), chains)
    return None if out is None else expanded_fst(out, connected)


def expand_arrays(a: FstArrays, chains: ModelChains) -> FstArrays | None:
    """Returns the arrays of H∘CLG for CLG's arrays `a` (arcs grouped by state, in
    state order, as `fst_to_arrays` gives them), in bulk; no loop over arcs or states.

    Input labels of `a` must be epsilon, models of `chains` or markers of `chains`; the
    output labels and the (tropical or log) weights are kept on each chain's first arc.
    The result's states are CLG's, then the chain states pair by pair; its arcs are
    grouped by state in state order and sorted by input label within each state (CLG's
    order among equal labels). None when some input label is not one H reads.
    """
    q = a.num_states
    il = a.ilabel
    inside = il < chains.num_labels
    lab = np.where(inside, il, 0).astype(np.int64)
    new_il = chains.hub_label[lab]
    if not ((il == 0) | (new_il > 0)).all():
        return None
    n = chains.length[lab]
    del inside

    # One chain per distinct (model, destination) among the arcs of models of 2+ states.
    long = np.flatnonzero(n >= 2)
    pair_key, pair_of = distinct_inverse(lab[long] << 32 | a.dst[long].astype(np.int64))
    pair_model = pair_key >> 32
    pair_dst = pair_key & 0xFFFFFFFF
    inner = chains.length[pair_model] - 1  # chain states (and chain arcs) of each pair
    base = q + np.cumsum(inner) - inner  # each pair's first chain state
    num_inner = int(inner.sum())
    del pair_key

    # The arcs of CLG's states: first arcs of chains, markers, epsilon arcs.
    dst = a.dst.astype(np.int32, copy=True)
    dst[long] = base[pair_of]
    del long, pair_of, lab, n
    # sorted by (state, new input label); CLG's order among equal labels
    arc_order = np.argsort(a.src.astype(np.int64) << 32 | new_il.astype(np.int64),
                           kind="stable")
    # The chain arcs: chain state Q + j has exactly one arc, j in pair-major order.
    owner = np.repeat(np.arange(inner.shape[0]), inner)
    position = np.arange(num_inner) - np.repeat(base - q, inner) + 1  # 1 .. n - 1
    chain_il = chains.kinds[chains.offset[pair_model[owner]] + position]
    chain_src = np.arange(q, q + num_inner, dtype=np.int64)
    chain_dst = chain_src + 1
    last = position == inner[owner]
    chain_dst[last] = pair_dst[owner[last]]
    del owner, position, last, pair_model, pair_dst, base, inner

    total = q + num_inner
    finals = np.full(total, np.inf, dtype=np.float32)
    finals[:q] = a.final_weights
    return FstArrays(
        num_states=total, start=a.start, final_weights=finals,
        src=np.concatenate([a.src[arc_order], chain_src.astype(np.int32)]),
        ilabel=np.concatenate([new_il[arc_order], chain_il]).astype(np.int32),
        olabel=np.concatenate([a.olabel[arc_order], np.zeros(num_inner, np.int32)]),
        weight=np.concatenate([a.weight[arc_order], np.zeros(num_inner, np.float32)]),
        dst=np.concatenate([dst[arc_order], chain_dst.astype(np.int32)]),
        isymbols=chains.isymbols, osymbols=a.osymbols, arc_type=a.arc_type)


def expanded_fst(arrays: FstArrays, connected: bool = False) -> pynini.Fst:
    """Constructively builds the FST of `expand_arrays`' result.

    With `connected` (CLG was connected, so the result is: module docstring) the FST
    is returned as built; otherwise it is tested and, if need be, trimmed with
    OpenFst's connect. Unless trimmed, `arrays` are registered as the FST's conversion
    inside a `netbuild.io.fstfile.shared_conversions` block (they become read-only).

    Returns:
      A new FST: kinds and markers in, CLG's output labels and table out.
    """
    a = arrays
    ofst = arrays_to_fst(a.num_states, a.start, a.final_weights, a.src, a.ilabel,
                         a.olabel, a.weight, a.dst, isymbols=a.isymbols,
                         osymbols=a.osymbols, arc_type=a.arc_type)  # type: ignore[arg-type]
    if not connected and a.num_states and \
            ofst.properties(_CONNECTED, True) != _CONNECTED:
        ofst.connect()  # renumbers: the arrays no longer describe it
        return ofst
    share_arrays(ofst, a)
    return ofst


# ------------------------------------------------------- expansion after determinization
#
# Determinizing H∘CLG over arc kinds is the same as determinizing CLG over models and
# then expanding each state's model arcs into a trie of their kind chains, provided
# the chains form a prefix code (no model's chain is a proper prefix of another's;
# models with equal chains are first made one label). Why: from a subset of the
# kind-level determinization that sits between models (a "junction"), reading a
# model's whole chain leads to exactly the subset that reading the model leads to
# over models, with the same residual weights and outputs; the states in between
# are the trie's nodes, one per distinct (junction, chain prefix). The trie places
# weights and outputs where that determinization places them: the arc into a node
# carries the smallest weight below it minus what the path already carries, and a
# word goes on the first arc below which every arc writes it. Minimizing at the model
# level first and merging equal trie nodes afterwards gives the kinds-level minimum
# for chains of one length: two junctions have the same expanded future exactly when
# their model-level futures agree, and a node can never equal a junction, since every
# path from a junction to a final state has a length that is a multiple of the chain
# length and no path from a node does. The model-level graph is about a third of the
# kind-level one, and OpenFst's determinization and minimization are the costly steps.


def code_classes(chains: ModelChains) -> np.ndarray | None:
    """Returns, per model id, the id of the first model with the same kind chain
    (itself for most; unchanged for labels that are not models), or None when some
    chain is a proper prefix of another, where a trie node would also be a chain's end.
    """
    rep = np.arange(chains.num_labels, dtype=np.int64)
    models = np.flatnonzero(chains.length > 0)
    if models.shape[0] == 0:
        return rep
    lengths = chains.length[models]
    longest = int(lengths.max())
    column = np.arange(longest)[None, :]
    padded = np.zeros((models.shape[0], longest), dtype=np.int64)  # kinds are >= 1
    inside = column < lengths[:, None]
    padded[inside] = chains.kinds[(chains.offset[models][:, None] + column)[inside]]
    order = np.lexsort(padded.T[::-1])  # rows in lexicographic order, 0 (end) first
    rows, lens, ids = padded[order], lengths[order], models[order]
    same = np.ones(rows.shape[0], dtype=bool)
    same[1:] = (rows[1:] == rows[:-1]).all(axis=1)
    same[0] = False
    group = np.cumsum(~same) - 1
    first = np.full(int(group[-1]) + 1, chains.num_labels, dtype=np.int64)
    np.minimum.at(first, group, ids)
    rep[ids] = first[group]
    # Sorted with 0 past each end, a chain sorts before its extensions, and everything
    # between them extends it too: neighbours suffice.
    distinct = np.flatnonzero(~same)
    u, v = distinct[:-1], distinct[1:]
    shorter = lens[u] < lens[v]
    agree = ((rows[u] == rows[v]) | (column >= lens[u][:, None])).all(axis=1)
    if (shorter & agree).any():
        return None
    return rep


def trie_arrays(a: FstArrays, chains: ModelChains,
                pair_labels: tuple[int, np.ndarray] | None = None,
                quantum: float = 0.0) -> FstArrays | None:
    """Returns the kinds-level graph of the model-level graph `a` (arcs grouped by
    state, model labels unique per state, markers already epsilon): each state's model
    arcs expanded into the trie of their kind chains, equal trie nodes merged.

    `pair_labels` ``(base, pairs)``: output labels ``base + i`` of `a` stand for the two
    labels ``pairs[i]`` written one after the other. Each of an arc's labels goes onto
    the first trie arc below which every chain writes it, the second at least one arc
    below the first; where a chain ends before its second label is written, a new
    state after its last arc writes it on an epsilon-input arc. `quantum`: trie nodes'
    weights count as equal when they round to the same multiple of it
    (`bulk.weight_keys`; 0: bit for bit).

    The chains must be a prefix code (`code_classes` is not None) and `a`'s equal-chain
    models one label. States 0 .. ``a.num_states - 1`` are `a`'s, then the trie nodes
    (then the states that write a second label); arcs are grouped by state and sorted
    by input label. None when `a` has a label that is neither epsilon nor a model of
    `chains`.
    """
    q = a.num_states
    il = a.ilabel
    lab = np.where(il < chains.num_labels, il, 0)
    n = chains.length[lab].astype(np.int32)
    if not ((il == 0) | (n > 0)).all():
        return None
    first_out, second_out = _two_labels(a.olabel, pair_labels)
    model = np.flatnonzero(n > 0)
    plain = np.flatnonzero(n == 0)  # epsilon arcs stay as they are
    # (int32 and float32 throughout: the 20k / 1M graph has 4.7M model arcs, and the
    # weights are float32 already; only the differences are taken in float64)
    m_start = chains.offset[lab[model]].astype(np.int32)  # where the arc's chain starts
    m_n = n[model]
    del lab, n
    m_weight = a.weight[model]
    m_out = first_out[model]
    m_out2 = second_out[model]
    parent = a.src[model].astype(np.int32)
    parent_weight = np.zeros(model.shape[0], dtype=np.float32)  # what the path carries
    written = np.zeros(model.shape[0], dtype=bool)  # its first word written above
    written2 = np.zeros(model.shape[0], dtype=bool)  # its second word written above
    # Per arc of `parts`, in order: the second word it still has to write (0: none).
    late: list[np.ndarray] = [second_out[plain]]
    # The arcs, collected column by column: source, input, output, weight, destination.
    parts: list[list[np.ndarray]] = [[a.src[plain]], [il[plain]], [first_out[plain]],
                                     [a.weight[plain]], [a.dst[plain]]]
    del plain
    depth_cuts = [q]
    next_id = q
    for j in range(int(m_n.max(initial=0))):
        going = np.flatnonzero(m_n > j)
        kind = np.zeros(model.shape[0], dtype=np.int32)
        kind[going] = chains.kinds[m_start[going] + j]
        leaf = going[m_n[going] == j + 1]
        out = np.where(~written[leaf], m_out[leaf], np.where(written2[leaf], 0,
                                                              m_out2[leaf]))
        late.append(np.where(written[leaf], 0, m_out2[leaf]))
        _append(parts, parent[leaf], kind[leaf], out,
                _difference(m_weight[leaf], parent_weight[leaf]), a.dst[model[leaf]])
        inner = going[m_n[going] > j + 1]
        del going, leaf, out
        if inner.shape[0] == 0:
            continue
        key = parent[inner].astype(np.int64) << 32 | kind[inner]
        del kind
        order = np.argsort(key, kind="stable")
        skey = key[order]
        del key
        starts = np.ones(skey.shape[0], dtype=bool)
        np.not_equal(skey[1:], skey[:-1], out=starts[1:])
        first = np.flatnonzero(starts)
        node_of = np.empty(inner.shape[0], dtype=np.int32)
        node_of[order] = np.cumsum(starts, dtype=np.int32) - 1
        members = inner[order]
        del order, starts
        lowest = np.minimum.reduceat(m_weight[members], first)
        out_min = np.minimum.reduceat(m_out[members], first)
        uniform = out_min == np.maximum.reduceat(m_out[members], first)
        out2_min = np.minimum.reduceat(m_out2[members], first)
        uniform2 = out2_min == np.maximum.reduceat(m_out2[members], first)
        above_weight = parent_weight[members[first]]
        above = written[members[first]]
        above2 = written2[members[first]]
        count = first.shape[0]
        node_key = skey[first]
        del skey, members, first
        # The first word where the chains below agree on it; the second where they
        # agree on it too and the first is on an arc above this one.
        writes2 = above & ~above2 & uniform2
        node_out = np.where(uniform & ~above, out_min, np.where(writes2, out2_min, 0))
        _append(parts, (node_key >> 32).astype(np.int32),
                (node_key & 0xFFFFFFFF).astype(np.int32), node_out.astype(np.int32),
                _difference(lowest, above_weight),
                np.arange(next_id, next_id + count, dtype=np.int32))
        late.append(np.zeros(count, dtype=np.int32))
        del node_key, node_out
        parent[inner] = next_id + node_of
        parent_weight[inner] = lowest[node_of]
        written[inner] = (uniform | above)[node_of]
        written2[inner] = (above2 | writes2)[node_of]
        del inner, node_of
        next_id += count
        depth_cuts.append(next_id)
    del parent, parent_weight, written, written2, m_start, m_n, m_weight, m_out, m_out2
    del model
    columns = []
    for i, dtype in enumerate((np.int32, np.int32, np.int32, np.float32, np.int32)):
        columns.append(np.concatenate(parts[i]).astype(dtype, copy=False))
        parts[i] = []  # (each column's pieces go as soon as it is joined)
    del parts
    second = np.concatenate(late).astype(np.int32)
    del late
    next_id = _second_word_states(columns, second, next_id, depth_cuts)
    return _merge_trie_nodes(q, next_id, depth_cuts, a, columns, chains, quantum)


def pair_labels(a: FstArrays, second: np.ndarray
                ) -> tuple[FstArrays, tuple[int, np.ndarray] | None]:
    """`a` with each arc that has a `second` output label (0: none) relabelled with a
    pair label, and the pairs ``(base, pairs)`` (None when no arc has one): label
    ``base + i`` writes ``pairs[i]`` (first label, second label), which `trie_arrays`
    writes as two. The output table, if any, is extended with a symbol ``"w1 w2"`` for
    each pair (no word has a space), so the graph's labels stay in its table."""
    has_pair = np.flatnonzero(second != 0)
    if has_pair.shape[0] == 0:
        return a, None
    table = a.osymbols
    base = max(int(a.olabel.max()), int(second.max()),
               table.available_key() - 1 if table is not None else 0) + 1
    both = np.stack([a.olabel[has_pair].astype(np.int64),
                     second[has_pair].astype(np.int64)], axis=1)
    pairs, inverse = np.unique(both, axis=0, return_inverse=True)
    olabel = a.olabel.copy()
    olabel[has_pair] = base + inverse.reshape(-1)
    if table is not None:
        table = table.copy()
        for i, (w1, w2) in enumerate(pairs.tolist()):
            table.add_symbol(f"{table.find(w1)} {table.find(w2)}", base + i)
    return dataclasses.replace(a, olabel=olabel, osymbols=table), (base, pairs)


def _two_labels(olabel: np.ndarray, pair_labels: tuple[int, np.ndarray] | None
                ) -> tuple[np.ndarray, np.ndarray]:
    """Each arc's first and second output label (0: none) from `olabel`, where labels
    ``base + i`` stand for ``pairs[i]``."""
    if pair_labels is None:
        return olabel, np.zeros(olabel.shape[0], dtype=np.int32)
    base, pairs = pair_labels
    is_pair = olabel >= base
    first = olabel.copy()
    second = np.zeros(olabel.shape[0], dtype=np.int32)
    pair = pairs[olabel[is_pair] - base]
    first[is_pair] = pair[:, 0]
    second[is_pair] = pair[:, 1]
    return first, second


def _second_word_states(columns: list[np.ndarray], second: np.ndarray, total: int,
                        depth_cuts: list[int]) -> int:
    """For each arc with a `second` word not yet written (arcs in `columns`' order):
    the arc goes to a new state instead, whose epsilon-input arc writes the word and
    goes on to the arc's old destination. The new states are the trie's deepest level
    (their arcs lead to junctions). Returns the new number of states."""
    rest = np.flatnonzero(second != 0)
    k = rest.shape[0]
    if k == 0:
        return total
    new_states = np.arange(total, total + k, dtype=np.int32)
    dst = columns[4]
    extra = (new_states, np.zeros(k, np.int32), second[rest], np.zeros(k, np.float32),
             dst[rest].copy())
    dst[rest] = new_states
    for i, column in enumerate(extra):
        columns[i] = np.concatenate([columns[i], column.astype(columns[i].dtype)])
    depth_cuts.append(total + k)
    return total + k


def _append(parts: list[list[np.ndarray]], *columns: np.ndarray) -> None:
    for part, column in zip(parts, columns):
        part.append(column)


def _difference(minuend: np.ndarray, subtrahend: np.ndarray) -> np.ndarray:
    """float32 of the float64 difference of two float32 arrays (one rounding)."""
    return (minuend.astype(np.float64) - subtrahend).astype(np.float32)


def _merge_trie_nodes(q: int, total: int, depth_cuts: list[int], a: FstArrays,
                      columns: list[np.ndarray], chains: ModelChains,
                      quantum: float = 0.0) -> FstArrays:
    """Merges trie nodes with equal futures, deepest first (a node's arcs lead one level
    deeper or to a junction), and returns the arrays grouped by state, sorted by label.
    Nodes of depth d are the ids ``depth_cuts[d - 1] .. depth_cuts[d] - 1``. `columns`
    holds the arcs' src, ilabel, olabel, weight and dst; it is emptied, so each column
    is freed here once used."""
    src, ilabel, olabel, weight, dst = columns
    columns.clear()
    cls = np.arange(total, dtype=np.int64)  # junctions keep their ids
    next_cls = q
    # (each depth's hash fields are made from its own arcs: for all arcs at once they
    # were 220 MB at 20k / 1M)
    for d in range(len(depth_cuts) - 1, 0, -1):
        lo, hi = depth_cuts[d - 1], depth_cuts[d]
        sel = np.flatnonzero((src >= lo) & (src < hi))
        owner = src[sel] - lo
        by_owner = stable_order(owner)
        sel, owner = sel[by_owner], owner[by_owner]
        del by_owner
        degree = np.bincount(owner, minlength=hi - lo)
        labels = ilabel[sel].astype(np.int64) << 32 | olabel[sel]  # one hashed field
        wbits = weight_keys(weight[sel], quantum)
        targets = cls[dst[sel]]
        signatures = []
        for seed in (21, 22):  # two independent 64-bit signatures per node
            arc_hash = combine_hash(labels, wbits, targets, seed=seed)
            signatures.append(combine_hash(sum_by_owner(arc_hash, owner, hi - lo)
                                           .view(np.int64), degree, seed=seed + 2))
            del arc_hash
        del labels, wbits, targets, sel, owner
        c = hash_classes(*signatures)
        cls[lo:hi] = next_cls + c
        next_cls += int(c.max(initial=-1)) + 1
    cls = cls.astype(np.int32)  # (class ids < total < 2**31)
    # The first node of each class keeps its arcs.
    by_class = stable_order(cls)
    first = np.ones(total, dtype=bool)
    ordered = cls[by_class]
    np.not_equal(ordered[1:], ordered[:-1], out=first[1:])
    rep = np.empty(next_cls, dtype=np.int32)
    rep[ordered[first]] = by_class[first]
    del by_class, first, ordered
    keep = np.flatnonzero(rep[cls[src]] == src)
    del rep
    new_src = cls[src[keep]]
    del src
    # arcs by (class, input label), stably: one packed sort
    shift = max(int(ilabel.max(initial=0)).bit_length(), 1)
    order = stable_order(new_src.astype(np.int64) << shift | ilabel[keep])
    keep = keep[order]
    new_src = new_src[order]
    del order
    finals = np.full(next_cls, np.inf, dtype=np.float32)
    finals[:q] = a.final_weights
    return FstArrays(
        num_states=next_cls, start=a.start, final_weights=finals,
        src=new_src, ilabel=ilabel[keep], olabel=olabel[keep], weight=weight[keep],
        dst=cls[dst[keep]],
        isymbols=chains.isymbols, osymbols=a.osymbols, arc_type=a.arc_type)
