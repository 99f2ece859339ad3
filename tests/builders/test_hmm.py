"""Unit and property tests of H (netbuild.builders.hmm) and of self-loop insertion."""

from __future__ import annotations

import math

import numpy as np
import pynini
import pytest
from hypothesis import given
from hypothesis import strategies as st
from fst_helpers import monophone_map as _cmap
from fst_helpers import tracked_copy

from netbuild.builders.hmm import (KindTable, add_self_loops, build_hmm, emission_symbols,
                                   make_model_symbols)
from netbuild.errors import PhoneMapError, StageError
from netbuild.io.fstfile import arrays_to_fst, fst_to_arrays
from netbuild.symbols import BACKOFF, disambiguation_marker, make_symbol_table

PHONES = make_symbol_table("phones", ["a", "b", "sil", BACKOFF, disambiguation_marker(1)])


CMAP = _cmap({
    "m_a": [(0, 0.6, 0.4), (1, 0.5, 0.5), (2, 0.7, 0.3)],
    "m_b": [(3, 0.6, 0.4), (1, 0.5, 0.5)],  # second state shares m_a's kind
    "m_sil": [(4, 0.9, 0.1)],
    "m_x": [(0, 0.2, 0.8)],  # same emission class as m_a's first, other probabilities
})


def _strings(fst: pynini.Fst, side: str = "input") -> dict[tuple[int, ...], float]:
    """All (label tuple on `side`, best cost) of an acyclic FST, epsilons dropped."""
    proj = pynini.project(fst, project_type=side).rmepsilon()
    out: dict[tuple[int, ...], float] = {}
    if proj.start() == pynini.NO_STATE_ID:
        return out
    it = proj.paths()
    while not it.done():
        key = tuple(it.ilabels())
        out[key] = min(out.get(key, math.inf), float(it.weight()))
        it.next()
    return out


def _linear(labels: list[int], osyms: pynini.SymbolTable | None = None) -> pynini.Fst:
    f = pynini.Fst()
    f.add_states(len(labels) + 1)
    f.set_start(0)
    for i, lab in enumerate(labels):
        f.add_arc(i, pynini.Arc(lab, lab, 0, i + 1))
    f.set_final(len(labels))
    return f


def test_model_symbols_have_models_then_markers():
    table = make_model_symbols(CMAP, PHONES)
    names = [name for _, name in table]
    # reference: module docstring of netbuild.builders.hmm (table layout)
    assert names == ["<epsilon>", "m_a", "m_b", "m_sil", "m_x", BACKOFF, "!amb1"]


def test_model_symbols_reject_reserved_names():
    bad = _cmap({"!amb7": [(0, 0.5, 0.5)]})
    with pytest.raises(PhoneMapError, match=r"test\.ctx:1: model name '!amb7'"):
        make_model_symbols(bad, PHONES)


def test_hmm_maps_each_model_to_its_kind_sequence():
    models = make_model_symbols(CMAP, PHONES)
    h, kinds = build_hmm(CMAP, models)
    # reference: definition of arc kinds (distinct (class, self-loop, forward) triples)
    assert kinds.kinds == [(0, 0.6, 0.4), (1, 0.5, 0.5), (2, 0.7, 0.3), (3, 0.6, 0.4),
                           (4, 0.9, 0.1), (0, 0.2, 0.8)]
    assert kinds.num_classes == 5
    expected = {"m_a": (1, 2, 3), "m_b": (4, 2), "m_sil": (5,), "m_x": (6,)}
    for name, seq in expected.items():
        out = pynini.compose(h, _linear([models.find(name)]))
        assert set(_strings(out)) == {seq}, name
    # Two models in a row: concatenation, through the one boundary state.
    two = pynini.compose(h, _linear([models.find("m_b"), models.find("m_sil")]))
    assert set(_strings(two)) == {(4, 2, 5)}
    # Markers pass through between models, unchanged.
    marked = _linear([models.find("m_sil"), models.find(BACKOFF), models.find("m_x")])
    out = pynini.compose(h, marked)
    assert set(_strings(out)) == {(5, kinds.symbols.find(BACKOFF), 6)}
    assert kinds.marker_ids() == [7, 8]
    # No weights and no self-loops in H.
    for s in h.states():
        for arc in h.arcs(s):
            assert float(arc.weight) == 0.0
            assert not (arc.nextstate == s and arc.ilabel <= kinds.num_kinds
                        and s != 0)


def test_emission_symbols_are_class_plus_one():
    _, kinds = build_hmm(CMAP, make_model_symbols(CMAP, PHONES))
    table = emission_symbols(kinds)
    assert table.find("e0") == 1 and table.find("e4") == 5  # convention: c + 1
    assert table.num_symbols() == 6


