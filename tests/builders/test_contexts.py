"""Tests of the enumeration of occurring contexts, the tying and the coverage check.

The enumeration is checked against a brute force written here from scratch: every
phone sequence of the utterances of up to n words (n = the window length) of a tiny
lexicon, with or without silence at each boundary, padded with '$', and its windows.
"""

from __future__ import annotations

import itertools
import pathlib

import pytest

from netbuild.builders.contexts import (check_coverage, model_for, occurring_context_set,
                                        occurring_contexts, occurring_windows, tie_contexts,
                                        visible_context)
from netbuild.errors import Diagnostics, LexiconError
from netbuild.io.context_map import ContextMap, HmmState, Model, TyingRule, read_context_map
from netbuild.io.lexicon import Lexicon, Pronunciation, read_lexicon
from netbuild.io.phones import PhoneInventory, read_phones
from netbuild.options import LexiconOptions

ROPEWAY = pathlib.Path(__file__).parents[2] / "examples" / "ropeway"

INV = PhoneInventory(["a", "i", "t", "k", "sil", "ns"], silence=["sil"], noise=["ns"],
                     classes={"vowel": ["a", "i"], "stop": ["t", "k"]}, path="inv.txt")
# A one-phone word, a word with noise inside, and two longer words (one a homophone).
TINY = Lexicon([Pronunciation("ah", ("a",), 1.0, 1),
                Pronunciation("tick", ("t", "i", "k"), 1.0, 2),
                Pronunciation("tack", ("t", "a", "k"), 1.0, 3),
                Pronunciation("tak", ("t", "a", "k"), 1.0, 4),
                Pronunciation("kns", ("k", "ns", "i"), 1.0, 5)], "tiny.txt")
M = Model("m", (HmmState(0, 0.5, 0.5),))


def cmap_of(left, right, ci_context=False, rules=None, independent=("sil", "ns")):
    rules = rules or [TyingRule(("*",) * left, "*", ("*",) * right, "m")]
    models = {r.model: Model(r.model, M.states) for r in rules}
    return ContextMap(left, right, list(independent), ci_context, models, rules,
                      INV.classes, "map.txt")


# --- the brute force (no code shared with netbuild) -----------------------------------

def seen_by_models(window, left, independent, ci_context):
    """The window as the models see it, written out independently."""
    w = list(window)
    if w[left] in independent:
        return (("*",) * left, w[left], ("*",) * (len(w) - left - 1))
    if not ci_context:
        blocked = False
        for i in range(left - 1, -1, -1):
            blocked = blocked or w[i] == "$" or w[i] in independent
            if blocked:
                w[i] = "$"
        blocked = False
        for i in range(left + 1, len(w)):
            blocked = blocked or w[i] == "$" or w[i] in independent
            if blocked:
                w[i] = "$"
    return (tuple(w[:left]), w[left], tuple(w[left + 1:]))


def brute_force(lexicon, left, right, silence, mode, independent, ci_context, max_words):
    """key -> set of word tuples of utterances showing it."""
    prons = [(e.word, e.phones) for e in lexicon.entries]
    choices = {"none": [False], "optional": [False, True], "always": [True]}[mode]
    found = {}
    for k in range(max_words + 1):
        for words in itertools.product(prons, repeat=k):
            for sils in itertools.product(choices, repeat=k + 1):
                seq = ["$"] * left
                for j in range(k + 1):
                    if sils[j]:
                        seq.append(silence)
                    if j < k:
                        seq.extend(words[j][1])
                seq += ["$"] * right
                n = left + 1 + right
                for s in range(len(seq) - n + 1):
                    window = seq[s:s + n]
                    if window[left] == "$":
                        continue
                    key = seen_by_models(window, left, independent, ci_context)
                    found.setdefault(key, set()).add(tuple(w for w, _ in words))
    return found


def contiguous_in(part, whole):
    return any(tuple(whole[i:i + len(part)]) == tuple(part)
               for i in range(len(whole) - len(part) + 1))


CASES = [  # (left, right, silence probability, independent_is_context)
    (1, 1, 0.5, False), (1, 1, 0.5, True), (1, 1, 0.0, False), (1, 1, 1.0, False),
    (0, 0, 0.5, False), (1, 0, 0.5, False), (0, 1, 1.0, True), (2, 1, 0.5, False),
    (1, 2, 0.5, True), (2, 0, 0.0, False),
]


