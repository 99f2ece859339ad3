"""Reserved symbols and symbol-table helpers.

- `EPSILON`, `SENTENCE_START`, `SENTENCE_END`, `UNKNOWN`: reserved words.
- `BACKOFF`: the auxiliary marker on G's back-off arcs.
- `disambiguation_marker(k)`, `is_auxiliary(symbol)`: the lexicon's auxiliary markers.
- `make_symbol_table(name, symbols)`: epsilon at 0, then `symbols` in order.
- `is_reserved_word(word)`: words a lexicon may not define.

Spelling: netbuild's own. Auxiliary markers start with "!" (never a phone or a
word, see `is_reserved_word`); epsilon is spelled as pynini spells it.
"""

from __future__ import annotations

import re
from collections.abc import Iterable

import pynini

EPSILON = "<epsilon>"
SENTENCE_START = "<s>"  # ARPA format's sentence markers
SENTENCE_END = "</s>"
UNKNOWN = "<unk>"  # ARPA format's unknown-word token
BACKOFF = "!backoff"
_DISAMBIG_PREFIX = "!amb"
_AUX_RE = re.compile(r"^!(backoff|amb[0-9]+)$")


def disambiguation_marker(k: int) -> str:
    """Returns the spelling of the k-th (1-based) disambiguation marker, e.g. '!amb1'."""
    if k < 1:
        raise ValueError("disambiguation markers are numbered from 1")
    return f"{_DISAMBIG_PREFIX}{k}"


def is_auxiliary(symbol: str) -> bool:
    """True for the back-off marker and every disambiguation marker."""
    return bool(_AUX_RE.match(symbol))


def is_reserved_word(word: str) -> bool:
    """True for symbols a lexicon may not define as words (<unk> is allowed)."""
    return word in (EPSILON, SENTENCE_START, SENTENCE_END) or word.startswith("!")


def make_symbol_table(name: str, symbols: Iterable[str]) -> pynini.SymbolTable:
    """Returns a new table: EPSILON at 0, then `symbols` in order (duplicates ignored)."""
    table = pynini.SymbolTable(name)
    table.add_symbol(EPSILON, 0)
    for s in symbols:
        if table.find(s) == pynini.NO_SYMBOL:
            table.add_symbol(s)
    return table
