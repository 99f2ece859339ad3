"""The synthetic input generator of bench/synth.py at tiny sizes.

Checks that the generated files are accepted by netbuild's readers, have the requested
counts and shares, and that the model is normalised by the back-off rule.
"""

from __future__ import annotations

import importlib.util
import math
import sys
from collections import defaultdict
from pathlib import Path

import numpy as np
import pytest

from netbuild.errors import Diagnostics
from netbuild.options import LexiconOptions

_SYNTH = Path(__file__).resolve().parents[1] / "bench" / "synth.py"


@pytest.fixture(scope="module")
def synth():
    spec = importlib.util.spec_from_file_location("bench_synth", _SYNTH)
    module = importlib.util.module_from_spec(spec)
    sys.modules["bench_synth"] = module
    spec.loader.exec_module(module)
    return module


# ----------------------------------------------------------------- plain-Python helpers
# Independent of synth.py and of netbuild: parse the ARPA text and apply the back-off
# rule directly.


def parse_arpa_text(path: Path) -> tuple[dict[int, int], dict[tuple, tuple[float, float]]]:
    """Returns (header counts, {word tuple: (log10 prob, log10 backoff)})."""
    counts: dict[int, int] = {}
    grams: dict[tuple, tuple[float, float]] = {}
    order = 0
    for raw in path.read_text(encoding="utf-8").splitlines():
        line = raw.strip()
        if not line or line in ("\\data\\", "\\end\\"):
            continue
        if line.startswith("ngram "):
            k, n = line[6:].split("=")
            counts[int(k)] = int(n)
        elif line.startswith("\\") and line.endswith("-grams:"):
            order = int(line[1:-7])
        else:
            fields = line.split()
            words = tuple(fields[1:1 + order])
            backoff = float(fields[1 + order]) if len(fields) > 1 + order else 0.0
            grams[words] = (float(fields[0]), backoff)
    return counts, grams


def backoff_log10(grams: dict, history: tuple, word: str) -> float:
    """log10 P(word | history) by the ARPA back-off rule.

    # reference: the ARPA back-off rule, P(w|h) = P*(w|h) if (h, w) is listed, else
    # alpha(h) P(w|h minus its oldest word), alpha(h) = 1 when h is not listed
    # (from memory; the same rule the kenlm Python module applies, checked below).
    """
    if history + (word,) in grams:
        return grams[history + (word,)][0]
    alpha = grams[history][1] if history in grams else 0.0
    return alpha + backoff_log10(grams, history[1:], word)


# ----------------------------------------------------------------------------- lexicon


def test_lexicon_shares_and_reader(synth, tmp_path):
    n = 400
    lex = synth.synth_lexicon(n, seed=3, homophone_share=0.10, prefix_share=0.05,
                              variant_share=0.05)
    path = tmp_path / "lexicon.txt"
    synth.write_lexicon(lex, path, probabilities=True)
    synth.write_phones(tmp_path / "inventory.txt")

    # Independent count from the text: homophones share a phone string across words;
    # prefix words own a phone string that is a proper prefix of another entry's.
    by_pron: dict[tuple, set] = defaultdict(set)
    words = []
    for line in path.read_text(encoding="utf-8").splitlines():
        fields = line.split()
        word, prob, phones = fields[0], float(fields[1]), tuple(fields[2:])
        assert 0.0 < prob <= 1.0
        words.append(word)
        by_pron[phones].add(word)
    homophones = {w for ws in by_pron.values() if len(ws) > 1 for w in ws}
    prefixes_of_others = {p[:k] for p in by_pron for k in range(1, len(p))}
    prefix_words = {w for p, ws in by_pron.items() if p in prefixes_of_others for w in ws}

    assert len(set(words)) == n
    assert len(homophones) == 40  # 2 * round(0.10 * 400 / 2)
    assert len(prefix_words) == 20  # round(0.05 * 400)
    assert homophones == lex.homophone_words
    assert prefix_words == lex.prefix_words
    assert len(words) == n + 20  # 5 % of the words have a second pronunciation
    assert set(synth.PHONES) >= {p for pron in by_pron for p in pron}
    assert len(synth.PHONES) == 40

    from netbuild.io import lexicon as lexicon_io
    from netbuild.io import phones as phones_io

    if not hasattr(lexicon_io, "read_lexicon") or not hasattr(phones_io, "read_phones"):
        pytest.skip("the lexicon and phone readers are not in netbuild yet")
    diag = Diagnostics()
    inventory = phones_io.read_phones(tmp_path / "inventory.txt", diag)
    read = lexicon_io.read_lexicon(path, inventory, LexiconOptions(has_probabilities=True),
                                   diag)
    assert diag.errors == []
    assert inventory.optional_silence == synth.SILENCE_PHONE
    assert len(read.words()) == n
    assert len(read.entries) == n + 20
    assert {(e.word, e.phones) for e in read.entries} == \
        {(w, ph) for w, _, ph in lex.entries}