@pytest.mark.parametrize("left, right, s, ci_context", CASES)
def test_enumeration_equals_brute_force(left, right, s, ci_context):
    cmap = cmap_of(left, right, ci_context)
    got = occurring_contexts(TINY, INV, cmap, LexiconOptions(silence_probability=s))
    mode = "none" if s == 0 else "always" if s == 1 else "optional"
    n = left + 1 + right
    want = brute_force(TINY, left, right, "sil", mode, {"sil", "ns"}, ci_context, max_words=n)
    assert set(got) == set(want)
    for key, prov in got.items():
        # reference: the brute force above; the provenance words occur consecutively in
        # an utterance showing the key, and its raw window shows the key.
        assert seen_by_models(prov.window, left, {"sil", "ns"}, ci_context) == key
        assert any(contiguous_in(prov.words, u) for u in want[key]), (key, prov)
        lines = {e.word: e.line for e in TINY.entries}
        assert prov.lines == tuple(lines[w] for w in prov.words)


@pytest.mark.slow
def test_widths_two_two_equal_brute_force():
    # A window of 5 phones can touch 5 words ('tack ah ah ah tick').
    lex = Lexicon([e for e in TINY.entries if e.word != "tak"], "tiny.txt")
    cmap = cmap_of(2, 2, False)
    got = occurring_contexts(lex, INV, cmap, LexiconOptions(silence_probability=0.5))
    want = brute_force(lex, 2, 2, "sil", "optional", {"sil", "ns"}, False, max_words=5)
    assert (("k", "a"), "a", ("a", "t")) in got
    assert set(got) == set(want)


def test_three_words_suffice_for_triphones():
    # reference: the brief's own statement of the brute force: one-, two- and
    # three-word utterances give every triphone (a window of 3 phones touches at most
    # 3 words).
    got = occurring_contexts(TINY, INV, cmap_of(1, 1), LexiconOptions())
    want = brute_force(TINY, 1, 1, "sil", "optional", {"sil", "ns"}, False, max_words=3)
    assert set(got) == set(want)
    assert (("a",), "a", ("a",)) in got  # 'ah ah ah'
    assert got[(("a",), "a", ("a",))].words == ("ah", "ah", "ah")


def test_no_silence_phone_in_the_inventory():
    inv = PhoneInventory(["a", "i", "t", "k", "ns"], noise=["ns"], classes=INV.classes)
    got = occurring_contexts(TINY, inv, cmap_of(1, 1, independent=("ns",)), LexiconOptions())
    want = brute_force(TINY, 1, 1, None, "none", {"ns"}, False, max_words=3)
    assert set(got) == set(want)


def test_empty_lexicon_leaves_only_silence():
    got = occurring_contexts(Lexicon([], "e.txt"), INV, cmap_of(1, 1), LexiconOptions())
    assert set(got) == {(("*",), "sil", ("*",))}
    assert got[(("*",), "sil", ("*",))].words == ()


def test_unknown_phone_is_a_located_lexicon_error():
    lex = Lexicon([Pronunciation("x", ("a", "q"), 1.0, 7)], "bad.txt")
    with pytest.raises(LexiconError, match=r"bad.txt:7: unknown phone 'q'"):
        occurring_windows(lex, INV, cmap_of(1, 1), LexiconOptions())


def test_raw_windows_keep_the_independent_phones():
    ws = occurring_windows(TINY, INV, cmap_of(1, 1), LexiconOptions())
    raw = {ws.window(i) for i in range(len(ws))}
    assert ("k", "ns", "i") in raw and ("k", "sil", "t") in raw
    cs = occurring_context_set(TINY, INV, cmap_of(1, 1), LexiconOptions())
    assert len(cs) < len(ws)


# --- model_for and tie_contexts ------------------------------------------------------

RULES = [TyingRule(("$",), "@vowel", ("*",), "v.edge", 1),
         TyingRule(("@stop",), "a", ("*",), "a.stop", 2),
         TyingRule(("*",), "@vowel", ("*",), "v", 3),
         TyingRule(("*",), "t", ("@vowel",), "t.v", 4),
         TyingRule(("$",), "sil", ("$",), "sil", 5),
         TyingRule(("k",), "k", ("k",), "never", 6)]


