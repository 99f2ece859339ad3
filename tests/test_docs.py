"""The documentation's examples are parsed by the code they describe.

docs/formats.md marks whole files with an HTML comment before a fenced block:

- ``<!-- complete file: KIND -->``: the block must parse with no problem at all;
- ``<!-- bad file: KIND -->`` followed by a ``<!-- message -->`` block: parsing the
  bad file must fail with exactly the message shown.

KIND names the reader: phones, lexicon, lexicon-probabilities, lexicon-cmudict,
arpa, project. Lexicon examples are read against the demo's phone inventory;
project examples are read next to copies of the demo's inputs.
The project-file key table must list every key the project reader knows, with
the defaults of `BuildOptions`.
"""

from __future__ import annotations

import re
import shutil
from pathlib import Path

import pytest

from netbuild.errors import Diagnostics, NetbuildError
from netbuild.io.lexicon import read_lexicon
from netbuild.io.phones import read_phones
from netbuild.options import BuildOptions, LexiconOptions

ROOT = Path(__file__).resolve().parent.parent
DOCS = ROOT / "docs"
DEMO = ROOT / "examples" / "ropeway"
KINDS = ("phones", "lexicon", "lexicon-probabilities", "lexicon-cmudict", "arpa", "project")
FILE_NAMES = {"phones": "inventory.txt", "lexicon": "lexicon.txt",
              "lexicon-probabilities": "lexicon.txt", "lexicon-cmudict": "lexicon.txt",
              "arpa": "model.arpa", "project": "project.toml"}

_BLOCK = r"\s*```[a-z]*\n(.*?)```"
_COMPLETE = re.compile(r"<!-- complete file: ([a-z-]+) -->" + _BLOCK, re.S)
_BAD = re.compile(r"<!-- bad file: ([a-z-]+) -->" + _BLOCK + r"\s*<!-- message -->" + _BLOCK,
                  re.S)


def _snippets(pattern: re.Pattern, name: str = "formats.md") -> list[tuple]:
    return pattern.findall((DOCS / name).read_text(encoding="utf-8"))


def _read(kind: str, directory: Path, text: str, diagnostics: Diagnostics):
    """Writes `text` as the file of `kind` in `directory` and reads it (relative path)."""
    name = FILE_NAMES[kind]
    if kind == "project":
        for demo_input in ("inventory.txt", "lexicon.txt", "model.arpa"):
            shutil.copy(DEMO / demo_input, directory / demo_input)
    (directory / name).write_text(text, encoding="utf-8")
    if kind == "phones":
        return read_phones(name, diagnostics)
    if kind.startswith("lexicon"):
        shutil.copy(DEMO / "inventory.txt", directory / "inventory.txt")
        inventory = read_phones("inventory.txt")
        options = LexiconOptions(layout="cmudict" if kind == "lexicon-cmudict" else "plain",
                                 has_probabilities=kind == "lexicon-probabilities")
        return read_lexicon(name, inventory, options, diagnostics)
    if kind == "arpa":
        from netbuild.io.arpa import read_arpa

        return read_arpa(name, diagnostics)
    if kind == "project":
        from netbuild.project import read_project

        return read_project(name, diagnostics)
    raise AssertionError(kind)


def test_every_kind_has_a_complete_example():
    kinds = {kind for kind, _ in _snippets(_COMPLETE)}
    assert kinds == set(KINDS)


@pytest.mark.parametrize("index", range(len(_snippets(_COMPLETE))))
def test_complete_file_examples_parse_cleanly(index, tmp_path, monkeypatch):
    kind, text = _snippets(_COMPLETE)[index]
    monkeypatch.chdir(tmp_path)
    diagnostics = Diagnostics()
    _read(kind, tmp_path, text, diagnostics)
    assert [str(p) for p in diagnostics.problems] == []


def test_there_are_bad_file_examples():
    assert len(_snippets(_BAD)) >= 2


@pytest.mark.parametrize("index", range(len(_snippets(_BAD))))
def test_bad_file_examples_fail_with_the_documented_message(index, tmp_path, monkeypatch):
    kind, text, message = _snippets(_BAD)[index]
    monkeypatch.chdir(tmp_path)
    with pytest.raises(NetbuildError) as err:
        _read(kind, tmp_path, text, Diagnostics())
    assert str(err.value).strip() == message.strip()


def _key_table() -> list[tuple[str, str, str, str]]:
    """Returns the (section, key, default, flag) rows of the project key table."""
    text = (DOCS / "formats.md").read_text(encoding="utf-8")
    row = re.compile(r"^\| `\[(\w+)\]` \| `(\w+)` \| `([^`]*)` \| `(--[\w-]+)` \|", re.M)
    return row.findall(text)


def test_project_key_table_lists_every_key():
    from netbuild.project import SETTINGS

    documented = {key: section for section, key, _, _ in _key_table()}
    assert documented == {key: section for key, (section, _) in SETTINGS.items()}


def test_project_key_table_flags_follow_the_key_names():
    for _section, key, _default, flag in _key_table():
        assert flag == "--" + key.replace("_", "-")


def test_project_key_table_defaults_are_the_real_defaults(tmp_path):
    """Writing every documented default explicitly must change nothing."""
    from netbuild.project import read_project

    sections: dict[str, list[str]] = {}
    for section, key, default, _ in _key_table():
        if section != "inputs":
            sections.setdefault(section, []).append(f"{key} = {default}")
    text = "".join(f"[{s}]\n" + "\n".join(lines) + "\n\n" for s, lines in sections.items())
    path = tmp_path / "project.toml"
    path.write_text(text, encoding="utf-8")
    assert read_project(path).options == BuildOptions()


def test_project_key_table_flags_exist_on_the_build_command():
    from netbuild.cli import cli

    options = {opt for param in cli.commands["build"].params
               for opt in (*param.opts, *param.secondary_opts)}
    for section, key, _default, flag in _key_table():
        assert flag in options, flag
        if section != "inputs" and _default in ("true", "false"):
            assert "--no-" + flag[2:] in options, flag


def test_checks_page_names_every_check():
    import netbuild.checks as checks

    names = {n for n in dir(checks) if n.startswith("check_") and callable(getattr(checks, n))}
    text = (DOCS / "checks.md").read_text(encoding="utf-8")
    assert names, "netbuild.checks defines no check"
    assert {n for n in names if f"`{n}`" not in text} == set()


_CHECK_NAMES = {"non-empty": "check_nonempty", "connected": "check_connected",
                "labels": "check_labels", "homophones": "check_homophones",
                "back-off pass-through": "check_backoff_passthrough",
                "no input-epsilon cycle": "check_no_input_epsilon_cycles",
                "words reachable": "check_words_reachable",
                "input-deterministic": "check_input_deterministic"}


def test_checks_page_table_matches_the_pipeline():
    """The stage table of docs/checks.md lists the pipeline's stages and their checks."""
    import pynini

    from netbuild.options import BuildOptions
    from netbuild.pipeline import word_pipeline

    text = (DOCS / "checks.md").read_text(encoding="utf-8")
    rows = re.findall(r"^\| `(\w+)` \| [^|]+ \| ([^|]+) \|$", text, re.M)
    documented = {stage: {_CHECK_NAMES[c.strip()] for c in checks.split(",")}
                  for stage, checks in rows}
    pipeline = word_pipeline(pynini.Fst(), pynini.Fst(), BuildOptions())
    assert [stage for stage, _ in rows] == ["grammar", "lexicon", *pipeline.names]
    for step in pipeline.steps:
        assert documented[step.name] == {c.__name__ for c in step.checks}, step.name
