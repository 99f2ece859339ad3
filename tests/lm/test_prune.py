"""Tests of netbuild.lm.prune: the relative-entropy criterion, pruning, renormalisation.

Outside references: the criterion is checked against a brute-force relative entropy
computed from its definition (Stolcke 1998, eq. for D(p || p')), the pruned models
against the kenlm Python module and against the normalisation of a probability
distribution.
"""

from __future__ import annotations

import json
import math
import pathlib

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from netbuild.cli import cli
from netbuild.errors import ProjectError
from netbuild.io.arpa import ArpaModel, NgramTable, read_arpa, write_arpa
from netbuild.lm.estimate import estimate, read_sentences
from netbuild.lm.prune import (BackoffTables, history_sums, prune_model, pruning_criteria,
                               renormalize_backoffs, write_model_atomically)
from netbuild.lm.query import BackoffScorer

DEMO = pathlib.Path(__file__).parents[2] / "examples" / "ropeway"

# An invented harbour-launch log, small enough for brute force over every n-gram.
HARBOUR = [
    "launch two leaving pier four",
    "launch two at pier four",
    "launch one leaving the breakwater",
    "pier four clear",
    "launch one at pier two",
    "the breakwater light is out",
    "launch two the light is out",
    "pier two clear launch one leaving",
]


def _small_model(order: int = 3) -> ArpaModel:
    return estimate([s.split() for s in HARBOUR], order)


def _without(model: ArpaModel, order: int, row: int) -> ArpaModel:
    """The model without n-gram `row` of `order`, its history's back-off weight
    renormalised from the definition (computed here, not by netbuild.lm.prune)."""
    t = model.orders[order - 1]
    scorer = BackoffScorer(model)
    gram = t.words[row]
    hist = gram[:-1]
    vocab = model.vocab
    same = np.flatnonzero((t.words[:, :-1] == hist).all(axis=1))
    others = [r for r in same.tolist() if r != row]
    kept_p = sum(10.0 ** t.logprob[r] for r in others)
    kept_q = sum(10.0 ** scorer.logprob10([vocab[i] for i in hist[1:]], vocab[t.words[r, -1]])
                 for r in others)
    alpha = (1.0 - kept_p) / (1.0 - kept_q)
    orders = []
    for k, tab in enumerate(model.orders):
        keep = np.ones(len(tab), bool)
        if k == order - 1:
            keep[row] = False
        orders.append(NgramTable(tab.order, tab.words[keep], tab.logprob[keep],
                                 tab.backoff[keep].copy(), tab.lines[keep]))
    h = orders[order - 2]
    hrow = np.flatnonzero((h.words == hist).all(axis=1))[0]
    h.backoff[hrow] = math.log10(alpha)
    return ArpaModel(list(vocab), orders, model.path)


def _history_prob(scorer: BackoffScorer, hist: list[str]) -> float:
    """P(h) by the chain rule, with P(<s>) = 1 at the start of a history."""
    total = 0.0
    for i, w in enumerate(hist):
        if i == 0 and w == "<s>":
            continue
        total += scorer.logprob10(hist[:i], w)
    return 10.0 ** total


def _brute_force_d(model: ArpaModel, order: int, row: int) -> float:
    """D(p || p') = sum_h P(h) sum_v p(v|h) ln(p(v|h) / p'(v|h)) over every history of
    length order - 1 and every predicted word (Stolcke 1998, section 2)."""
    before = BackoffScorer(model)
    after = BackoffScorer(_without(model, order, row))
    predicted = [w for w in model.vocab if w != "<s>"]
    total = 0.0
    for hrow in model.orders[order - 2].words.tolist():
        hist = [model.vocab[i] for i in hrow]
        if hist[-1] == "</s>":
            continue
        inner = 0.0
        for v in predicted:
            p = 10.0 ** before.logprob10(hist, v)
            q = 10.0 ** after.logprob10(hist, v)
            inner += p * math.log(p / q)
        total += _history_prob(before, hist) * inner
    return total


def test_criterion_equals_brute_force_relative_entropy():
    # reference: Stolcke (1998), "Entropy-based pruning of backoff language models",
    # arXiv:cs/0006025, section 2: D(p||p') summed over histories and words, with the
    # back-off weight of the pruned history renormalised.
    model = _small_model(3)
    crit = pruning_criteria(model)
    checked = 0
    for order in (2, 3):
        for row in range(len(model.orders[order - 1])):
            expected = _brute_force_d(model, order, row)
            assert crit[order - 1][row] == pytest.approx(expected, rel=1e-7, abs=1e-13)
            checked += 1
    assert checked == sum(model.counts()[1:])
    assert np.isnan(crit[0]).all()  # unigrams are never candidates


