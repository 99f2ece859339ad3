"""FSTs to and from numpy arrays through OpenFst's binary layout, and atomic FST files.

- `FstArrays`: an FST as flat numpy arrays (one entry per state, one per arc).
- `arrays_to_fst(num_states, start, final_weights, src, ilabel, olabel, weight, dst, ...)`:
  builds a `pynini.Fst` in bulk by writing the const binary layout with numpy.
- `fst_to_arrays(fst)`: the reverse, in bulk, by reading the bytes of a const conversion.
- `shared_conversions()`, `shared_arrays(fst)`: a block in which repeated conversions of
  one FST are made once (the pipeline opens one per stage).
- `forget_shared(fst)`, `retain_shared(fst)`: drop one FST's conversion from the open
  block, or every one but `fst`'s, so the block no longer keeps those FSTs or their
  arrays alive.
- `ArrayFst`: an FST held only as its `FstArrays`, for stages whose work is done in
  numpy; it answers what the pipeline and its checks ask of an FST and becomes a
  `pynini.Fst` only on demand (`as_fst`).
- `write_fst(fst, path, fst_type)`: writes a vector or const FST file atomically (an
  `ArrayFst` straight from its arrays: `write_arrays`).

Python loops calling `add_arc` cost about a microsecond per arc; writing the bytes that
OpenFst's own reader expects and letting OpenFst read them moves the per-arc work into
numpy and C++. Large images are written into an anonymous in-memory file that OpenFst
opens like any file (`read_from_string` would first copy the bytes twice, which costs
more than everything else); small ones go through `pynini.Fst.read_from_string`.

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
import mmap
import os
import struct
import tempfile
from collections.abc import Callable, Iterator
from typing import Literal

import numpy as np
import pynini
import pywrapfst

from ..errors import InputError, StageError

__all__ = ["ArrayFst", "FstArrays", "arrays_to_fst", "as_fst", "forget_shared",
           "fst_to_arrays", "retain_shared", "share_arrays", "shared_arrays",
           "shared_conversions", "write_arrays", "write_fst"]

FstFileType = Literal["vector", "const"]
ArcType = Literal["standard", "log"]

_MAGIC = 0x7EB2FDD6
_CONST_VERSION = 2
_VECTOR_VERSION = 2
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
_MUTABLE = 0x2
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


def _label_bits(labels: np.ndarray, same: np.ndarray, sorted_bit: int, unsorted_bit: int,
                det_bit: int, nondet_bit: int) -> int:
    """Sortedness and determinism bits of one label side (arcs grouped by state).

    `same[i]` says arc i + 1 leaves the state of arc i. Labels are non-negative int32,
    so neighbour comparisons need no wider type.
    """
    if labels.shape[0] < 2:
        return sorted_bit | det_bit
    ascending = labels[1:] >= labels[:-1]
    ascending |= ~same
    if not ascending.all():
        return unsorted_bit
    # Sorted: equal labels on one state are adjacent, so determinism is one more pass.
    repeat = labels[1:] == labels[:-1]
    repeat &= same
    return sorted_bit | (nondet_bit if repeat.any() else det_bit)


def _known_properties(num_states: int, start: int, final_weights: np.ndarray,
                      src: np.ndarray, ilabel: np.ndarray, olabel: np.ndarray,
                      weight: np.ndarray, dst: np.ndarray) -> int:
    """Returns the property bits established from the arrays (arcs grouped by state)."""
    props = _EXPANDED
    acceptor = ilabel is olabel or np.array_equal(ilabel, olabel)
    props |= _ACCEPTOR if acceptor else _NOT_ACCEPTOR
    ieps = ilabel == 0
    oeps = ieps if acceptor else olabel == 0
    props |= _I_EPSILONS if ieps.any() else _NO_I_EPSILONS
    props |= _O_EPSILONS if oeps.any() else _NO_O_EPSILONS
    props |= _EPSILONS if (ieps & oeps).any() else _NO_EPSILONS
    same = src[1:] == src[:-1]
    ibits = _label_bits(ilabel, same, _I_LABEL_SORTED, _NOT_I_LABEL_SORTED,
                        _I_DETERMINISTIC, _NON_I_DETERMINISTIC)
    props |= ibits
    if acceptor:  # the output side has the same bits, one position up
        props |= ibits << 2
    else:
        props |= _label_bits(olabel, same, _O_LABEL_SORTED, _NOT_O_LABEL_SORTED,
                             _O_DETERMINISTIC, _NON_O_DETERMINISTIC)
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


def _as(a: np.ndarray, dtype: type) -> np.ndarray:
    """`a` as a contiguous array of `dtype` (the array itself when it already is one)."""
    return np.ascontiguousarray(a, dtype=dtype)


def arrays_to_fst(num_states: int, start: int, final_weights: np.ndarray,
                  src: np.ndarray, ilabel: np.ndarray, olabel: np.ndarray,
                  weight: np.ndarray, dst: np.ndarray,
                  isymbols: pynini.SymbolTable | None = None,
                  osymbols: pynini.SymbolTable | None = None,
                  arc_type: ArcType = "standard") -> pynini.Fst:
    """Constructively builds a mutable FST from flat arrays, in bulk.

    Writes OpenFst's const binary layout with numpy and has OpenFst read it and convert
    it to a mutable vector FST (see `_read_image`). Arcs may come in any order; they are
    grouped by `src` with a stable sort, so the arcs of one state keep their given order.

    Args:
      num_states: number of states; ids are 0 .. num_states - 1.
      start: the start state, or -1 for none.
      final_weights: (num_states,) final weights; inf marks a non-final state.
      src, ilabel, olabel, weight, dst: one entry per arc (labels 0 .. 2**31 - 1).
      isymbols, osymbols: symbol tables to attach (not checked against the labels).
      arc_type: "standard" (tropical) or "log"; both store float32 weights.

    Returns:
      A new `pynini.Fst`.

    Raises:
      StageError: the arrays disagree in length or hold invalid state ids or labels.
    """
    num_states = int(num_states)
    start = int(start)
    acceptor = ilabel is olabel  # (one array for both sides: checked and copied once)
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
        for labels in (ilabel,) if acceptor else (ilabel, olabel):
            if labels.min() < 0:
                raise _bad("negative labels are not allowed")
            if labels.max() >= 2**31:
                raise _bad("a label does not fit the 32-bit layout")
    if arc_type not in ("standard", "log"):
        raise _bad(f"arc type '{arc_type}' is not supported; use 'standard' or 'log'")
    src, dst, ilabel = _as(src, np.int32), _as(dst, np.int32), _as(ilabel, np.int32)
    olabel = ilabel if acceptor else _as(olabel, np.int32)
    weight = _as(weight, np.float32)
    if n > 1 and not (src[1:] >= src[:-1]).all():
        order = np.argsort(src, kind="stable")
        src, ilabel, weight, dst = (a[order] for a in (src, ilabel, weight, dst))
        olabel = ilabel if acceptor else olabel[order]
        del order
    props = _known_properties(num_states, start, final_weights, src, ilabel, olabel,
                              weight, dst)
    header = b"".join([
        struct.pack("<i", _MAGIC), _string("const"), _string(arc_type),
        struct.pack("<ii", _CONST_VERSION, 0), struct.pack("<Q", props),
        struct.pack("<qqq", start, num_states, n)])
    arcs_start = len(header) + num_states * STATE_RECORD.itemsize
    size = arcs_start + n * ARC_RECORD.itemsize
    narcs = np.bincount(src, minlength=num_states)
    with _image(size) as (buf, path):
        buf[:len(header)] = header
        states = np.frombuffer(buf, dtype=STATE_RECORD, count=num_states,
                               offset=len(header))
        arcs = np.frombuffer(buf, dtype=ARC_RECORD, count=n, offset=arcs_start)
        states["final"] = final_weights
        states["narcs"] = narcs
        pos = np.zeros(num_states, dtype=np.int64)
        if num_states > 1:
            np.cumsum(narcs[:-1], out=pos[1:])
        states["pos"] = pos
        del pos, narcs
        # (the buffer starts zeroed: epsilon counts are written only where there are any)
        for field, labels in (("niepsilons", ilabel), ("noepsilons", olabel)):
            eps = labels == 0
            if eps.any():
                states[field] = np.bincount(src[eps], minlength=num_states)
            del eps
        arcs["ilabel"] = ilabel
        arcs["olabel"] = olabel
        arcs["weight"] = weight
        arcs["nextstate"] = dst
        del states, arcs  # release the buffer views before OpenFst reads the image
        fst = _read_image(buf, path)
    if not isinstance(fst, pynini.Fst):
        # (converted once the image is gone: it and the vector FST are never both held)
        fst = pynini.Fst.from_pywrapfst(fst)
    if isymbols is not None:
        fst.set_input_symbols(isymbols)
    if osymbols is not None:
        fst.set_output_symbols(osymbols)
    return fst


# Images of at least this many bytes are handed to OpenFst as an in-memory file (see
# `_image`); smaller ones through `read_from_string`, whose fixed cost is lower.
_FILE_IMAGE_BYTES = 1 << 20


@contextlib.contextmanager
def _image(size: int) -> Iterator[tuple[bytearray | mmap.mmap, str | None]]:
    """A writable buffer of `size` bytes for an FST image, and a path OpenFst can open.

    `pynini.Fst.read_from_string` copies its argument into a C++ string and again into a
    string stream (growing it by doubling) before OpenFst reads it: on a 120 MB image
    that is about 0.5 s, nearly all of it page faults on the fresh copies. So large
    images are written straight into the pages of an anonymous in-memory file
    (`os.memfd_create`; Linux), which OpenFst opens by its /proc path and reads like
    any file. The mapping counts in the process's resident memory as the buffer did.
    Elsewhere, for small images, or if the in-memory file cannot be made, the buffer
    is a bytearray and the path None.
    """
    fd = -1
    buf: bytearray | mmap.mmap | None = None
    if size >= _FILE_IMAGE_BYTES and hasattr(os, "memfd_create") \
            and os.path.isdir("/proc/self/fd"):
        try:
            fd = os.memfd_create("netbuild-fst", getattr(os, "MFD_CLOEXEC", 0))
            os.ftruncate(fd, size)
            buf = mmap.mmap(fd, size)
        except (OSError, ValueError):
            if fd >= 0:
                os.close(fd)
            fd, buf = -1, None
    if buf is None:
        yield bytearray(size), None
        return
    try:
        yield buf, f"/proc/self/fd/{fd}"
    finally:
        try:
            buf.close()
        except BufferError:  # a view survived an error; the mapping goes with it
            pass
        os.close(fd)


def _read_image(buf: bytearray | mmap.mmap, path: str | None
                ) -> pynini.Fst | pywrapfst.Fst:
    """Has OpenFst read the const image in `buf` (also at `path` if not None).

    Returns the const FST OpenFst read from `path`, or, without a path, the mutable
    vector FST `read_from_string` makes of the bytes.
    """
    if path is not None:
        try:
            const = pywrapfst.Fst.read(path)
        except pywrapfst.FstError:
            const = None  # (not expected) read the bytes instead
        if const is not None:
            if const.fst_type() != "const":
                raise StageError("arrays_to_fst", f"OpenFst read a {const.fst_type()} FST "
                                 "from a const image", "this is a netbuild bug")
            return const
        return pynini.Fst.read_from_string(buf[:])
    return pynini.Fst.read_from_string(buf)


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


# Bits OpenFst works out and stores when asked (`properties(mask, True)`, as the checks
# do) without the FST changing; any change to the FST clears them, so leaving them out
# of the fingerprint loses no change and keeps a check from converting again.
_COMPUTED_BITS = (pywrapfst.ACCESSIBLE | pywrapfst.NOT_ACCESSIBLE | pywrapfst.COACCESSIBLE
                  | pywrapfst.NOT_COACCESSIBLE | pywrapfst.CYCLIC | pywrapfst.ACYCLIC
                  | pywrapfst.INITIAL_CYCLIC | pywrapfst.INITIAL_ACYCLIC
                  | pywrapfst.TOP_SORTED | pywrapfst.NOT_TOP_SORTED
                  | pywrapfst.I_DETERMINISTIC | pywrapfst.NON_I_DETERMINISTIC
                  | pywrapfst.O_DETERMINISTIC | pywrapfst.NON_O_DETERMINISTIC
                  | pywrapfst.STRING | pywrapfst.NOT_STRING)


def _fingerprint(fst: pynini.Fst | pywrapfst.Fst) -> tuple:
    props = fst.properties(pywrapfst.FST_PROPERTIES, False) & ~_COMPUTED_BITS
    return (fst.num_states(), props, fst.start())


def shared_arrays(fst: pynini.Fst | pywrapfst.Fst) -> FstArrays | None:
    """Returns the conversion of `fst` already made in the open `shared_conversions`
    block, or None (no block, not converted yet, or changed since)."""
    if isinstance(fst, ArrayFst):
        return fst.arrays
    if _shared is None:
        return None
    entry = _shared.get(id(fst))
    if entry is None or entry[0] is not fst or entry[1] != _fingerprint(fst):
        return None
    return entry[2]


def forget_shared(fst: pynini.Fst | pywrapfst.Fst) -> None:
    """Drops the conversion of `fst` from the open `shared_conversions` block, if any.

    The block holds each FST it converted (and its arrays) until it ends; a stage whose
    input is no longer needed calls this so that the input can be freed before the
    checks of the output run.
    """
    if _shared is not None:
        entry = _shared.get(id(fst))
        if entry is not None and entry[0] is fst:
            del _shared[id(fst)]


def retain_shared(fst: pynini.Fst | pywrapfst.Fst) -> None:
    """Drops every conversion of the open `shared_conversions` block except `fst`'s.

    The pipeline calls it when a stage returns: the checks look only at the stage's
    result, so its input and any temporary the stage converted can be freed.
    """
    if _shared is not None:
        for key in [k for k, entry in _shared.items() if entry[0] is not fst]:
            del _shared[key]


def share_arrays(fst: pynini.Fst | pywrapfst.Fst, arrays: FstArrays) -> None:
    """Registers `arrays` as the conversion of `fst` in the open `shared_conversions`
    block (no-op outside one), so checks of an FST built from arrays need not convert
    it back. The caller vouches that `arrays` is exactly what `fst_to_arrays` would
    return: arcs grouped by state in the FST's order (as `arrays_to_fst` keeps them),
    float32 weights, symbol tables as on `fst`."""
    if _shared is None or isinstance(fst, ArrayFst):
        return
    isyms, osyms = fst.input_symbols(), fst.output_symbols()
    shared = dataclasses.replace(
        arrays, isymbols=None if isyms is None else isyms.copy(),
        osymbols=None if osyms is None else osyms.copy(), arc_type=fst.arc_type())
    for a in (shared.final_weights, shared.src, shared.ilabel, shared.olabel,
              shared.weight, shared.dst):
        a.flags.writeable = False
    _shared[id(fst)] = (fst, _fingerprint(fst), shared)


def fst_to_arrays(fst: pynini.Fst | pywrapfst.Fst) -> FstArrays:
    """Returns the states and arcs of `fst` as flat arrays, in bulk.

    Reads the bytes of a const conversion of `fst` with numpy. States and arcs keep their
    ids and order. Symbol tables are returned as copies attached to the result. Inside a
    `shared_conversions` block the result is shared and its arrays are read-only.

    Raises:
      StageError: the FST's arc type does not store float32 weights.
    """
    if isinstance(fst, ArrayFst):
        return fst.arrays
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
    return _image_arrays(data, fst.input_symbols(), fst.output_symbols(), fst.arc_type())


def const_file_arrays(path: str | os.PathLike, isymbols: pynini.SymbolTable | None,
                      osymbols: pynini.SymbolTable | None, arc_type: str = "standard"
                      ) -> FstArrays:
    """Returns the arrays of the const FST file at `path`, read with numpy (no OpenFst
    conversion: 20k / 1M, a 4.9M-arc graph, 4.5 s through `fst_to_arrays` of the FST
    read back); `isymbols`/`osymbols` are attached as given (copies)."""
    data = np.fromfile(path, dtype=np.uint8)
    return _image_arrays(data, isymbols, osymbols, arc_type)


def _image_arrays(data, isyms: pynini.SymbolTable | None, osyms: pynini.SymbolTable | None,
                  arc_type: str) -> FstArrays:
    """The arrays of a const image `data` (bytes or a uint8 array), from its end."""
    num_states, num_arcs, start, flags = _read_header(bytes(data[:4096]))
    if flags & _FLAG_ALIGNED:
        raise StageError("fst_to_arrays", "the const FST was written with aligned arrays",
                         "this is a netbuild bug: write without alignment")
    body = len(data) - num_states * STATE_RECORD.itemsize - num_arcs * ARC_RECORD.itemsize
    states = np.frombuffer(data, dtype=STATE_RECORD, count=num_states, offset=body)
    arcs = np.frombuffer(data, dtype=ARC_RECORD, count=num_arcs,
                         offset=body + num_states * STATE_RECORD.itemsize)
    src = np.repeat(np.arange(num_states, dtype=np.int32),
                    states["narcs"].astype(np.int64))
    return FstArrays(
        num_states=num_states, start=start,
        final_weights=states["final"].copy(), src=src,
        ilabel=arcs["ilabel"].astype(np.int32), olabel=arcs["olabel"].astype(np.int32),
        weight=arcs["weight"].astype(np.float32), dst=arcs["nextstate"].astype(np.int32),
        isymbols=None if isyms is None else isyms.copy(),
        osymbols=None if osyms is None else osyms.copy(),
        arc_type=arc_type)


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


def _bits(props: "int | pywrapfst.FstProperties") -> int:
    return props if isinstance(props, int) else props.value


# (positive bit, negative bit) of the properties an `ArrayFst` knows or can work out.
_PAIRS = [(_bits(p), _bits(n)) for p, n in [
          (pywrapfst.ACCEPTOR, pywrapfst.NOT_ACCEPTOR),
          (pywrapfst.I_DETERMINISTIC, pywrapfst.NON_I_DETERMINISTIC),
          (pywrapfst.O_DETERMINISTIC, pywrapfst.NON_O_DETERMINISTIC),
          (pywrapfst.EPSILONS, pywrapfst.NO_EPSILONS),
          (pywrapfst.I_EPSILONS, pywrapfst.NO_I_EPSILONS),
          (pywrapfst.O_EPSILONS, pywrapfst.NO_O_EPSILONS),
          (pywrapfst.I_LABEL_SORTED, pywrapfst.NOT_I_LABEL_SORTED),
          (pywrapfst.O_LABEL_SORTED, pywrapfst.NOT_O_LABEL_SORTED),
          (pywrapfst.WEIGHTED, pywrapfst.UNWEIGHTED),
          (pywrapfst.CYCLIC, pywrapfst.ACYCLIC),
          (pywrapfst.INITIAL_CYCLIC, pywrapfst.INITIAL_ACYCLIC),
          (pywrapfst.TOP_SORTED, pywrapfst.NOT_TOP_SORTED),
          (pywrapfst.ACCESSIBLE, pywrapfst.NOT_ACCESSIBLE),
          (pywrapfst.COACCESSIBLE, pywrapfst.NOT_COACCESSIBLE),
          (pywrapfst.STRING, pywrapfst.NOT_STRING),
          (pywrapfst.WEIGHTED_CYCLES, pywrapfst.UNWEIGHTED_CYCLES)]]
_ACCESSIBLE, _COACCESSIBLE = _bits(pywrapfst.ACCESSIBLE), _bits(pywrapfst.COACCESSIBLE)


class ArrayFst:
    """An FST held only as its `FstArrays` (arcs grouped by state, read-only).

    The model-level stages of the full graph work in numpy from one array form to the
    next; as vector FSTs their results cost about 100 bytes per state against 24 as
    arrays (20k / 1M: the 6.3M-state expanded graph and the 6.7M-state final graph
    were 650 and 730 MB), and building each one took seconds. An `ArrayFst` answers
    what the pipeline, its checks and the size report ask of an FST -- counts, start,
    tables, property bits (the structural ones worked out in bulk, others by OpenFst on
    a built copy) -- `fst_to_arrays` returns its arrays as they are, `write_fst` writes
    it straight from them, and `as_fst` builds the `pynini.Fst` when a caller needs one.
    """

    __slots__ = ("arrays", "_props")

    def __init__(self, arrays: FstArrays) -> None:
        src = arrays.src
        if src.shape[0] > 1 and not (src[1:] >= src[:-1]).all():
            order = np.argsort(src, kind="stable")
            arrays = dataclasses.replace(arrays, src=src[order],
                                         ilabel=arrays.ilabel[order],
                                         olabel=arrays.olabel[order],
                                         weight=arrays.weight[order], dst=arrays.dst[order])
            del order
        arrays = dataclasses.replace(
            arrays, final_weights=_as(arrays.final_weights, np.float32),
            src=_as(arrays.src, np.int32), ilabel=_as(arrays.ilabel, np.int32),
            olabel=_as(arrays.olabel, np.int32), weight=_as(arrays.weight, np.float32),
            dst=_as(arrays.dst, np.int32))
        for a in (arrays.final_weights, arrays.src, arrays.ilabel, arrays.olabel,
                  arrays.weight, arrays.dst):
            a.flags.writeable = False
        self.arrays = arrays
        self._props = _known_properties(arrays.num_states, arrays.start,
                                        arrays.final_weights, arrays.src, arrays.ilabel,
                                        arrays.olabel, arrays.weight, arrays.dst)

    # -- what an FST answers
    def num_states(self) -> int:
        return self.arrays.num_states

    def start(self) -> int:
        return self.arrays.start

    def num_arcs(self, state: int | None = None) -> int:
        if state is None:
            return self.arrays.num_arcs
        return int(np.count_nonzero(self.arrays.src == state))

    def arc_type(self) -> str:
        return self.arrays.arc_type

    def fst_type(self) -> str:
        return "arrays"

    def input_symbols(self) -> pynini.SymbolTable | None:
        return self.arrays.isymbols

    def output_symbols(self) -> pynini.SymbolTable | None:
        return self.arrays.osymbols

    def set_input_symbols(self, table: pynini.SymbolTable | None) -> "ArrayFst":
        self.arrays = dataclasses.replace(self.arrays,
                                          isymbols=None if table is None else table.copy())
        return self

    def set_output_symbols(self, table: pynini.SymbolTable | None) -> "ArrayFst":
        self.arrays = dataclasses.replace(self.arrays,
                                          osymbols=None if table is None else table.copy())
        return self

    def properties(self, mask: "pywrapfst.FstProperties", test: bool
                   ) -> "pywrapfst.FstProperties":
        """OpenFst's `properties`: the known bits in `mask`, or with `test` the true
        value of every bit in `mask` (worked out and remembered)."""
        mask = _bits(mask)
        if test:
            unknown = [(p, n) for p, n in _PAIRS
                       if mask & (p | n) and not self._props & (p | n)]
            if unknown:
                self._work_out(unknown)
        return pywrapfst.FstProperties(self._props & mask)

    def set_properties(self, props: "pywrapfst.FstProperties",
                       mask: "pywrapfst.FstProperties") -> "ArrayFst":
        props, mask = _bits(props), _bits(mask)
        self._props = (self._props & ~mask) | (props & mask)
        return self

    def _work_out(self, pairs: list[tuple[int, int]]) -> None:
        from ..bulk import reachable

        a = self.arrays
        rest = []
        for pos, neg in pairs:
            if pos == _ACCESSIBLE:
                ok = a.start < 0 and a.num_states == 0 or a.start >= 0 and bool(
                    reachable(a.num_states, a.src, a.dst, np.array([a.start])).all())
            elif pos == _COACCESSIBLE:
                ok = bool(reachable(a.num_states, a.dst, a.src,
                                    np.flatnonzero(np.isfinite(a.final_weights))).all())
            elif pos in (_I_DETERMINISTIC, _O_DETERMINISTIC):
                labels = a.ilabel if pos == _I_DETERMINISTIC else a.olabel
                key = np.sort(a.src.astype(np.int64) << 32 | labels)
                ok = not bool((key[1:] == key[:-1]).any())
                del key
            else:
                rest.append((pos, neg))
                continue
            self._props = (self._props & ~(pos | neg)) | (pos if ok else neg)
        if rest:  # bits worked out by OpenFst on a built copy (not asked in a build)
            mask = 0
            for pos, neg in rest:
                mask |= pos | neg
            self._props |= _bits(as_fst(self).properties(pywrapfst.FstProperties(mask),
                                                         True)) & mask

    def write(self, path: str | os.PathLike) -> None:
        """Writes a vector FST file (as `pynini.Fst.write` would)."""
        write_arrays(self.arrays, path, "vector")


def as_fst(fst: "pynini.Fst | pywrapfst.Fst | ArrayFst") -> pynini.Fst | pywrapfst.Fst:
    """`fst` itself, or for an `ArrayFst` a `pynini.Fst` built from its arrays."""
    if not isinstance(fst, ArrayFst):
        return fst
    a = fst.arrays
    return arrays_to_fst(a.num_states, a.start, a.final_weights, a.src, a.ilabel, a.olabel,
                         a.weight, a.dst, isymbols=a.isymbols, osymbols=a.osymbols,
                         arc_type=a.arc_type)  # type: ignore[arg-type]


# States per chunk when `write_arrays` writes an FST file (bounds its buffer).
_WRITE_CHUNK_STATES = 1 << 20


def _header(fst_type: str, arrays: FstArrays, props: int, num_arcs: int) -> bytes:
    flags = (_FLAG_ISYMBOLS if arrays.isymbols is not None else 0) | \
        (_FLAG_OSYMBOLS if arrays.osymbols is not None else 0)
    version = _CONST_VERSION if fst_type == "const" else _VECTOR_VERSION
    head = b"".join([struct.pack("<i", _MAGIC), _string(fst_type), _string(arrays.arc_type),
                     struct.pack("<ii", version, flags), struct.pack("<Q", props),
                     struct.pack("<qqq", arrays.start, arrays.num_states, num_arcs)])
    tables = b"".join(t.write_to_string() for t in (arrays.isymbols, arrays.osymbols)
                      if t is not None)
    return head + tables


def _arc_runs(a: FstArrays) -> tuple[np.ndarray, np.ndarray]:
    """Each state's number of arcs and (one entry more) where its arcs start."""
    narcs = np.bincount(a.src, minlength=a.num_states).astype(np.int64)
    first = np.zeros(a.num_states + 1, dtype=np.int64)
    np.cumsum(narcs, out=first[1:])
    return narcs, first


