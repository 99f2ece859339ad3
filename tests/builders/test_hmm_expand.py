"""H∘CLG built directly (netbuild.builders.hmm_expand) against OpenFst's composition.

Reference: OpenFst's own ``compose(H, CLG, connect=True)`` (fst/compose.h) and, to
compare the two machines, OpenFst's Isomorphic (fst/isomorphic.h) and RandEquivalent
(fst/randequivalent.h).

Why the isomorphism is tested on a relabelled CLG. OpenFst's Isomorphic matches the
arcs of two states after sorting them by labels and weight; when a state has two arcs
with the same input label, output label and weight but different destinations it
gives up ("Cannot determine if inputs are isomorphic") and returns False. H∘CLG has
such states as soon as two models with the same first kind leave one CLG state
towards different states with the same word and weight (the ropeway demo has them).
So each test also builds CLG' -- CLG with every arc's output label replaced by its
own arc number -- and requires ``expand_models(CLG')`` to be isomorphic to
``compose(H, CLG')``. The construction copies output labels without looking at them
(they only ride on each chain's first arc), so this checks every state, arc, chain
and weight; on the real CLG both are compared by their state and arc counts and by
RandEquivalent.
"""

from __future__ import annotations

import dataclasses
import math
from pathlib import Path

import numpy as np
import pynini
import pytest
import pywrapfst
from hypothesis import given, settings
from hypothesis import strategies as st
from fst_helpers import monophone_map as _cmap

import netbuild.full_pipeline as full_pipeline
from netbuild.builders.hmm import build_hmm, make_model_symbols
from netbuild.builders.hmm_expand import expand_models, model_chains
from netbuild.io.context_map import ContextMap, HmmState
from netbuild.io.fstfile import (arrays_to_fst, fst_to_arrays, shared_arrays,
                                 shared_conversions)
from netbuild.project import read_project
from netbuild.symbols import BACKOFF, disambiguation_marker, make_symbol_table
from netbuild.workflow import build

ROOT = Path(__file__).resolve().parents[2]
DEMO = ROOT / "examples" / "ropeway" / "project.toml"
DATA = ROOT / "tests" / "data" / "full"
PHONES = make_symbol_table("phones", ["a", "b", BACKOFF, disambiguation_marker(1),
                                      disambiguation_marker(2)])
WORDS = make_symbol_table("words", ["w1", "w2", "w3"])


CMAP = _cmap({
    "m_a": [(0, 0.6, 0.4), (1, 0.5, 0.5), (2, 0.7, 0.3)],
    "m_b": [(0, 0.6, 0.4), (1, 0.5, 0.5)],  # same first kind as m_a, one state shorter
    "m_c": [(4, 0.9, 0.1)],
})


def _hmm(cmap: ContextMap = CMAP) -> tuple[pynini.Fst, pynini.SymbolTable]:
    models = make_model_symbols(cmap, PHONES)
    hfst, _ = build_hmm(cmap, models)
    return hfst, models


def _fst(num_states: int, start: int, finals, arcs, isymbols=None, osymbols=None
         ) -> pynini.Fst:
    """An FST from (src, ilabel, olabel, weight, dst) tuples."""
    cols = [np.array(c) for c in zip(*arcs)] if arcs else [np.zeros(0)] * 5
    src, il, ol, w, dst = cols
    return arrays_to_fst(num_states, start, np.array(finals, dtype=np.float32),
                         src.astype(np.int32), il.astype(np.int32), ol.astype(np.int32),
                         w.astype(np.float32), dst.astype(np.int32),
                         isymbols=isymbols, osymbols=osymbols)


def _num_arcs(fst: pynini.Fst) -> int:
    return sum(fst.num_arcs(s) for s in fst.states())


def _composed(hfst: pynini.Fst, clg: pynini.Fst) -> pynini.Fst:
    # reference: OpenFst compose with connect (fst/compose.h), as the stage called it
    return pynini.compose(pynini.arcsort(hfst, sort_type="olabel"), clg, connect=True)


def _with_arc_ids(clg: pynini.Fst) -> pynini.Fst:
    """CLG with each arc's output label replaced by its arc number + 1 (see module)."""
    a = fst_to_arrays(clg)
    return arrays_to_fst(a.num_states, a.start, a.final_weights, a.src, a.ilabel,
                         np.arange(1, a.num_arcs + 1, dtype=np.int32), a.weight, a.dst,
                         isymbols=a.isymbols)


