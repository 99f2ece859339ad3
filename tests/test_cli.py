"""Tests of the command line: exit codes, stdout and stderr apart, JSON shapes, errors."""

from __future__ import annotations

import json
import math
import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from netbuild import pipeline
from netbuild.cli import INTERRUPTED, cli
from netbuild.errors import CheckFailed


def _patch_minimize(monkeypatch, stage) -> None:
    """Replaces the minimization of both word-graph paths (OpenFst's and the tree's)."""
    monkeypatch.setattr(pipeline, "minimize_stage", stage)
    monkeypatch.setattr(pipeline.lextree, "minimize_tree_graph", stage)


DATA = Path(__file__).resolve().parent / "data" / "cli"
PROJECT = str(DATA / "project.toml")


def run(runner, *args: str):
    result = runner.invoke(cli, [str(a) for a in args], catch_exceptions=False)
    for text in (result.stdout, result.stderr):
        assert "Traceback" not in text
    return result


def snapshot(directory: Path) -> dict[str, bytes]:
    return {str(p.relative_to(directory)): p.read_bytes()
            for p in sorted(directory.rglob("*")) if p.is_file()}


@pytest.fixture
def data(tmp_path: Path) -> Path:
    d = tmp_path / "inputs"
    shutil.copytree(DATA, d)
    return d


@pytest.fixture(scope="module")
def built(tmp_path_factory) -> Path:
    from click.testing import CliRunner

    out = tmp_path_factory.mktemp("cli") / "orchard"
    result = CliRunner().invoke(cli, ["build", "--project", PROJECT, "--out", str(out)])
    assert result.exit_code == 0, result.stderr
    return out


def test_stderr_is_separate(runner):
    # click 8.2+ keeps stderr apart from stdout in CliRunner results.
    result = run(runner, "check", "--project", PROJECT)
    assert ": warning: " in result.stdout and ": warning: " not in result.stderr
    assert "warning(s)" in result.stderr and "warning(s)" not in result.stdout


# --- check ---------------------------------------------------------------------------

def test_check_clean(runner):
    result = run(runner, "check", "--project", PROJECT)
    assert result.exit_code == 0
    lines = result.stdout.splitlines()
    assert len(lines) == 1 and ": warning: " in lines[0] and "'is'" in lines[0]
    assert "0 error(s), 1 warning(s)" in result.stderr


def test_check_clean_json(runner):
    result = run(runner, "check", "--project", PROJECT, "--json")
    assert result.exit_code == 0
    data = json.loads(result.stdout)
    assert set(data) == {"errors", "warnings"}
    assert data["errors"] == []
    assert len(data["warnings"]) == 1
    assert set(data["warnings"][0]) == {"file", "line", "message"}


def test_check_flags_without_project(runner):
    result = run(runner, "check", "--lexicon", DATA / "lexicon.txt", "--lm",
                 DATA / "model.arpa", "--phones", DATA / "inventory.txt", "--oov-policy", "fail")
    assert result.exit_code == 1
    assert "'is'" in result.stdout and ": warning:" not in result.stdout


def test_check_two_broken_files(runner, data: Path):
    lex = data / "lexicon.txt"
    lex.write_text(lex.read_text() + "plum p l uh mm\n")
    arpa = data / "model.arpa"
    arpa.write_text(arpa.read_text().replace("-0.505150\t<s> pick", "-0.50x\t<s> pick"))
    result = run(runner, "check", "--project", data / "project.toml")
    assert result.exit_code == 1
    errors = [line for line in result.stdout.splitlines() if ": warning: " not in line]
    assert any(line.startswith(f"{lex}:") for line in errors)
    assert any(line.startswith(f"{arpa}:") for line in errors)
    lex_line = len(lex.read_text().splitlines())
    assert any(line.startswith(f"{lex}:{lex_line}: ") for line in errors)

    result = run(runner, "check", "--project", data / "project.toml", "--json")
    assert result.exit_code == 1
    report = json.loads(result.stdout)
    files = {e["file"] for e in report["errors"]}
    assert files == {str(lex), str(arpa)}
    for e in report["errors"] + report["warnings"]:
        assert set(e) == {"file", "line", "message"}
        assert e["line"] is None or isinstance(e["line"], int)
        assert e["message"].startswith(e["file"])


