"""The lexicon transducer L: phones (and auxiliary markers) in, words out.

- `LexiconResult`: L, its phone table, the markers used and the words left out.
- `build_lexicon(lexicon, inventory, word_symbols, options, disambiguate=True)`:
  the closure over words with optional silence, for composition with G.
- `build_single_word_lexicon(lexicon, inventory, word_symbols, options,
  disambiguate=True)`: one word, no closure, no silence (for tests and inspection).
- `make_phone_symbols(inventory, num_markers)`: the phone table layout.

Shape of L (tropical weights, costs are negative natural logs):

- state 0 is the word-boundary state ``B``; it is final with weight 0 and carries a
  ``!backoff:!backoff`` self-loop so that L∘G keeps G's back-off arcs;
- each pronunciation is its own chain of arcs leaving ``B``: the first arc reads
  the first phone and writes the word, weighted with the pronunciation cost
  ``-ln p`` (or ``-ln(p / max p)`` of the word when `rescale_probabilities`); the
  others read the remaining phones (then the marker, if any) and write epsilon;
- optional silence, with probability ``s = options.silence_probability`` and the
  inventory's optional-silence phone ``sil``: the last arc of each chain exists
  twice, once back to ``B`` with extra cost ``-ln(1 - s)`` (no silence after the
  word) and once to a state ``S`` with extra cost ``-ln s``; ``S`` has the single
  arc ``sil:<epsilon>`` to ``B``. The start state ``I`` has ``<epsilon>:<epsilon>``
  to ``B`` with cost ``-ln(1 - s)`` and ``sil:<epsilon>`` to ``B`` with cost
  ``-ln s`` (silence at the utterance start). Silence after the last word is the
  ``S`` branch of that word, so every boundary (start, between words, end) has
  silence with probability ``s``. The only epsilon-input arc leaves ``I``, so L has
  no epsilon cycle. With ``s == 0`` or no silence phone, ``B`` is the start state
  and no silence is inserted; with ``s == 1`` the no-silence branches are left out.

L is built in bulk: numpy arrays of arcs are laid out in OpenFst's binary vector
format and read back in one call, then arc-sorted on output labels (composition
with G). Symbol tables are attached (input: phones, output: words).
"""

from __future__ import annotations

import dataclasses
import itertools
import math

import numpy as np
import pynini

from ..errors import LexiconError, Problem, ProjectError, SymbolError
from ..io.fstfile import arrays_to_fst
from ..io.lexicon import Lexicon
from ..io.phones import PhoneInventory, suggestion
from ..options import LexiconOptions
from ..symbols import BACKOFF, disambiguation_marker, make_symbol_table
from .disambiguation import MarkerUse, assign_markers, homophone_groups



@dataclasses.dataclass(frozen=True)
class Pronunciations:
    """The label strings L spells, as flat arrays (for building det(L∘G) directly).

    Pronunciation i reads `labels[offsets[i]:offsets[i] + lengths[i]]` (its phones, then
    its marker if it has one), writes word `words[i]` and costs `costs[i]`. `silence`
    is the optional-silence phone label (None: no optional silence), inserted with
    probability `silence_probability`; `backoff_label` is the input label of the
    back-off pass-through. `closure` is False for the single-word lexicon.
    """

    labels: np.ndarray  # int32, all strings one after the other
    lengths: np.ndarray  # int64 per pronunciation
    words: np.ndarray  # int32 word id per pronunciation
    costs: np.ndarray  # float64 -ln p per pronunciation
    silence: int | None
    silence_probability: float
    backoff_label: int
    closure: bool

    @property
    def offsets(self) -> np.ndarray:
        return np.cumsum(self.lengths) - self.lengths


@dataclasses.dataclass
class LexiconResult:
    """The lexicon transducer and what went into it.

    `markers` lists every pronunciation given a marker; `skipped_words` the lexicon
    words (first-appearance order) missing from the word table, left out of L;
    `pronunciations` the strings L spells as arrays (None for an L made elsewhere).
    """

    fst: pynini.Fst
    phone_symbols: pynini.SymbolTable
    markers: list[MarkerUse]
    skipped_words: list[str]
    pronunciations: Pronunciations | None = None

    @property
    def num_markers(self) -> int:
        """The number of distinct disambiguation markers (!amb1..!ambK) used."""
        return max((m.marker for m in self.markers), default=0)

    def homophone_groups(self) -> dict[tuple[str, ...], list[str]]:
        """Phones -> words for every pronunciation shared by several words."""
        return homophone_groups(self.markers)


def make_phone_symbols(inventory: PhoneInventory, num_markers: int) -> pynini.SymbolTable:
    """Returns the phone table: epsilon 0, the inventory phones, !backoff, !amb1..!ambK.

    Raises:
      SymbolError: if an inventory phone is spelled like a reserved symbol or repeats.
    """
    from ..io.phones import reserved_phone_problem

    seen: set[str] = set()
    for p in inventory.phones:
        problem = reserved_phone_problem(p) or (f"phone '{p}' is listed twice" if p in seen
                                                else None)
        if problem:
            line = inventory.lines.get(p)
            raise SymbolError(problem, "rename or remove the phone in the inventory",
                              path=inventory.path, line=line)
        seen.add(p)
    markers = [disambiguation_marker(k) for k in range(1, num_markers + 1)]
    return make_symbol_table("phones", [*inventory.phones, BACKOFF, *markers])


