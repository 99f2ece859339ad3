"""The context transducer C: physical models in, phones out (the inverted C, delayed).

- `Window`: a raw phone window, ``left + (centre,) + right`` as on the phone tape.
- `build_context(contexts, cmap, phone_symbols, model_symbols)`: C over the windows
  that can occur, for any left and right widths.
- `window_models(windows, tying, cmap)`: raw windows -> model names, from the tying
  of their visible contexts (`netbuild.builders.contexts.tie_contexts`).

Orientation and delay. C is built *inverted*: its input labels are model ids and its
output labels phones, so it composes directly on the left of L∘G (C∘L∘G reads models
and writes words). A model needs the ``right`` phones after its centre, so C emits it
``right`` phones late: on reading (on its output side) phone ``p_t`` it writes (on its
input side) the model of the phone ``p_{t-right}``, whose left context is the
``left`` phones before that and whose right context ends with ``p_t``. The first
``right`` arcs of every path therefore have an epsilon input (nothing to emit yet), and
every path ends with ``right`` *flush* arcs with an epsilon output that emit the models
of the last ``right`` phones with the utterance edge ``$`` as their right context.
With ``right == 0`` there is no delay and no flush.

States. A state is ``(left, pending)``: the last ``left`` phones (raw, as on the
tape) and the ``right`` phones read but not yet emitted. The arc reading ``p`` from
``(left, pending)`` emits the model of the raw window ``left + pending + (p,)``; the
tying rules see it through `netbuild.builders.contexts.visible_context`, which is
where context-independent phones are hidden or shown to their neighbours. The start
state has edges ``$`` everywhere; flush states carry the edge in their pending part,
and one final state ends every flush. Word boundaries are invisible: cross-word
contexts are ordinary contexts.

Only windows that can occur are built: an arc exists when its window is a key of
`contexts` (`netbuild.builders.contexts.occurring_windows` lists them), and a warm-up
arc only when the phones read so far begin some window that starts at the utterance
edge. Each auxiliary marker of the phone table has a ``marker:marker`` self-loop on
every state, so the back-off and disambiguation markers of L∘G pass through C
unchanged and the later determinization still sees them.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping

import numpy as np
import pynini

from ..errors import StageError
from ..io.context_map import EDGE, ContextMap
from ..io.fstfile import arrays_to_fst
from ..symbols import is_auxiliary

__all__ = ["Window", "build_context", "window_models"]

Window = tuple[str, ...]


def window_models(windows: Iterable[Window], tying: Mapping[tuple, str],
                  cmap: ContextMap) -> dict[Window, str]:
    """Returns each raw window's model name: the model its visible context is tied to.

    Windows whose visible context is missing from `tying` (uncovered) are left out;
    the coverage check reports them before a build gets here.
    """
    from .contexts import visible_context

    out: dict[Window, str] = {}
    for w in windows:
        model = tying.get(visible_context(cmap, tuple(w)))
        if model is not None:
            out[tuple(w)] = model
    return out


def build_context(contexts: Mapping[Window, str], cmap: ContextMap,
                  phone_symbols: pynini.SymbolTable, model_symbols: pynini.SymbolTable
                  ) -> pynini.Fst:
    """Builds C (models in, phones out) over the windows that can occur.

    Constructively builds a new FST; orientation, delay, states and marker loops are
    described in the module docstring. The state space is explored from the start
    state, one arc per (state, next phone) whose window occurs; the arcs are collected
    in flat arrays and handed to `arrays_to_fst` in one call. The work is linear in
    the number of occurring windows (times the phones a window can end with).

    Args:
      contexts: every raw window that can occur (``cmap.left + 1 + cmap.right``
        tokens, phones or ``$``, centred on a phone) mapped to its model name; see
        `window_models`.
      cmap: the context map (widths, context-independent phones).
      phone_symbols: L's input table (phones, then the auxiliary markers).
      model_symbols: the model table (`netbuild.builders.hmm.make_model_symbols`).

    Returns:
      C, unweighted, arc-sorted on output labels, with `model_symbols` as input and
      `phone_symbols` as output symbols.

    Raises:
      StageError: a window has the wrong width or names a phone or model missing
        from the tables (a caller bug: the reader and the tying check these).
    """
    L, R = cmap.left, cmap.right
    n = L + 1 + R
    nexts: dict[Window, set[str]] = {}  # window[:-1] -> possible last tokens
    starts: set[Window] = set()  # beginnings window[L:L+k] of windows at the edge
    for w in contexts:
        if len(w) != n or w[L] == EDGE:
            raise StageError("context", f"window {w} is not {L} + 1 + {R} tokens centred "
                             "on a phone",
                             "this is a caller bug: enumerate windows with the map's widths")
        nexts.setdefault(w[:-1], set()).add(w[-1])
        if all(t == EDGE for t in w[:L]):
            for k in range(1, R + 1):
                starts.add(w[L:L + k])
    markers = [(model_symbols.find(name), phone_symbols.find(name))
               for _, name in phone_symbols if is_auxiliary(name)]

    def model_id(name: str) -> int:
        mid = model_symbols.find(name)
        if mid == pynini.NO_SYMBOL:
            raise StageError("context", f"model '{name}' is not in the model table",
                             "this is a caller bug: build the table from the same map")
        return mid

    def phone_id(name: str) -> int:
        pid = phone_symbols.find(name)
        if pid == pynini.NO_SYMBOL:
            raise StageError("context", f"phone '{name}' is not in the phone table",
                             "this is a caller bug: use L's phone table")
        return pid

    def emitted(window: Window) -> int | None:
        """Input label of the arc completing `window`: a model id, 0 during warm-up,
        None when the window cannot occur."""
        if window[L] == EDGE:  # warm-up: does a window at the edge begin like this?
            begun = tuple(t for t in window[L:] if t != EDGE)
            return 0 if begun in starts else None
        model = contexts.get(window)
        return None if model is None else model_id(model)

    begins: dict[Window, set[str]] = {}  # beginning -> the tokens that can follow it
    for b in starts:
        begins.setdefault(b[:-1], set()).add(b[-1])

    def candidates(left: Window, pending: Window) -> list[str]:
        if pending and pending[0] == EDGE:  # warm-up
            return sorted(begins.get(tuple(t for t in pending if t != EDGE), set()) - {EDGE})
        return sorted(nexts.get(left + pending, set()) - {EDGE})

    start = ((EDGE,) * L, (EDGE,) * R)
    ids: dict[tuple, int] = {start: 0}
    queue = [start]
    src: list[int] = []
    dst: list[int] = []
    ilab: list[int] = []
    olab: list[int] = []
    final_states: list[int] = [0]  # the empty phone sequence
    flushed: set[int] = set()  # flush states whose outgoing arc exists

    def state(key: tuple) -> int:
        sid = ids.get(key)
        if sid is None:
            sid = ids[key] = len(ids)
            queue.append(key)
        return sid

    while queue:
        key = queue.pop()
        if key[0] == "flush":
            continue  # flush states get their arc where they are made
        s = ids[key]
        left, pending = key
        for p in candidates(left, pending):
            window = left + pending + (p,)
            label = emitted(window)
            if label is None:
                continue
            centre = window[L]
            nleft = left if centre == EDGE else window[1:L + 1]
            src.append(s)
            dst.append(state((nleft, window[L + 1:])))
            ilab.append(label)
            olab.append(phone_id(p))
        if R == 0:
            final_states.append(s)
            continue
        if pending[-1] == EDGE:
            continue  # nothing read yet: the empty utterance is the start state's
        # Flush: emit the pending phones' models with the edge as right context. Flush
        # states are keyed by what is left to emit, so chains share their tails.
        chain: list[tuple[int, tuple]] = []
        cur_left, cur_pending = left, pending
        for i in range(R):
            window = cur_left + cur_pending + (EDGE,)
            label = 0 if window[L] == EDGE else contexts.get(window)
            if label is None:
                chain = []
                break
            if window[L] != EDGE:
                cur_left = window[1:L + 1]
            cur_pending = window[L + 1:]
            target = ("flush", "final") if i == R - 1 else ("flush", cur_left, cur_pending)
            chain.append((label if label == 0 else model_id(label), target))
        prev = s
        for mid, target in chain:
            if prev in flushed:
                break  # this tail is already built
            if prev != s:
                flushed.add(prev)
            nxt = state(target)
            src.append(prev)
            dst.append(nxt)
            ilab.append(mid)
            olab.append(0)
            prev = nxt
    num_states = len(ids)
    if ("flush", "final") in ids:
        final_states.append(ids[("flush", "final")])
    for mid, pid in markers:
        src.extend(range(num_states))
        dst.extend(range(num_states))
        ilab.extend([mid] * num_states)
        olab.extend([pid] * num_states)
    finals = np.full(num_states, np.inf, dtype=np.float32)
    finals[final_states] = 0.0
    fst = arrays_to_fst(num_states, 0, finals, np.array(src, dtype=np.int32),
                        np.array(ilab, dtype=np.int32), np.array(olab, dtype=np.int32),
                        np.zeros(len(src), dtype=np.float32), np.array(dst, dtype=np.int32),
                        isymbols=model_symbols, osymbols=phone_symbols)
    fst.arcsort(sort_type="olabel")
    return fst
