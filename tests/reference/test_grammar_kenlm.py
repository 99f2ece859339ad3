"""G's sentence costs against the kenlm reference scorer.

Sources: the `kenlm` Python module (PyPI kenlm 0.3.0), whose `Model.score(sentence,
bos=True, eos=True)` returns the total log10 probability of a sentence under the ARPA
back-off rule; and the ARPA back-off rule itself (Katz 1987, IEEE Trans. ASSP 35(3),
400-401, doi:10.1109/TASSP.1987.1165125), written out below in plain Python that shares
no code with netbuild and is itself checked against kenlm.
"""

from __future__ import annotations

import functools
import math
import random
from collections import Counter, defaultdict

import numpy as np
import pytest

from netbuild.builders.grammar import build_grammar
from netbuild.inspectors.score import score_sentences
from netbuild.io.arpa import ArpaModel, NgramTable

kenlm = pytest.importorskip("kenlm")

LN10 = math.log(10.0)

# An invented scenario: announcements in a mountain ropeway.
ROPEWAY_SENTENCES = """\
the cable car leaves the valley station every ten minutes
the next cable car to the summit leaves in five minutes
please keep your ticket ready at the gate
the summit station is closed because of strong wind
the gondola stops at the middle station
please step back from the doors of the cable car
tickets for the summit are sold at the valley station
the last cable car to the valley leaves at six
children ride the gondola for half price
the middle station has a small restaurant
please hold the hand rail in the cable car
the summit restaurant opens at ten
strong wind may stop the gondola
the valley station has a ticket office and a shop
the cable car to the summit is full please wait for the next one
""".splitlines()


# --------------------------------------------------------------------- plain-Python side

def parse_arpa(text: str) -> dict:
    """ARPA text -> {"order": N, "prob": {ngram: log10}, "bow": {ngram: log10}}."""
    prob, bow, order, section = {}, {}, 0, 0
    for raw in text.splitlines():
        line = raw.strip()
        if not line or line.startswith("\\data") or line.startswith("ngram "):
            continue
        if line.endswith("-grams:"):
            section = int(line[1:line.index("-")])
            order = max(order, section)
            continue
        if line == "\\end\\":
            break
        parts = line.split()
        words = tuple(parts[1:1 + section])
        prob[words] = float(parts[0])
        if len(parts) > 1 + section:
            bow[words] = float(parts[1 + section])
    return {"order": order, "prob": prob, "bow": bow}


def conditional_log10(lm: dict, context: tuple, word: str) -> float:
    """log10 P(word | context) by the ARPA back-off rule (Katz 1987)."""
    cost = 0.0
    while context + (word,) not in lm["prob"]:
        if not context:
            return -math.inf
        cost += lm["bow"].get(context, 0.0)
        context = context[1:]
    return cost + lm["prob"][context + (word,)]


def backoff_rule_log10(lm: dict, sentence: list[str]) -> float:
    """Total log10 P(sentence + </s> | <s>) by the ARPA back-off rule (Katz 1987)."""
    n = lm["order"]
    history = ["<s>"]
    total = 0.0
    for word in [*sentence, "</s>"]:
        context = tuple(history[-(n - 1):]) if n > 1 else ()
        total += conditional_log10(lm, context, word)
        history.append(word)
    return total


