"""The bundled demo (examples/ropeway) stays consistent and reads cleanly.

- the phone inventory, lexicon, model and project file read with no problem at all;
- make_corpus.py still writes exactly the committed corpus.txt;
- every corpus word is in the lexicon;
- model.arpa equals a fresh estimate from corpus.txt, and kenlm reads it as a
  proper back-off model;
- the homophones and prefix pronunciations the demo is meant to show are there.
"""

from __future__ import annotations

import importlib.util
import math
from collections import defaultdict
from pathlib import Path

import numpy as np
import pytest

from netbuild.errors import Diagnostics
from netbuild.io.lexicon import Lexicon, read_lexicon
from netbuild.io.phones import read_phones
from netbuild.options import LexiconOptions

DEMO = Path(__file__).resolve().parent.parent / "examples" / "ropeway"

# Pairs the demo README promises; each group shares one pronunciation.
HOMOPHONES = [
    ("two", "to", "too"), ("four", "for"), ("right", "write"), ("brake", "break"),
    ("wait", "weight"), ("hold", "holed"), ("no", "know"), ("hear", "here"),
    ("there", "their"), ("weather", "whether"), ("new", "knew"), ("fair", "fare"),
    ("mist", "missed"), ("sight", "site"), ("hall", "haul"), ("red", "read"),
]
# (shorter, longer): a pronunciation of the first is a proper prefix of one of the second.
PREFIXES = [
    ("cab", "cabin"), ("car", "cargo"), ("hold", "holding"), ("gust", "gusting"),
    ("wind", "windy"), ("four", "forty"), ("four", "fourteen"), ("twenty", "twenty-one"),
]


def _lexicon_options() -> LexiconOptions:
    return LexiconOptions(has_probabilities=True)


@pytest.fixture(scope="module")
def lexicon() -> Lexicon:
    inventory = read_phones(DEMO / "inventory.txt")
    return read_lexicon(DEMO / "lexicon.txt", inventory, _lexicon_options())


@pytest.fixture(scope="module")
def corpus_lines() -> list[str]:
    return (DEMO / "corpus.txt").read_text(encoding="utf-8").splitlines()


