"""Estimating back-off n-gram models from text.

- `read_sentences(path, diagnostics=None)`: one sentence per line, whitespace tokenised.
- `estimate(sentences, order=3, method="witten_bell", unk=False)`: an interpolated
  Witten-Bell model written in back-off form as an `ArpaModel`.

Interpolated Witten-Bell (reference: Witten & Bell 1991, "The zero-frequency problem:
estimating the probabilities of novel events in adaptive text compression", IEEE
Trans. Inf. Theory 37(4):1085-1094, doi:10.1109/18.87000; the interpolated n-gram form
as in Chen & Goodman 1999, "An empirical study of smoothing techniques for language
modeling", Computer Speech & Language 13(4):359-394, doi:10.1006/csla.1999.0128, eq. 14)::

    P(w | h) = (c(h w) + T(h) * P(w | h')) / (c(h) + T(h))

with ``c(h) = sum_w c(h w)``, ``T(h)`` the number of distinct words seen after ``h``
and ``h'`` the history without its oldest word. The recursion ends in a uniform
distribution over the predicted vocabulary (the seen words, ``</s>``, and ``<unk>``
when `unk=True`). In back-off form every seen n-gram stores its interpolated
probability and every seen history the weight ``bo(h) = T(h) / (c(h) + T(h))``:
for an unseen ``h w`` the interpolated value is exactly ``bo(h) * P(w | h')``, so each
history's distribution (words plus ``</s>``) sums to 1. ``<s>`` is a history only
(log10 probability -99). Vocabulary order: ``</s>``, ``<s>``, [``<unk>``], then the
words in first-seen order; rows of each order are sorted by word ids.
"""

from __future__ import annotations

import math
import os
from collections import Counter
from collections.abc import Iterable, Sequence

import numpy as np

from ..errors import Diagnostics, InputError, ProjectError
from ..io.arpa import ArpaModel, NgramTable
from ..symbols import SENTENCE_END, SENTENCE_START, UNKNOWN, is_reserved_word

METHODS = ("witten_bell",)
_ZERO_LOG10 = -99.0  # the ARPA format's log10 of probability zero


def read_sentences(path: str | os.PathLike,
                   diagnostics: Diagnostics | None = None) -> list[list[str]]:
    """Reads a UTF-8 text file with one sentence per line (blank lines are skipped).

    Raises:
      InputError: for bytes that are not UTF-8 (with their byte offset) and for words
        spelled like reserved symbols (``<s>``, ``</s>``, ``<epsilon>``, ``!...``).
    """
    path = os.fspath(path)
    diag = diagnostics if diagnostics is not None else Diagnostics()
    try:
        with open(path, "rb") as f:
            data = f.read()
    except OSError as err:
        raise InputError(f"cannot read the file ({err.strerror})", "check the path",
                         path=path) from err
    sentences: list[list[str]] = []
    offset = 0
    for number, raw in enumerate(data.split(b"\n"), start=1):
        try:
            text = raw.decode("utf-8")
        except UnicodeDecodeError as err:
            diag.error(path, number, f"bytes that are not valid UTF-8 at byte offset "
                       f"{offset + err.start}", "save the file as UTF-8")
            text = ""
        offset += len(raw) + 1
        words = text.split()
        bad = [w for w in words if is_reserved_word(w)]
        if bad:
            diag.error(path, number, f"reserved symbol '{bad[0]}' in a sentence",
                       "remove it: sentence markers are added automatically and words "
                       "may not start with '!'")
            continue
        if words:
            sentences.append(words)
    diag.raise_if_errors(InputError, path)
    return sentences


def estimate(sentences: Iterable[Sequence[str]], order: int = 3, *,
             method: str = "witten_bell", unk: bool = False) -> ArpaModel:
    """Estimates a back-off model of `order` (1 to 6 or more) from tokenised sentences.

    Args:
      sentences: each a sequence of words (no ``<s>``/``</s>``; they are added).
      order: the highest n-gram order.
      method: "witten_bell" (interpolated, stored in back-off form).
      unk: also give ``<unk>`` a (small) probability from the uniform floor.

    Raises:
      ProjectError: unknown `method`, `order` < 1, or no sentences.
      InputError: a sentence containing a reserved symbol (located by sentence number).
    """
    if method not in METHODS:
        raise ProjectError(f"unknown estimation method '{method}'",
                           f"use one of: {', '.join(METHODS)}")
    if order < 1:
        raise ProjectError(f"n-gram order {order} is below 1", "use an order of 1 or more")
    counts: list[Counter] = [Counter() for _ in range(order)]
    vocab: dict[str, int] = {SENTENCE_END: 0, SENTENCE_START: 1}
    if unk:
        vocab[UNKNOWN] = 2
    n_sent = 0
    for number, sent in enumerate(sentences, start=1):
        n_sent += 1
        ids = [vocab[SENTENCE_START]]
        for w in sent:
            if is_reserved_word(w):
                raise InputError(f"reserved symbol '{w}' in sentence {number}",
                                 "remove it; sentence markers are added automatically",
                                 path="<sentences>", line=number)
            ids.append(vocab.setdefault(w, len(vocab)))
        ids.append(vocab[SENTENCE_END])
        for n in range(1, order + 1):
            c = counts[n - 1]
            # n-grams ending at positions 1..end (the word predicted is never <s>)
            for end in range(1, len(ids)):
                start = end - n + 1
                if start < 0:
                    continue
                c[tuple(ids[start:end + 1])] += 1
    if n_sent == 0:
        raise ProjectError("no sentences to estimate from", "give a non-empty text")

    predicted = [i for w, i in vocab.items() if w != SENTENCE_START]
    uniform = 1.0 / len(predicted)
    prob: dict[tuple[int, ...], float] = {}
    backoff: dict[tuple[int, ...], float] = {}
    # history statistics: c(h) and T(h), over the n-grams of each order
    hist_total: list[Counter] = [Counter() for _ in range(order)]
    hist_types: list[Counter] = [Counter() for _ in range(order)]
    for n in range(1, order + 1):
        for gram, c in counts[n - 1].items():
            hist_total[n - 1][gram[:-1]] += c
            hist_types[n - 1][gram[:-1]] += 1
    total0, types0 = hist_total[0][()], hist_types[0][()]
    for w in predicted:
        c = counts[0].get((w,), 0)
        prob[(w,)] = (c + types0 * uniform) / (total0 + types0)
    for n in range(2, order + 1):
        for gram, c in counts[n - 1].items():
            h = gram[:-1]
            t, tot = hist_types[n - 1][h], hist_total[n - 1][h]
            prob[gram] = (c + t * prob[gram[1:]]) / (tot + t)
    for n in range(1, order):
        for h, t in hist_types[n].items():
            backoff[h] = t / (hist_total[n][h] + t)

    tables = []
    for n in range(1, order + 1):
        if n == 1:
            grams = [(i,) for i in range(len(vocab))]
        else:
            grams = sorted(counts[n - 1])
        words = np.array(grams, np.int32).reshape(-1, n)
        lp = np.array([math.log10(prob[g]) if g in prob else _ZERO_LOG10 for g in grams])
        if n < order:
            bo = np.array([math.log10(backoff[g]) if g in backoff else 0.0 for g in grams])
        else:
            bo = np.zeros(len(grams))
        tables.append(NgramTable(n, words, lp, bo, np.zeros(len(grams), np.int64)))
    return ArpaModel(list(vocab), tables, "<estimated>")
