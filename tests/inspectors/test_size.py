"""Tests of the byte accounting: the formulas against OpenFst's own files and against the
resident memory of a fresh process, and the `size` command."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pynini
import pytest
import pywrapfst
from hypothesis import given, strategies as st

from netbuild.cli import cli
from netbuild.errors import InputError
from netbuild.inspectors.size import (build_sizes, check_budget, file_size, footprints,
                                      fst_size, header_bytes, symbol_table_bytes,
                                      symbol_table_memory)
from netbuild.io.fstfile import arrays_to_fst, write_fst

DATA = Path(__file__).resolve().parents[1] / "data" / "cli"
PROJECT = str(DATA / "project.toml")


def _random_fst(num_states: int, num_arcs: int, seed: int, arc_type: str = "standard",
                table: pynini.SymbolTable | None = None) -> pynini.Fst:
    rng = np.random.default_rng(seed)
    n = max(num_states, 1)
    fst = arrays_to_fst(num_states, 0 if num_states else -1,
                        np.where(rng.random(num_states) < 0.3, 0.5, np.inf),
                        rng.integers(0, n, num_arcs), rng.integers(0, 40, num_arcs),
                        rng.integers(0, 40, num_arcs), rng.random(num_arcs),
                        rng.integers(0, n, num_arcs), arc_type=arc_type)
    if table is not None:
        fst.set_input_symbols(table)
        fst.set_output_symbols(table)
    return fst


def _table(n: int, name: str = "wörter") -> pynini.SymbolTable:
    table = pynini.SymbolTable(name)
    table.add_symbol("<epsilon>")
    for i in range(1, n):
        table.add_symbol(f"gondola{i}" + "é" * (i % 5))
    return table


@given(states=st.integers(0, 60), arcs=st.integers(0, 200), seed=st.integers(0, 9),
       symbols=st.integers(0, 50), log=st.booleans())
def test_formula_equals_written_bytes(tmp_path_factory, states, arcs, seed, symbols, log):
    """The disk formula equals the byte count of the file OpenFst writes, exactly."""
    if states == 0:
        arcs = 0
    table = _table(symbols) if symbols else None
    fst = _random_fst(states, arcs, seed, "log" if log else "standard", table)
    report = fst_size(fst)
    d = tmp_path_factory.mktemp("sz")
    for kind in ("const", "vector"):
        path = d / f"g.{kind}"
        write_fst(fst, path, kind)
        # reference: OpenFst 1.8 writer output (pywrapfst / write_fst), byte count
        assert getattr(report, kind).disk_bytes == path.stat().st_size
        assert file_size(path) == dataclass_with_type(report, kind)


def dataclass_with_type(report, kind):
    import dataclasses

    return dataclasses.replace(report, fst_type=kind)


def test_symbol_table_bytes_equal_openfst_serialization():
    for n in (1, 2, 300):
        table = _table(n, name="t" * n)
        # reference: OpenFst SymbolTable::Write, via pynini write_to_string
        assert symbol_table_bytes(table) == len(table.write_to_string())


def test_header_and_counts():
    assert header_bytes("vector") == 66  # reference: measured OpenFst 1.8.3 empty file
    fst = _random_fst(10, 25, 1)
    report = fst_size(fst)
    # reference: OpenFst's own counts
    assert report.states == fst.num_states()
    assert report.arcs == sum(fst.num_arcs(s) for s in fst.states())
    assert report.states_with_arcs == sum(1 for s in fst.states() if fst.num_arcs(s))
    const, vector = footprints(10, 25, report.states_with_arcs)
    assert const.disk_bytes == 65 + 20 * 10 + 16 * 25
    assert vector.disk_bytes == 66 + 12 * 10 + 16 * 25


_CHILD = r"""
import sys, pywrapfst
def rss():
    with open("/proc/self/statm") as f:
        return int(f.read().split()[1]) * 4096
