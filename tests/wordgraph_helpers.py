"""Small L and G for the word-level pipeline tests.

L comes from netbuild's lexicon builder. G is built here by hand from a bigram
back-off table (same conventions as netbuild's grammar builder: word arcs w:w weighted
-ln P, back-off arcs !backoff:<epsilon> weighted -ln alpha, start = the <s> history,
final weights from </s>) so these tests do not depend on the ARPA reader.
"""

from __future__ import annotations

import dataclasses
import math

import pynini

from netbuild.builders.lexicon import LexiconResult, build_lexicon
from netbuild.io.lexicon import Lexicon, Pronunciation
from netbuild.io.phones import PhoneInventory
from netbuild.options import LexiconOptions
from netbuild.symbols import BACKOFF, EPSILON, SENTENCE_END, SENTENCE_START, make_symbol_table


@dataclasses.dataclass
class HandGrammar:
    """What the pipeline needs of a grammar result: the FST and the word table."""

    fst: pynini.Fst
    word_symbols: pynini.SymbolTable


def word_table(words: list[str]) -> pynini.SymbolTable:
    return make_symbol_table("words", [*words, BACKOFF])


def bigram_grammar(words: list[str], unigram: dict[str, float],
                   bigram: dict[tuple[str, str], float],
                   backoff: dict[str, float]) -> HandGrammar:
    """Builds a bigram back-off G; probabilities are given as P (not logs).

    `unigram` covers `words` and </s>; `bigram` maps (history, word) to P(word | history)
    where history may be <s> and word may be </s>; `backoff` maps histories to alpha.
    """
    table = word_table(words)
    g = pynini.Fst()
    unigram_state = g.add_state()
    history = {h: g.add_state() for h in [SENTENCE_START, *words]}
    g.set_start(history[SENTENCE_START])
    cost = lambda p: -math.log(p)  # noqa: E731
    for w in words:
        if w in unigram:
            g.add_arc(unigram_state, pynini.Arc(table.find(w), table.find(w),
                                                cost(unigram[w]), history[w]))
    if SENTENCE_END in unigram:
        g.set_final(unigram_state, cost(unigram[SENTENCE_END]))
    bo = table.find(BACKOFF)
    for h, state in history.items():
        g.add_arc(state, pynini.Arc(bo, 0, cost(backoff.get(h, 1.0)), unigram_state))
    for (h, w), p in bigram.items():
        if w == SENTENCE_END:
            g.set_final(history[h], cost(p))
        else:
            g.add_arc(history[h], pynini.Arc(table.find(w), table.find(w), cost(p),
                                             history[w]))
    g.set_input_symbols(table)
    g.set_output_symbols(table)
    g.arcsort("ilabel")
    return HandGrammar(g, table)


def lexicon_for(prons: list[tuple[str, str]], words: list[str], *,
                silence: bool = True, disambiguate: bool = True) -> LexiconResult:
    """Builds L from (word, "p h o n e s") pairs with netbuild's lexicon builder."""
    entries = [Pronunciation(w, tuple(p.split()), 1.0, i + 1)
               for i, (w, p) in enumerate(prons)]
    phones = sorted({p for _, ps in prons for p in ps.split()})
    inventory = PhoneInventory(phones + (["sil"] if silence else []),
                               silence=["sil"] if silence else [])
    options = LexiconOptions(silence_probability=0.5 if silence else 0.0)
    return build_lexicon(Lexicon(entries, "lexicon.txt"), inventory, word_table(words),
                         options, disambiguate=disambiguate)


def demo_case() -> tuple[LexiconResult, HandGrammar]:
    """A cable-car radio scenario: a few words, one homophone pair, one prefix."""
    words = ["cabin", "car", "cart", "stop", "stops", "two", "too"]
    prons = [("cabin", "k a b i n"), ("car", "k a r"), ("cart", "k a r t"),
             ("stop", "s t o p"), ("stops", "s t o p s"), ("two", "t u"), ("too", "t u")]
    lex = lexicon_for(prons, words)
    unigram = {w: 0.1 for w in words}
    unigram[SENTENCE_END] = 0.2
    bigram = {(SENTENCE_START, "cabin"): 0.5, (SENTENCE_START, "car"): 0.2,
              ("cabin", "two"): 0.4, ("two", "stop"): 0.3, ("stop", SENTENCE_END): 0.6,
              ("car", "stops"): 0.5, ("stops", SENTENCE_END): 0.5, ("too", "cart"): 0.2}
    backoff = {SENTENCE_START: 0.3, "cabin": 0.6, "two": 0.7, "stop": 0.4, "car": 0.5,
               "stops": 0.5, "too": 0.8}
    return lex, bigram_grammar(words, unigram, bigram, backoff)


def to_log(fst: pynini.Fst) -> pynini.Fst:
    return pynini.arcmap(fst, map_type="to_log")


__all__ = ["EPSILON", "HandGrammar", "bigram_grammar", "demo_case", "lexicon_for",
           "to_log", "word_table"]


def normalized_bigram(words: list[str], rng, followers: int = 3,
                      end_probability: float = 0.2) -> HandGrammar:
    """A random bigram back-off model whose distributions each sum to one.

    Every history sees up to `followers` words (or </s>) with 70 % of its mass; alpha
    spreads the rest over the unseen words' unigram mass (the usual back-off
    normalization). `rng` is a `random.Random`.
    """
    targets = [*words, SENTENCE_END]
    raw = {w: rng.uniform(0.5, 1.5) for w in words}
    total = sum(raw.values())
    unigram = {w: (1 - end_probability) * raw[w] / total for w in words}
    unigram[SENTENCE_END] = end_probability
    bigram: dict[tuple[str, str], float] = {}
    backoff: dict[str, float] = {}
    for h in [SENTENCE_START, *words]:
        seen = rng.sample(targets, min(followers, len(targets)))
        if h == SENTENCE_START and seen == [SENTENCE_END]:
            seen = [words[0]]
        shares = [rng.uniform(0.5, 1.5) for _ in seen]
        for w, share in zip(seen, shares):
            bigram[(h, w)] = 0.7 * share / sum(shares)
        unseen_mass = 1.0 - sum(unigram[w] for w in seen)
        backoff[h] = 0.3 / unseen_mass if unseen_mass > 1e-9 else 1e-3
    return bigram_grammar(words, unigram, bigram, backoff)
