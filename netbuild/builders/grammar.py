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

Holes are filled. A hole h = (p, w) is reachable only through an arc p --w--> h, but the
model has no n-gram (p, w) to give that arc. So every hole gets one, weighted by the
back-off rule's own value of P(w | p) (its back-off weight stays 0), and its prefix p
becomes a history too (possibly a hole one level down, filled the same way). Without
this, reading w in state p would back off and forget the context the model keeps for
the next word.

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
from ..bulk import unique_sorted
from ..symbols import (BACKOFF, EPSILON, SENTENCE_END, SENTENCE_START, is_auxiliary,
                       make_symbol_table)

__all__ = ["GrammarResult", "build_grammar", "word_symbol_table"]

LN10 = math.log(10.0)
_FEW_RUNS = 64


@dataclasses.dataclass
class GrammarResult:
    """G and what building it found.

    `num_histories` counts G's states (every history, the empty one included);
    `folded_ngrams` counts word arcs whose weight absorbed non-zero back-off weights of
    skipped suffixes, `folded_backoffs` the same for back-off arcs; `filled_holes`
    counts histories that are no n-gram of the model and got an arc of their own.
    """

    fst: pynini.Fst
    word_symbols: pynini.SymbolTable
    num_histories: int
    folded_ngrams: int
    folded_backoffs: int = 0
    filled_holes: int = 0


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


def _is_sorted(keys: np.ndarray) -> bool:
    """True if int64 `keys` are non-decreasing (one linear pass; False for void keys).

    ARPA files usually list n-grams sorted by word ids, and then the keys arrive
    sorted: checking first saves the sorts and makes the binary searches sequential.
    """
    if keys.dtype != np.int64:
        return False
    return keys.shape[0] < 2 or bool((keys[1:] >= keys[:-1]).all())


def _sort(keys: np.ndarray) -> np.ndarray:
    """`keys` sorted (the array itself when already sorted)."""
    return keys if _is_sorted(keys) else np.sort(keys)


def _unique(keys: np.ndarray) -> np.ndarray:
    """Sorted distinct keys (as `unique_sorted`, without a sort for sorted input)."""
    if not _is_sorted(keys):
        return unique_sorted(keys)
    if keys.shape[0] == 0:
        return keys
    keep = np.empty(keys.shape[0], dtype=bool)
    keep[0] = True
    np.not_equal(keys[1:], keys[:-1], out=keep[1:])
    return keys[keep]


def _sort_order(keys: np.ndarray) -> np.ndarray:
    """A permutation sorting non-negative int64 `keys` (ties in any order).

    Sorting `key << b | index` as plain int64 is several times faster than argsort; it
    is used when key and index fit into 63 bits together.
    """
    n = keys.shape[0]
    if keys.dtype == np.int64 and n > 1:
        descents = int(np.count_nonzero(keys[1:] < keys[:-1]))
        if descents == 0:
            return np.arange(n)
        if descents < _FEW_RUNS:
            # A few sorted runs (concatenated sorted parts): the stable sort (timsort)
            # merges them in about linear time.
            return np.argsort(keys, kind="stable")
    if keys.dtype == np.int64 and n:
        index_bits = max(1, int(n - 1).bit_length())
        top = int(keys.max())
        if top >= 0 and int(keys.min()) >= 0 and top.bit_length() + index_bits <= 63:
            packed = keys << index_bits
            packed |= np.arange(n, dtype=np.int64)
            packed.sort()
            packed &= (1 << index_bits) - 1
            return packed
    return np.argsort(keys)


