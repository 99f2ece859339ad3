"""Bulk FST construction through OpenFst's binary layout, and atomic FST files."""

from __future__ import annotations

import dataclasses
from unittest import mock

import numpy as np
import pynini
import pytest
import pywrapfst
from hypothesis import given
from hypothesis import strategies as st

from netbuild.errors import InputError, StageError
from netbuild.io.fstfile import arrays_to_fst, fst_to_arrays, write_fst
from netbuild.symbols import make_symbol_table

P = pynini.FstProperties
CHECKED = (P.ACCEPTOR | P.NOT_ACCEPTOR | P.EPSILONS | P.NO_EPSILONS | P.I_EPSILONS
           | P.NO_I_EPSILONS | P.O_EPSILONS | P.NO_O_EPSILONS | P.I_LABEL_SORTED
           | P.NOT_I_LABEL_SORTED | P.O_LABEL_SORTED | P.NOT_O_LABEL_SORTED
           | P.I_DETERMINISTIC | P.NON_I_DETERMINISTIC | P.O_DETERMINISTIC
           | P.NON_O_DETERMINISTIC | P.WEIGHTED | P.UNWEIGHTED | P.TOP_SORTED
           | P.NOT_TOP_SORTED | P.ACYCLIC | P.CYCLIC)


@st.composite
def fst_arrays(draw):
    n = draw(st.integers(0, 6))
    m = draw(st.integers(0, 12)) if n else 0
    ints = st.integers(0, max(n - 1, 0))
    src = draw(st.lists(ints, min_size=m, max_size=m))
    dst = draw(st.lists(ints, min_size=m, max_size=m))
    il = draw(st.lists(st.integers(0, 4), min_size=m, max_size=m))
    ol = draw(st.lists(st.integers(0, 4), min_size=m, max_size=m)) \
        if draw(st.booleans()) else il
    w = draw(st.lists(st.sampled_from([0.0, 0.5, 1.25, 3.0]), min_size=m, max_size=m))
    fin = draw(st.lists(st.sampled_from([np.inf, 0.0, 0.75]), min_size=n, max_size=n))
    start = draw(st.integers(0, n - 1)) if n else -1
    return n, start, np.array(fin, np.float32), src, il, ol, w, dst


def python_fst(n, start, fin, src, il, ol, w, dst):
    """The same FST built arc by arc with pynini (the slow, obvious way)."""
    f = pynini.Fst()
    f.add_states(n)
    if start >= 0:
        f.set_start(start)
    for s in range(n):
        if np.isfinite(fin[s]):
            f.set_final(s, float(fin[s]))
    for i in np.argsort(np.asarray(src, dtype=np.int64), kind="stable"):
        f.add_arc(src[i], pynini.Arc(il[i], ol[i], w[i], dst[i]))
    return f


@given(fst_arrays())
def test_arrays_to_fst_equals_arc_by_arc_construction(args):
    # Arc-by-arc compare through OpenFst's own text printer.
    built = arrays_to_fst(*args)
    slow = python_fst(*args)
    assert built.num_states() == slow.num_states() and built.start() == slow.start()
    assert str(built) == str(slow)


@given(fst_arrays())
def test_header_properties_agree_with_openfst(args):
    # reference: OpenFst's property computation (Fst.properties with test=True).
    built = arrays_to_fst(*args)
    known = built.properties(CHECKED, False)
    computed = python_fst(*args).properties(CHECKED, True)
    assert known & computed == known  # every bit claimed by the header holds


@given(fst_arrays())
def test_fst_to_arrays_round_trip(args):
    n, start, fin, src, il, ol, w, dst = args
    a = fst_to_arrays(python_fst(*args))
    order = np.argsort(np.asarray(src, dtype=np.int64), kind="stable")
    assert a.num_states == n and a.start == start
    np.testing.assert_array_equal(a.final_weights, fin)
    np.testing.assert_array_equal(a.src, np.asarray(src, dtype=np.int64)[order])
    np.testing.assert_array_equal(a.ilabel, np.asarray(il)[order])
    np.testing.assert_array_equal(a.olabel, np.asarray(ol)[order])
    np.testing.assert_array_equal(a.weight, np.asarray(w, np.float32)[order])
    np.testing.assert_array_equal(a.dst, np.asarray(dst)[order])
    again = arrays_to_fst(a.num_states, a.start, a.final_weights, a.src, a.ilabel,
                          a.olabel, a.weight, a.dst)
    assert str(again) == str(python_fst(*args))


