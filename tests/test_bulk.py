"""Bulk helpers (netbuild.bulk) against plain numpy and plain Python."""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from netbuild.bulk import reachable, stable_order


@settings(max_examples=200)
@given(st.lists(st.integers(0, 2**31 - 1) | st.integers(0, 5) | st.integers(0, 2**62),
                max_size=200))
def test_stable_order_is_numpys_stable_argsort(keys):
    # (keys up to 2**62: those too wide to pack with their position take numpy's path)
    a = np.array(keys, dtype=np.int64)
    # reference: numpy's own stable argsort
    assert stable_order(a).tolist() == np.argsort(a, kind="stable").tolist()


@settings(max_examples=200)
@given(st.integers(1, 12).flatmap(lambda n: st.tuples(
    st.just(n), st.lists(st.tuples(st.integers(0, n - 1), st.integers(0, n - 1)),
                         max_size=30), st.integers(0, n - 1))))
def test_reachable_matches_a_plain_search(case):
    n, edges, seed = case
    src = np.array([e[0] for e in edges], dtype=np.int32)
    dst = np.array([e[1] for e in edges], dtype=np.int32)
    got = reachable(n, src, dst, np.array([seed])).nonzero()[0].tolist()
    # reference: depth-first search in plain Python
    seen, stack = {seed}, [seed]
    while stack:
        u = stack.pop()
        for a, b in edges:
            if a == u and b not in seen:
                seen.add(b)
                stack.append(b)
    assert got == sorted(seen)


def test_weight_keys_round_to_the_quantum_and_keep_infinity_apart():
    from netbuild.bulk import weight_bits, weight_keys

    w = np.array([0.0, -0.0, 0.50004, 0.49996, 0.5003, np.inf], dtype=np.float32)
    assert np.array_equal(weight_keys(w), weight_bits(w))
    k = weight_keys(w, 1e-4)
    assert k[0] == k[1] and k[2] == k[3] != k[4]
    assert k[5] not in k[:5]