def build_lexicon(lexicon: Lexicon, inventory: PhoneInventory | None,
                  word_symbols: pynini.SymbolTable,
                  options: LexiconOptions = LexiconOptions(),
                  disambiguate: bool = True) -> LexiconResult:
    """Builds the lexicon transducer L (closure over words with optional silence).

    Constructively builds a new FST; see the module docstring for its exact shape.
    Only pronunciations of words in `word_symbols` are compiled. A (word, phones)
    pair listed more than once is compiled once with its largest probability.

    Args:
      lexicon: the pronunciations.
      inventory: the phone inventory; its first silence phone is the optional
        silence. None uses the lexicon's own phones and inserts no silence.
      word_symbols: the word table (epsilon 0, words, !backoff last).
      options: pronunciation-cost rescaling and silence probability.
      disambiguate: append markers to homophones and prefix pronunciations. Without
        them L∘G is generally not determinizable (kept for tests and inspection).

    Returns:
      A `LexiconResult`; `fst` is arc-sorted on output labels.

    Raises:
      LexiconError: a pronunciation uses a phone missing from `inventory`.
      ProjectError: `options.silence_probability` is outside [0, 1].
    """
    return _build(lexicon, inventory, word_symbols, options, disambiguate, closure=True)


def build_single_word_lexicon(lexicon: Lexicon, inventory: PhoneInventory | None,
                              word_symbols: pynini.SymbolTable,
                              options: LexiconOptions = LexiconOptions(),
                              disambiguate: bool = True) -> LexiconResult:
    """Builds the single-word lexicon transducer: each pronunciation once, no closure.

    Constructively builds a new FST: start state 0, one final state 1, one arc chain
    per pronunciation (word and cost on the first arc, marker last); no silence and
    no back-off self-loop. Arguments as in `build_lexicon`.
    """
    return _build(lexicon, inventory, word_symbols, options, disambiguate, closure=False)


def _check_silence_probability(p: float) -> None:
    if not (0.0 <= p <= 1.0):  # also rejects nan
        raise ProjectError(f"silence probability {p} is outside [0, 1]",
                           "set the lexicon's silence probability between 0 and 1 "
                           "(0 turns optional silence off)", path="<options>")


def _build(lexicon: Lexicon, inventory: PhoneInventory | None,
           word_symbols: pynini.SymbolTable, options: LexiconOptions,
           disambiguate: bool, closure: bool) -> LexiconResult:
    _check_silence_probability(options.silence_probability)
    if inventory is None:
        from ..io.phones import inventory_from_lexicon

        inventory = inventory_from_lexicon(lexicon)
    phone_index = {p: i for i, p in enumerate(inventory.phones, start=1)}
    backoff_word = word_symbols.find(BACKOFF)
    if closure and backoff_word == pynini.NO_SYMBOL:
        raise SymbolError(f"the word table has no '{BACKOFF}' symbol",
                          "build the word table with the back-off marker last",
                          path="<word table>")

    # Keep words of the table; merge repeated (word, phones) pairs on the larger p.
    best: dict[tuple[str, tuple[str, ...]], float] = {}
    skipped: dict[str, None] = {}
    problems: list[Problem] = []
    word_ids: dict[str, int] = {}
    for e in lexicon.entries:
        wid = word_ids.get(e.word)
        if wid is None:
            wid = word_symbols.find(e.word)
            word_ids[e.word] = wid
        if wid == pynini.NO_SYMBOL or e.word == BACKOFF:
            skipped[e.word] = None
            continue
        for p in e.phones:
            if p not in phone_index:
                problems.append(Problem(
                    lexicon.path, e.line or None,
                    f"unknown phone '{p}' in the pronunciation of '{e.word}'",
                    f"{suggestion(p, inventory.phones)}add it to the phone inventory "
                    f"({inventory.path}) or fix the spelling"))
        key = (e.word, e.phones)
        if key not in best or e.probability > best[key]:
            best[key] = e.probability
    if problems:
        raise LexiconError.from_problems(problems)
    prons = list(best)

    silence = inventory.optional_silence if closure else None
    s = options.silence_probability
    if silence is None or s == 0.0:
        silence = None
    if disambiguate:
        marks, markers = assign_markers(prons, silence)
    else:
        marks, markers = [0] * len(prons), []
    num_markers = max(marks, default=0)
    phone_symbols = make_phone_symbols(inventory, num_markers)
    backoff_id = len(inventory.phones) + 1
    marker_base = backoff_id  # !amb{k} has id backoff_id + k

    # Pronunciation costs, -ln p or -ln(p / max p of the word).
    probs = np.fromiter((best[k] for k in prons), dtype=np.float64, count=len(prons))
    if options.rescale_probabilities and prons:
        top: dict[str, float] = {}
        for (w, _), p in zip(prons, probs):
            if p > top.get(w, 0.0):
                top[w] = p
        probs = probs / np.fromiter((top[w] for w, _ in prons), dtype=np.float64,
                                    count=len(prons))
    costs = -np.log(probs)
    costs[costs == 0.0] = 0.0  # no -0.0

    # Flat label sequences: phones, then the marker (if any).
    n_phones = np.fromiter((len(ph) for _, ph in prons), dtype=np.int64, count=len(prons))
    phone_ids = np.fromiter(map(phone_index.__getitem__,
                                itertools.chain.from_iterable(ph for _, ph in prons)),
                            dtype=np.int32, count=int(n_phones.sum()))
    mark = np.asarray(marks, dtype=np.int32)
    has_mark = mark > 0
    lengths = n_phones + has_mark
    flat = np.empty(int(lengths.sum()), dtype=np.int32)
    ends = np.cumsum(lengths)  # one past each pronunciation's last label
    is_marker = np.zeros(len(flat), dtype=bool)
    is_marker[ends[has_mark] - 1] = True
    flat[is_marker] = marker_base + mark[has_mark]
    flat[~is_marker] = phone_ids
    words = np.fromiter((word_ids[w] for w, _ in prons), dtype=np.int32, count=len(prons))

    src, ilab, olab, wt, dst, finals, start = _arcs(
        flat, lengths, words, costs, closure, silence and phone_index[silence], s, backoff_id, backoff_word)
    fst = arrays_to_fst(len(finals), start, finals, src, ilab, olab, wt, dst)
    fst.set_input_symbols(phone_symbols)
    fst.set_output_symbols(word_symbols)
    fst.arcsort("olabel")
    spelled = Pronunciations(flat, lengths.astype(np.int64), words, costs,
                             phone_index[silence] if silence else None, s, backoff_id,
                             closure)
    return LexiconResult(fst, phone_symbols, markers, list(skipped), spelled)


