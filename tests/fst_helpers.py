"""Small FST and context-map helpers shared by the tests."""

from __future__ import annotations

import numpy as np
import pynini

from netbuild.io.context_map import ContextMap, HmmState, Model
from netbuild.io.fstfile import FstArrays, arrays_to_fst


class Tracked(pynini.Fst):
    """A pynini FST that can be watched with a weak reference (the base type cannot)."""


def tracked_copy(fst: pynini.Fst) -> Tracked:
    """A `Tracked` copy of `fst`: states, arcs, finals, start and symbol tables."""
    out = Tracked()
    out.add_states(fst.num_states())
    for s in fst.states():
        for a in fst.arcs(s):
            out.add_arc(s, pynini.Arc(a.ilabel, a.olabel, a.weight, a.nextstate))
        out.set_final(s, fst.final(s))
    if fst.start() != pynini.NO_STATE_ID:
        out.set_start(fst.start())
    out.set_input_symbols(fst.input_symbols())
    out.set_output_symbols(fst.output_symbols())
    return out


def connected_fst(num_states: int, arcs: list[tuple], finals: list[float],
                  **tables) -> pynini.Fst:
    """The connected FST with start 0, `arcs` as (src, ilabel, olabel, weight, dst)
    tuples and `finals` per state (inf: not final); `tables`: isymbols/osymbols."""
    cols = [np.array(c) for c in zip(*arcs)] if arcs else [np.zeros(0)] * 5
    src, il, ol, w, dst = cols
    fst = arrays_to_fst(num_states, 0, np.array(finals, dtype=np.float32),
                        src.astype(np.int32), il.astype(np.int32), ol.astype(np.int32),
                        w.astype(np.float32), dst.astype(np.int32), **tables)
    fst.connect()
    return fst


def fst_of_arrays(a: FstArrays) -> pynini.Fst:
    """The FST of `a` (without symbol tables)."""
    return arrays_to_fst(a.num_states, a.start, a.final_weights, a.src, a.ilabel,
                         a.olabel, a.weight, a.dst)


def openfst_encoded_minimum(fst: pynini.Fst) -> pynini.Fst:
    """OpenFst's minimization of `fst` as an acceptor of (input, output, weight) codes."""
    # reference: OpenFst Minimize of the encoded acceptor (fst/minimize.h, fst/encode.h)
    mapper = pynini.EncodeMapper(fst.arc_type(), encode_labels=True, encode_weights=True)
    enc = pynini.encode(fst, mapper)
    enc.minimize(allow_nondet=True)
    return pynini.decode(enc, mapper)


def monophone_map(models: dict[str, list[tuple[int, float, float]]]) -> ContextMap:
    """A 0/0 context map of the given models ((class, self-loop, forward) per state),
    with no rules."""
    return ContextMap(left=0, right=0, independent=[], independent_is_context=False,
                      models={name: Model(name, tuple(HmmState(*s) for s in states), i + 1)
                              for i, (name, states) in enumerate(models.items())},
                      rules=[], path="test.ctx")
