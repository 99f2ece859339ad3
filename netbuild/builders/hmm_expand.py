"""H∘C∘L∘G built directly: every model arc of C∘L∘G replaced by its chain of arc kinds.

- `ModelChains`: H read back as one chain of arc kinds per model, indexed by model id.
- `model_chains(hfst)`: the chains of an H of `netbuild.builders.hmm.build_hmm`'s shape,
  or None for any other FST.
- `expand_models(clg, chains)`: H∘CLG from CLG (an FST or its arrays), or None when a
  label of CLG is not one H reads: `expand_arrays`, then `expanded_fst`.
- `expand_arrays(arrays, chains)`: the arrays of H∘CLG from CLG's, in bulk.
- `expanded_fst(arrays, connected)`: the FST of those arrays, trimmed if need be.

Why composition with H is a substitution. H (see `netbuild.builders.hmm`) has one hub,
state 0, which is its start and only final state; model ``m`` with ``n`` emitting
states is a chain of ``n`` arcs from state 0 back to state 0 whose first arc reads
``kind(s1)`` and writes ``m`` and whose others read ``kind(s2) .. kind(sn)`` and write
epsilon; each auxiliary marker has a ``marker:marker`` loop at state 0. All weights
are 0. In OpenFst's composition H∘CLG (as `pynini.compose` runs it, with its default
epsilon filter; tests/builders/test_hmm_expand.py compares the two machines) a state
is a pair (H state, CLG state), and:

- From (0, q), a CLG arc ``q --m:w/c--> q'`` meets H's first arc of m: the arc
  ``(0, q) --kind(s1):w/c--> (h1(m), q')`` (output label and weight on the first arc,
  where H writes m). With ``n == 1`` it ends at (0, q').
- At (h_i(m), q') H has only its output-epsilon arc and is not final, so the filter
  lets H move alone and blocks CLG's input-epsilon arcs there:
  ``(h_i, q') --kind(s_{i+1}):ε/0--> (h_{i+1}, q')``, the last one to (0, q'). These
  intermediate states are (m, position, q'): one chain per distinct (model,
  destination), shared by every CLG arc with that model and destination.
- A marker arc ``q --x:w/c--> q'`` meets H's loop: ``(0, q) --x':w/c--> (0, q')``, with
  ``x'`` the marker's id in H's input table.
- A CLG arc with epsilon input moves CLG alone (H's state 0 has no output epsilon):
  ``(0, q) --ε:w/c--> (0, q')``. C∘L∘G has such arcs: C's warm-up arcs read nothing
  while it waits for the right context (on the demo, 63 of 72,334 arcs).
- (0, q) is final with CLG's final weight of q; the start state is (0, start).

Here (0, q) keeps CLG's id q and the chain states follow, pair by pair. The arcs of
each state are sorted by input label, as the composition stage leaves them.

Trimming. If CLG is connected (every state accessible and coaccessible) and every
label is expandable, the result is connected too: each (0, q) lies on the image of a
successful path through q, and each chain lies between the images of its arc's ends.
`expand_models` therefore trims only when CLG is not known to be connected and the
result then turns out not to be (OpenFst's connect, as ``compose(..., connect=True)``).
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pynini
import pywrapfst

from ..bulk import unique_sorted
from ..io.fstfile import FstArrays, arrays_to_fst, fst_to_arrays, share_arrays
from ..symbols import is_auxiliary

__all__ = ["ModelChains", "expand_arrays", "expand_models", "expanded_fst", "model_chains"]

_CONNECTED = pywrapfst.ACCESSIBLE | pywrapfst.COACCESSIBLE


@dataclasses.dataclass(frozen=True)
class ModelChains:
    """H as kind chains, indexed by H's output labels (model ids, CLG's input labels).

    For a model id ``m``: ``length[m]`` states (0: ``m`` is not a model), their kinds
    ``kinds[offset[m] : offset[m] + length[m]]``. `hub_label[m]` is the input label of
    the arc that leaves H's hub writing ``m``: the model's first kind, or for a marker
    its id in H's input table (0: ``m`` is neither). `isymbols` is H's input table (the
    kinds and the markers), the input table of H∘CLG.
    """

    length: np.ndarray  # (labels,) int64
    offset: np.ndarray  # (labels,) int64
    kinds: np.ndarray  # (sum of lengths,) int32
    hub_label: np.ndarray  # (labels,) int32
    isymbols: pynini.SymbolTable

    @property
    def num_labels(self) -> int:
        return int(self.length.shape[0])


def model_chains(hfst: pynini.Fst) -> ModelChains | None:
    """Returns H's kind chains, or None when `hfst` does not have `build_hmm`'s shape.

    The shape (module docstring) is checked in bulk: start state 0, the only final
    state with weight 0, all arc weights 0, no input epsilon; at state 0 one first arc
    per model (output label a model, not a marker) and a ``marker:marker`` loop per
    marker (the same auxiliary symbol in both tables); every other state entered once
    and left once, by an arc with output epsilon; every chain returns to state 0.
    """
    isyms, osyms = hfst.input_symbols(), hfst.output_symbols()
    if isyms is None or osyms is None or hfst.start() != 0:
        return None
    a = fst_to_arrays(hfst)
    ns = a.num_states
    finals = a.final_weights
    if finals[0] != 0.0 or np.isfinite(finals[1:]).any() or (a.weight != 0.0).any() \
            or (a.ilabel == 0).any():
        return None
    num_labels = max(int(a.olabel.max(initial=0)) + 1, 1)
    aux_out = np.zeros(num_labels, dtype=bool)
    # (one test per symbol of the model table, not per arc)
    aux_out_ids = [k for k, s in osyms if k < num_labels and is_auxiliary(s)]
    aux_out[aux_out_ids] = True
    at_hub = a.src == 0
    olab = a.olabel.astype(np.int64)
    loops = at_hub & aux_out[olab]
    firsts = at_hub & ~loops & (olab > 0)
    if not (loops | firsts)[at_hub].all():
        return None  # an arc leaving the hub that writes epsilon
    # Marker loops: back to the hub, the same auxiliary name on both sides.
    if (a.dst[loops] != 0).any():
        return None
    loop_in, loop_out = a.ilabel[loops], olab[loops]
    if unique_sorted(loop_out).shape[0] != loop_out.shape[0]:
        return None
    # (a comparison per marker, not per arc: H has one loop per marker)
    if not all(isyms.find(i) == osyms.find(o)
               for i, o in zip(loop_in.tolist(), loop_out.tolist())):
        return None
    hub_label = np.zeros(num_labels, dtype=np.int32)
    hub_label[loop_out] = loop_in
    # Chain states: one arc out (writing epsilon), one arc in.
    inner = ~at_hub
    out_degree = np.bincount(a.src, minlength=ns)
    in_degree = np.bincount(a.dst[a.dst != 0], minlength=ns)
    if ns > 1 and ((out_degree[1:] != 1).any() or (in_degree[1:] != 1).any()):
        return None
    if (a.olabel[inner] != 0).any():
        return None
    next_state = np.zeros(ns, dtype=np.int64)
    next_kind = np.zeros(ns, dtype=np.int32)
    next_state[a.src[inner]] = a.dst[inner]
    next_kind[a.src[inner]] = a.ilabel[inner]
    models = olab[firsts]
    if unique_sorted(models).shape[0] != models.shape[0]:
        return None
    # Walk every chain at once, one position per pass (passes = the longest model).
    cur = a.dst[firsts].astype(np.int64)
    columns = [a.ilabel[firsts]]
    lengths = np.ones(models.shape[0], dtype=np.int64)
    active = cur != 0
    while active.any():
        columns.append(np.where(active, next_kind[cur], 0))
        lengths += active
        cur = np.where(active, next_state[cur], 0)
        active = cur != 0
    if int(lengths.sum()) - models.shape[0] != ns - 1:
        return None  # a cycle of chain states that no model enters
    table = np.stack(columns, axis=1)  # (models, longest), 0 past each chain's end
    keep = np.arange(table.shape[1])[None, :] < lengths[:, None]
    length = np.zeros(num_labels, dtype=np.int64)
    offset = np.zeros(num_labels, dtype=np.int64)
    length[models] = lengths
    offset[models] = np.cumsum(lengths) - lengths
    hub_label[models] = table[:, 0]
    return ModelChains(length, offset, table[keep].astype(np.int32), hub_label,
                       isyms.copy())


def expand_models(clg: pynini.Fst | FstArrays, chains: ModelChains) -> pynini.Fst | None:
    """Constructively builds H∘CLG by substituting each model arc with its kind chain.

    The same machine as OpenFst's ``compose(H, clg, connect=True)`` up to state
    numbering and the order of arcs with equal input labels (module docstring):
    `expand_arrays`, then `expanded_fst`, trimming unless `clg` is an FST whose stored
    property bits say it is connected.

    Args:
      clg: C∘L∘G (models and markers in, words out), as an FST or its arrays.
      chains: from `model_chains` (H's input table becomes the result's).

    Returns:
      A new FST (see `expanded_fst`), or None when some input label of `clg` is
      neither epsilon nor a model or marker of `chains` (compose with H instead).
    """
    connected = isinstance(clg, (pynini.Fst, pywrapfst.Fst)) \
        and clg.properties(_CONNECTED, False) == _CONNECTED
    out = expand_arrays(clg if isinstance(clg, FstArrays) else fst_to_arrays(clg), chains)
    return None if out is None else expanded_fst(out, connected)


def expand_arrays(a: FstArrays, chains: ModelChains) -> FstArrays | None:
    """Returns the arrays of H∘CLG for CLG's arrays `a` (arcs grouped by state, in
    state order, as `fst_to_arrays` gives them), in bulk; no loop over arcs or states.

    Input labels of `a` must be epsilon, models of `chains` or markers of `chains`; the
    output labels and the (tropical or log) weights are kept on each chain's first arc.
    The result's states are CLG's, then the chain states pair by pair; its arcs are
    grouped by state in state order and sorted by input label within each state (CLG's
    order among equal labels). None when some input label is not one H reads.
    """
    q = a.num_states
    il = a.ilabel
    inside = il < chains.num_labels
    lab = np.where(inside, il, 0).astype(np.int64)
    new_il = chains.hub_label[lab]
    if not ((il == 0) | (new_il > 0)).all():
        return None
    n = chains.length[lab]
    del inside

    # One chain per distinct (model, destination) among the arcs of models of 2+ states.
    long = np.flatnonzero(n >= 2)
    key = lab[long] << 32 | a.dst[long].astype(np.int64)
    order = np.argsort(key, kind="stable")
    skey = key[order]
    starts = np.ones(skey.shape[0], dtype=bool)
    np.not_equal(skey[1:], skey[:-1], out=starts[1:])
    pair_of = np.empty(skey.shape[0], dtype=np.int64)
    pair_of[order] = np.cumsum(starts) - 1
    pair_key = skey[starts]
    del key, order, skey, starts
    pair_model = pair_key >> 32
    pair_dst = pair_key & 0xFFFFFFFF
    inner = chains.length[pair_model] - 1  # chain states (and chain arcs) of each pair
    base = q + np.cumsum(inner) - inner  # each pair's first chain state
    num_inner = int(inner.sum())
    del pair_key

    # The arcs of CLG's states: first arcs of chains, markers, epsilon arcs.
    dst = a.dst.astype(np.int32, copy=True)
    dst[long] = base[pair_of]
    del long, pair_of, lab, n
    # sorted by (state, new input label); CLG's order among equal labels
    arc_order = np.argsort(a.src.astype(np.int64) << 32 | new_il.astype(np.int64),
                           kind="stable")
    # The chain arcs: chain state Q + j has exactly one arc, j in pair-major order.
    owner = np.repeat(np.arange(inner.shape[0]), inner)
    position = np.arange(num_inner) - np.repeat(base - q, inner) + 1  # 1 .. n - 1
    chain_il = chains.kinds[chains.offset[pair_model[owner]] + position]
    chain_src = np.arange(q, q + num_inner, dtype=np.int64)
    chain_dst = chain_src + 1
    last = position == inner[owner]
    chain_dst[last] = pair_dst[owner[last]]
    del owner, position, last, pair_model, pair_dst, base, inner

    total = q + num_inner
    finals = np.full(total, np.inf, dtype=np.float32)
    finals[:q] = a.final_weights
    return FstArrays(
        num_states=total, start=a.start, final_weights=finals,
        src=np.concatenate([a.src[arc_order], chain_src.astype(np.int32)]),
        ilabel=np.concatenate([new_il[arc_order], chain_il]).astype(np.int32),
        olabel=np.concatenate([a.olabel[arc_order], np.zeros(num_inner, np.int32)]),
        weight=np.concatenate([a.weight[arc_order], np.zeros(num_inner, np.float32)]),
        dst=np.concatenate([dst[arc_order], chain_dst.astype(np.int32)]),
        isymbols=chains.isymbols, osymbols=a.osymbols, arc_type=a.arc_type)


def expanded_fst(arrays: FstArrays, connected: bool = False) -> pynini.Fst:
    """Constructively builds the FST of `expand_arrays`' result.

    With `connected` (CLG was connected, so the result is: module docstring) the FST
    is returned as built; otherwise it is tested and, if need be, trimmed with
    OpenFst's connect. Unless trimmed, `arrays` are registered as the FST's conversion
    inside a `netbuild.io.fstfile.shared_conversions` block (they become read-only).

    Returns:
      A new FST: kinds and markers in, CLG's output labels and table out.
    """
    a = arrays
    ofst = arrays_to_fst(a.num_states, a.start, a.final_weights, a.src, a.ilabel,
                         a.olabel, a.weight, a.dst, isymbols=a.isymbols,
                         osymbols=a.osymbols, arc_type=a.arc_type)  # type: ignore[arg-type]
    if not connected and a.num_states and \
            ofst.properties(_CONNECTED, True) != _CONNECTED:
        ofst.connect()  # renumbers: the arrays no longer describe it
        return ofst
    share_arrays(ofst, a)
    return ofst