def test_renormalizing_a_normalized_model_changes_nothing():
    # reference: Witten-Bell in back-off form is normalised by construction
    # (Chen & Goodman 1999, eq. 14; netbuild.lm.estimate), so recomputing each
    # alpha(h) = (1 - sum p(w|h)) / (1 - sum p(w|h')) must give the stored weights.
    model = _small_model(3)
    again = renormalize_backoffs(model)
    for a, b in zip(model.orders, again.orders):
        np.testing.assert_allclose(a.backoff, b.backoff, atol=1e-9)


def test_threshold_zero_keeps_every_ngram():
    model = _small_model(3)
    result = prune_model(model, 0.0)
    assert result.model.counts() == model.counts()


def test_infinite_threshold_leaves_a_normalized_unigram_model():
    model = _small_model(3)
    result = prune_model(model, math.inf)
    assert result.model.max_order == 1
    assert result.model.counts() == [len(model.orders[0])]
    # reference: a probability distribution sums to 1 (# common practice, no source)
    assert history_sums(result.model) == pytest.approx([1.0], abs=1e-9)


@pytest.fixture(scope="module")
def demo_model() -> ArpaModel:
    return read_arpa(DEMO / "model.arpa")


@pytest.fixture(scope="module")
def pruned_demo(demo_model, tmp_path_factory) -> tuple[ArpaModel, pathlib.Path]:
    result = prune_model(demo_model, 2e-5)
    path = tmp_path_factory.mktemp("pruned") / "pruned.arpa"
    write_model_atomically(result.model, path)
    return read_arpa(path), path


def test_pruned_histories_sum_to_one(demo_model, pruned_demo):
    model, _ = pruned_demo
    assert sum(model.counts()) < sum(demo_model.counts())  # something was pruned
    # reference: a probability distribution sums to 1 (# common practice, no source);
    # every history of the pruned model, brute force over the vocabulary
    sums = history_sums(model)
    assert len(sums) > 1000
    np.testing.assert_allclose(sums, 1.0, atol=1e-6)
    # the same for a sample of histories with the dictionary scorer (independent code)
    scorer = BackoffScorer(model)
    predicted = [w for w in model.vocab if w != "<s>"]
    for hrow in model.orders[1].words[::97].tolist():
        hist = [model.vocab[i] for i in hrow]
        if hist[-1] == "</s>":
            continue
        total = sum(10.0 ** scorer.logprob10(hist, w) for w in predicted)
        assert total == pytest.approx(1.0, abs=1e-6)


def test_every_kept_ngram_keeps_its_history(pruned_demo):
    model, _ = pruned_demo
    tables = BackoffTables(model)
    for order in range(2, model.max_order + 1):
        t = model.orders[order - 1]
        assert (tables.row(order - 1, t.words[:, :-1]) >= 0).all()


def test_kenlm_scores_the_pruned_model_like_netbuild(pruned_demo):
    kenlm = pytest.importorskip("kenlm")
    model, path = pruned_demo
    ken = kenlm.Model(str(path))
    ours = BackoffScorer(model)
    sentences = read_sentences(DEMO / "corpus.txt")[:150]
    compared = 0
    for words in sentences:
        scores = [s for s, _, _ in ken.full_scores(" ".join(words), bos=True, eos=True)]
        history = ["<s>"]
        for w, ks in zip([*words, "</s>"], scores):
            # reference: kenlm Python module, PyPI kenlm 0.3.0, Model.full_scores (log10)
            assert ours.logprob10(history, w) == pytest.approx(ks, abs=1e-4)
            history.append(w)
            compared += 1
    assert compared > 1000


def test_higher_threshold_never_keeps_more(demo_model):
    crit = pruning_criteria(demo_model)
    previous = None
    for threshold in [0.0, 1e-8, 1e-7, 3e-7, 1e-6, 3e-6, 1e-5, 3e-5, 1e-4, 1e-3, math.inf]:
        kept = prune_model(demo_model, threshold, crit).kept
        if previous is not None:
            for a, b in zip(previous, kept):
                assert not (b & ~a).any()  # the kept set only shrinks
        previous = kept