# ------------------------------------------------------------------- self-loops


def _reference_expansion(fst: pynini.Fst, kinds: KindTable, scale: float) -> pynini.Fst:
    """Plain-Python expansion: every looping-kind arc s -k-> t becomes
    s -k-> n, n -k-> n (self-loop cost), n -eps-> t (exit cost); labels -> class + 1.

    This is the textbook left-to-right HMM topology (enter, stay, leave) applied to each
    arc separately, with no state sharing.
    """  # common practice, no source
    out = pynini.Fst()
    for _ in fst.states():
        out.add_state()
    out.set_start(fst.start())
    for s in fst.states():
        out.set_final(s, fst.final(s))
    for s in fst.states():
        for arc in fst.arcs(s):
            k = arc.ilabel
            if k == 0:
                out.add_arc(s, pynini.Arc(0, arc.olabel, arc.weight, arc.nextstate))
                continue
            cls, loop, fwd = kinds.kinds[k - 1]
            if loop <= 0.0:
                out.add_arc(s, pynini.Arc(cls + 1, arc.olabel,
                                          float(arc.weight) - math.log(fwd) * scale,
                                          arc.nextstate))
                continue
            n = out.add_state()
            out.add_arc(s, pynini.Arc(cls + 1, arc.olabel, arc.weight, n))
            out.add_arc(n, pynini.Arc(cls + 1, 0, -math.log(loop) * scale, n))
            out.add_arc(n, pynini.Arc(0, 0, -math.log(fwd) * scale, arc.nextstate))
    return out


def _bounded(fst: pynini.Fst, num_labels: int, max_len: int) -> pynini.Fst:
    """The part of `fst` whose input strings have at most `max_len` labels."""
    sigma = pynini.Fst()
    sigma.add_states(max_len + 1)
    sigma.set_start(0)
    for i in range(max_len + 1):
        sigma.set_final(i)
        if i < max_len:
            for lab in range(1, num_labels + 1):
                sigma.add_arc(i, pynini.Arc(lab, lab, 0, i + 1))
    return pynini.compose(sigma, pynini.arcsort(fst, sort_type="ilabel"))


def _same_weighted_relation(f1: pynini.Fst, f2: pynini.Fst, num_labels: int,
                            max_len: int) -> bool:
    """Exact comparison of two transducers on every input up to `max_len` labels:
    both are cut to those inputs (acyclic), their (input, output) label pairs encoded
    with one shared mapper, epsilons removed, determinized and compared with OpenFst's
    `equivalent` (tropical)."""
    mapper = pynini.EncodeMapper("standard", encode_labels=True, encode_weights=False)
    # Epsilon removal first: the mapper would give epsilon:epsilon a label of its own.
    a = pynini.encode(_bounded(f1, num_labels, max_len).rmepsilon(), mapper)
    b = pynini.encode(_bounded(f2, num_labels, max_len).rmepsilon(), mapper)
    a = pynini.determinize(a).minimize()
    b = pynini.determinize(b).minimize()
    return pynini.equivalent(a, b, delta=1e-4)  # reference: OpenFst Equivalent


def _kinds(triples: list[tuple[int, float, float]]) -> KindTable:
    table = make_symbol_table("kinds", [f"kind{i}" for i in range(1, len(triples) + 1)])
    return KindTable(list(triples), table, [], 1 + max(t[0] for t in triples))


def _random_graph(num_states: int, arcs: list[tuple], finals: set[int]) -> pynini.Fst:
    src, ilab, olab, w, dst = (np.array(x) for x in zip(*arcs))
    fin = np.array([0.5 if i in finals else np.inf for i in range(num_states)])
    fin[num_states - 1] = 0.25
    return arrays_to_fst(num_states, 0, fin, src, ilab, olab, w, dst)


@st.composite
def graphs_and_kinds(draw):
    triples = draw(st.lists(
        st.tuples(st.integers(0, 3), st.sampled_from([0.0, 0.25, 0.5, 0.75])),
        min_size=1, max_size=4))
    kinds = _kinds([(c, p, 1.0 - p) for c, p in triples])
    n = draw(st.integers(2, 6))
    arcs = []
    for s in range(n - 1):  # acyclic: arcs go forward
        for _ in range(draw(st.integers(1, 3))):
            t = draw(st.integers(s + 1, n - 1))
            k = draw(st.integers(0, kinds.num_kinds))
            o = draw(st.integers(0, 2))
            w = draw(st.sampled_from([0.0, 0.5, 1.25]))
            arcs.append((s, k, o, w, t))
    finals = set(draw(st.lists(st.integers(0, n - 1), max_size=2)))
    return _random_graph(n, arcs, finals), kinds


