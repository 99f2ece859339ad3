"""Disambiguation markers for the lexicon transducer.

- `MarkerUse`: one pronunciation that gets a marker, and why.
- `assign_markers(prons, optional_silence=None)`: chooses the markers.
- `prefix_set(sequences)`: the sequences that are a proper prefix of another.
- `homophone_groups(markers)`: the homophone groups, as reported by the markers.

A pronunciation gets a marker when its phone sequence belongs to several words (a
homophone: each member of the group gets a distinct marker) or is a proper prefix
of another pronunciation of any word. Markers are reused across groups: the k-th
member of a homophone group (file order) gets marker k, a prefix that is no
homophone gets marker 1, so the number of distinct markers is the size of the
largest homophone group (1 if only prefixes occur). After markers are appended the
pronunciations form a prefix-free code, so the closure of the lexicon transducer
is functional with bounded output delay and determinizes.

When optional silence is inserted, a pronunciation made of the optional-silence
phone alone would read like the inserted silence; it gets a marker too (reason
"silence"), counting the inserted silence as the unmarked member of its group.

References:
  Mohri, Pereira & Riley (2002). Weighted finite-state transducers in speech
  recognition. Computer Speech & Language 16(1):69-88, section 4.1 (auxiliary
  symbols). DOI 10.1006/csla.2001.0184 (DOI from memory).
"""

from __future__ import annotations

import dataclasses
from collections.abc import Iterable, Sequence

HOMOPHONE = "homophone"
PREFIX = "prefix"
SILENCE = "silence"


@dataclasses.dataclass(frozen=True, slots=True)
class MarkerUse:
    """A pronunciation that gets marker `marker` (1-based, spelled !amb{marker}).

    `reason` is "homophone", "prefix", "homophone+prefix" or "silence".
    """

    word: str
    phones: tuple[str, ...]
    marker: int
    reason: str


def prefix_set(sequences: Iterable[tuple[str, ...]]) -> set[tuple[str, ...]]:
    """Returns the sequences that are a proper prefix of another one.

    In lexicographic order a proper prefix x of some y is immediately followed by a
    sequence starting with x (anything between x and y starts with x), so one sort
    and one pass over neighbours suffice.
    """
    # Joined with a separator no phone contains, string prefixes are phone prefixes.
    joined = {"\x1f".join(s) + "\x1f": s for s in sequences}
    ordered = sorted(joined)
    out = set()
    for x, z in zip(ordered, ordered[1:]):
        if z.startswith(x):
            out.add(joined[x])
    return out


def assign_markers(prons: Sequence[tuple[str, tuple[str, ...]]],
                   optional_silence: str | None = None) -> tuple[list[int], list[MarkerUse]]:
    """Chooses the marker of each (word, phones) pair.

    Args:
      prons: distinct (word, phones) pairs in file order; phones non-empty.
      optional_silence: the phone inserted between words, or None when no silence
        is inserted.

    Returns:
      The marker number of each pair (0 = none), and a `MarkerUse` for every pair
      with a marker, in input order.
    """
    groups: dict[tuple[str, ...], list[int]] = {}
    for i, (_, phones) in enumerate(prons):
        groups.setdefault(phones, []).append(i)
    prefixes = prefix_set(groups)
    marks = [0] * len(prons)
    reasons: dict[int, str] = {}
    for phones, members in groups.items():
        homophone = len(members) > 1
        prefix = phones in prefixes
        silent = optional_silence is not None and phones == (optional_silence,)
        if not (homophone or prefix or silent):
            continue
        why = "+".join(r for r, on in ((HOMOPHONE, homophone), (PREFIX, prefix)) if on)
        for k, i in enumerate(members, start=1):
            marks[i] = k
            reasons[i] = why or SILENCE
    uses = [MarkerUse(prons[i][0], prons[i][1], marks[i], reasons[i]) for i in sorted(reasons)]
    return marks, uses


def homophone_groups(markers: Sequence[MarkerUse]) -> dict[tuple[str, ...], list[str]]:
    """Returns phones -> words (marker order) for every homophone group in `markers`."""
    groups: dict[tuple[str, ...], list[tuple[int, str]]] = {}
    for m in markers:
        if HOMOPHONE in m.reason.split("+"):
            groups.setdefault(m.phones, []).append((m.marker, m.word))
    return {ph: [w for _, w in sorted(ws)] for ph, ws in groups.items()}