def test_symbol_tables_survive_both_ways():
    words = make_symbol_table("words", ["cable", "car", "summit"])
    f = arrays_to_fst(2, 0, np.array([np.inf, 0.0]), [0, 0], [1, 3], [2, 3], [0.5, 1.0],
                      [1, 1], isymbols=words, osymbols=words)
    assert f.input_symbols().find("summit") == 3
    a = fst_to_arrays(f)  # symbol tables sit between header and arrays
    assert a.isymbols.find("car") == 2 and a.osymbols.num_symbols() == 4
    np.testing.assert_array_equal(a.ilabel, [1, 3])
    np.testing.assert_array_equal(a.dst, [1, 1])


def test_empty_fst_and_fst_without_arcs():
    empty = arrays_to_fst(0, -1, np.zeros(0), [], [], [], [], [])
    assert empty.num_states() == 0 and empty.start() == -1
    a = fst_to_arrays(empty)
    assert a.num_states == 0 and a.num_arcs == 0 and a.start == -1
    lone = arrays_to_fst(3, 1, np.array([np.inf, 2.0, np.inf]), [], [], [], [], [])
    assert lone.num_states() == 3 and lone.start() == 1 and float(lone.final(1)) == 2.0
    assert fst_to_arrays(lone).num_arcs == 0


def test_log_arcs():
    f = arrays_to_fst(2, 0, np.array([np.inf, 0.0]), [0], [1], [1], [0.5], [1],
                      arc_type="log")
    assert f.arc_type() == "log"
    assert fst_to_arrays(f).arc_type == "log"


def test_bad_arrays_are_reported():
    with pytest.raises(StageError, match="differ in length"):
        arrays_to_fst(2, 0, np.zeros(2), [0], [1, 2], [1], [0.0], [1])
    with pytest.raises(StageError, match="outside"):
        arrays_to_fst(2, 0, np.zeros(2), [0], [1], [1], [0.0], [5])
    with pytest.raises(StageError, match="start state"):
        arrays_to_fst(2, 7, np.zeros(2), [], [], [], [], [])


@pytest.mark.parametrize("fst_type", ["vector", "const"])
def test_write_fst_is_atomic_and_readable(tmp_path, fst_type):
    f = arrays_to_fst(2, 0, np.array([np.inf, 0.0]), [0], [1], [1], [0.5], [1])
    target = tmp_path / "out.fst"
    target.write_bytes(b"old")
    write_fst(f, target, fst_type)
    back = pywrapfst.Fst.read(str(target))
    assert back.fst_type() == fst_type and str(back) == str(f)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out.fst"]  # no temp file left


def test_write_fst_errors_name_the_path(tmp_path):
    f = arrays_to_fst(1, 0, np.zeros(1), [], [], [], [], [])
    with pytest.raises(InputError, match="missing/out.fst: cannot write"):
        write_fst(f, tmp_path / "missing" / "out.fst")
    with pytest.raises(InputError, match="'compact' is unknown"):
        write_fst(f, tmp_path / "out.fst", "compact")  # type: ignore[arg-type]


def test_many_arcs_in_bulk():
    rng = np.random.default_rng(5)
    n, m = 2000, 50_000
    src = rng.integers(0, n, m)
    il = rng.integers(0, 300, m)
    w = rng.random(m).astype(np.float32)
    dst = rng.integers(0, n, m)
    fin = np.where(rng.random(n) < 0.1, 0.0, np.inf).astype(np.float32)
    f = arrays_to_fst(n, 0, fin, src, il, il, w, dst)
    assert f.num_states() == n and sum(f.num_arcs(s) for s in f.states()) == m
    a = fst_to_arrays(f)
    order = np.argsort(src, kind="stable")
    np.testing.assert_array_equal(a.dst, dst[order])
    np.testing.assert_array_equal(a.weight, w[order])


