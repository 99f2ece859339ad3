"""Unit tests of the per-stage checks (netbuild/checks.py)."""

from __future__ import annotations

import os

import pynini
import pytest
import pywrapfst
from hypothesis import given, settings
from hypothesis import strategies as st
from wordgraph_helpers import demo_case, lexicon_for, word_table

from netbuild import checks as chk
from netbuild.io.fstfile import fst_to_arrays, shared_conversions
from netbuild.errors import CheckFailed, EmptyCompositionError, InputCheckFailed
from netbuild.symbols import BACKOFF, make_symbol_table


def _fst(arcs, finals, start=0, n=None):
    f = pynini.Fst()
    n = n or 1 + max([max(a[0], a[3]) for a in arcs] + list(finals) + [start])
    f.add_states(n)
    f.set_start(start)
    for s, i, o, d in arcs:
        f.add_arc(s, pynini.Arc(i, o, 0.5, d))
    for s in finals:
        f.set_final(s)
    return f


def test_nonempty_passes_and_fails_per_stage():
    chk.check_nonempty(_fst([(0, 1, 1, 1)], [1]), chk.CheckContext("minimize"))
    dead = _fst([(0, 1, 1, 1)], [])
    with pytest.raises(InputCheckFailed, match="grammar: the language model accepts no"):
        chk.check_nonempty(dead, chk.CheckContext("grammar"))
    with pytest.raises(EmptyCompositionError, match="no word of the lexicon occurs"):
        chk.check_nonempty(pynini.Fst(), chk.CheckContext("compose"))
    with pytest.raises(CheckFailed, match=r"^internal error after stage 'push'") as err:
        chk.check_nonempty(dead, chk.CheckContext("push"))
    saved = err.value.evidence
    assert os.path.exists(os.path.join(saved, "push.fst"))
    assert os.path.exists(os.path.join(saved, "push.dot"))
    assert pynini.Fst.read(os.path.join(saved, "push.fst")).num_states() == 2


def test_connected_names_accessibility():
    f = _fst([(0, 1, 1, 1), (2, 1, 1, 1)], [1])  # state 2 cannot be reached
    with pytest.raises(CheckFailed, match="not accessible"):
        chk.check_connected(f, chk.CheckContext("determinize"))
    g = _fst([(0, 1, 1, 1), (0, 2, 2, 2)], [1])  # state 2 reaches no final state
    with pytest.raises(InputCheckFailed, match="not coaccessible"):
        chk.check_connected(g, chk.CheckContext("grammar"))
    chk.check_connected(_fst([(0, 1, 1, 1)], [1]), chk.CheckContext("x"))


def test_input_deterministic():
    chk.check_input_deterministic(_fst([(0, 1, 1, 1), (0, 2, 1, 1)], [1]),
                                  chk.CheckContext("minimize"))
    with pytest.raises(CheckFailed, match="state 0 has two arcs with the same input"):
        chk.check_input_deterministic(_fst([(0, 1, 1, 1), (0, 1, 2, 1)], [1]),
                                      chk.CheckContext("minimize"))


def test_epsilon_cycles_found_on_the_input_side_only():
    # 1 -eps-> 2 -eps-> 1 is a cycle; output labels do not matter.
    cyclic = _fst([(0, 1, 0, 1), (1, 0, 3, 2), (2, 0, 0, 1), (2, 2, 0, 3)], [3])
    assert sorted(chk.has_input_epsilon_cycle(cyclic)) == [1, 2]
    with pytest.raises(InputCheckFailed, match="back-off marker"):
        chk.check_no_input_epsilon_cycles(cyclic, chk.CheckContext("compose"))
    with pytest.raises(CheckFailed, match="input-epsilon arcs form a cycle"):
        chk.check_no_input_epsilon_cycles(cyclic, chk.CheckContext("determinize"))
    # An input-labelled loop with epsilon output is fine.
    fine = _fst([(0, 0, 1, 1), (1, 2, 0, 1), (1, 3, 0, 2)], [2])
    assert chk.has_input_epsilon_cycle(fine) == []


