"""The model-level path's expansion (netbuild.builders.hmm_expand: `code_classes`,
`trie_arrays`) against OpenFst's determinization and minimization over arc kinds.

Reference: OpenFst's Determinize (fst/determinize.h, functional, epsilon taken as a
label) and the minimization of the encoded acceptor (fst/minimize.h, fst/encode.h),
applied to the plain substitution of each model arc by its chain (`expand_models`,
itself checked against OpenFst's composition in test_hmm_expand.py); compared with
OpenFst's Isomorphic and RandEquivalent. Weights are small integers, which float32
adds and subtracts exactly, so no rounding separates the two constructions.
"""

from __future__ import annotations

import itertools

import numpy as np
import pynini
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from fst_helpers import (connected_fst, fst_of_arrays, monophone_map,
                         openfst_encoded_minimum)

from netbuild.builders.hmm import build_hmm, make_model_symbols
from netbuild.builders.hmm_expand import (ModelChains, code_classes, expand_models,
                                          model_chains, pair_labels, trie_arrays)
from netbuild.io.context_map import HmmState
from netbuild.io.fstfile import arrays_to_fst, fst_to_arrays
from netbuild.refine import minimize_arrays
from netbuild.reweight import push_output_labels
from netbuild.symbols import make_symbol_table

PHONES = make_symbol_table("phones", ["a", "b"])
WORDS = make_symbol_table("words", ["w1", "w2", "w3"])
STATES = [HmmState(c, p, 1.0 - p) for c in range(3) for p in (0.5, 0.25)]


def _chains_of(tuples: list[tuple[int, ...]]) -> ModelChains:
    """ModelChains with model ids 1.. for the given kind tuples."""
    length = np.array([0] + [len(t) for t in tuples], dtype=np.int64)
    offset = np.concatenate([[0], np.cumsum(length)[:-1]]).astype(np.int64)
    kinds = np.array([k for t in tuples for k in t], dtype=np.int32)
    hub = np.array([0] + [t[0] for t in tuples], dtype=np.int32)
    return ModelChains(length, offset, kinds, hub, make_symbol_table("k", ["x"]))


@settings(max_examples=200)
@given(st.lists(st.lists(st.integers(1, 3), min_size=1, max_size=3).map(tuple),
                min_size=1, max_size=6))
def test_code_classes_against_brute_force(tuples):
    got = code_classes(_chains_of(tuples))
    # reference: the definition of a prefix code, pair by pair (plain Python)
    proper_prefix = any(len(u) < len(v) and v[:len(u)] == u
                        for u, v in itertools.permutations(tuples, 2))
    if proper_prefix:
        assert got is None
        return
    assert got is not None
    want = [0] + [1 + tuples.index(t) for t in tuples]
    assert got.tolist() == want


def _is_deterministic(fst: pynini.Fst) -> bool:
    return all(len({a.ilabel for a in fst.arcs(s)}) == fst.num_arcs(s)
               for s in fst.states())


@st.composite
def model_graphs(draw):
    """Random models (chains of one length or of mixed lengths, a prefix code) and a
    random connected FST over them, deterministic on its input (epsilon a label)."""
    uniform = draw(st.booleans())
    count = draw(st.integers(1, 4))
    if uniform:
        size = draw(st.integers(1, 3))
        lengths = [size] * count
    else:
        lengths = draw(st.lists(st.integers(1, 3), min_size=count, max_size=count))
    cmap = monophone_map({f"m{i}": [(s.emission_class, s.self_loop, s.forward)
                                    for s in draw(st.lists(st.sampled_from(STATES),
                                                           min_size=n, max_size=n))]
                          for i, n in enumerate(lengths)})
    models = make_model_symbols(cmap, PHONES)
    hfst, _ = build_hmm(cmap, models)
    chains = model_chains(hfst)
    classes = code_classes(chains)
    assume(classes is not None)
    labels = sorted({0} | {int(classes[models.find(f"m{i}")]) for i in range(count)})
    ns = draw(st.integers(1, 6))
    arcs = []
    for s in range(ns):
        for lab in draw(st.lists(st.sampled_from(labels), unique=True, max_size=4)):
            arcs.append((s, lab, draw(st.integers(0, 3)), float(draw(st.integers(0, 3))),
                         draw(st.integers(0, ns - 1))))
    finals = [draw(st.sampled_from([np.inf, 0.0, 1.0])) for _ in range(ns)]
    fst = connected_fst(ns, arcs, finals, isymbols=models, osymbols=WORDS)
    assume(fst.num_states() > 0)
    return fst, chains, uniform


@settings(max_examples=200, deadline=None)
@given(model_graphs())
def test_trie_is_the_kind_level_minimum(case):
    graph, chains, uniform = case
    substituted = expand_models(graph, chains)  # H∘graph, not determinized
    # reference: OpenFst Determinize then encoded Minimize over arc kinds
    want = openfst_encoded_minimum(pynini.determinize(substituted, det_type="functional"))
    got_arrays = trie_arrays(minimize_arrays(fst_to_arrays(graph)), chains)
    got = fst_of_arrays(got_arrays)
    assert _is_deterministic(got)
    # reference: OpenFst RandEquivalent (fst/randequivalent.h)
    assert pynini.randequivalent(got, substituted, npath=60, seed=2, max_length=30,
                                 delta=1e-4)
    if uniform:
        # reference: OpenFst Isomorphic (fst/isomorphic.h)
        assert pynini.isomorphic(got, want, delta=1e-6)
    else:
        # A trie node can then equal a junction, which only a kind-level pass merges.
        assert got.num_states() >= want.num_states()


