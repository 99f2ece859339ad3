"""Probe: where the push stage's time goes on the 20k-word / 1M-n-gram word graph.

Builds L∘G, determinizes and minimizes it (checks off, the pipeline's own stage
functions), then times 20 iterations of `netbuild.pipeline.log_potentials`, follows
the same value iteration for 200 passes (printing the start state's value and the
largest change every 50), and times OpenFst's tropical push. Prints JSON.

Run after ``python bench/run.py`` has generated bench/out/w20k_n1m::

    python bench/probe_push.py
"""
import json
import time
from pathlib import Path
import numpy as np
import pynini
from netbuild.builders.grammar import build_grammar
from netbuild.builders.lexicon import build_lexicon
from netbuild.io.arpa import read_arpa
from netbuild.io.lexicon import read_lexicon
from netbuild.io.phones import read_phones
from netbuild.options import BuildOptions, LexiconOptions
from netbuild import pipeline as pl

data = Path(__file__).resolve().parent / "out" / "w20k_n1m"
opts = BuildOptions(lexicon=LexiconOptions(has_probabilities=True), checks=False)
inv = read_phones(data / "inventory.txt")
lex = read_lexicon(data / "lexicon.txt", inv, opts.lexicon)
grammar = build_grammar(read_arpa(data / "model.arpa"))
lexicon_result = build_lexicon(lex, inv, grammar.word_symbols, opts.lexicon)
out = {}
t = time.perf_counter()
c = pl.compose_stage(lexicon_result.fst, grammar.fst)
out["compose"] = time.perf_counter() - t
t = time.perf_counter()
d = pl.determinize_stage(c, opts)
out["determinize"] = time.perf_counter() - t
t = time.perf_counter()
m = pl.minimize_stage(d)
out["minimize"] = time.perf_counter() - t
out["states"], out["arcs"] = m.num_states(), pl.num_arcs(m)
t = time.perf_counter()
r = pl.log_potentials(m, max_iterations=20)
out["log_potentials_20_iter"] = time.perf_counter() - t
out["log_potentials_20_converged"] = r is not None
print(json.dumps(out), flush=True)
arcs = pl.fst_to_arrays(m)
prob = np.exp(-arcs.weight.astype(np.float64))
final = np.exp(-arcs.final_weights.astype(np.float64))
dd = final.copy()
growth = []
for i in range(200):
    nxt = final + np.bincount(arcs.src, weights=prob * dd[arcs.dst], minlength=arcs.num_states)
    if i % 50 == 49:
        growth.append([i + 1, float(nxt[m.start()]), float(np.abs(nxt - dd).max())])
    dd = nxt
out["value_iteration_start_distance_and_max_change"] = growth
t = time.perf_counter()
pynini.push(m, push_weights=True, reweight_type="to_initial")
out["tropical_push"] = time.perf_counter() - t
print(json.dumps(out, indent=1))
