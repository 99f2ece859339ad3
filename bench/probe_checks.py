"""Before/after probe of two check-side speed changes, on graphs of benchmark size.

- Shared conversions: a stage's checks (`check_nonempty`, `check_connected`,
  `check_labels`, `stochasticity_deviation`) and the arc count of its `StageRecord`,
  run on G of the 20k / 1M set (248,123 states, 1,218,789 arcs) without and with a
  `shared_conversions` block (one array conversion instead of one per check).
- The input-epsilon cycle test: networkx over every input-epsilon arc (the old code,
  reproduced here) against OpenFst's cyclicity property over the same arcs (the new
  `netbuild.checks.has_input_epsilon_cycle`), on an acyclic FST of 1,000,000 states
  whose 2,000,000 arcs are half input-epsilon.

Variants alternate, 2 rounds, best time of each is printed (JSON).
Run: ``python bench/probe_checks.py``.
"""

from __future__ import annotations

import json
import time
from pathlib import Path

import networkx as nx
import numpy as np

from netbuild import checks as chk
from netbuild.builders.grammar import build_grammar
from netbuild.io.arpa import read_arpa
from netbuild.io.fstfile import arrays_to_fst, fst_to_arrays, shared_conversions
from netbuild.pipeline import num_arcs

HERE = Path(__file__).resolve().parent


def _stage_checks(fst, ctx) -> None:
    chk.stochasticity_deviation(fst)
    for check in (chk.check_nonempty, chk.check_connected, chk.check_labels):
        check(fst, ctx)
    num_arcs(fst)


def _networkx_cycle(fst) -> list[int]:
    arcs = fst_to_arrays(fst)
    eps = arcs.ilabel == 0
    graph = nx.DiGraph()
    graph.add_edges_from(zip(arcs.src[eps].tolist(), arcs.dst[eps].tolist()))
    try:
        return [u for u, _ in nx.find_cycle(graph)]
    except nx.NetworkXNoCycle:
        return []


def main() -> None:
    grammar = build_grammar(read_arpa(HERE / "out" / "w20k_n1m" / "model.arpa"))
    ctx = chk.CheckContext("probe", grammar.word_symbols, grammar.word_symbols)
    rng = np.random.default_rng(0)
    n, m = 1_000_000, 2_000_000
    src = rng.integers(0, n - 1, m)
    dst = np.minimum(src + 1 + rng.integers(0, 50, m), n - 1)
    lab = np.where(rng.random(m) < 0.5, 0, 1 + rng.integers(0, 100, m))
    dag = arrays_to_fst(n, 0, np.zeros(n, np.float32), src, lab, lab,
                        np.zeros(m, np.float32), dst)
    best: dict[str, float] = {}

    def timed(name: str, fn) -> None:
        started = time.perf_counter()
        fn()
        best[name] = min(best.get(name, float("inf")), time.perf_counter() - started)

    def shared() -> None:
        with shared_conversions():
            _stage_checks(grammar.fst, ctx)

    for _ in range(2):
        timed("checks, one conversion each", lambda: _stage_checks(grammar.fst, ctx))
        timed("checks, shared conversion", shared)
        timed("eps cycle, networkx", lambda: _networkx_cycle(dag))
        timed("eps cycle, OpenFst property", lambda: chk.has_input_epsilon_cycle(dag))
    assert _networkx_cycle(dag) == [] and chk.has_input_epsilon_cycle(dag) == []
    print(json.dumps({k: round(v, 3) for k, v in best.items()}, indent=2))


if __name__ == "__main__":
    main()
