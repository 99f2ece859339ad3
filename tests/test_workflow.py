"""Tests of the build workflow: input checks, the atomic output directory, the manifest."""

from __future__ import annotations

import dataclasses
import hashlib
import json
import os
import shutil
import signal
from pathlib import Path

import pynini
import pytest
import pywrapfst

from netbuild import pipeline, workflow
from netbuild.errors import InputError, ProjectError, StageError
from netbuild.io.arpa import read_arpa
from netbuild.io.phones import read_phones
from netbuild.project import apply_overrides, read_project
from netbuild.symbols import BACKOFF, SENTENCE_END, SENTENCE_START, disambiguation_marker
from netbuild.workflow import (atomic_directory, build, check_inputs, load_build,
                               missing_pronunciations)


def _patch_minimize(monkeypatch, stage) -> None:
    """Replaces the minimization of both word-graph paths (OpenFst's and the tree's)."""
    monkeypatch.setattr(pipeline, "minimize_stage", stage)
    monkeypatch.setattr(pipeline.lextree, "minimize_tree_graph", stage)


DATA = Path(__file__).resolve().parent / "data" / "cli"
DEMO = Path(__file__).resolve().parents[1] / "examples" / "ropeway" / "project.toml"


def snapshot(directory: Path) -> dict[str, bytes]:
    """Every file under `directory` by relative path, with its bytes."""
    return {str(p.relative_to(directory)): p.read_bytes()
            for p in sorted(directory.rglob("*")) if p.is_file()}


@pytest.fixture
def data(tmp_path: Path) -> Path:
    """A private copy of the orchard inputs (tests may break them)."""
    d = tmp_path / "inputs"
    shutil.copytree(DATA, d)
    return d


@pytest.fixture(scope="module")
def first_build(tmp_path_factory) -> tuple[Path, workflow.BuildResult]:
    out = tmp_path_factory.mktemp("builds") / "orchard"
    result = build(read_project(DATA / "project.toml"), out)
    return out, result


def copy_build(first_build, tmp_path: Path) -> Path:
    out = tmp_path / "out" / "orchard"
    shutil.copytree(first_build[0], out)
    return out


# --- check_inputs ------------------------------------------------------------------

def test_clean_inputs_have_only_the_oov_warning():
    diag = check_inputs(read_project(DATA / "project.toml"))
    assert diag.errors == []
    assert len(diag.warnings) == 1
    text = str(diag.warnings[0])
    assert "'is'" in text and "dropped" in text and text.startswith(str(DATA / "model.arpa"))


def test_missing_pronunciations_skip_sentence_markers():
    model = read_arpa(DATA / "model.arpa")
    from netbuild.io.lexicon import read_lexicon
    lexicon = read_lexicon(DATA / "lexicon.txt", read_phones(DATA / "inventory.txt"))
    assert missing_pronunciations(model, lexicon) == ["is"]
    assert SENTENCE_START in model.vocab and SENTENCE_END in model.vocab


def test_problems_of_two_files_in_one_run(data: Path):
    lex = data / "lexicon.txt"
    lex.write_text(lex.read_text() + "plum p l uh mm\nbarrow\n")
    arpa = data / "model.arpa"
    arpa.write_text(arpa.read_text().replace("ngram 2=31", "ngram 2=33"))
    diag = check_inputs(read_project(data / "project.toml"))
    files = {p.path for p in diag.errors}
    assert str(lex) in files and str(arpa) in files
    lex_lines = sorted(p.line for p in diag.errors if p.path == str(lex))
    n = len(lex.read_text().splitlines())
    assert lex_lines == [n - 1, n]  # the unknown phone and the word without phones
    assert any("mm" in str(p) for p in diag.errors)
    for p in diag.errors:
        assert "; " in str(p)


def test_broken_inventory_still_checks_the_other_files(data: Path):
    (data / "inventory.txt").write_text("p\np\n")
    arpa = data / "model.arpa"
    arpa.write_text(arpa.read_text().replace("ngram 1=18", "ngram 1=19"))
    diag = check_inputs(read_project(data / "project.toml"))
    files = {p.path for p in diag.errors}
    assert {str(data / "inventory.txt"), str(arpa)} <= files


@pytest.mark.parametrize("policy, unk, severity", [
    ("fail", False, "error"), ("unk", True, "warning"), ("unk", False, "error"),
    ("drop", False, "warning")])
