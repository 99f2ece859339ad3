"""Unit tests of the lexicon reader and writer."""

from __future__ import annotations

import pathlib

import pytest

from netbuild.errors import Diagnostics, LexiconError
from netbuild.io.lexicon import Lexicon, Pronunciation, read_lexicon, write_lexicon
from netbuild.io.phones import PhoneInventory, read_phones
from netbuild.options import LexiconOptions

DATA = pathlib.Path(__file__).parent.parent / "data" / "lexicon"
PLAIN = LexiconOptions()
PROB = LexiconOptions(has_probabilities=True)
CMU = LexiconOptions(layout="cmudict")
INV = PhoneInventory(["pau", "a", "e", "i", "k", "t", "r", "n"], silence=["pau"],
                     path="inv.phones")


def write(tmp_path: pathlib.Path, text: str | bytes, name: str = "words.lex") -> str:
    p = tmp_path / name
    if isinstance(text, bytes):
        p.write_bytes(text)
    else:
        p.write_text(text, encoding="utf-8")
    return str(p)


def test_reads_demo_lexicon_with_inventory():
    inv = read_phones(DATA / "ropeway.phones")
    lex = read_lexicon(DATA / "ropeway.lex", inv, PLAIN)
    assert len(lex.entries) == 16
    assert lex.entries[0] == Pronunciation("cabin", ("k", "a", "b", "i", "n"), 1.0, 2)
    assert lex.words()[:3] == ["cabin", "car", "cart"]
    assert set(lex.phones()) <= set(inv.phones)


def test_many_pronunciations_and_probabilities():
    lex = read_lexicon(DATA / "ropeway_prob.lex", None, PROB)
    cabin = [e for e in lex.entries if e.word == "cabin"]
    assert [(e.phones, e.probability) for e in cabin] == [
        (("k", "a", "b", "i", "n"), 0.7), (("k", "e", "b", "i", "n"), 0.3)]


def test_number_is_a_phone_unless_probabilities_are_declared(tmp_path):
    path = write(tmp_path, "ten 0.5 t e n\n")
    assert read_lexicon(path, None, PLAIN).entries[0].phones == ("0.5", "t", "e", "n")
    assert read_lexicon(path, None, PROB).entries[0].probability == 0.5


def test_tabs_comments_and_blank_lines(tmp_path):
    path = write(tmp_path, "# header\n\ntea\tt i\n   # indented comment\nkit k i t\r\n")
    lex = read_lexicon(path, None, PLAIN)
    assert [(e.word, e.phones, e.line) for e in lex.entries] == [
        ("tea", ("t", "i"), 3), ("kit", ("k", "i", "t"), 5)]


def test_cmudict_layout_folds_alternates_and_lowercases():
    diag = Diagnostics()
    lex = read_lexicon(DATA / "small_cmu.dict", None, CMU, diag)
    assert [(e.word, e.phones) for e in lex.entries] == [
        ("gondola", ("G", "AA1", "N", "D", "AH0", "L", "AH0")),
        ("gondola", ("G", "AA0", "N", "D", "OW1", "L", "AH0")),
        ("cable", ("K", "EY1", "B", "AH0", "L")),
        ("tower", ("T", "AW1", "ER0")),
    ]
    # CABLE(2) repeats CABLE exactly: a warning, kept once.
    assert [(w.line, "repeats line 4" in w.message) for w in diag.warnings] == [(5, True)]


def test_cmudict_layout_can_strip_stress():
    lex = read_lexicon(DATA / "small_cmu.dict", None,
                       LexiconOptions(layout="cmudict", keep_stress=False))
    assert lex.entries[0].phones == ("G", "AA", "N", "D", "AH", "L", "AH")
    # Both GONDOLA lines differ in phones even without stress; nothing merges there.
    assert len(lex.entries) == 4


def test_exact_duplicate_warns_and_keeps_once(tmp_path):
    path = write(tmp_path, "kit k i t\nkit k i t\n")
    diag = Diagnostics()
    lex = read_lexicon(path, INV, PLAIN, diag)
    assert len(lex.entries) == 1
    assert str(diag.warnings[0]).startswith(f"{path}:2: line repeats line 1")


def test_same_pronunciation_other_probability_warns_and_keeps_both(tmp_path):
    path = write(tmp_path, "kit 0.5 k i t\nkit 0.25 k i t\n")
    diag = Diagnostics()
    lex = read_lexicon(path, INV, PROB, diag)
    assert [e.probability for e in lex.entries] == [0.5, 0.25]
    assert diag.warnings[0].line == 2


