"""Relative-entropy pruning of back-off n-gram models, in bulk with numpy.

- `PruneResult`: the pruned model plus what pruning did.
- `pruning_criteria(model)`: the relative-entropy change of removing each n-gram.
- `prune_model(model, threshold)`: removes the n-grams whose criterion is below the
  threshold and recomputes the back-off weights.
- `renormalize_backoffs(model)`: recomputes every back-off weight so each history's
  distribution sums to 1.
- `history_sums(model)`: each history's total probability over the predicted words
  (a check of `renormalize_backoffs`).
- `write_model_atomically(model, path)`: writes an ARPA file through a temporary file.
- `BackoffTables`: vectorised ARPA back-off look-ups (`logprob10(contexts, words)`).

Criterion (Stolcke 1998, section 2, reference below). Removing the n-gram ``(h, w)``
from a back-off model changes only the distribution after ``h``: ``w`` is then
predicted by back-off, ``p'(w | h) = alpha'(h) p(w | h')`` with ``h'`` the history
without its oldest word, and the back-off weight is renormalised::

    alpha'(h) = (1 - sum_{v in S(h), v != w} p(v | h)) / (1 - sum_{v in S(h), v != w} p(v | h'))

(``S(h)``: the words with an explicit n-gram after ``h``). The relative entropy
``D(p || p') = sum_h P(h) sum_v p(v | h) ln(p(v | h) / p'(v | h))`` then has the
closed form (every other explicit word keeps its probability; every backed-off word's
ratio is ``alpha(h) / alpha'(h)``)::

    D = P(h) * [ p(w|h) (ln p(w|h) - ln p(w|h') - ln alpha'(h))
                 + alpha(h) B(h) (ln alpha(h) - ln alpha'(h)) ]

with ``B(h) = 1 - sum_{v in S(h)} p(v | h')``, the lower-order mass of the backed-off
words (so ``alpha(h) B(h)`` is their mass under ``h``). It costs O(1) per n-gram
from per-history sums. ``P(h)`` is the history's probability by the chain rule of the
model itself, ``P(h_1) prod_i p(h_i | h_1..h_{i-1})``, with ``P(<s>) = 1`` for a
history that starts a sentence. D is in nats; for small values it equals the paper's
relative perplexity increase ``exp(D) - 1``. Each n-gram is judged against the
original model, independently of the others (the paper's approximation).

Pruning removes every n-gram of order >= 2 whose criterion is below the threshold,
except one that is the history (context) of a kept higher-order n-gram: removing it
would leave the kept n-gram without the history it extends (ARPA readers expect each
n-gram's prefix to be listed). Orders are settled from the highest down, so the
protection cascades. Then the back-off weights are recomputed from the lowest order
up (a history's weight uses the already recomputed lower orders), so every history
still sums to 1. Unigrams are never pruned. Empty orders at the top are dropped.

References:
  Stolcke, A. (1998). Entropy-based pruning of backoff language models. Proceedings
  of the DARPA Broadcast News Transcription and Understanding Workshop, 270-274.
  arXiv:cs/0006025.
"""

from __future__ import annotations

import contextlib
import dataclasses
import math
import os
import tempfile
from pathlib import Path

import numpy as np

from ..bulk import unique_sorted
from ..errors import ArpaError, ProjectError
from ..io.arpa import ArpaModel, NgramTable, write_arpa
from ..symbols import SENTENCE_END, SENTENCE_START

__all__ = ["BackoffTables", "PruneResult", "history_sums", "prune_model", "pruning_criteria",
           "renormalize_backoffs", "write_model_atomically"]

LN10 = math.log(10.0)
_ZERO_LOG10 = -99.0  # ARPA's log10 of probability zero
_TINY = 1e-300


class _Keys:
    """Packs id rows into sortable int64 keys (or void bytes when they do not fit)."""

    def __init__(self, vocab_size: int) -> None:
        self.bits = max(1, int(max(vocab_size, 1) - 1).bit_length())

    def pack(self, rows: np.ndarray) -> np.ndarray:
        length = rows.shape[1]
        if length * self.bits <= 63:
            key = np.zeros(rows.shape[0], np.int64)
            for j in range(length):
                key <<= self.bits
                key |= rows[:, j].astype(np.int64)
            return key
        big = np.ascontiguousarray(rows, dtype=">u4")
        return big.view(np.dtype((np.void, 4 * length))).ravel()


