"""Tests of netbuild.inspectors.ambiguity and the `netbuild ambiguity` command."""

from __future__ import annotations

import collections
import json
import shutil
from pathlib import Path

import numpy as np
import pynini
import pytest
from hypothesis import given
from hypothesis import strategies as st

from netbuild.cli import cli
from netbuild.inspectors.ambiguity import (format_report, graph_ambiguity, homophone_sets,
                                           input_ambiguity, prefix_groups, project_ambiguity,
                                           report_to_json)
from netbuild.io.fstfile import arrays_to_fst
from netbuild.project import read_project
from netbuild.workflow import build

DATA = Path(__file__).parent.parent / "data" / "cli"


# --- pronunciation groups against a brute-force pairwise computation --------------------

def brute_homophones(prons):
    """Every pair of entries compared: words sharing one phone sequence exactly."""
    out = {}
    for w1, p1 in prons:
        for w2, p2 in prons:
            if w1 != w2 and tuple(p1) == tuple(p2):
                out.setdefault(tuple(p1), set()).update({w1, w2})
    return {k: sorted(v) for k, v in out.items()}


def brute_prefixes(prons):
    """Every pair compared: (x, y) with x strictly shorter and equal to y's head."""
    out = {}
    for w1, p1 in prons:
        for w2, p2 in prons:
            if len(p1) < len(p2) and tuple(p2[:len(p1)]) == tuple(p1):
                words, longer = out.setdefault(tuple(p1), (set(), set()))
                words.add(w1)
                longer.add(w2)
    return {k: (sorted(a), sorted(b)) for k, (a, b) in out.items()}


_prons = st.lists(st.tuples(st.sampled_from("abcdef"),
                            st.lists(st.sampled_from("xyz"), min_size=1, max_size=4)),
                  max_size=14)


@given(_prons)
def test_groups_equal_pairwise_computation(prons):
    # reference: definition of homophones / proper prefixes, compared pair by pair
    assert homophone_sets(prons) == brute_homophones(prons)
    got = {g.phones: (g.words, g.extended_by) for g in prefix_groups(prons)}
    assert got == brute_prefixes(prons)


def test_groups_of_empty_lexicon():
    assert homophone_sets([]) == {}
    assert prefix_groups([]) == []


# --- per-FST determinism against a per-state count over OpenFst's own arc iterator -----

def plain_counts(fst: pynini.Fst):
    """Counts with pynini's arc iterator, state by state (no numpy)."""
    nondet = 0
    degrees = collections.Counter()
    eps = arcs = 0
    for s in fst.states():
        labels = collections.Counter(a.ilabel for a in fst.arcs(s))
        nondet += any(c > 1 for c in labels.values())
        degrees[fst.num_arcs(s)] += 1
        eps += labels.get(0, 0)
        arcs += fst.num_arcs(s)
    return nondet, dict(degrees), eps, arcs


@st.composite
def small_fsts(draw):
    n = draw(st.integers(1, 7))
    arcs = draw(st.lists(st.tuples(st.integers(0, n - 1), st.integers(0, 3),
                                   st.integers(0, 3), st.integers(0, n - 1)), max_size=25))
    f = pynini.Fst()
    for _ in range(n):
        f.add_state()
    f.set_start(0)
    f.set_final(n - 1)
    for s, i, o, d in arcs:
        f.add_arc(s, pynini.Arc(i, o, 0.5, d))
    return f


@given(small_fsts())
def test_input_ambiguity_equals_independent_count(fst):
    got = input_ambiguity(fst, "x")
    nondet, degrees, eps, arcs = plain_counts(fst)
    assert got.nondeterministic_states == nondet
    assert dict(got.out_degree_histogram) == degrees
    assert got.max_out_degree == max(degrees)
    assert got.input_epsilon_arcs == eps
    assert got.epsilon_ratio == (eps / arcs if arcs else 0.0)
    # reference: OpenFst's I_DETERMINISTIC property (fst/properties.h), computed by OpenFst
    deterministic = fst.properties(pynini.I_DETERMINISTIC, True) == pynini.I_DETERMINISTIC
    assert deterministic == (nondet == 0)
    for e in got.examples:
        labels = [a for a in fst.arcs(e.state) if str(a.ilabel) == e.label]
        assert len(labels) == e.arcs >= 2
        assert sorted(e.outputs) == sorted(str(a.olabel) for a in labels)


def test_examples_name_symbols_and_are_limited():
    # State 0 has three arcs on 'k' (cat, cab, cot) and states 1..6 each two on 'a'.
    src = [0, 0, 0] + [s for s in range(1, 7) for _ in range(2)]
    il = [1, 1, 1] + [2] * 12
    ol = [1, 2, 3] + [0] * 12
    dst = [1, 2, 3] + [7] * 12
    f = arrays_to_fst(8, 0, np.r_[np.full(7, np.inf), 0.0], np.array(src), np.array(il),
                      np.array(ol), np.zeros(15), np.array(dst))
    ins = pynini.SymbolTable()
    for s in ("<epsilon>", "k", "a"):
        ins.add_symbol(s)
    outs = pynini.SymbolTable()
    for s in ("<epsilon>", "cat", "cab", "cot"):
        outs.add_symbol(s)
    f.set_input_symbols(ins)
    f.set_output_symbols(outs)
    got = input_ambiguity(f, "x", max_examples=3)
    assert got.nondeterministic_states == 7
    assert [(e.state, e.label, e.arcs) for e in got.examples] == [(0, "k", 3), (1, "a", 2),
                                                                   (2, "a", 2)]
    assert got.examples[0].outputs == ["cat", "cab", "cot"]