# Large images reach OpenFst through an in-memory file, small ones through
# read_from_string (netbuild.io.fstfile._image); these tests send every size through
# each route and compare with the arc-by-arc construction.
@pytest.fixture
def file_route(monkeypatch):
    import netbuild.io.fstfile as fstfile

    if not hasattr(fstfile.os, "memfd_create"):
        pytest.skip("no in-memory files on this platform")
    monkeypatch.setattr(fstfile, "_FILE_IMAGE_BYTES", 0)


@given(fst_arrays())
def test_file_route_equals_arc_by_arc_construction(args):
    # reference: OpenFst's text printer and its own property computation
    import netbuild.io.fstfile as fstfile

    if not hasattr(fstfile.os, "memfd_create"):
        pytest.skip("no in-memory files on this platform")
    with mock.patch.object(fstfile, "_FILE_IMAGE_BYTES", 0), \
            mock.patch.object(fstfile, "_read_image", wraps=fstfile._read_image) as read:
        built = arrays_to_fst(*args)
    assert read.call_args.args[1] is not None  # OpenFst was given a path
    slow = python_fst(*args)
    assert built.fst_type() == "vector"
    assert built.num_states() == slow.num_states() and built.start() == slow.start()
    assert str(built) == str(slow)
    known = built.properties(CHECKED, False)
    assert known & slow.properties(CHECKED, True) == known


def test_file_route_edges(file_route):
    words = make_symbol_table("words", ["cable", "car", "summit"])
    empty = arrays_to_fst(0, -1, np.zeros(0), [], [], [], [], [])
    assert empty.num_states() == 0 and empty.start() == -1
    lone = arrays_to_fst(3, 1, np.array([np.inf, 2.0, np.inf]), [], [], [], [], [],
                         isymbols=words, osymbols=words)
    assert lone.num_states() == 3 and float(lone.final(1)) == 2.0
    assert lone.input_symbols().find("summit") == 3
    assert lone.output_symbols().find(2) == "car"
    log = arrays_to_fst(2, 0, np.array([np.inf, 0.0]), [0], [1], [1], [0.5], [1],
                        arc_type="log")
    assert log.arc_type() == "log" and fst_to_arrays(log).weight.tolist() == [0.5]


def test_without_in_memory_files_the_bytes_are_read(monkeypatch):
    import netbuild.io.fstfile as fstfile

    def unavailable(*args):
        raise OSError("no memfd here")

    monkeypatch.setattr(fstfile, "_FILE_IMAGE_BYTES", 0)
    monkeypatch.setattr(fstfile.os, "memfd_create", unavailable, raising=False)
    args = (3, 0, np.array([np.inf, np.inf, 0.5], np.float32), [0, 0, 1], [2, 1, 3],
            [2, 1, 0], [0.25, 1.0, 0.0], [1, 2, 2])
    assert str(arrays_to_fst(*args)) == str(python_fst(*args))


# Complementary property pairs the header always settles, and the determinism pair it
# settles on a label-sorted side.
PAIRS = [(P.ACCEPTOR, P.NOT_ACCEPTOR), (P.EPSILONS, P.NO_EPSILONS),
         (P.I_EPSILONS, P.NO_I_EPSILONS), (P.O_EPSILONS, P.NO_O_EPSILONS),
         (P.I_LABEL_SORTED, P.NOT_I_LABEL_SORTED), (P.O_LABEL_SORTED, P.NOT_O_LABEL_SORTED),
         (P.WEIGHTED, P.UNWEIGHTED), (P.TOP_SORTED, P.NOT_TOP_SORTED)]


@given(fst_arrays())
def test_header_settles_the_pairs_it_can(args):
    # reference: OpenFst's property computation (Fst.properties with test=True)
    built = arrays_to_fst(*args)
    computed = python_fst(*args).properties(CHECKED, True)
    known = built.properties(CHECKED, False)
    for pair in PAIRS:
        both = pair[0] | pair[1]
        assert known & both == computed & both, pair
    for sorted_bit, det in ((P.I_LABEL_SORTED, P.I_DETERMINISTIC | P.NON_I_DETERMINISTIC),
                            (P.O_LABEL_SORTED, P.O_DETERMINISTIC | P.NON_O_DETERMINISTIC)):
        if known & sorted_bit == sorted_bit:
            assert known & det == computed & det


