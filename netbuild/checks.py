"""Invariants run after every stage of the word-level pipeline.

- `CheckContext`: what a check needs to know besides the FST (stage, tables, L and G).
- `check_nonempty`, `check_connected`, `check_input_deterministic`,
  `check_no_input_epsilon_cycles`, `check_labels`: structural invariants.
- `check_words_reachable`, `check_backoff_passthrough`, `check_homophones`: invariants
  whose failure is traced to the inputs (lexicon or model).
- `unmarked_homophones(lfst, ...)`, `unmarked_prefixes(...)`, `lexicon_pronunciations(lfst)`:
  cheap analyses of the lexicon transducer used by the checks and the determinization guard.
- `has_input_epsilon_cycle(fst)`: True when input-epsilon arcs form a cycle.
- `check_no_auxiliary_markers`, `check_emission_inputs`, `check_word_outputs`,
  `stochasticity_deviation(fst)`: checks and a measure for the full graph H∘C∘L∘G.

A failed check stops the build. When the cause is in the inputs it raises an
`InputCheckFailed` (or `EmptyCompositionError`) whose message names the likely input and
the fix; otherwise it raises `CheckFailed`, which says it is a netbuild bug and saves the
offending FST and a small DOT drawing in a temporary directory named in the message.
"""

from __future__ import annotations

import dataclasses
import os
import tempfile
from collections.abc import Iterable

import networkx as nx
import numpy as np
import pynini
import pywrapfst

from .errors import CheckFailed, EmptyCompositionError, InputCheckFailed
from .io.fstfile import FstArrays, arrays_to_fst, as_fst, fst_to_arrays, shared_arrays
from .symbols import BACKOFF, is_auxiliary
from .bulk import reachable, unique_sorted

_MAX_NAMED = 8  # words listed in one message; the rest are counted

# Stages whose FSTs come straight from the inputs: a failure there is the inputs' fault.
INPUT_STAGES = ("lexicon", "grammar")


@dataclasses.dataclass(frozen=True)
class CheckContext:
    """What the checks of one stage need besides the FST itself.

    `isymbols`/`osymbols` are the tables the FST's labels must belong to (None: not
    checked). `output_aux_allowed` is True only for L, whose back-off self-loop writes the
    back-off marker on its output side. `lfst`/`gfst` are the pipeline's inputs, used to
    trace a failure to its likely input cause.
    """

    stage: str
    isymbols: pynini.SymbolTable | None = None
    osymbols: pynini.SymbolTable | None = None
    output_aux_allowed: bool = False
    lfst: pynini.Fst | None = None
    gfst: pynini.Fst | None = None


# ----------------------------------------------------------------------------- evidence


def _subgraph(fst: pynini.Fst, focus: Iterable[int], max_states: int = 40) -> pynini.Fst:
    """Returns the states within a few arcs of `focus` (breadth first) as a new FST."""
    keep: dict[int, int] = {}
    queue = [s for s in focus if 0 <= s < fst.num_states()] or [max(fst.start(), 0)]
    sub = pynini.Fst(arc_type=fst.arc_type())
    while queue and len(keep) < max_states:
        s = queue.pop(0)
        if s in keep:
            continue
        keep[s] = sub.add_state()
        queue.extend(a.nextstate for a in fst.arcs(s))
    for s, t in keep.items():
        sub.set_final(t, fst.final(s))
        for a in fst.arcs(s):
            if a.nextstate in keep:
                sub.add_arc(t, pynini.Arc(a.ilabel, a.olabel, a.weight, keep[a.nextstate]))
    if fst.start() in keep:
        sub.set_start(keep[fst.start()])
    elif keep:
        sub.set_start(next(iter(keep.values())))
    return sub


