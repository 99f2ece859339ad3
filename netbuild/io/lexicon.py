"""Pronunciation lexicons.

- `Pronunciation`, `Lexicon`: the records.
- `read_lexicon(path, inventory, options, diagnostics=None)`: validating reader for
  the plain layout and the CMU pronouncing dictionary layout.
- `parse_lexicon(lines, path, inventory, options, diagnostics)`: the same over
  already-decoded (line number, text) pairs.
- `write_lexicon(lexicon, path, with_probabilities=False)`: writes the plain layout.

Plain layout (``options.layout == "plain"``):

- UTF-8 text, one pronunciation per line: the word, then its phones, separated by
  whitespace (spaces or tabs). A word may have many lines, one per pronunciation.
- When the project declares ``has_probabilities`` the second field is the
  pronunciation probability, a number in (0, 1]; otherwise every probability is 1.
  The reader never guesses whether a number is a probability.
- Blank lines and lines whose first non-blank character is ``#`` are ignored
  (so a word cannot start with ``#``).

CMU dictionary layout (``options.layout == "cmudict"``), as in the CMU Pronouncing
Dictionary:

- lines starting with ``;;;`` are comments; text from a ``#`` that follows
  whitespace to the end of the line is a comment (the packaged dictionary notes
  word origins this way);
- an alternate-pronunciation suffix ``WORD(2)``, ``WORD(3)``... is removed, so the
  pronunciation belongs to ``WORD``;
- words are lower-cased (``str.lower``);
- the stress digit ``0``/``1``/``2`` ending a vowel (``AH0``) is kept when
  ``options.keep_stress`` is set, else removed (``AH``);
- the probability field is read as in the plain layout when declared.

Errors, each located ``path:line`` with a fix: an unknown phone (the nearest phone of
the inventory is suggested; with no inventory phones are not checked), a word with no
phones, a probability that is not a number or lies outside (0, 1], a word spelled
like a reserved symbol (``<epsilon>``, ``<s>``, ``</s>``, or starting with ``!``), and
bytes that are not valid UTF-8 (with their byte offset). An exact duplicate line
(same word, phones and probability) gives a warning and is kept once; the same word
and phones with another probability gives a warning and both are kept (the lexicon
builder uses the larger probability).
"""

from __future__ import annotations

import dataclasses
import math
import os
import re
from collections.abc import Iterable

from ..errors import Diagnostics, LexiconError
from ..options import LexiconOptions
from ..symbols import is_reserved_word
from .phones import PhoneInventory, decode_lines, read_bytes, suggestion

_ALTERNATE_RE = re.compile(r"\(\d+\)$")
_STRESS_RE = re.compile(r"^([A-Za-z]+)[012]$")
_COMMENT_RE = re.compile(r"\s#")


@dataclasses.dataclass(frozen=True)
class Pronunciation:
    word: str
    phones: tuple[str, ...]
    probability: float = 1.0  # in (0, 1]
    line: int = 0  # 1-based source line (0 when not from a file)


@dataclasses.dataclass
class Lexicon:
    entries: list[Pronunciation]  # file order, exact duplicates removed
    path: str = "<memory>"

    def words(self) -> list[str]:
        """Distinct words in first-appearance order."""
        return list(dict.fromkeys(e.word for e in self.entries))

    def phones(self) -> list[str]:
        """Distinct phones in first-appearance order."""
        return list(dict.fromkeys(p for e in self.entries for p in e.phones))


def read_lexicon(path: str | os.PathLike, inventory: PhoneInventory | None,
                 options: LexiconOptions = LexiconOptions(),
                 diagnostics: Diagnostics | None = None) -> Lexicon:
    """Reads a lexicon file in the layout `options.layout` (see the module docstring).

    Args:
      path: the lexicon file.
      inventory: the phones allowed; None skips the phone check.
      options: layout, probability field and stress handling.
      diagnostics: collects every problem (warnings included); when None a private
        one is used. Either way all errors of the file are raised together at the end.

    Returns:
      The lexicon, entries in file order with exact duplicates removed.

    Raises:
      LexiconError: listing every located problem of the file.
    """
    diag = diagnostics if diagnostics is not None else Diagnostics()
    where = str(path)
    data = read_bytes(path, diag)
    if data is None:
        diag.raise_if_errors(LexiconError, where)
    lines = decode_lines(data or b"", where, diag)
    return parse_lexicon(lines, where, inventory, options, diag)


