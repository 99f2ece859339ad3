"""The optimized word-level graph against the unoptimized L∘G.

# reference: OpenFst randequivalent (fst/randequivalent.h; pynini.randequivalent),
# random-path equivalence in the log semiring after arcmap to_log on both sides.

Why the auxiliary markers are kept on both sides rather than removed on both: with the
markers, every (phones, words) pair has a single path in L∘G (homophones differ in
their marker, a back-off path differs from a direct one in the !backoff label), so the
tropical determinization loses nothing and the log-semiring sums of the two graphs must
agree. With the markers removed (relabelled to epsilon), a word sequence reachable both
directly and through back-off would have two paths with the same labels: L∘G would sum
them in the log semiring while the determinized graph kept only the cheaper one, and
the test would fail for a reason that is not a bug.
"""

from __future__ import annotations

import os
import random

import pynini
import pytest
from wordgraph_helpers import lexicon_for, normalized_bigram, to_log

import dataclasses

from netbuild.options import BuildOptions
from netbuild.pipeline import build_word_graph, compose_stage

_OPTS = BuildOptions(determinize_max_memory=2 * 1024**3, determinize_timeout=120)
_DEMO = os.path.join(os.path.dirname(__file__), "..", "..", "examples", "ropeway",
                     "project.toml")


def _generated_case(num_words: int, seed: int):
    rng = random.Random(seed)
    phones = [f"p{i}" for i in range(12)]
    words = [f"word{i}" for i in range(num_words)]
    prons = [(w, " ".join(rng.choice(phones) for _ in range(rng.randint(1, 4))))
             for w in words]
    prons += [(rng.choice(words), " ".join(rng.choice(phones) for _ in range(2)))
              for _ in range(num_words // 5)]
    return lexicon_for(prons, words), normalized_bigram(words, rng, followers=4)


@pytest.mark.parametrize("method", ["tree", "compose"])
@pytest.mark.parametrize("num_words,seed", [(30, 1), (120, 2)])
def test_generated_word_graph_equals_composition(num_words, seed, method):
    lex, grammar = _generated_case(num_words, seed)
    wg = build_word_graph(lex, grammar, dataclasses.replace(_OPTS, word_graph=method))
    assert [r.name for r in wg.stages][2] == ("compose-determinize" if method == "tree"
                                              else "compose")
    composed = compose_stage(lex.fst, grammar.fst)
    assert wg.fst.num_states() > 0
    assert pynini.randequivalent(to_log(composed), to_log(wg.fst), npath=300, seed=11,
                                 delta=1e-2, max_length=60)


def test_equivalence_test_can_fail():
    """The same check rejects a graph with one changed weight (it is not vacuous)."""
    lex, grammar = _generated_case(30, 1)
    wg = build_word_graph(lex, grammar, _OPTS)
    broken = wg.fst.copy()
    s = broken.start()
    arcs = list(broken.arcs(s))
    broken.delete_arcs(s)
    for i, a in enumerate(arcs):
        w = float(a.weight) + (1.0 if i == 0 else 0.0)
        broken.add_arc(s, pynini.Arc(a.ilabel, a.olabel, w, a.nextstate))
    composed = compose_stage(lex.fst, grammar.fst)
    assert not pynini.randequivalent(to_log(composed), to_log(broken), npath=300, seed=11,
                                     delta=1e-2, max_length=60)


@pytest.mark.slow
def test_ropeway_demo_word_graph_equals_composition(tmp_path):
    """The demo's optimized word-level graph (determinized, minimized, pushed) against
    its unoptimized L∘G, both with markers (reference: OpenFst randequivalent)."""
    from netbuild.project import read_project
    from netbuild.workflow import build, load_build

    result = build(read_project(_DEMO), tmp_path / "demo")
    loaded = load_build(tmp_path / "demo")  # (a full build keeps G and L only on disk)
    composed = compose_stage(loaded.lexicon, loaded.grammar)
    final = result.graph.fst
    assert final.num_states() < composed.num_states()
    assert pynini.randequivalent(to_log(composed), to_log(final), npath=500, seed=3,
                                 delta=1e-2, max_length=200)
