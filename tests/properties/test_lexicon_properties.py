"""Property tests of the lexicon reader and the lexicon transducer over random lexicons."""

from __future__ import annotations

import math
import os
import tempfile

import pynini
import pytest
from hypothesis import given, strategies as st

from netbuild.builders.lexicon import build_lexicon, build_single_word_lexicon
from netbuild.errors import LexiconError
from netbuild.io.lexicon import Lexicon, Pronunciation, read_lexicon, write_lexicon
from netbuild.io.phones import PhoneInventory
from netbuild.options import LexiconOptions
from netbuild.symbols import BACKOFF, make_symbol_table

PHONES = ["a", "b", "c", "ŋ"]
INV = PhoneInventory(["sil", *PHONES], silence=["sil"], path="random.phones")
PROB = LexiconOptions(has_probabilities=True)

words_st = st.text(alphabet="xyzé'-", min_size=1, max_size=4)
phones_st = st.lists(st.sampled_from(PHONES), min_size=1, max_size=3).map(tuple)
prob_st = st.floats(min_value=1e-6, max_value=1.0, exclude_min=True)
entry_st = st.tuples(words_st, phones_st, prob_st)
lexicon_st = st.lists(entry_st, min_size=1, max_size=8)


def to_lexicon(entries) -> Lexicon:
    return Lexicon([Pronunciation(w, ph, p, i + 1) for i, (w, ph, p) in enumerate(entries)],
                   "random.lex")


def word_table(lex: Lexicon) -> pynini.SymbolTable:
    return make_symbol_table("words", [*lex.words(), BACKOFF])


def outputs(result, fst: pynini.Fst, labels: list[str]) -> set[tuple[str, ...]]:
    """Returns the output word sequences of `fst` for the label string `labels`."""
    syms = result.phone_symbols
    a = pynini.Fst()
    a.add_state()
    a.set_start(0)
    for lab in labels:
        s = a.add_state()
        a.add_arc(s - 1, pynini.Arc(syms.find(lab), syms.find(lab), 0, s))
    a.set_final(a.num_states() - 1)
    out = pynini.compose(a, fst.copy().arcsort("ilabel")).project("output").rmepsilon()
    if out.start() == pynini.NO_STATE_ID:
        return set()
    words = fst.output_symbols()
    found = set()
    paths = out.paths()
    while not paths.done():
        found.add(tuple(words.find(o) for o in paths.olabels()))
        paths.next()
    return found


def marked(result) -> dict[tuple[str, tuple[str, ...]], str]:
    """Returns (word, phones) -> the marker L appends to that pronunciation."""
    return {(m.word, m.phones): f"!amb{m.marker}" for m in result.markers}


@given(lexicon_st)
def test_round_trip_through_text(entries):
    lex = to_lexicon(entries)
    with tempfile.TemporaryDirectory() as tmp:
        path = os.path.join(tmp, "random.lex")
        write_lexicon(lex, path, with_probabilities=True)
        back = read_lexicon(path, INV, PROB)
    first: dict[tuple, Pronunciation] = {}
    for e in lex.entries:
        first.setdefault((e.word, e.phones, e.probability), e)
    assert back.entries == list(first.values())
    assert back.path == path


CORRUPTIONS = {
    "unknown phone": lambda w, ph, p: f"{w} {p!r} {' '.join(ph)} q",
    "no phones": lambda w, ph, p: f"{w} {p!r}",
    "bad probability": lambda w, ph, p: f"{w} {p + 1.5!r} {' '.join(ph)}",
    "not a number": lambda w, ph, p: f"{w} p{p!r} {' '.join(ph)}",
    "reserved word": lambda w, ph, p: f"!{w} {p!r} {' '.join(ph)}",
}


@given(lexicon_st, st.data(), st.sampled_from(sorted(CORRUPTIONS)),
       st.booleans())
def test_corruption_gives_located_error(entries, data, kind, bad_bytes):
    k = data.draw(st.integers(0, len(entries) - 1), label="line")
    lines = [f"{w} {p!r} {' '.join(ph)}" for w, ph, p in entries]
    lines[k] = CORRUPTIONS[kind](*entries[k])
    payload = "\n".join(lines).encode("utf-8") + b"\n"
    if bad_bytes:  # the same line also holds a byte that is not UTF-8
        raw = payload.split(b"\n")
        raw[k] = raw[k] + b"\xff"
        payload = b"\n".join(raw)
    with tempfile.TemporaryDirectory() as tmp:
        path = os.path.join(tmp, "bad.lex")
        with open(path, "wb") as f:
            f.write(payload)
        with pytest.raises(LexiconError) as info:
            read_lexicon(path, INV, PROB)
    assert [p.line for p in info.value.problems] == [k + 1]
    assert str(info.value).startswith(f"{path}:{k + 1}: ")


def distinct(entries):
    return list(dict.fromkeys((w, ph) for w, ph, _ in entries))