def test_oov_policy_decides_severity(data: Path, policy: str, unk: bool, severity: str):
    if unk:
        with open(data / "lexicon.txt", "a") as f:
            f.write("<unk> sil\n")
    project = apply_overrides(read_project(data / "project.toml"), oov_policy=policy)
    diag = check_inputs(project)
    found = [p for p in diag.problems if "no pronunciation" in p.message]
    assert len(found) == 1 and found[0].severity == severity
    assert "1 word(s)" in found[0].message
    assert ("<unk>" in found[0].message) == (policy == "unk")


def test_unk_policy_builds_with_unk_word(data: Path, tmp_path: Path):
    with open(data / "lexicon.txt", "a") as f:
        f.write("<unk> sil\n")
    project = apply_overrides(read_project(data / "project.toml"), oov_policy="unk",
                              checks=False)
    result = build(project, tmp_path / "u")
    assert result.manifest["vocabulary"]["mapped_to_unk"] == ["is"]
    assert result.manifest["vocabulary"]["dropped"] == []
    assert load_build(tmp_path / "u").word_symbols.find("<unk>") > 0


def test_oov_report_lists_a_few_and_the_count(data: Path):
    lex = data / "lexicon.txt"
    kept = [line for line in lex.read_text().splitlines()
            if line.startswith("#") or line.split()[0] in ("the", "pick")]
    lex.write_text("\n".join(kept) + "\n")
    diag = check_inputs(read_project(data / "project.toml"))
    (warning,) = [p for p in diag.warnings if "no pronunciation" in p.message]
    assert "14 word(s)" in warning.message and "and 6 more" in warning.message


def test_no_inventory_uses_lexicon_phones(data: Path):
    project = read_project(data / "project.toml")
    project = dataclasses.replace(project, phones=None)
    diag = check_inputs(project)
    assert diag.errors == []
    assert any("no phone inventory" in p.message for p in diag.warnings)


# --- atomic_directory -------------------------------------------------------------------

def test_atomic_directory_creates_and_replaces(tmp_path: Path):
    out = tmp_path / "a" / "b"
    with atomic_directory(out) as tmp:
        assert tmp.parent == out.parent and tmp != out
        (tmp / "manifest.json").write_text(json.dumps({"format": "netbuild-build", "n": 1}))
    assert json.loads((out / "manifest.json").read_text())["n"] == 1
    with atomic_directory(out) as tmp:
        (tmp / "manifest.json").write_text(json.dumps({"format": "netbuild-build", "n": 2}))
        assert json.loads((out / "manifest.json").read_text())["n"] == 1  # old kept until done
    assert json.loads((out / "manifest.json").read_text())["n"] == 2
    assert sorted(os.listdir(out.parent)) == ["b"]
    assert (out.stat().st_mode & 0o777) == (0o777 & ~_umask())


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


@pytest.mark.parametrize("exc", [RuntimeError("boom"), KeyboardInterrupt()])
def test_atomic_directory_failure_keeps_previous(tmp_path: Path, exc: BaseException):
    out = tmp_path / "b"
    with atomic_directory(out) as tmp:
        (tmp / "manifest.json").write_text('{"format": "netbuild-build"}')
        (tmp / "graph.fst").write_bytes(b"old")
    before = snapshot(out)
    with pytest.raises(type(exc)):
        with atomic_directory(out) as tmp:
            (tmp / "graph.fst").write_bytes(b"new")
            raise exc
    assert snapshot(out) == before
    assert os.listdir(tmp_path) == ["b"]


def test_atomic_directory_refuses_foreign_directory(tmp_path: Path):
    out = tmp_path / "notes"
    out.mkdir()
    (out / "todo.txt").write_text("keep me")
    with pytest.raises(ProjectError, match="is not a netbuild build directory; choose another"):
        with atomic_directory(out):
            pass
    assert (out / "todo.txt").read_text() == "keep me"
    assert os.listdir(tmp_path) == ["notes"]


def test_atomic_directory_accepts_empty_directory(tmp_path: Path):
    out = tmp_path / "empty"
    out.mkdir()
    with atomic_directory(out) as tmp:
        (tmp / "x").write_text("1")
    assert (out / "x").read_text() == "1"


