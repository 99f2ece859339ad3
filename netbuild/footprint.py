"""Byte formulas of OpenFst's FST layouts, from counts: on disk and in memory.

- `Footprint`: disk and memory bytes of one representation.
- `SizeReport`: states, arcs and both footprints of one FST; `.to_json()`.
- `header_bytes(fst_type, arc_type)`: bytes of OpenFst's binary FST header.
- `symbol_table_bytes(table)`: bytes of one symbol table in binary form (inside a file).
- `symbol_table_memory(table)`: estimated heap bytes of one loaded symbol table.
- `footprints(states, arcs, states_with_arcs, ...)`: the formulas, from counts alone.
- `state_counts(fst)`: states, arcs and states with arcs (in bulk inside a shared
  conversion).
- `fst_size(fst)`: the report of an FST in memory.

This module sits below the pipeline, which records each stage's size as the stage
finishes; `netbuild.inspectors.size` re-exports it and adds the reports of files and
build directories.

The formulas (standard or log arcs: 16-byte arcs, 4-byte weights; S states, A arcs,
S1 states with at least one arc; T the attached symbol tables' bytes)::

    header              52 + len(fst_type) + len(arc_type)      (66 vector, 65 const)
    const file          header + T + 20 S + 16 A
    vector file         header + T + 12 S + 16 A
    symbol table        29 + len(name) + sum over entries (12 + len(symbol))
    const in memory     20 S + 16 A                      + symbol tables
    vector in memory    72 S + 16 A + 16 S1              + symbol tables
    symbol table heap   sum over entries (64 + chunk(len + 1) where len > 15)

Where they come from. The file layouts are OpenFst's binary forms (documented in
`netbuild.io.fstfile` for const): the header holds the magic number, the two type
strings (each an int32 length and the bytes), version, flags, properties (8 bytes)
and three int64 counts; a const file then stores 20-byte state records and 16-byte
arcs, a vector file per state a float32 final weight, an int64 arc count and the
state's 16-byte arcs. A binary symbol table is an int32 magic number, the name (int32
length + bytes), int64 available key and int64 entry count, then per entry the
symbol (int32 length + bytes) and its int64 key. The tests compare these with the
bytes OpenFst writes, exactly.

In memory, a const FST read by `pywrapfst.Fst.read` holds its two arrays as read. A
vector FST holds per state a pointer (8 bytes, the state vector is reserved to the
exact count when read), a heap state object (final weight, two epsilon counts and the
arc vector: 48 bytes, a 64-byte allocator chunk) and, for a state with arcs, an arc
array reserved to its exact count (16 n bytes, a 16 n + 16 chunk with glibc's 8-byte
chunk header and 16-byte rounding). A loaded symbol table holds per entry a string
object (32 bytes, plus a heap copy for strings longer than the 15-byte inline buffer)
and its hash-index share (measured: 64 bytes per entry for short symbols). These are
checked against the resident memory of a fresh process loading the file (the tests
state the tolerance); a few hundred KiB of reader buffers come on top.
"""

from __future__ import annotations

import dataclasses
from typing import Any

import numpy as np
import pynini
import pywrapfst

from .io.fstfile import ARC_RECORD, STATE_RECORD, shared_arrays

__all__ = ["Footprint", "SizeReport", "footprints", "fst_size", "header_bytes",
           "state_counts", "symbol_table_bytes", "symbol_table_memory"]

CONST_STATE_BYTES = STATE_RECORD.itemsize  # 20
ARC_BYTES = ARC_RECORD.itemsize  # 16
VECTOR_STATE_FILE_BYTES = 4 + 8  # float32 final weight + int64 arc count
VECTOR_STATE_MEMORY_BYTES = 8 + 64  # pointer + heap state object (allocator chunk)
VECTOR_ARC_ARRAY_OVERHEAD = 16  # allocator chunk header and rounding per arc array
SYMBOL_HEADER_BYTES = 4 + 4 + 8 + 8  # magic, name length, available key, entry count
SYMBOL_ENTRY_BYTES = 4 + 8  # symbol length + int64 key
SYMBOL_ENTRY_MEMORY = 64  # string object + index share, measured
_INLINE_STRING = 15  # longest string kept inside the string object


@dataclasses.dataclass(frozen=True)
class Footprint:
    """Bytes of one representation of an FST: its file and its loaded form."""

    disk_bytes: int
    memory_bytes: int


@dataclasses.dataclass(frozen=True)
class SizeReport:
    """The size of one FST. `symbols_bytes` is the binary size of the attached tables."""

    states: int
    arcs: int
    states_with_arcs: int
    const: Footprint
    vector: Footprint
    symbols_bytes: int
    arc_type: str = "standard"
    fst_type: str | None = None  # the stored type, for a report of a file

    def to_json(self) -> dict[str, Any]:
        data = {"states": self.states, "arcs": self.arcs,
                "const": dataclasses.asdict(self.const),
                "vector": dataclasses.asdict(self.vector),
                "symbols_bytes": self.symbols_bytes}
        if self.fst_type is not None:
            data["fst_type"] = self.fst_type
        return data