@given(lexicon_st)
def test_every_word_maps_to_exactly_its_pronunciations(entries):
    lex = to_lexicon(entries)
    r = build_single_word_lexicon(lex, INV, word_table(lex))
    marks = marked(r)
    prons = distinct(entries)
    # Brute force: the words listed with each phone sequence.
    by_phones: dict[tuple[str, ...], set[str]] = {}
    for w, ph in prons:
        by_phones.setdefault(ph, set()).add(w)
    for w, ph in prons:
        labels = [*ph, *([marks[(w, ph)]] if (w, ph) in marks else [])]
        assert outputs(r, r.fst, labels) == {(w,)}
        # Without its marker the phones alone read as the unmarked words only.
        unmarked = {(v,) for v in by_phones[ph] if (v, ph) not in marks}
        assert outputs(r, r.fst, list(ph)) == unmarked
    # Each word's inputs are exactly its listed pronunciations (markers removed).
    for word in lex.words():
        wid = r.fst.output_symbols().find(word)
        acc = pynini.Fst()
        acc.add_states(2)
        acc.set_start(0)
        acc.set_final(1)
        acc.add_arc(0, pynini.Arc(wid, wid, 0, 1))
        acc.set_output_symbols(r.fst.output_symbols())
        acc.set_input_symbols(r.fst.output_symbols())
        ins = pynini.compose(r.fst, acc).project("input").rmepsilon()
        syms = r.phone_symbols
        got = set()
        paths = ins.paths()
        while not paths.done():
            got.add(tuple(syms.find(i) for i in paths.ilabels()
                          if not syms.find(i).startswith("!")))
            paths.next()
        assert got == {ph for w, ph in prons if w == word}


@given(lexicon_st, st.lists(st.tuples(st.integers(0, 7), st.booleans()), min_size=1,
                            max_size=3))
def test_closure_with_markers_reads_each_word_sequence_once(entries, picks):
    lex = to_lexicon(entries)
    r = build_lexicon(lex, INV, word_table(lex))
    marks = marked(r)
    prons = distinct(entries)
    labels: list[str] = []
    seq = []
    for i, sil in picks:
        w, ph = prons[i % len(prons)]
        labels += [*ph, *([marks[(w, ph)]] if (w, ph) in marks else [])]
        labels += ["sil"] if sil else []
        seq.append(w)
    assert outputs(r, r.fst, labels) == {tuple(seq)}


def word_loop(words: pynini.SymbolTable) -> pynini.Fst:
    loop = pynini.Fst()
    loop.add_state()
    loop.set_start(0)
    loop.set_final(0)
    for i in range(1, words.num_symbols()):
        loop.add_arc(0, pynini.Arc(words.get_nth_key(i), words.get_nth_key(i), 0, 0))
    loop.set_input_symbols(words)
    loop.set_output_symbols(words)
    return loop.arcsort("ilabel")


with_ambiguity_st = lexicon_st.map(
    # a homophone pair and a prefix pair in every lexicon
    lambda e: [("xx", ("a", "b"), 0.5), ("yy", ("a", "b"), 0.5), ("zz", ("a",), 1.0), *e])


@given(with_ambiguity_st)
def test_with_markers_lexicon_composed_with_word_loop_determinizes(entries):
    lex = to_lexicon(entries)
    words = word_table(lex)
    r = build_lexicon(lex, INV, words)
    lg = pynini.compose(r.fst, word_loop(words))
    det = pynini.determinize(lg)
    assert det.properties(pynini.I_DETERMINISTIC, True) == pynini.I_DETERMINISTIC
    marks = marked(r)
    for w, ph in distinct(entries):
        labels = [*ph, *([marks[(w, ph)]] if (w, ph) in marks else [])]
        assert outputs(r, det, labels) == outputs(r, lg, labels) == {(w,)}


@given(lexicon_st)
def test_without_markers_a_homophone_pair_is_not_functional(entries):
    # The single-word transducer is acyclic, so determinization terminates; on the
    # closure a non-functional input may make it run forever instead.
    lex = to_lexicon([("xx", ("a", "b"), 1.0), ("yy", ("a", "b"), 1.0), *entries])
    words = word_table(lex)
    r = build_single_word_lexicon(lex, INV, words, disambiguate=False)
    lw = pynini.compose(r.fst, word_loop(words))
    # reference: pynini.determinize docstring - functional determinization of a
    # non-functional transducer is an error (OpenFst reports unequal string weights).
    with pytest.raises(pynini.FstOpError):
        pynini.determinize(lw)
    marked_r = build_single_word_lexicon(lex, INV, words)
    det = pynini.determinize(pynini.compose(marked_r.fst, word_loop(words)))
    assert det.properties(pynini.I_DETERMINISTIC, True) == pynini.I_DETERMINISTIC


def test_without_markers_the_closure_of_a_homophone_pair_is_not_functional():
    lex = to_lexicon([("xx", ("a", "b"), 1.0), ("yy", ("a", "b"), 1.0), ("zz", ("c",), 1.0)])
    words = word_table(lex)
    lg = pynini.compose(build_lexicon(lex, INV, words, disambiguate=False).fst,
                        word_loop(words))
    with pytest.raises(pynini.FstOpError):
        pynini.determinize(lg)


def test_costs_of_random_lexicon_match_formula():
    entries = [("xx", ("a", "b"), 0.2), ("xx", ("a", "c"), 0.8), ("yy", ("b",), 0.5)]
    lex = to_lexicon(entries)
    r = build_single_word_lexicon(lex, INV, word_table(lex), LexiconOptions())
    got = pynini.shortestdistance(pynini.compose(
        pynini.accep("a b", token_type=r.phone_symbols), r.fst), reverse=True)[0]
    # common practice, no source: rescaled cost -ln(p / max p) = -ln(0.2 / 0.8)
    assert float(got) == pytest.approx(-math.log(0.25), abs=1e-5)
