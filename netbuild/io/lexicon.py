"""Pronunciation lexicons.

- `Pronunciation`, `Lexicon`: the records.
- `read_lexicon(path, inventory, options, diagnostics=None)`: validating reader for
  the plain layout and the CMU pronouncing dictionary layout.
"""

from __future__ import annotations

import dataclasses


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
