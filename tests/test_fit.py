"""Tests of netbuild.fit: pruning a model until the graph fits a memory budget."""

from __future__ import annotations

import json
import math
import pathlib

import pytest

from netbuild.cli import cli
from netbuild.errors import ProjectError
from netbuild.fit import fit, format_fit_table, graph_bytes
from netbuild.inspectors.size import file_size
from netbuild.io.arpa import read_arpa
from netbuild.lm.estimate import read_sentences
from netbuild.lm.perplexity import perplexity
from netbuild.project import read_project
from netbuild.workflow import build, load_build

HERE = pathlib.Path(__file__).parent
SMALL = HERE / "data" / "cli" / "project.toml"
DEMO = HERE.parent / "examples" / "ropeway"


@pytest.fixture(scope="module")
def small_full_bytes(tmp_path_factory) -> int:
    out = tmp_path_factory.mktemp("full") / "build"
    build(read_project(SMALL), out)
    return graph_bytes(out, "const")


def _const_bytes(path: pathlib.Path) -> int:
    """const in-memory bytes of a graph file: 20 per state + 16 per arc plus the
    symbol tables (netbuild.inspectors.size; OpenFst's ConstFst layout)."""
    return file_size(path).const.memory_bytes


def test_small_project_fits_within_five_percent(tmp_path, small_full_bytes):
    budget = int(small_full_bytes * 0.7)
    heldout = [["pick", "the", "red", "apples"], ["the", "pears", "are", "ripe"]]
    result = fit(read_project(SMALL), budget, tmp_path / "fit", heldout=heldout)
    size = _const_bytes(tmp_path / "fit" / "graph.fst")
    assert size == result.chosen.actual_bytes
    assert budget * 0.95 <= size <= budget
    assert result.within_tolerance and not result.unpruned
    # the output is a build directory with the pruned model beside it
    loaded = load_build(tmp_path / "fit")
    model = read_arpa(tmp_path / "fit" / "model.arpa")
    assert tuple(model.counts()) == result.chosen.counts
    assert loaded.manifest["inputs"]["lm"]["path"] == str(tmp_path / "fit" / "model.arpa")
    table = json.loads((tmp_path / "fit" / "fit.json").read_text(encoding="utf-8"))
    assert table["graph_bytes"] == size and table["budget"] == budget
    assert [s["ngrams"] for s in table["steps"]] == [s.ngrams for s in result.steps]
    # each step's perplexity is the pruned model's own (checked against kenlm elsewhere)
    assert result.chosen.perplexity == pytest.approx(perplexity(model, heldout).perplexity)
    # the unigram end point has the highest perplexity of all
    uni = next(s for s in result.steps if math.isinf(s.threshold))
    assert uni.perplexity == max(s.perplexity for s in result.steps)
    assert "within 5%" in format_fit_table(result)


def test_budget_above_the_unpruned_graph_prunes_nothing(tmp_path, small_full_bytes):
    result = fit(read_project(SMALL), small_full_bytes * 10, tmp_path / "fit")
    assert result.unpruned and result.chosen.actual_bytes == small_full_bytes
    assert not result.within_tolerance
    assert "nothing was pruned" in format_fit_table(result)


def test_budget_below_the_unigram_graph_names_the_smallest_size(tmp_path):
    with pytest.raises(ProjectError) as info:
        fit(read_project(SMALL), 1000, tmp_path / "fit")
    message = str(info.value)
    assert message.startswith("--budget: budget of 1000 bytes is below the smallest graph")
    smallest = int(message.split("graph takes ")[1].split()[0])
    assert smallest > 1000
    # that smallest size is reachable: a budget of exactly it succeeds
    result = fit(read_project(SMALL), smallest, tmp_path / "fit")
    assert result.chosen.actual_bytes == smallest and math.isinf(result.chosen.threshold)
    # neither run left scratch directories behind
    assert sorted(p.name for p in tmp_path.iterdir()) == ["fit"]


def test_vector_representation_counts_vector_bytes(tmp_path, small_full_bytes):
    budget = int(small_full_bytes * 3)
    result = fit(read_project(SMALL), budget, tmp_path / "fit", representation="vector")
    graph = tmp_path / "fit" / "graph.fst"
    assert file_size(graph).vector.memory_bytes == result.chosen.actual_bytes
    assert load_build(tmp_path / "fit").manifest["options"]["fst_type"] == "vector"


def test_bad_arguments(tmp_path):
    project = read_project(SMALL)
    with pytest.raises(ProjectError, match="not a positive number"):
        fit(project, 0, tmp_path / "a")
    with pytest.raises(ProjectError, match="unknown representation"):
        fit(project, 10**6, tmp_path / "a", representation="compact")  # type: ignore
    (tmp_path / "taken").mkdir()
    (tmp_path / "taken" / "notes.txt").write_text("mine", encoding="utf-8")
    with pytest.raises(ProjectError, match="not a netbuild build directory"):
        fit(project, 10**6, tmp_path / "taken")
    assert (tmp_path / "taken" / "notes.txt").read_text(encoding="utf-8") == "mine"


def test_cli_fit_json_and_errors(runner, tmp_path, small_full_bytes):
    budget = int(small_full_bytes * 0.7)
    out = tmp_path / "fit"
    res = runner.invoke(cli, ["fit", "--project", str(SMALL), "--budget", str(budget),
                              "--out", str(out), "--json"])
    assert res.exit_code == 0, res.output
    data = json.loads(res.stdout)
    assert data["graph_bytes"] <= budget and data["within_tolerance"]
    # rerunning into the same directory replaces it (it is a build directory)
    res = runner.invoke(cli, ["fit", "--project", str(SMALL), "--budget", "1kB",
                              "--out", str(out)])
    assert res.exit_code == 1
    assert "--budget: budget of 1000 bytes is below the smallest graph" in res.stderr
    assert "Traceback" not in res.stderr
    assert json.loads((out / "fit.json").read_text(encoding="utf-8"))["budget"] == budget
    res = runner.invoke(cli, ["fit", "--project", str(SMALL), "--budget", "lots",
                              "--out", str(out)])
    assert res.exit_code == 2 and "is not a size" in res.stderr


@pytest.mark.slow
def test_demo_half_budget_lands_within_five_percent(tmp_path):
    project = read_project(DEMO / "project.toml")
    full = tmp_path / "full"
    build(project, full)
    full_bytes = _const_bytes(full / "graph.fst")
    budget = full_bytes // 2
    heldout = read_sentences(DEMO / "corpus.txt")[-100:]
    result = fit(project, budget, tmp_path / "fit", heldout=heldout)
    size = _const_bytes(tmp_path / "fit" / "graph.fst")
    assert budget * 0.95 <= size <= budget
    assert result.within_tolerance
    assert result.chosen.ngrams < sum(read_arpa(DEMO / "model.arpa").counts())
    assert len(result.steps) <= 8
