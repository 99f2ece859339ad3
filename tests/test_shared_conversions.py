"""Conversions shared within a pipeline stage, and the bulk input-epsilon cycle test.

Both are speed changes; these tests pin down that they give the same answers as the
plain code paths.
"""

from __future__ import annotations

import networkx as nx
import numpy as np
import pynini
import pytest

from netbuild.checks import has_input_epsilon_cycle
from netbuild.io.fstfile import (arrays_to_fst, fst_to_arrays, shared_arrays,
                                 shared_conversions)
from netbuild.pipeline import num_arcs


def _random_fst(rng: np.random.Generator, n: int, m: int, labels: int = 3) -> pynini.Fst:
    src, dst = rng.integers(0, n, m), rng.integers(0, n, m)
    lab = rng.integers(0, labels, m)
    return arrays_to_fst(n, 0, np.zeros(n, np.float32), src, lab, lab,
                         rng.random(m).astype(np.float32), dst)


def test_conversion_is_shared_inside_a_block_only():
    f = pynini.accep("abc")
    with shared_conversions():
        a = fst_to_arrays(f)
        assert fst_to_arrays(f) is a
        assert shared_arrays(f) is a
        with pytest.raises(ValueError):
            a.ilabel[0] = 7  # shared arrays are read-only
    assert shared_arrays(f) is None
    b = fst_to_arrays(f)
    assert b is not a and b.ilabel.flags.writeable
    assert np.array_equal(a.ilabel, b.ilabel)


def test_changed_fst_is_converted_again():
    f = pynini.accep("ab") | pynini.accep("ba")
    g = pynini.accep("cd")
    with shared_conversions():
        before = fst_to_arrays(f)
        f.add_state()  # a new state changes the fingerprint
        after = fst_to_arrays(f)
        assert after is not before and after.num_states == before.num_states + 1
        assert fst_to_arrays(g) is not fst_to_arrays(f)


def test_num_arcs_uses_the_shared_conversion_and_agrees():
    f = _random_fst(np.random.default_rng(1), 30, 200)
    plain = sum(f.num_arcs(s) for s in f.states())
    with shared_conversions():
        fst_to_arrays(f)
        assert num_arcs(f) == plain == 200
    assert num_arcs(f) == plain


def test_input_epsilon_cycle_test_agrees_with_networkx():
    # reference: networkx.is_directed_acyclic_graph on the input-epsilon arcs
    rng = np.random.default_rng(0)
    found = 0
    for _ in range(300):
        n, m = int(rng.integers(1, 12)), int(rng.integers(0, 25))
        f = _random_fst(rng, n, m)
        a = fst_to_arrays(f)
        graph = nx.DiGraph()
        graph.add_nodes_from(range(n))
        eps = a.ilabel == 0
        graph.add_edges_from(zip(a.src[eps].tolist(), a.dst[eps].tolist()))
        expected = not nx.is_directed_acyclic_graph(graph)
        cycle = has_input_epsilon_cycle(f)
        assert bool(cycle) == expected
        if cycle:
            found += 1
            # The reported states lie on a cycle of input-epsilon arcs.
            assert all(graph.has_edge(u, v) for u, v in zip(cycle, cycle[1:] + cycle[:1]))
    assert 30 < found < 270  # both outcomes were exercised
