"""Properties of the full decoding graph, checked against independent constructions.

- With a monophone (0/0) context map the full graph equals an HMM transducer written
  here, with its self-loops, composed directly with netbuild's word-level graph: no
  context transducer at all (tropical: exact enumeration and OpenFst randequivalent).
- Minimum duration on the demo: a word of k phones lasts at least 3k frames.
- Every word G can emit lies on a successful path of the demo's full graph.
- The optimized demo graph against the unoptimized H∘C∘L∘G in the log semiring.
"""

from __future__ import annotations

import dataclasses
import math
from pathlib import Path

import numpy as np
import pynini
import pytest
from test_full_graph_bruteforce import (DATA, MAX_FRAMES, build_tiny, compare_tables,
                                        enumerate_graph, named, parse_arpa, parse_context,
                                        parse_lexicon, parse_phones)

ROOT = Path(__file__).resolve().parents[2]
DEMO = ROOT / "examples" / "ropeway"
FRAME_SHIFT_MS = 10  # common practice, no source
STATES_PER_PHONE = 3  # left-to-right, no skips  # common practice, no source
MARKER_BASE = 100_000  # H's input ids of the auxiliary markers (then made epsilon)


# ------------------------------------------------------------------ arrays of a graph


@dataclasses.dataclass
class Arcs:
    src: np.ndarray
    ilabel: np.ndarray
    olabel: np.ndarray
    weight: np.ndarray
    dst: np.ndarray
    final: np.ndarray  # final weight per state, inf when not final
    start: int

    @classmethod
    def of(cls, fst: pynini.Fst) -> "Arcs":
        rows = [(q, a.ilabel, a.olabel, float(a.weight), a.nextstate)
                for q in fst.states() for a in fst.arcs(q)]
        src, il, ol, w, dst = (np.array(c) for c in zip(*rows))
        final = np.array([float(fst.final(q)) for q in fst.states()])
        return cls(src.astype(np.int64), il.astype(np.int64), ol.astype(np.int64),
                   w.astype(np.float64), dst.astype(np.int64), final, fst.start())

    @property
    def num_states(self) -> int:
        return len(self.final)


def relax(n: int, src: np.ndarray, dst: np.ndarray, length: np.ndarray,
          sources: np.ndarray) -> np.ndarray:
    """Shortest distances (non-negative lengths) from `sources` by repeated relaxation."""
    dist = np.full(n, np.inf)
    dist[sources] = 0.0
    for _ in range(n + 1):
        before = dist.copy()
        np.minimum.at(dist, dst, dist[src] + length)
        if np.array_equal(before, dist):
            return dist
    raise AssertionError("negative cycle")


def reachable(n: int, src: np.ndarray, dst: np.ndarray, sources: np.ndarray) -> np.ndarray:
    return np.isfinite(relax(n, src, dst, np.zeros(len(src)), sources))


# ------------------------------------------------------------------ test 2: monophones


def monophone_hmm(context: Path, phone_symbols: pynini.SymbolTable) -> pynini.Fst:
    """H with self-loops for a 0/0 map, written from the map file: emissions in, phones out.

    A hub state (start, final) and per phone p a chain: entering state i reads its
    class c_i + 1 (the first arc writes p), state i has the self-loop c_i + 1 with cost
    -ln(self_i), leaving it costs -ln(forward_i); every auxiliary marker of the phone
    table is a marker:marker loop on the hub.
    """
    cmap = parse_context(context, parse_phones(DATA / "inventory.txt").classes)
    assert (cmap.left, cmap.right) == (0, 0)
    h = pynini.Fst()
    hub = h.add_state()
    h.set_start(hub)
    h.set_final(hub)
    for _, centre, _, model in cmap.rules:
        p = phone_symbols.find(centre)
        assert p > 0, centre
        prev, leave = hub, 0.0
        for i, (c, self_p, fwd) in enumerate(cmap.models[model]):
            q = h.add_state()
            h.add_arc(prev, pynini.Arc(c + 1, p if i == 0 else 0, leave, q))
            h.add_arc(q, pynini.Arc(c + 1, 0, -math.log(self_p), q))
            prev, leave = q, -math.log(fwd)
        h.add_arc(prev, pynini.Arc(0, 0, leave, hub))
    for k, name in phone_symbols:
        if name.startswith("!"):  # input ids above every emission label
            h.add_arc(hub, pynini.Arc(MARKER_BASE + k, k, 0.0, hub))
    return h


