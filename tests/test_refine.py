"""Encoded minimization by partition refinement (netbuild.refine) against OpenFst.

Reference: OpenFst's Minimize of the encoded acceptor (fst/minimize.h, fst/encode.h),
compared with OpenFst's Isomorphic (fst/isomorphic.h) where the input is deterministic
as an encoded acceptor (its minimum is then unique up to state numbering), and with
RandEquivalent (fst/randequivalent.h) and the state count everywhere.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pynini
from hypothesis import given, settings
from hypothesis import strategies as st

from fst_helpers import connected_fst, fst_of_arrays, openfst_encoded_minimum

from netbuild.io.fstfile import FstArrays, arrays_to_fst, fst_to_arrays
from netbuild.refine import minimize_arrays


@st.composite
def graphs(draw):
    """Random FSTs with repeated shapes (few labels and weights), so that many states
    are equivalent; `deterministic` keeps one arc per (input, output, weight) code."""
    deterministic = draw(st.booleans())
    ns = draw(st.integers(1, 8))
    code = st.tuples(st.integers(0, 2), st.integers(0, 1), st.sampled_from([0.0, 0.5]))
    arcs = []
    for s in range(ns):
        codes = draw(st.lists(code, max_size=3, unique=deterministic))
        arcs += [(s, *c, draw(st.integers(0, ns - 1))) for c in codes]
    finals = [draw(st.sampled_from([np.inf, 0.0, 0.25])) for _ in range(ns)]
    fst = connected_fst(ns, arcs, finals)
    return fst, deterministic


@settings(max_examples=300, deadline=None)
@given(graphs())
def test_refinement_matches_openfst(case):
    fst, deterministic = case
    got = fst_of_arrays(minimize_arrays(fst_to_arrays(fst)))
    want = openfst_encoded_minimum(fst)
    if fst.num_states() == 0:
        assert got.num_states() == 0
        return
    # reference: OpenFst RandEquivalent (fst/randequivalent.h)
    assert pynini.randequivalent(got, fst, npath=50, seed=4, max_length=25, delta=1e-6)
    if deterministic:
        # reference: OpenFst Isomorphic (fst/isomorphic.h)
        assert pynini.isomorphic(got, want, delta=1e-6)
    else:
        # Duplicated arcs count here, not in OpenFst's merge: never coarser than it.
        assert got.num_states() >= want.num_states()


def test_keeps_arc_order_and_the_first_state_of_each_class():
    # 0 -a-> 1, 0 -b-> 2; 1 and 2 both final with one arc c to 3; 3 final.
    a = FstArrays(4, 0, np.array([np.inf, 0, 0, 0], dtype=np.float32),
                  np.array([0, 0, 1, 2], dtype=np.int32), np.array([1, 2, 3, 3], np.int32),
                  np.array([0, 0, 0, 0], np.int32), np.zeros(4, np.float32),
                  np.array([1, 2, 3, 3], np.int32))
    m = minimize_arrays(a)
    assert m.num_states == 3
    assert list(zip(m.src.tolist(), m.ilabel.tolist(), m.dst.tolist())) == \
        [(0, 1, 1), (0, 2, 1), (1, 3, 2)]


@settings(max_examples=200, deadline=None)
@given(graphs(), st.integers(0, 2**31 - 1))
def test_quantum_merges_what_rounding_noise_kept_apart(case, seed):
    """Noise far below the quantum on every weight: the quantized refinement finds the
    classes of the noise-free graph; exact comparison may not."""
    fst, _ = case
    if fst.num_states() == 0:
        return
    clean = fst_to_arrays(fst)
    rng = np.random.default_rng(seed)
    noisy = dataclasses.replace(
        clean,
        weight=(clean.weight + rng.uniform(-1e-6, 1e-6, clean.weight.shape)
                ).astype(np.float32),
        final_weights=(clean.final_weights.astype(np.float64)
                       + rng.uniform(-1e-6, 1e-6, clean.num_states)).astype(np.float32))
    got = minimize_arrays(noisy, quantum=1e-4)
    assert got.num_states == minimize_arrays(clean).num_states
    # reference: OpenFst RandEquivalent (fst/randequivalent.h); the representatives'
    # weights stand for their classes, so costs move by at most 2e-6 per arc
    assert pynini.randequivalent(fst_of_arrays(got), fst, npath=50, seed=5,
                                 max_length=25, delta=1e-4)


def test_quantum_zero_compares_bit_for_bit():
    # 0 -a/0.5-> 1 and 0 -b/0.5-> 2; 1 final at 0.0, 2 final at 1e-6.
    a = FstArrays(3, 0, np.array([np.inf, 0.0, 1e-6], dtype=np.float32),
                  np.array([0, 0], np.int32), np.array([1, 2], np.int32),
                  np.array([0, 0], np.int32), np.array([0.5, 0.5], np.float32),
                  np.array([1, 2], np.int32))
    assert minimize_arrays(a).num_states == 3
    assert minimize_arrays(a, quantum=1e-4).num_states == 2
    assert minimize_arrays(a, quantum=1e-7).num_states == 3