def _arcs(flat: np.ndarray, lengths: np.ndarray, words: np.ndarray, costs: np.ndarray,
          closure: bool, silence_id: int | None, s: float, backoff_id: int,
          backoff_word: int):
    """Returns the arc arrays (src, ilabel, olabel, weight, dst), final weights, start."""
    n_prons = len(lengths)
    total = int(lengths.sum())
    boundary = 0
    if closure:
        fixed = 3 if silence_id else 1  # B, and S and I with silence
        end_state = boundary
    else:
        fixed = 2  # start 0, final 1
        end_state = 1
    first = np.zeros(total, dtype=bool)
    last = np.zeros(total, dtype=bool)
    starts = np.cumsum(lengths) - lengths
    first[starts] = True
    last[starts + lengths - 1] = True
    k = np.arange(total, dtype=np.int64)
    pron = np.repeat(np.arange(n_prons, dtype=np.int64), lengths)
    internal = fixed + k - pron  # state after position k (valid where not last)
    src = np.where(first, boundary, np.roll(internal, 1)).astype(np.int32)
    dst = np.where(last, end_state, internal).astype(np.int32)
    olab = np.where(first, words[pron], 0).astype(np.int32)
    wt = np.where(first, costs[pron], 0.0)
    ilab = flat.astype(np.int32)
    n_states = fixed + total - n_prons
    finals = np.full(n_states, np.inf)
    finals[end_state] = 0.0
    start = boundary
    if closure:
        extra = [(boundary, backoff_id, backoff_word, 0.0, boundary)]
        if silence_id:
            c_sil = -math.log(s)
            c_none = -math.log1p(-s) if s < 1.0 else math.inf
            sil_state, start = 1, 2
            # Duplicate each last arc: to B without silence, to S with silence.
            lk = np.flatnonzero(last)
            parts = [(src, ilab, olab, wt + np.where(last, c_none, 0.0), dst)]
            if math.isinf(c_none):  # s == 1: the no-silence branch is left out
                keep = ~last
                parts = [tuple(a[keep] for a in (src, ilab, olab, wt, dst))]
            parts.append((src[lk], ilab[lk], olab[lk], wt[lk] + c_sil,
                          np.full(len(lk), sil_state, dtype=np.int32)))
            src, ilab, olab, wt, dst = (np.concatenate(x) for x in zip(*parts))
            extra.append((sil_state, silence_id, 0, 0.0, boundary))
            extra.append((start, silence_id, 0, c_sil, boundary))
            if not math.isinf(c_none):
                extra.append((start, 0, 0, c_none, boundary))
        e_src, e_il, e_ol, e_wt, e_dst = zip(*extra)
        src = np.concatenate([src, np.array(e_src, dtype=np.int32)])
        ilab = np.concatenate([ilab, np.array(e_il, dtype=np.int32)])
        olab = np.concatenate([olab, np.array(e_ol, dtype=np.int32)])
        wt = np.concatenate([wt, np.array(e_wt, dtype=np.float64)])
        dst = np.concatenate([dst, np.array(e_dst, dtype=np.int32)])
    return src, ilab, olab, wt, dst, finals, start

