"""A straightforward full-graph construction, to compare netbuild's pipeline against.

- `straightforward_graph(data_dir) -> dict`: builds the full graph of a bench data set
  with plain pynini calls and returns per-step seconds, peak RSS, states and arcs.
- `python_self_loops(ifst, kind_table)`: the self-loop pass as a plain Python loop over
  states and arcs (same construction as `netbuild.builders.hmm.add_self_loops`).

The inputs (G, L, C, H and the kind table) come from netbuild's readers and builders,
so both constructions start from the same FSTs; everything after that is the obvious
sequence of library calls, with no checks, no child process and no bulk array code:

    LG  = minimize(determinize(compose(L, G)))            (plain transducer minimize)
    HCLG = minimize(unmark(determinize(compose(H, compose(C, LG)))))   (allow_nondet)
    graph = python_self_loops(HCLG)

Run ``python bench/baseline_full.py bench/out/w20k_n1m``; bench/run.py calls it in a
child process (``--only baseline_full``).
"""

from __future__ import annotations

import json
import math
import sys
import time
from pathlib import Path

import pynini

from netbuild.memory import reset_peak, status_bytes


def _arcs(fst: pynini.Fst) -> int:
    return sum(fst.num_arcs(s) for s in fst.states())


def python_self_loops(ifst: pynini.Fst, kind_table) -> pynini.Fst:
    """Constructively adds the HMM self-loops with a Python loop over states and arcs.

    For each state t and each looping kind k on arcs entering t, a state t_k takes those
    arcs, loops on k at cost -ln(self_loop) and pays -ln(forward) on leaving; t itself is
    t_k when k is the only thing entering it (the start state counts as entered by
    epsilon). Kinds are relabelled to emission class + 1.
    """
    kinds = kind_table.kinds
    cls = [0] + [k[0] + 1 for k in kinds]
    loop = [math.inf] + [(-math.log(k[1]) if k[1] > 0 else math.inf) for k in kinds]
    exit_ = [0.0] + [-math.log(k[2]) for k in kinds]
    start = ifst.start()
    entering: dict[int, set[int]] = {}
    plain = {start}
    for s in ifst.states():
        for arc in ifst.arcs(s):
            if math.isfinite(loop[arc.ilabel]):
                entering.setdefault(arc.nextstate, set()).add(arc.ilabel)
            else:
                plain.add(arc.nextstate)
    ofst = pynini.Fst()
    for _ in range(ifst.num_states()):
        ofst.add_state()
    ofst.set_start(start)
    target: dict[tuple[int, int], int] = {}  # (state, kind) -> state t_k
    for t, ks in entering.items():
        for i, k in enumerate(sorted(ks)):
            target[(t, k)] = t if (i == 0 and t not in plain) else ofst.add_state()

    def copy_arcs(s: int, to: int, extra: float) -> None:
        for arc in ifst.arcs(s):
            nxt = target.get((arc.nextstate, arc.ilabel), arc.nextstate) \
                if math.isfinite(loop[arc.ilabel]) else arc.nextstate
            ofst.add_arc(to, pynini.Arc(cls[arc.ilabel], arc.olabel,
                                        float(arc.weight) + extra, nxt))
        final = float(ifst.final(s))
        if math.isfinite(final):
            ofst.set_final(to, final + extra)

    for s in ifst.states():
        own = [k for k in entering.get(s, ()) if target[(s, k)] == s]
        copy_arcs(s, s, exit_[own[0]] if own else 0.0)
    for (t, k), tk in target.items():
        if tk != t:
            copy_arcs(t, tk, exit_[k])
        ofst.add_arc(tk, pynini.Arc(cls[k], 0, loop[k], tk))
    return ofst


def straightforward_graph(data_dir: str | Path) -> dict:
    """Builds the full graph of the data set in `data_dir` the straightforward way."""
    from netbuild.builders.context import build_context
    from netbuild.builders.grammar import build_grammar
    from netbuild.builders.hmm import build_hmm, make_model_symbols
    from netbuild.builders.lexicon import build_lexicon
    from netbuild.project import read_project
    from netbuild.errors import Diagnostics
    from netbuild.workflow import context_windows, read_inputs

    project = read_project(Path(data_dir) / "project_full.toml")
    steps: list[dict] = []
    t0 = t = time.perf_counter()
    reset_peak()

    def step(name: str, fst: pynini.Fst | None = None) -> None:
        nonlocal t
        now = time.perf_counter()
        rec = {"name": name, "seconds": now - t, "peak_rss_bytes": status_bytes("VmHWM")}
        if fst is not None:
            rec["states"], rec["arcs"] = fst.num_states(), _arcs(fst)
        steps.append(rec)
        print(f"  {rec}", file=sys.stderr, flush=True)
        reset_peak()
        t = time.perf_counter()  # counting arcs is not part of the step

    inputs = read_inputs(project, Diagnostics())
    grammar = build_grammar(inputs.model)
    lex = build_lexicon(inputs.lexicon, inputs.inventory, grammar.word_symbols,
                        project.options.lexicon)
    models = make_model_symbols(inputs.cmap, lex.phone_symbols)
    cfst = build_context(context_windows(inputs), inputs.cmap, lex.phone_symbols, models)
    hfst, kinds = build_hmm(inputs.cmap, models)
    step("inputs (read, G, L, C, H)", grammar.fst)
    lg = pynini.compose(pynini.arcsort(lex.fst, sort_type="olabel"), grammar.fst)
    step("compose L∘G", lg)
    lg = pynini.determinize(lg)
    step("determinize LG", lg)
    lg.minimize()
    step("minimize LG", lg)
    clg = pynini.compose(pynini.arcsort(cfst, sort_type="olabel"), lg)
    step("compose C∘LG", clg)
    hclg = pynini.compose(pynini.arcsort(hfst, sort_type="olabel"), clg)
    del clg
    step("compose H∘CLG", hclg)
    hclg = pynini.determinize(hclg)
    step("determinize HCLG", hclg)
    hclg.relabel_pairs(ipairs=[(m, 0) for m in kinds.marker_ids()])
    step("markers to epsilon")
    hclg.minimize(allow_nondet=True)
    step("minimize HCLG", hclg)
    graph = python_self_loops(hclg, kinds)
    step("self-loops (Python loop)", graph)
    total = sum(s["seconds"] for s in steps)
    out = Path(data_dir) / "baseline_graph.fst"
    graph.write(str(out))
    return {"steps": steps, "seconds": total, "wall_seconds": time.perf_counter() - t0,
            "peak_rss": max(s["peak_rss_bytes"] for s in steps),
            "final_states": graph.num_states(), "final_arcs": _arcs(graph),
            "vector_bytes": out.stat().st_size, "g_arcs": _arcs(grammar.fst)}


if __name__ == "__main__":
    print(json.dumps(straightforward_graph(sys.argv[1]), indent=2))
