"""Exact byte accounting of FSTs: on disk and in memory, const and vector layouts.

- `Footprint`, `SizeReport`, `header_bytes`, `symbol_table_bytes`,
  `symbol_table_memory`, `footprints`, `state_counts`, `fst_size`: re-exported from
  `netbuild.footprint` (the formulas and the report of an FST in memory).
- `file_size(path)`: the report of an FST file (states and arcs counted without a copy).
- `build_sizes(directory)`: the report of every FST a build manifest names.
- `check_budget(bytes_needed, budget)`: whether a size fits a budget, and the margin.

They live in `netbuild.footprint`, below the pipeline, which records each stage's
size with them; the derivation of the formulas is in its docstring.
"""

from __future__ import annotations

import dataclasses
import json
import os
import struct
from pathlib import Path
from typing import Any

import numpy as np
import pywrapfst

from ..errors import InputError
from ..footprint import (ARC_BYTES, CONST_STATE_BYTES, Footprint, SizeReport, _report,
                         footprints, fst_size, header_bytes, state_counts,
                         symbol_table_bytes, symbol_table_memory)
from ..io.fstfile import STATE_RECORD

__all__ = ["Footprint", "SizeReport", "build_sizes", "check_budget", "file_size",
           "footprints", "fst_size", "header_bytes", "state_counts", "symbol_table_bytes",
           "symbol_table_memory"]


def _const_counts(path: Path, states: int, arcs: int) -> int:
    """States with arcs of a const file, from its state records (memory-mapped)."""
    size = path.stat().st_size
    offset = size - CONST_STATE_BYTES * states - ARC_BYTES * arcs
    if states == 0:
        return 0
    records = np.memmap(path, dtype=STATE_RECORD, mode="r", offset=offset, shape=(states,))
    return int(np.count_nonzero(records["narcs"]))


def _header_counts(path: Path) -> tuple[str, int, int] | None:
    """(fst_type, states, arcs) from a file's header, or None when it is no FST file."""
    with open(path, "rb") as fh:
        head = fh.read(4096)
    try:
        (magic,) = struct.unpack_from("<i", head, 0)
        if magic != 0x7EB2FDD6:
            return None
        offset = 4
        names = []
        for _ in range(2):
            (length,) = struct.unpack_from("<i", head, offset)
            names.append(head[offset + 4:offset + 4 + length].decode("ascii"))
            offset += 4 + length
        offset += 4 + 4 + 8 + 8  # version, flags, properties, start
        states, arcs = struct.unpack_from("<qq", head, offset)
    except (struct.error, UnicodeDecodeError):
        return None
    return names[0], int(states), int(arcs)


def file_size(path: str | os.PathLike) -> SizeReport:
    """Returns the size report of the FST file `path` (any stored type).

    A const file is counted from its header and state records without loading it; a
    vector file is loaded with `pywrapfst.Fst.read`.

    Raises:
      InputError: the file is missing or not an OpenFst binary FST.
    """
    p = Path(path)
    if not p.is_file():
        raise InputError("FST file is missing", "check the path", path=str(p))
    header = _header_counts(p)
    if header is None:
        raise InputError("not an OpenFst binary FST file",
                         "give a file written by 'netbuild build' or by OpenFst", path=str(p))
    try:
        fst = pywrapfst.Fst.read(str(p))
    except (pywrapfst.FstError, OSError) as err:
        raise InputError(f"cannot read the FST ({err})",
                         "give a file written by 'netbuild build' or by OpenFst",
                         path=str(p)) from err
    if header[0] == "const":
        report = _report(header[1], header[2], _const_counts(p, header[1], header[2]), fst)
    else:
        report = fst_size(fst)
    return dataclasses.replace(report, fst_type=header[0])


def _manifest_fsts(directory: Path) -> tuple[dict[str, Any], list[tuple[str, Path]]]:
    path = directory / "manifest.json"
    try:
        manifest = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise InputError("not a netbuild build directory (no manifest.json)",
                         "give the directory written by 'netbuild build --out', or an "
                         "FST file", path=str(directory)) from None
    except (OSError, ValueError) as err:
        raise InputError(f"manifest.json is unreadable ({err})",
                         "rebuild the directory with 'netbuild build'",
                         path=str(path)) from err
    if not isinstance(manifest, dict) or not isinstance(manifest.get("graph"), str):
        raise InputError("manifest.json names no graph",
                         "rebuild the directory with 'netbuild build'", path=str(path))
    named = [("graph", manifest["graph"])]
    for key, value in (manifest.get("intermediates") or {}).items():
        if isinstance(value, str) and value not in {v for _, v in named}:
            named.append((key, value))
    return manifest, [(k, directory / v) for k, v in named]


def build_sizes(directory: str | os.PathLike) -> dict[str, Any]:
    """Returns the size of the final graph of a build directory and of every FST its
    manifest names, as JSON data: the graph's `SizeReport.to_json()` keys plus
    ``"stages"``, a list of ``{"name", "file", ...the same keys}`` in manifest order.

    Raises:
      InputError: the directory is not a build, or a file it names is missing or broken.
    """
    d = Path(directory)
    _manifest, named = _manifest_fsts(d)
    stages = []
    graph: dict[str, Any] | None = None
    for name, path in named:
        entry = file_size(path).to_json()
        if name == "graph":
            graph = entry
        stages.append({"name": name, "file": path.name, **entry})
    assert graph is not None
    return {**graph, "stages": stages}


def check_budget(bytes_needed: int, budget: int) -> tuple[bool, int]:
    """Returns (fits, margin): margin = budget - bytes_needed (negative: over budget).

    >>> check_budget(300, 1000)
    (True, 700)
    """
    margin = int(budget) - int(bytes_needed)
    return margin >= 0, margin
