"""The directly built det(L∘G) (netbuild.lextree) against OpenFst's own algorithms.

Random small lexicons (homophones, prefix pronunciations, several pronunciations per
word, pronunciation probabilities, optional silence with probability 0, 0.3 or 1) and
Witten-Bell models estimated from random sentences (orders 1 to 3) go through the tree
construction and through OpenFst's composition, determinization, minimization and
pushing; the results must agree.
"""

from __future__ import annotations

import random

import numpy as np
import pynini
import pywrapfst
from hypothesis import given, settings
from hypothesis import strategies as st
from wordgraph_helpers import to_log

from netbuild import lextree
from netbuild.reweight import push_arrays
from netbuild.builders.grammar import build_grammar
from netbuild.builders.lexicon import build_lexicon
from netbuild.io.lexicon import Lexicon, Pronunciation
from netbuild.io.phones import PhoneInventory
from netbuild.lm.estimate import estimate
from netbuild.options import LexiconOptions
from netbuild.pipeline import compose_stage, minimize_stage, num_arcs

_PHONES = ["a", "e", "k", "t", "s"]


@st.composite
def tree_case(draw):
    """(L, G, silence probability): a random lexicon and an estimated model over it."""
    n = draw(st.integers(1, 5))
    words = [f"w{i}" for i in range(n)]
    pron = st.lists(st.sampled_from(_PHONES), min_size=1, max_size=4)
    entries = []
    for w in words:
        for phones in draw(st.lists(pron, min_size=1, max_size=2, unique_by=tuple)):
            p = draw(st.sampled_from([1.0, 0.6, 0.25]))
            entries.append(Pronunciation(w, tuple(phones), p, len(entries) + 1))
    rng = random.Random(draw(st.integers(0, 10**6)))
    sentences = [[rng.choice(words) for _ in range(rng.randint(1, 4))]
                 for _ in range(draw(st.integers(1, 12)))]
    order = draw(st.integers(1, 3))
    silence = draw(st.sampled_from([0.0, 0.3, 1.0]))
    grammar = build_grammar(estimate(sentences, order))
    inventory = PhoneInventory(_PHONES + ["sil"], silence=["sil"])
    options = LexiconOptions(silence_probability=silence,
                             rescale_probabilities=draw(st.booleans()))
    lexicon = build_lexicon(Lexicon(entries, "lexicon.txt"), inventory,
                            grammar.word_symbols, options)
    return lexicon, grammar, silence


def _fst(arcs, lexicon, grammar) -> pynini.Fst:
    return lextree.tree_graph_fst(arcs, lexicon.phone_symbols, grammar.word_symbols)


def _tree(lexicon, grammar) -> tuple[lextree.TreeInputs, lextree.TreeGraph]:
    inputs, why = lextree.tree_inputs(lexicon, grammar)
    assert inputs is not None, why
    return inputs, lextree.build_tree_graph(inputs)


def _canonical(fst: pynini.Fst) -> pynini.Fst:
    """Tropical push toward the start, then encoded minimization: OpenFst's minimal
    deterministic form of a weighted transducer whose output labels stay put."""
    return minimize_stage(pynini.push(fst, push_weights=True, reweight_type="to_initial"))


@settings(max_examples=60, deadline=None)
@given(tree_case())
def test_tree_is_the_determinized_composition(case):
    lexicon, grammar, silence = case
    _, tree = _tree(lexicon, grammar)
    fst = _fst(tree.arcs, lexicon, grammar)
    want = pywrapfst.I_DETERMINISTIC | pywrapfst.ACCESSIBLE | pywrapfst.COACCESSIBLE
    assert fst.properties(want, True) == want
    composed = compose_stage(lexicon.fst, grammar.fst)
    # reference: OpenFst randequivalent (fst/randequivalent.h), log semiring: with the
    # markers every input string of L∘G has one path, so both agree on every sum.
    assert pynini.randequivalent(to_log(composed), to_log(fst), npath=80, seed=3,
                                 delta=1e-3)
    if silence == 0.0:
        # Without silence L∘G has no epsilon arc, and OpenFst's determinization and the
        # tree place words and weights alike: their canonical forms are the same machine.
        # reference: OpenFst determinize, push, minimize and isomorphic (fst/isomorphic.h)
        det = pynini.determinize(composed, det_type="functional")
        assert pynini.isomorphic(_canonical(det), _canonical(fst), delta=1e-4)


@settings(max_examples=60, deadline=None)
@given(tree_case())
def test_tree_minimization_and_push_match_openfst(case):
    lexicon, grammar, _ = case
    _, tree = _tree(lexicon, grammar)
    arcs, potentials = lextree.minimize_tree_graph(tree)
    mine = _fst(arcs, lexicon, grammar)
    # reference: OpenFst's minimization of the same encoded acceptor (fst/minimize.h);
    # minimal deterministic machines of one language are isomorphic.
    theirs = minimize_stage(_fst(tree.arcs, lexicon, grammar))
    assert (mine.num_states(), num_arcs(mine)) == (theirs.num_states(), num_arcs(theirs))
    assert pynini.isomorphic(mine, theirs)
    # reference: OpenFst shortestdistance(reverse=True), tropical semiring
    dist = np.array([float(w) for w in pynini.shortestdistance(mine, reverse=True)])
    dist = np.concatenate([dist, np.full(mine.num_states() - len(dist), np.inf)])
    finite = np.isfinite(dist)
    assert np.array_equal(finite, np.isfinite(potentials))
    assert np.allclose(dist[finite], potentials[finite], atol=1e-4)
    pushed = _fst(push_arrays(arcs, potentials), lexicon, grammar)
    # reference: OpenFst push (fst/push.h), tropical semiring, toward the start state
    ref = pynini.push(mine, push_weights=True, reweight_type="to_initial")
    if mine.properties(pywrapfst.INITIAL_ACYCLIC, True) == pywrapfst.INITIAL_ACYCLIC:
        assert pynini.isomorphic(ref, pushed, delta=1e-3)
    else:
        # OpenFst then adds a start state with an epsilon arc, netbuild one with copies
        # of the start state's arcs (to stay deterministic): same paths and weights.
        assert pushed.num_states() == mine.num_states() + 1
        assert pushed.properties(pywrapfst.I_DETERMINISTIC, True) == pywrapfst.I_DETERMINISTIC
        assert pynini.randequivalent(to_log(ref), to_log(pushed), npath=60, seed=4,
                                     delta=1e-3)


@settings(max_examples=40, deadline=None)
@given(tree_case())
def test_log_divergence_on_g_level_matches_the_graph(case):
    """The G-level test says "diverges" exactly when value iteration on the whole graph
    finds no finite total (the pipeline's own test, `pipeline.log_potentials`)."""
    from netbuild.pipeline import log_potentials

    lexicon, grammar, _ = case
    inputs, tree = _tree(lexicon, grammar)
    fst = _fst(tree.arcs, lexicon, grammar)
    assert lextree.log_total_diverges(inputs) == (log_potentials(fst) is None)
