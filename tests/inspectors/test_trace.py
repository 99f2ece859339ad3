"""Tests of `netbuild trace`: one fixture per cause code, the facts behind each verdict,
the graph-path analysis, and the command line.

Fixtures: tests/data/trace/ (a small harbour-office scenario of our own: inventory.txt,
lexicon.txt with a probability column, model.arpa written by hand, triphone.ctx).
"""

from __future__ import annotations

import json
import math
import shutil
from pathlib import Path

import numpy as np
import pynini
import pytest

from netbuild.cli import cli
from netbuild.inspectors.trace import (CAUSES, label_paths,
                                       near_pronunciations, project_sources, trace_build,
                                       trace_project)
from netbuild.project import read_project

DATA = Path(__file__).resolve().parents[1] / "data" / "trace"
LN10 = math.log(10.0)


@pytest.fixture(scope="module")
def sources():
    return project_sources(read_project(DATA / "project.toml"))


@pytest.fixture(scope="module")
def context_sources():
    return project_sources(read_project(DATA / "project.toml"), DATA / "triphone.ctx")


@pytest.fixture(scope="module")
def stale_build(tmp_path_factory) -> Path:
    """A build made before 'tide' and 'buoy' had pronunciations; then 'tide' was added.

    The model lists 'tide', so the build dropped it (oov_policy "drop"); the lexicon now
    has it, so trace must find it in the inputs and lost in the grammar stage.
    """
    from netbuild.workflow import build

    d = tmp_path_factory.mktemp("stale")
    inputs = d / "inputs"
    shutil.copytree(DATA, inputs)
    lexicon = inputs / "lexicon.txt"
    full = lexicon.read_text(encoding="utf-8")
    lexicon.write_text("".join(line for line in full.splitlines(keepends=True)
                               if not line.startswith(("tide ", "buoy "))),
                       encoding="utf-8")
    out = d / "out"
    build(read_project(inputs / "project.toml"), out)
    lexicon.write_text("".join(line for line in full.splitlines(keepends=True)
                               if not line.startswith("buoy ")), encoding="utf-8")
    return out


# --- one fixture per cause code ---------------------------------------------------------

@pytest.mark.parametrize("word, cause, stage", [
    ("harbour", "not_in_lexicon", "lexicon"),  # in model.arpa, no lexicon line
    ("buoy", "unknown_phone", "lexicon"),  # 'oy' is not in inventory.txt
    ("mooring", "not_in_language_model", "language_model"),  # no 1-gram line
    ("anchor", "zero_probability", "language_model"),  # -99 in its 1-gram and 2-gram
    ("dock", "ok", None),
    ("peer", "ok", None),  # recognizable, though its homophone 'pier' is more likely
])
def test_cause_codes(sources, word, cause, stage):
    t = sources.trace(word)
    assert (t.verdict, t.stage) == (cause, stage)
    assert t.verdict in CAUSES and t.reason and t.fix


def test_uncovered_context(context_sources):
    # triphone.ctx ties 'g' only after a vowel or the edge; 'gale' follows words ending
    # in consonants ('dock', 'at', ...) whenever any word may follow any word.
    t = context_sources.trace("gale")
    assert (t.verdict, t.stage) == ("uncovered_context", "context")
    ctx = t.stage_named("context")
    assert ctx.present is False
    found = {c["context"] for c in ctx.details["uncovered"]}
    assert "k [g] ei" in found
    where = {c["context"]: c["where"] for c in ctx.details["uncovered"]}
    assert where["k [g] ei"] == "'dock' + 'gale'"
    assert context_sources.trace("dock").stage_named("context").present is True


def test_uncovered_contexts_match_the_coverage_check(context_sources):
    """The per-word enumeration agrees with the whole-lexicon coverage check.

    reference: netbuild.builders.contexts.check_coverage, an independent enumeration
    (word-boundary cuts over L's closure) of every context that can occur.
    """
    from netbuild.builders.contexts import check_coverage, format_context
    from netbuild.errors import Diagnostics
    from netbuild.io.lexicon import Lexicon

    src = context_sources
    known = set(src.inventory.phones)
    usable = Lexicon([e for e in src.lexicon.entries if all(p in known for p in e.phones)],
                     src.lexicon.path)
    diag = Diagnostics()
    cov = check_coverage(usable, src.inventory, src.context_map, src.options.lexicon, diag)
    theirs = {format_context(cov.contexts.key(i))
              for i in np.flatnonzero(cov.winner < 0).tolist()}
    ours = set()
    for word in usable.words():
        ctx = src.trace(word).stage_named("context")
        ours |= {c["context"] for c in ctx.details["uncovered"]}
    assert ours == theirs and theirs