def save_evidence(fst: pynini.Fst, stage: str, focus: Iterable[int] = ()) -> str:
    """Saves `fst` (binary) and a small DOT drawing around `focus`; returns the directory."""
    fst = as_fst(fst)  # (an ArrayFst is built once, not once per state looked at)
    where = tempfile.mkdtemp(prefix=f"netbuild-{stage}-")
    fst.write(os.path.join(where, f"{stage}.fst"))
    small = fst if fst.num_states() <= 40 else _subgraph(fst, focus)
    small.draw(os.path.join(where, f"{stage}.dot"), isymbols=fst.input_symbols(),
               osymbols=fst.output_symbols(), portrait=True, acceptor=False)
    return where


def _internal(fst: pynini.Fst, ctx: CheckContext, message: str,
              focus: Iterable[int] = ()) -> CheckFailed:
    try:
        evidence = save_evidence(fst, ctx.stage, focus)
    except (OSError, pywrapfst.FstError) as err:  # the report matters more than the file
        evidence = f"<not saved: {err}>"
    return CheckFailed(ctx.stage, message, evidence)


def _word_list(words: list[str]) -> str:
    shown = ", ".join(repr(w) for w in words[:_MAX_NAMED])
    more = len(words) - _MAX_NAMED
    return shown + (f" and {more} more" if more > 0 else "")


# ------------------------------------------------------------------- structural checks


_CONNECTED_BITS = pywrapfst.ACCESSIBLE | pywrapfst.COACCESSIBLE
_CONNECTIVITY_MASK = _CONNECTED_BITS | pywrapfst.NOT_ACCESSIBLE | pywrapfst.NOT_COACCESSIBLE


def _store_connectivity(fst: pynini.Fst) -> None:
    """Works out ACCESSIBLE / COACCESSIBLE in bulk from the FST's shared array
    conversion, when one is open, and stores the bits on the FST (OpenFst's own
    `properties(..., True)` would search depth first over the FST instead, about 1 s on
    a 1.7M-state graph). Without shared arrays it does nothing."""
    arrays = shared_arrays(fst)
    if arrays is None or fst.start() == pynini.NO_STATE_ID or arrays.num_states == 0 \
            or not hasattr(fst, "set_properties"):
        return
    known = fst.properties(_CONNECTIVITY_MASK, False)
    if known & (pywrapfst.ACCESSIBLE | pywrapfst.NOT_ACCESSIBLE) and \
            known & (pywrapfst.COACCESSIBLE | pywrapfst.NOT_COACCESSIBLE):
        return
    n = arrays.num_states
    forward = reachable(n, arrays.src, arrays.dst, np.array([fst.start()]))
    backward = reachable(n, arrays.dst, arrays.src,
                         np.flatnonzero(np.isfinite(arrays.final_weights)))
    bits = (pywrapfst.ACCESSIBLE if forward.all() else pywrapfst.NOT_ACCESSIBLE) | \
        (pywrapfst.COACCESSIBLE if backward.all() else pywrapfst.NOT_COACCESSIBLE)
    fst.set_properties(bits, _CONNECTIVITY_MASK)


def check_nonempty(fst: pynini.Fst, ctx: CheckContext) -> None:
    """Raises unless `fst` has a start state and at least one successful path."""
    _store_connectivity(fst)
    if fst.start() != pynini.NO_STATE_ID and fst.num_states() > 0:
        if fst.properties(pywrapfst.COACCESSIBLE, True) == pywrapfst.COACCESSIBLE:
            return  # every state reaches a final state, the start state included
        dist = pynini.shortestdistance(fst, reverse=True)
        if len(dist) > fst.start() and float(dist[fst.start()]) != float("inf"):
            return
    if ctx.stage == "grammar":
        raise InputCheckFailed(
            "grammar", "the language model accepts no sentence",
            "check that the model has unigrams for its words and for </s>")
    if ctx.stage == "lexicon":
        raise InputCheckFailed(
            "lexicon", "the lexicon transducer accepts no phone sequence",
            "check that the lexicon has at least one word with phones")
    if ctx.stage in ("compose", "compose-determinize"):
        raise EmptyCompositionError(
            ctx.stage, "L∘G has no path: no word of the lexicon occurs in the model",
            "check that the lexicon and the language model use the same word spellings")
    raise _internal(fst, ctx, "the FST has no successful path")