def assert_same_as_composition(hfst: pynini.Fst, clg: pynini.Fst) -> pynini.Fst:
    """Checks expand_models against OpenFst's composition; returns the expansion."""
    chains = model_chains(hfst)
    assert chains is not None
    ids = _with_arc_ids(clg)
    got, want = expand_models(ids, chains), _composed(hfst, ids)
    assert (got.num_states(), _num_arcs(got)) == (want.num_states(), _num_arcs(want))
    # reference: OpenFst Isomorphic (fst/isomorphic.h); arcs told apart by their ids
    assert pynini.isomorphic(got, want, delta=1e-6)
    real, ref = expand_models(clg, chains), _composed(hfst, clg)
    assert (real.num_states(), _num_arcs(real)) == (ref.num_states(), _num_arcs(ref))
    if ref.num_states():
        # reference: OpenFst RandEquivalent (fst/randequivalent.h)
        assert pynini.randequivalent(real, ref, npath=50, seed=5, max_length=30,
                                     delta=1e-4)
    return real


# ------------------------------------------------------------------ model_chains


def test_chains_are_the_models_kind_sequences():
    hfst, models = _hmm()
    chains = model_chains(hfst)
    assert chains is not None
    kinds = hfst.input_symbols()
    for name, model in CMAP.models.items():
        m = models.find(name)
        # Independently of the arrays: H's input strings for the output string "m".
        # reference: OpenFst compose / shortestpath over H
        path = pynini.compose(hfst, pynini.accep(name, token_type=models))
        seq = pynini.shortestpath(path).project("input").rmepsilon().topsort()
        labels = [a.ilabel for s in seq.states() for a in seq.arcs(s)]
        got = chains.kinds[chains.offset[m]: chains.offset[m] + chains.length[m]]
        assert got.tolist() == labels
        assert len(labels) == len(model.states)
        assert chains.hub_label[m] == labels[0]
    for marker in (BACKOFF, disambiguation_marker(1), disambiguation_marker(2)):
        assert chains.hub_label[models.find(marker)] == kinds.find(marker)
        assert chains.length[models.find(marker)] == 0


def _variant(hfst: pynini.Fst, change) -> pynini.Fst:
    a = fst_to_arrays(hfst)
    a = dataclasses.replace(a, final_weights=a.final_weights.copy(), src=a.src.copy(),
                            ilabel=a.ilabel.copy(), olabel=a.olabel.copy(),
                            weight=a.weight.copy(), dst=a.dst.copy())
    num_states = change(a) or a.num_states
    return arrays_to_fst(num_states, a.start, a.final_weights[:num_states], a.src,
                         a.ilabel, a.olabel, a.weight, a.dst, isymbols=a.isymbols,
                         osymbols=a.osymbols)


def _weighted(a):
    a.weight[0] = 0.5


def _chain_state_final(a):
    a.final_weights[1] = 0.0


def _input_epsilon(a):
    a.ilabel[-1] = 0


def _branching_chain(a):
    # a second arc leaves the first chain state
    a.src = np.append(a.src, 1)
    a.ilabel = np.append(a.ilabel, 1)
    a.olabel = np.append(a.olabel, 0)
    a.weight = np.append(a.weight, 0.0)
    a.dst = np.append(a.dst, 0)


def _model_twice(a):
    # m_b's first arc writes m_a instead: two chains for one model
    first = np.flatnonzero((a.src == 0) & (a.olabel == 2))[0]
    a.olabel[first] = 1


def _marker_names_differ(a):
    loop = np.flatnonzero((a.src == 0) & (a.dst == 0) & (a.olabel > 3))
    a.ilabel[loop[0]] = a.ilabel[loop[1]]


def _chain_writes_a_word(a):
    a.olabel[np.flatnonzero(a.src == 1)[0]] = 3