def without_markers(fst: pynini.Fst, phone_symbols: pynini.SymbolTable) -> pynini.Fst:
    """Constructively relabels the markers on the input side of H∘X to epsilon."""
    out = fst.copy()
    out.relabel_pairs(ipairs=[(MARKER_BASE + k, 0) for k, s in phone_symbols
                              if s.startswith("!")])
    return out


def phone_table(loaded, inventory: Path = DATA / "inventory.txt") -> pynini.SymbolTable:
    """The build's phone table (L's input side), checked against the layout that
    docs/formats.md gives: epsilon, the inventory phones in file order, !backoff, then
    the disambiguation markers !amb1..!ambK."""
    table = pynini.SymbolTable.read_text(str(loaded.path / loaded.manifest["phone_symbols"]))
    names = [s for _, s in table]
    phones = parse_phones(inventory).phones
    k = len(names) - len(phones) - 2
    assert names == ["<epsilon>", *phones, "!backoff", *(f"!amb{i}" for i in
                                                         range(1, k + 1))], names
    assert [k for k, _ in table] == list(range(len(names)))
    return table


def word_graph_of(loaded) -> pynini.Fst:
    name = loaded.manifest["intermediates"]["wordgraph"]
    return pynini.Fst.read(str(loaded.path / name))


@pytest.mark.parametrize("lm", ["unigram.arpa", "bigram.arpa"])
def test_monophone_graph_equals_hmm_on_word_graph(tmp_path, lm):
    """No C at all: H (written here, with self-loops) ∘ word-level graph, markers removed.

    # reference: OpenFst randequivalent (fst/randequivalent.h), tropical semiring, and
    # an exact enumeration of both up to MAX_FRAMES frames.
    In the tropical semiring both sides give each (emissions, words) pair the cheapest
    of its paths, and the final optimization (determinization with markers, then
    markers to epsilon, minimization, self-loops) keeps that minimum, so the two must
    agree exactly; with a 0/0 map C may only relabel phones to their models.
    """
    loaded = build_tiny(tmp_path, lm, "monophone.ctx")
    phones = phone_table(loaded)
    wordgraph = word_graph_of(loaded)
    if wordgraph.input_symbols() is not None:  # the layout the docs promise
        assert [s for _, s in wordgraph.input_symbols()] == [s for _, s in phones]
    h = monophone_hmm(DATA / "monophone.ctx", phones)
    h.arcsort("olabel")
    ours = without_markers(pynini.compose(h, wordgraph), phones)
    ours.rmepsilon()
    ours.connect()
    graph = loaded.graph
    # exact, bounded: the same (emissions, words) -> cheapest cost
    mine = named(enumerate_graph(ours, MAX_FRAMES), loaded.input_symbols,
                 loaded.word_symbols)
    got = named(enumerate_graph(graph, MAX_FRAMES), loaded.input_symbols,
                loaded.word_symbols)
    problems = compare_tables(mine, got)
    assert not problems, "\n".join(problems)
    # random paths of any length
    assert pynini.randequivalent(ours, graph, npath=200, seed=7, delta=1e-3,
                                 max_length=80)


def test_monophone_comparison_detects_a_wrong_self_loop(tmp_path):
    """The same comparison fails when one self-loop probability of H is changed."""
    loaded = build_tiny(tmp_path, "bigram.arpa", "monophone.ctx")
    phones = phone_table(loaded)
    text = (DATA / "monophone.ctx").read_text(encoding="utf-8")
    changed = tmp_path / "changed.ctx"
    changed.write_text(text.replace("model mt 3:0.2:0.8", "model mt 3:0.3:0.8"),
                       encoding="utf-8")
    h = monophone_hmm(changed, phones)
    h.arcsort("olabel")
    ours = without_markers(pynini.compose(h, word_graph_of(loaded)), phones)
    ours.rmepsilon()
    mine = named(enumerate_graph(ours, MAX_FRAMES), loaded.input_symbols,
                 loaded.word_symbols)
    got = named(enumerate_graph(loaded.graph, MAX_FRAMES), loaded.input_symbols,
                loaded.word_symbols)
    assert compare_tables(mine, got)


