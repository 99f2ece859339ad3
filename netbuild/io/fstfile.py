"""FSTs to and from numpy arrays through OpenFst's binary layout, and atomic FST files.

- `FstArrays`: an FST as flat numpy arrays (one entry per state, one per arc).
- `arrays_to_fst(num_states, start, final_weights, src, ilabel, olabel, weight, dst, ...)`:
  builds a `pynini.Fst` in bulk by writing the const binary layout with numpy.
- `fst_to_arrays(fst)`: the reverse, in bulk, by reading the bytes of a const conversion.
- `shared_conversions()`, `shared_arrays(fst)`: a block in which repeated conversions of
  one FST are made once (the pipeline opens one per stage).
- `write_fst(fst, path, fst_type)`: writes a vector or const FST file atomically.

Python loops calling `add_arc` cost about a microsecond per arc; writing the bytes that
OpenFst's own reader expects and handing them to `pynini.Fst.read_from_string` moves the
per-arc work into numpy and C++.

The const layout (ConstFst with 32-bit offsets, arc type "standard" or "log"; all values
little-endian, no padding unless the header's aligned flag is set, which we never set and
which `write_to_string` does not set). Checked byte by byte against
`pywrapfst.convert(f, "const").write_to_string()` for OpenFst 1.8.3:

Header (65 bytes plus the two type strings' extra length)::

    int32   magic 0x7eb2fdd6
    int32   length, then bytes  FST type  ("const")
    int32   length, then bytes  arc type  ("standard" or "log")
    int32   version             (2 for const)
    int32   flags               (1: input symbols follow, 2: output symbols follow,
                                 4: arrays aligned to 16 bytes)
    uint64  properties          (OpenFst property bits known to hold; see below)
    int64   start state         (-1: none)
    int64   number of states
    int64   number of arcs

Then the input and the output symbol table when the flags say so (OpenFst's own symbol
table binary form), then::

    states  num_states x 20 bytes: float32 final weight (inf = not final),
            uint32 index of the state's first arc, uint32 number of arcs,
            uint32 number of input-epsilon arcs, uint32 number of output-epsilon arcs
    arcs    num_arcs x 16 bytes: int32 ilabel, int32 olabel, float32 weight,
            int32 next state; the arcs of each state are contiguous, states in order

Because the arrays sit at the end of the string, a reader can find them from the end
(``len - 20 * states - 16 * arcs``) without parsing the symbol tables.

Property bits: `arrays_to_fst` sets only bits it has established from the arrays
(acceptor, epsilons, label order, determinism where labels are sorted, weighted,
topological order); every other bit is left unknown for OpenFst to compute on demand.
The const and vector in-memory sizes used for size accounting follow from the same
records: 20 bytes per state and 16 per arc for const.
"""

from __future__ import annotations

import contextlib
import dataclasses
import os
import struct
import tempfile
from collections.abc import Iterator
from typing import Literal

import numpy as np
import pynini
import pywrapfst

from ..errors import InputError, StageError

__all__ = ["FstArrays", "arrays_to_fst", "fst_to_arrays", "shared_arrays",
           "shared_conversions", "write_fst"]

FstFileType = Literal["vector", "const"]
ArcType = Literal["standard", "log"]

_MAGIC = 0x7EB2FDD6
_CONST_VERSION = 2
_FLAG_ISYMBOLS = 1
_FLAG_OSYMBOLS = 2
_FLAG_ALIGNED = 4

STATE_RECORD = np.dtype(
    [("final", "<f4"), ("pos", "<u4"), ("narcs", "<u4"), ("niepsilons", "<u4"),
     ("noepsilons", "<u4")])
ARC_RECORD = np.dtype([("ilabel", "<i4"), ("olabel", "<i4"), ("weight", "<f4"),
                       ("nextstate", "<i4")])

# OpenFst property bits (fst/properties.h).
_EXPANDED = 0x1
_ACCEPTOR, _NOT_ACCEPTOR = 0x10000, 0x20000
_I_DETERMINISTIC, _NON_I_DETERMINISTIC = 0x40000, 0x80000
_O_DETERMINISTIC, _NON_O_DETERMINISTIC = 0x100000, 0x200000
_EPSILONS, _NO_EPSILONS = 0x400000, 0x800000
_I_EPSILONS, _NO_I_EPSILONS = 0x1000000, 0x2000000
_O_EPSILONS, _NO_O_EPSILONS = 0x4000000, 0x8000000
_I_LABEL_SORTED, _NOT_I_LABEL_SORTED = 0x10000000, 0x20000000
_O_LABEL_SORTED, _NOT_O_LABEL_SORTED = 0x40000000, 0x80000000
_WEIGHTED, _UNWEIGHTED = 0x100000000, 0x200000000
_CYCLIC, _ACYCLIC = 0x400000000, 0x800000000
_INITIAL_ACYCLIC = 0x2000000000
_TOP_SORTED, _NOT_TOP_SORTED = 0x4000000000, 0x8000000000