def parse_lexicon(lines: Iterable[tuple[int, str]], path: str,
                  inventory: PhoneInventory | None, options: LexiconOptions,
                  diagnostics: Diagnostics) -> Lexicon:
    """Parses decoded (line number, text) pairs; see `read_lexicon`.

    Raises:
      LexiconError: listing every located error recorded for `path`.
    """
    diag = diagnostics
    cmu = options.layout == "cmudict"
    if options.layout not in ("plain", "cmudict"):
        diag.error(path, None, f"unknown lexicon layout '{options.layout}'",
                   "use 'plain' or 'cmudict'")
        diag.raise_if_errors(LexiconError, path)
    known = set(inventory.phones) if inventory is not None else None
    hints: dict[str, str] = {}
    entries: list[Pronunciation] = []
    seen: dict[tuple, int] = {}  # (word, phones, probability) -> first line
    seen_pron: dict[tuple, tuple[int, float]] = {}  # (word, phones) -> (line, probability)
    for number, text in lines:
        if cmu:
            if text.startswith(";;;"):
                continue
            if "#" in text:
                text = _COMMENT_RE.split(text, maxsplit=1)[0]
        fields = text.split()
        if not fields or (not cmu and fields[0].startswith("#")):
            continue
        word = fields[0]
        if cmu:
            word = _ALTERNATE_RE.sub("", word).lower()
        if is_reserved_word(word):
            diag.error(path, number, f"word '{word}' is spelled like a reserved symbol",
                       "rename the word (<epsilon>, <s>, </s> and names starting with '!' "
                       "are reserved)")
            continue
        rest = fields[1:]
        probability = 1.0
        if options.has_probabilities:
            if not rest:
                diag.error(path, number, f"word '{word}' has no probability and no phones",
                           "write the probability, then the phones, after the word")
                continue
            try:
                probability = float(rest[0])
            except ValueError:
                diag.error(path, number,
                           f"probability '{rest[0]}' of word '{word}' is not a number",
                           "write a number in (0, 1] after the word, or turn the "
                           "probability field off in the project")
                continue
            if not (0.0 < probability <= 1.0):  # also rejects nan
                diag.error(path, number,
                           f"probability {rest[0]} of word '{word}' is outside (0, 1]",
                           "use a probability greater than 0 and at most 1")
                continue
            rest = rest[1:]
        if not rest:
            diag.error(path, number, f"word '{word}' has no phones",
                       "add its pronunciation after the word")
            continue
        if cmu and not options.keep_stress:
            rest = [_STRESS_RE.sub(r"\1", p) for p in rest]
        phones = tuple(rest)
        if known is not None:
            bad = False
            for p in phones:
                if p not in known:
                    if p not in hints:
                        hints[p] = suggestion(p, inventory.phones)
                    diag.error(path, number, f"unknown phone '{p}' in the pronunciation of '{word}'",
                               f"{hints[p]}add it to the phone inventory ({inventory.path}) "
                               "or fix the spelling")
                    bad = True
            if bad:
                continue
        key = (word, phones, probability)
        if key in seen:
            diag.warning(path, number, f"line repeats line {seen[key]} (word '{word}')",
                         "remove the repeat; it is kept once")
            continue
        seen[key] = number
        pkey = (word, phones)
        if pkey in seen_pron:
            first_line, first_p = seen_pron[pkey]
            diag.warning(path, number,
                         f"word '{word}' has this pronunciation on line {first_line} "
                         f"with probability {first_p:g}",
                         "keep one line; the larger probability is used")
        else:
            seen_pron[pkey] = (number, probability)
        entries.append(Pronunciation(word, phones, probability, number))
    diag.raise_if_errors(LexiconError, path)
    return Lexicon(entries, path)


def format_probability(p: float) -> str:
    """Returns the shortest text that reads back as exactly `p`."""
    text = repr(float(p))
    return text if math.isfinite(p) else "nan"


def write_lexicon(lexicon: Lexicon, path: str | os.PathLike,
                  with_probabilities: bool = False) -> None:
    """Writes `lexicon` in the plain layout (UTF-8, word, [probability], phones)."""
    with open(path, "w", encoding="utf-8", newline="\n") as f:
        for e in lexicon.entries:
            fields = [e.word]
            if with_probabilities:
                fields.append(format_probability(e.probability))
            fields.extend(e.phones)
            f.write(" ".join(fields) + "\n")
