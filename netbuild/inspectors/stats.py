"""Size and property statistics of an FST, for people and for JSON reports.

- `fst_stats(fst)`: counts, epsilon arcs, final states, computed property names, bytes.
- `format_stats_table(stats)`: the same as an aligned two-column text table.
- `PROPERTY_NAMES`: the OpenFst property bits reported, by name.
"""

from __future__ import annotations

import functools
import operator

import numpy as np
import pynini
import pywrapfst

from ..io.fstfile import fst_to_arrays

# OpenFst's binary and trinary property bits (fst/properties.h), by pywrapfst's names.
PROPERTY_NAMES: dict[str, int] = {
    name.lower(): getattr(pywrapfst, name) for name in (
        "ACCEPTOR", "NOT_ACCEPTOR", "I_DETERMINISTIC", "NON_I_DETERMINISTIC",
        "O_DETERMINISTIC", "NON_O_DETERMINISTIC", "EPSILONS", "NO_EPSILONS",
        "I_EPSILONS", "NO_I_EPSILONS", "O_EPSILONS", "NO_O_EPSILONS",
        "I_LABEL_SORTED", "NOT_I_LABEL_SORTED", "O_LABEL_SORTED", "NOT_O_LABEL_SORTED",
        "WEIGHTED", "UNWEIGHTED", "CYCLIC", "ACYCLIC", "INITIAL_CYCLIC",
        "INITIAL_ACYCLIC", "TOP_SORTED", "NOT_TOP_SORTED", "ACCESSIBLE",
        "NOT_ACCESSIBLE", "COACCESSIBLE", "NOT_COACCESSIBLE", "STRING", "NOT_STRING",
        "WEIGHTED_CYCLES", "UNWEIGHTED_CYCLES")
}


def fst_stats(fst: pynini.Fst) -> dict:
    """Returns size and structure statistics of `fst` (read-only).

    Keys: states, arcs, input_epsilon_arcs, output_epsilon_arcs, epsilon_arcs (epsilon
    on both sides), final_states, properties (sorted names of the property bits that
    hold, computed by OpenFst rather than taken from stored bits), bytes ({"vector": size
    of the vector binary serialization, "const": of the const one}), arc_type.
    """
    arcs = fst_to_arrays(fst)
    ieps = arcs.ilabel == 0
    oeps = arcs.olabel == 0
    mask = functools.reduce(operator.or_, PROPERTY_NAMES.values())
    props = fst.properties(mask, True)
    return {
        "states": arcs.num_states,
        "arcs": int(arcs.src.shape[0]),
        "input_epsilon_arcs": int(ieps.sum()),
        "output_epsilon_arcs": int(oeps.sum()),
        "epsilon_arcs": int((ieps & oeps).sum()),
        "final_states": int(np.isfinite(arcs.final_weights).sum()),
        "properties": sorted(n for n, bit in PROPERTY_NAMES.items() if (props & bit) == bit),
        "bytes": {"vector": len(fst.write_to_string()),
                  "const": len(pywrapfst.convert(fst, "const").write_to_string())},
        "arc_type": fst.arc_type(),
    }


def _human_bytes(n: int) -> str:
    for unit in ("B", "KiB", "MiB", "GiB"):
        if n < 1024 or unit == "GiB":
            return f"{n} B" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1024
    return str(n)


def format_stats_table(stats: dict) -> str:
    """Formats the result of `fst_stats` as an aligned two-column table.

    >>> print(format_stats_table({"states": 2, "arcs": 1, "bytes": {"vector": 10}}))
    states         2
    arcs           1
    bytes.vector   10 B
    """
    rows: list[tuple[str, str]] = []
    for key, value in stats.items():
        if isinstance(value, dict):
            rows.extend((f"{key}.{k}", _human_bytes(v) if key == "bytes" else str(v))
                        for k, v in value.items())
        elif isinstance(value, list):
            rows.append((key, ", ".join(value) if value else "-"))
        elif isinstance(value, int):
            rows.append((key, f"{value:,}".replace(",", " ")))
        else:
            rows.append((key, str(value)))
    width = max(len(k) for k, _ in rows) + 3
    return "\n".join(f"{k:<{width}}{v}".rstrip() for k, v in rows)
