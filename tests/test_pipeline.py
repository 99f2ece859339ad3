"""Unit tests of the word-level pipeline stages and build_word_graph."""

from __future__ import annotations

import dataclasses

import gc
import math
import random
import weakref

import pynini
import pywrapfst
import pytest
from wordgraph_helpers import demo_case, lexicon_for, normalized_bigram, to_log
from fst_helpers import tracked_copy

from netbuild.errors import EmptyCompositionError, InputCheckFailed
from netbuild.footprint import fst_size
from netbuild.io.fstfile import fst_to_arrays
from netbuild.options import BuildOptions
from netbuild.pipeline import (Pipeline, Step, StageRecord, build_word_graph,
                               compose_stage, determinize_stage, log_potentials,
                               minimize_stage, num_arcs, push_stage)

_OPTS = BuildOptions(determinize_max_memory=1024**3, determinize_timeout=60)


def _text(f: pynini.Fst) -> str:
    return f.print()


def test_compose_is_sorted_and_leaves_inputs_alone():
    lex, grammar = demo_case()
    before_l, before_g = _text(lex.fst), _text(grammar.fst)
    lg = compose_stage(lex.fst, grammar.fst)
    assert _text(lex.fst) == before_l and _text(grammar.fst) == before_g
    assert lg.properties(pywrapfst.I_LABEL_SORTED, True) == pywrapfst.I_LABEL_SORTED
    assert lg.num_states() > 0


def test_compose_with_disjoint_vocabulary_names_the_cause():
    lex, grammar = demo_case()
    with pytest.raises(EmptyCompositionError, match="no word of the lexicon occurs in "
                       "the model"):
        compose_stage(lex.fst, _relabel_all_words(grammar.fst))


def _relabel_all_words(g: pynini.Fst) -> pynini.Fst:
    """G with every word label moved past L's table: nothing matches."""
    pairs = [(k, k + 100) for k, s in g.input_symbols() if k and not s.startswith("!")]
    moved = g.copy().relabel_pairs(ipairs=pairs, opairs=pairs)
    moved.set_input_symbols(None)
    moved.set_output_symbols(None)
    return moved


def test_determinize_stage_is_input_deterministic_and_keeps_weights():
    lex, grammar = demo_case()
    lg = compose_stage(lex.fst, grammar.fst)
    details: dict = {}
    det = determinize_stage(lg, _OPTS, lfst=lex.fst, gfst=grammar.fst, details=details)
    assert det.properties(pywrapfst.I_DETERMINISTIC, True) == pywrapfst.I_DETERMINISTIC
    assert details["child_peak_rss_bytes"] > 0
    # reference: OpenFst randequivalent (fst/randequivalent.h), tropical semiring
    assert pynini.randequivalent(lg, det, npath=200, seed=7, delta=1e-2)


@pytest.mark.parametrize("method", ["encoded", "transducer"])
def test_minimize_methods_agree_and_are_idempotent(method):
    lex, grammar = demo_case()
    det = pynini.determinize(compose_stage(lex.fst, grammar.fst))
    text = _text(det)
    mini = minimize_stage(det, method)
    assert _text(det) == text
    assert mini.num_states() <= det.num_states()
    assert pynini.randequivalent(det, mini, npath=200, seed=3, delta=1e-2)
    again = minimize_stage(mini, method)
    assert (again.num_states(), num_arcs(again)) == (mini.num_states(), num_arcs(mini))


def test_minimize_rejects_unknown_method():
    with pytest.raises(ValueError, match="use 'encoded' or 'transducer'"):
        minimize_stage(pynini.accep("a"), "fast")


