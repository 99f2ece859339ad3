"""G from ARPA models (hand-built records), the vocabulary policy, and sentence scores."""

from __future__ import annotations

import math

import numpy as np
import pytest

from netbuild.builders.grammar import build_grammar
from netbuild.builders.vocabulary import restrict_vocabulary
from netbuild.errors import ArpaError, InputError, SymbolError
from netbuild.inspectors.score import score_sentence, score_sentences
from netbuild.io.arpa import ArpaModel, NgramTable
from netbuild.io.fstfile import fst_to_arrays
from netbuild.symbols import BACKOFF, EPSILON

LN10 = math.log(10.0)


def model(entries: list[tuple], path: str = "lm.arpa") -> ArpaModel:
    """entries: (log10prob, "w1 w2 ...", log10backoff); line numbers follow list order."""
    vocab = [e[1] for e in entries if " " not in e[1]]
    index = {w: i for i, w in enumerate(vocab)}
    top = max(len(e[1].split()) for e in entries)
    tables = []
    for k in range(1, top + 1):
        rows = [(i + 1, e) for i, e in enumerate(entries) if len(e[1].split()) == k]
        tables.append(NgramTable(
            k, np.array([[index[w] for w in e[1].split()] for _, e in rows],
                        dtype=np.int32).reshape(-1, k),
            np.array([e[0] for _, e in rows], dtype=np.float64),
            np.array([e[2] if len(e) > 2 else 0.0 for _, e in rows], dtype=np.float64),
            np.array([i for i, _ in rows], dtype=np.int64)))
    return ArpaModel(vocab, tables, path)


def arcs(g):
    """{(state, input word): (output word, weight, next state)} from G."""
    a = fst_to_arrays(g)
    sym = g.input_symbols()
    return {(int(s), sym.find(int(i))): (sym.find(int(o)), float(w), int(d))
            for s, i, o, w, d in zip(a.src, a.ilabel, a.olabel, a.weight, a.dst)}


BIGRAM = [(-99, "<s>", -0.5), (-0.6, "</s>"), (-0.4, "cable", -0.3), (-0.8, "car", -0.2),
          (-0.2, "<s> cable"), (-0.1, "cable car"), (-0.3, "car </s>")]


def test_bigram_structure_weights_start_and_final():
    r = build_grammar(model(BIGRAM))
    g = r.fst
    sym = g.input_symbols()
    # reference: log10 to tropical, -ln(10) * log10 P; e.g. -ln 10 * -0.2 = 0.460517.
    assert [sym.find(i) for i in range(sym.num_symbols())] == [EPSILON, "cable", "car",
                                                               BACKOFF]
    a = arcs(g)
    start = g.start()
    cable = a[(start, "cable")][2]
    assert a[(start, "cable")][1] == pytest.approx(0.2 * LN10, abs=1e-6)
    assert a[(cable, "car")][1] == pytest.approx(0.1 * LN10, abs=1e-6)
    assert a[(start, BACKOFF)][:2] == (EPSILON, pytest.approx(0.5 * LN10, abs=1e-6))
    unigram = a[(start, BACKOFF)][2]
    assert a[(cable, BACKOFF)][2] == unigram
    car = a[(cable, "car")][2]
    assert float(g.final(car)) == pytest.approx(0.3 * LN10, abs=1e-6)
    assert float(g.final(unigram)) == pytest.approx(0.6 * LN10, abs=1e-6)
    assert math.isinf(float(g.final(start)))  # no "<s> </s>": reached by back-off
    assert r.num_histories == g.num_states() == 4  # empty, <s>, cable, car
    assert not any(w in ("<s>", "</s>") for (_, w) in a)


def test_hole_gets_a_state_and_an_arc_by_the_rule():
    # "cable car" is a context of a trigram but no bigram: a hole.
    entries = [(-99, "<s>", -0.5), (-0.6, "</s>"), (-0.4, "cable", -0.3),
               (-0.8, "car", -0.2), (-0.2, "<s> cable", -0.1), (-0.3, "car </s>"),
               (-0.05, "<s> cable car"), (-0.15, "cable car </s>")]
    r = build_grammar(model(entries))
    assert r.filled_holes == 1
    a = arcs(r.fst)
    sc = score_sentence(r.fst, ["cable", "cable", "car"])
    # reference: ARPA back-off rule by hand (log10):
    # P(cable|<s>) = -0.2; P(cable|<s> cable) = bo(<s> cable) + bo(cable) + P(cable)
    # = -0.1 - 0.3 - 0.4; P(car|cable cable) = bo(cable) + P(car) = -0.3 - 0.8 (the
    # filled hole "cable car"); P(</s>|cable car) = -0.15.
    expected = -(-0.2 - 0.8 - 1.1 - 0.15) * LN10
    assert sc.lm_cost == pytest.approx(expected, abs=1e-5)
    hole = [k for k, v in a.items() if k[1] == "car" and v[1] == pytest.approx(1.1 * LN10)]
    assert hole  # the filled arc cable --car--> (cable car)