def _lone_cycle(a):
    # two extra states that form a cycle nothing enters from the hub
    n = a.num_states
    a.final_weights = np.append(a.final_weights, [np.inf, np.inf]).astype(np.float32)
    a.src = np.append(a.src, [n, n + 1])
    a.ilabel = np.append(a.ilabel, [1, 1])
    a.olabel = np.append(a.olabel, [0, 0])
    a.weight = np.append(a.weight, [0.0, 0.0])
    a.dst = np.append(a.dst, [n + 1, n])
    return n + 2


@pytest.mark.parametrize("change", [_weighted, _chain_state_final, _input_epsilon,
                                    _branching_chain, _model_twice, _marker_names_differ,
                                    _chain_writes_a_word, _lone_cycle])
def test_chains_refuse_other_shapes(change):
    hfst, _ = _hmm()
    assert model_chains(_variant(hfst, lambda a: None)) is not None  # the unchanged copy
    assert model_chains(_variant(hfst, change)) is None


def test_chains_need_symbol_tables_and_start_zero():
    hfst, _ = _hmm()
    bare = hfst.copy()
    bare.set_output_symbols(None)
    assert model_chains(bare) is None
    moved = hfst.copy()
    moved.set_start(1)
    assert model_chains(moved) is None


# ------------------------------------------------------------------ expand_models


def test_small_clg_with_shared_chains_markers_epsilon_and_finals():
    hfst, models = _hmm()
    m_a, m_b, m_c = (models.find(n) for n in ("m_a", "m_b", "m_c"))
    backoff, amb1 = models.find(BACKOFF), models.find(disambiguation_marker(1))
    # Two m_a arcs into state 2 share one chain; m_a into state 3 gets its own; m_b
    # leaves state 0 with m_a's first kind, word and weight (a tie for Isomorphic).
    arcs = [(0, m_a, 1, 0.5, 2), (0, m_b, 1, 0.5, 3), (1, m_a, 0, 0.25, 2),
            (0, 0, 2, 1.0, 1), (1, backoff, 0, 0.75, 3), (2, m_c, 3, 0.0, 3),
            (3, amb1, 0, 0.0, 0), (0, m_a, 2, 2.0, 3), (3, 0, 0, 0.5, 2)]
    clg = _fst(4, 0, [np.inf, np.inf, 1.5, 0.0], arcs, models, WORDS)
    got = assert_same_as_composition(hfst, clg)
    # (0,q) keeps q; chains: (m_a, 2), (m_b, 3), (m_a, 3) with 2 + 1 + 2 states
    assert got.num_states() == 4 + 5
    assert _num_arcs(got) == len(arcs) + 5
    assert got.properties(pywrapfst.I_LABEL_SORTED, True) == pywrapfst.I_LABEL_SORTED
    assert got.input_symbols().name() == hfst.input_symbols().name()
    assert got.output_symbols().name() == "words"
    assert [float(got.final(q)) for q in range(4)] == [math.inf, math.inf, 1.5, 0.0]
    # the word and the weight sit on the chain's first arc, as composition puts them
    first = [a for a in got.arcs(0) if a.olabel == 2 and a.ilabel != 0]
    assert [float(a.weight) for a in first] == [2.0]


def test_clg_arrays_give_the_same_machine_as_the_fst():
    hfst, models = _hmm()
    arcs = [(0, models.find("m_a"), 1, 0.5, 1), (1, models.find("m_c"), 2, 0.0, 0)]
    clg = _fst(2, 0, [np.inf, 0.0], arcs, models, WORDS)
    chains = model_chains(hfst)
    a, b = expand_models(clg, chains), expand_models(fst_to_arrays(clg), chains)
    assert pynini.isomorphic(a, b)  # reference: OpenFst Isomorphic


def test_an_unknown_input_label_means_composition():
    hfst, models = _hmm()
    chains = model_chains(hfst)
    words_as_models = _fst(2, 0, [np.inf, 0.0], [(0, models.num_symbols() + 3, 1, 0.0, 1)],
                           models, WORDS)
    assert expand_models(words_as_models, chains) is None