def test_push_makes_states_stochastic_in_the_log_semiring():
    # A small stochastic acceptor: after a log push every non-start state's arcs and
    # final weight sum to one (common practice, no source: definition of weight pushing,
    # Mohri 2002 "Semiring frameworks and algorithms for shortest-distance problems").
    f = pynini.Fst()
    f.add_states(3)
    f.set_start(0)
    f.add_arc(0, pynini.Arc(1, 1, -math.log(0.5), 1))
    f.add_arc(0, pynini.Arc(2, 2, -math.log(0.5), 2))
    f.add_arc(1, pynini.Arc(1, 1, 3.0, 1))
    f.add_arc(1, pynini.Arc(3, 3, 1.0, 2))
    f.set_final(2, 0.25)
    details: dict = {}
    pushed = push_stage(f, details)
    assert details["semiring"] == "log"
    for s in pushed.states():
        if s == pushed.start():
            continue
        mass = sum(math.exp(-float(a.weight)) for a in pushed.arcs(s))
        mass += math.exp(-float(pushed.final(s)))
        assert mass == pytest.approx(1.0, abs=1e-5)
    assert pynini.randequivalent(to_log(f), to_log(pushed), npath=100, seed=1, delta=1e-3)


def test_log_potentials_detect_divergence():
    loop = pynini.Fst()
    loop.add_states(1)
    loop.set_start(0)
    loop.set_final(0, 1.0)
    loop.add_arc(0, pynini.Arc(1, 1, -math.log(0.5), 0))
    # d = e^-1 / (1 - 0.5): geometric series
    assert log_potentials(loop)[0] == pytest.approx(1.0 - math.log(2.0), abs=1e-6)
    loop.add_arc(0, pynini.Arc(2, 2, -math.log(0.6), 0))  # mass 1.1 per step: diverges
    assert log_potentials(loop) is None
    details: dict = {}
    pushed = push_stage(loop, details)
    assert details["semiring"] == "tropical"
    assert pynini.randequivalent(loop, pushed, npath=50, seed=2, delta=1e-3)


def test_pipeline_runs_checks_after_each_step():
    seen: list[str] = []

    def check(fst, ctx):
        seen.append(ctx.stage)

    steps = [Step("a", lambda f, d: f.copy(), [check], "after_a"),
             Step("b", lambda f, d: pynini.determinize(f), [check])]
    records: list[StageRecord] = []
    out, recs, kept = Pipeline(steps).run((pynini.accep("ab") | pynini.accep("ac")).rmepsilon(),
                                          progress=records.append, keep=True)
    assert seen == ["a", "b"] and [r.name for r in recs] == ["a", "b"] == \
        [r.name for r in records]
    assert set(kept) == {"after_a"}
    assert recs[1].states == out.num_states() == 4
    seen.clear()
    _, _, kept = Pipeline(steps).run(pynini.accep("a"), checks=False)
    assert seen == [] and kept == {}  # nothing kept unless asked for


@pytest.mark.parametrize("hands_off", [False, True])
@pytest.mark.parametrize("keep", [False, True])
def test_pipeline_frees_each_result_once_the_next_stage_is_done(hands_off, keep):
    """The first stage's FST is gone when the second stage's checks run (its conversion,
    made by the second stage inside the shared block, included) unless it is kept."""
    refs: list[weakref.ref] = []
    gone: list[bool] = []

    def first(f, details):
        t = tracked_copy(f)
        refs.append(weakref.ref(t))
        return t

    def second(given, details):
        f = given.take() if hands_off else given
        fst_to_arrays(f)  # a shared conversion of the input
        return pynini.determinize(f)

    def check(fst, ctx):
        gc.collect()
        gone.append(refs[0]() is None)

    steps = [Step("a", first, (), "a"), Step("b", second, [check], "b", hands_off=hands_off)]
    out, recs, kept = Pipeline(steps).run((pynini.accep("ab") | pynini.accep("ac")).rmepsilon(),
                                          keep=keep)
    assert gone == [not keep]
    assert set(kept) == ({"a", "b"} if keep else set())
    assert (recs[1].states, recs[1].arcs) == (out.num_states(), num_arcs(out)) == (4, 3)


