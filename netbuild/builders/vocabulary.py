"""Fitting a language model's vocabulary to the words a lexicon can pronounce.

- `VocabularyReport`: what the policy did.
- `restrict_vocabulary(model, words, policy)`: applies "drop", "unk" or "fail" to the model
  words missing from `words` (<s> and </s> are always kept).

Policies:

- "drop": every n-gram containing a missing word (in any position) is removed and the
  words leave the vocabulary. The model is not renormalized: the unigram probability mass
  of the dropped words (reported) is simply lost, and the back-off weights stay as they
  were, so every remaining n-gram keeps its probability.
- "unk": n-grams ending in a missing word are mapped to end in <unk> instead; n-grams
  with a missing word earlier in them are removed. Mapped n-grams with the same context
  (and an <unk> n-gram already there) merge into one whose probability is the sum of
  theirs; its back-off weight is the original <unk> n-gram's (0 if there was none).
  This is an approximation: in a context where some missing words had explicit n-grams
  and others were reached by back-off, the merged <unk> n-gram only holds the explicit
  part, and the back-off weights are not recomputed, so the model is not exactly
  normalized. Requires <unk> among `words`.
- "fail": any missing word is an error naming the first few.
"""

from __future__ import annotations

import dataclasses
from typing import Literal

import numpy as np

from ..errors import InputError
from ..io.arpa import ArpaModel, NgramTable
from ..symbols import SENTENCE_END, SENTENCE_START, UNKNOWN

__all__ = ["VocabularyReport", "restrict_vocabulary"]

VocabularyPolicy = Literal["drop", "unk", "fail"]
_SHOWN = 5  # missing words named in a "fail" message


@dataclasses.dataclass(frozen=True)
class VocabularyReport:
    """`dropped` (policy "drop") or `mapped_to_unk` (policy "unk") list the missing
    words in vocabulary order; `removed_unigram_mass` is the probability (not log) of
    the dropped words' unigrams."""

    dropped: list[str] = dataclasses.field(default_factory=list)
    mapped_to_unk: list[str] = dataclasses.field(default_factory=list)
    removed_unigram_mass: float = 0.0


def _unigram_line(model: ArpaModel, word_id: int) -> int | None:
    if not model.orders:
        return None
    uni = model.orders[0]
    rows = np.flatnonzero(uni.words[:, 0] == word_id)
    if rows.size and uni.lines[rows[0]] > 0:
        return int(uni.lines[rows[0]])
    return None


def _subset(table: NgramTable, keep: np.ndarray, remap: np.ndarray) -> NgramTable:
    return NgramTable(table.order, remap[table.words[keep]].astype(np.int32),
                      table.logprob[keep], table.backoff[keep], table.lines[keep])


def _log10_sum(logprobs: np.ndarray, groups: np.ndarray, n_groups: int) -> np.ndarray:
    """log10 of the sum of 10**logprob within each group (stable for tiny values)."""
    top = np.full(n_groups, -np.inf)
    np.maximum.at(top, groups, logprobs)
    total = np.zeros(n_groups)
    np.add.at(total, groups, 10.0 ** (logprobs - top[groups]))
    return top + np.log10(total)