def test_registered_arrays_are_what_a_conversion_gives():
    hfst, models = _hmm()
    arcs = [(0, models.find("m_b"), 1, 0.5, 1), (1, models.find("m_a"), 2, 0.25, 0),
            (1, models.find(BACKOFF), 0, 1.0, 0)]
    clg = _fst(2, 0, [0.0, np.inf], arcs, models, WORDS)
    clg.properties(pywrapfst.ACCESSIBLE | pywrapfst.COACCESSIBLE, True)
    with shared_conversions():
        got = expand_models(clg, model_chains(hfst))
        registered = shared_arrays(got)
    assert registered is not None
    fresh = fst_to_arrays(got)  # outside the block: converted from the FST itself
    for field in ("final_weights", "src", "ilabel", "olabel", "weight", "dst"):
        np.testing.assert_array_equal(getattr(registered, field), getattr(fresh, field))
    assert (registered.num_states, registered.start) == (fresh.num_states, fresh.start)


def test_unconnected_clg_is_trimmed_like_composition():
    hfst, models = _hmm()
    m_a, m_c = models.find("m_a"), models.find("m_c")
    # state 2 is a dead end, state 3 unreachable
    arcs = [(0, m_a, 1, 0.5, 1), (0, m_c, 2, 0.0, 2), (3, m_a, 3, 0.0, 1)]
    clg = _fst(4, 0, [np.inf, 0.0, np.inf, np.inf], arcs, models, WORDS)
    got = assert_same_as_composition(hfst, clg)
    assert got.num_states() == 2 + 2


STATES = [HmmState(c, p, 1.0 - p) for c in range(3) for p in (0.5, 0.25)]


@st.composite
def hmm_and_clg(draw):
    """A random H (models of 1 to 4 states over a few shared kinds) and a random FST
    over its model table: epsilon, model and marker inputs, cycles, ties, dead ends."""
    names = [f"m{i}" for i in range(draw(st.integers(1, 4)))]
    cmap = _cmap({n: [(s.emission_class, s.self_loop, s.forward) for s in
                      draw(st.lists(st.sampled_from(STATES), min_size=1, max_size=4))]
                  for n in names})
    hfst, models = _hmm(cmap)
    ns = draw(st.integers(1, 6))
    state = st.integers(0, ns - 1)
    label = st.integers(0, models.num_symbols() - 1)
    arcs = draw(st.lists(st.tuples(state, label, st.integers(0, 3),
                                   st.sampled_from([0.0, 0.5, 1.25]), state), max_size=14))
    finals = draw(st.lists(st.sampled_from([np.inf, 0.0, 0.75]), min_size=ns, max_size=ns))
    clg = _fst(ns, draw(state), finals, arcs, models, WORDS)
    if draw(st.booleans()):
        clg.connect()  # as the previous stage leaves it (known connected)
    return hfst, clg


@settings(max_examples=150)
@given(hmm_and_clg())
def test_random_clg_expands_to_the_composition(case):
    hfst, clg = case
    assert_same_as_composition(hfst, clg)


# ------------------------------------------------------------------ in the pipeline


def _stage(result, name: str) -> dict:
    return next(s for s in result.manifest["stages"] if s["name"] == name)


@pytest.mark.slow
def test_ropeway_stage_expands_and_equals_the_composition(tmp_path, monkeypatch):
    # (optimized over arc kinds: the model-level plan skips compose-hmm)
    monkeypatch.setattr(full_pipeline, "model_level_plan", lambda hfst, opts: None)
    result = build(read_project(DEMO), tmp_path / "out", keep_intermediates=True)
    assert _stage(result, "compose-hmm")["details"]["method"] == "expansion"
    kept = result.full.intermediates
    clg, hfst, raw = kept["clg"], kept["hmm"], kept["hclg_raw"]
    expanded = assert_same_as_composition(hfst, clg)
    assert pynini.equal(expanded, raw)  # the kept stage result is that machine


def _tiny_project(tmp_path: Path) -> Path:
    project = tmp_path / "project.toml"
    project.write_text(
        f'[inputs]\nphones = "{DATA / "inventory.txt"}"\nlexicon = "{DATA / "lexicon.txt"}"\n'
        f'lm = "{DATA / "bigram.arpa"}"\ncontext = "{DATA / "triphone.ctx"}"\n'
        '[lexicon]\nprobabilities = true\nsilence_probability = 0.3\n'
        '[build]\ndeterminize_max_memory = "1GiB"\n', encoding="utf-8")
    return project