before = rss()
f = pywrapfst.Fst.read(sys.argv[1])
after = rss()
print(after - before, f.fst_type())
"""


def _loaded_bytes(path: Path) -> tuple[int, str]:
    out = subprocess.run([sys.executable, "-c", _CHILD, str(path)], capture_output=True,
                         text=True, check=True).stdout.split()
    return int(out[0]), out[1]


# Stated tolerance: measured resident growth within 5% of the estimate plus 1 MiB (the
# reader's buffers and allocator slack; measured 0.2-0.3 MiB).
_REL, _ABS = 0.05, 2**20


@pytest.mark.parametrize("states,arcs,symbols", [
    (150_000, 75_000, 0),   # sparse: most states without arcs
    (100_000, 600_000, 0),  # dense
    (20_000, 40_000, 40_000),  # symbol tables dominate
])
def test_memory_estimate_matches_fresh_process(tmp_path, states, arcs, symbols):
    """A fresh process loading the file with pywrapfst grows by the estimate."""
    table = _table(symbols) if symbols else None
    fst = _random_fst(states, arcs, 7, table=table)
    report = fst_size(fst)
    for kind in ("const", "vector"):
        path = tmp_path / f"g.{kind}"
        write_fst(fst, path, kind)
        measured, stored = _loaded_bytes(path)
        assert stored == kind  # pywrapfst.Fst.read keeps the stored type
        estimate = getattr(report, kind).memory_bytes
        # reference: /proc/self/statm resident pages of a fresh process, before/after
        assert abs(measured - estimate) <= _REL * estimate + _ABS, (kind, measured,
                                                                    estimate)


def test_symbol_memory_counts_long_strings():
    short, long = pynini.SymbolTable("a"), pynini.SymbolTable("a")
    short.add_symbol("x" * 15)
    long.add_symbol("x" * 16)
    assert symbol_table_memory(long) > symbol_table_memory(short)  # common practice, no source: 15-byte inline string buffer


def test_budget_margin():
    assert check_budget(10, 10) == (True, 0)
    assert check_budget(11, 10) == (False, -1)


def test_file_size_errors(tmp_path):
    bad = tmp_path / "x.fst"
    bad.write_text("not an fst\n")
    with pytest.raises(InputError, match=r"x\.fst: not an OpenFst binary FST file; give"):
        file_size(bad)
    with pytest.raises(InputError, match="FST file is missing"):
        file_size(tmp_path / "none.fst")
    with pytest.raises(InputError, match="no manifest.json"):
        build_sizes(tmp_path)


@pytest.fixture(scope="module")
def built(tmp_path_factory) -> Path:
    from click.testing import CliRunner

    out = tmp_path_factory.mktemp("size") / "orchard"
    result = CliRunner().invoke(cli, ["build", "--project", PROJECT, "--out", str(out),
                                      "--max-memory", "4GiB"])
    assert result.exit_code == 0, result.stderr
    return out


def test_manifest_records_bytes_per_stage(built: Path):
    manifest = json.loads((built / "manifest.json").read_text())
    for stage in manifest["stages"]:
        assert set(stage["bytes"]) == {"const", "vector"}
        assert stage["bytes"]["const"]["disk_bytes"] > 0
    last = manifest["stages"][-1]
    # reference: the byte count of the graph file OpenFst wrote (vector by default)
    assert last["bytes"]["vector"]["disk_bytes"] == (built / "graph.fst").stat().st_size
    grammar = next(s for s in manifest["stages"] if s["name"] == "grammar")
    assert grammar["bytes"]["vector"]["disk_bytes"] == \
        (built / "grammar.fst").stat().st_size
    assert manifest["options"]["max_memory"] == 4 * 2**30


def test_size_json_for_file_and_directory(built: Path, runner):
    keys = {"states", "arcs", "const", "vector", "symbols_bytes"}
    result = runner.invoke(cli, ["size", str(built / "graph.fst"), "--json"])
    assert result.exit_code == 0, result.stderr
    data = json.loads(result.stdout)
    assert keys <= set(data)
    assert set(data["const"]) == set(data["vector"]) == {"disk_bytes", "memory_bytes"}
    assert data["vector"]["disk_bytes"] == (built / "graph.fst").stat().st_size
    result = runner.invoke(cli, ["size", str(built), "--json"])
    assert result.exit_code == 0, result.stderr
    data = json.loads(result.stdout)
    assert keys <= set(data)
    names = {s["name"] for s in data["stages"]}
    assert {"graph", "grammar", "lexicon"} <= names
    for stage in data["stages"]:
        assert stage["const"]["disk_bytes"] == file_size(built / stage["file"]).const.disk_bytes
    g = pywrapfst.Fst.read(str(built / "graph.fst"))
    assert data["states"] == g.num_states()  # reference: OpenFst's count


def test_size_budget_exit_codes(built: Path, runner):
    need = file_size(built / "graph.fst").vector.memory_bytes
    ok = runner.invoke(cli, ["size", str(built), "--budget", str(need)])
    assert ok.exit_code == 0, ok.stderr
    assert "fits" in ok.stdout and "0 B under" in ok.stdout
    over = runner.invoke(cli, ["size", str(built), "--budget", str(need - 1), "--json"])
    assert over.exit_code == 1
    verdict = json.loads(over.stdout)["budget"]
    assert verdict == {"budget_bytes": need - 1, "fits": False, "margin_bytes": -1,
                       "layout": "vector"}
    bad = runner.invoke(cli, ["size", str(built), "--budget", "lots"])
    assert bad.exit_code == 2 and "is not a size" in bad.stderr


def test_size_usage_errors(built: Path, runner, tmp_path):
    assert runner.invoke(cli, ["size"]).exit_code == 2
    assert runner.invoke(cli, ["size", str(built), "--predict"]).exit_code == 2
    empty = tmp_path / "empty"
    empty.mkdir()
    result = runner.invoke(cli, ["size", str(empty)])
    assert result.exit_code == 1
    assert "no manifest.json" in result.stderr and "Traceback" not in result.stderr