def test_folding_keeps_the_rule_exact():
    # "valley ticket" has a back-off weight but no continuation: its arc goes to the
    # unigram state and carries bo(valley ticket) + bo(ticket).
    entries = [(-99, "<s>"), (-0.6, "</s>"), (-0.5, "valley", -0.2),
               (-0.9, "ticket", -0.4), (-0.3, "valley ticket", -0.25),
               (-0.2, "valley valley", -0.1), (-0.1, "valley valley ticket")]
    r = build_grammar(model(entries))
    a = arcs(r.fst)
    valley = a[(a[(r.fst.start(), BACKOFF)][2], "valley")][2]
    w, dest = a[(valley, "ticket")][1:]
    assert w == pytest.approx((0.3 + 0.25 + 0.4) * LN10, abs=1e-5)
    assert dest == a[(r.fst.start(), BACKOFF)][2]  # the unigram state
    assert r.folded_ngrams >= 1
    sc = score_sentence(r.fst, ["valley", "ticket"])
    # reference: rule by hand: bo(<s>)=0 + P(valley) -0.5; P(ticket|valley) -0.3;
    # P(</s>|valley ticket) = bo(valley ticket) -0.25 + bo(ticket) -0.4 + P(</s>) -0.6.
    assert sc.lm_cost == pytest.approx((0.5 + 0.3 + 0.25 + 0.4 + 0.6) * LN10, abs=1e-5)


def test_minus_99_keeps_its_cost():
    r = build_grammar(model([(-99, "<s>"), (-0.3, "</s>"), (-99, "gondola"),
                             (-0.2, "cable")]))
    a = arcs(r.fst)
    unigram = r.fst.start()  # unigram model: the start is the empty history
    assert a[(unigram, "gondola")][1] == pytest.approx(99 * LN10, rel=1e-6)
    assert score_sentence(r.fst, ["gondola"]).lm_cost == pytest.approx(99.3 * LN10,
                                                                       rel=1e-6)


def test_unigram_only_model():
    r = build_grammar(model([(-99, "<s>", -1.0), (-0.5, "</s>"), (-0.4, "cable"),
                             (-0.7, "car")]))
    g = r.fst
    assert g.num_states() == 1 and r.num_histories == 1
    assert float(g.final(g.start())) == pytest.approx(0.5 * LN10, abs=1e-6)
    # reference: with order 1 every context is empty, so bo(<s>) is never used.
    sc = score_sentence(g, ["car", "cable"])
    assert sc.lm_cost == pytest.approx((0.7 + 0.4 + 0.5) * LN10, abs=1e-5)
    assert sc.best_path_cost == pytest.approx(sc.lm_cost, abs=1e-5)


def test_model_errors_are_located():
    with pytest.raises(ArpaError, match=r"lm.arpa: the model has no </s>"):
        build_grammar(model([(-99, "<s>"), (-0.3, "cable")]))
    with pytest.raises(ArpaError, match=r"lm.arpa:3: word '!backoff' is a reserved"):
        build_grammar(model([(-99, "<s>"), (-0.3, "</s>"), (-0.5, "!backoff")]))


def test_scores_oov_and_unk():
    plain = build_grammar(model(BIGRAM)).fst
    sc = score_sentence(plain, ["cable", "funicular"])
    assert sc.oov == ("funicular",) and math.isinf(sc.lm_cost)
    assert sc.to_json()["lm_cost"] is None and sc.to_json()["oov"] == ["funicular"]
    with_unk = build_grammar(model([*BIGRAM[:4], (-1.5, "<unk>"), *BIGRAM[4:]])).fst
    a, b = score_sentences(with_unk, [["cable", "funicular"], ["cable", "<unk>"]])
    assert a.oov == ("funicular",) and a.lm_cost == pytest.approx(b.lm_cost)
    assert math.isfinite(a.lm_cost) and a.best_path_cost <= a.lm_cost + 1e-6