def test_composition_path_stays_reachable_and_agrees(tmp_path, monkeypatch):
    monkeypatch.setattr(full_pipeline, "model_level_plan", lambda hfst, opts: None)
    expanded = build(read_project(_tiny_project(tmp_path)), tmp_path / "a")
    monkeypatch.setattr(full_pipeline, "model_chains", lambda hfst: None)
    composed = build(read_project(_tiny_project(tmp_path)), tmp_path / "b")
    assert _stage(expanded, "compose-hmm")["details"]["method"] == "expansion"
    assert _stage(composed, "compose-hmm")["details"]["method"] == "composition"
    sizes = [[(s["name"], s["states"], s["arcs"]) for s in r.manifest["stages"]]
             for r in (expanded, composed)]
    assert sizes[0] == sizes[1]
    # reference: OpenFst RandEquivalent on the final graphs
    assert pynini.randequivalent(expanded.full.fst, composed.full.fst, npath=200, seed=3,
                                 max_length=40, delta=1e-3)


# Random context maps and lexicons over the tiny inventory, through the whole build.
PHONE_NAMES = ["n", "o", "t", "e", "i", "hush"]
TOKENS = ["n", "o", "t", "e", "i", "@vowel", "@stop", "*", "$"]


@st.composite
def tiny_inputs(draw):
    left, right = draw(st.integers(0, 1)), draw(st.integers(0, 2))
    nmodels = draw(st.integers(1, 4))
    models = []
    for k in range(nmodels):
        states = draw(st.lists(st.sampled_from(STATES), min_size=1, max_size=4))
        models.append(f"model r{k} " + " ".join(
            f"{s.emission_class}:{s.self_loop}:{s.forward}" for s in states))
    rules = []
    for _ in range(draw(st.integers(0, 4))):
        toks = [draw(st.sampled_from(TOKENS)) for _ in range(left)]
        centre = draw(st.sampled_from(PHONE_NAMES[:5]))
        toks += [centre] + [draw(st.sampled_from(TOKENS)) for _ in range(right)]
        rules.append(f"rule {' '.join(toks)} -> r{draw(st.integers(0, nmodels - 1))}")
    catch_all = " ".join(["*"] * left + ["*"] + ["*"] * right)
    rules.append(f"rule {catch_all} -> r{draw(st.integers(0, nmodels - 1))}")
    cmap = "\n".join([f"widths {left} {right}", "independent hush",
                      "independent-context no", *models, *rules]) + "\n"
    words = ["no", "know", "note", "tea", "ten"]
    pron = st.lists(st.sampled_from(PHONE_NAMES[:5]), min_size=1, max_size=3)
    lexicon = []
    for w in words:
        for phones in draw(st.lists(pron, min_size=1, max_size=2, unique_by=tuple)):
            lexicon.append(f"{w} 1.0 {' '.join(phones)}")
    lm = draw(st.sampled_from(["unigram.arpa", "bigram.arpa"]))
    silence = draw(st.sampled_from([0.0, 0.3]))
    return cmap, "\n".join(lexicon) + "\n", lm, silence


@pytest.mark.slow
@settings(max_examples=30)
@given(tiny_inputs())
def test_random_maps_and_lexicons_expand_to_the_composition(tmp_path_factory, inputs):
    cmap, lexicon, lm, silence = inputs
    tmp = tmp_path_factory.mktemp("random")
    (tmp / "context.txt").write_text(cmap, encoding="utf-8")
    (tmp / "lexicon.txt").write_text(lexicon, encoding="utf-8")
    project = tmp / "project.toml"
    project.write_text(
        f'[inputs]\nphones = "{DATA / "inventory.txt"}"\nlexicon = "{tmp / "lexicon.txt"}"\n'
        f'lm = "{DATA / lm}"\ncontext = "{tmp / "context.txt"}"\n'
        f'[lexicon]\nprobabilities = true\nsilence_probability = {silence}\n'
        '[build]\nfinal_optimize = false\n', encoding="utf-8")
    result = build(read_project(project), tmp / "out", keep_intermediates=True)
    assert _stage(result, "compose-hmm")["details"]["method"] == "expansion"
    kept = result.full.intermediates
    expanded = assert_same_as_composition(kept["hmm"], kept["clg"])
    assert pynini.equal(expanded, kept["hclg_raw"])
