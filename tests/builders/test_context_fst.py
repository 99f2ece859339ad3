"""Tests of the context transducer C (netbuild.builders.context), by brute force."""

from __future__ import annotations

import itertools

import pynini
import pytest

from netbuild.builders.context import build_context, window_models
from netbuild.builders.contexts import visible_context
from netbuild.builders.hmm import make_model_symbols
from netbuild.io.context_map import EDGE, ContextMap, HmmState, Model
from netbuild.symbols import BACKOFF, disambiguation_marker, make_symbol_table

PHONES = ["a", "b", "c", "sil"]
TABLE = make_symbol_table("phones", [*PHONES, BACKOFF, disambiguation_marker(1)])


def _cmap(left: int, right: int, ci_context: bool = False) -> ContextMap:
    return ContextMap(left=left, right=right, independent=["sil"],
                      independent_is_context=ci_context, models={}, rules=[],
                      path="test.ctx")


def _windows_of(seq: tuple[str, ...], cmap: ContextMap) -> list[tuple[str, ...]]:
    """The raw windows of `seq` padded with the edge: for each phone, the `left`
    tokens before it, the phone and the `right` tokens after it."""  # common practice, no source
    pad = (EDGE,) * cmap.left + tuple(seq) + (EDGE,) * cmap.right
    n = cmap.left + 1 + cmap.right
    return [pad[i:i + n] for i in range(len(seq))]


def _name(window: tuple[str, ...], cmap: ContextMap) -> str:
    """A model per visible context (no tying), named after it."""
    left, centre, right = visible_context(cmap, window)
    return f"m_{'.'.join(left)}-{centre}+{'.'.join(right)}"


def _with_models(cmap: ContextMap, contexts: dict) -> ContextMap:
    names = sorted(set(contexts.values()))
    cmap.models = {n: Model(n, (HmmState(0, 0.5, 0.5),)) for n in names}
    return cmap


def _models_for(c: pynini.Fst, phones: tuple[str, ...]) -> set[tuple[str, ...]]:
    """Every model sequence C maps to the phone string `phones` (by composition)."""
    acc = pynini.Fst()
    acc.add_states(len(phones) + 1)
    acc.set_start(0)
    for i, p in enumerate(phones):
        k = TABLE.find(p)
        acc.add_arc(i, pynini.Arc(k, k, 0, i + 1))
    acc.set_final(len(phones))
    out = pynini.project(pynini.compose(c, acc), "input").rmepsilon()
    if out.start() == pynini.NO_STATE_ID:
        return set()
    syms = c.input_symbols()
    found = set()
    it = out.paths()
    while not it.done():
        found.add(tuple(syms.find(k) for k in it.ilabels()))
        it.next()
    return found


@pytest.mark.parametrize("left,right,ci_context", [(1, 1, False), (0, 0, False),
                                                   (2, 1, False), (1, 2, True),
                                                   (0, 1, False), (1, 0, True)])
def test_every_phone_sequence_maps_to_its_model_sequence(left, right, ci_context):
    cmap = _cmap(left, right, ci_context)
    # The "utterances": every sequence of up to 4 phones.
    seqs = [s for n in range(1, 5) for s in itertools.product(PHONES, repeat=n)]
    contexts = {ctx: _name(ctx, cmap) for s in seqs for ctx in _windows_of(s, cmap)}
    _with_models(cmap, contexts)
    c = build_context(contexts, cmap, TABLE, make_model_symbols(cmap, TABLE))
    for s in seqs:
        want = tuple(_name(ctx, cmap) for ctx in _windows_of(s, cmap))
        assert _models_for(c, s) == {want}, s  # brute force: exactly one model sequence
    assert _models_for(c, ()) == {()}


@pytest.mark.parametrize("left,right", [(1, 1), (2, 1), (0, 0), (1, 2)])
def test_only_occurring_contexts_are_built(left, right):
    cmap = _cmap(left, right)
    words = [("a", "b"), ("b", "a", "c"), ("sil",)]
    seqs = [sum(ws, ()) for n in (1, 2) for ws in itertools.product(words, repeat=n)]
    contexts = {ctx: _name(ctx, cmap) for s in seqs for ctx in _windows_of(s, cmap)}
    _with_models(cmap, contexts)
    c = build_context(contexts, cmap, TABLE, make_model_symbols(cmap, TABLE))
    for s in seqs:
        want = tuple(_name(ctx, cmap) for ctx in _windows_of(s, cmap))
        assert _models_for(c, s) == {want}, s
    # "c c" never occurs (no word has it, and no word starts with c): C rejects it
    # (monophones have no context, so every monophone sequence is possible).
    if left + right:
        assert _models_for(c, ("a", "b", "c", "c")) == set()
    everything = {ctx for n in range(1, 4) for s in itertools.product(PHONES, repeat=n)
                  for ctx in _windows_of(s, cmap)}
    if left + right:
        assert len(contexts) < len(everything)
        assert c.num_states() < len(everything)


def test_markers_pass_through_every_state():
    cmap = _cmap(1, 1)
    seqs = [s for n in range(1, 4) for s in itertools.product(PHONES, repeat=n)]
    contexts = {ctx: _name(ctx, cmap) for s in seqs for ctx in _windows_of(s, cmap)}
    _with_models(cmap, contexts)
    models = make_model_symbols(cmap, TABLE)
    c = build_context(contexts, cmap, TABLE, models)
    for marker in (BACKOFF, "!amb1"):
        m_in, m_out = models.find(marker), TABLE.find(marker)
        for s in c.states():
            loops = [a for a in c.arcs(s) if a.nextstate == s and a.olabel == m_out]
            assert len(loops) == 1 and loops[0].ilabel == m_in
    got = _models_for(c, ("a", BACKOFF, "b"))
    want = tuple(_name(x, cmap) for x in _windows_of(("a", "b"), cmap))
    # The marker passes through where it stands on the phone side; with the delay of
    # one phone the model of "a" is only written when "b" is read, after the marker.
    assert got == {(BACKOFF, want[0], want[1])}


def test_tying_shares_models_and_ci_phones_hide_their_context():
    cmap = _cmap(1, 1)
    seqs = [s for n in range(1, 4) for s in itertools.product(PHONES, repeat=n)]
    windows = {w for s in seqs for w in _windows_of(s, cmap)}
    # Tie by centre only, except that "a" before the edge is a model of its own.
    tying = {visible_context(cmap, w): ("a_end" if visible_context(cmap, w)[1:] ==
                                        ("a", ("$",)) else "m_" + w[1]) for w in windows}
    contexts = window_models(windows, tying, cmap)
    assert len(contexts) == len(windows)
    _with_models(cmap, contexts)
    c = build_context(contexts, cmap, TABLE, make_model_symbols(cmap, TABLE))
    # reference: the context-independent rule of netbuild.builders.contexts
    # (a context-independent neighbour reads as the edge when it is not context)
    assert _models_for(c, ("b", "a", "sil")) == {("m_b", "a_end", "m_sil")}
    assert _models_for(c, ("b", "a", "c")) == {("m_b", "m_a", "m_c")}
    assert _models_for(c, ("a",)) == {("a_end",)}
