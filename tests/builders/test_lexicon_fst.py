"""Unit tests of the lexicon transducer builder."""

from __future__ import annotations

import math
import pathlib

import pynini
import pytest

from netbuild.builders.lexicon import build_lexicon, build_single_word_lexicon
from netbuild.errors import LexiconError, ProjectError, SymbolError
from netbuild.io.lexicon import Lexicon, Pronunciation, read_lexicon
from netbuild.io.phones import PhoneInventory, read_phones
from netbuild.options import LexiconOptions
from netbuild.symbols import BACKOFF, EPSILON, make_symbol_table

DATA = pathlib.Path(__file__).parent.parent / "data" / "lexicon"
INV = read_phones(DATA / "ropeway.phones")
LEX = read_lexicon(DATA / "ropeway.lex", INV, LexiconOptions())
WORDS = make_symbol_table("words", [*LEX.words(), BACKOFF])


def transduce(result, labels: list[str]) -> dict[tuple[str, ...], float]:
    """Returns output word sequence -> lowest cost for the phone/marker string `labels`."""
    syms = result.phone_symbols
    a = pynini.Fst()
    a.add_state()
    a.set_start(0)
    for lab in labels:
        s = a.add_state()
        a.add_arc(s - 1, pynini.Arc(syms.find(lab), syms.find(lab), 0, s))
    a.set_final(a.num_states() - 1)
    out = pynini.compose(a, result.fst).project("output").rmepsilon()
    words = result.fst.output_symbols()
    best: dict[tuple[str, ...], float] = {}
    if out.start() == pynini.NO_STATE_ID:
        return best
    paths = out.paths()
    while not paths.done():
        key = tuple(words.find(o) for o in paths.olabels())
        best[key] = min(best.get(key, math.inf), float(paths.weight()))
        paths.next()
    return best


def test_phone_table_layout_and_markers():
    r = build_lexicon(LEX, INV, WORDS)
    syms = [r.phone_symbols.find(i) for i in range(r.phone_symbols.num_symbols())]
    assert syms == [EPSILON, *INV.phones, BACKOFF, "!amb1", "!amb2", "!amb3"]
    got = {(m.word, m.marker, m.reason) for m in r.markers}
    assert got == {("car", 1, "prefix"),
                   ("rode", 1, "homophone"), ("road", 2, "homophone"),
                   ("low", 1, "homophone"), ("lo", 2, "homophone"),
                   ("to", 1, "homophone"), ("two", 2, "homophone"), ("too", 3, "homophone")}
    assert r.num_markers == 3
    assert r.homophone_groups() == {("r", "o", "u", "d"): ["rode", "road"],
                                    ("l", "o", "u"): ["low", "lo"],
                                    ("t", "u"): ["to", "two", "too"]}
    assert r.skipped_words == []


def test_shape_word_on_first_arc_sorted_and_tables_attached():
    r = build_lexicon(LEX, INV, WORDS)
    f = r.fst
    backoff_word = WORDS.find(BACKOFF)
    assert f.properties(pynini.O_LABEL_SORTED, True) == pynini.O_LABEL_SORTED
    assert f.input_symbols().labeled_checksum() == r.phone_symbols.labeled_checksum()
    assert f.output_symbols().labeled_checksum() == WORDS.labeled_checksum()
    word_arcs = [(s, a) for s in f.states() for a in f.arcs(s)
                 if a.olabel not in (0, backoff_word)]
    # One word arc per pronunciation, all leaving the word-boundary state 0.
    assert len(word_arcs) == len(LEX.entries)
    assert {s for s, _ in word_arcs} == {0}
    loops = [a for a in f.arcs(0) if a.olabel == backoff_word]
    assert len(loops) == 1 and loops[0].nextstate == 0
    assert r.phone_symbols.find(loops[0].ilabel) == BACKOFF
    assert float(f.final(0)) == 0.0


def test_no_epsilon_cycle():
    f = build_lexicon(LEX, INV, WORDS).fst
    eps = pynini.Fst()
    for _ in f.states():
        eps.add_state()
    eps.set_start(0)
    for s in f.states():
        for a in f.arcs(s):
            if a.ilabel == 0:
                eps.add_arc(s, pynini.Arc(0, 0, 0, a.nextstate))
    assert eps.properties(pynini.ACYCLIC, True) == pynini.ACYCLIC
    assert eps.num_arcs(f.start()) == 1 and sum(eps.num_arcs(s) for s in eps.states()) == 1


def test_costs_with_silence_and_markers():
    s = 0.25
    r = build_lexicon(LEX, INV, WORDS, LexiconOptions(silence_probability=s))
    no, yes = -math.log(1 - s), -math.log(s)  # common practice, no source: cost = -ln p
    assert transduce(r, "k a b i n".split()) == {("cabin",): pytest.approx(2 * no, abs=1e-5)}
    assert transduce(r, "pau k a b i n pau".split()) == {
        ("cabin",): pytest.approx(2 * yes, abs=1e-5)}
    assert transduce(r, "k a b i n pau t u !amb2".split()) == {
        ("cabin", "two"): pytest.approx(yes + 2 * no, abs=1e-5)}
    assert transduce(r, "k a r !amb1 t u !amb3".split()) == {
        ("car", "too"): pytest.approx(3 * no, abs=1e-5)}
    assert transduce(r, "k a r t".split()) == {("cart",): pytest.approx(2 * no, abs=1e-5)}
    assert transduce(r, "pau".split()) == {(): pytest.approx(yes, abs=1e-5)}
    assert transduce(r, "t u".split()) == {}  # a homophone needs its marker
    assert transduce(r, "pau pau".split()) == {}  # one silence per boundary


