"""What the word-level graph prefers: decode a phone sequence into its n best word sequences.

- `Hypothesis`: one word sequence with its cost and the parts it is made of.
- `ReplayResult`: the n best hypotheses and, when asked, the expected words' cost.
- `Replayer(wordgraph, grammar, lexicon_fst)`: prepares the three FSTs once;
  `.replay(phones, nbest=5, expect=None, max_words=None)` decodes one phone sequence.
- `replay_build(directory, phones, nbest=5, expect=None, max_words=None)`: the same from
  a build directory;
  `replayer_for_build(directory)` keeps the prepared `Replayer` for many sequences.

Decoding. The word-level graph reads phones *and* auxiliary markers (the back-off
marker, the disambiguation markers) on its input side. The markers are relabelled to
epsilon on a copy of the graph, so a plain phone string is composed with it directly;
optional silence is an ordinary phone of the graph (the caller writes it where it is
spoken). The composition is projected on the words, epsilon-removed and determinized
(tropical), so each word sequence keeps its cheapest path, and the n shortest paths are
the n best distinct word sequences.

Cost parts (nats, -ln P), for a word sequence W and the phones X:

- ``lm``: the cheapest path of W through G, back-off arcs free to take anywhere (what the
  graph contains through L's back-off loop; `netbuild.inspectors.score`);
- ``lexicon``: the cheapest path through L reading X and writing W (markers as epsilon);
  split into ``silence`` (every word boundary -- the start, between words and the end --
  costs -ln s with a silence phone, -ln(1 - s) without; both read from the arcs leaving
  L's start state) and ``pronunciation`` (the rest: the pronunciation costs);
- ``total``: the graph's own cost of the path. L∘G pairs each L path with each G path of
  the same words, and determinization, minimization and pushing keep the cheapest total,
  so ``total == lm + lexicon`` up to float32 rounding (the result records the gap as
  ``rounding``).

Segmentation for the silence count: in L's cheapest path, each word's phones run from
its word arc to the next word arc; a last phone equal to the silence phone is counted as
silence after the word when the phones before it spell one of the word's
pronunciations (a pronunciation that itself ends in the silence phone is therefore
counted as one silence shorter; no such lexicon is known to us).
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pynini

from ..checks import lexicon_pronunciations
from ..errors import InputError, SymbolError
from ..io.fstfile import arrays_to_fst, fst_to_arrays
from ..io.phones import suggestion
from ..symbols import BACKOFF, EPSILON, is_auxiliary
# The sibling scorer's index is built once per Replayer rather than once per sentence.
from .score import _GrammarIndex

__all__ = ["Hypothesis", "ReplayResult", "Replayer", "replay_build", "replayer_for_build"]


@dataclasses.dataclass(frozen=True)
class Hypothesis:
    """A word sequence and its costs; ``lm + pronunciation + silence + rounding == total``."""

    words: tuple[str, ...]
    total: float
    lm: float
    pronunciation: float
    silence: float
    rounding: float

    def to_json(self) -> dict[str, Any]:
        def num(x: float) -> float | None:
            return x if math.isfinite(x) else None

        return {"words": list(self.words), "total": num(self.total), "lm": num(self.lm),
                "pronunciation": num(self.pronunciation), "silence": num(self.silence),
                "rounding": num(self.rounding)}


@dataclasses.dataclass
class ReplayResult:
    """The n best hypotheses (cheapest first) and, with `expect`, the expected words.

    `expected` is None when the expected words cannot produce the phones (`reason`
    says why); `margin` is the expected total minus the winner's (>= 0 up to rounding).
    """

    phones: tuple[str, ...]
    hypotheses: list[Hypothesis]
    expect: tuple[str, ...] | None = None
    expected: Hypothesis | None = None
    margin: float | None = None
    reason: str = ""

    def to_json(self) -> dict[str, Any]:
        out: dict[str, Any] = {"phones": list(self.phones),
                               "hypotheses": [h.to_json() for h in self.hypotheses]}
        if self.expect is not None:
            out["expect"] = {"words": list(self.expect),
                             "hypothesis": None if self.expected is None
                             else self.expected.to_json(),
                             "margin": self.margin, "reason": self.reason or None}
        return out


def _linear(labels: Sequence[int]) -> pynini.Fst:
    """An unweighted acceptor of one label string (built arc by arc: strings are short)."""
    f = pynini.Fst()
    f.add_states(len(labels) + 1)
    f.set_start(0)
    one = pynini.Weight.one("tropical")
    for i, lab in enumerate(labels):
        f.add_arc(i, pynini.Arc(lab, lab, one, i + 1))
    f.set_final(len(labels))
    return f


def _markers_to_epsilon(fst: pynini.Fst) -> pynini.Fst:
    """Constructively relabels every auxiliary input label of `fst` to epsilon."""
    table = fst.input_symbols()
    out = fst.copy()
    pairs = [] if table is None else [(k, 0) for k, sym in table
                                      if k > 0 and is_auxiliary(sym)]
    if pairs:
        out.relabel_pairs(ipairs=pairs)
    out.arcsort("ilabel")
    return out


class Replayer:
    """Decodes phone sequences through a word-level graph; prepares the FSTs once.

    Args:
      wordgraph: the word-level graph (phones and markers in, words out), with its
        input (phone) and output (word) symbol tables attached.
      grammar: G, word table attached (for the language-model part).
      lexicon_fst: L, symbol tables attached (for the pronunciation and silence parts).

    Raises:
      SymbolError: a symbol table is missing.
    """

    def __init__(self, wordgraph: pynini.Fst, grammar: pynini.Fst,
                 lexicon_fst: pynini.Fst) -> None:
        for name, f in (("word-level graph", wordgraph), ("lexicon", lexicon_fst)):
            if f.input_symbols() is None or f.output_symbols() is None:
                raise SymbolError(f"the {name} FST has no symbol tables",
                                  "load it with netbuild.workflow.load_build")
        self.phones = wordgraph.input_symbols().copy()
        self.words = wordgraph.output_symbols().copy()
        self.graph = _markers_to_epsilon(wordgraph)
        self.lexicon = _markers_to_epsilon(lexicon_fst)
        self.grammar = grammar
        self._lm = _GrammarIndex(grammar)
        self._prons = lexicon_pronunciations(lexicon_fst)
        self._limits: dict[int, pynini.Fst] = {}
        self.silence_phone, self.with_silence, self.without_silence = \
            _silence_costs(lexicon_fst)

    def labels(self, phones: Sequence[str]) -> list[int]:
        """Phone ids of `phones`.

        Raises:
          SymbolError: a phone is not in the graph's phone table (or is a marker).
        """
        known = [sym for k, sym in self.phones if k > 0 and not is_auxiliary(sym)]
        out = []
        for p in phones:
            k = self.phones.find(p)
            if k <= 0 or is_auxiliary(p):
                raise SymbolError(f"phone '{p}' is not in the graph's phone table",
                                  f"{suggestion(p, known)}write phones of the inventory",
                                  path="PHONES")
            out.append(k)
        return out

    def _lexicon_split(self, phone_ids: list[int], word_ids: list[int]
                       ) -> tuple[float, float]:
        """(pronunciation, silence) costs of the cheapest L path for phones -> words."""
        lattice = pynini.compose(pynini.compose(_linear(phone_ids), self.lexicon),
                                 _linear(word_ids))
        if lattice.num_states() == 0 or lattice.start() < 0:
            return math.inf, math.inf
        best = pynini.shortestpath(lattice)
        a = fst_to_arrays(best.topsort())
        order = _path_order(a)
        total = float(np.sum(a.weight[order], dtype=np.float64)) + \
            float(a.final_weights[a.dst[order[-1]]] if len(order) else a.final_weights[a.start])
        if self.silence_phone is None:
            return total, 0.0
        il = a.ilabel[order].tolist()
        ol = a.olabel[order].tolist()
        starts = [i for i, o in enumerate(ol) if o != 0]
        n_sil = int(self.silence_phone in [x for x in il[:starts[0] if starts else len(il)]])
        for j, s in enumerate(starts):
            e = starts[j + 1] if j + 1 < len(starts) else len(il)
            seg = tuple(x for x in il[s:e] if x)
            if len(seg) > 1 and seg[-1] == self.silence_phone \
                    and seg[:-1] in self._prons.get(ol[s], set()):
                n_sil += 1
        boundaries = len(word_ids) + 1
        silence = n_sil * self.with_silence + (boundaries - n_sil) * self.without_silence
        return total - silence, silence

    def _hypotheses(self, phone_ids: list[int], found: list[tuple[tuple[str, ...], float]]
                    ) -> list[Hypothesis]:
        lms = [self._lm.score(list(w)) for w, _ in found]
        out = []
        for (words, total), lm_score in zip(found, lms):
            lm = lm_score.best_path_cost
            word_ids = [self.words.find(w) for w in words]
            pron, sil = self._lexicon_split(phone_ids, word_ids)
            out.append(Hypothesis(words, total, lm, pron, sil, total - (lm + pron + sil)))
        return out

    def _at_most(self, k: int) -> pynini.Fst:
        """An acceptor of every word sequence of at most `k` words (built in bulk)."""
        if k in self._limits:
            return self._limits[k]
        labels = np.array([i for i, sym in self.words
                           if i > 0 and not is_auxiliary(sym)], dtype=np.int32)
        src = np.repeat(np.arange(k, dtype=np.int32), len(labels))
        lab = np.tile(labels, k)
        self._limits[k] = arrays_to_fst(k + 1, 0, np.zeros(k + 1), src, lab, lab,
                                        np.zeros(len(src)), src + 1)
        return self._limits[k]

    def replay(self, phones: Sequence[str], nbest: int = 5,
               expect: Sequence[str] | None = None,
               max_words: int | None = None) -> ReplayResult:
        """Returns the `nbest` cheapest word sequences the graph gives `phones`.

        Args:
          phones: the phone sequence, silence phones written where they occur.
          nbest: how many distinct word sequences to return (>= 1).
          expect: words whose cost (and margin behind the winner) to report too.
          max_words: keep only hypotheses of at most this many words (>= 1).

        Raises:
          SymbolError: a phone is not in the graph's phone table.
          ValueError: `nbest` or `max_words` < 1.
        """
        if nbest < 1 or (max_words is not None and max_words < 1):
            raise ValueError("nbest and max_words must be at least 1")
        ids = self.labels(phones)
        lattice = pynini.compose(_linear(ids), self.graph)
        hyps: list[Hypothesis] = []
        if lattice.num_states() and lattice.start() >= 0:
            words_only = pynini.project(lattice, "output")
            words_only.rmepsilon()
            if max_words is not None:
                words_only.arcsort("olabel")
                words_only = pynini.compose(words_only, self._at_most(max_words))
            words_only = pynini.determinize(words_only)
            best = pynini.shortestpath(words_only, nshortest=nbest, unique=True)
            paths = []
            it = best.paths()
            while not it.done():
                labels = tuple(k for k in it.olabels() if k)
                paths.append((float(it.weight()), labels))
                it.next()
            hyps = self._hypotheses(ids, [(tuple(self.words.find(k) for k in labels), total)
                                          for total, labels in sorted(paths)])
        result = ReplayResult(tuple(phones), hyps)
        if expect is not None:
            self._expected(result, ids, tuple(expect))
        return result

    def _expected(self, result: ReplayResult, ids: list[int], expect: tuple[str, ...]
                  ) -> None:
        result.expect = expect
        unknown = [w for w in expect if self.words.find(w) <= 0 or is_auxiliary(w)
                   or w in (EPSILON, BACKOFF)]
        if unknown:
            result.reason = (f"expected words cannot produce this phone sequence: "
                             f"{', '.join(repr(w) for w in unknown)} not in the graph")
            return
        word_ids = [self.words.find(w) for w in expect]
        lattice = pynini.compose(pynini.compose(_linear(ids), self.graph),
                                 _linear(word_ids))
        total = math.inf
        if lattice.num_states() and lattice.start() >= 0:
            d = pynini.shortestdistance(lattice, reverse=True)
            total = float(d[lattice.start()]) if len(d) > lattice.start() else math.inf
        if not math.isfinite(total):
            result.reason = "expected words cannot produce this phone sequence"
            return
        (result.expected,) = self._hypotheses(ids, [(expect, total)])
        if result.hypotheses:
            result.margin = total - result.hypotheses[0].total


def _path_order(a) -> np.ndarray:
    """Arc indices of a single-path FST in path order (from the start)."""
    nxt = {int(s): i for i, s in enumerate(a.src.tolist())}
    order, state = [], a.start
    while state in nxt and len(order) <= a.num_arcs:
        i = nxt[state]
        order.append(i)
        state = int(a.dst[i])
    return np.asarray(order, dtype=np.int64)


def _silence_costs(lfst: pynini.Fst) -> tuple[int | None, float, float]:
    """(silence phone id, -ln s, -ln(1 - s)) from the arcs leaving L's start state.

    L's start state has an epsilon arc (no silence at the start) and a silence-phone
    arc (silence at the start) when optional silence is on; otherwise it is the word
    boundary itself (word arcs leave it) and there is no silence cost.
    """
    start = lfst.start()
    if start < 0:
        return None, 0.0, 0.0
    phone, with_sil, without = None, math.inf, math.inf
    for arc in lfst.arcs(start):
        if arc.olabel != 0:
            return None, 0.0, 0.0
        if arc.ilabel == 0:
            without = float(arc.weight)
        else:
            phone, with_sil = arc.ilabel, float(arc.weight)
    return phone, with_sil, without


def replay_build(directory: str | Path, phones: Sequence[str], nbest: int = 5,
                 expect: Sequence[str] | None = None,
                 max_words: int | None = None) -> ReplayResult:
    """Replays `phones` through the word-level graph of a build directory.

    Uses the manifest's ``intermediates["wordgraph"]`` (the build's graph when absent),
    its G and its L.

    Raises:
      InputError: the directory is not a build or a file it names is broken.
      SymbolError: a phone is not in the build's phone table.
    """
    return replayer_for_build(directory).replay(phones, nbest, expect, max_words)


def replayer_for_build(directory: str | Path) -> Replayer:
    """Returns a `Replayer` over a build directory's word-level graph, G and L."""
    from ..workflow import load_build

    loaded = load_build(directory)
    d = Path(directory)
    name = (loaded.manifest.get("intermediates") or {}).get("wordgraph")
    graph = loaded.graph
    if name and name != loaded.manifest.get("graph"):
        path = d / name
        try:
            graph = pynini.Fst.read(str(path))
        except Exception as err:  # OpenFst raises its own error types
            raise InputError(f"cannot read the word-level graph ({err})",
                             "rebuild the directory with 'netbuild build'",
                             path=str(path)) from err
        # The word-level graph reads phones, like L.
        graph.set_input_symbols(loaded.lexicon.input_symbols())
        graph.set_output_symbols(loaded.word_symbols)
    return Replayer(graph, loaded.grammar, loaded.lexicon)
