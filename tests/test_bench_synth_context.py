"""The synthetic context map of bench/synth_context.py over bench/synth.py's phones.

Checks that netbuild's reader accepts it, that it has the documented numbers of models,
rules and tied emission classes, that the tying is the documented one, and that every
context of a generated lexicon is covered by a group rule (no catch-all wins).
"""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

import pytest

from netbuild.builders.contexts import check_coverage
from netbuild.errors import Diagnostics
from netbuild.io.context_map import read_context_map
from netbuild.io.lexicon import read_lexicon
from netbuild.io.phones import read_phones
from netbuild.options import LexiconOptions

_BENCH = Path(__file__).resolve().parents[1] / "bench"


def _load(name: str):
    spec = importlib.util.spec_from_file_location(name, _BENCH / f"{name}.py")
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module
    spec.loader.exec_module(module)
    return module


@pytest.fixture(scope="module")
def modules():
    sys.path.insert(0, str(_BENCH))
    try:
        yield _load("synth"), _load("synth_context")
    finally:
        sys.path.remove(str(_BENCH))


@pytest.fixture(scope="module")
def files(modules, tmp_path_factory):
    synth, synth_context = modules
    d = tmp_path_factory.mktemp("ctx")
    synth.write_phones(d / "inventory.txt")
    synth.write_lexicon(synth.synth_lexicon(300, seed=3), d / "lexicon.txt")
    synth_context.write_context_map_text(d / "context.txt", seed=1)
    return d


def test_reader_accepts_the_map_with_the_documented_counts(modules, files):
    synth, _ = modules
    diag = Diagnostics()
    inventory = read_phones(files / "inventory.txt", diag)
    cmap = read_context_map(files / "context.txt", inventory, diag)
    assert not diag.errors
    assert (cmap.left, cmap.right) == (1, 1)
    sides = len(synth.PHONE_GROUPS) + 1  # the five groups and the edge
    assert len(cmap.models) == len(synth.PHONES) * (sides * sides + 1) + 2
    assert len(cmap.rules) == len(cmap.models)
    classes = {s.emission_class for m in cmap.models.values() for s in m.states}
    per_centre = sides + sides * sides + sides + 3
    assert len(classes) == per_centre * len(synth.PHONES) + 6 == 2046
    assert classes == set(range(2046))  # dense ids
    assert all(len(m.states) == 3 for m in cmap.models.values())


def test_tying_shares_first_and_last_states_by_side(modules, files):
    diag = Diagnostics()
    inventory = read_phones(files / "inventory.txt", diag)
    cmap = read_context_map(files / "context.txt", inventory, diag)
    m = cmap.models
    # Same centre and left side: same first state, different middle states.
    a, b = m["c05.cgA.vgA"], m["c05.cgA.edge"]
    assert a.states[0] == b.states[0] and a.states[1] != b.states[1]
    assert a.states[2] != b.states[2]
    # Same centre and right side: same last state.
    c = m["c05.vgB.vgA"]
    assert c.states[2] == a.states[2] and c.states[0] != a.states[0]
    # Different centres never share.
    d = m["c06.cgA.vgA"]
    assert not {s.emission_class for s in d.states} & {s.emission_class for s in a.states}


def test_every_occurring_context_is_covered_by_a_group_rule(files):
    diag = Diagnostics()
    inventory = read_phones(files / "inventory.txt", diag)
    cmap = read_context_map(files / "context.txt", inventory, diag)
    lexicon = read_lexicon(files / "lexicon.txt", inventory,
                           LexiconOptions(has_probabilities=True), diag)
    coverage = check_coverage(lexicon, inventory, cmap, LexiconOptions(has_probabilities=True),
                              diag)
    assert not diag.errors
    assert coverage.uncovered == 0 and -1 not in coverage.winner.tolist()
    winners = {cmap.rules[k].model for k in coverage.winner.tolist()}
    assert not any(w.endswith(".any") for w in winners)
    assert len(winners) > 100  # many group rules actually win


def test_same_seed_same_text(modules):
    _, synth_context = modules
    assert synth_context.synth_context_map(4) == synth_context.synth_context_map(4)
    assert synth_context.synth_context_map(4) != synth_context.synth_context_map(5)
