"""Tests of the project file reader, the command-line overrides and size parsing."""

from __future__ import annotations

from pathlib import Path

import pytest

from netbuild.errors import ProjectError
from netbuild.options import BuildOptions
from netbuild.project import (SETTINGS, Project, apply_overrides, parse_size,
                              read_project, require_inputs)


@pytest.fixture
def inputs(tmp_path: Path) -> Path:
    (tmp_path / "words.lex").write_text("pear p e r\n")
    (tmp_path / "model.arpa").write_text("\\data\\\n")
    (tmp_path / "inventory.txt").write_text("p\ne\nr\n")
    return tmp_path


def write(path: Path, text: str) -> Path:
    path.write_text(text, encoding="utf-8")
    return path


# --- parse_size ---------------------------------------------------------------

@pytest.mark.parametrize("text, expected", [
    # reference: IEC 80000-13 binary prefixes (Ki = 2**10, Mi = 2**20, Gi = 2**30) and
    # SI decimal prefixes (k = 10**3, M = 10**6, G = 10**9)
    ("8GiB", 8 * 2**30),
    ("300MiB", 300 * 2**20),
    ("1.5GB", 1_500_000_000),
    ("512KiB", 512 * 1024),
    ("2kB", 2000),
    ("2TiB", 2 * 2**40),
    ("4096", 4096),
    ("100B", 100),
    (".5MiB", 2**19),
    (123, 123),
])
def test_parse_size(text, expected):
    assert parse_size(text) == expected


@pytest.mark.parametrize("text", ["8 Gigs", "GiB", "-1MiB", "1.2.3GB", "8gib", "", True, -5])
def test_parse_size_rejects(text):
    with pytest.raises(ValueError):
        parse_size(text)


def test_parse_size_message_lists_units():
    with pytest.raises(ValueError, match="GiB"):
        parse_size("8 Gigs")


# --- read_project ---------------------------------------------------------------

def test_read_full_project(inputs: Path):
    p = write(inputs / "project.toml", """
[inputs]
lexicon = "words.lex"
lm = "model.arpa"
phones = "inventory.txt"

[lexicon]
layout = "cmudict"
probabilities = true
keep_stress = false
rescale = false
silence_probability = 0.25

[grammar]
oov_policy = "unk"

[build]
push_weights = false
fst_type = "const"
checks = false
determinize_max_memory = "300MiB"
determinize_timeout = 60
""")
    project = read_project(p)
    assert project.path == p.resolve()
    assert project.lexicon == (inputs / "words.lex").resolve()
    assert project.lm == (inputs / "model.arpa").resolve()
    assert project.phones == (inputs / "inventory.txt").resolve()
    o = project.options
    assert o.lexicon.layout == "cmudict"
    assert o.lexicon.has_probabilities is True
    assert o.lexicon.keep_stress is False
    assert o.lexicon.rescale_probabilities is False
    assert o.lexicon.silence_probability == 0.25
    assert o.grammar.oov_policy == "unk"
    assert o.push_weights is False and o.checks is False
    assert o.fst_type == "const"
    assert o.determinize_max_memory == 300 * 2**20
    assert o.determinize_timeout == 60.0


def test_defaults_when_sections_absent(inputs: Path):
    p = write(inputs / "p.toml", '[inputs]\nlexicon = "words.lex"\nlm = "model.arpa"\n')
    project = read_project(p)
    assert project.options == BuildOptions()
    assert project.phones is None


def test_paths_relative_to_project_file(inputs: Path, monkeypatch):
    sub = inputs / "conf"
    sub.mkdir()
    p = write(sub / "p.toml", '[inputs]\nlexicon = "../words.lex"\nlm = "../model.arpa"\n')
    monkeypatch.chdir("/")
    assert read_project(p).lexicon == (inputs / "words.lex").resolve()


def test_toml_syntax_error_has_line(inputs: Path):
    p = write(inputs / "bad.toml", '[inputs]\nlexicon = "words.lex"\nlm = = "x"\n')
    with pytest.raises(ProjectError) as info:
        read_project(p)
    assert info.value.line == 3
    assert str(info.value).startswith(f"{p}:3: not valid TOML")
    assert "; " in str(info.value)


def test_all_problems_reported_together(inputs: Path):
    p = write(inputs / "p.toml", """[inputs]
lexicon = "words.lex"
lm = "missing.arpa"

[lexicon]
layot = "plain"
probabilities = "yes"

[build]
fst_type = "cosnt"
determinize_max_memory = "8 Gigs"
determinize_timeout = -3

[extras]
x = 1
""")
    with pytest.raises(ProjectError) as info:
        read_project(p)
    lines = str(info.value).splitlines()
    assert len(lines) == 7
    by_line = {prob.line: str(prob) for prob in info.value.problems}
    assert "missing.arpa" in by_line[3] and "does not exist" in by_line[3]
    assert "unknown key 'layot'" in by_line[6] and "did you mean 'layout'" in by_line[6]
    assert "allowed keys are layout, probabilities" in by_line[6]
    assert "true or false" in by_line[7]
    assert "did you mean 'const'" in by_line[10] and '"vector", "const"' in by_line[10]
    assert "not a size" in by_line[11]
    assert "positive number of seconds" in by_line[12]
    assert "unknown section [extras]" in by_line[14] and "[grammar]" in by_line[14]
    for line in lines:
        assert line.startswith(f"{p}:") and "; " in line