def test_a_large_image_round_trips():
    # 80,000 arcs (1.3 MB): over the size at which the in-memory file is used
    rng = np.random.default_rng(11)
    n, m = 5000, 80_000
    src = np.sort(rng.integers(0, n, m))
    il = rng.integers(0, 400, m)
    ol = rng.integers(0, 400, m)
    w = rng.random(m).astype(np.float32)
    dst = rng.integers(0, n, m)
    fin = np.where(rng.random(n) < 0.2, rng.random(n), np.inf).astype(np.float32)
    words = make_symbol_table("words", [f"w{i}" for i in range(1, 400)])
    f = arrays_to_fst(n, 3, fin, src, il, ol, w, dst, isymbols=words, osymbols=words)
    assert f.fst_type() == "vector" and f.start() == 3
    assert f.input_symbols().find("w399") == 399
    a = fst_to_arrays(f)
    for got, want in ((a.src, src), (a.ilabel, il), (a.olabel, ol), (a.weight, w),
                      (a.dst, dst), (a.final_weights, fin)):
        np.testing.assert_array_equal(got, want)
    f.add_arc(0, pynini.Arc(1, 1, 0.5, 1))  # mutable, like any vector FST
    assert f.num_arcs(0) == a.num_arcs - int(np.count_nonzero(src)) + 1


def test_labels_beyond_32_bits_are_refused():
    with pytest.raises(StageError, match="does not fit the 32-bit layout"):
        arrays_to_fst(2, 0, np.zeros(2), [0], [2**31], [1], [0.0], [1])


# ------------------------------------------------------------ ArrayFst and write_arrays

from netbuild.io.fstfile import ArrayFst, as_fst, write_arrays  # noqa: E402

ALL_PAIRS = [(P.ACCEPTOR, P.NOT_ACCEPTOR), (P.I_DETERMINISTIC, P.NON_I_DETERMINISTIC),
             (P.O_DETERMINISTIC, P.NON_O_DETERMINISTIC), (P.EPSILONS, P.NO_EPSILONS),
             (P.I_EPSILONS, P.NO_I_EPSILONS), (P.O_EPSILONS, P.NO_O_EPSILONS),
             (P.I_LABEL_SORTED, P.NOT_I_LABEL_SORTED),
             (P.O_LABEL_SORTED, P.NOT_O_LABEL_SORTED), (P.WEIGHTED, P.UNWEIGHTED),
             (P.CYCLIC, P.ACYCLIC), (P.INITIAL_CYCLIC, P.INITIAL_ACYCLIC),
             (P.TOP_SORTED, P.NOT_TOP_SORTED), (P.ACCESSIBLE, P.NOT_ACCESSIBLE),
             (P.COACCESSIBLE, P.NOT_COACCESSIBLE), (P.STRING, P.NOT_STRING),
             (P.WEIGHTED_CYCLES, P.UNWEIGHTED_CYCLES)]


def _props_offset(data: bytes) -> int:
    """Where the 8-byte properties word of an OpenFst header starts."""
    import struct

    offset = 4
    for _ in range(2):  # FST type, arc type
        (length,) = struct.unpack_from("<i", data, offset)
        offset += 4 + length
    return offset + 8  # version, flags


@given(fst_arrays())
def test_array_fst_properties_are_openfsts(args):
    # reference: OpenFst's property computation (Fst.properties with test=True), pair
    # by pair, on the same FST built arc by arc
    slow = python_fst(*args)
    for pair in ALL_PAIRS:
        mask = pair[0] | pair[1]
        fresh = ArrayFst(fst_to_arrays(slow))  # (each pair worked out from nothing)
        assert fresh.properties(mask, True) == slow.copy().properties(mask, True), pair


