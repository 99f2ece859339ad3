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

import concurrent.futures
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
    # (auxiliary markers all start with "!": the cheap test screens the vocabulary)
    bad = [i for i, w in enumerate(model.vocab)
           if w == EPSILON or (w[:1] == "!" and is_auxiliary(w))]
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


def _position(vocab: list[str], word: str) -> int:
    """The index of `word` in `vocab`, -1 if absent."""
    try:
        return vocab.index(word)
    except ValueError:
        return -1


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


def _sort_with_order(keys: np.ndarray) -> tuple[np.ndarray, np.ndarray | None]:
    """`keys` sorted and the permutation that sorts them (ties in any order); the
    permutation is None when `keys` are already sorted (then they are returned as is).

    For non-negative int64 keys, sorting `key << b | index` as plain int64 is several
    times faster than argsort, and yields the sorted keys (the high bits) and the
    permutation (the low bits) without a gather; it is used when key and index fit into
    63 bits together.
    """
    n = keys.shape[0]
    if keys.dtype == np.int64 and n > 1:
        descents = int(np.count_nonzero(keys[1:] < keys[:-1]))
        if descents == 0:
            return keys, None
        if descents < _FEW_RUNS:
            # A few sorted runs (concatenated sorted parts): the stable sort (timsort)
            # merges them in about linear time.
            order = np.argsort(keys, kind="stable")
            return keys[order], order
    if keys.dtype == np.int64 and n:
        index_bits = max(1, int(n - 1).bit_length())
        top = int(keys.max())
        if top >= 0 and int(keys.min()) >= 0 and top.bit_length() + index_bits <= 63:
            packed = keys << index_bits
            packed |= np.arange(n, dtype=np.int64)
            packed.sort()
            ordered = packed >> index_bits
            packed &= (1 << index_bits) - 1
            return ordered, packed
    order = np.argsort(keys)
    return keys[order], order


def _sort_order(keys: np.ndarray) -> np.ndarray:
    """A permutation sorting non-negative int64 `keys` (ties in any order)."""
    order = _sort_with_order(keys)[1]
    return np.arange(keys.shape[0]) if order is None else order


