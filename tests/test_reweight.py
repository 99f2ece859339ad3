"""Tropical distances to the final states and the weight push (netbuild.reweight).

Reference: OpenFst's ShortestDistance with reverse=True (fst/shortest-distance.h) for
the distances, and RandEquivalent (fst/randequivalent.h) for the pushed graphs.
"""

from __future__ import annotations

import numpy as np
import pynini
from hypothesis import given, settings
from hypothesis import strategies as st

from fst_helpers import connected_fst, fst_of_arrays

from netbuild.io.fstfile import FstArrays, arrays_to_fst, fst_to_arrays
from netbuild.reweight import distances_to_final, push_arrays


@st.composite
def graphs(draw):
    """Random FSTs with cycles, epsilon arcs and weights >= 0, connected."""
    ns = draw(st.integers(1, 9))
    arcs = []
    for s in range(ns):
        for _ in range(draw(st.integers(0, 3))):
            arcs.append((s, draw(st.integers(0, 3)), draw(st.integers(0, 2)),
                         draw(st.sampled_from([0.0, 0.25, 1.5, 3.0])),
                         draw(st.integers(0, ns - 1))))
    finals = [draw(st.sampled_from([np.inf, np.inf, 0.0, 0.75])) for _ in range(ns)]
    fst = connected_fst(ns, arcs, finals)
    return fst


def _openfst_distances(fst: pynini.Fst) -> np.ndarray:
    # reference: OpenFst ShortestDistance, reverse=True (fst/shortest-distance.h)
    d = [float(x) for x in pynini.shortestdistance(fst, reverse=True)]
    return np.array(d + [np.inf] * (fst.num_states() - len(d)))[:fst.num_states()]


@settings(max_examples=300, deadline=None)
@given(graphs())
def test_distances_match_openfst(fst):
    a = fst_to_arrays(fst)
    got = distances_to_final(a.num_states, a.src, a.dst, a.weight, a.final_weights)
    want = _openfst_distances(fst)
    assert got is not None
    assert np.array_equal(np.isinf(got), np.isinf(want))
    finite = np.isfinite(want)
    assert np.allclose(got[finite], want[finite], atol=1e-5)


@settings(max_examples=300, deadline=None)
@given(graphs())
def test_push_keeps_every_path_weight_and_zeroes_the_cheapest_way_out(fst):
    if fst.num_states() == 0:
        return
    a = fst_to_arrays(fst)
    d = distances_to_final(a.num_states, a.src, a.dst, a.weight, a.final_weights)
    pushed = push_arrays(a, d)
    # reference: OpenFst RandEquivalent (fst/randequivalent.h)
    assert pynini.randequivalent(fst_of_arrays(pushed), fst, npath=50, seed=3,
                                 max_length=25, delta=1e-4)
    # Every state but the start one now leaves at cost 0 by its cheapest way out.
    cheapest = pushed.final_weights.astype(np.float64).copy()
    np.minimum.at(cheapest, pushed.src, pushed.weight.astype(np.float64))
    others = np.arange(pushed.num_states) != pushed.start
    assert np.allclose(cheapest[others], 0.0, atol=1e-5)


def test_start_state_on_a_cycle_gets_a_new_start():
    # 0 -a/1-> 1 -b/2-> 0, 1 final at 0.5: arcs return to the start state.
    a = FstArrays(2, 0, np.array([np.inf, 0.5], dtype=np.float32),
                  np.array([0, 1], np.int32), np.array([1, 2], np.int32),
                  np.array([1, 2], np.int32), np.array([1.0, 2.0], np.float32),
                  np.array([1, 0], np.int32))
    d = distances_to_final(2, a.src, a.dst, a.weight, a.final_weights)
    assert d.tolist() == [1.5, 0.5]
    pushed = push_arrays(a, d)
    assert pushed.num_states == 3 and pushed.start == 2
    assert pynini.randequivalent(fst_of_arrays(pushed), fst_of_arrays(a), npath=30,
                                 seed=1, max_length=20, delta=1e-5)


def test_a_negative_cycle_gives_none():
    # 0 -a/-1-> 1 -b/0-> 0, 1 final: going round lowers the cost without end.
    got = distances_to_final(2, np.array([0, 1]), np.array([1, 0]),
                             np.array([-1.0, 0.0]), np.array([np.inf, 0.0]),
                             max_passes=100)
    assert got is None