def test_model_for_first_match_classes_edges_and_independent():
    cmap = cmap_of(1, 1, rules=RULES)
    assert model_for(cmap, ("$",), "a", ("t",)).name == "v.edge"
    assert model_for(cmap, ("k",), "a", ("t",)).name == "a.stop"
    assert model_for(cmap, ("k",), "i", ("t",)).name == "v"
    assert model_for(cmap, ("sil",), "a", ("t",)).name == "v.edge"  # sil seen as $
    assert model_for(cmap, ("a",), "t", ("i",)).name == "t.v"
    assert model_for(cmap, ("a",), "t", ("k",)) is None
    # A context-independent centre ignores the rule's context tokens.
    assert model_for(cmap, ("a",), "sil", ("t",)).name == "sil"
    assert model_for(cmap, ("a",), "ns", ("t",)) is None
    yes = cmap_of(1, 1, ci_context=True, rules=RULES)
    assert model_for(yes, ("sil",), "a", ("t",)).name == "v"  # sil seen as itself


def test_visible_context_with_width_two_cuts_at_the_independent_phone():
    cmap = cmap_of(2, 2)
    assert visible_context(cmap, ("a", "sil", "t", "i", "ns")) == (("$", "$"), "t", ("i", "$"))
    assert visible_context(cmap, ("$", "a", "t", "i", "k")) == (("$", "a"), "t", ("i", "k"))
    assert visible_context(cmap, ("a", "i", "ns", "k", "t")) == (("*", "*"), "ns", ("*", "*"))


def test_tie_contexts_agrees_with_model_for_on_all_occurring_contexts():
    cmap = cmap_of(1, 1, rules=RULES)
    contexts = occurring_contexts(TINY, INV, cmap, LexiconOptions())
    mapping, uncovered, unused = tie_contexts(contexts, cmap)
    for ctx in contexts:
        m = model_for(cmap, *ctx)
        assert (mapping.get(ctx) == m.name) if m else ctx in uncovered
    assert set(mapping) | set(uncovered) == set(contexts)
    assert [r.line for r in unused] == [6]


def test_tie_contexts_of_nothing():
    assert tie_contexts([], cmap_of(1, 1, rules=RULES)) == ({}, [], RULES)


# --- the coverage check --------------------------------------------------------------

def test_coverage_reports_uncovered_contexts_with_words_and_unused_rules():
    cmap = cmap_of(1, 1, rules=RULES)
    diag = Diagnostics()
    cov = check_coverage(TINY, INV, cmap, LexiconOptions(), diag)
    errors = [str(p) for p in diag.errors]
    assert cov.uncovered == len(errors)  # fewer than the listing limit
    # 'tick tick': the k of tick followed by t (no rule for k matches it).
    assert any(e.startswith("map.txt:6: context i [k] t has no model; it occurs in "
                            "'tick' 'tick' (tiny.txt:2, 2)") for e in errors), errors
    assert all("rule * k * -> MODEL" in e for e in errors if "[k]" in e)
    warnings = [str(p) for p in diag.warnings]
    assert warnings == ["map.txt:6: rule for 'k' is never used: it matches no context that "
                        "can occur with this lexicon; remove it or move it above the rule "
                        "that wins"]


def test_coverage_caps_the_listing():
    cmap = cmap_of(1, 1, rules=[TyingRule(("*",), "sil", ("*",), "sil", 1)])
    diag = Diagnostics()
    cov = check_coverage(TINY, INV, cmap, LexiconOptions(), diag)
    assert cov.uncovered > 21
    assert len(diag.errors) == 21
    assert f"{cov.uncovered - 20} more contexts" in str(diag.errors[-1])


def test_shadowed_rule_is_named_as_such():
    rules = [TyingRule(("*",), "*", ("*",), "m", 1), TyingRule(("*",), "a", ("*",), "m", 2)]
    diag = Diagnostics()
    check_coverage(TINY, INV, cmap_of(1, 1, rules=rules), LexiconOptions(), diag)
    assert diag.errors == []
    assert [str(w).split(": rule")[0] for w in diag.warnings] == ["map.txt:2"]
    assert "taken by an earlier rule" in str(diag.warnings[0])


def test_demo_map_covers_the_demo_lexicon():
    inv = read_phones(ROPEWAY / "inventory.txt")
    opts = LexiconOptions(has_probabilities=True, silence_probability=0.5)
    lex = read_lexicon(ROPEWAY / "lexicon.txt", inv, opts)
    cmap = read_context_map(ROPEWAY / "context.txt", inv)
    diag = Diagnostics()
    cov = check_coverage(lex, inv, cmap, opts, diag)
    assert diag.problems == []
    assert cov.uncovered == 0 and cov.models_used == len(cmap.models)
