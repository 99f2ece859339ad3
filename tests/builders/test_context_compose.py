"""C∘LG built directly (netbuild.builders.context_compose) against OpenFst's composition.

Reference: OpenFst's ``compose(C, LG, connect=True)`` (fst/compose.h), compared with
OpenFst's Isomorphic (fst/isomorphic.h). As in test_hmm_expand.py, LG's output labels
are first replaced by arc numbers, so that no state of the result has two arcs with the
same labels and weight (where Isomorphic gives up) and every arc is told apart.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pynini
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from fst_helpers import fst_of_arrays

from netbuild.builders.context_compose import compose_context_arrays
from netbuild.io.fstfile import FstArrays, fst_to_arrays
from netbuild.project import read_project
from netbuild.workflow import build

ROOT = Path(__file__).resolve().parents[2]
DEMO = ROOT / "examples" / "ropeway" / "project.toml"
DATA = ROOT / "tests" / "data" / "full"


def _with_arc_ids(lg: FstArrays) -> FstArrays:
    return FstArrays(lg.num_states, lg.start, lg.final_weights, lg.src, lg.ilabel,
                     np.arange(1, lg.num_arcs + 1, dtype=np.int32), lg.weight, lg.dst)


def assert_same_as_composition(c: FstArrays, lg: FstArrays) -> None:
    lg = _with_arc_ids(lg)
    got = compose_context_arrays(c, lg)
    assert got is not None
    # reference: OpenFst compose with connect (fst/compose.h)
    want = pynini.compose(pynini.arcsort(fst_of_arrays(c), sort_type="olabel"), fst_of_arrays(lg),
                          connect=True)
    if want.num_states() == 0:
        assert got.start < 0
        return
    mine = fst_of_arrays(got)
    assert (mine.num_states(), got.num_arcs) == \
        (want.num_states(), sum(want.num_arcs(s) for s in want.states()))
    # reference: OpenFst Isomorphic (fst/isomorphic.h)
    assert pynini.isomorphic(mine, want, delta=1e-6)
    # arcs grouped by state, sorted by input label within each
    key = got.src.astype(np.int64) << 32 | got.ilabel
    assert (np.diff(key) >= 0).all()


@st.composite
def context_and_word_graph(draw):
    """A random C-shaped FST (one arc per state and written label, some arcs writing
    nothing, input epsilons allowed) and a random LG with no input epsilon."""
    labels = draw(st.integers(1, 4))
    nc = draw(st.integers(1, 5))
    carcs = []
    for s in range(nc):
        for x in draw(st.lists(st.integers(1, labels), unique=True, max_size=labels)):
            carcs.append((s, draw(st.integers(0, 3)), x, draw(st.sampled_from([0.0, 0.5])),
                          draw(st.integers(0, nc - 1))))
        for _ in range(draw(st.integers(0, 1))):  # flush-like arcs writing nothing
            carcs.append((s, draw(st.integers(1, 3)), 0, 0.0, draw(st.integers(0, nc - 1))))
    nq = draw(st.integers(1, 6))
    larcs = [(draw(st.integers(0, nq - 1)), draw(st.integers(1, labels)),
              0, draw(st.sampled_from([0.0, 1.0, 0.25])), draw(st.integers(0, nq - 1)))
             for _ in range(draw(st.integers(0, 12)))]
    cfinal = [draw(st.sampled_from([np.inf, 0.0, 0.5])) for _ in range(nc)]
    qfinal = [draw(st.sampled_from([np.inf, 0.0, 1.5])) for _ in range(nq)]

    def arrays(n, arcs, finals):
        arcs = sorted(arcs, key=lambda a: a[0])
        cols = [np.array(col) for col in zip(*arcs)] if arcs else [np.zeros(0)] * 5
        src, il, ol, w, dst = cols
        return FstArrays(n, 0, np.array(finals, dtype=np.float32), src.astype(np.int32),
                         il.astype(np.int32), ol.astype(np.int32), w.astype(np.float32),
                         dst.astype(np.int32))
    return arrays(nc, carcs, cfinal), arrays(nq, larcs, qfinal)


@settings(max_examples=300, deadline=None)
@given(context_and_word_graph())
def test_random_products_equal_the_composition(case):
    c, lg = case
    assert_same_as_composition(c, lg)


def test_declines_an_input_epsilon_and_a_label_written_twice():
    one = FstArrays(1, 0, np.zeros(1, np.float32), np.zeros(1, np.int32),
                    np.ones(1, np.int32), np.ones(1, np.int32), np.zeros(1, np.float32),
                    np.zeros(1, np.int32))
    eps_lg = FstArrays(1, 0, np.zeros(1, np.float32), np.zeros(1, np.int32),
                       np.zeros(1, np.int32), np.zeros(1, np.int32),
                       np.zeros(1, np.float32), np.zeros(1, np.int32))
    assert compose_context_arrays(one, eps_lg) is None
    twice = FstArrays(1, 0, np.zeros(1, np.float32), np.zeros(2, np.int32),
                      np.array([1, 2], np.int32), np.ones(2, np.int32),
                      np.zeros(2, np.float32), np.zeros(2, np.int32))
    assert compose_context_arrays(twice, one) is None


def _tiny_project(tmp_path: Path, ctx: str) -> Path:
    project = tmp_path / "project.toml"
    project.write_text(
        f'[inputs]\nphones = "{DATA / "inventory.txt"}"\nlexicon = "{DATA / "lexicon.txt"}"\n'
        f'lm = "{DATA / "bigram.arpa"}"\ncontext = "{DATA / ctx}"\n'
        '[lexicon]\nprobabilities = true\nsilence_probability = 0.3\n', encoding="utf-8")
    return project


@pytest.mark.parametrize("ctx", ["triphone.ctx", "monophone.ctx",
                                 "triphone_pause_context.ctx", None])
def test_real_context_and_word_graphs(tmp_path, ctx):
    project = DEMO if ctx is None else _tiny_project(tmp_path, ctx)
    result = build(read_project(project), tmp_path / "out", keep_intermediates=True)
    stage = next(s for s in result.manifest["stages"] if s["name"] == "compose-context")
    assert stage["details"]["method"] == "product"
    c = fst_to_arrays(result.full.intermediates["context"])
    lg = fst_to_arrays(result.graph.fst)
    assert_same_as_composition(c, lg)
