"""The word-level graph built directly: det(L∘G) as one pronunciation tree per G state.

- `tree_inputs(lexicon, grammar)`: the arrays the construction needs, or the reason it
  does not apply (then the pipeline composes and determinizes with OpenFst).
- `build_tree_graph(inputs)`: the determinized L∘G (`TreeGraph`: arrays and structure).
- `minimize_tree_graph(tree)`: its minimal form as an encoded acceptor (labels and
  weights read as one label, as `pipeline.minimize_stage` does).
- `log_total_diverges(inputs)`: whether L∘G's log-semiring total is unbounded.

Why it works. G is deterministic on its input (one arc per word and state, the back-off
arc carrying its own marker), and with the disambiguation markers no pronunciation
string of L is a prefix of another. So every input string of L∘G has exactly one path,
and a deterministic machine with the same paths and weights is determinized L∘G. It is
built from G's arcs and the pronunciations alone, without composing:

- Boundary states: ``B(q)`` for each G state q (L between words), and, with optional
  silence, ``BS(q)`` for "a word has just ended in q; silence may follow" (the subset
  {(B, q), (S, q)} a determinization would build). ``BS(q)`` has the silence arc to
  ``B(q)`` (cost -ln s) and a copy of every arc of ``B(q)`` with -ln(1 - s) added
  (no silence), also on its final weight. The start state is ``BS(q0)`` (silence at the
  utterance start is optional too), or ``B(q0)`` without silence.
- Below each boundary state q, the trie of the strings (pronunciation + marker) of the
  words leaving q in G: the pairs (G arc, pronunciation of its word) are sorted by
  (q, string); the longest common prefix of neighbours says where a new trie node
  starts. The last label of a string goes to the boundary state of the arc's G
  destination (``BS(q')``, or ``B(q')`` without silence). As in OpenFst's
  determinization, the word is written on the first arc below which only that word
  remains, and the weights are pushed as far toward the root as the tree allows (each
  arc carries the cheapest string cost below it minus the one above it).
- Back-off arcs ``B(q) --backoff--> B(b)`` keep G's weight; no back-off arc leaves a
  silence branch (as in L∘G, silence is read between words, before a back-off).
- States that no complete path uses are left out (reachability on G's level).

Minimization (encoded: the arc's labels and weight are one symbol). Boundary states are
partitioned by refining on G's level: B(q) and B(p) are equivalent exactly when their
finals, back-off arcs and word arcs (word, cost, class of destination) agree, which a
signature refinement finds (`_refine_boundary`); BS classes follow B's. Trie nodes are
then merged bottom-up by height (longest path to a boundary state): two nodes of the
same height are equivalent when their arcs (labels, weight, class of destination)
agree. Signatures are pairs of 64-bit hashes. The only equivalences this does not look
for are a trie node equivalent to a boundary state or nodes of different heights; both
need a boundary state whose language mimics a pronunciation tree, which a back-off G
does not produce (the tests compare with OpenFst's minimization).

Preconditions (checked by `tree_inputs`): L made by `build_lexicon` (its
`pronunciations` are known), strings unique and prefix-free, no pronunciation starting
with the optional-silence phone; G without input-epsilon arcs, deterministic, word arcs
reading and writing the same word.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pynini

from .bulk import (combine_hash, hash_classes, mix_hash, reachable, sum_by_owner,
                   unique_sorted, value_iteration, weight_bits)
from .builders.grammar import GrammarResult
from .builders.lexicon import LexiconResult, Pronunciations
from .errors import EmptyCompositionError
from .io.fstfile import FstArrays, arrays_to_fst, fst_to_arrays
from .refine import quotient
from .reweight import distances_to_final
from .symbols import BACKOFF

__all__ = ["TreeInputs", "TreeGraph", "tree_inputs", "build_tree_graph",
           "minimize_tree_graph", "log_total_diverges"]


@dataclasses.dataclass(frozen=True)
class WordPrefixes:
    """Each word's own pronunciation tree: one id per (word, proper prefix of one of
    its strings). `ids[i, c]` is the id of pronunciation i's first c + 1 labels
    (-1 past its last proper prefix); per id: its last label, depth (labels), parent
    id (-1 at depth 1), the cheapest pronunciation cost below it and the longest
    string below it."""

    ids: np.ndarray
    label: np.ndarray
    depth: np.ndarray
    parent: np.ndarray
    min_cost: np.ndarray
    longest: np.ndarray

    @property
    def count(self) -> int:
        return len(self.label)


@dataclasses.dataclass(frozen=True)
class TreeInputs:
    """G's arcs and L's strings, checked to meet the construction's preconditions."""

    grammar: FstArrays
    backoff_word: int  # G's input label on back-off arcs
    spelled: Pronunciations
    padded: np.ndarray  # (pronunciations, longest) labels, -1 after the end
    rank: np.ndarray  # lexicographic rank of each pronunciation string
    prefixes: WordPrefixes
    prons_per_word: np.ndarray  # by word label (G's labels and L's words alike)


