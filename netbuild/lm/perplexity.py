"""Perplexity of a back-off model on held-out sentences.

- `PerplexityResult`: totals of one evaluation.
- `perplexity(model, sentences, oov="auto")`: scores sentences with
  `netbuild.lm.query.BackoffScorer` and returns a `PerplexityResult`.

Convention. Each sentence is scored as ``<s> w_1 ... w_n </s>``: the words and the
closing ``</s>`` are predicted (``<s>`` only starts the history), so a sentence of n
words contributes n + 1 events. With ``L`` the total log10 probability and ``N``
the number of events counted, the perplexity is ``10 ** (-L / N)`` -- for one sentence
without unknown words this is what the kenlm Python module's ``Model.perplexity``
returns (its score includes ``</s>`` and it divides by the word count plus one).

Words the model does not know (OOV):

- ``"unk"``: scored as ``<unk>`` and counted, as kenlm does (it needs ``<unk>`` in the
  model here; kenlm itself falls back to a fixed log10 of -100 without one).
- ``"skip"``: not scored and not counted in N; the history is cut after them, so the
  next word is predicted from the words after the unknown one only (the same as
  kenlm's state after an unknown word in a model without ``<unk>`` n-grams, and the
  sum of kenlm's ``full_scores`` over the known words).
- ``"auto"`` (default): ``"unk"`` when the model lists ``<unk>``, else ``"skip"``.

The number of skipped words is reported in `PerplexityResult.oov`.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Iterable, Sequence
from typing import Literal

from ..errors import ProjectError
from ..io.arpa import ArpaModel
from ..symbols import SENTENCE_END, SENTENCE_START, UNKNOWN
from .query import BackoffScorer

__all__ = ["OovPolicy", "PerplexityResult", "perplexity"]

OovPolicy = Literal["auto", "unk", "skip"]
_POLICIES = ("auto", "unk", "skip")


@dataclasses.dataclass(frozen=True)
class PerplexityResult:
    """`logprob10`: total log10 probability; `events`: words + one </s> per sentence
    counted; `oov`: unknown words (skipped, or scored as <unk> under "unk");
    `policy`: the OOV policy applied ("unk" or "skip")."""

    logprob10: float
    events: int
    sentences: int
    oov: int
    policy: str

    @property
    def perplexity(self) -> float:
        """``10 ** (-logprob10 / events)``; infinity with no events."""
        if self.events == 0:
            return math.inf
        return 10.0 ** (-self.logprob10 / self.events)

    @property
    def cross_entropy_bits(self) -> float:
        """Average bits per event, ``-logprob10 / events * log2(10)``."""
        if self.events == 0:
            return math.inf
        return -self.logprob10 / self.events * math.log2(10.0)


def perplexity(model: ArpaModel | BackoffScorer, sentences: Iterable[Sequence[str]],
               oov: OovPolicy = "auto") -> PerplexityResult:
    """Returns the perplexity of `model` on `sentences` (see the module docstring).

    Args:
      model: the model, or a `BackoffScorer` of it (reused across calls).
      sentences: tokenised sentences without ``<s>``/``</s>``.
      oov: "auto", "unk" or "skip".

    Raises:
      ProjectError: unknown `oov`, or "unk" with a model that has no ``<unk>``.
    """
    if oov not in _POLICIES:
        raise ProjectError(f"unknown OOV policy '{oov}'", f"use one of: {', '.join(_POLICIES)}")
    scorer = model if isinstance(model, BackoffScorer) else BackoffScorer(model)
    known = scorer.model.word_index()
    has_unk = UNKNOWN in known
    policy = ("unk" if has_unk else "skip") if oov == "auto" else oov
    if policy == "unk" and not has_unk:
        raise ProjectError(f"the language model has no {UNKNOWN}, so unknown words cannot "
                           "be scored as it", "use the OOV policy 'skip' or 'auto'")
    total = 0.0
    events = 0
    n_sent = 0
    n_oov = 0
    for sent in sentences:
        n_sent += 1
        history: list[str] = [SENTENCE_START]
        for w in [*sent, SENTENCE_END]:
            if w not in known:
                n_oov += 1
                if policy == "skip":
                    history = []  # an unknown word: nothing before it is kept
                    continue
                w = UNKNOWN
            total += scorer.logprob10(history, w)
            events += 1
            history.append(w)
    return PerplexityResult(total, events, n_sent, n_oov, policy)