def _unique_inverse(keys: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Sorted unique keys and, for each key, its index among them (as np.unique)."""
    if keys.shape[0] == 0:
        return keys[:0], np.zeros(0, dtype=np.int64)
    order = _sort_order(keys)
    ordered = keys[order]
    new = np.empty(ordered.shape[0], dtype=bool)
    new[0] = True
    np.not_equal(ordered[1:], ordered[:-1], out=new[1:])
    inverse = np.empty(keys.shape[0], dtype=np.int64)
    inverse[order] = np.cumsum(new) - 1
    return ordered[new], inverse


def _lookup(sorted_keys: np.ndarray, queries: np.ndarray) -> np.ndarray:
    """Index of each query in `sorted_keys`, -1 where absent."""
    if sorted_keys.shape[0] == 0 or queries.shape[0] == 0:
        return np.full(queries.shape[0], -1, dtype=np.int64)
    # Sorted queries make the binary searches cache-friendly.
    if _is_sorted(queries):
        pos = np.searchsorted(sorted_keys, queries)
    else:
        order = _sort_order(queries)
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
    logprob: np.ndarray  # log10 probability of each n-gram entry (-inf elsewhere)
    ngram: np.ndarray  # True for n-grams of the model and for filled holes


class _Histories:
    """The history states of G, level by level (level L: id tuples of length L)."""

    def __init__(self, model: ArpaModel) -> None:
        self.model = model
        self.packer = _Packer(max(len(model.vocab), 1))
        self.order = model.max_order
        vocab_size = len(model.vocab)
        widx = model.word_index()
        self.bos = widx.get(SENTENCE_START, -1)
        self.eos = widx.get(SENTENCE_END, -1)
        top = self.order - 1
        pack = self.packer.pack
        # Top-down: the contexts of each level, and the holes among them (contexts that
        # are no n-gram); a hole's own context is a context one level down.
        contexts: list[np.ndarray | None] = [None] * (top + 1)
        holes: list[np.ndarray | None] = [None] * (top + 1)
        ctx_rows = model.orders[top].words[:, :top] if top >= 1 else None
        for length in range(top, 0, -1):
            ngram_keys = _sort(pack(model.orders[length - 1].words))
            ctx_keys = _unique(pack(ctx_rows))
            if length == 1 and self.bos >= 0:
                ctx_keys = np.union1d(ctx_keys, np.array([self.bos], dtype=np.int64))
            contexts[length] = ctx_keys
            hole_keys = ctx_keys[_lookup(ngram_keys, ctx_keys) < 0]
            holes[length] = hole_keys
            if length > 1:
                hole_rows = self.packer.unpack(hole_keys, length)
                ctx_rows = np.concatenate([model.orders[length - 1].words[:, :length - 1],
                                           hole_rows[:, :length - 1]])
        # Bottom-up: one level per history length, holes filled by the back-off rule.
        self.levels: list[_Level | None] = [None]
        self.filled = 0
        n_states = 1  # state 0: the empty history
        for length in range(1, top + 1):
            ngrams = model.orders[length - 1]
            if length == 1:
                keys = None
                size = vocab_size
                own = ngrams.words[:, 0].astype(np.int64)
                hole_ids = holes[1].astype(np.int64)
                ctx_ids = contexts[1].astype(np.int64)
            else:
                keys, inverse = _unique_inverse(np.concatenate([pack(ngrams.words),
                                                                holes[length]]))
                size = keys.shape[0]
                own, hole_ids = inverse[:len(ngrams)], inverse[len(ngrams):]
                ctx_ids = _lookup(keys, contexts[length])
            level = _Level(keys, np.full(size, -1, dtype=np.int64),
                           np.zeros(size, dtype=np.float64),
                           np.full(size, -np.inf, dtype=np.float64),
                           np.zeros(size, dtype=bool))
            level.alpha[own] = ngrams.backoff
            level.logprob[own] = ngrams.logprob
            level.ngram[own] = True
            count = ctx_ids.shape[0]
            level.state[ctx_ids] = np.arange(n_states, n_states + count)
            n_states += count
            self.levels.append(level)
            if length > 1 and hole_ids.size:
                rows = self.packer.unpack(holes[length], length)
                level.logprob[hole_ids] = self._rule_log10(rows)
                level.ngram[hole_ids] = np.isfinite(level.logprob[hole_ids])
                self.filled += int(hole_ids.size)
        self.num_states = n_states
        self.start = int(self.levels[1].state[self.bos]) if (
            self.bos >= 0 and top >= 1) else 0

    def _rule_log10(self, rows: np.ndarray) -> np.ndarray:
        """log10 P(last word | the others) by the back-off rule, from the lower levels."""
        m, length = rows.shape
        cost = np.zeros(m)
        done = np.zeros(m, dtype=bool)
        for j in range(length):
            pending = np.flatnonzero(~done)
            if pending.size == 0:
                break
            if j > 0:
                level = self.levels[length - j]
                ids = self.find(rows[pending, j:])
                ok = ids >= 0
                safe = np.where(ok, ids, 0)
                hit = ok & level.ngram[safe]
                cost[pending[hit]] += level.logprob[safe[hit]]
                done[pending[hit]] = True
                pending = pending[~hit]
            if length - 1 - j >= 1 and pending.size:
                level = self.levels[length - 1 - j]
                ids = self.find(rows[pending, j:length - 1])
                ok = ids >= 0
                cost[pending[ok]] += level.alpha[ids[ok]]
        cost[~done] = -np.inf  # the word has no unigram
        return cost

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
        pending: np.ndarray | None = None  # rows still unresolved (None: all of them)
        for j in range(length):
            level = self.levels[length - j]
            if pending is None:
                found = ids if (j == 0 and ids is not None) else self.find(rows[:, j:])
            else:
                if pending.size == 0:
                    break
                found = self.find(rows[pending, j:])
            ok = found >= 0
            st = level.state[np.where(ok, found, 0)]
            st[~ok] = -1
            hit = st >= 0
            if hit.all():
                if pending is None:
                    dest[:] = st
                else:
                    dest[pending] = st
                pending = pending[:0] if pending is not None else np.zeros(0, np.int64)
                break
            miss = np.flatnonzero(~hit)
            hits = np.flatnonzero(hit)
            alpha = np.where(ok[miss], level.alpha[found[miss].clip(0)], 0.0)
            if pending is None:
                dest[hits] = st[hits]
                folded[miss] += alpha
                pending = miss
            else:
                dest[pending[hits]] = st[hits]
                folded[pending[miss]] += alpha
                pending = pending[miss]
        # Rows still pending end at the empty history, state 0.
        return dest, folded


def _merge_arcs(num_states: int, radix: int, srcs: list, labels: list, weights: list,
                dsts: list) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Merges the arc parts into one arc list grouped by state, sorted by label.

    Each state's arcs come from a few parts, and a part's arcs of one state have labels
    below those of the next part's (word arcs of one order, then back-off arcs, whose
    label is the largest). So every part, once sorted by (state, label) -- which it
    already is when the model lists its n-grams in id order -- is scattered straight to
    its final positions: no sort of all arcs. The lists are emptied as parts are used.
    """
    per_state = np.zeros(num_states, dtype=np.int64)
    for part in srcs:
        per_state += np.bincount(part, minlength=num_states)
    offset = np.zeros(num_states + 1, dtype=np.int64)
    np.cumsum(per_state, out=offset[1:])
    total = int(offset[-1])
    del per_state
    out_src = np.empty(total, dtype=np.int32)
    out_label = np.empty(total, dtype=np.int32)
    out_weight = np.empty(total, dtype=np.float32)
    out_dst = np.empty(total, dtype=np.int32)
    fill = offset[:-1].copy()
    while srcs:
        src, label, weight, dst = srcs.pop(0), labels.pop(0), weights.pop(0), dsts.pop(0)
        n = src.shape[0]
        if n == 0:
            continue
        key = src.astype(np.int64) * radix + label
        if not _is_sorted(key):
            order = _sort_order(key)
            src, label, weight, dst = src[order], label[order], weight[order], dst[order]
            del order
        del key
        # rank of each arc among its state's arcs in this part
        first = np.empty(n, dtype=bool)
        first[0] = True
        np.not_equal(src[1:], src[:-1], out=first[1:])
        group_start = np.flatnonzero(first)
        rank = np.arange(n, dtype=np.int64)
        rank -= np.repeat(group_start, np.diff(np.append(group_start, n)))
        pos = fill[src] + rank
        del rank, first, group_start
        out_src[pos], out_label[pos], out_weight[pos], out_dst[pos] = src, label, weight, dst
        fill += np.bincount(src, minlength=num_states)
        del pos, src, label, weight, dst
    return out_src, out_label, out_weight, out_dst


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
    top = model.max_order
    for n in range(1, top + 1):
        if n < top:
            # Arcs of a lower order come from the level: n-grams and filled holes.
            level = hist.levels[n]
            ids = np.flatnonzero(level.ngram)
            words = (ids.reshape(-1, 1).astype(np.int32) if n == 1
                     else hist.packer.unpack(level.keys[ids], n))
            logprob = level.logprob[ids]
        else:
            ids = None
            words = model.orders[n - 1].words
            logprob = model.orders[n - 1].logprob
        if words.shape[0] == 0:
            continue
        last = words[:, n - 1]
        if n == 1:
            src = np.zeros(words.shape[0], dtype=np.int64)
        else:
            src = hist.levels[n - 1].state[hist.find(words[:, :n - 1])]
        ends = last == hist.eos
        final[src[ends]] = -LN10 * logprob[ends]
        keep = np.flatnonzero(is_word[last])
        if n < top:
            dest, folded = hist.resolve(words[keep], ids[keep])
        else:
            dest, folded = hist.resolve(words[keep, 1:])
        folded_ngrams += int(np.count_nonzero(folded))
        srcs.append(src[keep].astype(np.int32))
        labels.append(label_of[last[keep]])
        weights.append((-LN10 * (logprob[keep] + folded)).astype(np.float32))
        dsts.append(dest.astype(np.int32))
        del src, dest, folded, keep

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
        srcs.append(level.state[ids].astype(np.int32))
        labels.append(np.full(ids.size, backoff_label, dtype=np.int32))
        weights.append((-LN10 * (level.alpha[ids] + folded)).astype(np.float32))
        dsts.append(dest.astype(np.int32))

    # Drop the loops' last temporaries: `level` would keep a whole level of `hist`
    # alive through the FST construction, which is where the memory peaks.
    level = ids = rows = dest = folded = words = logprob = last = ends = None
    num_states, start, filled = hist.num_states, hist.start, hist.filled
    del hist
    src, ilabel, weight, dst = _merge_arcs(num_states, backoff_label + 1,
                                           srcs, labels, weights, dsts)
    olabel = np.where(ilabel == backoff_label, 0, ilabel).astype(np.int32)
    symbols = word_symbol_table(model)
    fst = arrays_to_fst(num_states, start, final, src, ilabel, olabel, weight, dst,
                        symbols, symbols)
    return GrammarResult(fst=fst, word_symbols=symbols, num_histories=num_states,
                         folded_ngrams=folded_ngrams, folded_backoffs=folded_backoffs,
                         filled_holes=filled)