def test_trie_shares_prefixes_and_places_weights_and_words_early():
    # m1 = (1, 2, 3) and m2 = (1, 2, 4): one node after kind 1, one after (1, 2).
    chains = _chains_of([(1, 2, 3), (1, 2, 4)])
    # state 0 --m1:w1/2--> 1 and 0 --m2:w1/3--> 1; state 1 final
    graph = arrays_to_fst(2, 0, np.array([np.inf, 0.0], dtype=np.float32),
                          np.array([0, 0], dtype=np.int32), np.array([1, 2], dtype=np.int32),
                          np.array([1, 1], dtype=np.int32),
                          np.array([2.0, 3.0], dtype=np.float32),
                          np.array([1, 1], dtype=np.int32))
    t = trie_arrays(fst_to_arrays(graph), chains)
    arcs = sorted(zip(t.src.tolist(), t.ilabel.tolist(), t.olabel.tolist(),
                      t.weight.tolist(), t.dst.tolist()))
    # The shared arcs carry the word (common to both) and the smaller weight; the
    # leaves carry what is left: 0 for m1, 1 for m2. (Nodes are numbered after the
    # graph's states, deepest first: 2 is the node after (1, 2), 3 the one after 1.)
    assert arcs == [(0, 1, 1, 2.0, 3), (2, 3, 0, 0.0, 1), (2, 4, 0, 1.0, 1),
                    (3, 2, 0, 0.0, 2)]


@st.composite
def pair_prone_graphs(draw):
    """`model_graphs` with a word written after some model arcs that write a word:
    the arc then goes to a new state whose one epsilon-input arc writes the second
    word (what a word written on its end marker looks like once markers are
    epsilon), so the push of output labels makes word pairs."""
    graph, chains, uniform = draw(model_graphs())
    a = fst_to_arrays(graph)
    chosen = [i for i in range(len(a.src))
              if a.ilabel[i] and a.olabel[i] and draw(st.booleans())]
    n = a.num_states
    arcs = list(zip(a.src.tolist(), a.ilabel.tolist(), a.olabel.tolist(),
                    a.weight.tolist(), a.dst.tolist()))
    for k, i in enumerate(chosen):
        s, il, ol, w, d = arcs[i]
        arcs[i] = (s, il, ol, w, n + k)
        arcs.append((n + k, 0, draw(st.integers(1, 3)), 0.0, d))
    finals = a.final_weights.tolist() + [np.inf] * len(chosen)
    fst = connected_fst(n + len(chosen), arcs, finals, isymbols=graph.input_symbols(),
                        osymbols=WORDS)
    return fst, chains, uniform


@settings(max_examples=300, deadline=None)
@given(st.one_of(model_graphs(), pair_prone_graphs()))
def test_trie_writes_word_pairs_as_two_words(case):
    """After the model-level push of output labels some arcs write two words (a pair
    label); the trie writes them as two and keeps H∘graph's relation."""
    graph, chains, _ = case
    pushed, pairs = pair_labels(*push_output_labels(fst_to_arrays(graph)))
    got_arrays = trie_arrays(minimize_arrays(pushed), chains, pairs)
    assert got_arrays.olabel.max(initial=0) < WORDS.available_key()  # no pair is left
    got = fst_of_arrays(got_arrays)
    # reference: OpenFst RandEquivalent (fst/randequivalent.h)
    assert pynini.randequivalent(got, expand_models(graph, chains), npath=60, seed=2,
                                 max_length=30, delta=1e-4)


def test_second_word_goes_one_arc_down_the_chain_or_onto_a_new_arc():
    # m1 = (1, 2, 3), m2 = (1, 2, 4), m3 = (5, 6).
    chains = _chains_of([(1, 2, 3), (1, 2, 4), (5, 6)])
    # 0 --m3:w1--> 1 --ε:w2--> 2 (final); 0 --m1:w1--> 3 --ε:w2--> 2;
    # 0 --m2:w3--> 2. After the push, m3 and m1 write the pair (w1, w2).
    graph = arrays_to_fst(
        4, 0, np.array([np.inf, np.inf, 0.0, np.inf], dtype=np.float32),
        np.array([0, 0, 0, 1, 3], np.int32), np.array([1, 2, 3, 0, 0], np.int32),
        np.array([1, 3, 1, 2, 2], np.int32), np.zeros(5, np.float32),
        np.array([3, 2, 1, 2, 2], np.int32), osymbols=WORDS)
    pushed, second = push_output_labels(fst_to_arrays(graph))
    assert np.count_nonzero(second) == 2
    pushed, pairs = pair_labels(pushed, second)
    t = trie_arrays(pushed, chains, pairs)
    arcs = list(zip(t.src.tolist(), t.ilabel.tolist(), t.olabel.tolist(), t.dst.tolist()))
    # m3's chain (5, 6) is alone below state 0: w1 on kind 5, w2 one arc down on 6.
    k5 = next(a for a in arcs if a[0] == 0 and a[1] == 5)
    assert k5[2] == 1
    assert next(a for a in arcs if a[0] == k5[3])[1:3] == (6, 2)
    # m1 shares (1, 2) with m2 (which writes w3), so its words come on its leaf (kind
    # 3): w1 there, then w2 on a new epsilon arc into state 3.
    k3 = next(a for a in arcs if a[1] == 3)
    assert k3[2] == 1
    assert [a[1:3] for a in arcs if a[0] == k3[3]] == [(0, 2)]
    # reference: OpenFst RandEquivalent (fst/randequivalent.h)
    assert pynini.randequivalent(fst_of_arrays(t), expand_models(graph, chains), npath=60,
                                 seed=2, max_length=30, delta=1e-4)