def _write_const_body(out, a: FstArrays) -> None:
    narcs, first = _arc_runs(a)
    for lo in range(0, a.num_states, _WRITE_CHUNK_STATES):
        hi = min(lo + _WRITE_CHUNK_STATES, a.num_states)
        states = np.zeros(hi - lo, dtype=STATE_RECORD)
        states["final"] = a.final_weights[lo:hi]
        states["pos"] = first[lo:hi]
        states["narcs"] = narcs[lo:hi]
        arcs = slice(first[lo], first[hi])
        for field, labels in (("niepsilons", a.ilabel), ("noepsilons", a.olabel)):
            eps = labels[arcs] == 0
            if eps.any():
                states[field] = np.bincount(a.src[arcs][eps] - lo, minlength=hi - lo)
        out.write(states.tobytes())
    n = a.num_arcs
    chunk = _WRITE_CHUNK_STATES * 4
    for lo in range(0, n, chunk):
        hi = min(lo + chunk, n)
        arcs = np.empty(hi - lo, dtype=ARC_RECORD)
        arcs["ilabel"] = a.ilabel[lo:hi]
        arcs["olabel"] = a.olabel[lo:hi]
        arcs["weight"] = a.weight[lo:hi]
        arcs["nextstate"] = a.dst[lo:hi]
        out.write(arcs.tobytes())


