"""Tests of `netbuild replay`: decoding phone sequences through the word-level graph.

The demo (examples/ropeway) is built into a temporary directory once per module; the
silence-cost test uses the small harbour-office fixtures of tests/data/trace/.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import pytest

from netbuild.cli import cli
from netbuild.errors import SymbolError
from netbuild.inspectors.replay import replay_build, replayer_for_build
from netbuild.inspectors.trace import build_sources
from netbuild.project import apply_overrides, read_project

ROOT = Path(__file__).resolve().parents[2]
DEMO = ROOT / "examples" / "ropeway" / "project.toml"
TRACE_DATA = ROOT / "tests" / "data" / "trace"
LN10 = math.log(10.0)


@pytest.fixture(scope="module")
def demo(tmp_path_factory) -> Path:
    from netbuild.workflow import build

    out = tmp_path_factory.mktemp("replay") / "demo"
    build(read_project(DEMO), out)
    return out


@pytest.fixture(scope="module")
def replayer(demo):
    return replayer_for_build(demo)


@pytest.fixture(scope="module")
def sources(demo):
    return build_sources(demo)


@pytest.mark.slow
def test_every_pronunciation_replays_to_its_word_or_traced_competitor(sources, replayer):
    """Each demo pronunciation, spoken alone, gives its own word as the best one-word
    hypothesis, unless trace names a cheaper homophone: then replay returns that one.

    reference: trace's competitor is computed from the inputs (G's sentence cost plus the
    pronunciation cost of each homophone), replay from the optimized word-level graph;
    the two must agree (# common practice, no source: an optimized graph keeps the
    cheapest path of each phone/word pair).
    """
    checked = lost = absent = 0
    for word in sources.lexicon.words():
        trace = sources.trace(word)
        for u in trace.stage_named("lexicon").details["one_word_utterances"]:
            single = replayer.replay(u["phones"], nbest=3, max_words=1).hypotheses
            if trace.verdict != "ok":  # e.g. lexicon words the model lacks
                assert all(h.words != (word,) for h in single), (word, trace.verdict)
                absent += 1
                continue
            assert single, f"no one-word hypothesis for {u['phones']}"
            other = u["best_other"]
            if other is not None and other["cost"] < u["own_cost"] - 1e-4:
                assert single[0].words == (other["word"],), (word, u)
                lost += 1
            elif other is None or other["cost"] > u["own_cost"] + 1e-4:
                assert single[0].words == (word,), (word, u)
            else:  # a tie: either may win
                assert single[0].words in ((word,), (other["word"],))
            assert single[0].total == pytest.approx(min(
                u["own_cost"], other["cost"] if other else math.inf)
                + 2 * math.log(2.0), abs=1e-3)  # plus two boundaries without silence
            checked += 1
    assert checked + absent == len({(e.word, e.phones) for e in sources.lexicon.entries})
    assert lost > 0  # the demo has homophones ('brake'/'break', 'two'/'to'/'too', ...)


def test_cost_parts_add_up(replayer):
    """lm + pronunciation + silence equals the graph's own path cost (float32 rounding).

    reference: composition pairs each L path with each G path of the same words, so the
    cheapest total is L's cheapest plus G's cheapest (Mohri, Pereira & Riley 2002,
    "Weighted finite-state transducers in speech recognition", Computer Speech and
    Language 16(1):69-88, section 3).
    """
    for phones in ("k a b i n", "b r ei k", "k a b i n quiet s t o p", "ei",
                   "quiet uh quiet"):
        for h in replayer.replay(phones.split(), nbest=5).hypotheses:
            assert abs(h.rounding) < 1e-3
            assert h.lm + h.pronunciation + h.silence + h.rounding == pytest.approx(h.total)


def test_pronunciation_and_lm_parts(replayer):
    """'a' as 'ei' costs -ln(0.3 / 0.7) to pronounce (lexicon.txt: a 0.7 uh, a 0.3 ei;
    rescaled so the likeliest costs 0), two boundaries without silence cost 2 ln 2
    (silence_probability 0.5), and the lm part is at most the back-off rule's cost.

    reference: kenlm (PyPI kenlm) scores the sentence '<s> a </s>' in log10.
    """
    (h,) = [x for x in replayer.replay(["ei"], nbest=5).hypotheses if x.words == ("a",)]
    assert h.pronunciation == pytest.approx(-math.log(0.3 / 0.7), abs=1e-5)
    assert h.silence == pytest.approx(2 * math.log(2.0), abs=1e-5)
    kenlm = pytest.importorskip("kenlm")
    model = kenlm.Model(str(ROOT / "examples" / "ropeway" / "model.arpa"))
    assert h.lm <= -model.score("a") * LN10 + 1e-4


def test_silence_is_counted_per_boundary(tmp_path):
    """With silence probability 0.2, 'pause the dock pause' has silence at the start and
    the end and none between: 2 (-ln 0.2) + (-ln 0.8).

    reference: the shape of L (netbuild.builders.lexicon docstring): every boundary has
    silence with probability s.
    """
    from netbuild.workflow import build

    project = apply_overrides(read_project(TRACE_DATA / "project.toml"),
                              silence_probability=0.2)
    lexicon = tmp_path / "lexicon.txt"
    lexicon.write_text("".join(
        line for line in (TRACE_DATA / "lexicon.txt").read_text().splitlines(True)
        if not line.startswith("buoy ")), encoding="utf-8")
    project = apply_overrides(project, lexicon=lexicon)
    build(project, tmp_path / "out")
    result = replay_build(tmp_path / "out", "pause dh uh d o k pause".split(), nbest=3)
    best = result.hypotheses[0]
    assert best.words == ("the", "dock")
    assert best.silence == pytest.approx(-2 * math.log(0.2) - math.log(0.8), abs=1e-5)
    assert best.pronunciation == pytest.approx(0.0, abs=1e-5)
    assert abs(best.rounding) < 1e-3


def test_expect_margin_matches_trace(sources, replayer):
    result = replayer.replay("b r ei k".split(), nbest=5, expect=["brake"])
    assert result.hypotheses[0].words == ("break",)
    assert result.expected.words == ("brake",)
    trace = sources.trace("brake")
    (u,) = trace.stage_named("lexicon").details["one_word_utterances"]
    assert result.margin == pytest.approx(-u["margin"], abs=1e-3)
    none = replayer.replay("b r ei k".split(), expect=["cabin"])
    assert none.expected is None and "cannot produce" in none.reason
    unknown = replayer.replay("b r ei k".split(), expect=["zeppelin"])
    assert unknown.expected is None and "zeppelin" in unknown.reason


def test_unknown_phone_is_a_symbol_error(replayer):
    with pytest.raises(SymbolError, match="phone 'kk' is not in the graph's phone table"):
        replayer.replay(["kk"])
    with pytest.raises(SymbolError):
        replayer.replay(["!backoff"])  # markers are not phones


# --- the command line -------------------------------------------------------------------

def run(runner, *args):
    result = runner.invoke(cli, [str(a) for a in args], catch_exceptions=False)
    for text in (result.stdout, result.stderr):
        assert "Traceback" not in text
    return result


def test_cli_json_keys(runner, demo):
    result = run(runner, "replay", "--graph", demo, "--json", "--nbest", "3",
                 "--expect", "brake", "b", "r", "ei", "k")
    assert result.exit_code == 0, result.stderr
    data = json.loads(result.stdout)
    # documented in docs/diagnostics.md
    assert set(data) == {"phones", "hypotheses", "expect"}
    assert set(data["expect"]) == {"words", "hypothesis", "margin", "reason"}
    assert 1 <= len(data["hypotheses"]) <= 3
    for h in data["hypotheses"]:
        assert set(h) == {"words", "total", "lm", "pronunciation", "silence", "rounding"}
    assert data["hypotheses"][0]["words"] == ["break"]


def test_cli_text(runner, demo):
    result = run(runner, "replay", "--graph", demo, "--expect", "brake", "b", "r", "ei", "k")
    assert result.exit_code == 0
    lines = result.stdout.splitlines()
    assert lines[1].endswith("  break")
    assert lines[-1].startswith("expected 'brake': total")


def test_cli_bad_arguments(runner, demo, tmp_path):
    for args in (["replay", "--graph", demo],  # no phones
                 ["replay", "--graph", demo, "kk"],  # unknown phone
                 ["replay", "--graph", demo, "--nbest", "0", "ei"],
                 ["replay", "ei"]):  # no --graph
        result = run(runner, *args)
        assert result.exit_code == 2, args
        assert len(result.stderr.strip().splitlines()) == 1
    result = run(runner, "replay", "--graph", tmp_path, "ei")
    assert result.exit_code == 1
    assert "not a netbuild build directory" in result.stderr