def test_stage_records_carry_the_size_of_their_fst():
    steps = [Step("a", lambda f, d: f.copy(), (), "a"),
             Step("b", lambda h, d: pynini.determinize(h.take()), (), "b", hands_off=True)]
    _, recs, kept = Pipeline(steps).run((pynini.accep("ab") | pynini.accep("ac")).rmepsilon(),
                                        keep=True)
    for rec, fst in zip(recs, (kept["a"], kept["b"])):
        assert rec.size == fst_size(fst)
        # reference: the bytes OpenFst itself writes for the (vector) FST
        assert rec.size.vector.disk_bytes == len(fst.write_to_string())


_STAGES = {"compose": ["grammar", "lexicon", "compose", "determinize", "minimize", "push"],
           "tree": ["grammar", "lexicon", "compose-determinize", "minimize", "push"]}
_KEPT = {"compose": ["grammar", "lexicon", "composed", "determinized", "minimized", "pushed"],
         "tree": ["grammar", "lexicon", "determinized", "minimized", "pushed"]}


@pytest.mark.parametrize("method", ["compose", "tree"])
def test_build_word_graph_records_every_stage(method):
    lex, grammar = demo_case()
    got: list[StageRecord] = []
    opts = dataclasses.replace(_OPTS, word_graph=method)
    wg = build_word_graph(lex, grammar, opts, progress=got.append)
    names = [r.name for r in wg.stages]
    assert names == _STAGES[method]
    assert [r.name for r in got] == names
    # Only G, L and the final graph are kept unless the intermediates are asked for.
    assert set(wg.intermediates) == {"grammar", "lexicon", "wordgraph"}
    assert wg.intermediates["wordgraph"] is wg.fst
    for r in wg.stages:
        assert r.peak_rss_bytes > 0 and r.seconds >= 0
    final = wg.stages[-1]
    assert (final.states, final.arcs) == (wg.fst.num_states(), num_arcs(wg.fst))
    assert wg.fst.properties(pywrapfst.I_DETERMINISTIC, True) == pywrapfst.I_DETERMINISTIC
    assert wg.fst.output_symbols().find("cabin") > 0


@pytest.mark.parametrize("method", ["compose", "tree"])
def test_build_word_graph_keeps_intermediates_on_request(method):
    lex, grammar = demo_case()
    opts = dataclasses.replace(_OPTS, word_graph=method)
    wg = build_word_graph(lex, grammar, opts, keep_intermediates=True)
    kept = wg.intermediates
    assert set(kept) == {*_KEPT[method], "wordgraph"}
    assert kept["pushed"] is wg.fst
    by_stage = dict(zip(_STAGES[method], _KEPT[method]))
    for rec in wg.stages:
        fst = kept[by_stage[rec.name]]
        assert rec.size == fst_size(fst), rec.name
        # reference: the bytes OpenFst itself writes for the (vector) FST
        assert rec.size.vector.disk_bytes == len(fst.write_to_string()), rec.name
        assert (rec.states, rec.arcs) == (fst.num_states(), num_arcs(fst))
    # Keeping them changes no record's size.
    plain = build_word_graph(lex, grammar, opts)
    assert [r.size for r in plain.stages] == [r.size for r in wg.stages]


def test_build_word_graph_without_push_or_checks():
    lex, grammar = demo_case()
    opts = BuildOptions(push_weights=False, checks=False, determinize_timeout=60)
    wg = build_word_graph(lex, grammar, opts)
    assert [r.name for r in wg.stages][-1] == "minimize"
    assert "check_seconds" not in wg.stages[-1].details


def test_build_word_graph_stops_on_unmarked_homophones():
    words = ["two", "too", "stop"]
    lex = lexicon_for([("two", "t u"), ("too", "t u"), ("stop", "s t o p")], words,
                      disambiguate=False)
    grammar = normalized_bigram(words, random.Random(0))
    with pytest.raises(InputCheckFailed, match=r"lexicon: 2 pronunciations spell several "
                       r"words|lexicon: 1 pronunciations spell several words"):
        build_word_graph(lex, grammar, _OPTS)