def test_check_bad_project_file(runner, data: Path):
    p = data / "project.toml"
    p.write_text(p.read_text().replace("[grammar]", "[grammer]"))
    result = run(runner, "check", "--project", p)
    assert result.exit_code == 1
    (line,) = result.stdout.splitlines()
    assert line.startswith(f"{p}:{_line_of(p, '[grammer]')}: unknown section [grammer]")
    assert "did you mean 'grammar'" in line
    assert result.stderr.strip() == "1 error(s), 0 warning(s)"
    report = json.loads(run(runner, "check", "--project", p, "--json").stdout)
    assert report["warnings"] == []
    assert [(e["file"], e["line"]) for e in report["errors"]] == \
        [(str(p), _line_of(p, "[grammer]"))]


def _line_of(path: Path, text: str) -> int:
    return 1 + next(i for i, line in enumerate(path.read_text().splitlines()) if text in line)


def test_check_nothing_given(runner, tmp_path: Path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    result = run(runner, "check")
    assert result.exit_code == 1
    lines = result.stdout.splitlines()
    assert len(lines) == 2
    assert "no lexicon given" in lines[0] and "--lexicon" in lines[0]
    assert "no lm given" in lines[1] and "--lm" in lines[1]
    result = run(runner, "build", "--out", "x")
    assert result.exit_code == 1 and "no lexicon given" in result.stderr
    assert not (tmp_path / "x").exists()


# --- usage errors ----------------------------------------------------------------------

@pytest.mark.parametrize("args", [
    ["check", "--lexicon", "no-such-file.txt"],
    ["check", "--project", PROJECT, "--frobnicate"],
    ["build", "--project", PROJECT],  # --out missing
    ["build", "--project", PROJECT, "--out", "x", "--fst-type", "sparse"],
    ["build", "--project", PROJECT, "--out", "x", "--determinize-max-memory", "lots"],
    ["build", "--project", PROJECT, "--out", "x", "--silence-probability", "1.5"],
    ["score"],
    ["estimate", "--text", "missing.txt", "-o", "x.arpa"],
    ["estimate", "--text", PROJECT, "--order", "0", "-o", "x.arpa"],
    ["stats"],
    ["no-such-command"],
])
def test_usage_errors_are_one_line(runner, args, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    result = run(runner, *args)
    assert result.exit_code == 2
    assert result.stdout == ""
    (line,) = result.stderr.strip().splitlines()
    assert line.startswith("netbuild") and "error:" in line and "--help" in line


def test_missing_file_names_the_flag(runner, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    result = run(runner, "check", "--lm", "gone.arpa")
    assert "'--lm'" in result.stderr and "gone.arpa" in result.stderr


def test_version_and_help(runner):
    assert run(runner, "--version").stdout.strip().endswith("0.1.0")
    for command in ("check", "build", "stats", "score", "estimate"):
        result = run(runner, command, "--help")
        assert result.exit_code == 0 and "Usage:" in result.stdout


def test_python_dash_m():
    result = subprocess.run([sys.executable, "-m", "netbuild", "build", "--out"],
                            capture_output=True, text=True, timeout=60)
    assert result.returncode == 2
    assert "Traceback" not in result.stderr and result.stderr.count("\n") == 1


# --- build ------------------------------------------------------------------------------

def test_build_table_and_progress(built: Path, runner, tmp_path: Path):
    out = tmp_path / "again"
    result = run(runner, "build", "--project", PROJECT, "--out", out)
    assert result.exit_code == 0
    stages = ["grammar", "lexicon", "compose-determinize", "minimize", "push"]
    progress = [line for line in result.stderr.splitlines() if "states" in line]
    assert [line.split(":")[0] for line in progress] == stages
    for line in progress:
        assert "arcs" in line and " s, peak " in line and "MiB" in line
    table = result.stdout.splitlines()
    assert table[0].split() == ["stage", "states", "arcs", "seconds", "peak"]
    assert [row.split()[0] for row in table[1:1 + len(stages)]] == stages
    assert table[-1] == f"wrote {out}"
    assert any("'is'" in line and "warning" in line for line in result.stderr.splitlines())
    manifest = json.loads((out / "manifest.json").read_text())
    rows = {row.split()[0]: row.split() for row in table[1:1 + len(stages)]}
    for s in manifest["stages"]:
        assert rows[s["name"]][1:3] == [str(s["states"]), str(s["arcs"])]


def test_build_json_is_the_manifest(runner, tmp_path: Path):
    out = tmp_path / "j"
    result = run(runner, "build", "--project", PROJECT, "--out", out, "--json", "--fast",
                 "--fst-type", "const", "--determinize-max-memory", "512MiB")
    assert result.exit_code == 0
    manifest = json.loads(result.stdout)
    assert manifest == json.loads((out / "manifest.json").read_text())
    for key in ("graph", "word_symbols", "input_symbols", "stages", "inputs", "version"):
        assert key in manifest
    for s in manifest["stages"]:
        assert {"name", "states", "arcs", "seconds", "peak_rss_bytes"} <= set(s)
    assert set(manifest["inputs"]) == {"lexicon", "lm", "phones"}
    assert manifest["options"]["checks"] is False  # --fast
    assert manifest["options"]["fst_type"] == "const"
    assert manifest["options"]["determinize_max_memory"] == 512 * 2**20


def test_build_input_error(runner, data: Path, tmp_path: Path):
    lex = data / "lexicon.txt"
    lex.write_text(lex.read_text() + "plum p l uh mm\nfig\n")
    result = run(runner, "build", "--project", data / "project.toml", "--out", tmp_path / "o")
    assert result.exit_code == 1
    lines = result.stderr.splitlines()
    n = len(lex.read_text().splitlines())
    assert lines[0].startswith(f"{lex}:{n - 1}: ") and lines[1].startswith(f"{lex}:{n}: ")
    assert lines[-1] == "2 problems found"
    assert not (tmp_path / "o").exists()


def test_build_stage_error_keeps_previous(built: Path, runner, tmp_path: Path, monkeypatch):
    out = tmp_path / "orchard"
    shutil.copytree(built, out)
    before = snapshot(out)

    def boom(ifst, method="encoded"):
        from netbuild.errors import StageError
        raise StageError("minimize", "injected failure", "nothing to fix")

    _patch_minimize(monkeypatch, boom)
    result = run(runner, "build", "--project", PROJECT, "--out", out)
    assert result.exit_code == 1
    assert "error: minimize: injected failure; nothing to fix" in result.stderr
    assert snapshot(out) == before
    assert os.listdir(tmp_path) == ["orchard"]


def test_build_interrupt(built: Path, runner, tmp_path: Path, monkeypatch):
    out = tmp_path / "orchard"
    shutil.copytree(built, out)
    before = snapshot(out)

    def interrupted(ifst, method="encoded"):
        raise KeyboardInterrupt

    _patch_minimize(monkeypatch, interrupted)
    result = run(runner, "build", "--project", PROJECT, "--out", out)
    assert result.exit_code == 130
    assert result.stderr.strip().splitlines()[-1] == INTERRUPTED
    assert snapshot(out) == before
    assert os.listdir(tmp_path) == ["orchard"]


def test_build_internal_check_failure_exits_3(runner, tmp_path: Path, monkeypatch):
    def broken(ifst, method="encoded"):
        raise CheckFailed("minimize", "the graph lost a path", "/tmp/evidence.fst")

    _patch_minimize(monkeypatch, broken)
    result = run(runner, "build", "--project", PROJECT, "--out", tmp_path / "o")
    assert result.exit_code == 3
    last = result.stderr.splitlines()[-1]
    assert last.startswith("internal error after stage 'minimize': the graph lost a path")
    assert "/tmp/evidence.fst" in last
    assert not (tmp_path / "o").exists()


def test_build_refuses_foreign_directory(runner, tmp_path: Path):
    out = tmp_path / "docs"
    out.mkdir()
    (out / "notes.txt").write_text("mine")
    result = run(runner, "build", "--project", PROJECT, "--out", out)
    assert result.exit_code == 1
    assert "is not a netbuild build directory; choose another --out" in result.stderr
    assert "states" not in result.stderr  # refused before any stage ran
    assert (out / "notes.txt").read_text() == "mine"


# --- score ------------------------------------------------------------------------------

def test_score_json(built: Path, runner, tmp_path: Path):
    sentences = tmp_path / "s.txt"
    sentences.write_text("pick the red apples\n\nwater the pear trees\n")
    result = run(runner, "score", "--graph", built, "--json", "--file", sentences,
                 "the pears are ripe", "the plums are ripe")
    assert result.exit_code == 0
    scores = json.loads(result.stdout)
    assert isinstance(scores, list) and len(scores) == 4
    for s in scores:
        assert set(s) == {"sentence", "lm_cost", "best_path_cost", "oov"}
    assert [s["sentence"] for s in scores] == ["the pears are ripe", "the plums are ripe",
                                               "pick the red apples", "water the pear trees"]
    assert scores[1]["oov"] == ["plums"]
    assert scores[1]["lm_cost"] is None and scores[1]["best_path_cost"] is None  # no <unk>
    # reference: the ARPA back-off rule (explicit bigrams need no back-off) over the
    # bigram lines of tests/data/cli/model.arpa, which hold (count - 0.5) / history count:
    # P(pick|<s>) = 2.5/8 (log10 -0.505150), P(the|pick) = 1.5/3, P(red|the) = 1.5/7,
    # P(apples|red) = 0.5/2, P(</s>|apples) = 0.5/2
    log10 = -0.505150 + math.log10(1.5 / 3) + math.log10(1.5 / 7) + math.log10(0.5 / 2) \
        + math.log10(0.5 / 2)
    assert scores[2]["lm_cost"] == pytest.approx(-log10 * math.log(10), abs=1e-4)
    assert scores[2]["best_path_cost"] <= scores[2]["lm_cost"] + 1e-4
    assert scores[2]["oov"] == []


def test_score_text(built: Path, runner):
    result = run(runner, "score", "--graph", built, "the red apple is ripe")
    assert result.exit_code == 0
    (line,) = result.stdout.splitlines()
    assert line.split()[:2] == ["inf", "inf"] and "(not in the graph: is)" in line


def test_score_needs_a_build(runner, tmp_path: Path):
    result = run(runner, "score", "--graph", tmp_path, "pick the red apples")
    assert result.exit_code == 1
    assert result.stderr.startswith(f"{tmp_path}: not a netbuild build directory")
    assert len(result.stderr.strip().splitlines()) == 1


def test_score_without_sentences(built: Path, runner):
    result = run(runner, "score", "--graph", built)
    assert result.exit_code == 2 and "no sentences given" in result.stderr


# --- stats -------------------------------------------------------------------------------

def test_stats_json(built: Path, runner):
    manifest = json.loads((built / "manifest.json").read_text())
    for target in (built / "graph.fst", built):
        result = run(runner, "stats", target, "--json")
        assert result.exit_code == 0
        data = json.loads(result.stdout)
        assert data["file"] == str(target) and data["fst_type"] == "vector"
        assert data["states"] == manifest["stages"][-1]["states"]
        assert data["arcs"] == manifest["stages"][-1]["arcs"]


def test_stats_const_file(runner, tmp_path: Path):
    out = tmp_path / "c"
    assert run(runner, "build", "--project", PROJECT, "--out", out, "--fst-type", "const",
               "--fast").exit_code == 0
    data = json.loads(run(runner, "stats", out / "graph.fst", "--json").stdout)
    manifest = json.loads((out / "manifest.json").read_text())
    assert data["fst_type"] == "const"
    assert (data["states"], data["arcs"]) == (manifest["stages"][-1]["states"],
                                              manifest["stages"][-1]["arcs"])


def test_stats_text(built: Path, runner):
    result = run(runner, "stats", built / "grammar.fst")
    assert result.exit_code == 0 and result.stdout.strip()


def test_stats_bad_file(runner, tmp_path: Path):
    bad = tmp_path / "bad.fst"
    bad.write_bytes(b"not an fst")
    result = run(runner, "stats", bad)
    assert result.exit_code == 1
    (line,) = result.stderr.strip().splitlines()
    assert line.startswith(f"{bad}: ") and "; " in line


# --- estimate ------------------------------------------------------------------------------

def test_estimate_writes_a_model(runner, tmp_path: Path):
    text = tmp_path / "corpus.txt"
    text.write_text("pick the red apples\npick the green pears\nwater the pear trees\n")
    out = tmp_path / "m.arpa"
    result = run(runner, "estimate", "--text", text, "--order", "2", "-o", out, "--json")
    assert result.exit_code == 0
    summary = json.loads(result.stdout)
    assert set(summary) >= {"output", "order", "counts"}
    assert summary["order"] == 2 and summary["output"] == str(out)
    from netbuild.io.arpa import read_arpa
    model = read_arpa(out)
    assert summary["counts"] == model.counts()
    # reference: 9 distinct words plus <s> and </s> (common practice, no source for
    # listing <s> as a unigram; ARPA files written by estimators do)
    assert model.counts()[0] == 11
    assert os.listdir(tmp_path) == sorted(os.listdir(tmp_path)) and \
        set(os.listdir(tmp_path)) == {"corpus.txt", "m.arpa"}


def test_estimate_text_output(runner, tmp_path: Path):
    text = tmp_path / "corpus.txt"
    text.write_text("water the pear trees\n")
    out = tmp_path / "m.arpa"
    result = run(runner, "estimate", "--text", text, "-o", out)
    assert result.exit_code == 0 and result.stdout.startswith(f"wrote {out}")


def test_estimate_gzip_and_unk(runner, tmp_path: Path):
    text = tmp_path / "corpus.txt"
    text.write_text("pick the red apples\nwater the pear trees\n")
    out = tmp_path / "m.arpa.gz"
    result = run(runner, "estimate", "--text", text, "--order", "1", "--unk", "-o", out)
    assert result.exit_code == 0
    import gzip
    with gzip.open(out, "rt", encoding="utf-8") as f:  # reference: RFC 1952 via gzip
        assert f.readline().strip() == "\\data\\"
    from netbuild.io.arpa import read_arpa
    assert "<unk>" in read_arpa(out).vocab
    assert set(os.listdir(tmp_path)) == {"corpus.txt", "m.arpa.gz"}


def test_estimate_bad_text(runner, tmp_path: Path):
    text = tmp_path / "corpus.txt"
    text.write_text("pick the <s> apples\nwater the !pear trees\n")
    result = run(runner, "estimate", "--text", text, "-o", tmp_path / "m.arpa")
    assert result.exit_code == 1
    lines = result.stderr.splitlines()
    assert lines[0].startswith(f"{text}:1: reserved symbol '<s>'")
    assert lines[1].startswith(f"{text}:2: reserved symbol '!pear'")
    assert not (tmp_path / "m.arpa").exists()
