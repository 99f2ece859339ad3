"""The estimator and the back-off scorer against outside references.

# reference: kenlm Python module (PyPI kenlm 0.3.0), `kenlm.Model(path).score(s, bos, eos)`
# reference: ARPA back-off layout and back-off rule, P(w|h) = P*(w|h) if (h, w) is listed,
#   else alpha(h) * P(w|h'), with h' the history without its oldest word (from memory)
"""

from __future__ import annotations

import math
import pathlib
import random

import pytest

from netbuild.io.arpa import read_arpa, write_arpa
from netbuild.lm.estimate import estimate
from netbuild.lm.query import BackoffScorer

kenlm = pytest.importorskip("kenlm")

DATA = pathlib.Path(__file__).parent.parent / "data" / "arpa"

# An invented cable-car scenario.
CORPUS = [s.split() for s in [
    "the cabin climbs slowly", "the cabin stops at the middle station",
    "a cabin climbs the ridge", "the ridge is steep", "the cabin reaches the top station",
    "passengers leave the cabin at the top", "the operator stops the cabin",
    "wind shakes the cabin", "the cabin descends to the valley", "a storm closes the line",
]]


def plain_backoff_logprob10(path, history, word):
    """An independent reading of the ARPA back-off rule, sharing no code with netbuild."""
    table = _plain_table(str(path))
    order = max(len(k) for k in table)
    hist = tuple(history)[-(order - 1):] if order > 1 else ()
    total = 0.0
    while True:
        entry = table.get(hist + (word,))
        if entry is not None:
            return total + entry[0]
        if not hist:
            return total - 99.0
        total += table.get(hist, (0.0, 0.0))[1]
        hist = hist[1:]


_PLAIN: dict[str, dict] = {}


def _plain_table(path):
    if path not in _PLAIN:
        table = {}
        order = 0
        for line in open(path, encoding="utf-8"):
            line = line.strip()
            if line.startswith("\\") and line.endswith("-grams:"):
                order = int(line[1:line.index("-")])
            elif line.startswith("\\") or not line or order == 0:
                continue
            else:
                f = line.split()
                bo = float(f[order + 1]) if len(f) == order + 2 else 0.0
                table[tuple(f[1:order + 1])] = (float(f[0]), bo)
        _PLAIN[path] = table
    return _PLAIN[path]


def plain_sentence(path, words):
    h, total = ["<s>"], 0.0
    for w in list(words) + ["</s>"]:
        total += plain_backoff_logprob10(path, h, w)
        h.append(w)
    return total