@given(graphs_and_kinds(), st.sampled_from([1.0, 0.5]))
def test_self_loops_match_the_plain_expansion(case, scale):
    fst, kinds = case
    got = add_self_loops(fst, kinds, transition_scale=scale)
    want = _reference_expansion(fst, kinds, scale)
    assert _same_weighted_relation(got, want, kinds.num_classes, max_len=6)


def test_self_loop_costs_on_a_single_arc():
    kinds = _kinds([(2, 0.75, 0.25)])
    fst = arrays_to_fst(2, 0, [np.inf, 0.0], [0], [1], [1], [0.5], [1])
    got = add_self_loops(fst, kinds)
    # One kind entering state 1 and nothing else: state 1 itself gets the loop.
    assert got.num_states() == 2
    # reference: left-to-right HMM path probability, 0.75^(d-1) * 0.25 for d frames
    for d in range(1, 4):
        want = 0.5 - (d - 1) * math.log(0.75) - math.log(0.25)
        assert costs_for(got, [3] * d) == pytest.approx(want, abs=1e-5)


def costs_for(fst: pynini.Fst, labels: list[int]) -> float:
    out = pynini.compose(_linear(labels), fst)
    return float(pynini.shortestdistance(out, reverse=True)[out.start()]) \
        if out.start() != pynini.NO_STATE_ID else math.inf


def test_state_entered_by_two_kinds_and_epsilon_is_copied_twice():
    kinds = _kinds([(0, 0.5, 0.5), (1, 0.5, 0.5)])
    # 0 -kind1-> 3, 1 -kind2-> 3, 2 -eps-> 3; 0 -eps-> 1, 0 -eps-> 2
    fst = arrays_to_fst(4, 0, [np.inf, np.inf, np.inf, 0.0],
                        [0, 0, 0, 1, 2], [0, 0, 1, 2, 0], [0, 0, 0, 0, 0],
                        [0, 0, 0, 0, 0], [1, 2, 3, 3, 3])
    got = add_self_loops(fst, kinds)
    assert got.num_states() == 6  # state 3 kept for epsilon, plus 3_kind1 and 3_kind2
    assert costs_for(got, [1]) == pytest.approx(-math.log(0.5), abs=1e-6)
    assert costs_for(got, [2, 2]) == pytest.approx(-2 * math.log(0.5), abs=1e-6)
    assert costs_for(got, []) == pytest.approx(0.0, abs=1e-6)


def test_kind_without_loop_adds_nothing():
    kinds = _kinds([(0, 0.0, 1.0)])
    fst = arrays_to_fst(2, 0, [np.inf, 0.0], [0], [1], [0], [0.0], [1])
    got = add_self_loops(fst, kinds)
    assert got.num_states() == 2 and got.num_arcs(1) == 0
    assert costs_for(got, [1, 1]) == math.inf


def test_self_loops_refuse_markers_left_in_place():
    kinds = _kinds([(0, 0.5, 0.5)])
    fst = arrays_to_fst(2, 0, [np.inf, 0.0], [0], [2], [0], [0.0], [1])
    with pytest.raises(StageError, match="not an arc kind"):
        add_self_loops(fst, kinds)


def _construction(fst: pynini.Fst, kinds: KindTable, scale: float) -> pynini.Fst:
    """The module docstring's construction in plain Python, arc by arc: states t_k for
    the looping kinds entering t (t itself for the first when t is entered by nothing
    else and is not the start), numbered after the states of `fst` in (t, k) order;
    then OpenFst's own input-label arc sort. Weights are summed in Python floats."""
    loop = {i + 1: (-math.log(p) * scale if p > 0 else None)
            for i, (_, p, _) in enumerate(kinds.kinds)}
    exit_ = {0: 0.0, **{i + 1: -math.log(f) * scale for i, (_, _, f) in enumerate(kinds.kinds)}}
    cls = {0: 0, **{i + 1: c + 1 for i, (c, _, _) in enumerate(kinds.kinds)}}
    n = fst.num_states()
    entering: dict[int, set[int]] = {t: set() for t in range(n)}
    plain = {fst.start()}
    for s in fst.states():
        for arc in fst.arcs(s):
            if arc.ilabel and loop[arc.ilabel] is not None:
                entering[arc.nextstate].add(arc.ilabel)
            else:
                plain.add(arc.nextstate)
    pair: dict[tuple[int, int], int] = {}
    template: list[tuple[int, int]] = [(t, 0) for t in range(n)]  # (state, its kind)
    for t in range(n):
        for i, k in enumerate(sorted(entering[t])):
            if i == 0 and t not in plain:
                pair[t, k] = t
                template[t] = (t, k)
            else:
                pair[t, k] = len(template)
                template.append((t, k))
    out = pynini.Fst()
    out.add_states(len(template))
    out.set_start(fst.start())
    for s, (t, k) in enumerate(template):
        final = float(fst.final(t))
        if math.isfinite(final):
            out.set_final(s, final + exit_[k])
        for arc in fst.arcs(t):
            j = arc.ilabel
            dst = pair.get((arc.nextstate, j), arc.nextstate)
            out.add_arc(s, pynini.Arc(cls[j], arc.olabel, float(arc.weight) + exit_[k], dst))
        if k:
            out.add_arc(s, pynini.Arc(cls[k], 0, loop[k], s))
    return out.arcsort(sort_type="ilabel")  # reference: OpenFst ArcSort (stable)