def _load_generator():
    spec = importlib.util.spec_from_file_location("ropeway_make_corpus", DEMO / "make_corpus.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_phones_read_without_any_problem():
    diagnostics = Diagnostics()
    inventory = read_phones(DEMO / "inventory.txt", diagnostics)
    assert diagnostics.problems == []
    assert 35 <= len(inventory.phones) <= 40
    assert inventory.optional_silence == "quiet"
    assert inventory.noise == ["hiss"]
    for name in ("vowel", "stop", "nasal"):
        assert inventory.classes[name]
    # our own spelling: lower case, no stress digits
    assert all(p == p.lower() and not p[-1].isdigit() for p in inventory.phones)


def test_lexicon_reads_without_any_problem():
    diagnostics = Diagnostics()
    inventory = read_phones(DEMO / "inventory.txt", diagnostics)
    lex = read_lexicon(DEMO / "lexicon.txt", inventory, _lexicon_options(), diagnostics)
    assert diagnostics.problems == []
    assert 280 <= len(lex.words()) <= 400
    # every phone but silence and noise is used by some word
    used = set(lex.phones())
    assert set(inventory.phones) - used == {"quiet", "hiss"}


def test_lexicon_probabilities_sum_to_one_per_word(lexicon):
    totals: dict[str, float] = defaultdict(float)
    counts: dict[str, int] = defaultdict(int)
    for e in lexicon.entries:
        totals[e.word] += e.probability
        counts[e.word] += 1
    assert all(math.isclose(t, 1.0) for t in totals.values())
    two = [w for w, n in counts.items() if n == 2]
    assert 10 <= len(two) <= 16
    assert max(counts.values()) == 2


def test_project_file_names_the_demo_inputs():
    from netbuild.project import read_project

    diagnostics = Diagnostics()
    project = read_project(DEMO / "project.toml", diagnostics)
    assert diagnostics.problems == []
    assert project.phones == (DEMO / "inventory.txt").resolve()
    assert project.lexicon == (DEMO / "lexicon.txt").resolve()
    assert project.lm == (DEMO / "model.arpa").resolve()
    # the lexicon options the tests above assume are the ones the project declares
    assert project.options.lexicon.has_probabilities is True
    assert project.options.lexicon.layout == "plain"


def test_model_reads_without_any_problem():
    from netbuild.io.arpa import read_arpa

    diagnostics = Diagnostics()
    model = read_arpa(DEMO / "model.arpa", diagnostics)
    assert diagnostics.problems == []
    assert model.max_order == 3
    assert all(n > 0 for n in model.counts())


def test_generator_writes_the_committed_corpus(corpus_lines):
    gen = _load_generator()
    radio = gen.Radio(gen.SEED)
    fresh = [radio.sentence() for _ in range(gen.NUM_SENTENCES)]
    assert fresh == corpus_lines


def test_number_words():
    gen = _load_generator()
    assert [gen.number_words(n) for n in (0, 7, 13, 20, 42, 99)] == [
        "zero", "seven", "thirteen", "twenty", "forty-two", "ninety-nine"]
    with pytest.raises(ValueError):
        gen.number_words(100)


def test_every_corpus_word_is_in_the_lexicon(lexicon, corpus_lines):
    words = set(lexicon.words())
    assert len(corpus_lines) >= 3000
    unknown = {w for line in corpus_lines for w in line.split()} - words
    assert unknown == set()
    assert all(line == line.lower() and line.strip() for line in corpus_lines)


def test_homophones_are_in_the_lexicon(lexicon):
    prons: dict[str, set[tuple[str, ...]]] = defaultdict(set)
    for e in lexicon.entries:
        prons[e.word].add(e.phones)
    for group in HOMOPHONES:
        shared = set.intersection(*(prons[w] for w in group))
        assert shared, f"{group} share no pronunciation"


def test_prefix_pronunciations_are_in_the_lexicon(lexicon):
    prons: dict[str, set[tuple[str, ...]]] = defaultdict(set)
    for e in lexicon.entries:
        prons[e.word].add(e.phones)
    for short, long in PREFIXES:
        assert any(len(q) > len(p) and q[:len(p)] == p
                   for p in prons[short] for q in prons[long]), (short, long)


def _ngram_dict(model) -> dict[tuple[str, ...], tuple[float, float]]:
    out = {}
    for table in model.orders:
        for ids, lp, bo in zip(table.words, table.logprob, table.backoff):
            out[tuple(model.vocab[i] for i in ids)] = (float(lp), float(bo))
    return out


def test_committed_model_equals_a_fresh_estimate():
    from netbuild.io.arpa import read_arpa
    from netbuild.lm.estimate import estimate, read_sentences

    committed = _ngram_dict(read_arpa(DEMO / "model.arpa"))
    fresh = _ngram_dict(estimate(read_sentences(DEMO / "corpus.txt"), order=3))
    assert committed.keys() == fresh.keys()
    worst = max(max(abs(committed[k][0] - fresh[k][0]), abs(committed[k][1] - fresh[k][1]))
                for k in committed)
    assert worst <= 1e-6


def test_kenlm_reads_the_model_as_a_normalized_distribution(lexicon):
    """Checks the committed model with an independent ARPA reader.

    reference: kenlm Python module (https://github.com/kpu/kenlm), `Model.BaseScore`
    returns log10 P(word | state) under the back-off recursion of the ARPA format.
    A back-off model is a proper distribution: for each history the conditional
    probabilities over the vocabulary plus </s> sum to 1 (Katz 1987, IEEE Trans.
    ASSP 35(3), eq. for the back-off weight alpha, chosen to make this sum 1).
    """
    kenlm = pytest.importorskip("kenlm")
    from netbuild.io.arpa import read_arpa

    model = read_arpa(DEMO / "model.arpa")
    ken = kenlm.Model(str(DEMO / "model.arpa"))
    assert ken.order == 3
    vocab = [w for w in model.vocab if w != "<s>"]
    histories = [["<s>"], ["<s>", "cabin"], ["cabin", "twelve"], ["the", "summit"],
                 ["wind"], ["hold", "hold"]]
    for history in histories:
        state = kenlm.State()
        if history[0] == "<s>":
            ken.BeginSentenceWrite(state)
            rest = history[1:]
        else:
            ken.NullContextWrite(state)
            rest = history
        for w in rest:
            nxt = kenlm.State()
            ken.BaseScore(state, w, nxt)
            state = nxt
        total = sum(10.0 ** ken.BaseScore(state, w, kenlm.State()) for w in vocab)
        assert total == pytest.approx(1.0, abs=1e-4), history


def test_kenlm_and_netbuild_read_the_same_unigrams():
    """reference: kenlm Python module; a unigram's score after the null context is
    its ARPA log10 probability (the back-off recursion ends at order 1)."""
    kenlm = pytest.importorskip("kenlm")
    from netbuild.io.arpa import read_arpa

    model = read_arpa(DEMO / "model.arpa")
    ken = kenlm.Model(str(DEMO / "model.arpa"))
    unigrams = model.orders[0]
    for ids, lp in zip(unigrams.words, unigrams.logprob):
        word = model.vocab[int(ids[0])]
        if word == "<s>":
            continue
        state = kenlm.State()
        ken.NullContextWrite(state)
        assert ken.BaseScore(state, word, kenlm.State()) == pytest.approx(lp, abs=1e-5), word
    assert np.all(unigrams.logprob <= 0.0)


@pytest.fixture(scope="module")
def demo_build(tmp_path_factory):
    """The demo built once, exactly as `make demo` builds it (into a temporary directory)."""
    from netbuild.project import read_project
    from netbuild.workflow import build, load_build

    out = tmp_path_factory.mktemp("demo") / "build"
    build(read_project(DEMO / "project.toml"), out)
    return load_build(out)


@pytest.mark.slow
def test_demo_build_gives_each_homophone_its_own_marker(demo_build, lexicon):
    from netbuild.checks import lexicon_pronunciations

    # L's phone table (the build's input table is the emission classes of the full graph)
    words, phones = demo_build.word_symbols, demo_build.lexicon.input_symbols()
    in_l = {w: {tuple(phones.find(i) for i in seq) for seq in seqs}
            for w, seqs in ((words.find(k), v)
                            for k, v in lexicon_pronunciations(demo_build.lexicon).items())}
    text: dict[str, set[tuple[str, ...]]] = defaultdict(set)
    for e in lexicon.entries:
        text[e.word].add(e.phones)
    assert demo_build.manifest["markers"]["count"] == max(len(g) for g in HOMOPHONES)
    for group in HOMOPHONES:
        for shared in set.intersection(*(text[w] for w in group)):
            markers = []
            for word in group:
                # L spells the shared phones, then one marker, then optionally silence
                found = {seq[len(shared)] for seq in in_l[word]
                         if seq[:len(shared)] == shared
                         and seq[len(shared) + 1:] in ((), ("quiet",))
                         and len(seq) > len(shared)}
                assert len(found) == 1, (word, found)
                (marker,) = found
                assert marker.startswith("!amb"), (word, marker)
                markers.append(marker)
            assert len(set(markers)) == len(group), (group, markers)


@pytest.mark.slow
def test_demo_graph_costs_agree_with_kenlm(demo_build):
    """reference: kenlm Python module, `Model.score(sentence)` = log10 P(sentence </s>)
    with <s> as the first history; netbuild's costs are -ln P, so cost = -ln(10) * score."""
    kenlm = pytest.importorskip("kenlm")
    from netbuild.inspectors.score import score_sentences

    ken = kenlm.Model(str(DEMO / "model.arpa"))
    sentences = ["cabin two to summit station", "cabin to two summit station",
                 "wind is too strong for full speed", "hold hold hold all cabins hold",
                 "write it in the log", "right"]
    for result in score_sentences(demo_build.grammar, [s.split() for s in sentences]):
        text = " ".join(result.sentence)
        assert result.lm_cost == pytest.approx(-math.log(10) * ken.score(text), abs=1e-3)
        assert result.best_path_cost <= result.lm_cost + 1e-3