@settings(max_examples=25)
@given(st.lists(st.lists(st.sampled_from("abcde"), min_size=1, max_size=6),
                min_size=1, max_size=12),
       st.floats(1e-6, 1e-1), st.floats(1.0, 100.0))
def test_property_monotone_and_normalized(sentences, threshold, factor):
    model = estimate(sentences, 3)
    low = prune_model(model, threshold)
    high = prune_model(model, threshold * factor, low.criteria)
    assert high.ngrams <= low.ngrams
    for a, b in zip(low.kept, high.kept):
        assert not (b & ~a).any()
    # reference: a probability distribution sums to 1 (# common practice, no source)
    np.testing.assert_allclose(history_sums(high.model), 1.0, atol=1e-6)


def test_protected_history_is_kept(demo_model):
    # A bigram weaker than one of its trigram continuations: a threshold between the
    # two removes the bigram on its own merit, but it must stay as the history.
    model = demo_model
    crit = pruning_criteria(model)
    tables = BackoffTables(model)
    tri = model.orders[2]
    hist_rows = tables.row(2, tri.words[:, :2])
    best = np.full(len(model.orders[1]), -np.inf)
    np.maximum.at(best, hist_rows, crit[2])
    weak = np.flatnonzero(crit[1] < best)
    assert weak.size  # the demo model has such bigrams
    row = int(weak[np.argmax(best[weak] - crit[1][weak])])
    threshold = math.sqrt(crit[1][row] * best[row])  # between the two criteria
    result = prune_model(model, threshold)
    assert not crit[1][row] >= threshold
    assert result.kept[1][row]
    assert result.protected[1] >= 1
    kept_rows = np.flatnonzero(result.kept[2] & (hist_rows == row))
    assert kept_rows.size  # the continuation that needs it survived


def test_negative_threshold_is_refused():
    with pytest.raises(ProjectError, match="not a number >= 0"):
        prune_model(_small_model(2), -1.0)


def test_cli_prune_json(runner, tmp_path):
    src = tmp_path / "small.arpa"
    write_arpa(_small_model(3), src)
    out = tmp_path / "pruned.arpa"
    heldout = tmp_path / "heldout.txt"
    heldout.write_text("launch two leaving pier two\npier four clear\n", encoding="utf-8")
    res = runner.invoke(cli, ["prune", "--lm", str(src), "--threshold", "0.01", "-o", str(out),
                              "--heldout", str(heldout), "--json"])
    assert res.exit_code == 0, res.output
    data = json.loads(res.stdout)
    assert data["counts_before"] == _small_model(3).counts()
    assert data["counts_after"] == read_arpa(out).counts()
    assert sum(data["counts_after"]) < sum(data["counts_before"])
    assert data["heldout"]["perplexity_after"] >= 1.0


def test_cli_prune_infinite_and_nan_thresholds(runner, tmp_path):
    src = tmp_path / "small.arpa"
    write_arpa(_small_model(3), src)
    out = tmp_path / "uni.arpa"
    res = runner.invoke(cli, ["prune", "--lm", str(src), "--threshold", "inf", "-o", str(out),
                              "--json"])
    assert res.exit_code == 0, res.output
    data = json.loads(res.stdout)
    assert data["threshold"] is None and len(data["counts_after"]) == 1
    assert read_arpa(out).max_order == 1
    res = runner.invoke(cli, ["prune", "--lm", str(src), "--threshold", "nan", "-o", str(out)])
    assert res.exit_code == 1
    assert res.stderr.startswith("--threshold: pruning threshold nan is not a number >= 0;")


def test_cli_prune_reports_a_bad_model_with_its_line(runner, tmp_path):
    bad = tmp_path / "bad.arpa"
    bad.write_text("\\data\\\nngram 1=2\n\n\\1-grams:\n-1.0\tx\nnot-a-number\ty\n\\end\\\n",
                   encoding="utf-8")
    res = runner.invoke(cli, ["prune", "--lm", str(bad), "--threshold", "1e-5",
                              "-o", str(tmp_path / "o.arpa")])
    assert res.exit_code == 1
    assert f"{bad}:6:" in res.stderr
    assert "Traceback" not in res.stderr
    assert not (tmp_path / "o.arpa").exists()
