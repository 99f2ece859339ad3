"""Property tests of the context map reader, writer and tying.

- random valid maps round-trip through `write_context_map` / `read_context_map`;
- random corruptions of one line give a PhoneMapError located at that line, never
  another exception;
- the array tying of `tie_contexts` agrees with the rule-by-rule `model_for`.
"""

from __future__ import annotations

import itertools
import re
import tempfile
from pathlib import Path

from hypothesis import given
from hypothesis import strategies as st

from netbuild.builders.contexts import model_for, tie_contexts
from netbuild.errors import PhoneMapError
from netbuild.io.context_map import (ContextMap, HmmState, Model, TyingRule,
                                     read_context_map, write_context_map)
from netbuild.io.phones import PhoneInventory

INV = PhoneInventory(["a", "e", "p", "t", "s", "q", "z"], silence=["q"], noise=["z"],
                     classes={"vowel": ["a", "e"], "stop": ["p", "t"], "quiet": ["q", "z"]},
                     path="inv.txt")
TOKENS = ["a", "e", "p", "t", "s", "q", "z", "@vowel", "@stop", "@quiet", "*", "$"]
CENTRES = ["a", "e", "p", "t", "s", "q", "z", "@vowel", "@stop", "@quiet", "*"]

probability = st.integers(0, 99).map(lambda k: k / 100)
state = st.builds(lambda c, p: HmmState(c, p, 1.0 - p), st.integers(0, 50), probability)


NAMES = ["m", "a.stop", "v1", "sil", "x.y.z", "t_3"]


@st.composite
def maps(draw, max_width: int = 2):
    left, right = draw(st.integers(0, max_width)), draw(st.integers(0, max_width))
    names = draw(st.lists(st.sampled_from(NAMES), min_size=1, max_size=5, unique=True))
    models = {n: Model(n, tuple(draw(st.lists(state, min_size=1, max_size=4))))
              for n in names}
    rules = [TyingRule(tuple(draw(st.lists(st.sampled_from(TOKENS), min_size=left,
                                           max_size=left))),
                       draw(st.sampled_from(CENTRES)),
                       tuple(draw(st.lists(st.sampled_from(TOKENS), min_size=right,
                                           max_size=right))),
                       draw(st.sampled_from(names)))
             for _ in range(draw(st.integers(1, 8)))]
    independent = draw(st.lists(st.sampled_from(["q", "z"]), unique=True))
    return ContextMap(left, right, independent, draw(st.booleans()), models, rules,
                      INV.classes, "random.txt")


def _same(a: ContextMap, b: ContextMap) -> bool:
    return ((a.left, a.right, a.independent, a.independent_is_context)
            == (b.left, b.right, b.independent, b.independent_is_context)
            and [(m.name, m.states) for m in a.models.values()]
            == [(m.name, m.states) for m in b.models.values()]
            and [(r.left, r.centre, r.right, r.model) for r in a.rules]
            == [(r.left, r.centre, r.right, r.model) for r in b.rules])


@given(maps())
def test_random_maps_round_trip(cmap):
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "map.txt"
        write_context_map(cmap, path)
        back = read_context_map(path, INV)
    assert _same(cmap, back)


def _corruptions(line: str) -> list[str]:
    """Ways to break `line` that each make it invalid on its own."""
    key, *rest = line.split()
    out = [" ".join([key + "x", *rest])]  # an unknown keyword
    if key == "model":
        out.append(line.replace(":", ";", 1))  # a state that does not parse
        out.append(" ".join([key, rest[0], "1:1.5:0.5", *rest[1:]]))  # out of range
        out.append(" ".join([key, rest[0], "1:0.5:0.75", *rest[1:]]))  # sum is not 1
    elif key == "rule":
        out.append(line.replace(" -> ", " "))  # no arrow
        out.append(line.replace(" -> ", " * -> "))  # one token too many
        out.append(line.replace(" -> ", " -> ? "))  # two model names
    elif key == "widths":
        out.append("widths 9 1")
    elif key == "independent":
        out.append(line + " bogus")
    elif key == "independent-context":
        out.append("independent-context maybe")
    return out


@given(maps(), st.data())
def test_random_corruptions_are_located(cmap, data):
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "map.txt"
        write_context_map(cmap, path)
        lines = path.read_text(encoding="utf-8").splitlines()
        number = data.draw(st.integers(1, len(lines)))
        lines[number - 1] = data.draw(st.sampled_from(_corruptions(lines[number - 1])))
        path.write_text("\n".join(lines) + "\n", encoding="utf-8")
        try:
            read_context_map(path, INV)
        except PhoneMapError as err:
            located = [p.line for p in err.problems]
            assert number in located, [str(p) for p in err.problems]
            assert all(re.match(rf"{re.escape(str(path))}:\d+: .+; .+", str(p))
                       for p in err.problems)
        else:
            raise AssertionError(f"line {number} was corrupted but the map was accepted")


@given(maps(max_width=1))
def test_array_tying_agrees_with_model_for(cmap):
    phones = INV.phones
    ci = set(cmap.independent)
    contexts = []
    universe = [*phones, "$"]
    for left in itertools.product(universe, repeat=cmap.left):
        for right in itertools.product(universe, repeat=cmap.right):
            for c in phones:
                contexts.append((left, c, right))
    mapping, uncovered, unused = tie_contexts(contexts, cmap)
    for ctx in contexts:
        m = model_for(cmap, *ctx)
        if m is None:
            assert ctx in uncovered
        else:
            assert mapping[ctx] == m.name
    winners = set()
    for ctx in contexts:
        for k, r in enumerate(cmap.rules):
            if model_for(ContextMap(cmap.left, cmap.right, list(ci), cmap.independent_is_context,
                                    cmap.models, [r], cmap.classes), *ctx) is not None:
                winners.add(k)
                break
    assert {id(r) for r in unused} == {id(r) for k, r in enumerate(cmap.rules)
                                       if k not in winners}