@given(fst_arrays())
def test_array_fst_answers_as_the_fst(args):
    slow = python_fst(*args)
    a = ArrayFst(fst_to_arrays(slow))
    assert (a.num_states(), a.start(), a.num_arcs()) == \
        (slow.num_states(), slow.start(), sum(slow.num_arcs(s) for s in slow.states()))
    assert fst_to_arrays(a) is a.arrays
    assert str(as_fst(a)) == str(slow)
    # the arcs may come in any order: they are grouped by state, stably
    n, start, fin, src, il, ol, w, dst = args
    rev = ArrayFst(dataclasses.replace(
        fst_to_arrays(slow), src=np.array(src[::-1], np.int32),
        ilabel=np.array(il[::-1], np.int32), olabel=np.array(ol[::-1], np.int32),
        weight=np.array(w[::-1], np.float32), dst=np.array(dst[::-1], np.int32)))
    reversed_slow = python_fst(n, start, fin, src[::-1], il[::-1], ol[::-1], w[::-1],
                               dst[::-1])
    assert str(as_fst(rev)) == str(reversed_slow)


@pytest.mark.parametrize("fst_type", ["vector", "const"])
@given(args=fst_arrays(), tables=st.booleans())
def test_write_arrays_writes_openfsts_bytes(tmp_path_factory, fst_type, args, tables):
    # reference: the file OpenFst itself writes for the same FST (pywrapfst write,
    # after convert for const): the same bytes except the properties word, whose bits
    # must all hold for the FST
    slow = python_fst(*args)
    if tables:
        syms = make_symbol_table("t", ["a", "b", "c", "d"])
        slow.set_input_symbols(syms)
        slow.set_output_symbols(syms)
    where = tmp_path_factory.mktemp("w")
    theirs = slow if fst_type == "vector" else pywrapfst.convert(slow, "const")
    theirs.write(str(where / "theirs.fst"))
    write_arrays(fst_to_arrays(slow), where / "ours.fst", fst_type)
    ours_bytes = (where / "ours.fst").read_bytes()
    theirs_bytes = (where / "theirs.fst").read_bytes()
    at = _props_offset(theirs_bytes)
    assert len(ours_bytes) == len(theirs_bytes)
    assert ours_bytes[:at] == theirs_bytes[:at] and ours_bytes[at + 8:] == theirs_bytes[at + 8:]
    back = pywrapfst.Fst.read(str(where / "ours.fst"))
    assert back.fst_type() == fst_type
    known = back.properties(CHECKED, False)
    assert known & slow.properties(CHECKED, True) == known
    assert str(back) == str(slow)


def test_write_arrays_in_chunks(tmp_path, monkeypatch):
    """A graph larger than one chunk of states is written piece by piece, the same."""
    import netbuild.io.fstfile as fstfile

    rng = np.random.default_rng(5)
    n, m = 300, 1200
    src = np.sort(rng.integers(0, n, m)).astype(np.int32)
    args = (n, 0, np.where(rng.random(n) < 0.2, 0.5, np.inf).astype(np.float32), src,
            rng.integers(0, 6, m).astype(np.int32), rng.integers(0, 6, m).astype(np.int32),
            rng.random(m).astype(np.float32), rng.integers(0, n, m).astype(np.int32))
    fst = arrays_to_fst(*args)
    monkeypatch.setattr(fstfile, "_WRITE_CHUNK_STATES", 7)
    for fst_type in ("vector", "const"):
        write_arrays(fst_to_arrays(fst), tmp_path / f"{fst_type}.fst", fst_type)
        assert str(pywrapfst.Fst.read(str(tmp_path / f"{fst_type}.fst"))) == str(fst)


def test_write_fst_writes_an_array_fst(tmp_path):
    fst = pynini.accep("abc")
    write_fst(ArrayFst(fst_to_arrays(fst)), tmp_path / "a.fst", "const")
    back = pywrapfst.Fst.read(str(tmp_path / "a.fst"))
    assert back.fst_type() == "const" and str(back) == str(fst)
    with pytest.raises(InputError):
        write_fst(ArrayFst(fst_to_arrays(fst)), tmp_path / "a.fst", "compact")
