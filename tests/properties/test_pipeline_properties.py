"""Property tests of the word-level stages over random small lexicons and models."""

from __future__ import annotations

import random

import pynini
import pywrapfst
from hypothesis import given, settings
from hypothesis import strategies as st
from wordgraph_helpers import lexicon_for, normalized_bigram, to_log

from netbuild.options import BuildOptions
from netbuild.pipeline import (compose_stage, determinize_stage, minimize_stage,
                               num_arcs, push_stage)

_PHONES = ["a", "e", "k", "t", "s"]
_WORDS = ["w1", "w2", "w3", "w4", "w5"]
_OPTS = BuildOptions(determinize_max_memory=1024**3, determinize_timeout=60)


@st.composite
def small_case(draw):
    """A lexicon (homophones and prefixes occur often) and a normalized bigram model."""
    n = draw(st.integers(1, 4))
    words = _WORDS[:n]
    pron = st.lists(st.sampled_from(_PHONES), min_size=1, max_size=3).map(" ".join)
    prons = [(w, draw(pron)) for w in words]
    extra = draw(st.lists(st.tuples(st.sampled_from(words), pron), max_size=2))
    seed = draw(st.integers(0, 10**6))
    silence = draw(st.booleans())
    lex = lexicon_for(prons + extra, words, silence=silence)
    grammar = normalized_bigram(words, random.Random(seed), followers=draw(st.integers(1, 3)))
    return lex, grammar


def _encoded_equivalent(a: pynini.Fst, b: pynini.Fst) -> bool:
    mapper = pynini.EncodeMapper("standard", True, True)
    return pynini.equivalent(pynini.encode(a, mapper), pynini.encode(b, mapper),
                             delta=1e-3)


@settings(max_examples=25)
@given(small_case())
def test_determinize_and_minimize_keep_language_and_weights(case):
    lex, grammar = case
    lg = compose_stage(lex.fst, grammar.fst)
    det = determinize_stage(lg, _OPTS, lfst=lex.fst, gfst=grammar.fst)
    assert det.properties(pywrapfst.I_DETERMINISTIC, True) == pywrapfst.I_DETERMINISTIC
    # reference: OpenFst randequivalent (fst/randequivalent.h), log semiring; L∘G keeps
    # its markers, so each (input, output) pair has one path and the tropical
    # determinization keeps the log-semiring sums too.
    assert pynini.randequivalent(to_log(lg), to_log(det), npath=60, seed=5, delta=1e-2)
    mini = minimize_stage(det)
    # Encoded minimization moves no label, so the two are equivalent as acceptors of
    # (input, output, weight) triples: OpenFst's exact test applies.
    # reference: OpenFst equivalent (fst/equivalent.h)
    assert _encoded_equivalent(det, mini)
    again = minimize_stage(mini)
    assert (again.num_states(), num_arcs(again)) == (mini.num_states(), num_arcs(mini))
    assert _encoded_equivalent(mini, again)
    # Transducer minimization pushes labels first (it may add a state for the pushed
    # residue), so only its language and weights are compared.
    tmini = minimize_stage(det, "transducer")
    assert pynini.randequivalent(to_log(det), to_log(tmini), npath=60, seed=6, delta=1e-2)


@settings(max_examples=40)
@given(small_case())
def test_push_preserves_log_weights(case):
    lex, grammar = case
    det = pynini.determinize(compose_stage(lex.fst, grammar.fst))
    details: dict = {}
    pushed = push_stage(det, details)
    # reference: OpenFst randequivalent, log semiring (pushing reweights with a
    # potential, so every complete path keeps its weight)
    assert pynini.randequivalent(to_log(det), to_log(pushed), npath=60, seed=9,
                                 delta=1e-2)
    assert (pushed.num_states(), num_arcs(pushed)) == (det.num_states(), num_arcs(det))
    assert details["semiring"] in ("log", "tropical")
