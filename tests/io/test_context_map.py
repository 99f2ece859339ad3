"""Unit tests of the context map reader and writer."""

from __future__ import annotations

import pathlib

import pytest

from netbuild.errors import Diagnostics, PhoneMapError
from netbuild.io.context_map import (HmmState, read_context_map,
                                     write_context_map)
from netbuild.io.phones import PhoneInventory, read_phones

ROPEWAY = pathlib.Path(__file__).parents[2] / "examples" / "ropeway"

INV = PhoneInventory(["a", "i", "t", "k", "s", "sil", "ns"], silence=["sil"], noise=["ns"],
                     classes={"vowel": ["a", "i"], "stop": ["t", "k"]}, path="inv.txt")

GOOD = """\
# a small triphone map
widths 1 1
independent sil ns
independent-context no
model a.stop 0:0.6:0.4 1:0.7:0.3 2:0.5:0.5
model a 3:0.6:0.4 1:0.7:0.3 2:0.5:0.5   # shares two emission classes
model c 4:0.5:0.5
model sil 5:0.9:0.1 5:0.9:0.1 6:0.8:0.2
rule @stop a * -> a.stop
rule * a * -> a
rule * @stop * -> c
rule * * * -> c
rule * sil * -> sil
"""


def write(tmp_path: pathlib.Path, text: str | bytes, name: str = "ctx.txt") -> str:
    p = tmp_path / name
    if isinstance(text, bytes):
        p.write_bytes(text)
    else:
        p.write_text(text, encoding="utf-8")
    return str(p)


def errors_of(tmp_path, text: str) -> list[str]:
    path = write(tmp_path, text)
    with pytest.raises(PhoneMapError) as info:
        read_context_map(path, INV)
    return [str(p) for p in info.value.problems]


def test_reads_a_map(tmp_path):
    path = write(tmp_path, GOOD)
    diag = Diagnostics()
    cmap = read_context_map(path, INV, diag)
    assert (cmap.left, cmap.right) == (1, 1)
    assert cmap.independent == ["sil", "ns"] and cmap.independent_is_context is False
    assert list(cmap.models) == ["a.stop", "a", "c", "sil"]
    assert cmap.models["a"].states[0] == HmmState(3, 0.6, 0.4)
    assert cmap.models["a"].line == 6
    assert [r.line for r in cmap.rules] == [9, 10, 11, 12, 13]
    assert cmap.rules[0].left == ("@stop",) and cmap.rules[0].centre == "a"
    assert cmap.rules[0].right == ("*",) and cmap.rules[0].model == "a.stop"
    assert cmap.classes == INV.classes and cmap.widths_line == 2
    assert diag.errors == [] and diag.warnings == []


def test_demo_map_reads_and_matches_its_description():
    inv = read_phones(ROPEWAY / "inventory.txt")
    diag = Diagnostics()
    cmap = read_context_map(ROPEWAY / "context.txt", inv, diag)
    assert diag.problems == []
    assert (cmap.left, cmap.right) == (1, 1)
    assert set(cmap.independent) == set(inv.silence + inv.noise)
    assert 100 <= len(cmap.models) <= 300
    assert all(len(m.states) == 3 for m in cmap.models.values())
    classes = [s.emission_class for m in cmap.models.values() for s in m.states]
    assert len(set(classes)) < len(classes)  # some emission classes are shared
    assert any(t.startswith("@") for r in cmap.rules for t in (*r.left, *r.right))


def test_monophone_map(tmp_path):
    cmap = read_context_map(write(tmp_path, "widths 0 0\nmodel m 0:0.5:0.5\nrule * -> m\n"),
                            INV)
    assert (cmap.left, cmap.right) == (0, 0)
    assert cmap.rules[0].left == () and cmap.rules[0].right == ()


@pytest.mark.parametrize("line, pattern", [
    ("rule * b * -> c", r"ctx.txt:9: unknown phone 'b' in a rule"),
    ("rule * @vowels * -> c", r"ctx.txt:9: unknown phone class 'vowels'.*did you mean 'vowel'"),
    ("rule * a * -> cc", r"ctx.txt:9: rule names unknown model 'cc'.*did you mean 'c'"),
    ("rule a * -> c", r"ctx.txt:9: rule has 2 context/centre tokens, widths 1 1 need 3"),
    ("rule * $ * -> c", r"ctx.txt:9: the centre of a rule cannot be the edge"),
    ("rule * a *", r"ctx.txt:9: rule has no '->'"),
    ("rule * a * -> c d", r"ctx.txt:9: rule needs exactly one model name"),
    ("model c 1:0.5:0.5", r"ctx.txt:9: model 'c' is already declared on line 5"),
    ("model m 1:x:0.5", r"ctx.txt:9: probability 'x' .* is not a number"),
    ("model m one:0.5:0.5", r"ctx.txt:9: state 'one:0.5:0.5' of model 'm' is not CLASS"),
    ("model m -1:0.5:0.5", r"ctx.txt:9: state '-1:0.5:0.5'"),
    ("model m 1:0.5:0.6", r"ctx.txt:9: .*add up to 1.1, not 1"),
    ("model m 1:1.0:0.0", r"ctx.txt:9: self-loop probability 1.0 .* outside \[0, 1\)"),
    ("model m 1:nan:0.5", r"ctx.txt:9: self-loop probability nan"),
    ("model m 1:0.0:0.0", r"ctx.txt:9: forward probability 0.0 .* outside \(0, 1\]"),
    ("model m", r"ctx.txt:9: model 'm' has no states"),
    ("model", r"ctx.txt:9: model line has no name"),
    ("widths 1 1", r"ctx.txt:9: widths are already given on line 1"),
    ("independent aa", r"ctx.txt:9: unknown phone 'aa' declared independent.*'a'"),
    ("independent-context yes", r"ctx.txt:9: independent-context is already given on line 3"),
    ("modle m 1:0.5:0.5", r"ctx.txt:9: unknown keyword 'modle'.*did you mean 'model'"),
])
def test_each_error_is_located_with_a_fix(tmp_path, line, pattern):
    base = ("widths 1 1\nindependent sil\nindependent-context no\n# models\n"
            "model c 0:0.5:0.5\nmodel a 1:0.5:0.5\nrule * a * -> a\nrule * * * -> c\n")
    problems = errors_of(tmp_path, base + line + "\n")
    assert any(__import__("re").search(pattern, p) for p in problems), problems
    assert all("; " in p for p in problems)  # every message names a fix


