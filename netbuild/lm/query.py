"""netbuild's own scorer of ARPA back-off models (dictionary look-ups, for diagnostics).

- `BackoffScorer(model)`: `logprob10(history, word)` and `sentence_logprob10(words)`.

The back-off rule (reference: Katz 1987, "Estimation of probabilities from sparse
data for the language model component of a speech recognizer", IEEE Trans. ASSP
35(3):400-401, doi:10.1109/TASSP.1987.1165125; as stored in ARPA files):
``P(w | h) = P*(w | h)`` if the n-gram ``h w`` is listed, otherwise
``bo(h) * P(w | h')`` with ``h'`` = ``h`` without its oldest word and ``bo(h) = 1``
when ``h`` is not listed. All values are log10, so the products are sums.
"""

from __future__ import annotations

from collections.abc import Sequence

from ..errors import SymbolError
from ..io.arpa import ArpaModel
from ..symbols import SENTENCE_END, SENTENCE_START, UNKNOWN


class BackoffScorer:
    """Scores words and sentences with an `ArpaModel` by the ARPA back-off rule.

    Out-of-vocabulary words (in the word position or in the history) are scored as
    ``<unk>`` when the model lists ``<unk>``; otherwise `logprob10` raises
    `SymbolError` for an unknown predicted word, and an unknown history word simply
    cuts the history (no listed n-gram can contain it).
    """

    def __init__(self, model: ArpaModel) -> None:
        self.model = model
        self.order = model.max_order
        self._index = model.word_index()
        self._unk = self._index.get(UNKNOWN)
        self._prob: dict[tuple[int, ...], float] = {}
        self._backoff: dict[tuple[int, ...], float] = {}
        for t in model.orders:
            keys = [tuple(r) for r in t.words.tolist()]
            self._prob.update(zip(keys, t.logprob.tolist()))
            self._backoff.update(zip(keys, t.backoff.tolist()))

    def _ids(self, words: Sequence[str], what: str) -> list[int | None]:
        get = self._index.get
        out = []
        for w in words:
            i = get(w)
            out.append(self._unk if i is None else i)
        return out

    def logprob10(self, history: Sequence[str], word: str) -> float:
        """Returns log10 P(word | history); `history` is oldest first.

        Raises:
          SymbolError: `word` is not in the model and the model has no ``<unk>``.
        """
        (wid,) = self._ids([word], "word")
        if wid is None:
            raise SymbolError(f"word '{word}' is not in the language model, which has no "
                              f"{UNKNOWN}", f"add '{word}' or {UNKNOWN} to the model",
                              path=self.model.path)
        keep = self.order - 1
        hist = self._ids(list(history)[max(len(history) - keep, 0):] if keep else [],
                         "history")
        if None in hist:  # an unknown history word: nothing before it can match
            hist = hist[len(hist) - hist[::-1].index(None):]
        return self._score(tuple(hist), wid)  # type: ignore[arg-type]

    def _score(self, hist: tuple[int, ...], wid: int) -> float:
        total = 0.0
        prob, backoff = self._prob, self._backoff
        while True:
            p = prob.get(hist + (wid,))
            if p is not None:
                return total + p
            if not hist:
                # a word without a 1-gram (only <unk> stand-ins reach here): zero probability
                return total - 99.0
            total += backoff.get(hist, 0.0)
            hist = hist[1:]

    def sentence_logprob10(self, words: Sequence[str], bos: bool = True,
                           eos: bool = True) -> float:
        """Returns log10 P(words [</s>] | [<s>]), summing `logprob10` word by word."""
        history: list[str] = [SENTENCE_START] if bos else []
        total = 0.0
        for w in list(words) + ([SENTENCE_END] if eos else []):
            total += self.logprob10(history, w)
            history.append(w)
        return total
