"""Small FST and context-map helpers shared by the tests."""

from __future__ import annotations

import pynini

from netbuild.io.context_map import ContextMap, HmmState, Model


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


def monophone_map(models: dict[str, list[tuple[int, float, float]]]) -> ContextMap:
    """A 0/0 context map of the given models ((class, self-loop, forward) per state),
    with no rules."""
    return ContextMap(left=0, right=0, independent=[], independent_is_context=False,
                      models={name: Model(name, tuple(HmmState(*s) for s in states), i + 1)
                              for i, (name, states) in enumerate(models.items())},
                      rules=[], path="test.ctx")
