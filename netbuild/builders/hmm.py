"""The HMM transducer H (arc kinds in, physical models out) and self-loop insertion.

- `KindTable`: the distinct arc kinds of a context map and the label tables around H.
- `make_model_symbols(cmap, phone_symbols)`: the model table (C's input, H's output).
- `build_hmm(cmap, model_symbols)`: H without self-loops, markers passed through;
  returns ``(fst, kind_table)``.
- `add_self_loops(ifst, kind_table, transition_scale=1.0)`: adds every HMM state's
  self-loop to an optimized graph over kinds, in bulk, and relabels kinds to emission
  classes.
- `emission_symbols(kind_table)`: the final input table, ``e<c>`` at id ``c + 1``.

Arc kinds. During optimization H's input labels are not emission classes but *arc
kinds*: one id per distinct (emission class, self-loop probability, forward
probability) triple among the models' states. Two HMM states of the same kind behave
identically once the self-loops are put back, so determinization and minimization may
merge them; two states with the same emission class but different transition
probabilities must stay apart, which they do because their kinds differ.

Shape of H (tropical, all weights 0): state 0 is the start state and the only final
state. A model ``m`` with emitting states ``s1 .. sn`` is a chain of ``n`` arcs leaving
and returning to state 0; the first reads ``kind(s1)`` and writes ``m``, the others
read the next kinds and write epsilon. Each auxiliary marker (``!backoff``, ``!amb*``)
has a ``marker:marker`` self-loop at state 0, the state between two models, which is
where C∘L∘G carries them. H has no self-loops of its own: an arc of kind ``k`` stands
for *entering* an HMM state of kind ``k``, and the time spent in it is added after the
final minimization.

Self-loops. For every state ``t`` of the optimized graph and every kind ``k`` (with a
self-loop probability above 0) on arcs entering ``t``, a state ``t_k`` receives those
arcs, carries the self-loop ``k`` with cost ``-ln(self_loop)`` and adds
``-ln(forward)`` to each arc leaving it and to its final weight. ``t`` itself serves
as ``t_k`` when ``k`` is the only thing entering it; otherwise ``t_k`` is a copy of
``t`` (``t`` keeps the arcs that enter it with epsilon or a kind without a loop, and
the start state counts as entered by epsilon). A `transition_scale` multiplies both
costs. All of it is numpy over the arrays of `fst_to_arrays`; no Python loop over arcs.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pynini

from ..errors import PhoneMapError, Problem, StageError
from ..io.context_map import ContextMap
from ..io.fstfile import arrays_to_fst, fst_to_arrays
from ..symbols import EPSILON, is_auxiliary, make_symbol_table
from ..bulk import unique_sorted

__all__ = ["KindTable", "add_self_loops", "build_hmm", "emission_symbols",
           "make_model_symbols"]

Kind = tuple[int, float, float]  # (emission class, self-loop probability, forward)


@dataclasses.dataclass
class KindTable:
    """The arc kinds of H and the label tables H is built with.

    `kinds[i]` is kind id ``i + 1``. `symbols` is H's input table: epsilon, ``k1 ..
    kK``, then the auxiliary markers (ids ``K + 1 ..``). `markers` are the marker
    names in table order. `num_classes` is one more than the largest emission class.
    """

    kinds: list[Kind]
    symbols: pynini.SymbolTable
    markers: list[str]
    num_classes: int

    @property
    def num_kinds(self) -> int:
        return len(self.kinds)

    def marker_ids(self) -> list[int]:
        """The input-label ids of the auxiliary markers in `symbols`."""
        return [self.symbols.find(m) for m in self.markers]


def _markers_of(table: pynini.SymbolTable) -> list[str]:
    return [name for _, name in table if is_auxiliary(name)]


def make_model_symbols(cmap: ContextMap, phone_symbols: pynini.SymbolTable
                       ) -> pynini.SymbolTable:
    """Returns the model table: epsilon 0, the models in file order, then the
    auxiliary markers of `phone_symbols` in their order.

    Raises:
      PhoneMapError: a model name is spelled like epsilon or an auxiliary marker.
    """
    problems = [Problem(cmap.path, m.line or None,
                        f"model name '{name}' is spelled like a reserved symbol",
                        "rename the model (names starting with '!' and <epsilon> are "
                        "reserved)")
                for name, m in cmap.models.items() if name == EPSILON or name.startswith("!")]
    if problems:
        raise PhoneMapError.from_problems(problems)
    return make_symbol_table("models", [*cmap.models, *_markers_of(phone_symbols)])


def build_hmm(cmap: ContextMap, model_symbols: pynini.SymbolTable
              ) -> tuple[pynini.Fst, KindTable]:
    """Builds H, with arc kinds on the input side and models on the output side.

    Constructively builds a new FST in bulk; see the module docstring for its shape.
    Every model of `cmap` is included (unused ones are trimmed away by composition).

    Args:
      cmap: the context map (its models and their states).
      model_symbols: from `make_model_symbols`; its markers are passed through.

    Returns:
      ``(fst, kind_table)``: H (unweighted, arc-sorted on output labels, with the kind
      table as input symbols and `model_symbols` as output symbols) and its kinds.

    Raises:
      StageError: a model of `cmap` is missing from `model_symbols` or has no states
        (the context-map reader rejects both, so this is a caller bug).
    """
    kind_ids: dict[Kind, int] = {}
    src: list[int] = []
    dst: list[int] = []
    ilab: list[int] = []
    olab: list[int] = []
    num_states = 1
    for name, model in cmap.models.items():
        mid = model_symbols.find(name)
        if mid == pynini.NO_SYMBOL or not model.states:
            raise StageError("hmm", f"model '{name}' is not in the model table or has "
                             "no states", "this is a caller bug: build the table with "
                             "make_model_symbols from a validated context map")
        n = len(model.states)
        chain = [0] + list(range(num_states, num_states + n - 1)) + [0]
        num_states += n - 1
        for i, state in enumerate(model.states):
            key = (int(state.emission_class), float(state.self_loop), float(state.forward))
            kid = kind_ids.setdefault(key, len(kind_ids) + 1)
            src.append(chain[i])
            dst.append(chain[i + 1])
            ilab.append(kid)
            olab.append(mid if i == 0 else 0)
    kinds = list(kind_ids)
    markers = _markers_of(model_symbols)
    table = make_symbol_table("kinds", [*(f"k{i}" for i in range(1, len(kinds) + 1)),
                                        *markers])
    for name in markers:
        src.append(0)
        dst.append(0)
        ilab.append(table.find(name))
        olab.append(model_symbols.find(name))
    finals = np.full(num_states, np.inf, dtype=np.float32)
    finals[0] = 0.0
    fst = arrays_to_fst(num_states, 0, finals, np.array(src, dtype=np.int32),
                        np.array(ilab, dtype=np.int32), np.array(olab, dtype=np.int32),
                        np.zeros(len(src), dtype=np.float32), np.array(dst, dtype=np.int32),
                        isymbols=table, osymbols=model_symbols)
    fst.arcsort(sort_type="olabel")
    num_classes = 1 + max((k[0] for k in kinds), default=-1)
    return fst, KindTable(kinds, table, markers, num_classes)


def emission_symbols(kind_table: KindTable) -> pynini.SymbolTable:
    """Returns the final input table: epsilon 0, then ``e<c>`` at id ``c + 1`` for every
    emission class from 0 to the largest one used."""
    return make_symbol_table("emissions", [f"e{c}" for c in range(kind_table.num_classes)])


def add_self_loops(ifst: pynini.Fst, kind_table: KindTable,
                   transition_scale: float = 1.0) -> pynini.Fst:
    """Constructively adds the HMM self-loops to `ifst` and relabels kinds to classes.

    `ifst` is the optimized graph whose input labels are kind ids ``1 .. K`` (or
    epsilon); auxiliary markers must already be replaced by epsilon. See the module
    docstring for the construction. Every path of `ifst` becomes the family of paths
    that repeat each kind arc's HMM state 0 or more times, each repetition costing
    ``-ln(self_loop)`` and the exit ``-ln(forward)`` (both times `transition_scale`).

    Returns:
      A new FST whose input labels are emission class + 1 (table: `emission_symbols`)
      and whose output labels and table are those of `ifst`.

    Raises:
      StageError: `ifst` has an input label that is not epsilon or a kind, or the
        scale is negative.
    """
    if not transition_scale >= 0.0:
        raise StageError("self-loops", f"transition scale {transition_scale} is negative",
                         "set the transition scale to a number >= 0")
    a = fst_to_arrays(ifst)
    K = kind_table.num_kinds
    if a.num_arcs and (a.ilabel.max() > K):
        bad = int(a.ilabel[a.ilabel > K][0])
        raise StageError("self-loops", f"input label {bad} is not an arc kind (1..{K})",
                         "replace the auxiliary markers by epsilon before adding self-loops")
    cls = np.array([0] + [k[0] + 1 for k in kind_table.kinds], dtype=np.int32)
    loop_p = np.array([0.0] + [k[1] for k in kind_table.kinds], dtype=np.float64)
    forward_p = np.array([1.0] + [k[2] for k in kind_table.kinds], dtype=np.float64)
    with np.errstate(divide="ignore"):
        loop_cost = np.where(loop_p > 0.0, -np.log(loop_p) * transition_scale, np.inf)
        exit_cost = -np.log(forward_p) * transition_scale
    loops = np.isfinite(loop_cost)  # kinds whose HMM state can repeat

    ns = a.num_states
    src, dst, ilab = a.src.astype(np.int64), a.dst.astype(np.int64), a.ilabel
    looped = loops[ilab]
    # States entered by something that is not a looping kind (the start state too).
    plain = np.zeros(ns, dtype=bool)
    plain[dst[~looped]] = True
    if a.start >= 0:
        plain[a.start] = True
    # One (state, kind) pair per distinct looping kind entering a state.
    keys = unique_sorted(dst[looped] << 32 | ilab[looped].astype(np.int64))
    pair_state = keys >> 32
    pair_kind = (keys & 0xFFFFFFFF).astype(np.int64)
    first_of_state = np.ones(keys.shape[0], dtype=bool)
    first_of_state[1:] = pair_state[1:] != pair_state[:-1]
    reuse = first_of_state & ~plain[pair_state]  # t itself plays t_k
    copies = ~reuse
    pair_id = np.where(reuse, pair_state, 0)
    pair_id[copies] = ns + np.arange(int(copies.sum()))
    total_states = ns + int(copies.sum())

    # Redirect every looping-kind arc to the state of its (destination, kind) pair.
    new_dst = dst.copy()
    if looped.any():
        where = np.searchsorted(keys, dst[looped] << 32 | ilab[looped].astype(np.int64))
        new_dst[looped] = pair_id[where]

    weight = a.weight.astype(np.float64)
    finals = np.full(total_states, np.inf, dtype=np.float64)
    finals[:ns] = a.final_weights
    # Reused states: their own arcs and final weight pay the exit cost.
    reused_state = pair_state[reuse]
    add = np.zeros(ns, dtype=np.float64)
    add[reused_state] = exit_cost[pair_kind[reuse]]
    weight = weight + add[src]
    finals[reused_state] += exit_cost[pair_kind[reuse]]

    # Copies: the arcs of t, shifted to t_k with the exit cost of k.
    narcs = np.bincount(src, minlength=ns) if ns else np.zeros(0, dtype=np.int64)
    first = np.zeros(ns + 1, dtype=np.int64)
    np.cumsum(narcs, out=first[1:])
    c_state, c_kind, c_id = pair_state[copies], pair_kind[copies], pair_id[copies]
    counts = narcs[c_state]
    owner = np.repeat(np.arange(c_state.shape[0]), counts)
    offset = np.arange(int(counts.sum())) - np.repeat(np.cumsum(counts) - counts, counts)
    arc_idx = first[c_state][owner] + offset
    base_weight = a.weight.astype(np.float64)
    c_src = c_id[owner]
    c_w = base_weight[arc_idx] + exit_cost[c_kind][owner]
    finals[c_id] = a.final_weights[c_state] + exit_cost[c_kind]

    # The self-loops, one per pair.
    l_src = pair_id
    l_w = loop_cost[pair_kind]

    all_src = np.concatenate([src, c_src, l_src])
    all_dst = np.concatenate([new_dst, new_dst[arc_idx], l_src])
    all_ilab = np.concatenate([ilab, ilab[arc_idx], pair_kind]).astype(np.int64)
    all_olab = np.concatenate([a.olabel, a.olabel[arc_idx],
                               np.zeros(l_src.shape[0], dtype=np.int32)])
    all_w = np.concatenate([weight, c_w, l_w])
    ofst = arrays_to_fst(total_states, a.start, finals.astype(np.float32), all_src,
                         cls[all_ilab], all_olab, all_w.astype(np.float32), all_dst,
                         isymbols=emission_symbols(kind_table), osymbols=a.osymbols)
    return ofst
