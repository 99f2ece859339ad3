"""Unit tests of netbuild.lm.estimate."""

from __future__ import annotations

import pytest

from netbuild.errors import InputError, ProjectError
from netbuild.lm.estimate import estimate, read_sentences


def test_read_sentences(tmp_path):
    p = tmp_path / "text.txt"
    p.write_bytes("the cabin climbs\n\n  the ridge\tis steep \r\n".encode())
    assert read_sentences(p) == [["the", "cabin", "climbs"], ["the", "ridge", "is", "steep"]]


def test_read_sentences_errors_are_located(tmp_path):
    p = tmp_path / "text.txt"
    p.write_bytes(b"ok line\nbad \xff byte\nhas <s> marker\n")
    with pytest.raises(InputError) as info:
        read_sentences(p)
    assert [(q.line, q.message[:10]) for q in info.value.problems] == [
        (2, "bytes that"), (3, "reserved s")]
    assert "byte offset 12" in str(info.value)


def test_model_shape_and_markers():
    m = estimate([["a", "b"], ["a"]], 3)
    assert m.vocab == ["</s>", "<s>", "a", "b"]
    assert m.counts() == [4, 4, 3]  # bigrams: <s> a, a b, b </s>, a </s>
    lp = dict(zip((m.vocab[i] for i in m.orders[0].words[:, 0]), m.orders[0].logprob))
    assert lp["<s>"] == -99.0
    assert (m.orders[2].backoff == 0).all()


def test_unk_option_adds_a_small_probability():
    m = estimate([["a", "b"]], 2, unk=True)
    lp = dict(zip(m.vocab, m.orders[0].logprob))
    assert "<unk>" in lp and lp["<unk>"] < lp["a"]


@pytest.mark.parametrize("kwargs,pattern", [
    ({"method": "good_turing"}, "unknown estimation method 'good_turing'; use one of"),
    ({"order": 0}, "order 0 is below 1"),
])
def test_bad_settings(kwargs, pattern):
    with pytest.raises(ProjectError, match=pattern):
        estimate([["a"]], **kwargs)


def test_no_sentences_and_reserved_words():
    with pytest.raises(ProjectError, match="no sentences"):
        estimate([])
    with pytest.raises(InputError, match="sentence 2"):
        estimate([["a"], ["b", "!backoff"]])