def test_unreachable_final_is_infinite():
    got = distances_to_final(3, np.array([0, 1]), np.array([1, 0]),
                             np.array([1.0, 1.0]), np.array([np.inf, np.inf, 0.0]))
    assert np.isinf(got[0]) and np.isinf(got[1]) and got[2] == 0.0


def _complete_outputs(a: FstArrays, state: int, depth: int = 12) -> list[tuple[int, ...]]:
    """Every output string (epsilons dropped) of a complete path from `state`, by plain
    enumeration (the graphs here are acyclic)."""
    found = []
    if np.isfinite(a.final_weights[state]):
        found.append(())
    if depth == 0:
        return found
    for e in np.flatnonzero(a.src == state).tolist():
        head = (int(a.olabel[e]),) if a.olabel[e] else ()
        found += [head + rest for rest in _complete_outputs(a, int(a.dst[e]), depth - 1)]
    return found


@st.composite
def acyclic_transducers(draw):
    """Random connected DAGs (arcs go to higher states) with few output labels."""
    ns = draw(st.integers(2, 8))
    arcs = []
    for s in range(ns - 1):
        for _ in range(draw(st.integers(1, 3))):
            arcs.append((s, draw(st.integers(1, 3)), draw(st.sampled_from([0, 0, 1, 2])),
                         draw(st.sampled_from([0.0, 0.5])), draw(st.integers(s + 1, ns - 1))))
    finals = [draw(st.sampled_from([np.inf, np.inf, 0.0])) for _ in range(ns - 1)] + [0.0]
    src, il, ol, w, dst = (np.array(c) for c in zip(*arcs))
    fst = arrays_to_fst(ns, 0, np.array(finals, dtype=np.float32), src.astype(np.int32),
                        il.astype(np.int32), ol.astype(np.int32), w.astype(np.float32),
                        dst.astype(np.int32))
    fst.connect()
    return fst


def _with_pairs_split(a: FstArrays, second: np.ndarray) -> pynini.Fst:
    """The FST of `a` with each arc that writes two labels made two arcs."""
    pair = np.flatnonzero(second != 0)
    k = pair.shape[0]
    new = np.arange(a.num_states, a.num_states + k, dtype=np.int32)
    dst = a.dst.copy()
    dst[pair] = new
    return arrays_to_fst(
        a.num_states + k, a.start,
        np.concatenate([a.final_weights, np.full(k, np.inf, np.float32)]),
        np.concatenate([a.src, new]), np.concatenate([a.ilabel, np.zeros(k, np.int32)]),
        np.concatenate([a.olabel, second[pair]]),
        np.concatenate([a.weight, np.zeros(k, np.float32)]),
        np.concatenate([dst, a.dst[pair]]))


@settings(max_examples=300, deadline=None)
@given(acyclic_transducers())
def test_output_potentials_are_the_common_first_word_of_every_way_out(fst):
    from netbuild.reweight import output_label_potentials

    a = fst_to_arrays(fst)
    if a.num_states == 0:
        return
    p = output_label_potentials(a)
    for s in range(a.num_states):
        outs = _complete_outputs(a, s)  # reference: enumeration of the paths
        firsts = {o[0] if o else 0 for o in outs}
        common = next(iter(firsts)) if len(firsts) == 1 else 0
        expected = 0 if s == a.start else common
        assert p[s] == expected, (s, outs)


@settings(max_examples=300, deadline=None)
@given(st.one_of(acyclic_transducers(), graphs()))
def test_pushing_output_labels_keeps_the_relation(fst):
    from netbuild.reweight import push_output_labels

    a = fst_to_arrays(fst)
    if a.num_states == 0:
        return
    pushed, second = push_output_labels(a)
    assert np.array_equal(pushed.ilabel, a.ilabel) and np.array_equal(pushed.dst, a.dst)
    # reference: OpenFst RandEquivalent (fst/randequivalent.h)
    assert pynini.randequivalent(_with_pairs_split(pushed, second), fst, npath=50,
                                 seed=9, max_length=25, delta=1e-5)