@dataclasses.dataclass
class FstArrays:
    """An FST as flat arrays. Arcs are grouped by `src` in state order.

    `final_weights[s]` is inf where state s is not final; `start` is -1 for an FST
    without a start state.
    """

    num_states: int
    start: int
    final_weights: np.ndarray  # (num_states,) float32
    src: np.ndarray  # (num_arcs,) int32
    ilabel: np.ndarray  # (num_arcs,) int32
    olabel: np.ndarray  # (num_arcs,) int32
    weight: np.ndarray  # (num_arcs,) float32
    dst: np.ndarray  # (num_arcs,) int32
    isymbols: pynini.SymbolTable | None = None
    osymbols: pynini.SymbolTable | None = None
    arc_type: str = "standard"

    @property
    def num_arcs(self) -> int:
        return int(self.src.shape[0])


def _string(s: str) -> bytes:
    b = s.encode("utf-8")
    return struct.pack("<i", len(b)) + b


def _bad(message: str) -> StageError:
    return StageError("arrays_to_fst", message,
                      "this is a caller bug: pass arrays of equal length and valid ids")


def _same_as_previous(src: np.ndarray) -> np.ndarray:
    """For arcs grouped by state: True where arc i+1 leaves the same state as arc i."""
    return src[1:] == src[:-1]


def _known_properties(num_states: int, start: int, final_weights: np.ndarray,
                      src: np.ndarray, ilabel: np.ndarray, olabel: np.ndarray,
                      weight: np.ndarray, dst: np.ndarray) -> int:
    """Returns the property bits established from the arrays (arcs grouped by state)."""
    props = _EXPANDED
    props |= _ACCEPTOR if np.array_equal(ilabel, olabel) else _NOT_ACCEPTOR
    ieps = ilabel == 0
    oeps = olabel == 0
    props |= _I_EPSILONS if ieps.any() else _NO_I_EPSILONS
    props |= _O_EPSILONS if oeps.any() else _NO_O_EPSILONS
    props |= _EPSILONS if (ieps & oeps).any() else _NO_EPSILONS
    same = _same_as_previous(src)
    for labels, sorted_bit, unsorted_bit, det_bit, nondet_bit in (
            (ilabel, _I_LABEL_SORTED, _NOT_I_LABEL_SORTED, _I_DETERMINISTIC,
             _NON_I_DETERMINISTIC),
            (olabel, _O_LABEL_SORTED, _NOT_O_LABEL_SORTED, _O_DETERMINISTIC,
             _NON_O_DETERMINISTIC)):
        step = labels[1:].astype(np.int64) - labels[:-1]
        if (step[same] >= 0).all():
            # Sorted: equal labels on one state are adjacent, so determinism is cheap.
            props |= sorted_bit
            props |= nondet_bit if (step[same] == 0).any() else det_bit
        else:
            props |= unsorted_bit
    finite = final_weights[np.isfinite(final_weights)]
    weighted = bool((weight != 0).any()) or bool((finite != 0).any())
    props |= _WEIGHTED if weighted else _UNWEIGHTED
    if (dst > src).all():
        props |= _TOP_SORTED | _ACYCLIC | _INITIAL_ACYCLIC
    else:
        props |= _NOT_TOP_SORTED
        if (dst == src).any():
            props |= _CYCLIC
    return props