class BackoffTables:
    """Vectorised ARPA back-off look-ups over an `ArpaModel`.

    `row(order, grams)` finds n-gram rows; `logprob10(contexts, words)` applies the
    back-off rule (Katz 1987, as stored in ARPA files) to many (context, word) pairs
    at once. The back-off arrays are the model's own (not copies), so a caller that
    changes `model.orders[k].backoff` in place sees the change in later look-ups.
    """

    def __init__(self, model: ArpaModel) -> None:
        self.model = model
        self.keys = _Keys(len(model.vocab))
        self._sorted: list[tuple[np.ndarray, np.ndarray]] = []
        for t in model.orders:
            k = self.keys.pack(t.words)
            order = np.argsort(k, kind="stable")
            self._sorted.append((k[order], order))

    def row(self, order: int, grams: np.ndarray) -> np.ndarray:
        """Row index in `model.orders[order - 1]` of each n-gram in `grams` (m, order),
        -1 where the model does not list it."""
        m = grams.shape[0]
        if order < 1 or order > self.model.max_order or m == 0:
            return np.full(m, -1, np.int64)
        skeys, perm = self._sorted[order - 1]
        if skeys.shape[0] == 0:
            return np.full(m, -1, np.int64)
        q = self.keys.pack(grams)
        pos = np.minimum(np.searchsorted(skeys, q), skeys.shape[0] - 1)
        return np.where(skeys[pos] == q, perm[pos], -1)

    def backoff10(self, contexts: np.ndarray) -> np.ndarray:
        """log10 back-off weight of each context (0 where it is not an n-gram)."""
        n = contexts.shape[1]
        if n == 0:
            return np.zeros(contexts.shape[0])
        r = self.row(n, contexts)
        out = np.zeros(contexts.shape[0])
        hit = r >= 0
        out[hit] = self.model.orders[n - 1].backoff[r[hit]]
        return out

    def logprob10(self, contexts: np.ndarray, words: np.ndarray) -> np.ndarray:
        """log10 P(word | context) by the back-off rule; `contexts` (m, L) oldest first.

        Contexts longer than `max_order - 1` must be cut by the caller. A word without
        a 1-gram gets -99 plus the back-off weights on the way.
        """
        m, length = contexts.shape
        out = np.full(m, np.nan)
        acc = np.zeros(m)
        todo = np.ones(m, bool)
        for start in range(length + 1):
            idx = np.flatnonzero(todo)
            if idx.size == 0:
                break
            sub = contexts[idx, start:]
            gram = np.concatenate([sub, words[idx, None]], axis=1)
            r = self.row(length - start + 1, gram)
            hit = r >= 0
            t = self.model.orders[length - start]
            out[idx[hit]] = acc[idx[hit]] + t.logprob[r[hit]]
            todo[idx[hit]] = False
            miss = idx[~hit]
            acc[miss] += self.backoff10(contexts[miss, start:])
        out[todo] = acc[todo] + _ZERO_LOG10
        return out

    def history_logprob10(self, histories: np.ndarray) -> np.ndarray:
        """log10 P(h) of each history by the chain rule (P(<s>) = 1 at the start)."""
        m, n = histories.shape
        total = np.zeros(m)
        if n == 0:
            return total
        keep = self.model.max_order - 1
        vocab = self.model.word_index()
        bos = vocab.get(SENTENCE_START, -1)
        for i in range(n):
            ctx = histories[:, max(0, i - keep):i]
            lp = self.logprob10(ctx, histories[:, i])
            if i == 0:
                lp = np.where(histories[:, 0] == bos, 0.0, lp)
            total += lp
        return total


@dataclasses.dataclass
class PruneResult:
    """The pruned model; `criteria[k]` holds the criterion (nats) of every (k+1)-gram
    of the input model (NaN for unigrams); `kept[k]` says which rows survived
    (`protected[k]` counts rows kept only as the history of a kept higher n-gram)."""

    model: ArpaModel
    threshold: float
    criteria: list[np.ndarray]
    kept: list[np.ndarray]
    protected: list[int]

    @property
    def counts_before(self) -> list[int]:
        return [len(k) for k in self.kept]

    @property
    def counts_after(self) -> list[int]:
        return self.model.counts()

    @property
    def ngrams(self) -> int:
        """All n-grams of the pruned model."""
        return sum(self.model.counts())


