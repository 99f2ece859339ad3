"""C∘LG built directly from the arrays of C and of the word-level graph LG.

- `compose_context_arrays(c, lg)`: the arrays of the trimmed composition, or None when
  the inputs are not of the shape this construction relies on (then the caller
  composes with OpenFst).

Why it is a product walk. C (`netbuild.builders.context`) reads models and writes
phones; from each of its states at most one arc writes a given phone or marker, and
its only arcs that write nothing are the flush arcs at the end of an utterance. LG
reads phones and markers and never epsilon (the word-level pipeline leaves no input
epsilon: checked here). A state of C∘LG is then a pair (C state c, LG state q), and:

- for each LG arc ``q --x:w/a--> q'`` and the C arc ``c --m:x/b--> c'`` that writes x,
  the arc ``(c, q) --m:w/(a+b)--> (c', q')``;
- for each flush arc ``c --m:ε/b--> c'``, the arc ``(c, q) --m:ε/b--> (c', q)`` (C
  moves alone, as OpenFst's composition filter lets it when LG has no epsilon to
  match);
- (c, q) is final when both are, with the sum of their final weights.

With no input epsilon on LG there is no pair of epsilon moves for a composition
filter to choose between, so the accessible pairs and these arcs are exactly the
states and arcs of OpenFst's composition, up to numbering; trimming then keeps the
pairs from which a final pair is reachable, as ``compose(..., connect=True)`` does.
(tests/builders/test_context_compose.py compares the two with OpenFst's Isomorphic.)

The walk is breadth-first over the pairs in bulk: each round expands the new pairs'
LG arcs against a dense table of C's arcs by (state, written label) and looks the
destination pairs up among the pairs already found, kept as a few sorted runs of
integer keys (a back-off state of LG pairs with hundreds of C states, a state inside
a word with one or two).
"""

from __future__ import annotations

import numpy as np

from ..bulk import distinct_inverse, reachable
from ..io.fstfile import FstArrays

__all__ = ["compose_context_arrays"]

_MAX_TABLE = 50_000_000  # entries of C's dense (state, label) table


def _offsets(src: np.ndarray, n: int) -> np.ndarray:
    """First arc of each state (and the end) for arcs grouped by state."""
    out = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(np.bincount(src, minlength=n), out=out[1:])
    return out