def test_score_needs_a_symbol_table():
    g = build_grammar(model(BIGRAM)).fst
    g.set_input_symbols(None)
    with pytest.raises(SymbolError, match="no input symbol table"):
        score_sentence(g, ["cable"])


VOCAB = [(-99, "<s>", -0.3), (-0.6, "</s>"), (-0.5, "cable", -0.2), (-1.0, "car", -0.1),
         (-1.2, "gondola", -0.1), (-0.2, "<s> cable"), (-0.4, "cable car"),
         (-0.7, "cable gondola"), (-0.3, "gondola car")]


def test_drop_policy():
    m = model(VOCAB)
    out, rep = restrict_vocabulary(m, {"cable", "car"}, "drop")
    assert rep.dropped == ["gondola"]
    assert rep.removed_unigram_mass == pytest.approx(10 ** -1.2)
    assert out.vocab == ["<s>", "</s>", "cable", "car"]
    assert out.counts() == [4, 2]
    assert [" ".join(out.vocab[i] for i in r) for r in out.orders[1].words] == [
        "<s> cable", "cable car"]
    assert restrict_vocabulary(m, {"cable", "car", "gondola"}, "drop")[0] is m


def test_unk_policy_merges_probabilities():
    m = model(VOCAB)
    out, rep = restrict_vocabulary(m, {"cable", "<unk>"}, "unk")
    assert rep.mapped_to_unk == ["car", "gondola"]
    idx = out.word_index()
    bigrams = {tuple(out.vocab[i] for i in r): p
               for r, p in zip(out.orders[1].words, out.orders[1].logprob)}
    # reference: sum of probabilities, log10(10^-0.4 + 10^-0.7).
    assert bigrams[("cable", "<unk>")] == pytest.approx(math.log10(10**-0.4 + 10**-0.7))
    assert ("gondola", "car") not in bigrams and "gondola" not in idx
    uni = {out.vocab[r[0]]: p for r, p in zip(out.orders[0].words, out.orders[0].logprob)}
    assert uni["<unk>"] == pytest.approx(math.log10(10**-1.0 + 10**-1.2))
    build_grammar(out)  # the result is a usable model


def test_unk_and_fail_policy_errors():
    m = model(VOCAB)
    with pytest.raises(InputError, match="no <unk> pronunciation"):
        restrict_vocabulary(m, {"cable"}, "unk")
    with pytest.raises(InputError, match=r"lm.arpa:4: 2 model words have no "
                                         r"pronunciation in the lexicon: 'car', 'gondola'"):
        restrict_vocabulary(m, {"cable"}, "fail")
    with pytest.raises(InputError, match="policy 'keep' is unknown"):
        restrict_vocabulary(m, {"cable"}, "keep")  # type: ignore[arg-type]


def test_row_order_does_not_change_g():
    # Sorted tables take the no-sort paths, shuffled ones the sorting paths: same G.
    rng = np.random.default_rng(7)
    vocab = ["</s>", "<s>"] + [f"w{i}" for i in range(30)]
    v = len(vocab)

    def table(n, k):
        rows = np.unique(rng.integers(0, v, size=(k, n)), axis=0).astype(np.int32)
        rows = rows[(rows[:, -1] != 1) & (rows[:, :-1] != 0).all(1)]
        lp = -rng.random(len(rows)) * 3
        bo = -rng.random(len(rows)) if n < 3 else np.zeros(len(rows))
        return NgramTable(n, rows, lp, bo, np.arange(len(rows), dtype=np.int64))

    uni = NgramTable(1, np.arange(v, dtype=np.int32)[:, None], -rng.random(v) * 3,
                     -rng.random(v), np.arange(v, dtype=np.int64))
    sorted_model = ArpaModel(vocab, [uni, table(2, 300), table(3, 600)])
    shuffled = []
    for t in sorted_model.orders:
        p = rng.permutation(len(t))
        shuffled.append(NgramTable(t.order, t.words[p], t.logprob[p], t.backoff[p],
                                   t.lines[p]))
    a = fst_to_arrays(build_grammar(sorted_model).fst)
    b = fst_to_arrays(build_grammar(ArpaModel(vocab, shuffled)).fst)
    assert a.num_arcs > 500 and a.num_states > 100
    for name in ("src", "ilabel", "olabel", "weight", "dst", "final_weights"):
        assert np.array_equal(getattr(a, name), getattr(b, name)), name
    assert (a.start, a.num_states) == (b.start, b.num_states)