@dataclasses.dataclass
class TreeGraph:
    """A deterministic word-level graph as arrays, with what minimization needs.

    States 0 .. `num_boundary` - 1 are boundary states (`boundary_state[i]` is the G
    state, `boundary_silence[i]` True for a BS state); the others are trie nodes with
    `height[i - num_boundary]` labels at most to the next boundary state.
    """

    arcs: FstArrays
    num_boundary: int
    boundary_state: np.ndarray
    boundary_silence: np.ndarray
    height: np.ndarray
    potentials: np.ndarray | None  # each state's tropical distance to the end
    inputs: TreeInputs
    pairs: int = 0  # (G arc, pronunciation) pairs spelled in the trees
    tree_nodes: int = 0  # nodes below which several words remain
    tail_nodes: int = 0  # nodes of shared word tails


def _padded(spelled: Pronunciations) -> np.ndarray:
    lengths = spelled.lengths
    longest = int(lengths.max()) if len(lengths) else 1
    out = np.full((len(lengths), longest), -1, dtype=np.int32)
    rows = np.repeat(np.arange(len(lengths)), lengths)
    cols = np.arange(int(lengths.sum())) - np.repeat(spelled.offsets, lengths)
    out[rows, cols] = spelled.labels
    return out


def _first_mismatch(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Per row, the first column where `a` and `b` differ (their width when equal)."""
    neq = a != b
    first = np.argmax(neq, axis=1)
    first[~neq.any(axis=1)] = a.shape[1]
    return first


def tree_inputs(lexicon: LexiconResult, grammar: GrammarResult) -> tuple[TreeInputs | None, str]:
    """Returns (inputs, "") when det(L∘G) can be built directly, else (None, reason)."""
    spelled = lexicon.pronunciations
    if spelled is None or not spelled.closure:
        return None, "the lexicon transducer was not made by build_lexicon"
    if len(spelled.lengths) == 0:
        return None, "the lexicon has no pronunciation"
    symbols = grammar.word_symbols if grammar.word_symbols is not None \
        else grammar.fst.output_symbols()
    backoff_word = symbols.find(BACKOFF) if symbols is not None else -1
    g = fst_to_arrays(grammar.fst)
    if g.start < 0:
        return None, "G has no start state"
    if np.any(g.ilabel == 0):
        return None, "G has input-epsilon arcs"
    words = g.ilabel != backoff_word
    if np.any(g.olabel[words] != g.ilabel[words]) or np.any(g.olabel[~words] != 0):
        return None, "G's word arcs do not read and write the same word"
    key = g.src.astype(np.int64) * (int(g.ilabel.max()) + 1) + g.ilabel
    if len(key) > 1 and not np.all(np.diff(np.sort(key)) > 0):
        return None, "G is not deterministic"
    padded = _padded(spelled)
    order = np.lexsort(padded.T[::-1])
    first = _first_mismatch(padded[order[1:]], padded[order[:-1]])
    shorter = np.minimum(spelled.lengths[order[1:]], spelled.lengths[order[:-1]])
    if np.any(first >= shorter):
        return None, "a pronunciation string is a prefix of another (no markers?)"
    if spelled.silence is not None and np.any(padded[:, 0] == spelled.silence):
        return None, "a pronunciation starts with the optional-silence phone"
    rank = np.empty(len(order), dtype=np.int64)
    rank[order] = np.arange(len(order))
    prefixes = _word_prefixes(spelled, padded, rank)
    per_word = np.bincount(spelled.words, minlength=int(max(g.ilabel.max(initial=0),
                                                            spelled.words.max()) + 1))
    return TreeInputs(g, int(backoff_word), spelled, padded, rank, prefixes, per_word), ""


def _word_prefixes(spelled: Pronunciations, padded: np.ndarray,
                   rank: np.ndarray) -> WordPrefixes:
    lengths = spelled.lengths
    order = np.argsort(spelled.words.astype(np.int64) * len(rank) + rank, kind="stable")
    lcp = np.zeros(len(order), dtype=np.int64)
    if len(order) > 1:
        same = spelled.words[order[1:]] == spelled.words[order[:-1]]
        lcp[1:] = np.where(same, _first_mismatch(padded[order[1:]], padded[order[:-1]]), 0)
    width = max(padded.shape[1] - 1, 1)
    ids = np.full((len(order), width), -1, dtype=np.int64)
    cur = np.full(len(order), -1, dtype=np.int64)
    label, depth, parent, min_cost, longest = [], [], [], [], []
    next_id = 0
    for c in range(padded.shape[1] - 1):
        rows = np.flatnonzero(lengths[order] > c + 1)
        if len(rows) == 0:
            break
        new = lcp[rows] <= c
        seg = np.flatnonzero(new)
        node = next_id + np.cumsum(new) - 1
        heads = order[rows[seg]]
        label.append(padded[heads, c])
        depth.append(np.full(len(seg), c + 1))
        parent.append(cur[rows[seg]])
        min_cost.append(np.minimum.reduceat(spelled.costs[order[rows]], seg))
        longest.append(np.maximum.reduceat(lengths[order[rows]], seg))
        ids[order[rows], c] = node
        cur[rows] = node
        next_id += len(seg)

    def cat(x, dtype):
        return np.concatenate(x).astype(dtype) if x else np.zeros(0, dtype=dtype)

    return WordPrefixes(ids, cat(label, np.int64), cat(depth, np.int64),
                        cat(parent, np.int64), cat(min_cost, np.float64),
                        cat(longest, np.int64))


# ------------------------------------------------------------------ reachability


def _coaccessible(n_nodes: int, ng: int, bo_src: np.ndarray, bo_dst: np.ndarray,
                  final: np.ndarray) -> np.ndarray | None:
    """All nodes, when every G state reaches a final state through back-off arcs alone
    (the usual case: back-off chains end in the final unigram state); else None."""
    nxt = np.arange(ng, dtype=np.int64)
    nxt[bo_src] = bo_dst
    ok = final.copy()
    for _ in range(64):  # pointer jumping: 2**64 steps cover any chain
        ok = ok | ok[nxt]
        jumped = nxt[nxt]
        if np.array_equal(jumped, nxt):
            break
        nxt = jumped
    ok = ok | ok[nxt]
    if not ok.all():
        return None
    return np.ones(n_nodes, dtype=bool)


# ------------------------------------------------------------------ construction


@dataclasses.dataclass(frozen=True)
class _Costs:
    silence: float  # -ln s
    no_silence: float  # -ln(1 - s); inf when s == 1


def _silence_costs(spelled: Pronunciations) -> _Costs | None:
    if spelled.silence is None:
        return None
    s = spelled.silence_probability
    return _Costs(-math.log(s), -math.log1p(-s) if s < 1.0 else math.inf)


def build_tree_graph(inputs: TreeInputs) -> TreeGraph:
    """Constructively builds det(L∘G) as arrays (see the module docstring).

    Raises:
        EmptyCompositionError: no complete path reads a word.
    """
    g, spelled = inputs.grammar, inputs.spelled
    ng = g.num_states
    sil = _silence_costs(spelled)
    branch = sil is not None  # BS states exist
    copies = branch and math.isfinite(sil.no_silence)  # BS copies B's arcs

    # G's back-off arcs and word arcs that have pronunciations.
    is_bo = g.ilabel == inputs.backoff_word
    bo_src, bo_dst = g.src[is_bo].astype(np.int64), g.dst[is_bo].astype(np.int64)
    bo_w = g.weight[is_bo].astype(np.float64)
    n_prons_of = inputs.prons_per_word
    word_arc = (~is_bo) & (n_prons_of[g.ilabel] > 0)
    w_src, w_word = g.src[word_arc].astype(np.int64), g.ilabel[word_arc].astype(np.int64)
    w_cost, w_dst = g.weight[word_arc].astype(np.float64), g.dst[word_arc].astype(np.int64)
    finals = g.final_weights.astype(np.float64)

    # Reachability on G's level: node q is B(q), node ng + q is BS(q).
    n_nodes = 2 * ng if branch else ng
    target = w_dst + ng if branch else w_dst  # where a word ends
    e_src, e_dst = [bo_src, w_src], [bo_dst, target]
    if branch:
        q_all = np.arange(ng, dtype=np.int64)
        e_src.append(q_all + ng)
        e_dst.append(q_all)  # silence
        if copies:
            e_src += [bo_src + ng, w_src + ng]
            e_dst += [bo_dst, target]
    e_src, e_dst = np.concatenate(e_src), np.concatenate(e_dst)
    start = g.start + ng if branch else g.start
    forward = reachable(n_nodes, e_src, e_dst, np.array([start]))
    is_final = np.zeros(n_nodes, dtype=bool)
    is_final[:ng] = np.isfinite(finals)
    if copies:
        is_final[ng:] = np.isfinite(finals)
    backward = _coaccessible(n_nodes, ng, bo_src, bo_dst, np.isfinite(finals))
    if backward is None:
        backward = reachable(n_nodes, e_dst, e_src, np.flatnonzero(is_final))
    keep = forward & backward
    if not keep[start]:
        raise _empty()
    # Each boundary state's distance to the end (tropical); the trees below add none
    # of their own, so these give every state's potential for the weight push.
    # A word's cheapest spelling: its G cost plus its cheapest pronunciation.
    cheapest = np.full(len(n_prons_of), np.inf)
    np.minimum.at(cheapest, spelled.words, spelled.costs)
    w_spell = w_cost + cheapest[w_word]
    # BS(q) costs min(-ln s, -ln(1 - s)) more than B(q) (silence, or B's arcs with the
    # cost of no silence), so the passes run on the B states alone.
    extra = min(sil.silence, sil.no_silence) if branch else 0.0
    dist_b = distances_to_final(ng, np.concatenate([bo_src, w_src]),
                                np.concatenate([bo_dst, w_dst]),
                                np.concatenate([bo_w, w_spell + extra]), finals)
    settled = dist_b is not None
    if not settled:  # a negative cycle: no potentials (the push stage falls back)
        dist_b = np.zeros(ng)
    dist = np.concatenate([dist_b, dist_b + extra]) if branch else dist_b
    bid = np.full(n_nodes, -1, dtype=np.int64)
    bid[keep] = np.arange(int(keep.sum()))
    nb = int(keep.sum())

    # Pairs (word arc, pronunciation) whose tree is entered and whose end is kept.
    root_b = np.where(keep[:ng], bid[:ng], -1)
    root_bs = np.where(keep[ng:], bid[ng:], -1) if copies else np.full(ng, -1, np.int64)
    entered = (root_b[w_src] >= 0) | (root_bs[w_src] >= 0)
    live = entered & keep[target]
    w_src, w_word, w_cost, target = w_src[live], w_word[live], w_cost[live], target[live]
    if len(w_src) == 0:
        raise _empty()
    shift = min(sil.silence, sil.no_silence) if branch and not np.any(target == start) \
        else 0.0
    by_word = np.argsort(spelled.words, kind="stable")
    word_first = np.zeros(len(n_prons_of) + 1, dtype=np.int64)
    np.cumsum(n_prons_of, out=word_first[1:])
    per_arc = n_prons_of[w_word]
    arc_of = np.repeat(np.arange(len(w_src)), per_arc)
    within = np.arange(int(per_arc.sum())) - np.repeat(np.cumsum(per_arc) - per_arc, per_arc)
    pron = by_word[word_first[w_word[arc_of]] + within]
    order = np.argsort(w_src[arc_of] * len(inputs.rank) + inputs.rank[pron], kind="stable")
    arc_of, pron = arc_of[order], pron[order]
    q = w_src[arc_of]
    cost = w_cost[arc_of] + spelled.costs[pron]
    word = w_word[arc_of]
    leaf_target = bid[target[arc_of]]
    strings = inputs.padded[pron]
    length = spelled.lengths[pron]
    n = len(pron)
    lcp = np.zeros(n, dtype=np.int64)
    if n > 1:
        same = q[1:] == q[:-1]
        lcp[1:] = np.where(same, _first_mismatch(strings[1:], strings[:-1]), 0)

    # The multi-word part of each tree, one depth at a time. The node "after c + 1
    # labels" of pair j exists for c + 1 < length[j]; it is new where the pair's common
    # prefix with its predecessor is at most c labels long. A node below which only one
    # word remains is not the tree's own: the rest of that word (its pronunciations
    # from there on, into the boundary state it ends in) is the same for every G state
    # with that word arc, so it is one shared "tail" (as in a determinization, whose
    # subsets there hold only chain states of that word and its G destination).
    wp = inputs.prefixes
    parts: list[tuple[np.ndarray, ...]] = []  # (src, ilabel, olabel, weight, dst)
    root_parts: list[tuple[np.ndarray, ...]] = []  # same, src is a G state (tree root)
    # Arcs whose source may be a root and whose target is a tree node, a tail (by key)
    # or an end state: (source node or -1, G state, ilabel, olabel, weight, kind, target).
    entries: list[tuple[np.ndarray, ...]] = []
    cur = np.full(n, -1, dtype=np.int64)  # deepest tree node so far per pair (-1: root)
    single_at = np.full(n, -1, dtype=np.int64)  # column where the pair's word is known
    node_min: list[np.ndarray] = []
    b_dist = dist[keep]  # per boundary state id
    end_dist = b_dist[leaf_target]
    node_dist: list[np.ndarray] = [b_dist]
    heights: list[np.ndarray] = []
    next_id = nb
    longest = int(length.max())
    for c in range(longest - 1):
        rows = np.flatnonzero((length > c + 1) & (single_at < 0))
        if len(rows) == 0:
            break
        new = lcp[rows] <= c
        seg = np.flatnonzero(new)
        mins = np.minimum.reduceat(cost[rows], seg)
        reach = np.minimum.reduceat(cost[rows] + end_dist[rows], seg)
        single = (np.minimum.reduceat(word[rows], seg) == np.maximum.reduceat(word[rows], seg))
        heads = rows[seg]
        parent = cur[heads]
        p_min = np.zeros(len(parent))
        inside = parent >= 0
        p_min[inside] = _gather(node_min, parent[inside] - nb)
        labels = strings[heads, c]
        # Segments whose word is known: an arc into the word's tail.
        one = single
        tail_key = leaf_target[heads[one]] * wp.count + wp.ids[pron[heads[one]], c]
        entries.append((parent[one], q[heads[one]], labels[one], word[heads[one]],
                        mins[one] - p_min[one], np.full(len(tail_key), _TAIL), tail_key))
        seg_of_row = np.cumsum(new) - 1
        single_at[rows[single[seg_of_row]]] = c
        # Segments still holding several words: tree nodes of their own.
        many = ~single
        ids = np.full(len(seg), -1, dtype=np.int64)
        ids[many] = next_id + np.arange(int(many.sum()))
        next_id += int(many.sum())
        entries.append((parent[many], q[heads[many]], labels[many],
                        np.zeros(int(many.sum()), dtype=np.int64), mins[many] - p_min[many],
                        np.full(int(many.sum()), _NODE), ids[many]))
        node_min.append(mins[many])
        node_dist.append(reach[many] - mins[many])
        heights.append(np.maximum.reduceat(length[rows], seg)[many] - (c + 1))
        moved = rows[~single[seg_of_row]]
        cur[moved] = ids[seg_of_row[~single[seg_of_row]]]
    n_tree = next_id - nb
    all_min = np.concatenate(node_min) if node_min else np.zeros(0)
    last = strings[np.arange(n), length - 1]

    # Leaves of pairs whose word stays open until their last label: in the tree.
    open_rows = single_at < 0
    src_node = cur[open_rows]
    p_min = np.zeros(len(src_node))
    p_min[src_node >= 0] = all_min[src_node[src_node >= 0] - nb]
    entries.append((src_node, q[open_rows], last[open_rows], word[open_rows],
                    cost[open_rows] - p_min, np.full(int(open_rows.sum()), _END),
                    leaf_target[open_rows]))

    # The tails: one node per (end boundary state, word prefix) some pair reaches.
    # Pairs with the same end, pronunciation and entry depth reach the same tail nodes:
    # take each such triple once (far fewer than pairs), then its tail nodes.
    done = np.flatnonzero(single_at >= 0)
    n_prons, width = len(spelled.lengths), int(longest)
    triples = unique_sorted((leaf_target[done] * n_prons + pron[done]) * width
                            + single_at[done])
    d_end = triples // (n_prons * width)
    d_pron = (triples // width) % n_prons
    d_col = triples % width
    span = spelled.lengths[d_pron] - 1 - d_col  # tail nodes below the entry
    e_of = np.repeat(np.arange(len(triples)), span)
    e_col = np.repeat(d_col, span) + (np.arange(int(span.sum()))
                                      - np.repeat(np.cumsum(span) - span, span))
    keys = unique_sorted(d_end[e_of] * wp.count + wp.ids[d_pron[e_of], e_col])
    tail_base = next_id
    t_end, t_wp = keys // wp.count, keys % wp.count
    has_parent = wp.parent[t_wp] >= 0
    parent_key = t_end * wp.count + np.maximum(wp.parent[t_wp], 0)
    found = np.searchsorted(keys, parent_key)
    found = np.minimum(found, len(keys) - 1)
    inner_tail = has_parent & (keys[found] == parent_key) if len(keys) else has_parent
    parts.append((tail_base + found[inner_tail], wp.label[t_wp[inner_tail]],
                  np.zeros(int(inner_tail.sum()), dtype=np.int64),
                  wp.min_cost[t_wp[inner_tail]] - wp.min_cost[wp.parent[t_wp[inner_tail]]],
                  tail_base + np.flatnonzero(inner_tail)))
    # A tail's leaves: the last label of each pronunciation, into the end state.
    leaf_pairs = unique_sorted(d_end * n_prons + d_pron)
    l_end, l_pron = leaf_pairs // len(spelled.lengths), leaf_pairs % len(spelled.lengths)
    l_wp = wp.ids[l_pron, spelled.lengths[l_pron] - 2]
    l_src = tail_base + np.searchsorted(keys, l_end * wp.count + l_wp)
    l_last = inputs.padded[l_pron, spelled.lengths[l_pron] - 1]
    parts.append((l_src, l_last, np.zeros(len(l_src), dtype=np.int64),
                  spelled.costs[l_pron] - wp.min_cost[l_wp], l_end))
    next_id = tail_base + len(keys)
    heights.append(wp.longest[t_wp] - wp.depth[t_wp])
    node_dist.append(b_dist[t_end])  # a tail's cheapest way out costs nothing extra

    # Arcs into tree nodes, tails and end states: from a tree node, or from a root.
    e_src, e_q, e_il, e_ol, e_w, e_kind, e_dst = (
        np.concatenate([np.asarray(x[i]) for x in entries]) for i in range(7))
    dst = e_dst.astype(np.int64).copy()
    is_tail = e_kind == _TAIL
    dst[is_tail] = tail_base + np.searchsorted(keys, e_dst[is_tail])
    from_node = e_src >= 0
    parts.append((e_src[from_node], e_il[from_node], e_ol[from_node], e_w[from_node],
                  dst[from_node]))
    at_root = ~from_node
    root_parts.append((e_q[at_root], e_il[at_root], e_ol[at_root], e_w[at_root],
                       dst[at_root]))

    # Boundary arcs: each tree root's arcs from B(q) and (no silence) from BS(q). As in
    # a determinization, the cheaper of silence / no silence is paid on the arc into
    # BS(q) and BS(q)'s own arcs carry only the difference (`shift`); the start state
    # BS(q0) then pays it on its own arcs (unless words also end in it: shift 0).
    r_q, r_il, r_ol, r_w, r_dst = (np.concatenate(x) for x in zip(*root_parts))
    for roots, extra in ((root_b, 0.0), (root_bs, sil.no_silence - shift if copies else 0.0)):
        src = roots[r_q]
        ok = src >= 0
        parts.append((src[ok], r_il[ok], r_ol[ok], r_w[ok] + extra, r_dst[ok]))
    bo_label = spelled.backoff_label
    for offset, extra in ((0, 0.0), (ng, sil.no_silence - shift if copies else None)):
        if extra is None or (offset and not copies):
            continue
        src, dst = bid[bo_src + offset], bid[bo_dst]
        ok = (src >= 0) & (dst >= 0)
        parts.append((src[ok], np.full(int(ok.sum()), bo_label), np.zeros(int(ok.sum())),
                      bo_w[ok] + extra, dst[ok]))
    if branch:
        src, dst = bid[ng:], bid[:ng]
        ok = (src >= 0) & (dst >= 0)
        parts.append((src[ok], np.full(int(ok.sum()), spelled.silence),
                      np.zeros(int(ok.sum())), np.full(int(ok.sum()), sil.silence - shift),
                      dst[ok]))

    num_states = next_id
    final = np.full(num_states, np.inf)
    final[bid[:ng][keep[:ng]]] = finals[keep[:ng]]
    if copies:
        final[bid[ng:][keep[ng:]]] = finals[keep[ng:]] + sil.no_silence - shift
    src, il, ol, w, dst = (np.concatenate([np.asarray(p[i]) for p in parts]) for i in range(5))
    if shift:
        is_bs = np.zeros(num_states, dtype=bool)
        is_bs[bid[ng:][keep[ng:]]] = True
        w = w.astype(np.float64) + np.where(is_bs[dst], shift, 0.0)
        first = bid[start]
        w[src == first] += shift
        final[first] += shift
    # (state, input label) is unique in a deterministic machine: one key sorts both.
    order = np.argsort(src.astype(np.int64) * (int(il.max(initial=0)) + 1) + il)
    arcs = FstArrays(num_states, int(bid[start]), final.astype(np.float32),
                     src[order].astype(np.int32), il[order].astype(np.int32),
                     ol[order].astype(np.int32), w[order].astype(np.float32),
                     dst[order].astype(np.int32))
    nodes = np.flatnonzero(keep)
    if shift:  # BS states' arcs carry `shift` less (the start state's do not)
        node_dist[0] = np.where((nodes >= ng) & (nodes != start), node_dist[0] - shift,
                                node_dist[0])
    return TreeGraph(arcs, nb, nodes % ng, nodes >= ng,
                     np.concatenate(heights).astype(np.int64),
                     np.concatenate(node_dist) if settled else None, inputs, n, n_tree,
                     len(keys))


_NODE, _TAIL, _END = 0, 1, 2  # what an entry arc leads to


def _gather(chunks: list[np.ndarray], idx: np.ndarray) -> np.ndarray:
    return np.concatenate(chunks)[idx] if chunks else np.zeros(0)


def _empty() -> EmptyCompositionError:
    return EmptyCompositionError(
        "compose-determinize", "L∘G has no path: no word of the lexicon occurs in the "
        "model (or no sentence of the model can be spelt with the lexicon)",
        "check that the lexicon and the language model use the same word spellings "
        "and that the model's words have pronunciations")


# ------------------------------------------------------------------ minimization

def _refine_boundary(tree: TreeGraph) -> np.ndarray:
    """Class of each boundary state (coarsest stable partition on G's level).

    A boundary state's signature: its class so far, its final weight, whether it is a
    silence branch, its arcs to other boundary states (back-off, silence, one-label
    words: label, weight, class of the destination) and the G word arcs its tree spells
    (word, cost, class of the boundary state the word ends in); the tree below it is a
    function of those. Refined until the number of classes stops growing.
    """
    a, nb, inputs = tree.arcs, tree.num_boundary, tree.inputs
    g, spelled = inputs.grammar, inputs.spelled
    ng = g.num_states
    sil = _silence_costs(spelled)
    branch = sil is not None
    copies = branch and math.isfinite(sil.no_silence)
    silence = tree.boundary_silence.astype(np.int64)
    index = np.full(2 * ng, -1, dtype=np.int64)  # B(q) at q, BS(q) at ng + q
    index[tree.boundary_state + ng * silence] = np.arange(nb)

    word_arc = (g.ilabel != inputs.backoff_word) & (inputs.prons_per_word[g.ilabel] > 0)
    gs, gd = g.src[word_arc].astype(np.int64), g.dst[word_arc].astype(np.int64)
    gw, gc = g.ilabel[word_arc].astype(np.int64), weight_bits(g.weight[word_arc])
    end = index[gd + (ng if branch else 0)]
    owners = [index[gs]] + ([index[gs + ng]] if copies else [])

    bb = (a.src < nb) & (a.dst < nb)
    b_src, b_dst = a.src[bb].astype(np.int64), a.dst[bb].astype(np.int64)
    b_base = [combine_hash(a.ilabel[bb], a.olabel[bb], weight_bits(a.weight[bb]),
                           seed=seed + 2)
              for seed in (1, 2)]
    w_base = [combine_hash(gw, gc, seed=seed) for seed in (1, 2)]
    spells = [(own, (own >= 0) & (end >= 0)) for own in owners]
    fbits = weight_bits(a.final_weights[:nb])
    cls = np.zeros(nb, dtype=np.int64)
    count = 1
    while True:
        totals = []
        for i, seed in enumerate((1, 2)):
            end_cls = cls[np.maximum(end, 0)]
            k = mix_hash(w_base[i] ^ mix_hash(end_cls.view(np.uint64), seed), seed)
            total = np.zeros(nb, dtype=np.uint64)
            for own, ok in spells:
                total += sum_by_owner(k[ok], own[ok], nb)
            kb = mix_hash(b_base[i] ^ mix_hash(cls[b_dst].view(np.uint64), seed + 2), seed + 2)
            total += sum_by_owner(kb, b_src, nb)
            totals.append(combine_hash(cls, fbits, silence, total.view(np.int64), seed=seed + 4))
        new = hash_classes(*totals)
        new_count = int(new.max(initial=-1)) + 1
        if new_count == count:
            return new
        cls, count = new, new_count


def minimize_tree_graph(tree: TreeGraph) -> tuple[FstArrays, np.ndarray | None]:
    """Constructively minimizes the deterministic `tree` as an encoded acceptor.

    Returns the minimal arcs and each of their states' potential (from the tree's;
    equivalent states have equal potentials), or None where the tree has none.
    """
    a, nb = tree.arcs, tree.num_boundary
    cls = np.full(a.num_states, -1, dtype=np.int64)
    cls[:nb] = _refine_boundary(tree)
    next_cls = int(cls[:nb].max(initial=-1)) + 1
    src = a.src.astype(np.int64)
    dst = a.dst.astype(np.int64)
    wbits = weight_bits(a.weight)
    arc_height = np.zeros(len(src), dtype=np.int64)
    inner = src >= nb
    arc_height[inner] = tree.height[src[inner] - nb]
    by_height = np.argsort(arc_height, kind="stable")
    cuts = np.searchsorted(arc_height[by_height], np.arange(1, int(tree.height.max(initial=0)) + 2))
    nodes_by_height = np.argsort(tree.height, kind="stable") + nb
    node_cuts = np.searchsorted(tree.height[nodes_by_height - nb],
                                np.arange(1, int(tree.height.max(initial=0)) + 2))
    # A node's place among the nodes of its height (one array for all heights).
    place = np.zeros(a.num_states, dtype=np.int64)
    place[nodes_by_height] = (np.arange(len(nodes_by_height))
                              - node_cuts[tree.height[nodes_by_height - nb] - 1])
    for h in range(1, len(cuts)):
        sel = by_height[cuts[h - 1]:cuts[h]]
        nodes = nodes_by_height[node_cuts[h - 1]:node_cuts[h]]
        if len(nodes) == 0:
            continue
        owner = place[src[sel]]
        degree = np.bincount(owner, minlength=len(nodes))
        signatures = []
        for seed in (11, 12):  # two independent 64-bit signatures per node
            arc_hash = combine_hash(a.ilabel[sel], a.olabel[sel], wbits[sel], cls[dst[sel]],
                                seed=seed)
            total = sum_by_owner(arc_hash, owner, len(nodes))
            signatures.append(combine_hash(total.view(np.int64), degree, seed=seed + 2))
        c = hash_classes(*signatures)
        cls[nodes] = next_cls + c
        next_cls += int(c.max()) + 1
    arcs, rep = quotient(a, cls)
    return arcs, None if tree.potentials is None else tree.potentials[rep]


def log_total_diverges(inputs: TreeInputs, max_iterations: int = 3000) -> bool:
    """True when the log-semiring total of L∘G is unbounded (computed on G's level).

    Every path between two boundary states spells one G arc's word with one of its
    pronunciations (probabilities P(w | h) * sum of the word's pronunciation
    probabilities) and the optional silence (probabilities s + (1 - s) = 1), so L∘G's
    total mass obeys the same linear system on G's states as the trees; see
    `bulk.value_iteration` for the iteration and its stopping rule.
    """
    g, spelled = inputs.grammar, inputs.spelled
    mass = np.bincount(spelled.words, weights=np.exp(-spelled.costs),
                       minlength=len(inputs.prons_per_word))
    is_bo = g.ilabel == inputs.backoff_word
    factor = np.where(is_bo, 1.0, mass[g.ilabel])
    prob = np.exp(-g.weight.astype(np.float64)) * factor
    final = np.exp(-g.final_weights.astype(np.float64))
    return value_iteration(g.src, g.dst, prob, final, g.num_states, max_iterations) is None


def tree_graph_fst(arcs: FstArrays, isymbols: pynini.SymbolTable | None,
                   osymbols: pynini.SymbolTable | None) -> pynini.Fst:
    """The FST of `arcs`, symbol tables attached."""
    return arrays_to_fst(arcs.num_states, arcs.start, arcs.final_weights, arcs.src,
                         arcs.ilabel, arcs.olabel, arcs.weight, arcs.dst, isymbols, osymbols)