def header_bytes(fst_type: str, arc_type: str = "standard") -> int:
    """Returns the bytes of OpenFst's binary header for these type strings.

    >>> header_bytes("vector"), header_bytes("const")
    (66, 65)
    """
    return 52 + len(fst_type.encode()) + len(arc_type.encode())


def _symbols(table: pynini.SymbolTable | pywrapfst.SymbolTableView) -> list[bytes]:
    return [table.find(table.get_nth_key(i)).encode("utf-8")
            for i in range(table.num_symbols())]


def symbol_table_bytes(table: pynini.SymbolTable | None) -> int:
    """Returns the bytes `table` takes in binary form (inside an FST file); 0 for None."""
    if table is None:
        return 0
    body = sum(SYMBOL_ENTRY_BYTES + len(s) for s in _symbols(table))
    return SYMBOL_HEADER_BYTES + len(table.name().encode("utf-8")) + body


def _chunk(n: int) -> int:
    """glibc malloc's chunk for an n-byte request (8-byte header, 16-byte rounding)."""
    return max(32, (n + 8 + 15) // 16 * 16)


def symbol_table_memory(table: pynini.SymbolTable | None) -> int:
    """Returns the estimated heap bytes of `table` once loaded; 0 for None."""
    if table is None:
        return 0
    return sum(SYMBOL_ENTRY_MEMORY + (_chunk(len(s) + 1) if len(s) > _INLINE_STRING else 0)
               for s in _symbols(table))


def footprints(states: int, arcs: int, states_with_arcs: int, *,
               arc_type: str = "standard", symbols_bytes: int = 0,
               symbols_memory: int = 0) -> tuple[Footprint, Footprint]:
    """Returns the (const, vector) footprints of an FST with these counts.

    Args:
      states, arcs: the counts; states_with_arcs: states with at least one arc.
      arc_type: the arc type string stored in the header ("standard", "log").
      symbols_bytes: binary bytes of the attached symbol tables (both sides).
      symbols_memory: their estimated heap bytes.
    """
    const = Footprint(
        header_bytes("const", arc_type) + symbols_bytes + CONST_STATE_BYTES * states
        + ARC_BYTES * arcs,
        CONST_STATE_BYTES * states + ARC_BYTES * arcs + symbols_memory)
    vector = Footprint(
        header_bytes("vector", arc_type) + symbols_bytes + VECTOR_STATE_FILE_BYTES * states
        + ARC_BYTES * arcs,
        VECTOR_STATE_MEMORY_BYTES * states + ARC_BYTES * arcs
        + VECTOR_ARC_ARRAY_OVERHEAD * states_with_arcs + symbols_memory)
    return const, vector


# (name, labeled checksum) -> (binary bytes, heap bytes) of tables already measured:
# every stage of a build carries the same word table, and reading a 20k-word table
# symbol by symbol in Python took 0.14 s per stage (1.8 s of a 6.3 s sub-build).
_TABLE_SIZES: dict[tuple[str, str], tuple[int, int]] = {}


def _tables(fst: pynini.Fst | pywrapfst.Fst) -> tuple[int, int]:
    total = memory = 0
    for table in (fst.input_symbols(), fst.output_symbols()):
        if table is not None:
            key = (table.name(), table.labeled_checksum())
            sizes = _TABLE_SIZES.get(key)
            if sizes is None:
                if len(_TABLE_SIZES) > 64:
                    _TABLE_SIZES.clear()
                sizes = _TABLE_SIZES[key] = (symbol_table_bytes(table),
                                             symbol_table_memory(table))
            total += sizes[0]
            memory += sizes[1]
    return total, memory


def _report(states: int, arcs: int, with_arcs: int, fst: pynini.Fst | pywrapfst.Fst
            ) -> SizeReport:
    sym_bytes, sym_memory = _tables(fst)
    const, vector = footprints(states, arcs, with_arcs, arc_type=fst.arc_type(),
                               symbols_bytes=sym_bytes, symbols_memory=sym_memory)
    return SizeReport(states, arcs, with_arcs, const, vector, sym_bytes, fst.arc_type())


def state_counts(fst: pynini.Fst | pywrapfst.Fst) -> tuple[int, int, int]:
    """Returns (states, arcs, states with at least one arc) of `fst` (read-only).

    Uses the arc arrays when a shared conversion of `fst` is open (inside a pipeline
    stage), else one pass over the states.
    """
    arrays = shared_arrays(fst)
    if arrays is not None:
        per_state = np.bincount(arrays.src, minlength=arrays.num_states)
        return arrays.num_states, int(arrays.src.shape[0]), int(np.count_nonzero(per_state))
    states = arcs = with_arcs = 0
    for s in fst.states():
        n = fst.num_arcs(s)
        states += 1
        arcs += n
        with_arcs += n > 0
    return states, arcs, with_arcs


def fst_size(fst: pynini.Fst | pywrapfst.Fst) -> SizeReport:
    """Returns the size report of `fst` (read-only)."""
    return _report(*state_counts(fst), fst)