def arrays_to_fst(num_states: int, start: int, final_weights: np.ndarray,
                  src: np.ndarray, ilabel: np.ndarray, olabel: np.ndarray,
                  weight: np.ndarray, dst: np.ndarray,
                  isymbols: pynini.SymbolTable | None = None,
                  osymbols: pynini.SymbolTable | None = None,
                  arc_type: ArcType = "standard") -> pynini.Fst:
    """Constructively builds a mutable FST from flat arrays, in bulk.

    Writes OpenFst's const binary layout with numpy and reads it back with
    `pynini.Fst.read_from_string` (which yields a mutable vector FST). Arcs may come in
    any order; they are grouped by `src` with a stable sort, so the arcs of one state
    keep their given order.

    Args:
      num_states: number of states; ids are 0 .. num_states - 1.
      start: the start state, or -1 for none.
      final_weights: (num_states,) final weights; inf marks a non-final state.
      src, ilabel, olabel, weight, dst: one entry per arc (labels >= 0).
      isymbols, osymbols: symbol tables to attach (not checked against the labels).
      arc_type: "standard" (tropical) or "log"; both store float32 weights.

    Returns:
      A new `pynini.Fst`.

    Raises:
      StageError: the arrays disagree in length or hold invalid state ids or labels.
    """
    num_states = int(num_states)
    start = int(start)
    final_weights = np.asarray(final_weights, dtype=np.float32).ravel()
    src = np.asarray(src).ravel()
    n = src.shape[0]
    arrays = [np.asarray(a).ravel() for a in (ilabel, olabel, weight, dst)]
    if any(a.shape[0] != n for a in arrays):
        raise _bad("arc arrays differ in length: "
                   + ", ".join(str(a.shape[0]) for a in [src, *arrays]))
    ilabel, olabel, weight, dst = arrays
    if final_weights.shape[0] != num_states:
        raise _bad(f"{final_weights.shape[0]} final weights for {num_states} states")
    if not (start == -1 or 0 <= start < num_states):
        raise _bad(f"start state {start} is not among the {num_states} states")
    if num_states < 0 or num_states >= 2**31 or n >= 2**32:
        raise _bad(f"{num_states} states / {n} arcs do not fit the 32-bit layout")
    if n:
        if src.min() < 0 or src.max() >= num_states or dst.min() < 0 \
                or dst.max() >= num_states:
            raise _bad("an arc refers to a state outside 0 .. num_states - 1")
        if ilabel.min() < 0 or olabel.min() < 0:
            raise _bad("negative labels are not allowed")
    if arc_type not in ("standard", "log"):
        raise _bad(f"arc type '{arc_type}' is not supported; use 'standard' or 'log'")
    src = src.astype(np.int32, copy=False)
    if n and not (np.diff(src) >= 0).all():
        order = np.argsort(src, kind="stable")
        src, ilabel, olabel, weight, dst = (a[order] for a in
                                            (src, ilabel, olabel, weight, dst))
    props = _known_properties(num_states, start, final_weights, src, ilabel, olabel,
                              weight, dst)
    header = b"".join([
        struct.pack("<i", _MAGIC), _string("const"), _string(arc_type),
        struct.pack("<ii", _CONST_VERSION, 0), struct.pack("<Q", props),
        struct.pack("<qqq", start, num_states, n)])
    body_start = len(header)
    arcs_start = body_start + num_states * STATE_RECORD.itemsize
    buf = bytearray(arcs_start + n * ARC_RECORD.itemsize)
    buf[:body_start] = header
    states = np.frombuffer(buf, dtype=STATE_RECORD, count=num_states, offset=body_start)
    arcs = np.frombuffer(buf, dtype=ARC_RECORD, count=n, offset=arcs_start)
    states["final"] = final_weights
    narcs = np.bincount(src, minlength=num_states)
    states["narcs"] = narcs
    pos = np.zeros(num_states, dtype=np.int64)
    if num_states > 1:
        np.cumsum(narcs[:-1], out=pos[1:])
    states["pos"] = pos
    states["niepsilons"] = np.bincount(src[ilabel == 0], minlength=num_states)
    states["noepsilons"] = np.bincount(src[olabel == 0], minlength=num_states)
    arcs["ilabel"] = ilabel
    arcs["olabel"] = olabel
    arcs["weight"] = weight
    arcs["nextstate"] = dst
    del states, arcs  # release the buffer views before handing the bytes over
    fst = pynini.Fst.read_from_string(buf)
    del buf
    if isymbols is not None:
        fst.set_input_symbols(isymbols)
    if osymbols is not None:
        fst.set_output_symbols(osymbols)
    return fst


# Conversions shared inside a `shared_conversions` block: id -> (fst, fingerprint, arrays).
_shared: dict[int, tuple[object, tuple, FstArrays]] | None = None


@contextlib.contextmanager
def shared_conversions() -> Iterator[None]:
    """Within the block, repeated `fst_to_arrays` calls on one FST share one conversion.

    The pipeline opens one block per stage, so the stage and the checks after it convert
    each FST once instead of once per check (on a 1.4M-state graph one conversion costs
    about 0.7 s). The shared arrays are read-only. An FST changed after its conversion
    (different number of states or stored property bits, e.g. after an arc sort) is
    converted again; changes that keep both are not detected, so code inside a block
    must not mutate an FST it has already converted and then convert it again.
    Nested blocks share the outer one's conversions.
    """
    global _shared
    outer = _shared
    if outer is None:
        _shared = {}
    try:
        yield
    finally:
        if outer is None:
            _shared = None


def _fingerprint(fst: pynini.Fst | pywrapfst.Fst) -> tuple:
    return (fst.num_states(), fst.properties(pywrapfst.FST_PROPERTIES, False),
            fst.start())


def shared_arrays(fst: pynini.Fst | pywrapfst.Fst) -> FstArrays | None:
    """Returns the conversion of `fst` already made in the open `shared_conversions`
    block, or None (no block, not converted yet, or changed since)."""
    if _shared is None:
        return None
    entry = _shared.get(id(fst))
    if entry is None or entry[0] is not fst or entry[1] != _fingerprint(fst):
        return None
    return entry[2]