def test_silence_off_and_always():
    off = build_lexicon(LEX, INV, WORDS, LexiconOptions(silence_probability=0.0))
    assert transduce(off, "k a b i n".split()) == {("cabin",): 0.0}
    assert transduce(off, "pau k a b i n".split()) == {}
    always = build_lexicon(LEX, INV, WORDS, LexiconOptions(silence_probability=1.0))
    assert transduce(always, "k a b i n".split()) == {}
    assert transduce(always, "pau k a b i n pau".split()) == {("cabin",): 0.0}


def test_no_silence_phone_means_no_silence():
    inv = PhoneInventory([p for p in INV.phones], path="x.phones")
    r = build_lexicon(LEX, inv, WORDS)
    assert transduce(r, "k a b i n".split()) == {("cabin",): 0.0}
    assert transduce(r, "pau k a b i n".split()) == {}


def test_probabilities_rescaled_or_not():
    lex = read_lexicon(DATA / "ropeway_prob.lex", INV, LexiconOptions(has_probabilities=True))
    words = make_symbol_table("w", [*lex.words(), BACKOFF])
    for rescale in (True, False):
        opts = LexiconOptions(has_probabilities=True, rescale_probabilities=rescale,
                              silence_probability=0.0)
        r = build_single_word_lexicon(lex, INV, words, opts)
        top = 0.7 if rescale else 1.0
        # common practice, no source: cost -ln(p / max p) when rescaled, else -ln p
        assert transduce(r, "k a b i n".split()) == {
            ("cabin",): pytest.approx(-math.log(0.7 / top), abs=1e-5)}
        assert transduce(r, "k e b i n".split()) == {
            ("cabin",): pytest.approx(-math.log(0.3 / top), abs=1e-5)}


def test_repeated_pronunciation_uses_larger_probability():
    lex = Lexicon([Pronunciation("kit", ("k", "i", "t"), 0.2, 1),
                   Pronunciation("kit", ("k", "i", "t"), 0.5, 2),
                   Pronunciation("kit", ("k", "e", "t"), 1.0, 3)], "k.lex")
    words = make_symbol_table("w", ["kit", BACKOFF])
    r = build_single_word_lexicon(lex, INV, words, LexiconOptions(rescale_probabilities=False))
    assert transduce(r, "k i t".split()) == {("kit",): pytest.approx(-math.log(0.5), abs=1e-5)}
    assert r.fst.num_arcs(0) == 2


def test_words_outside_the_table_are_skipped():
    words = make_symbol_table("w", [w for w in LEX.words() if w not in ("cart", "two")] + [BACKOFF])
    r = build_lexicon(LEX, INV, words)
    assert r.skipped_words == ["cart", "two"]
    # 'car' is no longer a prefix, 'to'/'too' remain homophones.
    assert {(m.word, m.marker) for m in r.markers} >= {("to", 1), ("too", 2)}
    assert "car" not in {m.word for m in r.markers}
    assert transduce(r, "k a r".split()) == {("car",): pytest.approx(1.386294, abs=1e-5)}


def test_single_word_lexicon_without_markers_is_ambiguous():
    r = build_single_word_lexicon(LEX, INV, WORDS, disambiguate=False)
    assert r.markers == [] and r.num_markers == 0
    assert transduce(r, "t u".split()) == {("to",): 0.0, ("two",): 0.0, ("too",): 0.0}
    assert r.phone_symbols.find("!amb1") == pynini.NO_SYMBOL


def test_homophone_of_optional_silence_gets_marker():
    lex = Lexicon([Pronunciation("[pause]", ("pau",), line=1),
                   Pronunciation("cabin", tuple("kabin"), line=2)], "p.lex")
    words = make_symbol_table("w", ["[pause]", "cabin", BACKOFF])
    r = build_lexicon(lex, INV, words)
    assert [(m.word, m.marker, m.reason) for m in r.markers] == [("[pause]", 1, "silence")]
    assert transduce(r, ["pau", "!amb1"]) == {("[pause]",): pytest.approx(2 * math.log(2),
                                                                        abs=1e-5)}


def test_empty_lexicon():
    r = build_lexicon(Lexicon([], "e.lex"), INV, make_symbol_table("w", [BACKOFF]))
    assert r.markers == [] and r.skipped_words == []
    assert transduce(r, []) == {(): pytest.approx(math.log(2), abs=1e-5)}


def test_unknown_phone_is_located():
    lex = Lexicon([Pronunciation("cabin", tuple("kabin"), line=1),
                   Pronunciation("zoo", ("z", "u"), line=4)], "z.lex")
    words = make_symbol_table("w", ["cabin", "zoo", BACKOFF])
    with pytest.raises(LexiconError, match=r"^z.lex:4: unknown phone 'z'"):
        build_lexicon(lex, INV, words)


def test_bad_silence_probability():
    with pytest.raises(ProjectError, match="outside"):
        build_lexicon(LEX, INV, WORDS, LexiconOptions(silence_probability=1.5))


def test_word_table_without_backoff():
    with pytest.raises(SymbolError, match="no '!backoff'"):
        build_lexicon(LEX, INV, make_symbol_table("w", LEX.words()))


def test_reserved_phone_in_memory_inventory():
    inv = PhoneInventory(["a", "!backoff"], path="bad.phones", lines={"!backoff": 2})
    with pytest.raises(SymbolError, match=r"^bad.phones:2: phone '!backoff'"):
        build_lexicon(Lexicon([Pronunciation("a", ("a",), line=1)]), inv,
                      make_symbol_table("w", ["a", BACKOFF]))


def test_no_inventory_uses_lexicon_phones():
    r = build_lexicon(LEX, None, WORDS)
    assert transduce(r, "k a b i n".split()) == {("cabin",): 0.0}