def check_connected(fst: pynini.Fst, ctx: CheckContext) -> None:
    """Raises unless every state is accessible and coaccessible (OpenFst property bits)."""
    want = pywrapfst.ACCESSIBLE | pywrapfst.COACCESSIBLE
    _store_connectivity(fst)
    if fst.num_states() == 0 or fst.properties(want, True) == want:
        return
    acc = fst.properties(pywrapfst.ACCESSIBLE, True) == pywrapfst.ACCESSIBLE
    which = "coaccessible (some states never reach a final state)" if acc else \
        "accessible (some states cannot be reached from the start state)"
    if ctx.stage == "grammar":
        raise InputCheckFailed(
            "grammar", f"the language model transducer is not {which}",
            "check the model for n-grams whose history (the n-gram without its last "
            "word) is missing, and that </s> has a probability")
    if ctx.stage == "lexicon":
        raise InputCheckFailed(
            "lexicon", f"the lexicon transducer is not {which}",
            "check the lexicon for pronunciations that do not return to the word "
            "boundary")
    raise _internal(fst, ctx, f"the FST is not {which}")


def check_input_deterministic(fst: pynini.Fst, ctx: CheckContext) -> None:
    """Raises unless no state has two arcs with the same input label."""
    if fst.properties(pywrapfst.I_DETERMINISTIC, True) == pywrapfst.I_DETERMINISTIC:
        return
    arcs = fst_to_arrays(fst)
    key = arcs.src.astype(np.int64) << 32 | arcs.ilabel.astype(np.int64)
    uniq, counts = np.unique(key, return_counts=True)
    focus = [int(k >> 32) for k in uniq[counts > 1][:3]]
    raise _internal(fst, ctx, f"the FST is not input-deterministic (state {focus[0]} has "
                    "two arcs with the same input label)" if focus else
                    "the FST is not input-deterministic", focus)


def has_input_epsilon_cycle(fst: pynini.Fst, arcs: FstArrays | None = None) -> list[int]:
    """Returns the states of one cycle of input-epsilon arcs, or [] when there is none.

    Only the (usually few) input-epsilon arcs are looked at: the graph they form is
    tested for acyclicity with networkx.
    """
    if fst.properties(pywrapfst.I_EPSILONS, True) != pywrapfst.I_EPSILONS:
        return []
    arcs = arcs or fst_to_arrays(fst)
    eps = arcs.ilabel == 0
    if not eps.any():
        return []
    # OpenFst's cyclicity test over the input-epsilon arcs alone runs in C++; networkx
    # (a Python graph, slow and large for millions of arcs) only locates a cycle found.
    n_eps = int(eps.sum())
    sub = arrays_to_fst(arcs.num_states, 0, np.full(arcs.num_states, np.inf, np.float32),
                        arcs.src[eps], np.zeros(n_eps, np.int32), np.zeros(n_eps, np.int32),
                        np.zeros(n_eps, np.float32), arcs.dst[eps])
    if sub.properties(pywrapfst.CYCLIC, True) != pywrapfst.CYCLIC:
        return []
    del sub
    graph = nx.DiGraph()
    graph.add_edges_from(zip(arcs.src[eps].tolist(), arcs.dst[eps].tolist()))
    try:
        cycle = nx.find_cycle(graph)
    except nx.NetworkXNoCycle:
        return []
    return [u for u, _ in cycle]


def check_no_input_epsilon_cycles(fst: pynini.Fst, ctx: CheckContext) -> None:
    """Raises when input-epsilon arcs form a cycle (such FSTs cannot be determinized)."""
    cycle = has_input_epsilon_cycle(fst)
    if not cycle:
        return
    if ctx.stage in INPUT_STAGES or ctx.stage == "compose":
        raise InputCheckFailed(
            ctx.stage, f"arcs with no input label form a cycle through states {cycle[:6]}",
            "the back-off arcs of the model probably carry epsilon instead of the "
            f"back-off marker {BACKOFF!r}, or the lexicon lacks its back-off "
            "pass-through; rebuild G and L with netbuild's builders")
    raise _internal(fst, ctx, f"input-epsilon arcs form a cycle through states {cycle[:6]}",
                    cycle)