# ------------------------------------------------------------------ the demo


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    from netbuild.project import read_project
    from netbuild.workflow import build, load_build

    project = read_project(DEMO / "project.toml")
    if project.context is None:
        project = dataclasses.replace(project, context=DEMO / "context.txt")
    out = tmp_path_factory.mktemp("demo") / "out"
    result = build(project, out)
    return load_build(out), result


@pytest.fixture(scope="module")
def demo_arcs(demo):
    return Arcs.of(demo[0].graph)


@pytest.mark.slow
def test_demo_minimum_duration(demo, demo_arcs):
    """A single-word utterance of a k-phone word takes at least 3k frames, 30k ms.

    # reference: 3 emitting states per model, left to right, no skips, one frame per
    # state at least  # common practice, no source; 10 ms frame shift  # common
    # practice, no source
    Formulation: d0(q) = fewest frames (non-epsilon input labels) from the start to q
    on arcs writing no word, b0(q) = the same from q to a final state (plus nothing for
    the final weight); the shortest single-word utterance of w is the minimum over arcs
    q -> r writing w of d0(q) + [arc reads a frame] + b0(r). Silence only adds frames,
    so the minimum is the word's shortest pronunciation without silence.
    """
    loaded, _ = demo
    a = demo_arcs
    cmap = parse_context(DEMO / "context.txt", parse_phones(DEMO / "inventory.txt").classes)
    assert {len(s) for s in cmap.models.values()} == {STATES_PER_PHONE}
    frames = (a.ilabel != 0).astype(np.float64)
    silent = a.olabel == 0
    d0 = relax(a.num_states, a.src[silent], a.dst[silent], frames[silent],
               np.array([a.start]))
    b0 = relax(a.num_states, a.dst[silent], a.src[silent], frames[silent],
               np.flatnonzero(np.isfinite(a.final)))
    speaking = ~silent
    per_arc = d0[a.src[speaking]] + frames[speaking] + b0[a.dst[speaking]]
    best: dict[str, float] = {}
    for label, n in zip(a.olabel[speaking], per_arc):
        w = loaded.word_symbols.find(int(label))
        best[w] = min(best.get(w, math.inf), float(n))
    lexicon = parse_lexicon(DEMO / "lexicon.txt")
    in_model = set(parse_arpa(DEMO / "model.arpa").words)
    assert len(in_model) > 300
    wrong = {}
    for word, prons in lexicon.items():
        if word not in in_model:  # a lexicon word the model lacks is not in G
            assert word not in best
            continue
        k = min(len(p) for p in prons)
        expected = STATES_PER_PHONE * k
        if best.get(word) != expected or best[word] * FRAME_SHIFT_MS != 30 * k:
            wrong[word] = (expected, best.get(word))
    assert not wrong, f"(expected, got) frames: {dict(list(wrong.items())[:10])}"


@pytest.mark.slow
def test_demo_every_grammar_word_on_a_path(demo, demo_arcs):
    """Every word on an arc of G is written by an arc on a successful path of the graph.

    # common practice, no source: a word G can emit but the graph cannot is lost to
    # recognition; an arc is on a successful path when its source is reachable from
    # the start and a final state is reachable from its target.
    """
    loaded, _ = demo
    a = demo_arcs
    forward = reachable(a.num_states, a.src, a.dst, np.array([a.start]))
    backward = reachable(a.num_states, a.dst, a.src, np.flatnonzero(np.isfinite(a.final)))
    useful = forward[a.src] & backward[a.dst]
    graph_words = {loaded.word_symbols.find(int(o)) for o in np.unique(a.olabel[useful])
                   if o != 0}
    grammar = loaded.grammar
    g_words = {loaded.word_symbols.find(arc.olabel) for q in grammar.states()
               for arc in grammar.arcs(q) if arc.olabel != 0}
    assert "!backoff" not in g_words and "!backoff" not in graph_words
    assert len(g_words) > 300  # the demo's vocabulary is there
    assert g_words - graph_words == set()
    assert graph_words - g_words == set()


# ------------------------------------------------------------------ test 5: log semiring