def backoff_automaton(lm: dict):
    """The back-off automaton over history tuples, straight from the definitions.

    Returns (start, arcs, backoff, final): arcs[h][w] = (cost, next history),
    backoff[h] = (cost, next history), final[h] = cost; costs in log10 units.
    """
    n = lm["order"]
    bow = lm["bow"]
    histories = {()} | {g[:-1] for g in lm["prob"] if len(g) > 1}
    if n > 1:
        histories.add(("<s>",))
    # A history that is no n-gram (a hole) is entered by an arc carrying the rule's
    # probability; its prefix is then a history as well.
    prob = dict(lm["prob"])
    queue = [h for h in histories if h and h not in prob]
    while queue:
        h = queue.pop()
        if h in prob or len(h) == 1:
            continue
        prob[h] = conditional_log10(lm, h[:-1], h[-1])
        if h[:-1] not in histories:
            histories.add(h[:-1])
            queue.append(h[:-1])

    def settle(seq: tuple) -> tuple[float, tuple]:
        # Longest suffix that is a history; skipped suffixes contribute their alpha.
        seq = seq[-(n - 1):] if n > 1 else ()
        cost = 0.0
        while seq not in histories:
            cost += bow.get(seq, 0.0)
            seq = seq[1:]
        return cost, seq

    arcs: dict = defaultdict(dict)
    final: dict = {}
    for g, p in prob.items():
        h, w = g[:-1], g[-1]
        if w == "</s>":
            final[h] = p
        elif w != "<s>":
            extra, dest = settle(g)
            arcs[h][w] = (p + extra, dest)
    backoff = {}
    for h in histories:
        if h:
            extra, dest = settle(h[1:])
            backoff[h] = (bow.get(h, 0.0) + extra, dest)
    start = ("<s>",) if n > 1 else ()
    return start, arcs, backoff, final


def cheapest_path_log10(automaton, sentence: list[str]) -> float:
    """Brute force over every back-off path: max log10 weight reading `sentence`."""
    start, arcs, backoff, final = automaton

    @functools.lru_cache(maxsize=None)
    def best(i: int, h: tuple) -> float:
        options = []
        if i == len(sentence):
            if h in final:
                options.append(final[h])
        elif sentence[i] in arcs.get(h, {}):
            cost, dest = arcs[h][sentence[i]]
            options.append(cost + best(i + 1, dest))
        if h in backoff:
            cost, dest = backoff[h]
            options.append(cost + best(i, dest))
        return max(options, default=-math.inf)

    return best(0, start)


def estimate_normalized(sentences: list[list[str]], order: int, discount: float = 0.5
                        ) -> dict:
    """A normalized back-off model: absolute discounting, back-off weights from the
    normalization condition sum_w P(w | h) = 1 (Ney, Essen & Kneser 1994, Computer
    Speech & Language 8(1), 1-38, doi:10.1006/csla.1994.1001)."""
    counts = [Counter() for _ in range(order + 1)]
    for s in sentences:
        padded = ["<s>", *s, "</s>"]
        for k in range(1, order + 1):
            for i in range(len(padded) - k + 1):
                g = tuple(padded[i:i + k])
                if k == 1 and g == ("<s>",):
                    continue
                if k > 1 and "<s>" in g[1:]:
                    continue
                counts[k][g] += 1
    total = sum(counts[1].values())
    prob = {g: math.log10(c / total) for g, c in counts[1].items()}
    prob[("<s>",)] = -99.0
    lin = {g: c / total for g, c in counts[1].items()}
    for k in range(2, order + 1):
        ctx_total = Counter()
        for g, c in counts[k].items():
            ctx_total[g[:-1]] += c
        for g, c in counts[k].items():
            p = (c - discount) / ctx_total[g[:-1]]
            lin[g] = p
            prob[g] = math.log10(p)
    lower_lin = {g: v for g, v in lin.items()}

    def p_lower(h: tuple, w: str) -> float:
        while h + (w,) not in lower_lin:
            h = h[1:]
        return lower_lin[h + (w,)]

    bow = {}
    for k in range(1, order):
        by_ctx = defaultdict(list)
        for g in counts[k + 1]:
            by_ctx[g[:-1]].append(g[-1])
        for h, ws in by_ctx.items():
            seen = sum(lin[h + (w,)] for w in ws)
            lower = sum(p_lower(h[1:], w) for w in ws)
            bow[h] = math.log10((1.0 - seen) / (1.0 - lower))
    return {"order": order, "prob": prob, "bow": bow}


def arpa_text(lm: dict) -> str:
    by_order = defaultdict(list)
    for g in lm["prob"]:
        by_order[len(g)].append(g)
    out = ["\\data\\"] + [f"ngram {k}={len(by_order[k])}" for k in sorted(by_order)]
    for k in sorted(by_order):
        out += ["", f"\\{k}-grams:"]
        for g in sorted(by_order[k]):
            line = f"{lm['prob'][g]!r}\t{' '.join(g)}"
            if g in lm["bow"] and k < lm["order"]:
                line += f"\t{lm['bow'][g]!r}"
            out.append(line)
    return "\n".join(out + ["", "\\end\\", ""])


