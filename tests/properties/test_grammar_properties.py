"""Property: G of random small back-off models follows the ARPA back-off rule exactly."""

from __future__ import annotations

import math

import numpy as np
from hypothesis import given
from hypothesis import strategies as st

from netbuild.builders.grammar import build_grammar
from netbuild.inspectors.score import score_sentences
from netbuild.io.arpa import ArpaModel, NgramTable

LN10 = math.log(10.0)
WORDS = ["<s>", "</s>", "cable", "car", "summit"]


def rule_log10(prob: dict, bow: dict, order: int, sentence: list[str]) -> float:
    """Plain-Python ARPA back-off rule (Katz 1987), independent of netbuild."""
    history, total = ["<s>"], 0.0
    for w in [*sentence, "</s>"]:
        ctx = tuple(history[-(order - 1):]) if order > 1 else ()
        while ctx + (w,) not in prob:
            if not ctx:
                return -math.inf
            total += bow.get(ctx, 0.0)
            ctx = ctx[1:]
        total += prob[ctx + (w,)]
        history.append(w)
    return total


def _draw_tables(draw, order: int, max_size: int, some_backoffs: bool):
    """(prob, bow): log10 probabilities of every unigram and of drawn n-grams up to
    `order`, back-off weights of the unigrams and (all, or with `some_backoffs` some)
    of the lower-order n-grams."""
    logp = st.sampled_from([-0.1, -0.4, -0.9, -1.7, -99.0])
    logb = st.sampled_from([0.0, -0.2, -0.5, 0.3])
    prob = {(w,): draw(logp) for w in WORDS}
    bow = {(w,): draw(logb) for w in WORDS if w != "</s>"}
    for k in range(2, order + 1):
        grams = draw(st.lists(st.tuples(*[st.sampled_from(WORDS[:1] + WORDS[2:])] * (k - 1),
                                        st.sampled_from(WORDS[1:])),
                              max_size=max_size, unique=True))
        for g in grams:
            if "<s>" in g[1:]:
                continue
            prob[g] = draw(logp)
            if k < order and (not some_backoffs or draw(st.booleans())):
                bow[g] = draw(logb)
    return prob, bow


@st.composite
def models(draw):
    order = draw(st.integers(1, 3))
    prob, bow = _draw_tables(draw, order, 10, some_backoffs=False)
    return order, prob, bow


def to_model(order, prob, bow) -> ArpaModel:
    index = {w: i for i, w in enumerate(WORDS)}
    tables = []
    for k in range(1, order + 1):
        grams = sorted(g for g in prob if len(g) == k)
        tables.append(NgramTable(
            k, np.array([[index[w] for w in g] for g in grams], np.int32).reshape(-1, k),
            np.array([prob[g] for g in grams]), np.array([bow.get(g, 0.0) for g in grams]),
            np.zeros(len(grams), np.int64)))
    return ArpaModel(list(WORDS), tables)


@given(models(), st.lists(st.lists(st.sampled_from(WORDS[2:]), max_size=6), min_size=1,
                          max_size=8))
def test_lm_cost_follows_the_backoff_rule(m, sentences):
    order, prob, bow = m
    g = build_grammar(to_model(order, prob, bow)).fst
    for s, score in zip(sentences, score_sentences(g, sentences)):
        expected = -LN10 * rule_log10(prob, bow, order, s)
        assert math.isclose(score.lm_cost, expected, rel_tol=1e-6, abs_tol=1e-4), s
        assert score.best_path_cost <= score.lm_cost + 1e-6 * max(1.0, score.lm_cost)


@st.composite
def id_ordered_models(draw):
    """Models up to 4-grams whose tables list their n-grams in word-id order, as ARPA
    files usually do (G's no-sort paths), with a permutation of each table's rows."""
    order = draw(st.integers(2, 4))
    prob, bow = _draw_tables(draw, order, 14, some_backoffs=True)
    index = {w: i for i, w in enumerate(WORDS)}
    tables, shuffled = [], []
    for k in range(1, order + 1):
        grams = sorted((g for g in prob if len(g) == k), key=lambda g: [index[w] for w in g])
        t = NgramTable(
            k, np.array([[index[w] for w in g] for g in grams], np.int32).reshape(-1, k),
            np.array([prob[g] for g in grams]), np.array([bow.get(g, 0.0) for g in grams]),
            np.arange(len(grams), dtype=np.int64))
        tables.append(t)
        p = np.array(draw(st.permutations(range(len(grams)))), dtype=np.int64)
        shuffled.append(NgramTable(k, t.words[p].reshape(-1, k), t.logprob[p], t.backoff[p],
                                   t.lines[p]))
    return order, prob, bow, ArpaModel(list(WORDS), tables), ArpaModel(list(WORDS), shuffled)


@given(id_ordered_models(), st.lists(st.lists(st.sampled_from(WORDS[2:]), max_size=6),
                                     min_size=1, max_size=6))
def test_row_order_does_not_change_g_and_the_rule_holds(m, sentences):
    from netbuild.io.fstfile import fst_to_arrays

    order, prob, bow, in_order, shuffled = m
    a, b = build_grammar(in_order), build_grammar(shuffled)
    fa, fb = fst_to_arrays(a.fst), fst_to_arrays(b.fst)
    assert (fa.num_states, fa.start) == (fb.num_states, fb.start)
    for name in ("src", "ilabel", "olabel", "weight", "dst", "final_weights"):
        assert getattr(fa, name).tobytes() == getattr(fb, name).tobytes(), name
    assert (a.folded_ngrams, a.folded_backoffs, a.filled_holes) == (
        b.folded_ngrams, b.folded_backoffs, b.filled_holes)
    for s, score in zip(sentences, score_sentences(a.fst, sentences)):
        # reference: the plain-Python back-off rule above (Katz 1987)
        expected = -LN10 * rule_log10(prob, bow, order, s)
        assert math.isclose(score.lm_cost, expected, rel_tol=1e-6, abs_tol=1e-4), s
