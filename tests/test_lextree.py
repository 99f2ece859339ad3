"""The word-level pipeline's direct construction (word_graph = "tree") and its fallback."""

from __future__ import annotations

import dataclasses
import random

import pynini
import pytest
from wordgraph_helpers import (bigram_grammar, demo_case, lexicon_for, normalized_bigram,
                               to_log, word_table)

from netbuild import lextree
from netbuild.builders.lexicon import build_lexicon
from netbuild.io.lexicon import Lexicon, Pronunciation
from netbuild.io.phones import PhoneInventory
from netbuild.errors import EmptyCompositionError
from netbuild.options import BuildOptions, LexiconOptions
from netbuild.pipeline import build_word_graph, compose_stage, minimize_stage, num_arcs

_TREE = BuildOptions(determinize_max_memory=1024**3, determinize_timeout=60,
                     word_graph="tree")
_COMPOSE = dataclasses.replace(_TREE, word_graph="compose")


def _names(graph) -> list[str]:
    return [r.name for r in graph.stages]


def test_tree_pipeline_stages_and_equivalence():
    lex, grammar = demo_case()
    tree = build_word_graph(lex, grammar, _TREE, keep_intermediates=True)
    assert _names(tree) == ["grammar", "lexicon", "compose-determinize", "minimize", "push"]
    assert tree.stages[2].details["method"] == "lexicon-tree"
    other = build_word_graph(lex, grammar, _COMPOSE)
    assert _names(other) == ["grammar", "lexicon", "compose", "determinize", "minimize",
                             "push"]
    # reference: OpenFst randequivalent (fst/randequivalent.h), log semiring
    composed = compose_stage(lex.fst, grammar.fst)
    for fst in (tree.fst, other.fst, tree.intermediates["determinized"]):
        assert pynini.randequivalent(to_log(composed), to_log(fst), npath=200, seed=1,
                                     delta=1e-3)
    # reference: OpenFst's encoded minimization of the stage's own input (fst/minimize.h)
    theirs = minimize_stage(tree.intermediates["determinized"])
    mine = tree.intermediates["minimized"]
    assert (mine.num_states(), num_arcs(mine)) == (theirs.num_states(), num_arcs(theirs))
    assert pynini.isomorphic(mine, theirs)


def test_silence_first_pronunciation_falls_back_to_composition():
    words = ["hush", "go"]
    entries = [Pronunciation("hush", ("sil", "a"), 1.0, 1),
               Pronunciation("go", ("k", "e"), 1.0, 2)]
    inventory = PhoneInventory(["a", "e", "k", "sil"], silence=["sil"])
    lex = build_lexicon(Lexicon(entries, "lexicon.txt"), inventory, word_table(words),
                        LexiconOptions(silence_probability=0.5))
    grammar = normalized_bigram(words, random.Random(3))
    inputs, why = lextree.tree_inputs(lex, grammar)
    assert inputs is None and "silence" in why
    graph = build_word_graph(lex, grammar, _TREE)
    assert "compose" in _names(graph)
    composed = compose_stage(lex.fst, grammar.fst)
    assert pynini.randequivalent(to_log(composed), to_log(graph.fst), npath=100, seed=2,
                                 delta=1e-3)


def test_no_markers_means_no_tree():
    lex, grammar = demo_case()
    words = ["cabin", "car", "cart", "stop", "stops", "two", "too"]
    prons = [("cabin", "k a b i n"), ("car", "k a r"), ("cart", "k a r t"),
             ("stop", "s t o p"), ("stops", "s t o p s"), ("two", "t u"), ("too", "t u")]
    bare = lexicon_for(prons, words, disambiguate=False)
    inputs, why = lextree.tree_inputs(bare, grammar)
    assert inputs is None and "prefix" in why
    inputs, why = lextree.tree_inputs(lex, grammar)
    assert inputs is not None and why == ""


def test_no_shared_word_is_an_input_error():
    words = ["cabin", "car"]
    lex = lexicon_for([("cabin", "k a b i n")], words)  # "car" has no pronunciation
    grammar = bigram_grammar(words, {"car": 0.5, "</s>": 0.5}, {}, {})
    with pytest.raises(EmptyCompositionError) as info:
        # checks off: G's unused history states would fail its own check first
        build_word_graph(lex, grammar, dataclasses.replace(_TREE, checks=False))
    assert info.value.stage in ("compose-determinize", "compose")
    assert "no word of the lexicon occurs in the model" in str(info.value)