@st.composite
def wide_graphs_and_kinds(draw):
    """Cyclic graphs whose states have many arcs, few classes shared by several kinds,
    and repeated output labels: every tie the arc order has to break."""
    triples = draw(st.lists(
        st.tuples(st.integers(0, 2), st.sampled_from([0.0, 0.5, 0.75])),
        min_size=1, max_size=6))
    kinds = _kinds([(c, p, 1.0 - p) for c, p in triples])
    n = draw(st.integers(1, 6))
    arcs = [(draw(st.integers(0, n - 1)), draw(st.integers(0, kinds.num_kinds)),
             draw(st.integers(0, 2)), draw(st.sampled_from([0.0, 0.5, 1.25])),
             draw(st.integers(0, n - 1)))
            for _ in range(draw(st.integers(0, 30)))]
    finals = set(draw(st.lists(st.integers(0, n - 1), max_size=3)))
    if not arcs:
        fst = arrays_to_fst(n, 0, [0.5 if i in finals else np.inf for i in range(n)],
                            [], [], [], [], [])
    else:
        fst = _random_graph(n, arcs, finals)
    return fst, kinds


def _arrays(fst: pynini.Fst) -> list[np.ndarray]:
    a = fst_to_arrays(fst)
    return [np.array([a.num_states, a.start]), a.final_weights, a.src, a.ilabel,
            a.olabel, a.weight, a.dst]


@given(wide_graphs_and_kinds(), st.sampled_from([1.0, 0.3]))
def test_self_loops_lay_out_the_documented_construction_arc_sorted(case, scale):
    fst, kinds = case
    got = add_self_loops(fst, kinds, transition_scale=scale)
    want = _construction(fst, kinds, scale)
    for g, w in zip(_arrays(got), _arrays(want)):
        np.testing.assert_array_equal(g, w)
    # Already in the order OpenFst's arc sort gives, and marked as sorted.
    assert got.properties(pynini.I_LABEL_SORTED, False) == pynini.I_LABEL_SORTED
    again = got.copy().arcsort(sort_type="ilabel")
    for g, w in zip(_arrays(got), _arrays(again)):
        np.testing.assert_array_equal(g, w)


@pytest.mark.parametrize("handed", [True, False])
def test_self_loops_release_a_handed_over_input_and_share_their_arrays(monkeypatch, handed):
    """Given as an FstHandoff, the input (and the shared conversion of it) is freed
    before the result is built; the result's registered arrays are what a fresh
    conversion of it gives."""
    import gc
    import weakref

    from netbuild.builders import hmm
    from netbuild.guard import FstHandoff
    from netbuild.io.fstfile import shared_arrays, shared_conversions

    kinds = _kinds([(0, 0.5, 0.5), (1, 0.25, 0.75)])
    base = arrays_to_fst(4, 0, [np.inf, np.inf, np.inf, 0.0], [0, 0, 0, 1, 2, 3],
                         [0, 1, 2, 2, 0, 1], [1, 0, 2, 0, 0, 0], [0.5, 0, 0, 0.25, 0, 0],
                         [1, 2, 3, 3, 3, 3])
    fst = tracked_copy(base)
    want = _arrays(add_self_loops(base, kinds))
    ref = weakref.ref(fst)
    alive: list[bool] = []
    build = hmm.arrays_to_fst

    def spy(*args, **kwargs):
        gc.collect()
        alive.append(ref() is not None)
        return build(*args, **kwargs)

    monkeypatch.setattr(hmm, "arrays_to_fst", spy)
    given = FstHandoff(fst) if handed else fst
    del fst
    with shared_conversions():
        got = add_self_loops(given, kinds)
        shared = shared_arrays(got)  # None unless registered (nothing converted it)
    assert alive == [not handed]
    assert shared is not None and shared.isymbols.find(1) == "e0"
    registered = [np.array([shared.num_states, shared.start]), shared.final_weights,
                  shared.src, shared.ilabel, shared.olabel, shared.weight, shared.dst]
    for r, g, w in zip(registered, _arrays(got), want):  # outside the block: fresh
        np.testing.assert_array_equal(r, w)
        np.testing.assert_array_equal(g, w)