def _history_stats(tables: BackoffTables, order: int) -> tuple[np.ndarray, np.ndarray,
                                                               np.ndarray, np.ndarray]:
    """For the `order`-grams: (history row, lower-order log10 prob, per-history sum of
    p(w|h), per-history sum of p(w|h')); the sums are indexed by history row."""
    model = tables.model
    t = model.orders[order - 1]
    hist_row = tables.row(order - 1, t.words[:, :-1])
    lower = tables.logprob10(t.words[:, 1:-1], t.words[:, -1])
    n_hist = len(model.orders[order - 2])
    ok = hist_row >= 0
    sum_p = np.bincount(hist_row[ok], weights=10.0 ** t.logprob[ok], minlength=n_hist)
    sum_q = np.bincount(hist_row[ok], weights=10.0 ** lower[ok], minlength=n_hist)
    return hist_row, lower, sum_p, sum_q


def pruning_criteria(model: ArpaModel) -> list[np.ndarray]:
    """Returns, per order, the relative-entropy change (nats) of removing each n-gram.

    The closed form of the module docstring, from per-history sums; unigrams get NaN
    (never pruned). An n-gram whose history is not listed (a hole) is judged with
    back-off weight 1 for it.
    """
    tables = BackoffTables(model)
    out = [np.full(len(model.orders[0]) if model.orders else 0, np.nan)]
    for order in range(2, model.max_order + 1):
        t = model.orders[order - 1]
        if len(t) == 0:
            out.append(np.zeros(0))
            continue
        hist_row, lower, sum_p, sum_q = _history_stats(tables, order)
        ok = hist_row >= 0
        safe = np.where(ok, hist_row, 0)
        # histories that are holes: their own sums over the n-grams that name them
        hole_p = np.zeros(len(t))
        hole_q = np.zeros(len(t))
        if not ok.all():
            keys = tables.keys.pack(t.words[~ok, :-1])
            inv = np.searchsorted(unique_sorted(keys), keys)
            hp = np.bincount(inv, weights=10.0 ** t.logprob[~ok])
            hq = np.bincount(inv, weights=10.0 ** lower[~ok])
            hole_p[~ok], hole_q[~ok] = hp[inv], hq[inv]
        sp = np.where(ok, sum_p[safe], hole_p)
        sq = np.where(ok, sum_q[safe], hole_q)
        bo10 = np.where(ok, model.orders[order - 2].backoff[safe], 0.0)
        p = 10.0 ** t.logprob
        q = 10.0 ** lower
        ln_p, ln_q, ln_alpha = t.logprob * LN10, lower * LN10, bo10 * LN10
        num = np.maximum(1.0 - sp, 0.0) + p  # 1 - sum over the other explicit words
        den = np.maximum(1.0 - sq, 0.0) + q
        with np.errstate(divide="ignore", invalid="ignore"):
            ln_alpha_new = np.log(np.maximum(num, _TINY)) - np.log(np.maximum(den, _TINY))
            backed = 10.0 ** bo10 * np.maximum(1.0 - sq, 0.0)
            d = p * (ln_p - ln_q - ln_alpha_new) + backed * (ln_alpha - ln_alpha_new)
            p_hist = 10.0 ** tables.history_logprob10(t.words[:, :-1])
            d = p_hist * d
        out.append(np.where(np.isfinite(d), d, np.inf))
    return out


def renormalize_backoffs(model: ArpaModel) -> ArpaModel:
    """Constructively recomputes every back-off weight so each history sums to 1.

    ``alpha(h) = (1 - sum_{w in S(h)} p(w|h)) / (1 - sum_{w in S(h)} p(w|h'))``,
    from the lowest order up; a history without continuations gets weight 1 (log 0),
    one whose explicit words already hold all the mass gets -99.
    """
    orders = [NgramTable(t.order, t.words, t.logprob.copy(), t.backoff.copy(), t.lines)
              for t in model.orders]
    new = ArpaModel(list(model.vocab), orders, model.path)
    tables = BackoffTables(new)
    for order in range(2, new.max_order + 1):
        hist = orders[order - 2]
        if len(orders[order - 1]) == 0:
            hist.backoff[:] = 0.0
            continue
        _, _, sum_p, sum_q = _history_stats(tables, order)
        num = 1.0 - sum_p
        den = 1.0 - sum_q
        with np.errstate(divide="ignore", invalid="ignore"):
            bo = np.log10(np.maximum(num, 0.0)) - np.log10(np.maximum(den, _TINY))
        bo = np.where(num <= 1e-12, _ZERO_LOG10, bo)
        bo = np.where(sum_p == 0.0, 0.0, bo)  # no continuation: nothing to renormalise
        hist.backoff[:] = np.where(np.isfinite(bo), bo, 0.0)
    if orders:
        orders[-1].backoff[:] = 0.0
    return new


