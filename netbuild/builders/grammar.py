"""The grammar transducer G from an ARPA back-off model, built in bulk with numpy.

- `GrammarResult`: G, its word table and build counts.
- `build_grammar(model)`: builds G from an `ArpaModel`.
- `word_symbol_table(model)`: the word table G (and L's output side) use.

Construction (the usual back-off automaton; Allauzen, Mohri & Roark 2003):

- One state per history that occurs: the empty history (the unigram state), every
  context of a higher-order n-gram -- including contexts whose own n-gram is absent from
  the model (a "hole": its back-off weight is log10 alpha = 0) -- and the <s> history,
  which is the start state (for a unigram model, whose histories are all empty, the
  start state is the empty history).
- An n-gram (h, w) is a w:w arc from state h weighted -ln P(w | h) = -ln(10) * log10 P.
  It goes to the longest suffix of (h, w) that is a history state.
- Each history h has a BACKOFF:EPSILON arc to its longest proper suffix that is a
  history state, weighted -ln alpha(h).
- </s> n-grams give final weights (no </s> arcs); <s> gets no arcs.

Folding keeps the ARPA back-off rule exact. When an arc's full target (h, w), or a back-off
arc's next shorter suffix, is not a history state, no n-gram continues it: the rule
P(x | s) = alpha(s) P(x | s minus its oldest word) then applies to it for every next word x.
So the arc goes straight to the longest suffix that is a history, and its weight also
carries -ln alpha of every suffix skipped on the way (0 for a skipped suffix that is not an
n-gram, and for full-length n-grams, which never back off). Following G deterministically
(word arc if present, else back-off arc) therefore reproduces the ARPA probability of
every sentence exactly; the cheapest path may be lower where a back-off path undercuts an
explicit n-gram, as in every back-off automaton.

-99 entries (log10 probability 0 written as -99) keep their numeric cost 99 ln 10.

Keys: an id tuple of length L is packed into one int64 (bit fields, oldest word first)
when L words fit into 63 bits, else into big-endian bytes compared as numpy void
scalars; both orders are lexicographic, so sorting, np.unique and searchsorted do all
lookups and no Python loop runs per n-gram.

References:
  Allauzen, C., Mohri, M., & Roark, B. (2003). Generalized algorithms for constructing
  statistical language models. Proceedings of ACL 2003, 40-47.
  doi:10.3115/1075096.1075102
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pynini

from ..errors import ArpaError
from ..io.arpa import ArpaModel
from ..io.fstfile import arrays_to_fst
from ..symbols import (BACKOFF, EPSILON, SENTENCE_END, SENTENCE_START, is_auxiliary,
                       make_symbol_table)

__all__ = ["GrammarResult", "build_grammar", "word_symbol_table"]

LN10 = math.log(10.0)


@dataclasses.dataclass
class GrammarResult:
    """G and what building it found.

    `num_histories` counts G's states (every history, the empty one included);
    `folded_ngrams` counts word arcs whose weight absorbed non-zero back-off weights of
    skipped suffixes, `folded_backoffs` the same for back-off arcs.
    """

    fst: pynini.Fst
    word_symbols: pynini.SymbolTable
    num_histories: int
    folded_ngrams: int
    folded_backoffs: int = 0


def _words(model: ArpaModel) -> list[str]:
    return [w for w in model.vocab if w not in (SENTENCE_START, SENTENCE_END)]


def word_symbol_table(model: ArpaModel) -> pynini.SymbolTable:
    """Returns the word table: EPSILON 0, the model's words in vocab order, BACKOFF last.

    <s> and </s> are left out (G has no arcs for them).
    """
    return make_symbol_table("words", [*_words(model), BACKOFF])


def _check_vocab(model: ArpaModel) -> None:
    bad = [i for i, w in enumerate(model.vocab) if w == EPSILON or is_auxiliary(w)]
    if len(set(model.vocab)) != len(model.vocab):
        seen: set[str] = set()
        dup = next(w for w in model.vocab if w in seen or seen.add(w))
        raise ArpaError(f"word '{dup}' appears twice in the vocabulary",
                        "list each word once among the 1-grams", path=model.path)
    if bad:
        word = model.vocab[bad[0]]
        line = None
        if model.orders:
            uni = model.orders[0]
            rows = np.flatnonzero(uni.words[:, 0] == bad[0])
            if rows.size and uni.lines[rows[0]] > 0:
                line = int(uni.lines[rows[0]])
        raise ArpaError(f"word '{word}' is a reserved netbuild symbol",
                        "rename it in the model (and the lexicon)",
                        path=model.path, line=line)


class _Packer:
    """Packs id tuples into sortable, exactly comparable keys."""

    def __init__(self, vocab_size: int) -> None:
        self.bits = max(1, int(vocab_size - 1).bit_length())

    def pack(self, rows: np.ndarray) -> np.ndarray:
        length = rows.shape[1]
        if length * self.bits <= 63:
            key = rows[:, 0].astype(np.int64)
            for j in range(1, length):
                key <<= self.bits
                key |= rows[:, j]
            return key
        big = np.ascontiguousarray(rows, dtype=">u4")
        return big.view(np.dtype((np.void, 4 * length))).ravel()

    def unpack(self, keys: np.ndarray, length: int) -> np.ndarray:
        if keys.dtype == np.int64:
            mask = (1 << self.bits) - 1
            rows = np.empty((keys.shape[0], length), dtype=np.int32)
            for j in range(length):
                rows[:, length - 1 - j] = (keys >> (self.bits * j)) & mask
            return rows
        return keys.view(">u4").reshape(-1, length).astype(np.int32)


def _lookup(sorted_keys: np.ndarray, queries: np.ndarray) -> np.ndarray:
    """Index of each query in `sorted_keys`, -1 where absent."""
    if sorted_keys.shape[0] == 0 or queries.shape[0] == 0:
        return np.full(queries.shape[0], -1, dtype=np.int64)
    # Sorted queries make the binary searches cache-friendly.
    order = np.argsort(queries, kind="stable")
    pos = np.empty(queries.shape[0], dtype=np.int64)
    pos[order] = np.searchsorted(sorted_keys, queries[order])
    np.minimum(pos, sorted_keys.shape[0] - 1, out=pos)
    return np.where(sorted_keys[pos] == queries, pos, -1)


@dataclasses.dataclass
class _Level:
    """The id tuples of one length that G needs: n-grams of that order and histories."""

    keys: np.ndarray | None  # sorted unique keys (None for length 1: ids are word ids)
    state: np.ndarray  # G state of each entry, -1 where not a history
    alpha: np.ndarray  # log10 back-off weight of each entry (0 where none)


class _Histories:
    def __init__(self, model: ArpaModel) -> None:
        self.model = model
        self.packer = _Packer(max(len(model.vocab), 1))
        self.order = model.max_order
        vocab_size = len(model.vocab)
        widx = model.word_index()
        self.bos = widx.get(SENTENCE_START, -1)
        self.eos = widx.get(SENTENCE_END, -1)
        self.levels: list[_Level | None] = [None]
        # ctx_ids[n]: id (in level n-1) of the context of each n-gram of order n.
        self.ctx_ids: list[np.ndarray | None] = [None, None]
        self.own_ids: list[np.ndarray | None] = [None]
        n_states = 1  # state 0: the empty history
        for length in range(1, self.order):
            ngrams = model.orders[length - 1]
            higher = model.orders[length]
            if length == 1:
                keys = None
                own = ngrams.words[:, 0].astype(np.int64)
                ctx = higher.words[:, 0].astype(np.int64)
                size = vocab_size
            else:
                both = np.concatenate([self.packer.pack(ngrams.words),
                                       self.packer.pack(higher.words[:, :length])])
                keys, inverse = np.unique(both, return_inverse=True)
                inverse = inverse.ravel()
                own, ctx = inverse[:len(ngrams)], inverse[len(ngrams):]
                size = keys.shape[0]
            alpha = np.zeros(size, dtype=np.float64)
            alpha[own] = ngrams.backoff
            is_hist = np.zeros(size, dtype=bool)
            is_hist[ctx] = True
            if length == 1 and self.bos >= 0:
                is_hist[self.bos] = True
            state = np.full(size, -1, dtype=np.int64)
            count = int(is_hist.sum())
            state[is_hist] = np.arange(n_states, n_states + count)
            n_states += count
            self.levels.append(_Level(keys, state, alpha))
            self.own_ids.append(own)
            self.ctx_ids.append(ctx)
        self.num_states = n_states
        self.start = int(self.levels[1].state[self.bos]) if (
            self.bos >= 0 and len(self.levels) > 1) else 0

    def find(self, rows: np.ndarray) -> np.ndarray:
        """Ids of id tuples (all of one length) in their level, -1 where absent."""
        length = rows.shape[1]
        if length == 1:
            return rows[:, 0].astype(np.int64)
        level = self.levels[length]
        return _lookup(level.keys, self.packer.pack(rows))

    def resolve(self, rows: np.ndarray, ids: np.ndarray | None = None
                ) -> tuple[np.ndarray, np.ndarray]:
        """Longest suffix of each row that is a history, and the skipped log10 alphas.

        `rows` hold tuples of one length L < max order (suffixes of the full tuple are
        tried from length L down to 0); `ids` may give their level-L ids if known.
        """
        m, length = rows.shape
        dest = np.zeros(m, dtype=np.int64)
        folded = np.zeros(m, dtype=np.float64)
        pending = np.arange(m)
        for j in range(length):
            if pending.size == 0:
                break
            sub = rows[pending, j:]
            level = self.levels[length - j]
            found = ids[pending] if (j == 0 and ids is not None) else self.find(sub)
            ok = found >= 0
            safe = np.where(ok, found, 0)
            st = np.where(ok, level.state[safe], -1)
            hit = st >= 0
            dest[pending[hit]] = st[hit]
            miss = ~hit
            folded[pending[miss]] += np.where(ok[miss], level.alpha[safe[miss]], 0.0)
            pending = pending[miss]
        # Rows still pending end at the empty history, state 0.
        return dest, folded


def build_grammar(model: ArpaModel) -> GrammarResult:
    """Builds the grammar transducer G from a back-off model, in bulk.

    G is a tropical `pynini.Fst` over the word table of `word_symbol_table(model)`
    (attached as input and output symbols): word arcs w:w weighted -ln P, back-off arcs
    BACKOFF:EPSILON weighted -ln alpha, arcs of each state sorted by input label (the
    back-off arc, whose label is the largest, comes last), start state the <s> history,
    final weights -ln P(</s> | h). See the module docstring for the folding of skipped
    back-off weights. G is not input-deterministic over words plus epsilon: a word can
    be read on an explicit arc or after back-off arcs.

    Args:
      model: the back-off model; n-grams are assumed unique (the ARPA reader checks).

    Returns:
      A `GrammarResult`.

    Raises:
      ArpaError: the model has no n-grams, no </s>, or a word that is a reserved symbol.
    """
    if model.max_order == 0 or len(model.orders[0]) == 0:
        raise ArpaError("the model has no 1-grams", "give the model a \\1-grams: section",
                        path=model.path)
    _check_vocab(model)
    hist = _Histories(model)
    if hist.eos < 0:
        raise ArpaError(f"the model has no {SENTENCE_END}; no sentence could end",
                        f"add a {SENTENCE_END} entry to the 1-grams", path=model.path)
    vocab_size = len(model.vocab)
    label_of = np.full(vocab_size, 0, dtype=np.int32)
    is_word = np.ones(vocab_size, dtype=bool)
    for marker in (hist.bos, hist.eos):
        if marker >= 0:
            is_word[marker] = False
    label_of[is_word] = np.arange(1, int(is_word.sum()) + 1, dtype=np.int32)
    backoff_label = int(is_word.sum()) + 1
    final = np.full(hist.num_states, np.inf, dtype=np.float32)

    srcs, labels, weights, dsts = [], [], [], []
    folded_ngrams = 0
    for n in range(1, model.max_order + 1):
        table = model.orders[n - 1]
        if len(table) == 0:
            continue
        last = table.words[:, n - 1]
        if n == 1:
            src = np.zeros(len(table), dtype=np.int64)
        else:
            ctx = hist.ctx_ids[n]
            src = hist.levels[n - 1].state[ctx]
        ends = last == hist.eos
        final[src[ends]] = -LN10 * table.logprob[ends]
        keep = np.flatnonzero(is_word[last])
        if n < model.max_order:
            dest, folded = hist.resolve(table.words[keep], hist.own_ids[n][keep])
        else:
            dest, folded = hist.resolve(table.words[keep, 1:])
        folded_ngrams += int(np.count_nonzero(folded))
        srcs.append(src[keep])
        labels.append(label_of[last[keep]])
        weights.append(-LN10 * (table.logprob[keep] + folded))
        dsts.append(dest)

    folded_backoffs = 0
    for length in range(1, len(hist.levels)):
        level = hist.levels[length]
        ids = np.flatnonzero(level.state >= 0)
        if ids.size == 0:
            continue
        if length == 1:
            rows = ids.reshape(-1, 1).astype(np.int32)
        else:
            rows = hist.packer.unpack(level.keys[ids], length)
        if length == 1:
            dest = np.zeros(ids.size, dtype=np.int64)
            folded = np.zeros(ids.size)
        else:
            dest, folded = hist.resolve(rows[:, 1:])
        folded_backoffs += int(np.count_nonzero(folded))
        srcs.append(level.state[ids])
        labels.append(np.full(ids.size, backoff_label, dtype=np.int32))
        weights.append(-LN10 * (level.alpha[ids] + folded))
        dsts.append(dest)

    src = np.concatenate(srcs)
    ilabel = np.concatenate(labels)
    weight = np.concatenate(weights).astype(np.float32)
    dst = np.concatenate(dsts)
    del srcs, labels, weights, dsts
    order = np.argsort(src * (backoff_label + 1) + ilabel, kind="stable")
    src, ilabel, weight, dst = src[order], ilabel[order], weight[order], dst[order]
    del order
    olabel = np.where(ilabel == backoff_label, 0, ilabel).astype(np.int32)
    symbols = word_symbol_table(model)
    fst = arrays_to_fst(hist.num_states, hist.start, final, src.astype(np.int32), ilabel,
                        olabel, weight, dst.astype(np.int32), symbols, symbols)
    return GrammarResult(fst=fst, word_symbols=symbols, num_histories=hist.num_states,
                         folded_ngrams=folded_ngrams, folded_backoffs=folded_backoffs)
