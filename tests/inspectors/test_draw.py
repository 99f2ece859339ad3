"""Tests of netbuild.inspectors.draw and the `netbuild draw` command."""

from __future__ import annotations

import collections
import html
import json
import re
import shutil
import subprocess
import xml.etree.ElementTree as ET
from pathlib import Path

import pynini
import pytest
from hypothesis import given
from hypothesis import strategies as st

from netbuild.cli import cli
from netbuild.errors import InputError, StageError, SymbolError
from netbuild.inspectors.draw import (sentence_path, sentence_subgraph, state_subgraph,
                                      subgraph_to_dot, word_subgraph, write_drawing)
from netbuild.io.fstfile import fst_to_arrays
from netbuild.project import read_project
from netbuild.workflow import build

pytest.importorskip("graphviz")

DATA = Path(__file__).parent.parent / "data" / "cli"
HAS_DOT = shutil.which("dot") is not None
needs_dot = pytest.mark.skipif(not HAS_DOT, reason="graphviz's 'dot' program is missing")
ODD_WORD = "<big> \"gust\""  # quotes and angle brackets
ODD_WORDS = [ODD_WORD, "back\\slash", "Zürich", "Дом", "a&b'c"]


def words_table(words):
    t = pynini.SymbolTable("words")
    t.add_symbol("<epsilon>")
    for w in words:
        t.add_symbol(w)
    return t


def fst_from(n, arcs, table):
    f = pynini.Fst()
    for _ in range(n):
        f.add_state()
    f.set_start(0)
    f.set_final(n - 1, 0.25)
    for s, i, o, w, d in arcs:
        f.add_arc(s, pynini.Arc(i, o, w, d))
    f.set_input_symbols(table)
    f.set_output_symbols(table)
    return f


def bfs(fst: pynini.Fst, seeds, depth):
    """Plain breadth-first search over arcs in both directions (no numpy)."""
    nbrs = collections.defaultdict(set)
    for s in fst.states():
        for a in fst.arcs(s):
            nbrs[s].add(a.nextstate)
            nbrs[a.nextstate].add(s)
    dist = {s: 0 for s in seeds}
    queue = collections.deque(seeds)
    while queue:
        s = queue.popleft()
        if dist[s] == depth:
            continue
        for t in nbrs[s]:
            if t not in dist:
                dist[t] = dist[s] + 1
                queue.append(t)
    states = set(dist)
    arcs = [(s, a.nextstate) for s in fst.states() for a in fst.arcs(s)
            if s in states and a.nextstate in states]
    return states, arcs


def dot_edges(source: str):
    return re.findall(r"^\s*s(\d+) -> s(\d+)", source, flags=re.M)


def dot_nodes(source: str):
    return set(re.findall(r"^\s*s(\d+) \[", source, flags=re.M))


@st.composite
def random_fsts(draw):
    n = draw(st.integers(2, 12))
    arcs = draw(st.lists(st.tuples(st.integers(0, n - 1), st.integers(1, 4),
                                   st.integers(0, 4), st.sampled_from([0.0, 1.234]),
                                   st.integers(0, n - 1)), max_size=30))
    return fst_from(n, arcs, words_table("abcd"))


@given(random_fsts(), st.integers(0, 3), st.integers(0, 11))
def test_state_subgraph_equals_bfs(fst, depth, state):
    state %= fst.num_states()
    sub = state_subgraph(fst, state, depth, max_states=1000)
    states, arcs = bfs(fst, [state], depth)
    assert set(sub.states.tolist()) == states
    source = subgraph_to_dot(sub)
    assert {int(s) for s in dot_nodes(source)} == states
    assert collections.Counter((int(a), int(b)) for a, b in dot_edges(source)) == \
        collections.Counter(arcs)


@given(random_fsts(), st.integers(0, 2))
def test_word_subgraph_equals_bfs(fst, depth):
    a = fst_to_arrays(fst)
    hits = [(s, arc.nextstate) for s in fst.states() for arc in fst.arcs(s) if arc.olabel == 2]
    if not hits:
        with pytest.raises(StageError, match="no arc of stage 'fst' outputs the word 'b'"):
            word_subgraph(a, "b", depth)
        return
    sub = word_subgraph(a, "b", depth, max_states=1000)
    states, arcs = bfs(fst, sorted({x for h in hits for x in h}), depth)
    assert set(sub.states.tolist()) == states
    assert len(sub.arcs) == len(arcs)
    assert sorted(sub.highlight.tolist()) == [i for i in range(a.num_arcs) if a.olabel[i] == 2]