def test_labels_inside_tables_and_no_marker_on_output():
    words = word_table(["up", "down"])  # <epsilon> 0, up 1, down 2, !backoff 3
    phones = make_symbol_table("phones", ["u", "d"])
    ok = _fst([(0, 1, 1, 1), (1, 2, 2, 2)], [2])
    chk.check_labels(ok, chk.CheckContext("push", phones, words))
    with pytest.raises(CheckFailed, match=r"input labels \[7\] are not in the input"):
        chk.check_labels(_fst([(0, 7, 1, 1)], [1]), chk.CheckContext("push", phones, words))
    marker_out = _fst([(0, 1, words.find(BACKOFF), 1)], [1])
    with pytest.raises(CheckFailed, match="auxiliary markers .'!backoff'. appear"):
        chk.check_labels(marker_out, chk.CheckContext("push", phones, words))
    chk.check_labels(marker_out, chk.CheckContext("lexicon", phones, words,
                                                   output_aux_allowed=True))


def test_lexicon_pronunciations_read_from_the_builder_shape():
    lex = lexicon_for([("up", "u p"), ("down", "d a u n")], ["up", "down"])
    prons = chk.lexicon_pronunciations(lex.fst)
    isyms, osyms = lex.fst.input_symbols(), lex.fst.output_symbols()
    spelt = {osyms.find(w): sorted(" ".join(isyms.find(k) for k in s) for s in seqs)
             for w, seqs in prons.items()}
    assert spelt == {"up": ["u p", "u p sil"], "down": ["d a u n", "d a u n sil"]}


def test_homophones_without_markers_are_input_errors():
    words = ["two", "too", "stop"]
    prons = [("two", "t u"), ("too", "t u"), ("stop", "s t o p")]
    bare = lexicon_for(prons, words, disambiguate=False)
    found = chk.unmarked_homophones(bare.fst)
    assert (("t", "u"), ["too", "two"]) in found
    with pytest.raises(InputCheckFailed, match=r"t u = too, two.*disambiguation markers"):
        chk.check_homophones(bare.fst, chk.CheckContext("lexicon"))
    marked = lexicon_for(prons, words, disambiguate=True)
    assert chk.unmarked_homophones(marked.fst) == []
    chk.check_homophones(marked.fst, chk.CheckContext("lexicon"))


def test_prefixes_found():
    bare = lexicon_for([("car", "k a r"), ("cart", "k a r t")], ["car", "cart"],
                       silence=False, disambiguate=False)
    assert chk.unmarked_prefixes(bare.fst) == [("car", "cart")]


def test_backoff_passthrough_and_reachable_words():
    lex, grammar = demo_case()
    ctx = chk.CheckContext("lexicon", gfst=grammar.fst)
    chk.check_backoff_passthrough(lex.fst, ctx)
    bo = lex.fst.input_symbols().find(BACKOFF)
    # Relabel the pass-through loop to epsilon input and output: L then drops back-off.
    no_loop = lex.fst.copy().relabel_pairs(ipairs=[(bo, 0)], opairs=[(grammar.word_symbols.find(
        BACKOFF), 0)])
    with pytest.raises(InputCheckFailed, match="lose every back-off path"):
        chk.check_backoff_passthrough(no_loop, ctx)
    composed = pynini.compose(lex.fst, grammar.fst)
    chk.check_words_reachable(composed, chk.CheckContext("compose", gfst=grammar.fst))
    keep = [(w, p) for w, p in [("cabin", "k a b i n"), ("car", "k a r"), ("two", "t u")]]
    small = lexicon_for(keep, ["cabin", "car", "cart", "stop", "stops", "two", "too"])
    partial = pynini.compose(small.fst, grammar.fst)
    with pytest.raises(InputCheckFailed, match=r"4 words of the model cannot be reached"):
        chk.check_words_reachable(partial, chk.CheckContext("compose", gfst=grammar.fst))


@settings(max_examples=150, deadline=None)
@given(st.integers(1, 12), st.lists(st.tuples(st.integers(0, 11), st.integers(0, 11)),
                                    max_size=30),
       st.lists(st.integers(0, 11), max_size=3), st.integers(0, 11))
def test_bulk_connectivity_equals_openfst(n, edges, finals, start):
    """The connectivity bits worked out in bulk from the shared arrays are OpenFst's."""
    fst = pynini.Fst()
    for _ in range(n):
        fst.add_state()
    fst.set_start(start % n)
    for a, b in edges:
        fst.add_arc(a % n, pynini.Arc(1, 1, 0.0, b % n))
    for f in finals:
        fst.set_final(f % n)
    mask = pywrapfst.ACCESSIBLE | pywrapfst.COACCESSIBLE
    # reference: OpenFst's own connectivity search (fst/connect.h), on a copy
    want = fst.copy().properties(mask, True)
    with shared_conversions():
        fst_to_arrays(fst)
        chk._store_connectivity(fst)
        assert fst.properties(mask, False) == want