def _out_of_table(labels: np.ndarray, table: pynini.SymbolTable) -> list[int]:
    uniq = unique_sorted(labels)
    if uniq.size == 0:
        return []
    bad = uniq[(uniq < 0) | (uniq >= table.available_key())].tolist()
    inside = uniq[(uniq >= 0) & (uniq < table.available_key())].tolist()
    return bad + [x for x in inside if not table.member(x)]


def check_labels(fst: pynini.Fst, ctx: CheckContext) -> None:
    """Raises when a label is outside its symbol table, or a marker is on the output side."""
    if ctx.isymbols is None and ctx.osymbols is None:
        return
    arcs = fst_to_arrays(fst)
    for side, labels, table in (("input", arcs.ilabel, ctx.isymbols),
                                ("output", arcs.olabel, ctx.osymbols)):
        if table is None:
            continue
        bad = _out_of_table(labels, table)
        if bad:
            focus = arcs.src[np.isin(labels, bad)][:3].tolist()
            raise _internal(fst, ctx, f"{side} labels {bad[:6]} are not in the "
                            f"{side} symbol table {table.name()!r} "
                            f"({table.num_symbols()} symbols)", focus)
    if ctx.osymbols is not None and not ctx.output_aux_allowed:
        aux = [k for k, s in ctx.osymbols if is_auxiliary(s)]
        on_output = np.isin(arcs.olabel, aux)
        if on_output.any():
            names = sorted({ctx.osymbols.find(int(k)) for k in arcs.olabel[on_output][:20]})
            raise _internal(fst, ctx, f"auxiliary markers {names} appear on the output "
                            "side", arcs.src[on_output][:3].tolist())


# ------------------------------------------------------------- checks traced to inputs


def lexicon_pronunciations(lfst: pynini.Fst,
                           arcs: FstArrays | None = None) -> dict[int, set[tuple[int, ...]]]:
    """Returns, for each word label of L, the input label sequences that spell it.

    L outputs each word on the first arc of its pronunciation. A pronunciation is read
    from that arc along output-epsilon arcs up to the next state that starts a word (or
    is final); input epsilons are dropped. Optional silence after a word therefore gives
    two sequences, with and without it. The back-off marker's arcs are skipped.
    """
    arcs = arcs or fst_to_arrays(lfst)
    isyms, osyms = lfst.input_symbols(), lfst.output_symbols()
    in_backoff = isyms.find(BACKOFF) if isyms is not None else -1
    out_backoff = osyms.find(BACKOFF) if osyms is not None else -1
    word_arc = (arcs.olabel != 0) & (arcs.olabel != out_backoff)
    boundary = np.zeros(arcs.num_states, dtype=bool)
    boundary[arcs.src[word_arc]] = True
    boundary[np.isfinite(arcs.final_weights)] = True
    order = np.argsort(arcs.src, kind="stable")
    first = np.searchsorted(arcs.src[order], np.arange(arcs.num_states + 1))
    ilab, olab, dst = arcs.ilabel.tolist(), arcs.olabel.tolist(), arcs.dst.tolist()
    is_boundary = boundary.tolist()
    first_l = first.tolist()
    out: dict[int, set[tuple[int, ...]]] = {}
    for a in np.flatnonzero(word_arc).tolist():
        word = olab[a]
        head = (ilab[a],) if ilab[a] else ()
        stack = [(dst[a], head, 0)]
        seqs = out.setdefault(word, set())
        while stack:
            s, seq, depth = stack.pop()
            if is_boundary[s] or depth > 64:  # 64: no real pronunciation is that long
                seqs.add(seq)
                continue
            for b in order[first_l[s]:first_l[s + 1]].tolist():
                if olab[b] == 0 and ilab[b] != in_backoff:
                    stack.append((dst[b], seq + ((ilab[b],) if ilab[b] else ()), depth + 1))
    return out