def test_lexicon_without_probabilities(synth, tmp_path):
    lex = synth.synth_lexicon(50, seed=1, variant_share=0.0)
    path = tmp_path / "lexicon.txt"
    synth.write_lexicon(lex, path, probabilities=False)
    for line in path.read_text(encoding="utf-8").splitlines():
        word, *phones = line.split()
        assert phones and all(p in synth.PHONES for p in phones)


def test_lexicon_rejects_impossible_shares(synth):
    with pytest.raises(ValueError, match="more than all words"):
        synth.synth_lexicon(10, homophone_share=0.8, prefix_share=0.5)


def test_word_spellings_distinct(synth):
    words = synth.word_spellings(6000)  # crosses the two-syllable boundary (70 + 4900)
    assert len(set(words)) == 6000
    assert all(w.isalpha() and w.islower() for w in words)


# ------------------------------------------------------------------------------- model


def test_arpa_counts_reader_and_holes(synth, tmp_path):
    n_words, n_ngrams = 120, 3000
    model = synth.synth_arpa(n_words, n_ngrams, seed=5, hole_share=0.02)
    path = tmp_path / "model.arpa"
    synth.write_arpa_text(model, path)
    counts, grams = parse_arpa_text(path)
    assert sum(counts.values()) == n_ngrams
    assert counts[1] == n_words + 2
    assert len(grams) == n_ngrams  # no duplicate n-gram
    trigrams = [g for g in grams if len(g) == 3]
    holes = [g for g in trigrams if g[:2] not in grams]
    assert len(holes) == round(0.02 * counts[3])
    # Every hole history is reached by some trigram ending in it.
    ends = {g[1:] for g in trigrams}
    assert {g[:2] for g in holes} <= ends
    assert grams[("<s>",)][0] == -99.0
    assert all(lp <= 0.0 for lp, _ in grams.values())
    # Most trigrams continue their suffix bigram (the default misses 2 %).
    with_suffix = sum(g[1:] in grams for g in trigrams)
    assert with_suffix >= 0.9 * len(trigrams)

    from netbuild.io import arpa as arpa_io

    if not hasattr(arpa_io, "read_arpa"):
        pytest.skip("read_arpa is not in netbuild yet")
    diag = Diagnostics()
    read = arpa_io.read_arpa(path, diag)
    assert diag.errors == []
    assert read.counts() == [counts[1], counts[2], counts[3]]
    np.testing.assert_allclose(read.orders[2].logprob, model.orders[2].logprob, atol=5e-7)


def test_gzip_output(synth, tmp_path):
    import gzip

    model = synth.synth_arpa(30, 400, seed=2)
    synth.write_arpa_text(model, tmp_path / "m.arpa")
    synth.write_arpa_text(model, tmp_path / "m.arpa.gz")
    assert gzip.decompress((tmp_path / "m.arpa.gz").read_bytes()) == \
        (tmp_path / "m.arpa").read_bytes()