def test_atomic_directory_refuses_file(tmp_path: Path):
    out = tmp_path / "f"
    out.write_text("x")
    with pytest.raises(ProjectError):
        with atomic_directory(out):
            pass


# --- build -------------------------------------------------------------------------

def test_build_writes_directory_and_manifest(first_build):
    out, result = first_build
    assert sorted(os.listdir(out)) == ["grammar.fst", "graph.fst", "input.syms",
                                       "lexicon.fst", "manifest.json", "word.syms"]
    assert [n for n in os.listdir(out.parent) if n != "orchard"] == []
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest == result.manifest
    for key in ("graph", "word_symbols", "input_symbols", "stages", "inputs", "version",
                "intermediates", "auxiliary_markers", "markers", "vocabulary", "options"):
        assert key in manifest
    assert manifest["graph"] == "graph.fst"
    assert manifest["intermediates"] == {"grammar": "grammar.fst", "lexicon": "lexicon.fst",
                                         "wordgraph": "graph.fst"}
    names = [s["name"] for s in manifest["stages"]]
    assert names == ["grammar", "lexicon", "compose-determinize", "minimize", "push"]
    for s in manifest["stages"]:
        assert {"name", "states", "arcs", "seconds", "peak_rss_bytes"} <= set(s)
        assert s["states"] > 0 and s["arcs"] > 0 and s["peak_rss_bytes"] > 0
    for key, name in (("lexicon", "lexicon.txt"), ("lm", "model.arpa"),
                      ("phones", "inventory.txt")):
        rec = manifest["inputs"][key]
        assert rec["path"] == str(DATA / name)
        # reference: FIPS 180-4 SHA-256, via hashlib
        assert rec["sha256"] == hashlib.sha256((DATA / name).read_bytes()).hexdigest()
    assert manifest["vocabulary"]["dropped"] == ["is"]
    assert 0 < manifest["vocabulary"]["removed_unigram_mass"] < 1
    assert manifest["options"]["grammar"]["oov_policy"] == "drop"
    assert manifest["options"]["determinize_max_memory"] == 2**30


# The key under which a build kept with keep_intermediates holds each stage's FST.
_STAGE_FST = {"grammar": "grammar", "lexicon": "lexicon", "compose-determinize": "determinized",
              "minimize": "minimized", "push": "pushed",
              "context": "context", "hmm": "hmm", "compose-context": "clg",
              "determinize-models": "determinized_models", "remove-markers": "unmarked",
              "minimize-models": "minimized_models", "expand-hmm": "expanded",
              "self-loops": "graph"}


@pytest.mark.slow
def test_manifest_bytes_are_the_sizes_of_the_stage_fsts(tmp_path: Path):
    """The demo's full build: each stage's "bytes" (taken when the stage finished) are
    the size of that stage's FST, and the same whether or not the FSTs are kept."""
    from netbuild.footprint import fst_size

    kept = build(read_project(DEMO), tmp_path / "kept", keep_intermediates=True)
    plain = build(read_project(DEMO), tmp_path / "plain")
    assert kept.full is not None and plain.full is not None
    fsts = {**kept.graph.intermediates, **kept.full.intermediates}
    stages = kept.manifest["stages"]
    assert [s["name"] for s in stages] == list(_STAGE_FST)
    for entry in stages:
        fst = fsts[_STAGE_FST[entry["name"]]]
        report = fst_size(fst)
        assert entry["bytes"] == {"const": dataclasses.asdict(report.const),
                                  "vector": dataclasses.asdict(report.vector)}, entry["name"]
        # reference: the bytes OpenFst itself writes for the (vector) FST
        assert entry["bytes"]["vector"]["disk_bytes"] == len(fst.write_to_string())
        assert (entry["states"], entry["arcs"]) == (fst.num_states(), report.arcs)
    assert [s["bytes"] for s in plain.manifest["stages"]] == [s["bytes"] for s in stages]
    # By default a full build keeps only C and H as FSTs: the word-level graph was let
    # go once written (its file is read back when asked for) and the final graph is
    # held as arrays, built into an FST on demand.
    from netbuild.io.fstfile import ArrayFst

    assert plain.graph.intermediates == {}
    assert set(plain.full.intermediates) == {"context", "hmm"}
    assert isinstance(plain.full.graph, ArrayFst)
    assert plain.graph.fst.num_states() == kept.graph.fst.num_states()
    assert plain.graph.fst.print() == kept.graph.fst.print()
    assert plain.full.fst.print() == kept.full.fst.print()