@pytest.mark.parametrize("text, pattern", [
    ("model m 0:0.5:0.5\nrule * * * -> m\n", r"ctx.txt:2: rule before the widths line"),
    ("widths 1\nmodel m 0:0.5:0.5\n", r"ctx.txt:1: widths line needs two numbers"),
    ("widths 1 9\n", r"ctx.txt:1: context width '9' is not a whole number from 0 to 3"),
    ("widths 1 x\n", r"ctx.txt:1: context width 'x'"),
    ("widths 1 1\nindependent-context maybe\n",
     r"ctx.txt:2: independent-context takes 'yes' or 'no'"),
    ("# nothing\n", r"ctx.txt:1: the map has no widths line"),
    ("widths 1 1\nrule * a * -> m\n", r"ctx.txt:2: the map declares no models|unknown model"),
    ("widths 1 1\nmodel m 0:0.5:0.5\n", r"ctx.txt:2: the map has no rules"),
    (b"widths 1 1\nmodel m\xff 0:0.5:0.5\n", r"ctx.txt:2: invalid UTF-8 at byte offset 18"),
])
def test_file_level_errors(tmp_path, text, pattern):
    path = write(tmp_path, text)
    with pytest.raises(PhoneMapError) as info:
        read_context_map(path, INV)
    assert any(__import__("re").search(pattern, str(p)) for p in info.value.problems), \
        [str(p) for p in info.value.problems]


def test_all_errors_are_reported_together(tmp_path):
    problems = errors_of(tmp_path, "widths 1 1\nmodel m 0:2:0.5\nrule * q * -> m\n"
                                   "rule * a * -> zz\nmodel m 0:0.5:0.5\nrule * a * -> m\n")
    assert [p.split(":")[1] for p in problems] == ["2", "3", "4"]


def test_missing_file_is_a_located_error(tmp_path):
    with pytest.raises(PhoneMapError, match=r"nope.txt: cannot read the file"):
        read_context_map(tmp_path / "nope.txt", INV)


def test_warnings_for_rules_that_can_never_match(tmp_path):
    text = ("widths 2 1\nindependent sil\nmodel m 0:0.5:0.5\nmodel spare 0:0.5:0.5\n"
            "rule a $ t * -> m\n"  # 'a' beyond the edge on the left
            "rule * * t sil -> m\n"  # sil is seen as '$' by its neighbours
            "rule * * sil t -> m\n"  # context of a context-independent centre: ignored, fine
            "rule * * * * -> m\n")
    diag = Diagnostics()
    cmap = read_context_map(write(tmp_path, text), INV, diag)
    got = [str(w) for w in diag.warnings]
    assert len(cmap.rules) == 4
    assert any(w.startswith(f"{tmp_path}/ctx.txt:5: rule can never match") and "beyond the edge"
               in w for w in got), got
    assert any(":6: rule can never match" in w and "context-independent 'sil'" in w
               for w in got), got
    assert not any(":7:" in w for w in got)
    assert any(":4: model 'spare' is named by no rule" in w for w in got)


def test_independent_context_yes_makes_such_rules_possible(tmp_path):
    text = ("widths 1 1\nindependent sil\nindependent-context yes\nmodel m 0:0.5:0.5\n"
            "rule * t sil -> m\nrule * * * -> m\n")
    diag = Diagnostics()
    cmap = read_context_map(write(tmp_path, text), INV, diag)
    assert cmap.independent_is_context is True
    assert diag.warnings == []


def test_write_then_read_gives_the_same_map(tmp_path):
    cmap = read_context_map(write(tmp_path, GOOD), INV)
    out = tmp_path / "again.txt"
    write_context_map(cmap, out)
    back = read_context_map(out, INV)
    assert back.models.keys() == cmap.models.keys()
    assert [m.states for m in back.models.values()] == [m.states for m in cmap.models.values()]
    assert [(r.left, r.centre, r.right, r.model) for r in back.rules] == \
        [(r.left, r.centre, r.right, r.model) for r in cmap.rules]
    assert (back.left, back.right, back.independent, back.independent_is_context) == \
        (cmap.left, cmap.right, cmap.independent, cmap.independent_is_context)