def test_same_seed_same_bytes(synth, tmp_path):
    for name in ("a", "b"):
        synth.write_arpa_text(synth.synth_arpa(60, 900, seed=9), tmp_path / f"{name}.arpa")
    assert (tmp_path / "a.arpa").read_bytes() == (tmp_path / "b.arpa").read_bytes()
    synth.write_arpa_text(synth.synth_arpa(60, 900, seed=10), tmp_path / "c.arpa")
    assert (tmp_path / "a.arpa").read_bytes() != (tmp_path / "c.arpa").read_bytes()


@pytest.mark.parametrize("order", [2, 3, 4])
def test_every_history_sums_to_one(synth, tmp_path, order):
    """Under the back-off rule, each listed history's distribution over the words and
    </s> sums to 1 (6 printed decimals per value), holes included."""
    model = synth.synth_arpa(40, 1500, order=order, seed=order, hole_share=0.02)
    path = tmp_path / "model.arpa"
    synth.write_arpa_text(model, path)
    _, grams = parse_arpa_text(path)
    predicted = [w for (w,) in (g for g in grams if len(g) == 1) if w != "<s>"]
    histories = {g[:-1] for g in grams if len(g) > 1} | {()}
    assert len(histories) > 20
    for h in histories:
        total = sum(10.0 ** backoff_log10(grams, h, w) for w in predicted)
        assert math.isclose(total, 1.0, abs_tol=2e-5), (h, total)


def test_normalised_by_kenlm(synth, tmp_path):
    """Sums of P(w | h) over the vocabulary are 1 as scored by kenlm, and the plain-Python
    rule above agrees with kenlm on every word.

    kenlm loads only models whose n-grams all have their context and suffix listed, so
    this model has no holes and no suffix misses.
    """
    kenlm = pytest.importorskip("kenlm")
    model = synth.synth_arpa(50, 1200, seed=4, hole_share=0.0, suffix_miss_share=0.0)
    path = tmp_path / "model.arpa"
    synth.write_arpa_text(model, path)
    _, grams = parse_arpa_text(path)
    lm = kenlm.Model(str(path))  # reference: kenlm Python module (PyPI kenlm 0.3.0)
    predicted = [w for (w,) in (g for g in grams if len(g) == 1) if w != "<s>"]
    rng = np.random.default_rng(0)
    bigram_hists = sorted({g[:2] for g in grams if len(g) == 3})
    contexts = [("<s>",), ()] + [bigram_hists[i] for i in rng.choice(len(bigram_hists), 8)]
    for ctx in contexts:
        state = kenlm.State()
        if ctx and ctx[0] == "<s>":
            lm.BeginSentenceWrite(state)
            rest = ctx[1:]
        else:
            lm.NullContextWrite(state)
            rest = ctx
        for w in rest:
            nxt = kenlm.State()
            lm.BaseScore(state, w, nxt)
            state = nxt
        total = 0.0
        for w in predicted:
            out = kenlm.State()
            score = lm.BaseScore(state, w, out)
            assert math.isclose(score, backoff_log10(grams, ctx, w), abs_tol=1e-5)
            total += 10.0 ** score
        assert math.isclose(total, 1.0, abs_tol=2e-5), (ctx, total)


def test_fixed_point_formatting(synth):
    rng = np.random.default_rng(7)
    values = np.concatenate([[0.0, -99.0, -0.5, 1.25, -123.4567891, -1e-9, 3e-7],
                             -rng.exponential(2.0, 2000), rng.uniform(-5, 5, 500)])
    mat, start, length = synth._fixed6(values)
    for row, s, n, v in zip(mat, start, length, values):
        text = row[s:s + n].tobytes().decode()
        assert abs(float(text) - v) <= 5e-7 + 1e-12
        assert text == f"{v:.6f}".replace("-0.000000", "0.000000")
    with pytest.raises(ValueError):
        synth._fixed6(np.array([-1000.0]))


def test_cli_writes_all_files(synth, tmp_path):
    out = tmp_path / "set"
    assert synth.main(["--words", "40", "--ngrams", "500", "--out", str(out)]) == 0
    assert {p.name for p in out.iterdir()} == {"lexicon.txt", "inventory.txt", "model.arpa",
                                               "synth.json"}
    counts, _ = parse_arpa_text(out / "model.arpa")
    assert sum(counts.values()) == 500