def fst_to_arrays(fst: pynini.Fst | pywrapfst.Fst) -> FstArrays:
    """Returns the states and arcs of `fst` as flat arrays, in bulk.

    Reads the bytes of a const conversion of `fst` with numpy. States and arcs keep their
    ids and order. Symbol tables are returned as copies attached to the result. Inside a
    `shared_conversions` block the result is shared and its arrays are read-only.

    Raises:
      StageError: the FST's arc type does not store float32 weights.
    """
    if _shared is not None:
        arrays = shared_arrays(fst)
        if arrays is None:
            arrays = _convert(fst)
            for a in (arrays.final_weights, arrays.src, arrays.ilabel, arrays.olabel,
                      arrays.weight, arrays.dst):
                a.flags.writeable = False
            _shared[id(fst)] = (fst, _fingerprint(fst), arrays)
        return arrays
    return _convert(fst)


def _convert(fst: pynini.Fst | pywrapfst.Fst) -> FstArrays:
    if fst.arc_type() not in ("standard", "log"):
        raise StageError("fst_to_arrays", f"arc type '{fst.arc_type()}' is not supported",
                         "convert the FST to standard or log arcs first")
    const = fst if fst.fst_type() == "const" else pywrapfst.convert(fst, "const")
    data = const.write_to_string()
    del const
    num_states, num_arcs, start, flags = _read_header(data)
    if flags & _FLAG_ALIGNED:
        raise StageError("fst_to_arrays", "the const FST was written with aligned arrays",
                         "this is a netbuild bug: write without alignment")
    body = len(data) - num_states * STATE_RECORD.itemsize - num_arcs * ARC_RECORD.itemsize
    states = np.frombuffer(data, dtype=STATE_RECORD, count=num_states, offset=body)
    arcs = np.frombuffer(data, dtype=ARC_RECORD, count=num_arcs,
                         offset=body + num_states * STATE_RECORD.itemsize)
    src = np.repeat(np.arange(num_states, dtype=np.int32),
                    states["narcs"].astype(np.int64))
    isyms = fst.input_symbols()
    osyms = fst.output_symbols()
    return FstArrays(
        num_states=num_states, start=start,
        final_weights=states["final"].copy(), src=src,
        ilabel=arcs["ilabel"].astype(np.int32), olabel=arcs["olabel"].astype(np.int32),
        weight=arcs["weight"].astype(np.float32), dst=arcs["nextstate"].astype(np.int32),
        isymbols=None if isyms is None else isyms.copy(),
        osymbols=None if osyms is None else osyms.copy(),
        arc_type=fst.arc_type())


def _read_header(data: bytes) -> tuple[int, int, int, int]:
    """Returns (num_states, num_arcs, start, flags) from a const FST header."""
    (magic,) = struct.unpack_from("<i", data, 0)
    if magic != _MAGIC:
        raise StageError("fst_to_arrays", "not an OpenFst binary string",
                         "this is a netbuild bug")
    offset = 4
    for _ in range(2):  # FST type, arc type
        (length,) = struct.unpack_from("<i", data, offset)
        offset += 4 + length
    _version, flags = struct.unpack_from("<ii", data, offset)
    offset += 8 + 8  # version, flags, properties
    start, num_states, num_arcs = struct.unpack_from("<qqq", data, offset)
    return int(num_states), int(num_arcs), int(start), int(flags)


def write_fst(fst: pynini.Fst, path: str | os.PathLike,
              fst_type: FstFileType = "vector") -> None:
    """Writes `fst` to `path` as a vector or const FST file, atomically.

    The file is written to a temporary name in the target's directory and then renamed,
    so a reader never sees a half-written file and a failed write leaves any old file.

    Raises:
      InputError: `fst_type` is unknown, or the file cannot be written.
    """
    path = os.fspath(path)
    if fst_type not in ("vector", "const"):
        raise InputError(f"FST type '{fst_type}' is unknown", "use 'vector' or 'const'",
                         path=path)
    directory = os.path.dirname(os.path.abspath(path))
    tmp = None
    try:
        fd, tmp = tempfile.mkstemp(dir=directory, prefix=f".{os.path.basename(path)}.",
                                   suffix=".tmp")
        os.close(fd)
        out = fst if fst_type == "vector" else pywrapfst.convert(fst, "const")
        if fst_type == "vector" and fst.fst_type() != "vector":
            out = pywrapfst.convert(fst, "vector")
        out.write(tmp)
        os.replace(tmp, path)
        tmp = None
    except (OSError, pywrapfst.FstError) as err:
        raise InputError(f"cannot write the FST file ({err})",
                         "check that the directory exists and is writable",
                         path=path) from err
    finally:
        if tmp is not None and os.path.exists(tmp):
            os.unlink(tmp)