def _write_vector_body(out, a: FstArrays) -> None:
    """Each state: float32 final weight, int64 number of arcs, then its arcs (16 bytes
    each as in the const layout); all in 4-byte words, built a chunk of states at a
    time."""
    narcs, first = _arc_runs(a)
    for lo in range(0, a.num_states, _WRITE_CHUNK_STATES):
        hi = min(lo + _WRITE_CHUNK_STATES, a.num_states)
        alo, ahi = int(first[lo]), int(first[hi])
        words = np.zeros(3 * (hi - lo) + 4 * (ahi - alo), dtype="<i4")
        rel = first[lo:hi] - alo
        at = 3 * np.arange(hi - lo, dtype=np.int64) + 4 * rel  # each state's record
        words[at] = a.final_weights[lo:hi].view("<i4")
        counts = narcs[lo:hi]
        words[at + 1] = (counts & 0xFFFFFFFF).astype(np.uint32).view("<i4")
        words[at + 2] = (counts >> 32).astype("<i4")
        # arc i of state s sits after s's record and the arcs before it
        pos = 3 * (a.src[alo:ahi].astype(np.int64) - lo + 1) \
            + 4 * np.arange(ahi - alo, dtype=np.int64)
        words[pos] = a.ilabel[alo:ahi]
        words[pos + 1] = a.olabel[alo:ahi]
        words[pos + 2] = a.weight[alo:ahi].view("<i4")
        words[pos + 3] = a.dst[alo:ahi]
        out.write(words.tobytes())