def test_build_symbol_tables_follow_the_layout(first_build):
    out, result = first_build
    loaded = load_build(out)
    model = read_arpa(DATA / "model.arpa")
    words = [loaded.word_symbols.find(i) for i in range(loaded.word_symbols.num_symbols())]
    expected = [w for w in model.vocab if w not in (SENTENCE_START, SENTENCE_END, "is")]
    assert words == ["<epsilon>", *expected, BACKOFF]
    inventory = read_phones(DATA / "inventory.txt")
    k = result.manifest["markers"]["count"]
    phones = [loaded.input_symbols.find(i) for i in range(loaded.input_symbols.num_symbols())]
    markers = [disambiguation_marker(j) for j in range(1, k + 1)]
    assert phones == ["<epsilon>", *inventory.phones, BACKOFF, *markers]
    assert result.manifest["auxiliary_markers"] == [BACKOFF, *markers]
    # pear/pair are homophones, apple is a prefix of apples, a of of: all carry markers.
    assert {"pear", "pair", "apple", "a"} <= set(result.manifest["markers"]["words"])
    assert k >= 2


def test_loaded_fsts_are_the_built_fsts(first_build):
    """The files read back print exactly as the FSTs built in memory (AT&T text form)."""
    out, result = first_build
    loaded = load_build(out)
    built = result.graph.intermediates
    for name, fst in (("wordgraph", loaded.graph), ("grammar", loaded.grammar),
                      ("lexicon", loaded.lexicon)):
        assert fst.print() == built[name].print(), name
    assert loaded.graph.num_states() == result.stages[-1].states
    assert loaded.graph.output_symbols().num_symbols() == loaded.word_symbols.num_symbols()
    assert loaded.graph.input_symbols().find("!amb1") > 0


def test_build_const_graph(tmp_path: Path):
    project = apply_overrides(read_project(DATA / "project.toml"), fst_type="const",
                              push_weights=False, checks=False)
    result = build(project, tmp_path / "c")
    assert pywrapfst.Fst.read(str(tmp_path / "c" / "graph.fst")).fst_type() == "const"
    assert [s["name"] for s in result.manifest["stages"]][-1] == "minimize"
    assert result.manifest["options"]["checks"] is False


def test_build_input_errors_raise_all_and_write_nothing(data: Path, tmp_path: Path):
    lex = data / "lexicon.txt"
    lex.write_text(lex.read_text() + "plum p l uh mm\n")
    arpa = data / "model.arpa"
    arpa.write_text(arpa.read_text().replace("ngram 2=31", "ngram 2=30"))
    out = tmp_path / "never"
    with pytest.raises(InputError) as info:
        build(read_project(data / "project.toml"), out)
    assert {p.path for p in info.value.problems} == {str(lex), str(arpa)}
    assert not out.exists() and "never" not in "".join(os.listdir(tmp_path))


@pytest.mark.parametrize("exc", [StageError("minimize", "injected failure"),
                                 KeyboardInterrupt()])
def test_failure_mid_build_keeps_previous(first_build, tmp_path: Path, monkeypatch, exc):
    out = copy_build(first_build, tmp_path)
    before = snapshot(out)
    seen = []

    def boom(ifst, method="encoded"):
        seen.append(ifst)
        raise exc

    _patch_minimize(monkeypatch, boom)
    with pytest.raises(type(exc)):
        build(read_project(DATA / "project.toml"), out)
    assert seen  # the failure did happen mid-build, after determinization
    assert snapshot(out) == before
    assert os.listdir(out.parent) == ["orchard"]


def test_failure_while_writing_keeps_previous(first_build, tmp_path: Path, monkeypatch):
    out = copy_build(first_build, tmp_path)
    before = snapshot(out)
    real = workflow.write_fst
    calls = []

    def write_then_fail(fst, path, fst_type="vector"):
        calls.append(path)
        if len(calls) == 2:
            raise KeyboardInterrupt
        real(fst, path, fst_type)

    monkeypatch.setattr(workflow, "write_fst", write_then_fail)
    with pytest.raises(KeyboardInterrupt):
        build(read_project(DATA / "project.toml"), out)
    assert len(calls) == 2
    assert snapshot(out) == before
    assert os.listdir(out.parent) == ["orchard"]