@pytest.mark.parametrize("text, options, line, pattern", [
    ("kit k i t\ntin t i nn\n", PLAIN, 2, r"unknown phone 'nn'.*did you mean 'n'"),
    ("kit k i t\ntea\n", PLAIN, 2, r"word 'tea' has no phones"),
    ("kit 0.5\n", PROB, 1, r"word 'kit' has no phones"),
    ("kit\n", PROB, 1, r"no probability and no phones"),
    ("kit x k i t\n", PROB, 1, r"probability 'x' of word 'kit' is not a number"),
    ("kit 0 k i t\n", PROB, 1, r"outside \(0, 1\]"),
    ("kit 1.5 k i t\n", PROB, 1, r"outside \(0, 1\]"),
    ("kit -0.1 k i t\n", PROB, 1, r"outside \(0, 1\]"),
    ("kit nan k i t\n", PROB, 1, r"outside \(0, 1\]"),
    ("a a\n<s> a\n", PLAIN, 2, r"word '<s>' is spelled like a reserved symbol"),
    ("a a\n</s> a\n", PLAIN, 2, r"reserved symbol"),
    ("a a\n<epsilon> a\n", PLAIN, 2, r"reserved symbol"),
    ("a a\n!backoff a\n", PLAIN, 2, r"reserved symbol"),
    ("a a\n!amb3 a\n", PLAIN, 2, r"reserved symbol"),
    (";;; c\nKIT  K I T\nTEA(2)\n", CMU, 3, r"word 'tea' has no phones"),
])
def test_errors_are_located(tmp_path, text, options, line, pattern):
    path = write(tmp_path, text)
    inv = PhoneInventory(["a", "e", "i", "k", "t", "n", "K", "I", "T"], path="inv.phones")
    with pytest.raises(LexiconError, match=pattern) as info:
        read_lexicon(path, inv, options)
    assert str(info.value).startswith(f"{path}:{line}: ")
    assert info.value.line == line


def test_unknown_phone_not_checked_without_inventory(tmp_path):
    path = write(tmp_path, "tin t i m\n")
    assert read_lexicon(path, None, PLAIN).entries[0].phones == ("t", "i", "m")


def test_unknown_word_allowed(tmp_path):
    path = write(tmp_path, "<unk> pau\n")
    assert read_lexicon(path, INV, PLAIN).words() == ["<unk>"]


def test_invalid_utf8_reports_byte_offset(tmp_path):
    path = write(tmp_path, "kit k i t\nt\xc3\xa9a t i\nb\xe9d b e d\n".encode("latin-1"))
    with pytest.raises(LexiconError, match=r"invalid UTF-8 at byte offset") as info:
        read_lexicon(path, None, PLAIN)
    # 'kit k i t\n' is 10 bytes, 't\xc3\xa9a t i\n' 9 more: the bad 0xe9 is at 20.
    assert str(info.value).startswith(f"{path}:3: invalid UTF-8 at byte offset 20 (byte 0xe9)")


def test_all_errors_reported_together(tmp_path):
    path = write(tmp_path, "kit k i t\ntea\n<s> a\ntin t i m\nkin k i n\n")
    diag = Diagnostics()
    with pytest.raises(LexiconError) as info:
        read_lexicon(path, INV, PLAIN, diag)
    assert [p.line for p in info.value.problems] == [2, 3, 4]
    text = str(info.value).splitlines()
    assert len(text) == 3 and all(t.startswith(f"{path}:") for t in text)


def test_missing_file(tmp_path):
    with pytest.raises(LexiconError, match="cannot read the file"):
        read_lexicon(tmp_path / "absent.lex", None, PLAIN)


def test_unknown_layout(tmp_path):
    path = write(tmp_path, "kit k i t\n")
    with pytest.raises(LexiconError, match="unknown lexicon layout 'columns'"):
        read_lexicon(path, None, LexiconOptions(layout="columns"))  # type: ignore[arg-type]


def test_empty_lexicon_reads_as_empty(tmp_path):
    path = write(tmp_path, "# nothing\n")
    assert read_lexicon(path, None, PLAIN).entries == []


def test_write_then_read_round_trip(tmp_path):
    lex = Lexicon([Pronunciation("kit", ("k", "i", "t"), 0.1, 1),
                   Pronunciation("kit", ("k", "e", "t"), 1 / 3, 2)])
    path = tmp_path / "out.lex"
    write_lexicon(lex, path, with_probabilities=True)
    assert read_lexicon(path, None, PROB).entries == lex.entries