def _word_labels(gfst: pynini.Fst | None) -> set[int] | None:
    if gfst is None:
        return None
    return set(unique_sorted(fst_to_arrays(gfst).ilabel).tolist())


def unmarked_homophones(lfst: pynini.Fst, gfst: pynini.Fst | None = None,
                        prons: dict[int, set[tuple[int, ...]]] | None = None,
                        ) -> list[tuple[tuple[str, ...], list[str]]]:
    """Lists input sequences of L that spell two or more words (of G, when given).

    Such homophones make L∘G non-functional, so it cannot be determinized; a distinct
    disambiguation marker at the end of each pronunciation removes the clash. Returns
    (phones, words) pairs, phones and words spelt with L's symbol tables.
    """
    prons = prons if prons is not None else lexicon_pronunciations(lfst)
    known = _word_labels(gfst)
    spellers: dict[tuple[int, ...], set[int]] = {}
    for word, seqs in prons.items():
        if known is not None and word not in known:
            continue
        for seq in seqs:
            spellers.setdefault(seq, set()).add(word)
    isyms, osyms = lfst.input_symbols(), lfst.output_symbols()
    name_i = (lambda k: isyms.find(k)) if isyms is not None else str
    name_o = (lambda k: osyms.find(k)) if osyms is not None else str
    found = []
    for seq, words in spellers.items():
        if len(words) > 1 and seq:
            found.append((tuple(name_i(k) for k in seq), sorted(name_o(w) for w in words)))
    found.sort()
    return found


def unmarked_prefixes(lfst: pynini.Fst,
                      prons: dict[int, set[tuple[int, ...]]] | None = None,
                      ) -> list[tuple[str, str]]:
    """Lists (shorter, longer) word pairs where one pronunciation is a prefix of another.

    Without a marker ending the shorter one, the shorter word followed by other words
    can spell the same phones as the longer word, which can make L∘G non-functional.
    """
    prons = prons if prons is not None else lexicon_pronunciations(lfst)
    pairs = sorted((seq, w) for w, seqs in prons.items() for seq in seqs if seq)
    osyms = lfst.output_symbols()
    name = (lambda k: osyms.find(k)) if osyms is not None else str
    found = []
    for (seq, w), (nxt, v) in zip(pairs, pairs[1:]):
        if w != v and len(nxt) > len(seq) and nxt[:len(seq)] == seq:
            found.append((name(w), name(v)))
    return sorted(set(found))


def check_homophones(lfst: pynini.Fst, ctx: CheckContext) -> None:
    """Raises `InputCheckFailed` when L has homophones (of G's words) without markers."""
    clashes = unmarked_homophones(lfst, ctx.gfst)
    if not clashes:
        return
    shown = "; ".join(f"{' '.join(p)} = {', '.join(w)}" for p, w in clashes[:_MAX_NAMED])
    more = f" (and {len(clashes) - _MAX_NAMED} more)" if len(clashes) > _MAX_NAMED else ""
    raise InputCheckFailed(
        ctx.stage, f"{len(clashes)} pronunciations spell several words with no "
        f"disambiguation marker: {shown}{more}; L∘G would not be functional",
        "build the lexicon with disambiguation markers (netbuild's lexicon builder adds "
        "them), or give these words different pronunciations")


def check_backoff_passthrough(lfst: pynini.Fst, ctx: CheckContext) -> None:
    """Raises when G has back-off arcs but L cannot pass the back-off marker through."""
    gfst = ctx.gfst
    if gfst is None or gfst.input_symbols() is None or lfst.input_symbols() is None:
        return
    g_backoff = gfst.input_symbols().find(BACKOFF)
    if g_backoff == pynini.NO_SYMBOL or not (fst_to_arrays(gfst).ilabel == g_backoff).any():
        return
    l_backoff = lfst.input_symbols().find(BACKOFF)
    arcs = fst_to_arrays(lfst)
    if l_backoff != pynini.NO_SYMBOL and ((arcs.ilabel == l_backoff)
                                          & (arcs.olabel == g_backoff)).any():
        return
    raise InputCheckFailed(
        ctx.stage, f"the model has back-off arcs but the lexicon has no {BACKOFF}:{BACKOFF}"
        " arc, so L∘G would lose every back-off path",
        "build L with netbuild's lexicon builder, which adds the back-off pass-through "
        "loop at the word boundary")


