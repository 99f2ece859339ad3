"""Tests of the FST statistics inspector (netbuild/inspectors/stats.py)."""

from __future__ import annotations

import pynini
import pywrapfst

from netbuild.inspectors.stats import fst_stats, format_stats_table


def _small() -> pynini.Fst:
    f = pynini.Fst()
    f.add_states(3)
    f.set_start(0)
    f.add_arc(0, pynini.Arc(0, 0, 0.5, 1))  # epsilon on both sides
    f.add_arc(0, pynini.Arc(0, 2, 0.0, 1))  # input epsilon only
    f.add_arc(1, pynini.Arc(3, 0, 1.0, 2))  # output epsilon only
    f.add_arc(1, pynini.Arc(3, 3, 1.0, 2))
    f.set_final(2)
    f.set_final(1, 2.0)
    return f


def test_counts_and_properties():
    stats = fst_stats(_small())
    assert stats["states"] == 3 and stats["arcs"] == 4
    assert stats["input_epsilon_arcs"] == 2
    assert stats["output_epsilon_arcs"] == 2
    assert stats["epsilon_arcs"] == 1
    assert stats["final_states"] == 2
    assert stats["arc_type"] == "standard"
    props = set(stats["properties"])
    assert {"not_acceptor", "acyclic", "accessible", "coaccessible", "weighted",
            "epsilons", "non_i_deterministic"} <= props
    assert "cyclic" not in props and "acceptor" not in props


def test_bytes_match_serializations_and_const_layout():
    f = _small()
    stats = fst_stats(f)
    assert stats["bytes"]["vector"] == len(f.write_to_string())
    # const layout: header, then 20 bytes per state and 16 per arc (standard arcs)
    # from memory: fst/const-fst.h ConstState {weight, pos, narcs, niepsilons, noepsilons}
    header = stats["bytes"]["const"] - 20 * 3 - 16 * 4
    empty = len(pywrapfst.convert(pynini.Fst(), "const").write_to_string())
    assert header == empty


def test_properties_are_computed_not_stored():
    f = pynini.accep("ab")
    f.add_arc(f.start(), pynini.Arc(ord("a"), ord("a"), 0, f.start()))  # now cyclic
    assert "cyclic" in fst_stats(f)["properties"]


def test_table_lists_every_entry():
    text = format_stats_table(fst_stats(_small()))
    lines = text.splitlines()
    assert lines[0].split() == ["states", "3"]
    assert any(line.startswith("bytes.const") for line in lines)
    assert any(line.startswith("properties") and "acyclic" in line for line in lines)
    assert "arc_type" in text and "standard" in text