def test_unreachable_after_a_stale_build(stale_build):
    t = trace_build("tide", stale_build)
    assert (t.verdict, t.stage) == ("unreachable", "grammar")
    assert t.stage_named("lexicon").present and t.stage_named("language_model").present
    assert t.stage_named("grammar").details["dropped_at_build"] is True
    assert any("changed since" in w for w in t.warnings)
    assert "rebuild" in t.fix
    # A word the build had is traced through every stage of the directory.
    ok = trace_build("dock", stale_build)
    assert ok.verdict == "ok"
    assert [s.name for s in ok.stages][-3:] == ["grammar", "lexicon_fst", "wordgraph"]


# --- the facts behind the verdicts ------------------------------------------------------

def test_language_model_facts(sources):
    lm = sources.trace("dock").stage_named("language_model").details
    # reference: tests/data/trace/model.arpa, 1-gram "-1.3 dock"; only 'the' (-1.2) is
    # more likely among the words (<s> and </s> are not ranked).
    assert lm["unigram_log10prob"] == -1.3
    assert lm["unigram_rank"] == 2
    assert lm["vocabulary_size"] == 12
    # reference: model.arpa 2-grams "the dock", "dock at", "dock </s>".
    assert lm["ngrams_containing"] == {"2": 3}
    assert lm["ngrams_predicting"] == {"2": 1}
    assert lm["best_contexts"][0]["history"] == ["the"]
    # reference: model.arpa, after "the" the likeliest other word is "deck" (-0.6).
    assert lm["best_contexts"][0]["best_other"] == {"word": "deck", "log10prob": -0.6}
    gale = sources.trace("gale").stage_named("language_model").details
    # reference: model.arpa lists "gale at" and "gale </s>" but no 2-gram ending in gale.
    assert gale["backoff_only"] is True and gale["ngrams_containing"] == {"2": 2}
    anchor = sources.trace("anchor").stage_named("language_model").details
    assert anchor["zero_everywhere"] is True and anchor["backoff_only"] is False


def test_homophones_and_near_homophones(sources):
    lex = sources.trace("dock").stage_named("lexicon").details
    near = {(n["word"], n["edit"]) for n in lex["near_homophones"]}
    assert ("deck", "o->e at 2") in near  # d o k -> d e k: one substitution
    peer = sources.trace("peer").stage_named("lexicon").details
    assert [h["word"] for h in peer["homophones"]] == ["pier"]


def test_one_word_competitor_matches_the_backoff_rule(sources):
    """'peer' alone loses to 'pier' by the difference of their sentence costs.

    reference: the ARPA back-off rule (Katz 1987) on model.arpa, written out:
    log10 P(<s> peer </s>) = (bo(<s>) + p(peer)) + (bo(peer) + p(</s>))
                           = (-0.5 - 2.0) + (-0.2 - 1.0) = -3.7;
    log10 P(<s> pier </s>) = (-0.5 - 1.6) + p(</s> | pier) = -2.1 - 0.3 = -2.4.
    Both pronunciations cost 0, so the margin is (3.7 - 2.4) ln 10 nats.
    """
    t = sources.trace("peer")
    (u,) = t.stage_named("lexicon").details["one_word_utterances"]
    assert u["best_other"]["word"] == "pier"
    assert u["margin"] == pytest.approx(-(3.7 - 2.4) * LN10, abs=1e-4)
    assert u["own_cost"] == pytest.approx(3.7 * LN10, abs=1e-4)
    assert "loses to 'pier'" in t.reason


def test_one_word_costs_against_kenlm(sources):
    """reference: kenlm (PyPI kenlm) scores '<s> peer </s>' with bos/eos in log10."""
    kenlm = pytest.importorskip("kenlm")
    model = kenlm.Model(str(DATA / "model.arpa"))
    for word in ("peer", "pier", "dock"):
        (u,) = sources.trace(word).stage_named("lexicon").details["one_word_utterances"]
        assert u["own_cost"] == pytest.approx(-model.score(word) * LN10, abs=1e-4)


def test_near_pronunciations_edits():
    table = {("d", "e", "k"): ["deck"], ("d", "o"): ["do"], ("d", "o", "k", "s"): ["docks"],
             ("d", "o", "k"): ["dock"], ("t", "o", "p"): ["top"]}
    found = dict(near_pronunciations(("d", "o", "k"), table, ["d", "e", "k", "o", "s"]))
    assert found == {("d", "e", "k"): "o->e at 2", ("d", "o"): "-k at 3",
                     ("d", "o", "k", "s"): "+s at 4"}


def _fst(arcs, start, finals, n):
    f = pynini.Fst()
    f.add_states(n)
    f.set_start(start)
    for s, w in finals:
        f.set_final(s, w)
    for src, ilab, olab, w, dst in arcs:
        f.add_arc(src, pynini.Arc(ilab, olab, w, dst))
    return f