def test_wrong_types(inputs: Path):
    p = write(inputs / "p.toml", '[inputs]\nlexicon = 3\n[lexicon]\nsilence_probability = 1.0\n'
              'layout = 7\n')
    with pytest.raises(ProjectError) as info:
        read_project(p)
    text = str(info.value)
    assert f"{p}:2: [inputs] lexicon must be a file path" in text
    assert f"{p}:4: [lexicon] silence_probability must be a number with 0 <= p < 1" in text
    assert f"{p}:5: [lexicon] layout 7 is not allowed" in text


def test_section_given_as_value(inputs: Path):
    p = write(inputs / "p.toml", 'build = 3\n')
    with pytest.raises(ProjectError, match=r"p\.toml:1: 'build' must be a section"):
        read_project(p)


def test_input_is_a_directory(inputs: Path):
    (inputs / "d").mkdir()
    p = write(inputs / "p.toml", '[inputs]\nlexicon = "d"\n')
    with pytest.raises(ProjectError, match=r"p\.toml:2: \[inputs\] lexicon .* is not a file"):
        read_project(p)


def test_missing_project_file(tmp_path: Path):
    with pytest.raises(ProjectError, match="project file does not exist; check the path"):
        read_project(tmp_path / "nope.toml")


def test_not_utf8(tmp_path: Path):
    p = tmp_path / "p.toml"
    p.write_bytes(b"[inputs]\nlexicon = \"\xff\"\n")
    with pytest.raises(ProjectError, match="UTF-8"):
        read_project(p)


# --- apply_overrides -------------------------------------------------------------

def test_overrides_win_over_file(inputs: Path, monkeypatch):
    p = write(inputs / "p.toml", '[inputs]\nlexicon = "words.lex"\nlm = "model.arpa"\n'
              '[build]\nfst_type = "const"\npush_weights = true\n')
    project = read_project(p)
    monkeypatch.chdir(inputs)
    out = apply_overrides(project, fst_type="vector", push_weights=False, oov_policy=None,
                          determinize_max_memory="1.5GB", phones="inventory.txt",
                          silence_probability=0.0)
    assert out.options.fst_type == "vector"
    assert out.options.push_weights is False
    assert out.options.grammar.oov_policy == "drop"  # None keeps the file's value
    assert out.options.determinize_max_memory == 1_500_000_000
    assert out.options.lexicon.silence_probability == 0.0
    assert out.phones == (inputs / "inventory.txt").resolve()
    assert out.lexicon == project.lexicon
    assert project.options.fst_type == "const"  # the input is not changed


def test_every_setting_has_an_override(inputs: Path):
    """Each file key can be overridden under the same (snake-case) name."""
    values = {"layout": "cmudict", "probabilities": True, "keep_stress": False,
              "rescale": False, "silence_probability": 0.1, "oov_policy": "fail",
              "push_weights": False, "fst_type": "const", "checks": False,
              "determinize_max_memory": 1000, "determinize_timeout": 5.0,
              "final_optimize": False, "transition_scale": 0.5, "max_memory": 2000,
              "word_graph": "compose", "weight_quantum": 0.0}
    assert set(values) | {"lexicon", "lm", "phones", "context"} == set(SETTINGS)
    out = apply_overrides(None, **values)
    o = out.options
    assert (o.lexicon.layout, o.lexicon.has_probabilities, o.lexicon.keep_stress,
            o.lexicon.rescale_probabilities, o.lexicon.silence_probability) == \
        ("cmudict", True, False, False, 0.1)
    assert o.grammar.oov_policy == "fail"
    assert (o.push_weights, o.fst_type, o.checks, o.determinize_max_memory,
            o.determinize_timeout) == (False, "const", False, 1000, 5.0)
    assert (o.final_optimize, o.transition_scale) == (False, 0.5)
    assert o.max_memory == 2000
    assert o.word_graph == "compose"
    assert o.weight_quantum == 0.0


def test_override_errors_are_collected(tmp_path: Path):
    with pytest.raises(ProjectError) as info:
        apply_overrides(None, fst_type="cnst", lexicon=str(tmp_path / "nope.lex"),
                        determinize_timeout=0, colour="red")
    lines = str(info.value).splitlines()
    assert len(lines) == 4
    assert lines[0].startswith("--fst-type: 'cnst' is not allowed; did you mean 'const'?")
    assert lines[1].startswith("--lexicon: ") and "does not exist" in lines[1]
    assert lines[2].startswith("--determinize-timeout: must be a positive number")
    assert lines[3].startswith("--colour: unknown setting 'colour'")


def test_require_inputs():
    with pytest.raises(ProjectError) as info:
        require_inputs(Project(path=None, lexicon=None, lm=None, phones=None))
    text = str(info.value)
    assert "no lexicon given" in text and "--lexicon" in text
    assert "no lm given" in text and "--lm" in text


def test_inline_table_problem_is_located(inputs: Path):
    p = write(inputs / "p.toml", '# inputs\n\nbuild = {fst_type = "sparse"}\n')
    with pytest.raises(ProjectError, match=r"p\.toml:3: \[build\] fst_type 'sparse'"):
        read_project(p)