def _expand(first: np.ndarray, count: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """For rows with `count` items starting at `first`: (row of each item, item index)."""
    total = int(count.sum())
    row = np.repeat(np.arange(count.shape[0]), count)
    starts = np.cumsum(count) - count
    return row, first[row] + (np.arange(total) - starts[row])


class _PairIndex:
    """Pair keys seen so far and their ids, as a few sorted runs (merged when a run is
    at least half the size of the one before it: each key is merged O(log n) times)."""

    def __init__(self) -> None:
        self.runs: list[tuple[np.ndarray, np.ndarray]] = []

    def find(self, key: np.ndarray) -> np.ndarray:
        """The id of each key, -1 where it is not known."""
        out = np.full(key.shape[0], -1, dtype=np.int32)
        for keys, ids in self.runs:
            at = np.minimum(np.searchsorted(keys, key), keys.shape[0] - 1)
            hit = keys[at] == key
            out[hit] = ids[at[hit]]
        return out

    def add(self, keys: np.ndarray, ids: np.ndarray) -> None:
        """Adds sorted, new `keys` with their `ids`."""
        if keys.shape[0] == 0:
            return
        self.runs.append((keys, ids))
        while len(self.runs) > 1 and 2 * self.runs[-1][0].shape[0] >= self.runs[-2][0].shape[0]:
            (newer_keys, newer_ids), (older_keys, older_ids) = self.runs.pop(), self.runs.pop()
            keys = np.concatenate([older_keys, newer_keys])
            ids = np.concatenate([older_ids, newer_ids])
            order = np.argsort(keys, kind="stable")
            self.runs.append((keys[order], ids[order]))


def compose_context_arrays(c: FstArrays, lg: FstArrays) -> FstArrays | None:
    """Returns the arrays of C∘LG trimmed (see module), arcs grouped by state and sorted
    by input label; None when LG has an input epsilon, C writes one label twice from a
    state, or C's table would be too large. An empty result
    has ``start == -1``."""
    if c.start < 0 or lg.start < 0 or (lg.ilabel == 0).any():
        return None
    nc, nq = c.num_states, lg.num_states
    writes = c.olabel > 0
    width = int(max(c.olabel.max(initial=0), lg.ilabel.max(initial=0))) + 1
    if nc * width > _MAX_TABLE:
        return None
    cell = c.src[writes].astype(np.int64) * width + c.olabel[writes]
    if np.unique(cell).shape[0] != cell.shape[0]:
        return None  # not one arc per (state, written label)
    c_next = np.full(nc * width, -1, dtype=np.int32)
    c_in = np.zeros(nc * width, dtype=np.int32)
    c_weight = np.zeros(nc * width, dtype=np.float32)
    c_next[cell] = c.dst[writes]
    c_in[cell] = c.ilabel[writes]
    c_weight[cell] = c.weight[writes]
    del cell
    flush = np.flatnonzero(~writes)  # grouped by state, as C's arcs are
    flush_first = _offsets(c.src[flush], nc)
    lg_first = _offsets(lg.src, nq)

    known = _PairIndex()
    known.add(np.array([lg.start * nc + c.start], dtype=np.int64), np.zeros(1, np.int32))
    pair_c = [np.array([c.start], dtype=np.int32)]
    pair_q = [np.array([lg.start], dtype=np.int32)]
    arcs: list[tuple[np.ndarray, ...]] = []
    front_c, front_q, front_id = pair_c[0], pair_q[0], np.zeros(1, dtype=np.int32)
    num_pairs = 1
    while front_id.shape[0]:
        # Matched arcs: every LG arc of each new pair against C's arc writing its label.
        row, e = _expand(lg_first[front_q], lg_first[front_q + 1] - lg_first[front_q])
        at = front_c[row].astype(np.int64) * width + lg.ilabel[e]
        nxt = c_next[at]
        ok = nxt >= 0
        row, e, at, nxt = row[ok], e[ok], at[ok], nxt[ok]
        m_src, m_dc, m_dq = front_id[row], nxt, lg.dst[e]
        m_il, m_ol = c_in[at], lg.olabel[e]
        m_w = lg.weight[e] + c_weight[at]
        # Flush arcs: C moves alone.
        row, f = _expand(flush_first[front_c], flush_first[front_c + 1] - flush_first[front_c])
        f = flush[f]
        src = np.concatenate([m_src, front_id[row]])
        dc = np.concatenate([m_dc, c.dst[f]])
        dq = np.concatenate([m_dq, front_q[row]])
        il = np.concatenate([m_il, c.ilabel[f]])
        ol = np.concatenate([m_ol, np.zeros(f.shape[0], dtype=np.int32)])
        w = np.concatenate([m_w, c.weight[f]])
        del row, e, at, nxt, ok, f, m_src, m_dc, m_dq, m_il, m_ol, m_w
        # Destinations already known, then the new ones (each once).
        key = dq.astype(np.int64) * nc + dc
        dst = known.find(key)
        missing = np.flatnonzero(dst < 0)
        new_keys, inverse = distinct_inverse(key[missing])
        count = new_keys.shape[0]
        new_q = (new_keys // nc).astype(np.int32)
        new_c = (new_keys % nc).astype(np.int32)
        new_id = np.arange(num_pairs, num_pairs + count, dtype=np.int32)
        dst[missing] = new_id[inverse]
        known.add(new_keys, new_id)
        del key, missing, inverse, new_keys
        arcs.append((src, il, ol, w.astype(np.float32), dst))
        pair_c.append(new_c)
        pair_q.append(new_q)
        num_pairs += count
        front_c, front_q, front_id = new_c, new_q, new_id
    del known, c_next, c_in, c_weight
    pc, pq = np.concatenate(pair_c), np.concatenate(pair_q)
    src, il, ol, w, dst = (np.concatenate(col) for col in zip(*arcs))
    del arcs, pair_c, pair_q
    finals = (c.final_weights[pc].astype(np.float64) + lg.final_weights[pq]).astype(np.float32)
    # Trim: keep the pairs from which a final pair is reachable (all are accessible).
    alive = reachable(num_pairs, dst, src, np.flatnonzero(np.isfinite(finals)))
    if not alive[0]:
        return FstArrays(0, -1, np.zeros(0, np.float32), *(np.zeros(0, np.int32),) * 3,
                         np.zeros(0, np.float32), np.zeros(0, np.int32),
                         isymbols=c.isymbols, osymbols=lg.osymbols, arc_type=lg.arc_type)
    renumber = np.cumsum(alive, dtype=np.int64) - 1
    keep = alive[src] & alive[dst]
    src, il, ol, w, dst = (x[keep] for x in (src, il, ol, w, dst))
    src = renumber[src]
    order = np.argsort(src << 32 | il.astype(np.int64), kind="stable")
    return FstArrays(
        num_states=int(alive.sum()), start=0, final_weights=finals[alive],
        src=src[order].astype(np.int32), ilabel=il[order].astype(np.int32),
        olabel=ol[order].astype(np.int32), weight=w[order],
        dst=renumber[dst[order]].astype(np.int32),
        isymbols=c.isymbols, osymbols=lg.osymbols, arc_type=lg.arc_type)