def to_model(lm: dict) -> ArpaModel:
    """The netbuild record for a parsed model, built directly (no netbuild reader)."""
    vocab = sorted({w for g in lm["prob"] if len(g) == 1 for w in g})
    index = {w: i for i, w in enumerate(vocab)}
    tables = []
    for k in range(1, lm["order"] + 1):
        grams = sorted(g for g in lm["prob"] if len(g) == k)
        tables.append(NgramTable(
            k, np.array([[index[w] for w in g] for g in grams], dtype=np.int32).reshape(-1, k),
            np.array([lm["prob"][g] for g in grams]),
            np.array([lm["bow"].get(g, 0.0) for g in grams]),
            np.zeros(len(grams), dtype=np.int64)))
    return ArpaModel(vocab, tables)


def random_sentences(words: list[str], count: int, seed: int) -> list[list[str]]:
    rng = random.Random(seed)
    return [[rng.choice(words) for _ in range(rng.randint(0, 8))] for _ in range(count)]


# A hand-written model: the context "cable car" of two trigrams has no bigram (a hole),
# "valley ticket" is a bigram whose back-off weight is folded into its arc (it is no
# history), and -99 entries stand for zero probabilities.
HAND_ARPA = """\
\\data\\
ngram 1=7
ngram 2=7
ngram 3=4

\\1-grams:
-99\t<s>\t-0.30103
-0.90\t</s>
-0.70\tcable\t-0.20
-0.85\tcar\t-0.25
-1.20\tsummit\t-0.10
-1.10\tvalley\t-0.40
-99\tticket\t-0.50

\\2-grams:
-0.30\t<s> cable\t-0.15
-0.50\tcar summit\t-0.05
-0.60\tcar </s>
-99\tsummit </s>
-0.70\tvalley car\t-0.10
-0.40\tvalley ticket\t-0.35
-0.45\tticket </s>

\\3-grams:
-0.20\t<s> cable car
-0.10\tcable car summit
-0.25\tcable car </s>
-0.30\tvalley car </s>

\\end\\
"""


def compare(lm: dict, sentences: list[list[str]], tmp_path) -> tuple[int, int]:
    """Asserts kenlm = rule = G walk, and G best path = brute force; returns the number
    of sentences whose best path is cheaper than the back-off cost, as seen by netbuild
    and as predicted by the brute force."""
    path = tmp_path / "model.arpa"
    path.write_text(arpa_text(lm), encoding="utf-8")
    ref = kenlm.Model(str(path))
    g = build_grammar(to_model(lm)).fst
    automaton = backoff_automaton(lm)
    scores = score_sentences(g, sentences)
    seen = predicted = 0
    for s, score in zip(sentences, scores):
        ken = -LN10 * ref.score(" ".join(s), bos=True, eos=True)
        rule = -LN10 * backoff_rule_log10(lm, s)
        # kenlm and G both store float32 values: allow their rounding on large costs.
        assert math.isclose(rule, ken, rel_tol=1e-6, abs_tol=1e-4), s
        assert math.isclose(score.lm_cost, ken, rel_tol=1e-6, abs_tol=1e-4), s
        assert score.best_path_cost <= score.lm_cost + 1e-6 * max(1.0, score.lm_cost), s
        brute = -LN10 * cheapest_path_log10(automaton, s)
        assert math.isclose(score.best_path_cost, brute, rel_tol=1e-6, abs_tol=1e-4), s
        differs = score.best_path_cost < score.lm_cost - 1e-3
        seen += differs
        predicted += brute < rule - 1e-3
    return seen, predicted