def test_empty_fst():
    got = input_ambiguity(pynini.Fst(), "empty")
    assert (got.states, got.arcs, got.nondeterministic_states, got.max_out_degree) == (0, 0, 0, 0)
    assert got.epsilon_ratio == 0.0 and got.out_degree_histogram == []


# --- on a build and a project -----------------------------------------------------------

@pytest.fixture(scope="module")
def orchard(tmp_path_factory) -> Path:
    d = tmp_path_factory.mktemp("amb")
    shutil.copytree(DATA, d / "inputs")
    build(read_project(d / "inputs" / "project.toml"), d / "out")
    return d


def test_graph_report_on_build(orchard):
    report = graph_ambiguity(orchard / "out")
    lex = report.lexicon
    assert lex is not None
    prons = [(line.split()[0], line.split()[1:])
             for line in (orchard / "inputs" / "lexicon.txt").read_text().splitlines()
             if line and not line.startswith("#")]
    # reference: pairwise computation over the lexicon file's own lines
    assert lex.homophones == brute_homophones(prons)
    assert {g.phones: (g.words, g.extended_by) for g in lex.prefixes} == brute_prefixes(prons)
    # every homophone/prefix pronunciation carries a marker, and only those
    marked = {(m.word, m.phones) for m in lex.markers}
    needed = {(w, tuple(p)) for w, p in prons
              if tuple(p) in lex.homophones or tuple(p) in brute_prefixes(prons)}
    assert marked == needed
    names = [f.name for f in report.fsts]
    assert set("=".join(names).split("=")) >= {"graph", "grammar", "lexicon"}
    manifest = json.loads((orchard / "out" / "manifest.json").read_text())
    by_file = {f.file: f for f in report.fsts}
    for st_ in manifest["stages"]:
        if st_["name"] in ("grammar", "lexicon"):
            assert by_file[manifest["intermediates"][st_["name"]]].states == st_["states"]
    graph = by_file[manifest["graph"]]
    assert graph.nondeterministic_states == 0  # the built graph is determinized
    lexicon_fst = by_file[manifest["intermediates"]["lexicon"]]
    assert lexicon_fst.nondeterministic_states > 0  # L's boundary state branches on phones
    text = format_report(report)
    assert "pair, pear" in text and "!amb2" in text


def test_changed_lexicon_leaves_groups_out_with_a_note(orchard, tmp_path):
    out = tmp_path / "out"
    shutil.copytree(orchard / "out", out)
    manifest = json.loads((out / "manifest.json").read_text())
    manifest["inputs"]["lexicon"]["sha256"] = "0" * 64
    (out / "manifest.json").write_text(json.dumps(manifest))
    report = graph_ambiguity(out)
    assert report.lexicon is None
    assert "changed since the build" in report.notes[0] and report.fsts


def test_project_report_inspects_composition(orchard):
    report = project_ambiguity(read_project(orchard / "inputs" / "project.toml"))
    assert [f.name for f in report.fsts] == ["grammar", "lexicon", "compose"]
    assert report.lexicon is not None and report.lexicon.num_markers == 2


_TOP_KEYS = {"source", "lexicon", "fsts", "notes"}
_LEXICON_KEYS = {"path", "words", "pronunciations", "skipped_words", "homophone_groups",
                 "prefix_groups", "markers"}
_MARKER_KEYS = {"count", "pronunciations", "by_reason", "uses"}
_FST_KEYS = {"name", "file", "states", "arcs", "nondeterministic_states", "examples",
             "input_epsilon_arcs", "epsilon_ratio", "max_out_degree", "out_degree_histogram"}


def test_cli_json_keys(runner, orchard):
    result = runner.invoke(cli, ["ambiguity", "--graph", str(orchard / "out"), "--json"])
    assert result.exit_code == 0, result.output
    data = json.loads(result.stdout)
    assert set(data) == _TOP_KEYS  # the keys documented in docs/diagnostics.md
    assert set(data["lexicon"]) == _LEXICON_KEYS
    assert set(data["lexicon"]["markers"]) == _MARKER_KEYS
    for f in data["fsts"]:
        assert set(f) == _FST_KEYS
        assert sum(c for _, c in f["out_degree_histogram"]) == f["states"]
    uses = {u["word"]: u for u in data["lexicon"]["markers"]["uses"]}
    assert uses["pear"]["homophones"] == ["pair"]
    assert uses["apple"]["prefix_of"] == ["apples"]
    assert {g["words"][0] for g in data["lexicon"]["homophone_groups"]} == {"pair"}
    # the same report as the library's
    assert data == json.loads(json.dumps(report_to_json(graph_ambiguity(orchard / "out"))))


def test_cli_table_and_project(runner, orchard):
    result = runner.invoke(cli, ["ambiguity", "--project",
                                 str(orchard / "inputs" / "project.toml")])
    assert result.exit_code == 0, result.output
    assert "homophone groups: 1" in result.stdout and "compose" in result.stdout


@pytest.mark.parametrize("args, code, text", [
    ([], 2, "exactly one of --graph"),
    (["--graph", "x", "--project", "y"], 2, "--project"),
    (["--graph", "/nonexistent/build"], 1, "/nonexistent/build: not a directory"),
])
def test_cli_bad_arguments_give_one_line(runner, args, code, text):
    result = runner.invoke(cli, ["ambiguity", *args])
    assert result.exit_code == code
    assert text in result.stderr
    assert "Traceback" not in result.output and len(result.stderr.strip().splitlines()) == 1