def test_unknown_word_names_nearest():
    fst = fst_from(2, [(0, 1, 1, 0.0, 1)], words_table(["cabin"]))
    with pytest.raises(SymbolError, match=r"w\.syms: word 'cabn' .* did you mean 'cabin'"):
        word_subgraph(fst, "cabn", where="w.syms")


def test_too_large_is_refused_with_a_way_to_narrow_it():
    n = 30
    fst = fst_from(n, [(s, 1, 1, 0.0, s + 1) for s in range(n - 1)], words_table("a"))
    with pytest.raises(StageError, match=r"spans more than 10 states at depth 2, over the "
                       r"limit of 10; narrow it: a smaller --depth \(now 2\), or a smaller "
                       r"stage \(--stage grammar\), or a larger --max-states"):
        word_subgraph(fst, "a", 2, max_states=10, stage="graph")
    with pytest.raises(StageError, match="no state 40|state 40 does not exist"):
        state_subgraph(fst, 40)


@pytest.fixture(scope="module")
def orchard(tmp_path_factory) -> Path:
    d = tmp_path_factory.mktemp("draw")
    shutil.copytree(DATA, d / "inputs")
    build(read_project(d / "inputs" / "project.toml"), d / "out")
    return d / "out"


@pytest.mark.parametrize("stage", ["grammar.fst", "graph.fst"])
def test_sentence_path_has_the_words_and_the_best_cost(orchard, stage):
    fst = pynini.Fst.read(str(orchard / stage))
    words = "pick the red apples".split()
    a = fst_to_arrays(fst)
    ids = [a.osymbols.find(w) for w in words]
    path, cost = sentence_path(a, ids)
    # the path is connected from the start and outputs exactly the words
    assert a.src[path[0]] == a.start
    assert all(a.dst[p] == a.src[q] for p, q in zip(path, path[1:]))
    assert [int(a.olabel[p]) for p in path if a.olabel[p]] == ids
    # reference: OpenFst shortest distance of the graph composed with the sentence
    sentence = pynini.accep(" ".join(words), token_type=a.osymbols)
    best = pynini.shortestdistance(pynini.compose(fst, sentence.arcsort("ilabel")),
                                   reverse=True)[0]
    assert cost == pytest.approx(float(best), abs=1e-3)
    sub = sentence_subgraph(a, words, 0)
    assert set(sub.highlight.tolist()) == set(path.tolist())


def test_sentence_without_path_is_refused(orchard):
    line = fst_from(3, [(0, 1, 1, 0.0, 1), (1, 2, 2, 0.0, 2)], words_table("ab"))
    assert sentence_subgraph(line, ["a", "b"]).states.tolist() == [0, 1, 2]
    with pytest.raises(StageError, match="stage 'fst' has no path for the sentence 'b a'"):
        sentence_subgraph(line, ["b", "a"])
    g = pynini.Fst.read(str(orchard / "grammar.fst"))
    with pytest.raises(SymbolError, match="'banana' is not in the output symbols"):
        sentence_subgraph(g, ["banana"], 0)


def test_dot_escapes_every_odd_word_and_parses(tmp_path):
    fst = fst_from(len(ODD_WORDS) + 1, [(k, k + 1, k + 1, 0.5, k + 1)
                                        for k in range(len(ODD_WORDS))],
                   words_table(ODD_WORDS))
    source = subgraph_to_dot(state_subgraph(fst, 0, 5))
    assert "Zürich" not in source and "&#252;" in source  # non-ASCII as references
    assert '"gust"' not in source and "&lt;" not in source  # no raw quote, numeric refs
    out, rendered, note = write_drawing(source, tmp_path / "odd.dot")
    assert out.read_text(encoding="utf-8") == source and not rendered and not note
    if HAS_DOT:
        canon = subprocess.run(["dot", "-Tcanon"], input=source.encode(), capture_output=True)
        assert canon.returncode == 0, canon.stderr


@needs_dot
def test_odd_words_render_to_svg(tmp_path):
    fst = fst_from(len(ODD_WORDS) + 1, [(k, k + 1, k + 1, 0.5, k + 1)
                                        for k in range(len(ODD_WORDS))],
                   words_table(ODD_WORDS))
    out, rendered, note = write_drawing(subgraph_to_dot(state_subgraph(fst, 0, 5)),
                                        tmp_path / "odd.svg")
    assert rendered and out == tmp_path / "odd.svg" and note == ""
    texts = [t.text or "" for t in ET.parse(out).getroot().iter("{http://www.w3.org/2000/svg}text")]
    for word in ODD_WORDS:
        assert f"{word}/0.50" in texts  # acceptor arc: the word once, then the cost
    assert "start" in texts and "5/0.25" in texts  # legend, final weight rounded
    assert [p.name for p in tmp_path.iterdir()] == ["odd.svg"]  # no temporary left


