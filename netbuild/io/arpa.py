"""ARPA back-off language models: the in-memory model and its reader/writer.

- `NgramTable`: the n-grams of one order as numpy arrays.
- `ArpaModel`: vocabulary plus one `NgramTable` per order.
- `read_arpa(path, diagnostics=None)`: streamed, validating reader (plain or gzip).
- `write_arpa(model, path)`: writes the ARPA text form.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from ..errors import Diagnostics


@dataclasses.dataclass
class NgramTable:
    """The n-grams of one order.

    `words[i]` holds the word ids (into `ArpaModel.vocab`) of n-gram i, oldest first;
    `logprob` and `backoff` are log10 values as written in the file (backoff 0.0 where
    the file gives none); `lines` are 1-based source line numbers (0 when not from a file).
    Rows are in file order.
    """

    order: int
    words: np.ndarray  # (count, order) int32
    logprob: np.ndarray  # (count,) float64, log10
    backoff: np.ndarray  # (count,) float64, log10
    lines: np.ndarray  # (count,) int64

    def __len__(self) -> int:
        return int(self.words.shape[0])


@dataclasses.dataclass
class ArpaModel:
    """A back-off n-gram model. `orders[k]` holds the (k+1)-grams; `vocab[i]` is word id i."""

    vocab: list[str]
    orders: list[NgramTable]
    path: str = "<memory>"

    @property
    def max_order(self) -> int:
        return len(self.orders)

    def counts(self) -> list[int]:
        return [len(t) for t in self.orders]

    def word_index(self) -> dict[str, int]:
        return {w: i for i, w in enumerate(self.vocab)}
