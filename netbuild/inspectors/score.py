"""Sentence costs under a grammar transducer G (read-only).

- `SentenceScore`: one sentence's costs and out-of-vocabulary words.
- `score_sentence(g, words)`: the back-off cost and the cheapest-path cost of a sentence.
- `score_sentences(g, sentences)`: the same for many sentences, indexing G once.

Two costs are reported, both in nats (-ln P):

- `lm_cost`: -ln P(words + </s>) under the ARPA back-off rule, followed through G: in each
  state take the word's arc if there is one, else the back-off arc and try again; at the
  end take the final weight, backing off the same way. For a G from `build_grammar` this
  is exactly the model's probability (up to float32 weights).
- `best_path_cost`: the cheapest path through G that reads the words, with back-off arcs
  free to be taken anywhere (G composed with the sentence, the back-off marker read as
  epsilon). It is never above `lm_cost`; it is lower where a back-off path undercuts an
  explicit n-gram, which is what a decoder searching G sees.

Words missing from G's table become <unk> when G has it; otherwise both costs are
infinite (None in JSON). Either way they are listed in `oov`.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Iterable, Sequence

import numpy as np
import pynini

from ..errors import SymbolError
from ..io.fstfile import fst_to_arrays
from ..symbols import BACKOFF, EPSILON, UNKNOWN, is_auxiliary

__all__ = ["SentenceScore", "score_sentence", "score_sentences"]


@dataclasses.dataclass(frozen=True)
class SentenceScore:
    """Costs (nats) of one sentence; inf where G cannot read it."""

    sentence: tuple[str, ...]
    lm_cost: float
    best_path_cost: float
    oov: tuple[str, ...] = ()

    def to_json(self) -> dict:
        def num(x: float) -> float | None:
            return None if math.isinf(x) or math.isnan(x) else x

        return {"sentence": " ".join(self.sentence), "lm_cost": num(self.lm_cost),
                "best_path_cost": num(self.best_path_cost), "oov": list(self.oov)}


class _GrammarIndex:
    """G's arcs as sorted arrays for the back-off walk, and G with back-off read as epsilon."""

    def __init__(self, g: pynini.Fst) -> None:
        symbols = g.input_symbols()
        if symbols is None:
            raise SymbolError("the grammar FST has no input symbol table",
                              "build it with build_grammar, which attaches the word table")
        self.symbols = symbols
        self.backoff = symbols.find(BACKOFF)
        self.unk = symbols.find(UNKNOWN)
        a = fst_to_arrays(g)
        self.start = a.start
        self.final = a.final_weights.astype(np.float64)
        is_backoff = a.ilabel == self.backoff if self.backoff > 0 else np.zeros(
            a.num_arcs, dtype=bool)
        self.radix = int(max(a.ilabel.max(initial=0), 0)) + 1
        words = ~is_backoff
        key = a.src[words].astype(np.int64) * self.radix + a.ilabel[words]
        order = np.argsort(key, kind="stable")
        self.keys = key[order]
        self.weight = a.weight[words][order].astype(np.float64)
        self.dst = a.dst[words][order]
        self.bo_weight = np.full(a.num_states, np.inf)
        self.bo_dst = np.full(a.num_states, -1, dtype=np.int64)
        bsrc = a.src[is_backoff][::-1]  # reversed: the first back-off arc of a state wins
        self.bo_weight[bsrc] = a.weight[is_backoff][::-1]
        self.bo_dst[bsrc] = a.dst[is_backoff][::-1]
        self._g = g
        self._g_eps: pynini.Fst | None = None

    def label(self, word: str) -> int:
        if word == EPSILON or is_auxiliary(word):
            return -1
        return self.symbols.find(word)

    def walk_cost(self, labels: list[int]) -> float:
        """-ln P of the labels then the end, following the back-off rule through G."""
        if self.start < 0:
            return math.inf
        state, cost = self.start, 0.0
        for label in labels:
            while True:
                k = state * self.radix + label
                i = int(np.searchsorted(self.keys, k))
                if i < self.keys.shape[0] and self.keys[i] == k:
                    cost += self.weight[i]
                    state = int(self.dst[i])
                    break
                if self.bo_dst[state] < 0:
                    return math.inf
                cost += self.bo_weight[state]
                state = int(self.bo_dst[state])
        while not math.isfinite(self.final[state]):
            if self.bo_dst[state] < 0:
                return math.inf
            cost += self.bo_weight[state]
            state = int(self.bo_dst[state])
        return cost + self.final[state]

    def best_path_cost(self, labels: list[int]) -> float:
        """Cost of the cheapest path through G reading the labels, back-off as epsilon."""
        if self._g_eps is None:
            g = self._g.copy()
            if self.backoff > 0:
                g.relabel_pairs(ipairs=[(self.backoff, 0)])
            g.arcsort("ilabel")
            self._g_eps = g
        sentence = pynini.Fst()
        sentence.add_states(len(labels) + 1)
        sentence.set_start(0)
        for i, label in enumerate(labels):
            sentence.add_arc(i, pynini.Arc(label, label, pynini.Weight.one("tropical"),
                                           i + 1))
        sentence.set_final(len(labels))
        lattice = pynini.compose(sentence, self._g_eps, connect=True)
        if lattice.start() < 0 or lattice.num_states() == 0:
            return math.inf
        distance = pynini.shortestdistance(lattice, reverse=True)
        return float(distance[lattice.start()])

    def score(self, words: Sequence[str]) -> SentenceScore:
        words = tuple(words)
        labels = [self.label(w) for w in words]
        oov = tuple(w for w, lab in zip(words, labels) if lab <= 0)
        if oov:
            if self.unk <= 0:
                return SentenceScore(words, math.inf, math.inf, oov)
            labels = [self.unk if lab <= 0 else lab for lab in labels]
        return SentenceScore(words, self.walk_cost(labels), self.best_path_cost(labels),
                             oov)


def score_sentence(g: pynini.Fst, words: Sequence[str]) -> SentenceScore:
    """Returns the back-off cost and the cheapest-path cost of `words` under G.

    Args:
      g: a grammar transducer as built by `build_grammar` (word table attached,
        back-off arcs labelled BACKOFF on the input side, tropical weights).
      words: the sentence, without <s> and </s> (the end is scored automatically).

    Raises:
      SymbolError: `g` has no input symbol table.
    """
    return _GrammarIndex(g).score(words)


def score_sentences(g: pynini.Fst, sentences: Iterable[Sequence[str]]
                    ) -> list[SentenceScore]:
    """Returns `score_sentence` for each sentence, indexing G only once."""
    index = _GrammarIndex(g)
    return [index.score(s) for s in sentences]