def restrict_vocabulary(model: ArpaModel, words: set[str],
                        policy: VocabularyPolicy = "drop"
                        ) -> tuple[ArpaModel, VocabularyReport]:
    """Constructively restricts `model` to `words` (plus <s> and </s>) by `policy`.

    Args:
      model: the back-off model; it is not changed.
      words: the words the lexicon pronounces.
      policy: "drop", "unk" or "fail" (see the module docstring).

    Returns:
      (the restricted model, a `VocabularyReport`). With nothing missing, the model is
      returned as it is.

    Raises:
      InputError: policy "fail" and words are missing; policy "unk" and <unk> is not
        among `words`; or an unknown policy.
    """
    if policy not in ("drop", "unk", "fail"):
        raise InputError(f"vocabulary policy '{policy}' is unknown",
                         "use one of 'drop', 'unk', 'fail'", path=model.path)
    keep_always = (SENTENCE_START, SENTENCE_END)
    missing_ids = [i for i, w in enumerate(model.vocab)
                   if w not in words and w not in keep_always]
    if not missing_ids:
        return model, VocabularyReport()
    missing = [model.vocab[i] for i in missing_ids]
    if policy == "fail":
        shown = ", ".join(f"'{w}'" for w in missing[:_SHOWN])
        more = f" and {len(missing) - _SHOWN} more" if len(missing) > _SHOWN else ""
        raise InputError(
            f"{len(missing)} model word{'s' if len(missing) != 1 else ''} "
            f"{'have' if len(missing) != 1 else 'has'} no pronunciation in the lexicon: "
            f"{shown}{more}",
            "add pronunciations for them, or set the grammar's oov_policy to "
            "'drop' or 'unk'", path=model.path, line=_unigram_line(model, missing_ids[0]))
    if policy == "unk" and UNKNOWN not in words:
        raise InputError(
            f"{len(missing)} model words are missing from the lexicon and policy 'unk' "
            f"maps them to {UNKNOWN}, but the lexicon has no {UNKNOWN} pronunciation",
            f"add a pronunciation for {UNKNOWN} (e.g. a noise phone) or use policy 'drop'",
            path=model.path)

    vocab_size = len(model.vocab)
    is_missing = np.zeros(vocab_size + 1, dtype=bool)
    is_missing[missing_ids] = True
    vocab = list(model.vocab)
    unk_id = -1
    if policy == "unk":
        index = model.word_index()
        unk_id = index.get(UNKNOWN, vocab_size)
        if unk_id == vocab_size:
            vocab.append(UNKNOWN)
    kept = ~is_missing[:len(vocab)]
    remap = np.full(len(vocab), -1, dtype=np.int64)
    remap[kept] = np.arange(int(kept.sum()))
    new_vocab = [w for w, k in zip(vocab, kept) if k]

    orders = []
    removed_mass = 0.0
    for table in model.orders:
        w = table.words
        if policy == "drop":
            keep = ~is_missing[w].any(axis=1)
            if table.order == 1:
                removed_mass = float(np.sum(10.0 ** table.logprob[~keep]))
            orders.append(_subset(table, np.flatnonzero(keep), remap))
            continue
        in_history = is_missing[w[:, :-1]].any(axis=1)
        last = w[:, -1]
        mapped = is_missing[last] & ~in_history
        plain = ~is_missing[last] & ~in_history
        # Rows that end in <unk> after mapping: the mapped ones and any original <unk>.
        to_unk = mapped | (plain & (last == unk_id))
        keep_plain = np.flatnonzero(plain & ~to_unk)
        merge = np.flatnonzero(to_unk)
        rows = w[merge].copy()
        rows[:, -1] = unk_id
        if table.order > 1:
            ctx = rows[:, :-1].astype(np.int64)
            key = np.zeros(merge.size, dtype=np.int64)
            for j in range(ctx.shape[1]):
                key = key * (vocab_size + 1) + ctx[:, j]
            _, first, groups = np.unique(key, return_index=True, return_inverse=True)
            groups = groups.ravel()
        else:
            first = np.zeros(min(merge.size, 1), dtype=np.int64)
            groups = np.zeros(merge.size, dtype=np.int64)
        n_groups = first.size
        logprob = _log10_sum(table.logprob[merge], groups, n_groups)
        # The back-off weight of the original <unk> n-gram of each context survives.
        backoff = np.zeros(n_groups)
        original = last[merge] == unk_id
        backoff[groups[original]] = table.backoff[merge][original]
        line = np.full(n_groups, np.iinfo(np.int64).max, dtype=np.int64)
        np.minimum.at(line, groups, table.lines[merge])
        merged_rows = rows[first]
        words_out = np.concatenate([w[keep_plain], merged_rows]).astype(np.int64)
        lines_out = np.concatenate([table.lines[keep_plain], line])
        order = np.argsort(lines_out, kind="stable")  # back into file order
        orders.append(NgramTable(
            table.order, remap[words_out[order]].astype(np.int32),
            np.concatenate([table.logprob[keep_plain], logprob])[order],
            np.concatenate([table.backoff[keep_plain], backoff])[order],
            lines_out[order]))
    restricted = ArpaModel(new_vocab, orders, model.path)
    if policy == "drop":
        return restricted, VocabularyReport(dropped=missing,
                                            removed_unigram_mass=removed_mass)
    return restricted, VocabularyReport(mapped_to_unk=missing)
