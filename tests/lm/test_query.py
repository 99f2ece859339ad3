"""Unit tests of netbuild.lm.query.BackoffScorer (values written out by hand)."""

from __future__ import annotations

import pathlib

import pytest

from netbuild.errors import SymbolError
from netbuild.io.arpa import read_arpa
from netbuild.lm.estimate import estimate
from netbuild.lm.query import BackoffScorer

DATA = pathlib.Path(__file__).parent.parent / "data" / "arpa"


def test_back_off_rule_by_hand():
    s = BackoffScorer(read_arpa(DATA / "minus99.arpa"))
    # listed trigram
    assert s.logprob10(["<s>", "the"], "cabin") == pytest.approx(-0.1)
    # "the cabin slowly": bo(the cabin) + P(slowly | cabin) -> bo(cabin) + P(slowly)
    assert s.logprob10(["the", "cabin"], "slowly") == pytest.approx(-0.2 - 0.25 - 1.5)
    # unlisted history "slowly the": no back-off weight of its own
    assert s.logprob10(["slowly", "the"], "cabin") == pytest.approx(-0.3)
    # long histories are cut to order - 1 words
    assert s.logprob10(["x", "y", "<s>", "the"], "cabin") == pytest.approx(-0.1)


def test_oov_scored_as_unk_when_listed():
    s = BackoffScorer(read_arpa(DATA / "minus99.arpa"))
    assert s.logprob10(["the"], "gondola") == s.logprob10(["the"], "<unk>")
    assert s.sentence_logprob10(["gondola"]) == pytest.approx(
        s.logprob10(["<s>"], "<unk>") + s.logprob10(["<s>", "<unk>"], "</s>"))


def test_oov_without_unk_raises():
    s = BackoffScorer(estimate([["a", "b"]], 2))
    with pytest.raises(SymbolError, match="'zz' is not in the language model"):
        s.logprob10([], "zz")
    # an unknown history word cuts the history
    assert s.logprob10(["zz"], "b") == s.logprob10([], "b")


def test_sentence_flags():
    s = BackoffScorer(estimate([["a", "b"]], 2))
    with_all = s.sentence_logprob10(["a", "b"])
    assert with_all == pytest.approx(s.logprob10(["<s>"], "a") + s.logprob10(["a"], "b")
                                     + s.logprob10(["b"], "</s>"))
    assert s.sentence_logprob10(["a", "b"], bos=False, eos=False) == pytest.approx(
        s.logprob10([], "a") + s.logprob10(["a"], "b"))