def write_arrays(arrays: FstArrays, path: str | os.PathLike,
                 fst_type: FstFileType = "vector") -> None:
    """Writes `arrays` as an OpenFst vector or const FST file, atomically, from numpy in
    chunks (no FST is built: 20k / 1M, the 15.8M-arc final graph).

    The bytes are OpenFst's own (`tests/io/test_fstfile.py` compares them with files
    OpenFst wrote), except the properties word, which holds only the bits established
    from the arrays, and the vector header's arc count, which OpenFst leaves 0 and so
    do we.

    Raises:
      InputError: `fst_type` is unknown, or the file cannot be written.
    """
    a = arrays
    props = _known_properties(a.num_states, a.start, a.final_weights, a.src, a.ilabel,
                              a.olabel, a.weight, a.dst)
    if fst_type == "vector":
        props |= _MUTABLE

    def write(tmp: str) -> None:
        with open(tmp, "wb") as out:
            out.write(_header(fst_type, a, props, a.num_arcs if fst_type == "const" else 0))
            (_write_const_body if fst_type == "const" else _write_vector_body)(out, a)

    _write_atomically(path, fst_type, write)


def _write_atomically(path: str | os.PathLike, fst_type: str,
                      write: Callable[[str], None]) -> None:
    """Checks `fst_type`, has `write` fill a temporary file beside `path`, then renames
    it to `path` (a failed write leaves any old file and no temporary one).

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
        write(tmp)
        os.replace(tmp, path)
        tmp = None
    except (OSError, pywrapfst.FstError) as err:
        raise InputError(f"cannot write the FST file ({err})",
                         "check that the directory exists and is writable",
                         path=path) from err
    finally:
        if tmp is not None and os.path.exists(tmp):
            os.unlink(tmp)


def write_fst(fst: pynini.Fst, path: str | os.PathLike,
              fst_type: FstFileType = "vector") -> None:
    """Writes `fst` to `path` as a vector or const FST file, atomically.

    The file is written to a temporary name in the target's directory and then renamed,
    so a reader never sees a half-written file and a failed write leaves any old file.

    Raises:
      InputError: `fst_type` is unknown, or the file cannot be written.
    """
    if isinstance(fst, ArrayFst):
        write_arrays(fst.arrays, path, fst_type)
        return

    def write(tmp: str) -> None:
        out = fst if fst_type == "vector" else pywrapfst.convert(fst, "const")
        if fst_type == "vector" and fst.fst_type() != "vector":
            out = pywrapfst.convert(fst, "vector")
        out.write(tmp)

    _write_atomically(path, fst_type, write)
