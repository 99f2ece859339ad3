"""Property tests for the phone-inventory and project-file readers.

Random valid files read back to exactly what was written; a random single corruption
gives the reader's own error class, located on the corrupted line, never another
exception type.
"""

from __future__ import annotations

import string

import pytest
from hypothesis import given
from hypothesis import strategies as st

from netbuild.errors import PhoneMapError, ProjectError
from netbuild.io.phones import read_phones
from netbuild.project import read_project

_name = st.text(string.ascii_lowercase + string.digits + "_", min_size=1, max_size=5)


@st.composite
def inventories(draw):
    phones = draw(st.lists(_name, min_size=1, max_size=12, unique=True))
    roles = {p: draw(st.sampled_from(["", "", "", "silence", "noise"])) for p in phones}
    class_names = draw(st.lists(_name.map(lambda s: "c" + s), max_size=3, unique=True))
    classes = {c: draw(st.lists(st.sampled_from(phones), min_size=1, max_size=4,
                                unique=True)) for c in class_names}
    return phones, roles, classes


def _inventory_text(phones, roles, classes) -> list[str]:
    lines = ["# a random inventory"]
    lines += [f"{p} {roles[p]}".rstrip() for p in phones]
    lines += [f"{c}: {' '.join(ms)}" for c, ms in classes.items()]
    return lines


@given(inventories())
def test_inventory_round_trip(tmp_path_factory, inv):
    phones, roles, classes = inv
    path = tmp_path_factory.mktemp("inv") / "inventory.txt"
    path.write_text("\n".join(_inventory_text(phones, roles, classes)) + "\n")
    got = read_phones(path)
    assert got.phones == phones
    assert got.silence == [p for p in phones if roles[p] == "silence"]
    assert got.noise == [p for p in phones if roles[p] == "noise"]
    assert got.classes == classes


_CORRUPTIONS = {
    "duplicate phone": lambda phones: f"{phones[0]}",
    "unknown role": lambda phones: "zz_new quietish",
    "class with unknown phone": lambda phones: "cbad: nosuchphone_zz",
    "reserved spelling": lambda phones: "!amb7",
    "three fields": lambda phones: "zz_new silence extra",
}


@given(inventories(), st.sampled_from(sorted(_CORRUPTIONS)), st.data())
def test_inventory_corruption_is_located(tmp_path_factory, inv, kind, data):
    phones, roles, classes = inv
    lines = _inventory_text(phones, roles, classes)
    # Insert after the phone lines so classes stay valid; line numbers are 1-based.
    at = data.draw(st.integers(min_value=1 + len(phones), max_value=len(lines)))
    lines.insert(at, _CORRUPTIONS[kind](phones))
    path = tmp_path_factory.mktemp("inv") / "inventory.txt"
    path.write_text("\n".join(lines) + "\n")
    with pytest.raises(PhoneMapError) as err:
        read_phones(path)
    assert any(p.line == at + 1 for p in err.value.problems), (kind, str(err.value))


@st.composite
def projects(draw):
    settings = {
        "lexicon": {
            "probabilities": draw(st.booleans()),
            "rescale": draw(st.booleans()),
            "silence_probability": draw(st.sampled_from([0.0, 0.1, 0.25, 0.5, 0.9])),
        },
        "grammar": {"oov_policy": draw(st.sampled_from(["drop", "unk", "fail"]))},
        "build": {
            "push_weights": draw(st.booleans()),
            "fst_type": draw(st.sampled_from(["vector", "const"])),
            "checks": draw(st.booleans()),
            "determinize_timeout": draw(st.integers(min_value=1, max_value=10_000)),
        },
    }
    return settings


def _toml(value) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return f'"{value}"'
    return repr(value)


def _project_lines(settings) -> list[str]:
    lines = ["[inputs]", 'lexicon = "lex.txt"', 'lm = "lm.arpa"']
    for section, keys in settings.items():
        lines.append(f"[{section}]")
        lines += [f"{k} = {_toml(v)}" for k, v in keys.items()]
    return lines


def _write_inputs(directory):
    (directory / "lex.txt").write_text("a 1.0 x\n")
    (directory / "lm.arpa").write_text("\\data\\\nngram 1=1\n\n\\1-grams:\n-1 a\n\n\\end\\\n")


@given(projects())
def test_project_round_trip(tmp_path_factory, settings):
    d = tmp_path_factory.mktemp("proj")
    _write_inputs(d)
    (d / "project.toml").write_text("\n".join(_project_lines(settings)) + "\n")
    opts = read_project(d / "project.toml").options
    lx, gr, bd = settings["lexicon"], settings["grammar"], settings["build"]
    assert opts.lexicon.has_probabilities == lx["probabilities"]
    assert opts.lexicon.rescale_probabilities == lx["rescale"]
    assert opts.lexicon.silence_probability == lx["silence_probability"]
    assert opts.grammar.oov_policy == gr["oov_policy"]
    assert opts.push_weights == bd["push_weights"]
    assert opts.fst_type == bd["fst_type"]
    assert opts.checks == bd["checks"]
    assert opts.determinize_timeout == bd["determinize_timeout"]


_PROJECT_CORRUPTIONS = {
    "unknown key": "colour = \"blue\"",
    "wrong type": "checks = \"often\"",
    "bad size": "determinize_max_memory = \"lots\"",
    "bad choice": "fst_type = \"spiral\"",
}


@given(projects(), st.sampled_from(sorted(_PROJECT_CORRUPTIONS)))
def test_project_corruption_is_located(tmp_path_factory, settings, kind):
    d = tmp_path_factory.mktemp("proj")
    _write_inputs(d)
    lines = _project_lines(settings)
    build_at = lines.index("[build]")
    # Replace the key the corruption sets again, if present, so TOML stays valid.
    key = _PROJECT_CORRUPTIONS[kind].split(" ")[0]
    lines = [ln for ln in lines if not ln.startswith(key + " ")]
    build_at = lines.index("[build]")
    lines.insert(build_at + 1, _PROJECT_CORRUPTIONS[kind])
    (d / "project.toml").write_text("\n".join(lines) + "\n")
    with pytest.raises(ProjectError) as err:
        read_project(d / "project.toml")
    assert any(p.line == build_at + 2 for p in err.value.problems), (kind, str(err.value))