def random_sentences(vocab, n, seed):
    rng = random.Random(seed)
    words = [w for w in vocab if w not in ("<s>", "</s>")]
    out = [rng.choice(CORPUS) for _ in range(n // 4)]
    out += [[rng.choice(words) for _ in range(rng.randint(0, 8))] for _ in range(n - len(out))]
    return out


@pytest.mark.parametrize("order", [1, 2, 3, 4, 5, 6])
def test_every_history_sums_to_one(order):
    """Sum over words plus </s> of P(w|h) = 1 (the back-off rule, summed out in full)."""
    m = estimate(CORPUS, order, unk=True)
    s = BackoffScorer(m)
    targets = [w for w in m.vocab if w != "<s>"]
    rng = random.Random(order)
    histories = [(), ("<s>",), ("<s>", "the"), ("<s>", "the", "cabin"), ("valley", "valley"),
                 ("zzz-unseen",), ("the", "cabin", "climbs", "the", "ridge")]
    histories += [tuple(rng.choice(targets[1:]) for _ in range(rng.randint(1, order)))
                  for _ in range(20)]
    histories += [tuple(["<s>"] + rng.choice(CORPUS)[: rng.randint(0, 4)]) for _ in range(20)]
    for h in histories:
        total = sum(10.0 ** s.logprob10(h, w) for w in targets)
        assert abs(total - 1.0) < 1e-6, h


@pytest.mark.parametrize("order", [2, 3, 4, 6])
def test_estimated_model_scores_like_kenlm(tmp_path, order):
    """# reference: kenlm Python module (PyPI kenlm 0.3.0); kenlm needs order >= 2."""
    m = estimate(CORPUS, order, unk=True)
    path = tmp_path / "est.arpa"
    write_arpa(m, path)
    ref = kenlm.Model(str(path))
    ours = BackoffScorer(read_arpa(path))
    sentences = random_sentences(m.vocab, 220, seed=order)
    sentences.append(["unseen", "words", "become", "unk"])
    for sent in sentences:
        expected = ref.score(" ".join(sent), bos=True, eos=True)
        assert ours.sentence_logprob10(sent) == pytest.approx(expected, abs=1e-4)
    for sent in sentences[:50]:
        expected = ref.score(" ".join(sent), bos=False, eos=False)
        assert ours.sentence_logprob10(sent, bos=False, eos=False) == pytest.approx(
            expected, abs=1e-4)


def test_minus_99_fixture_matches_kenlm():
    """Hand-written fixture with -99 entries (<s>, <unk>): kenlm loads it.

    # reference: kenlm Python module (PyPI kenlm 0.3.0)
    """
    path = DATA / "minus99.arpa"
    ref = kenlm.Model(str(path))
    ours = BackoffScorer(read_arpa(path))
    vocab = ["the", "cabin", "climbs", "slowly", "<unk>", "ropeway"]
    rng = random.Random(5)
    for _ in range(200):
        sent = [rng.choice(vocab) for _ in range(rng.randint(0, 6))]
        expected = ref.score(" ".join(sent), bos=True, eos=True)
        assert ours.sentence_logprob10(sent) == pytest.approx(expected, abs=1e-4)
        # the independent implementation agrees with kenlm too, which validates it
        assert plain_sentence(path, [w if w != "ropeway" else "<unk>" for w in sent]) == \
            pytest.approx(expected, abs=1e-4)


def test_hole_fixture_against_plain_implementation():
    """kenlm refuses this model ("The context of every 3-gram should appear as a
    2-gram"), so the check is the plain implementation above, itself checked against
    kenlm in `test_minus_99_fixture_matches_kenlm` and below."""
    path = DATA / "holes.arpa"
    with pytest.raises(OSError):
        kenlm.Model(str(path))
    ours = BackoffScorer(read_arpa(path))
    vocab = ["the", "cabin", "climbs", "slowly", "<unk>"]
    rng = random.Random(9)
    sentences = [["cabin", "climbs"], ["cabin", "climbs", "slowly"]]
    sentences += [[rng.choice(vocab) for _ in range(rng.randint(0, 6))] for _ in range(200)]
    for sent in sentences:
        assert ours.sentence_logprob10(sent) == pytest.approx(plain_sentence(path, sent),
                                                              abs=1e-9)
    # the hole's trigram is used: -0.3 after "<s> cabin", written out by hand:
    # P(cabin|<s>) = bo(<s>) + P(cabin) = -0.5 + -1.2; P(climbs|<s> cabin) = -0.3
    assert ours.logprob10(["<s>", "cabin"], "climbs") == pytest.approx(-0.3)
    assert ours.logprob10(["<s>"], "cabin") == pytest.approx(-1.7)


def test_plain_implementation_matches_kenlm_on_estimated_models(tmp_path):
    """# reference: kenlm Python module (PyPI kenlm 0.3.0)"""
    m = estimate(CORPUS, 3)
    path = tmp_path / "e3.arpa"
    write_arpa(m, path)
    ref = kenlm.Model(str(path))
    for sent in random_sentences(m.vocab, 60, seed=3):
        assert plain_sentence(path, sent) == pytest.approx(ref.score(" ".join(sent)), abs=1e-4)


def test_witten_bell_unigram_by_hand():
    """Interpolated Witten-Bell, Chen & Goodman (1999) eq. 14, with a uniform floor;
    sums written out: text "a a b": tokens a a b </s> (N = 4), types T = 3
    (a, b, </s>), predicted vocabulary {a, b, </s>} (uniform 1/3).
    P(a) = (2 + 3/3) / (4 + 3) = 3/7; P(b) = P(</s>) = (1 + 1) / 7 = 2/7."""
    m = estimate([["a", "a", "b"]], 1)
    s = BackoffScorer(m)
    assert 10 ** s.logprob10((), "a") == pytest.approx(3 / 7)
    assert 10 ** s.logprob10((), "b") == pytest.approx(2 / 7)
    assert 10 ** s.logprob10((), "</s>") == pytest.approx(2 / 7)
    # bigram: history "a" saw a (1x), b (1x): c = 2, T = 2, bo = 2 / 4
    m2 = estimate([["a", "a", "b"]], 2)
    s2 = BackoffScorer(m2)
    assert 10 ** s2.logprob10(("a",), "b") == pytest.approx((1 + 2 * 2 / 7) / 4)
    assert 10 ** s2.logprob10(("a",), "</s>") == pytest.approx(0.5 * 2 / 7)
    assert math.isclose(sum(10 ** s2.logprob10(("a",), w) for w in ("a", "b", "</s>")), 1.0)
