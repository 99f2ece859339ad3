"""Tests of netbuild.lm.perplexity against the kenlm Python module and by hand."""

from __future__ import annotations

import math
import pathlib

import pytest

from netbuild.errors import ProjectError
from netbuild.io.arpa import read_arpa, write_arpa
from netbuild.lm.estimate import estimate, read_sentences
from netbuild.lm.perplexity import perplexity
from netbuild.lm.query import BackoffScorer

DEMO = pathlib.Path(__file__).parents[2] / "examples" / "ropeway"

kenlm = pytest.importorskip("kenlm")


@pytest.fixture(scope="module")
def demo():
    return read_arpa(DEMO / "model.arpa"), kenlm.Model(str(DEMO / "model.arpa"))


@pytest.fixture(scope="module")
def heldout():
    return read_sentences(DEMO / "corpus.txt")[-200:]


def test_sentence_perplexity_equals_kenlm(demo, heldout):
    model, ken = demo
    scorer = BackoffScorer(model)
    for words in heldout[:60]:
        ours = perplexity(scorer, [words])
        assert ours.events == len(words) + 1  # the words and </s>
        # reference: kenlm Python module, PyPI kenlm 0.3.0, Model.perplexity:
        # 10 ** (-score / (words + 1)), the score including </s>
        assert ours.perplexity == pytest.approx(ken.perplexity(" ".join(words)), rel=1e-6)


def test_corpus_perplexity_equals_kenlm_scores(demo, heldout):
    model, ken = demo
    ours = perplexity(model, heldout)
    # reference: kenlm Python module, Model.score(sentence, bos=True, eos=True) is the
    # log10 probability with </s>; corpus perplexity 10 ** (-sum / sum(words + 1))
    total = sum(ken.score(" ".join(w), bos=True, eos=True) for w in heldout)
    n = sum(len(w) + 1 for w in heldout)
    assert ours.logprob10 == pytest.approx(total, abs=1e-4 * len(heldout))
    assert ours.perplexity == pytest.approx(10.0 ** (-total / n), rel=1e-6)
    assert ours.oov == 0 and ours.sentences == len(heldout)


def test_skipped_unknown_words_match_kenlm_known_word_scores(demo):
    model, ken = demo
    sentences = [["cabin", "gondola", "two", "to", "summit"], ["zeppelin"],
                 ["hold", "the", "cabin", "quasar"]]
    ours = perplexity(model, sentences, oov="skip")
    assert ours.policy == "skip" and ours.oov == 3
    total = 0.0
    events = 0
    for words in sentences:
        for score, _, is_oov in ken.full_scores(" ".join(words), bos=True, eos=True):
            if not is_oov:
                # reference: kenlm Python module, Model.full_scores (log10, oov flag);
                # after an unknown word kenlm's state has no context words
                total += score
                events += 1
    assert ours.events == events
    assert ours.logprob10 == pytest.approx(total, abs=1e-4)


def test_unknown_words_as_unk_match_kenlm(tmp_path):
    model = estimate([s.split() for s in ["cabin two up", "cabin one down", "two up"]], 2,
                     unk=True)
    path = tmp_path / "unk.arpa"
    write_arpa(model, path)
    ken = kenlm.Model(str(path))
    sentences = [["cabin", "three", "up"], ["gondola"]]
    ours = perplexity(model, sentences)  # auto: the model has <unk>
    assert ours.policy == "unk" and ours.oov == 2
    # reference: kenlm Python module, Model.score scores unknown words as <unk>
    total = sum(ken.score(" ".join(w)) for w in sentences)
    assert ours.logprob10 == pytest.approx(total, abs=1e-4)
    assert ours.events == sum(len(w) + 1 for w in sentences)


def test_uniform_model_has_perplexity_of_its_vocabulary_size(tmp_path):
    # reference: the perplexity of a uniform distribution over k outcomes is k
    # (# from memory: Jelinek 1997, Statistical Methods for Speech Recognition, ch. 8)
    k = 8
    words = [f"w{i}" for i in range(k - 1)]
    lp = math.log10(1.0 / k)
    lines = ["\\data\\", f"ngram 1={k + 1}", "", "\\1-grams:", "-99\t<s>", f"{lp}\t</s>"]
    lines += [f"{lp}\t{w}" for w in words] + ["", "\\end\\", ""]
    path = tmp_path / "uniform.arpa"
    path.write_text("\n".join(lines), encoding="utf-8")
    result = perplexity(read_arpa(path), [["w1", "w3"], ["w0"], ["w6", "w6", "w2"]])
    assert result.perplexity == pytest.approx(k)
    assert result.cross_entropy_bits == pytest.approx(3.0)


def test_unk_policy_needs_unk():
    model = estimate([["a", "b"]], 2)
    with pytest.raises(ProjectError, match="has no <unk>"):
        perplexity(model, [["a"]], oov="unk")
    with pytest.raises(ProjectError, match="unknown OOV policy"):
        perplexity(model, [["a"]], oov="drop")  # type: ignore[arg-type]


def test_no_sentences_is_infinite():
    assert math.isinf(perplexity(estimate([["a"]], 1), []).perplexity)
