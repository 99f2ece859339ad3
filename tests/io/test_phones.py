"""Unit tests of the phone inventory reader."""

from __future__ import annotations

import pathlib

import pytest

from netbuild.errors import Diagnostics, LexiconError, PhoneMapError
from netbuild.io.lexicon import Lexicon, Pronunciation
from netbuild.io.phones import inventory_from_lexicon, read_phones

DATA = pathlib.Path(__file__).parent.parent / "data" / "lexicon"


def write(tmp_path: pathlib.Path, text: str | bytes, name: str = "inv.phones") -> str:
    p = tmp_path / name
    if isinstance(text, bytes):
        p.write_bytes(text)
    else:
        p.write_text(text, encoding="utf-8")
    return str(p)


def test_reads_demo_inventory():
    inv = read_phones(DATA / "ropeway.phones")
    assert inv.phones[:3] == ["pau", "brth", "a"]
    assert len(inv.phones) == 18
    assert inv.silence == ["pau"] and inv.optional_silence == "pau"
    assert inv.noise == ["brth"]
    assert inv.classes == {"vowel": ["a", "e", "i", "o", "u"],
                           "stop": ["k", "t", "p", "b", "d", "g"]}
    assert inv.lines["a"] == 4


def test_comments_blank_lines_and_forward_class_reference(tmp_path):
    path = write(tmp_path, "\ufeffnasal: m n  # declared below\n\n  m # a comment\nn\n")
    inv = read_phones(path)
    assert inv.phones == ["m", "n"]
    assert inv.classes == {"nasal": ["m", "n"]}
    assert inv.optional_silence is None


@pytest.mark.parametrize("text, line, pattern", [
    ("a\nb\na\n", 3, r"phone 'a' is already declared on line 1"),
    ("a\nsil silense\n", 2, r"unknown role 'silense'.*did you mean 'silence'"),
    ("a b c\n", 1, r"3 fields"),
    ("aa\nee\nvowel: aa aah\n", 3, r"unknown phone 'aah'.*did you mean 'aa'"),
    ("a\nv: a\nv: a\n", 3, r"class 'v' is already defined on line 2"),
    ("a\nv:\n", 2, r"class 'v' names no phones"),
    ("a\n<s>\n", 2, r"reserved symbol"),
    ("a\n!amb1\n", 2, r"reserved symbol"),
    ("a\n<epsilon>\n", 2, r"reserved symbol"),
    ("# nothing here\n\n", 1, r"declares no phones"),
    ("", 1, r"declares no phones"),
    ("a\nb c: a\n", 2, r"must be one word"),
])
def test_errors_are_located(tmp_path, text, line, pattern):
    path = write(tmp_path, text)
    with pytest.raises(PhoneMapError, match=pattern) as info:
        read_phones(path)
    assert str(info.value).startswith(f"{path}:{line}: ")
    assert info.value.line == line and info.value.path == path


def test_invalid_utf8_reports_byte_offset(tmp_path):
    path = write(tmp_path, b"a\nb\xffc\nd\n")
    with pytest.raises(PhoneMapError, match=r"invalid UTF-8 at byte offset 3") as info:
        read_phones(path)
    assert str(info.value).startswith(f"{path}:2: ")


def test_all_errors_collected_once(tmp_path):
    path = write(tmp_path, "a\na\nb noise extra\nv: a q\n")
    diag = Diagnostics()
    with pytest.raises(PhoneMapError) as info:
        read_phones(path, diag)
    lines = sorted(p.line for p in info.value.problems)
    assert lines == [2, 3, 4]
    assert len(diag.errors) == 3


def test_warning_for_repeated_class_member(tmp_path):
    path = write(tmp_path, "a\nb\nv: a b a\n")
    diag = Diagnostics()
    inv = read_phones(path, diag)
    assert inv.classes["v"] == ["a", "b"]
    assert [w.line for w in diag.warnings] == [3]


def test_missing_file(tmp_path):
    with pytest.raises(PhoneMapError, match="cannot read the file"):
        read_phones(tmp_path / "absent.phones")


def test_inventory_from_lexicon_has_no_silence():
    lex = Lexicon([Pronunciation("to", ("t", "u"), line=1),
                   Pronunciation("two", ("t", "u"), line=2),
                   Pronunciation("low", ("l", "o", "u"), line=3)], "demo.lex")
    diag = Diagnostics()
    inv = inventory_from_lexicon(lex, diag)
    assert inv.phones == ["t", "u", "l", "o"]
    assert inv.optional_silence is None
    assert len(diag.warnings) == 1 and "no optional silence" in str(diag.warnings[0])


def test_inventory_from_lexicon_rejects_reserved_phone():
    lex = Lexicon([Pronunciation("to", ("t", "u"), line=1),
                   Pronunciation("odd", ("!amb1",), line=7)], "demo.lex")
    with pytest.raises(LexiconError, match=r"^demo.lex:7: phone '!amb1'"):
        inventory_from_lexicon(lex)