def unoptimized_demo_graph(loaded) -> pynini.Fst:
    """H∘C∘(L∘G) from the demo build's own L and G, markers to epsilon, self-loops added.

    L and G are the build's intermediates; C and H come from netbuild's builders (their
    correctness is what the brute-force tests check); nothing is determinized or
    minimized here.
    """
    from netbuild.builders.context import build_context, window_models
    from netbuild.builders.contexts import occurring_windows, tie_contexts, visible_context
    from netbuild.builders.hmm import add_self_loops, build_hmm, make_model_symbols
    from netbuild.errors import Diagnostics
    from netbuild.io.context_map import read_context_map
    from netbuild.project import read_project
    from netbuild.workflow import read_inputs

    project = read_project(DEMO / "project.toml")
    inputs = read_inputs(project, Diagnostics())
    cmap = read_context_map(DEMO / "context.txt", inputs.inventory)
    lexicon, grammar = loaded.lexicon, loaded.grammar
    phones = phone_table(loaded, DEMO / "inventory.txt")
    lg = pynini.compose(pynini.arcsort(lexicon, sort_type="olabel"), grammar)
    windows = occurring_windows(inputs.lexicon, inputs.inventory, cmap,
                                project.options.lexicon)
    wins = [windows.window(i) for i in range(len(windows))]
    tying, uncovered, _ = tie_contexts({visible_context(cmap, w) for w in wins}, cmap)
    assert not uncovered
    models = make_model_symbols(cmap, phones)
    c = build_context(window_models(wins, tying, cmap), cmap, phones, models)
    h, kinds = build_hmm(cmap, models)
    clg = pynini.compose(c, lg)
    clg.arcsort("ilabel")
    hclg = pynini.compose(h, clg)
    hclg.relabel_pairs(ipairs=[(k, 0) for k in kinds.marker_ids()])
    return add_self_loops(hclg, kinds)


def to_log(fst: pynini.Fst) -> pynini.Fst:
    return pynini.arcmap(fst, map_type="to_log")


@pytest.mark.slow
def test_demo_optimized_equals_unoptimized_in_log_semiring(demo):
    """# reference: OpenFst randequivalent (fst/randequivalent.h), log semiring.

    What must be equal. Both sides have their auxiliary markers replaced by epsilon and
    both carry the self-loops (the optimized graph gets them after its final
    minimization; the unoptimized one here from the same function, so the comparison is
    about the optimization, with the self-loops themselves checked by the brute-force
    tests). In the log semiring a pair (emissions, words) weighs the sum over its
    paths. Determinization is tropical: where several paths share one input string
    (markers still on) it keeps only the cheapest, and the log sums would then differ.
    With the markers on, H∘C∘L∘G of the demo has one path per input string: L∘G does
    (homophones and prefixes carry !amb markers, back-off paths the !backoff marker),
    C maps phone strings one to one onto model strings because every demo model serves
    a single centre phone, and H maps model strings one to one onto arc-kind strings
    because every model has three states and no two models have the same kinds -- both
    premises are checked below from the map file. So determinization loses nothing,
    markers go to epsilon on both sides alike, and the sums must agree. (Removing the
    markers before determinizing would not be comparable: a word pair reachable
    directly and through back-off sums two paths on one side and keeps one on the
    other.)
    """
    loaded, _ = demo
    cmap = parse_context(DEMO / "context.txt", parse_phones(DEMO / "inventory.txt").classes)
    centres: dict[str, set[str]] = {}
    for _, centre, _, model in cmap.rules:
        centres.setdefault(model, set()).add(centre)
    assert all(len(c) == 1 and not c & {"*", "$"} and not next(iter(c)).startswith("@")
               for c in centres.values())
    kinds = [tuple(states) for states in cmap.models.values()]
    assert len(set(kinds)) == len(kinds) and {len(k) for k in kinds} == {3}

    optimized = to_log(loaded.graph)
    unoptimized = to_log(unoptimized_demo_graph(loaded))
    assert optimized.num_states() < unoptimized.num_states()
    assert pynini.randequivalent(optimized, unoptimized, npath=300, seed=3, delta=1e-2,
                                 max_length=400)
    # the comparison is not vacuous: every path of a shifted copy weighs 0.5 more
    shifted = unoptimized.copy()
    q = shifted.start()
    arcs = list(shifted.arcs(q))
    shifted.delete_arcs(q)
    for a in arcs:
        shifted.add_arc(q, pynini.Arc(a.ilabel, a.olabel,
                                      pynini.Weight("log", float(a.weight) + 0.5),
                                      a.nextstate))
    if shifted.final(q) != pynini.Weight.zero("log"):
        shifted.set_final(q, pynini.Weight("log", float(shifted.final(q)) + 0.5))
    assert not pynini.randequivalent(optimized, shifted, npath=50, seed=3, delta=1e-2,
                                     max_length=400)