def test_label_paths_reachability_and_competitor():
    # 0 -5/1.0-> 1 (final); 0 -6/0.5-> 1; state 2 (not accessible) -7-> 1.
    # Label 7 has an arc but no complete path; 5 loses to 6 at state 0 by 0.5.
    f = _fst([(0, 1, 5, 1.0, 1), (0, 1, 6, 0.5, 1), (2, 1, 7, 0.0, 1)], 0, [(1, 0.25)], 3)
    lost = label_paths(f, 7)
    assert lost["arcs"] == 1 and lost["reachable"] is False and lost["best_cost"] is None
    five = label_paths(f, 5)
    assert five["reachable"] is True
    assert five["best_cost"] == pytest.approx(1.25)  # arc 1.0 + final 0.25
    assert five["competitor"]["word"] == "6"
    assert five["competitor"]["margin"] == pytest.approx(-0.5)
    assert five["cheapest_at"] == 0
    assert label_paths(f, 6)["cheapest_at"] == 1
    assert label_paths(f, 9)["arcs"] == 0


# --- the command line -------------------------------------------------------------------

def run(runner, *args):
    result = runner.invoke(cli, [str(a) for a in args], catch_exceptions=False)
    for text in (result.stdout, result.stderr):
        assert "Traceback" not in text
    return result


TRACE_KEYS = {"word", "verdict", "stage", "reason", "fix", "stages", "warnings"}


def test_cli_json_keys(runner):
    result = run(runner, "trace", "peer", "--project", DATA / "project.toml", "--json")
    assert result.exit_code == 0, result.stderr
    data = json.loads(result.stdout)
    assert set(data) == TRACE_KEYS  # documented in docs/diagnostics.md
    assert data["verdict"] == "ok"
    names = [s["name"] for s in data["stages"]]
    assert names == ["lexicon", "language_model", "grammar", "lexicon_fst", "wordgraph"]
    for s in data["stages"]:
        assert {"name", "present"} <= set(s)


def test_cli_text_and_graph(runner, stale_build):
    result = run(runner, "trace", "tide", "--graph", stale_build)
    assert result.exit_code == 0
    assert result.stdout.splitlines()[0] == "tide: unreachable (at grammar)"
    assert "changed since" in result.stderr


def test_cli_usage_errors(runner, tmp_path):
    for args in (["trace", "dock"],
                 ["trace", "dock", "--graph", tmp_path, "--project", DATA / "project.toml"],
                 ["trace", "two words", "--project", DATA / "project.toml"]):
        result = run(runner, *args)
        assert result.exit_code == 2
        assert len(result.stderr.strip().splitlines()) == 1


def test_cli_bad_files(runner, tmp_path):
    result = run(runner, "trace", "dock", "--graph", tmp_path)
    assert result.exit_code == 1
    assert "not a netbuild build directory" in result.stderr
    bad = tmp_path / "bad.arpa"
    bad.write_text("\\data\\\nngram 1=x\n", encoding="utf-8")
    project = tmp_path / "p.toml"
    project.write_text(f'[inputs]\nlexicon = "{DATA / "lexicon.txt"}"\nlm = "{bad}"\n'
                       '[lexicon]\nprobabilities = true\n', encoding="utf-8")
    result = run(runner, "trace", "dock", "--project", project)
    assert result.exit_code == 1
    assert result.stderr.startswith(f"{bad}:")


def test_full_graph_build_is_traced_through_every_stage(tmp_path):
    """With a context map the build's graph is the full graph; trace examines the
    context map and the full graph too (fixtures of tests/data/full, read only)."""
    from netbuild.workflow import build

    full = DATA.parent / "full"
    project = tmp_path / "project.toml"
    project.write_text(
        "[inputs]\n"
        + "".join(f'{k} = "{full / v}"\n' for k, v in (
            ("phones", "inventory.txt"), ("lexicon", "lexicon.txt"), ("lm", "bigram.arpa"),
            ("context", "triphone.ctx")))
        + "[lexicon]\nprobabilities = true\n", encoding="utf-8")
    build(read_project(project), tmp_path / "out")
    t = trace_build("note", tmp_path / "out")
    assert t.verdict == "ok"
    assert [s.name for s in t.stages] == ["lexicon", "language_model", "context", "grammar",
                                          "lexicon_fst", "wordgraph", "graph"]
    assert all(s.present for s in t.stages)
    graph = t.stage_named("graph").details
    assert graph["reachable"] and graph["best_cost"] is not None
    from_project = trace_project("note", read_project(project))
    assert from_project.stage_named("context").present is True