def _unique_inverse(keys: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Sorted unique keys and, for each key, its index among them (as np.unique)."""
    if keys.shape[0] == 0:
        return keys[:0], np.zeros(0, dtype=np.int64)
    ordered, order = _sort_with_order(keys)
    new = np.empty(ordered.shape[0], dtype=bool)
    new[0] = True
    np.not_equal(ordered[1:], ordered[:-1], out=new[1:])
    rank = np.cumsum(new)
    rank -= 1
    if order is None:
        return ordered[new], rank
    inverse = np.empty(keys.shape[0], dtype=np.int64)
    inverse[order] = rank
    return ordered[new], inverse


def _merge_keys(ngram_keys: np.ndarray, hole_keys: np.ndarray
                ) -> tuple[np.ndarray, np.ndarray, np.ndarray, bool]:
    """The sorted union of a level's n-gram keys and its hole keys (sorted, distinct,
    none an n-gram), where each n-gram and each hole went in it, and whether the
    n-gram keys were strictly increasing.

    When they are (an ARPA file in id order), the two sorted lists are merged by the
    holes' ranks among the n-grams, without a sort.
    """
    n = ngram_keys.shape[0]
    if ngram_keys.dtype != np.int64 or not (
            n < 2 or bool((ngram_keys[1:] > ngram_keys[:-1]).all())):
        keys, inverse = _unique_inverse(np.concatenate([ngram_keys, hole_keys]))
        return keys, inverse[:n], inverse[n:], False
    size = n + hole_keys.shape[0]
    hole_pos = np.searchsorted(ngram_keys, hole_keys)
    hole_pos += np.arange(hole_keys.shape[0], dtype=np.int64)
    is_ngram = np.ones(size, dtype=bool)
    is_ngram[hole_pos] = False
    own = np.flatnonzero(is_ngram)
    keys = np.empty(size, dtype=np.int64)
    keys[own] = ngram_keys
    keys[hole_pos] = hole_keys
    return keys, own, hole_pos, True


def _union(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """The sorted union of two sorted arrays of distinct keys."""
    if b.shape[0] == 0:
        return a
    b = b[_lookup(a, b) < 0]
    return _merge_keys(a, b)[0] if b.shape[0] else a


def _lookup(sorted_keys: np.ndarray, queries: np.ndarray) -> np.ndarray:
    """Index of each query in `sorted_keys`, -1 where absent."""
    if sorted_keys.shape[0] == 0 or queries.shape[0] == 0:
        return np.full(queries.shape[0], -1, dtype=np.int64)
    # Sorted queries make the binary searches cache-friendly; the answers are put back
    # in the queries' order with one scatter at the end.
    ordered, order = _sort_with_order(queries)
    pos = np.searchsorted(sorted_keys, ordered)
    np.minimum(pos, sorted_keys.shape[0] - 1, out=pos)
    found = np.where(sorted_keys[pos] == ordered, pos, -1)
    if order is None:
        return found
    del pos, ordered
    out = np.empty(queries.shape[0], dtype=np.int64)
    out[order] = found
    return out


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
        # (the vocabulary has no duplicates, `_check_vocab` saw to it)
        self.bos = _position(model.vocab, SENTENCE_START)
        self.eos = _position(model.vocab, SENTENCE_END)
        top = self.order - 1
        pack = self.packer.pack
        # Top-down: the contexts of each level, and the holes among them (contexts that
        # are no n-gram); a hole's own context is a context one level down.
        contexts: list[np.ndarray | None] = [None] * (top + 1)
        holes: list[np.ndarray | None] = [None] * (top + 1)
        ngram_keys_of: dict[int, np.ndarray] = {}  # level -> its n-grams' keys, file order
        ctx_pos: dict[int, np.ndarray] = {}  # level -> its contexts' places among them
        top_inverse = None  # for each top-order n-gram, the index of its context
        for length in range(top, 0, -1):
            ngram_keys = ngram_keys_of[length] = pack(model.orders[length - 1].words)
            ngram_keys = _sort(ngram_keys)
            if length == top:
                top_ctx = pack(model.orders[top].words[:, :top])
                ctx_keys, top_inverse = _unique_inverse(top_ctx)
                del top_ctx
            else:
                # the contexts of this level's n-grams and those of the holes above
                ctx_keys = _union(_unique(pack(model.orders[length].words[:, :length])),
                                  _unique(pack(hole_rows[:, :length])))
            if length == 1 and self.bos >= 0:  # the <s> history is the start state
                at = int(np.searchsorted(ctx_keys, self.bos))
                if at == ctx_keys.shape[0] or ctx_keys[at] != self.bos:
                    ctx_keys = np.insert(ctx_keys, at, self.bos)
                    if length == top:
                        top_inverse[top_inverse >= at] += 1
            contexts[length] = ctx_keys
            pos = ctx_pos[length] = _lookup(ngram_keys, ctx_keys)
            hole_keys = ctx_keys[pos < 0]
            holes[length] = hole_keys
            if length > 1:
                hole_rows = self.packer.unpack(hole_keys, length)
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
                keys, own, hole_ids, merged = _merge_keys(ngram_keys_of.pop(length),
                                                          holes[length])
                size = keys.shape[0]
                pos = ctx_pos.pop(length)
                if merged:
                    # A context is an n-gram (at `pos` among them, which are in file
                    # order) or a hole (the holes are the others, in order).
                    ctx_ids = np.empty(pos.shape[0], dtype=np.int64)
                    is_ngram = pos >= 0
                    ctx_ids[is_ngram] = own[pos[is_ngram]]
                    ctx_ids[~is_ngram] = hole_ids
                    del is_ngram
                else:
                    ctx_ids = _lookup(keys, contexts[length])
                del pos
            level = _Level(keys, np.full(size, -1, dtype=np.int64),
                           np.zeros(size, dtype=np.float64),
                           np.full(size, -np.inf, dtype=np.float64),
                           np.zeros(size, dtype=bool))
            level.alpha[own] = ngrams.backoff
            level.logprob[own] = ngrams.logprob
            level.ngram[own] = True
            count = ctx_ids.shape[0]
            level.state[ctx_ids] = np.arange(n_states, n_states + count)
            if length == top:
                # contexts[top] are the top order's contexts, in key order: so the G
                # state of each top-order n-gram's context is the first top-level state
                # plus the context's index
                self.top_src = top_inverse + n_states
                top_inverse = None
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
        self.targets: list[tuple[np.ndarray, np.ndarray] | None] = [None]

    def compute_targets(self) -> None:
        """Computes where each entry of each level leads (see `resolve`): once per entry
        instead of once per arc that needs it."""
        for length in range(1, self.order):
            level = self.levels[length]
            dest = level.state.copy()
            folded = np.zeros(dest.shape[0], dtype=np.float64)
            # (a history leads to itself; only the others need their suffixes)
            ids = np.flatnonzero(dest < 0)
            if ids.size:
                rows = (ids.reshape(-1, 1) if length == 1
                        else self.packer.unpack(level.keys[ids], length))
                dest[ids], folded[ids] = self._resolve_rows(rows, ids)
            self.targets.append((dest, folded))

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

    def resolve(self, rows: np.ndarray, found: np.ndarray | None = None
                ) -> tuple[np.ndarray, np.ndarray]:
        """Longest suffix of each row that is a history, and the skipped log10 alphas.

        The same as `_resolve_rows`, through the per-entry `targets`: a row found at its
        level leads where that entry leads; a row that is not there skips nothing and
        continues with its next shorter suffix. Bit for bit the same sums, as each target
        was added up in the same order. `found` may give `find(rows)` if known.
        """
        m, length = rows.shape
        if length == 0:
            return np.zeros(m, dtype=np.int64), np.zeros(m, dtype=np.float64)
        if found is None:
            found = self.find(rows)
        dest_of, folded_of = self.targets[length]
        ok = found >= 0
        if ok.all():
            return dest_of[found], folded_of[found]
        safe = np.where(ok, found, 0)
        dest, folded = dest_of[safe], folded_of[safe]
        rest = np.flatnonzero(~ok)
        dest[rest], folded[rest] = self.resolve(rows[rest, 1:])
        return dest, folded

    def _resolve_rows(self, rows: np.ndarray, ids: np.ndarray | None = None
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
        # Arc i of the part, the k-th of its state s here, goes to fill[s] + k, and
        # k = i - (the part's arcs of states before s): one gather per arc.
        counts = np.bincount(src, minlength=num_states)
        shift = fill.copy()
        shift[1:] -= np.cumsum(counts[:-1])
        pos = shift[src]
        pos += np.arange(n, dtype=np.int64)
        del shift
        out_src[pos], out_label[pos], out_weight[pos], out_dst[pos] = src, label, weight, dst
        fill += counts
        del pos, src, label, weight, dst, counts
    return out_src, out_label, out_weight, out_dst


def _backoff_arcs(hist: _Histories, backoff_label: int,
                  parts: dict[tuple[int, int], tuple[np.ndarray, ...]]) -> int:
    """Adds the back-off arcs of each level's histories to `parts` (keys (1, level));
    returns how many of them carry folded back-off weights."""
    folded_backoffs = 0
    for length in range(1, len(hist.levels)):
        level = hist.levels[length]
        ids = np.flatnonzero(level.state >= 0)
        if ids.size == 0:
            continue
        if length == 1:
            dest = np.zeros(ids.size, dtype=np.int64)
            folded = np.zeros(ids.size)
        else:
            rows = hist.packer.unpack(level.keys[ids], length)
            dest, folded = hist.resolve(rows[:, 1:])
        folded_backoffs += int(np.count_nonzero(folded))
        parts[(1, length)] = (level.state[ids].astype(np.int32),
                              np.full(ids.size, backoff_label, dtype=np.int32),
                              (-LN10 * (level.alpha[ids] + folded)).astype(np.float32),
                              dest.astype(np.int32))
    return folded_backoffs


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

    # Arc parts, merged in key order: the word arcs of each order, then the back-off
    # arcs of each level (a state's back-off arc follows its word arcs).
    parts: dict[tuple[int, int], tuple[np.ndarray, ...]] = {}
    folded_ngrams = 0
    top = model.max_order
    with concurrent.futures.ThreadPoolExecutor(max_workers=1) as pool:
        # The largest single step, finding the suffix of every top-order n-gram among
        # the histories (a sort and binary searches), runs in a second thread while the
        # other arcs are built: numpy releases the GIL in both.
        top_found = None
        if top >= 3 and len(model.orders[top - 1]):
            top_found = pool.submit(hist.find, model.orders[top - 1].words[:, 1:])
        hist.compute_targets()
        folded_backoffs = _backoff_arcs(hist, backoff_label, parts)
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
            elif n == top:
                src = hist.top_src
            else:
                src = hist.levels[n - 1].state[hist.find(words[:, :n - 1])]
            ends = last == hist.eos
            final[src[ends]] = -LN10 * logprob[ends]
            keep = np.flatnonzero(is_word[last])
            if n < top:
                dest, folded = (a[ids[keep]] for a in hist.targets[n])
            else:
                found = None if top_found is None else top_found.result()[keep]
                top_found = None
                dest, folded = hist.resolve(words[keep, 1:], found)
                del found
            folded_ngrams += int(np.count_nonzero(folded))
            parts[(0, n)] = (src[keep].astype(np.int32), label_of[last[keep]],
                             (-LN10 * (logprob[keep] + folded)).astype(np.float32),
                             dest.astype(np.int32))
            del src, dest, folded, keep
    srcs, labels, weights, dsts = [], [], [], []
    for key in sorted(parts):
        for out, a in zip((srcs, labels, weights, dsts), parts.pop(key)):
            out.append(a)

    # Drop the loops' last temporaries: `level` would keep a whole level of `hist`
    # alive through the FST construction, which is where the memory peaks.
    level = ids = rows = dest = folded = words = logprob = last = ends = None
    num_states, start, filled = hist.num_states, hist.start, hist.filled
    del hist
    src, ilabel, weight, dst = _merge_arcs(num_states, backoff_label + 1,
                                           srcs, labels, weights, dsts)
    olabel = np.where(ilabel == backoff_label, 0, ilabel).astype(np.int32, copy=False)
    symbols = word_symbol_table(model)
    fst = arrays_to_fst(num_states, start, final, src, ilabel, olabel, weight, dst,
                        symbols, symbols)
    return GrammarResult(fst=fst, word_symbols=symbols, num_histories=num_states,
                         folded_ngrams=folded_ngrams, folded_backoffs=folded_backoffs,
                         filled_holes=filled)