def test_sigterm_mid_build_cleans_up(first_build, tmp_path: Path, monkeypatch):
    out = copy_build(first_build, tmp_path)
    before = snapshot(out)
    handler_before = signal.getsignal(signal.SIGTERM)

    def terminated(ifst, method="encoded"):
        os.kill(os.getpid(), signal.SIGTERM)
        raise AssertionError("SIGTERM did not interrupt the build")

    _patch_minimize(monkeypatch, terminated)
    with pytest.raises(KeyboardInterrupt):
        build(read_project(DATA / "project.toml"), out)
    assert snapshot(out) == before
    assert os.listdir(out.parent) == ["orchard"]
    assert signal.getsignal(signal.SIGTERM) is handler_before


def test_progress_called_per_stage(tmp_path: Path):
    seen = []
    project = apply_overrides(read_project(DATA / "project.toml"), checks=False)
    result = build(project, tmp_path / "p", progress=seen.append)
    assert [r.name for r in seen] == [s["name"] for s in result.manifest["stages"]]
    assert seen[0].details["build_seconds"] >= 0


# --- load_build ---------------------------------------------------------------------

def test_load_build_rejects_non_builds(tmp_path: Path, first_build):
    with pytest.raises(InputError, match="not a netbuild build directory .*; give the"):
        load_build(tmp_path)
    with pytest.raises(InputError, match="not a directory"):
        load_build(tmp_path / "absent")
    (tmp_path / "manifest.json").write_text('{"something": "else"}')
    with pytest.raises(InputError, match="not a netbuild build manifest"):
        load_build(tmp_path)
    (tmp_path / "manifest.json").write_text('{"format": ')
    with pytest.raises(InputError, match="unreadable"):
        load_build(tmp_path)
    out = copy_build(first_build, tmp_path)
    (out / "graph.fst").unlink()
    with pytest.raises(InputError, match=r"graph\.fst: FST file is missing; rebuild"):
        load_build(out)
    shutil.copy(first_build[0] / "graph.fst", out / "graph.fst")
    (out / "lexicon.fst").write_bytes(b"garbage")
    with pytest.raises(InputError, match=r"lexicon\.fst: cannot read the FST"):
        load_build(out)


def test_read_fst_file(first_build, tmp_path: Path):
    out, result = first_build
    graph = workflow.read_fst_file(out)
    assert graph.num_states() == result.stages[-1].states
    assert graph.output_symbols().find("pear") > 0 and graph.input_symbols().find("sil") > 0
    const = tmp_path / "g.const"
    pywrapfst.convert(pynini.Fst.read(str(out / "grammar.fst")), "const").write(str(const))
    assert workflow.read_fst_file(const).fst_type() == "const"  # stored type kept
    bad = tmp_path / "bad.fst"
    bad.write_bytes(b"\x00" * 64)
    with pytest.raises(InputError, match=r"bad\.fst: not an OpenFst binary FST file; give"):
        workflow.read_fst_file(bad)
    with pytest.raises(InputError, match="FST file is missing"):
        workflow.read_fst_file(tmp_path / "none.fst")


def test_plain_json():
    import numpy as np
    value = {"a": np.int64(3), "b": (1.5, float("inf")), "c": {1: np.float32(0.5)},
             "d": Path("/x"), "e": None}
    assert workflow.plain_json(value) == {"a": 3, "b": [1.5, None], "c": {"1": 0.5},
                                          "d": "/x", "e": None}
    json.dumps(workflow.plain_json(value), allow_nan=False)


def test_atomic_directory_puts_old_back_when_rename_fails(tmp_path: Path, monkeypatch):
    out = tmp_path / "b"
    with atomic_directory(out) as tmp:
        (tmp / "manifest.json").write_text('{"format": "netbuild-build"}')
    before = snapshot(out)
    real = os.rename

    def rename(src, dst):
        if Path(src).name.startswith(".b.tmp-"):
            raise OSError(28, "No space left on device")
        real(src, dst)

    monkeypatch.setattr(workflow.os, "rename", rename)
    with pytest.raises(OSError):
        with atomic_directory(out) as tmp:
            (tmp / "manifest.json").write_text('{"format": "netbuild-build", "new": 1}')
    assert snapshot(out) == before
    assert os.listdir(tmp_path) == ["b"]
