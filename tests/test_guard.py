"""Tests of the process-level determinization guard (netbuild/guard.py)."""

from __future__ import annotations

import gc
import weakref

import numpy as np
import pynini
import pytest
import random

from wordgraph_helpers import demo_case, lexicon_for, normalized_bigram
from fst_helpers import tracked_copy

from netbuild.errors import DeterminizeError
from netbuild.guard import FstHandoff, determinize_guarded, precheck_determinizable
from netbuild.io.fstfile import fst_to_arrays, shared_conversions
from netbuild.pipeline import compose_stage

_MB = 1024 * 1024


def _chain_fst(arcs, finals, n):
    f = pynini.Fst()
    f.add_states(n)
    f.set_start(0)
    for s, i, o, w, d in arcs:
        f.add_arc(s, pynini.Arc(i, o, w, d))
    for s in finals:
        f.set_final(s)
    return f


def _not_twins() -> pynini.Fst:
    """a^n b -> x^n and a^n c -> y^n: functional, but its output must wait for the last
    letter, so determinization never ends (the twins property fails)."""
    # reference: Mohri (1997), "Finite-state transducers in language and speech
    # processing", Computational Linguistics 23(2), section 3 (twins property)
    return _chain_fst([(0, 1, 1, 0, 1), (1, 1, 1, 0, 1), (1, 2, 0, 0, 3),
                       (0, 1, 2, 0, 2), (2, 1, 2, 0, 2), (2, 3, 0, 0, 3)], [3], 4)


def _non_functional_loop() -> pynini.Fst:
    """(a b)* with a:x or a:y under the loop: two outputs for one input."""
    return _chain_fst([(0, 1, 1, 0, 1), (0, 1, 2, 0, 2), (1, 2, 0, 0, 0),
                       (2, 2, 0, 0, 0)], [0], 3)


@pytest.mark.slow
def test_non_determinizable_transducer_stops_at_a_limit():
    with pytest.raises(DeterminizeError, match=r"determinize: (ran out of its memory "
                       r"limit of 300 MB|hit the time limit of 20 s)") as err:
        determinize_guarded(_not_twins(), 300 * _MB, 20.0)
    assert err.value.hint  # names what to change
    assert "determinize_max_memory" in str(err.value) or "determinize_timeout" in str(
        err.value)


def test_timeout_is_reported_with_elapsed_time():
    with pytest.raises(DeterminizeError, match=r"time limit of 0.5 s \(stopped after "
                       r"[0-9.]+ s\)"):
        determinize_guarded(_not_twins(), 4096 * _MB, 0.5)


def test_non_functional_input_is_reported():
    with pytest.raises(DeterminizeError, match="non-functional"):
        determinize_guarded(_non_functional_loop(), 300 * _MB, 20.0)


def test_normal_input_matches_in_process_determinize():
    lex, grammar = demo_case()
    lg = compose_stage(lex.fst, grammar.fst)
    result = determinize_guarded(lg, 300 * _MB, 20.0, lfst=lex.fst, gfst=grammar.fst)
    expected = pynini.determinize(lg)
    # reference: OpenFst equivalence test (fst/equivalent.h) on encoded acceptors
    mapper = pynini.EncodeMapper("standard", True, True)
    assert pynini.equivalent(pynini.encode(expected, mapper),
                             pynini.encode(result.fst, mapper))
    assert result.fst.num_states() == expected.num_states()
    assert result.peak_rss_bytes > 1 * _MB
    assert result.fst.input_symbols() is not None
    assert lg.num_states() == compose_stage(lex.fst, grammar.fst).num_states()  # unchanged
    # The arrays read from the child's const file are those of the FST built from them
    # (reference: OpenFst's own const conversion, which fst_to_arrays reads).
    fresh = fst_to_arrays(result.fst)
    for field in ("final_weights", "src", "ilabel", "olabel", "weight", "dst"):
        assert np.array_equal(getattr(result.arrays, field), getattr(fresh, field)), field
    assert (result.arrays.num_states, result.arrays.start) == (fresh.num_states, fresh.start)


def test_precheck_names_unmarked_homophones_at_once():
    words = ["two", "too", "stop"]
    lex = lexicon_for([("two", "t u"), ("too", "t u"), ("stop", "s t o p")], words,
                      disambiguate=False)
    grammar = normalized_bigram(words, random.Random(0))
    lg = pynini.compose(lex.fst, grammar.fst)
    with pytest.raises(DeterminizeError, match=r"not functional.*t u = too, two"):
        precheck_determinizable(lg, lex.fst, grammar.fst)


def test_precheck_rejects_input_epsilon_cycles():
    cyclic = _chain_fst([(0, 0, 1, 0.5, 1), (1, 0, 2, 0.5, 0)], [1], 2)
    with pytest.raises(DeterminizeError, match="cycle of arcs with no input label"):
        determinize_guarded(cyclic, 300 * _MB, 20.0)


def test_child_failure_names_likely_lexicon_cause(monkeypatch):
    # Homophones without markers, with the pre-check switched off: the failure in the
    # child is then diagnosed with the cheap lexicon analysis.
    from netbuild import guard

    words = ["two", "too", "stop"]
    lex = lexicon_for([("two", "t u"), ("too", "t u"), ("stop", "s t o p")], words,
                      disambiguate=False)
    grammar = normalized_bigram(words, random.Random(0))
    lg = pynini.compose(lex.fst, grammar.fst)
    monkeypatch.setattr(guard, "precheck_determinizable", lambda *args: None)
    with pytest.raises(DeterminizeError, match=r"homophones without disambiguation "
                       r"markers \(t u = too, two"):
        determinize_guarded(lg, 300 * _MB, 20.0, lfst=lex.fst, gfst=grammar.fst)


@pytest.mark.parametrize("handed", [True, False])
def test_handed_over_input_is_dropped_while_the_child_runs(monkeypatch, handed):
    """Given as an FstHandoff, the input (and the pre-check's shared conversion of it) is
    freed before the child starts; given plainly, the caller's reference keeps it."""
    from netbuild import guard

    lex, grammar = demo_case()
    lg = tracked_copy(compose_stage(lex.fst, grammar.fst))
    expected = pynini.determinize(lg)
    ref = weakref.ref(lg)
    alive: list[bool] = []
    popen = guard.subprocess.Popen

    def spy(*args, **kwargs):
        gc.collect()
        alive.append(ref() is not None)
        return popen(*args, **kwargs)

    monkeypatch.setattr(guard.subprocess, "Popen", spy)
    given = FstHandoff(lg) if handed else lg
    del lg
    with shared_conversions():
        result = determinize_guarded(given, 300 * _MB, 20.0, lfst=lex.fst, gfst=grammar.fst)
    assert alive == [not handed]
    # reference: OpenFst equivalence test (fst/equivalent.h) on encoded acceptors
    mapper = pynini.EncodeMapper("standard", True, True)
    assert pynini.equivalent(pynini.encode(expected, mapper),
                             pynini.encode(result.fst, mapper))


def test_handed_over_input_still_gets_the_failure_message():
    """The messages after a failed child name the likely cause without the input."""
    with pytest.raises(DeterminizeError, match="non-functional"):
        determinize_guarded(FstHandoff(_non_functional_loop()), 300 * _MB, 20.0)


def test_handoff_gives_its_fst_once():
    handoff = FstHandoff(pynini.accep("a"))
    assert handoff.take().num_states() == 2
    with pytest.raises(RuntimeError, match="already taken"):
        handoff.take()
