"""Tropical distances to the final states and the weight push they give, in bulk.

- `distances_to_final(num_states, src, dst, weight, final)`: each state's cheapest
  (tropical) way to a final state, or None when there is a cycle of negative weight.
- `push_arrays(arcs, potentials)`: the arcs reweighted toward the start state.

Both serve the word level (`netbuild.lextree` pushes det(L∘G) with distances worked
out on G's states) and the model level of the full graph (`netbuild.full_pipeline`
pushes before minimizing, so that states whose futures differ only in where the
weight sits become equal).
"""

from __future__ import annotations

import dataclasses

import numpy as np

from .io.fstfile import FstArrays

__all__ = ["distances_to_final", "push_arrays"]


def distances_to_final(num_states: int, src: np.ndarray, dst: np.ndarray,
                       weight: np.ndarray, final: np.ndarray,
                       max_passes: int = 5000) -> np.ndarray | None:
    """Each state's tropical distance to the final states (inf: none reachable).

    Bellman-Ford in bulk (float64), each pass looking only at the arcs into the states
    whose distance the last pass lowered (on the 20k / 1M model-level graph, 2.2M
    states and 4.9M arcs: 52 passes, 1.5 s against 5.9 s for passes over every arc).
    None when the passes do not settle within `max_passes` (a cycle of negative
    weight, or a graph whose shortest paths are longer than that).
    """
    src = np.asarray(src, dtype=np.int64)
    dst = np.asarray(dst, dtype=np.int64)
    weight = np.asarray(weight, dtype=np.float64)
    v = np.asarray(final, dtype=np.float64).copy()
    if len(src) == 0:
        return v
    into = np.argsort(dst, kind="stable")  # the arcs grouped by destination
    first_into = np.searchsorted(dst[into], np.arange(num_states + 1))
    changed = np.flatnonzero(np.isfinite(v))
    for _ in range(max_passes):
        if changed.shape[0] == 0:
            return v
        lo, hi = first_into[changed], first_into[changed + 1]
        count = hi - lo
        total = int(count.sum())
        if total == 0:
            return v
        arcs = into[np.repeat(lo - np.cumsum(count) + count, count) + np.arange(total)]
        offer = weight[arcs] + v[dst[arcs]]
        owner = src[arcs]
        better = offer < v[owner]
        if not better.any():
            return v
        owner, offer = owner[better], offer[better]
        best = np.full(num_states, np.inf)
        np.minimum.at(best, owner, offer)
        changed = np.flatnonzero(best < v)
        v[changed] = best[changed]
    return None


def push_arrays(arcs: FstArrays, potentials: np.ndarray) -> FstArrays:
    """Constructively reweights `arcs` toward the start state with `potentials`.

    Arcs become w + V(next) - V(state), finals f - V(state); V(start) goes back onto the
    start state's arcs and final weight (onto a new start state's copies of them when
    arcs return to the start), so every complete path keeps its weight. With V the
    distances to the final states (tropical), each state's cheapest way out then costs
    0. The arcs stay grouped by state (a new start state comes last); the label tables
    are kept.
    """
    src, dst = arcs.src.astype(np.int64), arcs.dst.astype(np.int64)
    v = np.where(np.isfinite(potentials), potentials, 0.0)
    w = arcs.weight.astype(np.float64) + v[dst] - v[src]
    final = arcs.final_weights.astype(np.float64)
    final = np.where(np.isfinite(final), final - v, np.inf)
    s = arcs.start
    il, ol, num_states = arcs.ilabel, arcs.olabel, arcs.num_states
    if s >= 0 and np.any(dst == s):
        # Arcs come back to the start state, so V(start) cannot go onto its arcs (each
        # return would pay it again): a new start state gets copies of them instead.
        out = np.flatnonzero(src == s)
        num_states += 1
        src = np.concatenate([src, np.full(len(out), num_states - 1)])
        il, ol = np.concatenate([il, il[out]]), np.concatenate([ol, ol[out]])
        w = np.concatenate([w, w[out] + v[s]])
        dst = np.concatenate([dst, dst[out]])
        final = np.concatenate([final, [final[s] + v[s]]])
        s = num_states - 1
    elif s >= 0:
        w[src == s] += v[s]
        if np.isfinite(final[s]):
            final[s] += v[s]
    w[np.abs(w) < 1e-6] = 0.0  # rounding noise where the cheapest way out is taken
    return dataclasses.replace(
        arcs, num_states=num_states, start=s, final_weights=final.astype(np.float32),
        src=src.astype(np.int32), ilabel=il.astype(np.int32), olabel=ol.astype(np.int32),
        weight=w.astype(np.float32), dst=dst.astype(np.int32))
