"""The HMM transducer H (arc kinds in, physical models out) and self-loop insertion.

- `KindTable`: the distinct arc kinds of a context map and the label tables around H.
- `make_model_symbols(cmap, phone_symbols)`: the model table (C's input, H's output).
- `build_hmm(cmap, model_symbols)`: H without self-loops, markers passed through;
  returns ``(fst, kind_table)``.
- `add_self_loops(ifst, kind_table, transition_scale=1.0)`: adds every HMM state's
  self-loop to an optimized graph over kinds, in bulk, and relabels kinds to emission
  classes; takes its input as an `FstHandoff` too, and drops it once read.
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
as ``t_k`` for the smallest such ``k`` when nothing else enters it; every other ``t_k``
is a copy of ``t`` (``t`` keeps the arcs that enter it with epsilon or a kind without
a loop, and the start state counts as entered by epsilon). A `transition_scale`
multiplies both costs. All of it is numpy over the arrays of `fst_to_arrays` (int32
where ids fit), no Python loop over arcs; the arcs come out in the order OpenFst's
input-label arc sort would give them, so the result needs no sort.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pynini

from ..errors import PhoneMapError, Problem, StageError
from ..io.context_map import ContextMap
from ..guard import FstHandoff
from ..io.fstfile import (FstArrays, arrays_to_fst, forget_shared, fst_to_arrays,
                           share_arrays)
from ..memory import release_free_memory
from ..symbols import EPSILON, is_auxiliary, make_symbol_table
from ..bulk import unique_sorted

__all__ = ["KindTable", "add_self_loops", "build_hmm", "emission_symbols",
           "make_model_symbols"]

Kind = tuple[int, float, float]  # (emission class, self-loop probability, forward)


@dataclasses.dataclass
class KindTable:
    """The arc kinds of H and the label tables H is built with.

    `kinds[i]` is kind id ``i + 1``. `symbols` is H's input table: epsilon, ``kind1 ..
    kindK``, then the auxiliary markers (ids ``K + 1 ..``). `markers` are the marker
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
    table = make_symbol_table("kinds", [*(f"kind{i}" for i in range(1, len(kinds) + 1)),
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


def add_self_loops(ifst: pynini.Fst | FstHandoff, kind_table: KindTable,
                   transition_scale: float = 1.0) -> pynini.Fst:
    """Constructively adds the HMM self-loops to `ifst` and relabels kinds to classes.

    `ifst` is the optimized graph whose input labels are kind ids ``1 .. K`` (or
    epsilon); auxiliary markers must already be replaced by epsilon. See the module
    docstring for the construction. Every path of `ifst` becomes the family of paths
    that repeat each kind arc's HMM state 0 or more times, each repetition costing
    ``-ln(self_loop)`` and the exit ``-ln(forward)`` (both times `transition_scale`).

    Given as an `FstHandoff`, `ifst` is dropped (with its shared conversion) as soon as
    its arrays are read, so it is not alive while the result is built. The result's
    arrays are registered as its shared conversion (`share_arrays`; no-op outside a
    `shared_conversions` block), so checks of it need not convert it back.

    Returns:
      A new FST whose input labels are emission class + 1 (table: `emission_symbols`),
      whose output labels and table are those of `ifst`, and whose arcs are sorted by
      input label, then output label, ties in the order of the arcs they came from:
      what OpenFst's input-label arc sort would leave (it compares both, stably).

    Raises:
      StageError: `ifst` has an input label that is not epsilon or a kind, the scale is
        negative, or the result has too many states for 32-bit state ids.
    """
    if isinstance(ifst, FstHandoff):
        fst = ifst.take()
        a = fst_to_arrays(fst)
        forget_shared(fst)
        del fst
        release_free_memory()  # the input's pages, for the arrays built next
    else:
        a = fst_to_arrays(ifst)
    out = self_loop_arrays(a, kind_table, transition_scale)
    del a  # the input's arrays, before OpenFst reads the result
    release_free_memory()  # and the temporaries' pages, which malloc would keep
    ofst = arrays_to_fst(out.num_states, out.start, out.final_weights, out.src, out.ilabel,
                         out.olabel, out.weight, out.dst,
                         isymbols=emission_symbols(kind_table), osymbols=out.osymbols)
    share_arrays(ofst, out)  # already grouped by state and sorted: what OpenFst holds
    return ofst


def self_loop_arrays(a: FstArrays, kind_table: KindTable, transition_scale: float = 1.0
                     ) -> FstArrays:
    """The arrays of `add_self_loops`' result from the input's arrays `a` (its input
    table replaced by `emission_symbols`); see `add_self_loops` for the layout.

    Raises:
      StageError: as `add_self_loops`.
    """
    if not transition_scale >= 0.0:
        raise StageError("self-loops", f"transition scale {transition_scale} is negative",
                         "set the transition scale to a number >= 0")
    K = kind_table.num_kinds
    if a.num_arcs and (a.ilabel.max() > K):
        bad = int(a.ilabel[a.ilabel > K][0])
        raise StageError("self-loops", f"input label {bad} is not an arc kind (1..{K})",
                         "replace the auxiliary markers by epsilon before adding self-loops")
    out = _self_loop_arrays(a, kind_table, transition_scale)
    return dataclasses.replace(out, isymbols=emission_symbols(kind_table))


def _segment_starts(counts: np.ndarray) -> np.ndarray:
    """The exclusive prefix sums of `counts` (int64, one more entry than `counts`)."""
    first = np.zeros(counts.shape[0] + 1, dtype=np.int64)
    np.cumsum(counts, out=first[1:])
    return first


def _arc_order(src: np.ndarray, ilabel: np.ndarray, olabel: np.ndarray
               ) -> np.ndarray | None:
    """The stable order of the arcs by (state, input label, output label), or None when
    they are in it already.

    That is the order OpenFst's input-label arc sort leaves (its comparison takes the
    output label second, and the sort is stable; `tests/builders/test_hmm.py` checks
    it). Arcs are grouped by state; only the arcs of states where the pair descends
    somewhere are sorted, the rest keep their places.
    """
    if ilabel.shape[0] < 2:
        return None
    descent = ilabel[1:] < ilabel[:-1]
    descent |= (ilabel[1:] == ilabel[:-1]) & (olabel[1:] < olabel[:-1])
    descent &= src[1:] == src[:-1]
    if not descent.any():
        return None
    unsorted = np.zeros(int(src[-1]) + 1, dtype=bool)
    unsorted[src[1:][descent]] = True
    del descent
    idx = np.flatnonzero(unsorted[src])
    order = np.arange(ilabel.shape[0], dtype=np.int64)
    order[idx] = idx[np.lexsort((olabel[idx], ilabel[idx], src[idx]))]  # stable
    return order


def _self_loop_arrays(a: FstArrays, kind_table: KindTable,
                      transition_scale: float) -> FstArrays:
    """The arrays of `add_self_loops`'s result, from the input's arrays `a`.

    Layout, state by state: the states of `a` keep their ids, the copies ``t_k`` follow
    in (t, k) order. Each state's arcs are its template's (its own, or t's for a copy)
    sorted stably by (emission class, output label), with the self-loop (output
    epsilon) placed after the arcs whose pair is smaller or equal: the order OpenFst's
    arc sort gives (template arcs, then the loop). Weights are summed in float64 and
    stored as float32.
    """
    kinds = kind_table.kinds
    cls = np.array([0] + [k[0] + 1 for k in kinds], dtype=np.int32)
    loop_p = np.array([0.0] + [k[1] for k in kinds], dtype=np.float64)
    forward_p = np.array([1.0] + [k[2] for k in kinds], dtype=np.float64)
    with np.errstate(divide="ignore"):
        loop_cost = np.where(loop_p > 0.0, -np.log(loop_p) * transition_scale, np.inf)
        exit_cost = -np.log(forward_p) * transition_scale
    loops = np.isfinite(loop_cost)  # kinds whose HMM state can repeat

    ns, n, start = a.num_states, a.num_arcs, a.start
    src = a.src
    iclass = cls[a.ilabel]
    order = _arc_order(src, iclass, a.olabel)
    if order is None:
        ilab, olab, weight, dst = a.ilabel, a.olabel, a.weight, a.dst
    else:  # (src stays: the order only moves arcs within their state)
        ilab, olab, weight, dst, iclass = (x[order] for x in (a.ilabel, a.olabel, a.weight,
                                                              a.dst, iclass))
        del order

    looped = loops[ilab]
    # States entered by something that is not a looping kind (the start state too).
    plain = np.zeros(ns, dtype=bool)
    plain[dst[~looped]] = True
    if start >= 0:
        plain[start] = True
    # One (state, kind) pair per distinct looping kind entering a state, in (t, k) order.
    l_dst, l_kind = dst[looped], ilab[looped]
    keys = unique_sorted(l_dst.astype(np.int64) << 32 | l_kind)
    pair_state = (keys >> 32).astype(np.int32)
    pair_kind = (keys & 0xFFFFFFFF).astype(np.int32)
    per_state = np.bincount(pair_state, minlength=ns)
    pair_first = _segment_starts(per_state)
    reuse = ~plain[pair_state]  # t itself plays t_k for its first pair ...
    reuse[1:] &= pair_state[1:] != pair_state[:-1]  # ... and only for that one
    del plain
    num_copies = int(keys.shape[0] - np.count_nonzero(reuse))
    total_states = ns + num_copies
    if total_states >= 2**31:
        raise StageError("self-loops", f"the graph would have {total_states} states, more "
                         "than 32-bit state ids allow",
                         "build a smaller graph (prune the language model)")
    pair_id = pair_state.copy()
    pair_id[~reuse] = np.arange(ns, total_states, dtype=np.int32)

    # Redirect every looping-kind arc to the state of its (destination, kind) pair: the
    # destination's only pair, or (rarely) the one found among several.
    where = pair_first[l_dst]
    several = per_state[l_dst] > 1
    if several.any():
        where[several] = np.searchsorted(
            keys, l_dst[several].astype(np.int64) << 32 | l_kind[several])
    new_dst = dst.copy()
    new_dst[looped] = pair_id[where]
    del where, several, l_dst, l_kind, keys, per_state, pair_first, looped, dst

    # Output states: the states of `a`, then the copies; each has its template's arcs and
    # its pair's loop, if any.
    narcs = np.bincount(src, minlength=ns)
    first = _segment_starts(narcs)
    copy_state, copy_kind = pair_state[~reuse], pair_kind[~reuse]
    reused_state, reused_kind = pair_state[reuse], pair_kind[reuse]
    out_narcs = np.concatenate([narcs, narcs[copy_state]])
    out_narcs[pair_id] += 1
    out_first = _segment_starts(out_narcs)
    num_out = int(out_first[-1])
    # Each loop (class c, output epsilon) goes after its template's arcs of a smaller
    # class and after those of class c with output epsilon, which come first among c's.
    arc_key = src.astype(np.int64) << 32 | iclass
    loop_key = pair_state.astype(np.int64) << 32 | cls[pair_kind]
    below = np.searchsorted(arc_key, loop_key, side="left")
    upto = np.searchsorted(arc_key, loop_key, side="right")
    del arc_key, loop_key
    eps_before = _segment_starts(olab == 0)  # output-epsilon arcs before each arc
    loop_at = out_first[pair_id] + (below - first[pair_state]) \
        + (eps_before[upto] - eps_before[below])
    del below, upto, eps_before
    is_loop = np.zeros(num_out, dtype=bool)
    is_loop[loop_at] = True
    # The output is two regions: the states of `a` (arcs 0 .. split - 1), then the copies.
    split = int(out_first[ns])
    own = ~is_loop[:split]
    copied = ~is_loop[split:]
    del is_loop, out_first
    # Arcs of the copies, as indices into the (sorted) arcs of `a`.
    counts = narcs[copy_state]
    owner = np.repeat(np.arange(num_copies, dtype=np.int32), counts)
    index = np.int32 if n < 2**31 else np.int64
    copy_arc = np.arange(owner.shape[0], dtype=index)
    copy_arc += np.repeat((first[copy_state] - _segment_starts(counts)[:-1]).astype(index),
                          counts)
    del counts, narcs, first

    def place(dtype: type, own_values: np.ndarray, copy_values: np.ndarray,
              loop_values: np.ndarray) -> np.ndarray:
        values = np.empty(num_out, dtype=dtype)
        values[loop_at] = loop_values
        values[:split][own] = own_values
        values[split:][copied] = copy_values
        return values

    o_ilabel = place(np.int32, iclass, iclass[copy_arc], cls[pair_kind])
    del iclass
    o_olabel = place(np.int32, olab, olab[copy_arc], 0)
    del olab
    o_dst = place(np.int32, new_dst, new_dst[copy_arc], pair_id)
    del new_dst
    # Weights: a reused state's arcs (and final weight) pay its kind's exit cost, a copy's
    # arcs pay the copy's kind's; the sums are taken in float64 as the costs are.
    state_exit = np.zeros(ns, dtype=np.float64)
    state_exit[reused_state] = exit_cost[reused_kind]
    own_w = weight.astype(np.float64)
    own_w += state_exit[src]
    del state_exit
    copy_w = weight[copy_arc].astype(np.float64)
    copy_w += exit_cost[copy_kind][owner]
    del copy_arc, owner, weight
    o_weight = place(np.float32, own_w.astype(np.float32), copy_w.astype(np.float32),
                     loop_cost[pair_kind].astype(np.float32))
    del own_w, copy_w, own, copied, loop_at
    o_src = np.repeat(np.arange(total_states, dtype=np.int32), out_narcs)
    del out_narcs

    finals = np.full(total_states, np.inf, dtype=np.float64)
    finals[:ns] = a.final_weights
    finals[reused_state] += exit_cost[reused_kind]
    finals[ns:] = a.final_weights[copy_state] + exit_cost[copy_kind]
    return FstArrays(total_states, start, finals.astype(np.float32), o_src, o_ilabel,
                     o_olabel, o_weight, o_dst, osymbols=a.osymbols)