def test_estimated_model_matches_kenlm(tmp_path):
    """kenlm vs G on 300 random sentences over a normalized trigram estimated from the
    ropeway sentences (reference: kenlm Python module, PyPI kenlm 0.3.0)."""
    corpus = [s.split() for s in ROPEWAY_SENTENCES if s]
    lm = estimate_normalized(corpus, order=3)
    # Normalization of the estimator itself: sum_w P(w | h) = 1 for a few contexts.
    words = sorted({w for s in corpus for w in s} | {"</s>"})
    for h in [("<s>",), ("the",), ("the", "cable")]:
        total = 0.0
        for w in words:
            ctx, cost = h, 0.0
            while ctx + (w,) not in lm["prob"]:
                cost += lm["bow"].get(ctx, 0.0)
                ctx = ctx[1:]
            total += 10 ** (cost + lm["prob"][ctx + (w,)])
        assert total == pytest.approx(1.0, abs=1e-9)
    sentences = random_sentences(sorted({w for s in corpus for w in s}), 300, seed=7)
    sentences += corpus
    seen, predicted = compare(lm, sentences, tmp_path)
    print(f"estimated model: best path cheaper than back-off cost in {seen} of "
          f"{len(sentences)} sentences")
    assert seen == predicted


def test_hand_model_with_holes_matches_kenlm(tmp_path):
    """kenlm vs G on 250 random sentences over a hand-written model with a hole, a folded
    back-off weight and -99 entries (reference: kenlm Python module, PyPI kenlm 0.3.0;
    kenlm treats -99 as the number it is, as G does)."""
    lm = parse_arpa(HAND_ARPA)
    words = ["cable", "car", "summit", "valley", "ticket"]
    sentences = random_sentences(words, 250, seed=11)
    sentences += [["cable", "car"], ["cable", "car", "summit"], ["valley", "ticket"]]
    seen, predicted = compare(lm, sentences, tmp_path)
    print(f"hand model: best path cheaper than back-off cost in {seen} of "
          f"{len(sentences)} sentences")
    assert seen == predicted
    assert seen > 0  # the -99 entries make back-off paths cheaper for some sentences


def test_plain_rule_agrees_with_kenlm_on_hand_model(tmp_path):
    """The plain-Python rule used by the property tests, checked against kenlm on the
    hand model (reference: kenlm Python module, PyPI kenlm 0.3.0)."""
    path = tmp_path / "hand.arpa"
    path.write_text(HAND_ARPA, encoding="utf-8")
    ref = kenlm.Model(str(path))
    lm = parse_arpa(HAND_ARPA)
    for s in random_sentences(["cable", "car", "summit", "valley", "ticket"], 200, seed=3):
        assert backoff_rule_log10(lm, s) == pytest.approx(ref.score(" ".join(s)),
                                                          rel=1e-6, abs=1e-4)


def test_netbuild_estimator_model_matches_kenlm(tmp_path):
    """The whole chain netbuild uses: its Witten-Bell estimator, its ARPA writer and
    reader, then G; lm_cost through G equals kenlm's score on the same file for 250
    random sentences, and the cheapest path is never dearer (reference: kenlm Python
    module, PyPI kenlm 0.3.0)."""
    from netbuild.io.arpa import read_arpa, write_arpa
    from netbuild.lm.estimate import estimate

    corpus = [s.split() for s in ROPEWAY_SENTENCES if s]
    path = tmp_path / "wb.arpa"
    write_arpa(estimate(corpus, order=3), path)
    ref = kenlm.Model(str(path))
    g = build_grammar(read_arpa(path)).fst
    words = sorted({w for s in corpus for w in s})
    sentences = random_sentences(words, 250, seed=23) + corpus
    cheaper = 0
    for s, score in zip(sentences, score_sentences(g, sentences)):
        ken = -LN10 * ref.score(" ".join(s), bos=True, eos=True)
        assert math.isclose(score.lm_cost, ken, rel_tol=1e-6, abs_tol=1e-4), s
        assert score.best_path_cost <= score.lm_cost + 1e-6 * max(1.0, score.lm_cost), s
        cheaper += score.best_path_cost < score.lm_cost - 1e-3
    print(f"estimator model: best path cheaper than back-off cost in {cheaper} of "
          f"{len(sentences)} sentences")