def history_sums(model: ArpaModel, histories: np.ndarray | None = None) -> np.ndarray:
    """Returns sum over the predicted words v (all but <s>) of P(v | h) for each history.

    `histories` (m, L) defaults to the empty history followed by every n-gram
    below the highest order, except
    those ending in </s> (nothing follows the end of a sentence). Brute force over
    the vocabulary: m * |V| look-ups.
    """
    tables = BackoffTables(model)
    index = model.word_index()
    bos = index.get(SENTENCE_START, -1)
    predicted = np.array([i for i in range(len(model.vocab)) if i != bos], np.int32)
    if histories is None:
        rows = [model.orders[k].words for k in range(model.max_order - 1)]
        eos = index.get(SENTENCE_END, -1)
        groups = [np.zeros((1, 0), np.int32)] + [r[r[:, -1] != eos] for r in rows]
    else:
        groups = [np.asarray(histories, np.int32)]
    sums = []
    for g in groups:
        if g.shape[0] == 0:
            continue
        ctx = np.repeat(g, len(predicted), axis=0)
        words = np.tile(predicted, g.shape[0])
        lp = tables.logprob10(ctx, words).reshape(g.shape[0], len(predicted))
        sums.append((10.0 ** lp).sum(axis=1))
    return np.concatenate(sums) if sums else np.zeros(0)


def prune_model(model: ArpaModel, threshold: float,
                criteria: list[np.ndarray] | None = None) -> PruneResult:
    """Constructively prunes `model` by relative entropy (Stolcke 1998).

    Args:
      model: a back-off model (normalised, as written by an estimator).
      threshold: n-grams of order >= 2 whose criterion (nats, see the module
        docstring) is below it are removed; 0 keeps all, ``inf`` leaves the unigrams.
      criteria: the result of `pruning_criteria(model)`, when already computed.

    Returns:
      A `PruneResult`; its model has recomputed back-off weights.

    Raises:
      ProjectError: `threshold` is negative or NaN.
    """
    if not threshold >= 0.0:
        raise ProjectError(f"pruning threshold {threshold!r} is not a number >= 0",
                           "give a threshold such as 1e-7 (0 keeps every n-gram)",
                           path="--threshold")
    crit = criteria if criteria is not None else pruning_criteria(model)
    n = model.max_order
    kept = [np.ones(len(t), bool) for t in model.orders]
    protected = [0] * n
    tables = BackoffTables(model)
    for order in range(n, 1, -1):
        t = model.orders[order - 1]
        keep = crit[order - 1] >= threshold
        if order < n and len(model.orders[order]):
            higher = model.orders[order]
            prefix_rows = tables.row(order, higher.words[kept[order], :-1])
            needed = np.zeros(len(t), bool)
            needed[prefix_rows[prefix_rows >= 0]] = True
            protected[order - 1] = int((needed & ~keep).sum())
            keep |= needed
        kept[order - 1] = keep
    orders = [NgramTable(t.order, t.words[k], t.logprob[k], t.backoff[k], t.lines[k])
              for t, k in zip(model.orders, kept)]
    while len(orders) > 1 and len(orders[-1]) == 0:
        orders.pop()
    pruned = renormalize_backoffs(ArpaModel(list(model.vocab), orders, model.path))
    return PruneResult(pruned, float(threshold), crit, kept, protected)


def write_model_atomically(model: ArpaModel, path: str | os.PathLike) -> None:
    """Writes `model` as ARPA to a temporary file beside `path`, then renames it.

    Raises:
      ArpaError: the directory cannot be written (or the model cannot be written as ARPA).
    """
    target = Path(path)
    suffix = ".gz" if target.name.endswith(".gz") else ".arpa"
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=suffix,
                                   dir=target.parent if str(target.parent) else ".")
    except OSError as err:
        raise ArpaError(f"cannot write in {target.parent} ({err.strerror})",
                        "choose a writable output directory", path=str(target)) from err
    os.close(fd)
    try:
        write_arpa(model, tmp)
        os.replace(tmp, target)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise
