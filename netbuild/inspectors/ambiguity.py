"""Where a lexicon and the graphs built from it are ambiguous, and why.

- `homophone_sets(prons)`: phones -> the distinct words pronounced that way (two or more).
- `prefix_groups(prons)`: pronunciations that are a proper prefix of longer ones.
- `lexicon_ambiguity(lexicon, result)`: the groups and the auxiliary markers of a built L.
- `input_ambiguity(fst, name, file=None)`: input non-determinism, epsilon ratio and
  out-degrees of one FST, in bulk (numpy over `fst_to_arrays`).
- `stage_files(directory)`: stage name -> FST file of a build directory (from its manifest).
- `graph_ambiguity(directory)`, `project_ambiguity(project)`: the whole report.
- `report_to_json(report)`, `format_report(report, limit=10)`: JSON data and a text table.

A state is *non-deterministic on input* when two of its outgoing arcs carry the same
input label, epsilon included; this is the condition of OpenFst's
``I_DETERMINISTIC`` property bit, counted per state. The *epsilon ratio* is the number
of input-epsilon arcs over the number of arcs (0 for an FST without arcs).

For a build directory every FST file the manifest names is inspected (``graph`` and
each entry of ``intermediates``; one file named twice is inspected once, under all
its names). The lexicon part is recomputed from the lexicon file the manifest names,
with the build's options and word table, when that file still has the recorded
checksum; otherwise it is left out with a note. For a project the inputs are read,
and G, L and L∘G are built in memory (no determinization, so a project whose
determinization blows up can still be inspected).
"""

from __future__ import annotations

import dataclasses
import hashlib
import math
from collections.abc import Iterable, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pynini

from ..builders.disambiguation import HOMOPHONE, PREFIX, MarkerUse
from ..errors import Diagnostics, InputError
from ..io.fstfile import FstArrays, fst_to_arrays
from ..symbols import disambiguation_marker

__all__ = ["AmbiguityReport", "FstAmbiguity", "LexiconAmbiguity", "NondeterministicState",
           "PrefixGroup", "format_report", "graph_ambiguity", "homophone_sets",
           "input_ambiguity", "lexicon_ambiguity", "prefix_groups", "project_ambiguity",
           "read_stage", "report_to_json", "stage_files"]

Prons = Iterable[tuple[str, Sequence[str]]]
_EXAMPLES = 5  # non-deterministic states shown per FST
_PREFIX_OF_SHOWN = 5  # longer words named per prefix marker


@dataclasses.dataclass(frozen=True)
class PrefixGroup:
    """A pronunciation `phones` of `words` that is a proper prefix of the pronunciations
    of `extended_by` (sorted; a word of `words` appears there too when another of its
    own pronunciations is longer)."""

    phones: tuple[str, ...]
    words: list[str]
    extended_by: list[str]


@dataclasses.dataclass
class LexiconAmbiguity:
    """The ambiguity of the pronunciations compiled into L.

    `homophones` maps phones to the sorted distinct words sharing them; `prefixes` is
    sorted by phones; `markers` are the lexicon builder's records, in lexicon order.
    """

    path: str
    words: int
    pronunciations: int
    skipped_words: list[str]
    homophones: dict[tuple[str, ...], list[str]]
    prefixes: list[PrefixGroup]
    markers: list[MarkerUse]

    @property
    def num_markers(self) -> int:
        """The number of distinct disambiguation markers (!amb1..!ambK)."""
        return max((m.marker for m in self.markers), default=0)


@dataclasses.dataclass(frozen=True)
class NondeterministicState:
    """One state with `arcs` (>= 2) outgoing arcs on input label `label`; `outputs`
    are the output labels of those arcs (symbol names where a table is attached)."""

    state: int
    label: str
    arcs: int
    outputs: list[str]


@dataclasses.dataclass
class FstAmbiguity:
    """Input determinism and branching of one FST."""

    name: str
    file: str | None
    states: int
    arcs: int
    nondeterministic_states: int
    examples: list[NondeterministicState]
    input_epsilon_arcs: int
    epsilon_ratio: float
    max_out_degree: int
    out_degree_histogram: list[tuple[int, int]]  # (out-degree, number of states), degree order


@dataclasses.dataclass
class AmbiguityReport:
    """What `graph_ambiguity` / `project_ambiguity` found; `notes` say what was left out."""

    source: str
    lexicon: LexiconAmbiguity | None
    fsts: list[FstAmbiguity]
    notes: list[str] = dataclasses.field(default_factory=list)


# --- pronunciations --------------------------------------------------------------------

def homophone_sets(prons: Prons) -> dict[tuple[str, ...], list[str]]:
    """Returns phones -> sorted distinct words, for every phone sequence of two or more words.

    >>> homophone_sets([("two", ["t", "u"]), ("too", ["t", "u"]), ("to", ["t", "u"]),
    ...                 ("toe", ["t", "ou"])])
    {('t', 'u'): ['to', 'too', 'two']}
    """
    by_phones: dict[tuple[str, ...], set[str]] = {}
    for word, phones in prons:
        by_phones.setdefault(tuple(phones), set()).add(word)
    return {ph: sorted(ws) for ph, ws in by_phones.items() if len(ws) > 1}


def prefix_groups(prons: Prons) -> list[PrefixGroup]:
    """Returns every pronunciation that is a proper prefix of another one, with its words.

    Each pronunciation looks up its own proper prefixes in the set of pronunciations,
    so the work is the total number of phones (times the prefix-hashing cost).

    >>> [(g.phones, g.words, g.extended_by) for g in prefix_groups(
    ...     [("a", ["uh"]), ("about", ["uh", "b", "au", "t"]), ("abode", ["uh", "b", "ou", "d"])])]
    [(('uh',), ['a'], ['abode', 'about'])]
    """
    owners: dict[tuple[str, ...], set[str]] = {}
    for word, phones in prons:
        owners.setdefault(tuple(phones), set()).add(word)
    longer: dict[tuple[str, ...], set[str]] = {}
    for phones, words in owners.items():
        for k in range(1, len(phones)):
            head = phones[:k]
            if head in owners:
                longer.setdefault(head, set()).update(words)
    return [PrefixGroup(ph, sorted(owners[ph]), sorted(ws)) for ph, ws in sorted(longer.items())]


def lexicon_ambiguity(lexicon, result) -> LexiconAmbiguity:
    """Returns the groups and markers of the pronunciations compiled into L.

    Args:
      lexicon: the `netbuild.io.lexicon.Lexicon` L was built from.
      result: the `LexiconResult` of `build_lexicon`; its skipped words (not in the
        word table) are left out of the groups, as they are out of L.
    """
    skipped = set(result.skipped_words)
    prons = sorted({(e.word, tuple(e.phones)) for e in lexicon.entries if e.word not in skipped})
    return LexiconAmbiguity(
        path=str(lexicon.path), words=len({w for w, _ in prons}), pronunciations=len(prons),
        skipped_words=list(result.skipped_words), homophones=homophone_sets(prons),
        prefixes=prefix_groups(prons), markers=list(result.markers))


# --- FSTs ------------------------------------------------------------------------------

def _namer(table: pynini.SymbolTable | None):
    def name(label: int) -> str:
        if table is not None and table.member(int(label)):
            return table.find(int(label))
        return str(int(label))
    return name


def input_ambiguity(fst: pynini.Fst | FstArrays, name: str, file: str | None = None,
                    max_examples: int = _EXAMPLES) -> FstAmbiguity:
    """Returns the input non-determinism, epsilon ratio and out-degrees of `fst`.

    Read-only; computed in bulk with numpy (one sort of the arcs by state and label).
    `fst` may also be the `FstArrays` of an FST. Examples are the lowest-numbered
    non-deterministic states, one (the smallest repeated label) per state.
    """
    a = fst if isinstance(fst, FstArrays) else fst_to_arrays(fst)
    n_arcs = a.num_arcs
    out_degree = np.bincount(a.src, minlength=a.num_states) if a.num_states else \
        np.zeros(0, dtype=np.int64)
    order = np.lexsort((a.ilabel, a.src))
    s, lab = a.src[order], a.ilabel[order]
    repeat = (s[1:] == s[:-1]) & (lab[1:] == lab[:-1])
    bad = np.unique(s[1:][repeat])
    examples = []
    iname, oname = _namer(a.isymbols), _namer(a.osymbols)
    if bad.size and max_examples > 0:
        first_label = {}
        for st, lb in zip(s[1:][repeat].tolist(), lab[1:][repeat].tolist()):
            if st not in first_label:
                first_label[st] = lb
                if len(first_label) == max_examples:
                    break
        for st, lb in first_label.items():
            mask = (a.src == st) & (a.ilabel == lb)
            examples.append(NondeterministicState(
                int(st), iname(lb), int(mask.sum()), [oname(o) for o in a.olabel[mask]]))
    hist = np.bincount(out_degree) if out_degree.size else np.zeros(0, dtype=np.int64)
    n_eps = int((a.ilabel == 0).sum())
    return FstAmbiguity(
        name=name, file=file, states=a.num_states, arcs=n_arcs,
        nondeterministic_states=int(bad.size), examples=examples, input_epsilon_arcs=n_eps,
        epsilon_ratio=n_eps / n_arcs if n_arcs else 0.0,
        max_out_degree=int(out_degree.max()) if out_degree.size else 0,
        out_degree_histogram=[(int(d), int(c)) for d, c in enumerate(hist) if c])


# --- build directories and projects ----------------------------------------------------

def stage_files(directory: str | Path) -> dict[str, Path]:
    """Returns stage name -> FST file for every FST the build directory's manifest names:
    ``graph`` first, then the ``intermediates`` in manifest order.

    Raises:
      InputError: the directory is not a build (no readable manifest).
    """
    from ..workflow import _read_manifest

    d = Path(directory)
    manifest = _read_manifest(d)
    files: dict[str, Path] = {}
    if isinstance(manifest.get("graph"), str):
        files["graph"] = d / manifest["graph"]
    for key, value in (manifest.get("intermediates") or {}).items():
        if isinstance(value, str) and key not in files:
            files[key] = d / value
    return files


def read_stage(directory: str | Path, path: Path) -> pynini.Fst:
    """Reads one FST file of a build directory; tables the file lacks come from the
    build's word table (outputs) and input table (inputs of the graph file only)."""
    from ..workflow import _read_manifest, read_fst_file

    d = Path(directory)
    stored = read_fst_file(path)
    fst = pynini.Fst.from_pywrapfst(stored) if stored.fst_type() == "vector" else \
        pynini.Fst.read_from_string(stored.write_to_string())
    manifest = _read_manifest(d)
    tables = {k: d / str(manifest.get(k)) for k in ("word_symbols", "input_symbols")}
    if fst.output_symbols() is None and tables["word_symbols"].is_file():
        fst.set_output_symbols(pynini.SymbolTable.read_text(str(tables["word_symbols"])))
    if (fst.input_symbols() is None and path.name == manifest.get("graph")
            and tables["input_symbols"].is_file()):
        fst.set_input_symbols(pynini.SymbolTable.read_text(str(tables["input_symbols"])))
    return fst


def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def _build_lexicon_part(directory: Path, manifest: dict[str, Any],
                        notes: list[str]) -> LexiconAmbiguity | None:
    from ..builders.lexicon import build_lexicon
    from ..io.lexicon import read_lexicon
    from ..io.phones import inventory_from_lexicon, read_phones
    from ..options import LexiconOptions

    inputs = manifest.get("inputs") or {}
    records = {k: inputs.get(k) for k in ("lexicon", "phones")}
    for key, rec in records.items():
        if rec is None and key == "phones":
            continue
        path = Path(str((rec or {}).get("path", "")))
        if not rec or not path.is_file() or _sha256(path) != rec.get("sha256"):
            notes.append(f"{path}: the {key} file is missing or changed since the build, so "
                         "homophones, prefixes and markers are left out; rebuild the graph, "
                         "or run 'netbuild ambiguity --project' on the project")
            return None
    fields = {f.name for f in dataclasses.fields(LexiconOptions)}
    given = ((manifest.get("options") or {}).get("lexicon") or {})
    options = LexiconOptions(**{k: v for k, v in given.items() if k in fields})
    diag = Diagnostics()
    inventory = (read_phones(records["phones"]["path"], diag) if records["phones"]
                 else None)
    lexicon = read_lexicon(records["lexicon"]["path"], inventory, options, diag)
    if inventory is None:
        inventory = inventory_from_lexicon(lexicon, diag)
    words = pynini.SymbolTable.read_text(str(directory / str(manifest.get("word_symbols"))))
    return lexicon_ambiguity(lexicon, build_lexicon(lexicon, inventory, words, options))


def graph_ambiguity(directory: str | Path) -> AmbiguityReport:
    """Returns the ambiguity report of a build directory (see the module docstring).

    Raises:
      InputError: the directory is not a build, or a file it names cannot be read.
    """
    from ..workflow import _read_manifest

    d = Path(directory)
    manifest = _read_manifest(d)
    by_file: dict[Path, list[str]] = {}
    for name, path in stage_files(d).items():
        by_file.setdefault(path, []).append(name)
    fsts = []
    for path, names in by_file.items():
        if not path.is_file():
            raise InputError("FST file is missing",
                             "rebuild the directory with 'netbuild build'", path=str(path))
        fsts.append(input_ambiguity(read_stage(d, path), "=".join(names), path.name))
    notes: list[str] = []
    lexicon = _build_lexicon_part(d, manifest, notes)
    return AmbiguityReport(str(d), lexicon, fsts, notes)


def project_ambiguity(project) -> AmbiguityReport:
    """Returns the ambiguity report of a project: its lexicon, and G, L and L∘G built in
    memory (no determinization).

    Raises:
      InputError: problems in the inputs (all of them, as `netbuild check` lists them).
      EmptyCompositionError: L∘G has no path.
    """
    from ..builders.grammar import build_grammar
    from ..builders.lexicon import build_lexicon
    from ..builders.vocabulary import restrict_vocabulary
    from ..pipeline import compose_stage
    from ..workflow import read_inputs

    diag = Diagnostics()
    inputs = read_inputs(project, diag)
    diag.raise_if_errors()
    assert inputs is not None  # no errors means every input was read
    opts = project.options
    model, _ = restrict_vocabulary(inputs.model, set(inputs.lexicon.words()),
                                   opts.grammar.oov_policy)
    grammar = build_grammar(model)
    lexicon = build_lexicon(inputs.lexicon, inputs.inventory, grammar.word_symbols,
                            opts.lexicon)
    composed = compose_stage(lexicon.fst, grammar.fst)
    fsts = [input_ambiguity(grammar.fst, "grammar"), input_ambiguity(lexicon.fst, "lexicon"),
            input_ambiguity(composed, "compose")]
    notes = ["the FSTs are G, L and L∘G built in memory; run 'netbuild ambiguity --graph DIR' "
             "on a build to inspect the determinized graphs"]
    return AmbiguityReport(str(project.path or "command line"),
                           lexicon_ambiguity(inputs.lexicon, lexicon), fsts, notes)


# --- output ----------------------------------------------------------------------------

def _marker_json(m: MarkerUse, lex: LexiconAmbiguity,
                 prefix_of: dict[tuple[str, ...], list[str]]) -> dict[str, Any]:
    reasons = m.reason.split("+")
    out: dict[str, Any] = {"word": m.word, "phones": list(m.phones),
                           "marker": disambiguation_marker(m.marker), "reason": m.reason}
    if HOMOPHONE in reasons:
        out["homophones"] = [w for w in lex.homophones.get(m.phones, []) if w != m.word]
    if PREFIX in reasons:
        longer = prefix_of.get(m.phones, [])
        out["prefix_of"] = longer[:_PREFIX_OF_SHOWN]
        out["prefix_of_count"] = len(longer)
    return out


def report_to_json(report: AmbiguityReport) -> dict[str, Any]:
    """Returns the report as plain JSON data (keys documented in docs/diagnostics.md)."""
    lex = report.lexicon
    lexicon_json = None
    if lex is not None:
        prefix_of = {g.phones: g.extended_by for g in lex.prefixes}
        by_reason: dict[str, int] = {}
        for m in lex.markers:
            by_reason[m.reason] = by_reason.get(m.reason, 0) + 1
        lexicon_json = {
            "path": lex.path, "words": lex.words, "pronunciations": lex.pronunciations,
            "skipped_words": lex.skipped_words,
            "homophone_groups": [{"phones": list(ph), "words": ws}
                                 for ph, ws in sorted(lex.homophones.items())],
            "prefix_groups": [{"phones": list(g.phones), "words": g.words,
                               "extended_by": g.extended_by} for g in lex.prefixes],
            "markers": {"count": lex.num_markers, "pronunciations": len(lex.markers),
                        "by_reason": dict(sorted(by_reason.items())),
                        "uses": [_marker_json(m, lex, prefix_of) for m in lex.markers]},
        }
    return {
        "source": report.source,
        "lexicon": lexicon_json,
        "fsts": [{"name": f.name, "file": f.file, "states": f.states, "arcs": f.arcs,
                  "nondeterministic_states": f.nondeterministic_states,
                  "examples": [dataclasses.asdict(e) for e in f.examples],
                  "input_epsilon_arcs": f.input_epsilon_arcs,
                  "epsilon_ratio": f.epsilon_ratio, "max_out_degree": f.max_out_degree,
                  "out_degree_histogram": [list(p) for p in f.out_degree_histogram]}
                 for f in report.fsts],
        "notes": list(report.notes),
    }


def _buckets(histogram: list[tuple[int, int]]) -> list[tuple[str, int]]:
    """Groups (degree, count) pairs into 0, 1, 2, 3-4, 5-8, 9-16, ... buckets."""
    out: dict[str, int] = {}
    for d, c in histogram:
        if d <= 2:
            key = str(d)
        else:
            hi = 2 ** math.ceil(math.log2(d))
            key = f"{hi // 2 + 1}-{hi}"
        out[key] = out.get(key, 0) + c
    return list(out.items())


def _more(n: int, limit: int) -> list[str]:
    return [f"  ... and {n - limit} more (see --json)"] if n > limit else []


def format_report(report: AmbiguityReport, limit: int = 10) -> str:
    """Formats the report as text: groups and markers (at most `limit` rows each), then
    one table row per FST and its out-degree histogram in power-of-two buckets."""
    lines = [f"ambiguity of {report.source}"]
    lex = report.lexicon
    if lex is not None:
        lines.append(f"lexicon {lex.path}: {lex.pronunciations} pronunciations of "
                     f"{lex.words} words ({len(lex.skipped_words)} words not in the model "
                     "left out)")
        lines.append(f"homophone groups: {len(lex.homophones)}")
        groups = sorted(lex.homophones.items(), key=lambda kv: (-len(kv[1]), kv[0]))
        for ph, ws in groups[:limit]:
            lines.append(f"  {' '.join(ph):<24} {', '.join(ws)}")
        lines += _more(len(groups), limit)
        lines.append(f"prefix groups: {len(lex.prefixes)}")
        prefixes = sorted(lex.prefixes, key=lambda g: (-len(g.extended_by), g.phones))
        for g in prefixes[:limit]:
            shown = ", ".join(g.extended_by[:_PREFIX_OF_SHOWN])
            extra = f" (+{len(g.extended_by) - _PREFIX_OF_SHOWN})" \
                if len(g.extended_by) > _PREFIX_OF_SHOWN else ""
            lines.append(f"  {' '.join(g.phones):<24} {', '.join(g.words)} < {shown}{extra}")
        lines += _more(len(prefixes), limit)
        lines.append(f"auxiliary markers: {lex.num_markers} distinct, on "
                     f"{len(lex.markers)} pronunciations")
        prefix_of = {g.phones: g.extended_by for g in lex.prefixes}
        for m in lex.markers[:limit]:
            why = _marker_json(m, lex, prefix_of)
            detail = []
            if "homophones" in why:
                detail.append("homophone of " + ", ".join(why["homophones"]))
            if "prefix_of" in why:
                more = why["prefix_of_count"] - len(why["prefix_of"])
                detail.append("prefix of " + ", ".join(why["prefix_of"])
                              + (f" (+{more})" if more else ""))
            lines.append(f"  {why['marker']:<7} {m.word:<16} {' '.join(m.phones):<20} "
                         + ("; ".join(detail) or m.reason))
        lines += _more(len(lex.markers), limit)
    lines.append("")
    lines.append(f"{'fst':<22} {'states':>9} {'arcs':>10} {'nondet':>8} {'eps ratio':>9} "
                 f"{'max out':>8}")
    for f in report.fsts:
        lines.append(f"{f.name:<22} {f.states:>9} {f.arcs:>10} "
                     f"{f.nondeterministic_states:>8} {f.epsilon_ratio:>9.3f} "
                     f"{f.max_out_degree:>8}")
    for f in report.fsts:
        hist = "  ".join(f"{k}:{c}" for k, c in _buckets(f.out_degree_histogram))
        lines.append(f"{f.name}: out-degree (arcs:states) {hist}")
        for e in f.examples:
            lines.append(f"  state {e.state}: input '{e.label}' on {e.arcs} arcs "
                         f"(outputs {', '.join(e.outputs)})")
    for note in report.notes:
        lines.append(f"note: {note}")
    return "\n".join(lines)