def check_words_reachable(fst: pynini.Fst, ctx: CheckContext) -> None:
    """Raises when words of G never appear on the output side of L∘G."""
    if ctx.gfst is None:
        return
    g_words = set(unique_sorted(fst_to_arrays(ctx.gfst).olabel).tolist()) - {0}
    kept = set(unique_sorted(fst_to_arrays(fst).olabel).tolist())
    lost = sorted(g_words - kept)
    if not lost:
        return
    osyms = ctx.gfst.output_symbols()
    names = [osyms.find(k) if osyms is not None else str(k) for k in lost]
    raise InputCheckFailed(
        ctx.stage, f"{len(lost)} words of the model cannot be reached in L∘G: "
        f"{_word_list(names)}",
        "add pronunciations for them to the lexicon, or let the grammar builder drop "
        "model words the lexicon lacks")


# ------------------------------------------------------------- checks of the full graph


def stochasticity_deviation(fst: pynini.Fst) -> float:
    """Returns max over states of |ln(sum of outgoing arc probabilities + final)|.

    Probabilities are exp(-weight) (log semiring); 0 means every state's outgoing mass
    is exactly 1. Computed in bulk over `fst_to_arrays`; inf when a state has no mass.
    """
    if fst.num_states() == 0:
        return 0.0
    arcs = fst_to_arrays(fst)
    mass = np.exp(-arcs.final_weights.astype(np.float64))
    mass += np.bincount(arcs.src, weights=np.exp(-arcs.weight.astype(np.float64)),
                        minlength=arcs.num_states)
    with np.errstate(divide="ignore"):
        return float(np.max(np.abs(np.log(mass))))


def _auxiliary_ids(table: pynini.SymbolTable | None) -> list[int]:
    return [] if table is None else [k for k, s in table if is_auxiliary(s)]


def check_no_auxiliary_markers(fst: pynini.Fst, ctx: CheckContext) -> None:
    """Raises when an auxiliary marker of the context's tables is left on either side."""
    arcs = fst_to_arrays(fst)
    for side, labels, table in (("input", arcs.ilabel, ctx.isymbols),
                                ("output", arcs.olabel, ctx.osymbols)):
        left = np.isin(labels, _auxiliary_ids(table))
        if left.any():
            names = sorted({table.find(int(k)) for k in labels[left][:20]})
            raise _internal(fst, ctx, f"auxiliary markers {names} are left on the {side} "
                            "side", arcs.src[left][:3].tolist())


def check_emission_inputs(fst: pynini.Fst, ctx: CheckContext) -> None:
    """Raises unless every input label is epsilon or an emission class ``e<c>``."""
    arcs = fst_to_arrays(fst)
    table = ctx.isymbols
    uniq = unique_sorted(arcs.ilabel).tolist()
    bad = [k for k in uniq if k != 0 and (table is None or not table.member(k)
                                         or not table.find(k).startswith("e")
                                         or not table.find(k)[1:].isdigit()
                                         or int(table.find(k)[1:]) + 1 != k)]
    if bad:
        raise _internal(fst, ctx, f"input labels {bad[:6]} are not emission classes",
                        arcs.src[np.isin(arcs.ilabel, bad)][:3].tolist())


def check_word_outputs(fst: pynini.Fst, ctx: CheckContext) -> None:
    """Raises unless every output label is epsilon or a word of the word table."""
    arcs = fst_to_arrays(fst)
    table = ctx.osymbols
    uniq = unique_sorted(arcs.olabel).tolist()
    bad = [k for k in uniq if k != 0 and (table is None or not table.member(k)
                                         or is_auxiliary(table.find(k)))]
    if bad:
        raise _internal(fst, ctx, f"output labels {bad[:6]} are not words",
                        arcs.src[np.isin(arcs.olabel, bad)][:3].tolist())