@needs_dot
def test_dot_json_has_exactly_the_states_and_arcs(orchard, tmp_path):
    g = pynini.Fst.read(str(orchard / "grammar.fst"))
    sub = word_subgraph(g, "pears", 1)
    source = subgraph_to_dot(sub)
    layout = json.loads(subprocess.run(["dot", "-Tjson"], input=source.encode(),
                                       capture_output=True, check=True).stdout)
    objects = layout["objects"]
    names = {o["_gvid"]: o["name"] for o in objects}
    drawn = {n for n in names.values() if re.fullmatch(r"s\d+", n)}
    seeds = sorted({x for s in g.states() for a in g.arcs(s) if a.olabel ==
                    g.output_symbols().find("pears") for x in (s, a.nextstate)})
    states, arcs = bfs(g, seeds, 1)
    assert drawn == {f"s{s}" for s in states}
    edges = [(names[e["tail"]], names[e["head"]]) for e in layout["edges"]]
    state_edges = [e for e in edges if not e[0].startswith("legend")]
    assert collections.Counter(state_edges) == collections.Counter(
        (f"s{a}", f"s{b}") for a, b in arcs)
    assert any(n.startswith("legend_") for n in names.values())


def test_missing_dot_writes_dot_and_says_how_to_install(tmp_path, monkeypatch):
    fst = fst_from(2, [(0, 1, 1, 0.0, 1)], words_table("a"))
    monkeypatch.setenv("PATH", str(tmp_path / "empty"))
    out, rendered, note = write_drawing(subgraph_to_dot(state_subgraph(fst, 0)),
                                        tmp_path / "x.svg")
    assert out == tmp_path / "x.dot" and not rendered and out.is_file()
    assert "'dot' program is missing" in note and "install graphviz" in note
    assert not (tmp_path / "x.svg").exists()


def test_unknown_format_is_refused(tmp_path):
    with pytest.raises(InputError, match=r"x\.jpeg: unknown drawing format '\.jpeg'; end the "
                       r"file name in \.dot"):
        write_drawing("digraph {}", tmp_path / "x.jpeg")


# --- command line ------------------------------------------------------------------------

def test_cli_draws_a_sentence(runner, orchard, tmp_path):
    out = tmp_path / "s.dot"
    result = runner.invoke(cli, ["draw", "--graph", str(orchard), "--sentence",
                                 "pick the red apples", "-o", str(out)])
    assert result.exit_code == 0, result.output
    assert re.search(r"wrote .*s\.dot \((\d+) states, (\d+) arcs\)", result.stdout)
    assert "sentence 'pick the red apples' in stage 'grammar'" in html.unescape(out.read_text())


@pytest.mark.parametrize("args, code, text", [
    (["--word", "pear"], 2, "exactly one of --word"),  # no -o given first
    (["--word", "pear", "--state", "1", "-o", "x.dot"], 2, "exactly one of --word"),
    (["--word", "peer", "-o", "x.dot"], 1, "did you mean 'pear'"),
    (["--state", "99999", "-o", "x.dot"], 1, "state 99999 does not exist"),
    (["--word", "pear", "--stage", "gramar", "-o", "x.dot"], 1, "did you mean 'grammar'"),
    (["--word", "pear", "-o", "x.jpeg"], 1, "unknown drawing format"),
    (["--word", "the", "--max-states", "3", "-o", "x.dot"], 1, "narrow it"),
    (["--sentence", "", "-o", "x.dot"], 1, "the sentence is empty"),
])
def test_cli_bad_arguments_give_one_line(runner, orchard, tmp_path, args, code, text):
    if "-o" in args:
        args = [a if a not in ("x.dot", "x.jpeg") else str(tmp_path / a) for a in args]
    else:
        args = [*args]
        code, text = 2, "Missing option '-o'"
    result = runner.invoke(cli, ["draw", "--graph", str(orchard), *args])
    assert result.exit_code == code, result.output
    assert text in result.stderr
    assert "Traceback" not in result.output
    assert len(result.stderr.strip().splitlines()) == 1
    assert not list(tmp_path.iterdir())  # nothing written on failure
