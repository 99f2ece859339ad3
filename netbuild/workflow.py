"""The build workflow: check the inputs, compile them, write one output directory.

- `check_inputs(project)`: reads every input with one `Diagnostics`; all problems at once.
- `read_inputs(project, diagnostics)`: the records behind `check_inputs` and `build`.
- `build(project, out_dir, progress=None)`: compiles L, G and the word-level graph and
  writes the output directory atomically; returns a `BuildResult`.
- `load_build(directory)`: reads an output directory back as a `LoadedBuild`.
- `read_fst_file(path)`: one FST file (stored type kept), or a build directory's graph.
- `atomic_directory(out_dir)`: the context manager behind the atomic write.
- `check_out_dir(out_dir)`: refuses an output path that is not a build or empty directory.
- `plain_json(value)`: dataclasses, numpy scalars and infinities as plain JSON data.

Output directory (every name relative to it)::

    graph.fst       the word-level graph (OpenFst binary, vector or const per options)
    grammar.fst     G (vector)
    lexicon.fst     L (vector)
    word.syms       the word table, OpenFst text symbol table (G's and L's outputs)
    input.syms      the phone table with the auxiliary markers (L's and the graph's inputs)
    manifest.json   what was built, from what, and how (below)

With a context map (``[inputs] context``) the graph is the full graph H∘C∘L∘G::

    graph.fst       the full graph: emission classes in (``e<c>`` = c + 1), words out
    input.syms      the emission-class table
    wordgraph.fst   the word-level graph (vector), kept as an intermediate
    phone.syms      the phone table with the auxiliary markers (L's and wordgraph's inputs)

and the manifest gains ``"phone_symbols"``, ``"inputs"["context"]``, the extra stages
(see `netbuild.full_pipeline`) and ``"hmm"``: ``{"transition_scale",
"final_optimize", "models", "kinds", "emission_classes", "windows"}``.

``manifest.json`` is a JSON object:

- ``"format"``: the string ``"netbuild-build"`` (what `load_build` recognises);
- ``"version"``: the netbuild version that wrote it;
- ``"graph"``, ``"word_symbols"``, ``"input_symbols"``: the file names above;
- ``"intermediates"``: ``{"grammar": ..., "lexicon": ..., "wordgraph": ...}`` file names;
- ``"stages"``: a list of ``{"name", "states", "arcs", "seconds", "peak_rss_bytes",
  "details", "bytes"}``, in the order the stages ran (``peak_rss_bytes`` is the
  stage's peak resident memory, the larger of the process's and, for guarded stages,
  the determinization child's; ``"bytes"`` is ``{"const", "vector"}`` ->
  ``{"disk_bytes", "memory_bytes"}`` of the stage's FST, see
  `netbuild.inspectors.size`);
- ``"inputs"``: ``{"lexicon", "lm", "phones"}`` -> ``{"path", "sha256"}`` (phones is
  null when the project names no inventory);
- ``"auxiliary_markers"``: the auxiliary symbols of the input table, in table order;
- ``"markers"``: ``{"count": K, "words": [...]}``, the number of distinct
  disambiguation markers and the words that carry one (sorted);
- ``"vocabulary"``: ``{"dropped": [...], "mapped_to_unk": [...],
  "removed_unigram_mass": float}`` from restricting the model to the lexicon;
- ``"options"``: the `BuildOptions` as a nested object.

Atomicity: everything is written into a fresh temporary directory beside `out_dir` (same
filesystem). Only when it is complete is an existing `out_dir` renamed aside, the new
directory renamed into place, and the old one deleted. On any exception (including
KeyboardInterrupt, and SIGTERM, which `build` turns into KeyboardInterrupt while it
runs) the temporary directory is removed and the previous `out_dir` is untouched.
"""

from __future__ import annotations

import contextlib
import dataclasses
import hashlib
import json
import math
import os
import shutil
import signal
import struct
import tempfile
import threading
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import pynini
import pywrapfst

from . import __version__
from .builders.grammar import build_grammar
from .builders.lexicon import build_lexicon
from .builders.vocabulary import restrict_vocabulary
from .errors import Diagnostics, InputError, Problem, ProjectError
from .io.arpa import ArpaModel, read_arpa
from .io.fstfile import write_fst
from .io.lexicon import Lexicon, read_lexicon
from .io.phones import PhoneInventory, inventory_from_lexicon, read_phones
from .io.context_map import ContextMap, read_context_map
from .builders.contexts import Coverage, check_coverage
from .builders.context import window_models
from .full_pipeline import FullGraph, build_full_graph, optimizes_at_model_level
from .pipeline import StageRecord, WordGraph, build_word_graph
from .guard import FstHandoff
from .memory import release_free_memory
from .lextree import tree_inputs
from .predict import MemoryGuard, full_stage_order, stage_order
from .project import Project, require_inputs
from .symbols import SENTENCE_END, SENTENCE_START, UNKNOWN, is_auxiliary

MANIFEST = "manifest.json"
MANIFEST_FORMAT = "netbuild-build"
GRAPH_FILE = "graph.fst"
GRAMMAR_FILE = "grammar.fst"
LEXICON_FILE = "lexicon.fst"
WORD_SYMBOLS_FILE = "word.syms"
INPUT_SYMBOLS_FILE = "input.syms"
WORDGRAPH_FILE = "wordgraph.fst"  # full builds: the word-level graph kept beside graph.fst
PHONE_SYMBOLS_FILE = "phone.syms"  # full builds: the phone table of L and the word graph
_OOV_EXAMPLES = 8  # model words listed by name in the missing-pronunciation report

Progress = Callable[[StageRecord], None]


@dataclasses.dataclass
class Inputs:
    """The records read from a project's inputs."""

    inventory: PhoneInventory
    lexicon: Lexicon
    model: ArpaModel
    cmap: ContextMap | None = None  # the context map, when the project names one
    coverage: Coverage | None = None  # its contexts and their models


@dataclasses.dataclass
class BuildResult:
    """What `build` wrote: the directory, its manifest, the stage records, the warnings
    found while reading the inputs, and the FSTs (`graph.intermediates` holds G and L)."""

    out_dir: Path
    manifest: dict[str, Any]
    stages: list[StageRecord]
    warnings: list[Problem]
    graph: WordGraph
    full: FullGraph | None = None  # the full graph, when a context map was given


@dataclasses.dataclass
class LoadedBuild:
    """An output directory read back: the manifest, the FSTs and the symbol tables."""

    path: Path
    manifest: dict[str, Any]
    graph: pynini.Fst
    grammar: pynini.Fst
    lexicon: pynini.Fst
    word_symbols: pynini.SymbolTable
    input_symbols: pynini.SymbolTable


# --- reading and checking ---------------------------------------------------------

def _absorb(diag: Diagnostics, err: InputError) -> None:
    """Adds the problems of `err` that the reader did not already record."""
    known = set(diag.problems)
    for p in err.problems:
        if p not in known:
            diag.problems.append(p)


def missing_pronunciations(model: ArpaModel, lexicon: Lexicon) -> list[str]:
    """Returns the model's words (vocabulary order) that have no lexicon entry.

    The sentence markers are not words and are never reported.
    """
    known = set(lexicon.words())
    return [w for w in model.vocab
            if w not in (SENTENCE_START, SENTENCE_END) and w not in known]


def _report_oov(diag: Diagnostics, project: Project, model: ArpaModel,
                lexicon: Lexicon) -> None:
    missing = missing_pronunciations(model, lexicon)
    if not missing:
        return
    policy = project.options.grammar.oov_policy
    shown = ", ".join(f"'{w}'" for w in missing[:_OOV_EXAMPLES])
    more = f" and {len(missing) - _OOV_EXAMPLES} more" if len(missing) > _OOV_EXAMPLES else ""
    what = (f"{len(missing)} word(s) of the language model have no pronunciation in "
            f"{lexicon.path}: {shown}{more}")
    if policy == "fail":
        diag.error(str(project.lm), None, what,
                   "add their pronunciations to the lexicon, or set [grammar] oov_policy "
                   "to \"drop\" or \"unk\"")
    elif policy == "unk" and UNKNOWN not in lexicon.words():
        diag.error(str(project.lm), None,
                   what + f"; policy \"unk\" maps them to {UNKNOWN}, but the lexicon has "
                   f"no {UNKNOWN} pronunciation",
                   f"add a pronunciation for {UNKNOWN} (e.g. a noise phone), or set "
                   "[grammar] oov_policy to \"drop\"")
    elif policy == "unk":
        diag.warning(str(project.lm), None, what + "; they are mapped to <unk>",
                     "add their pronunciations to keep them as words")
    else:
        diag.warning(str(project.lm), None, what + "; they are dropped from the graph",
                     "add their pronunciations to keep them")


def read_inputs(project: Project, diagnostics: Diagnostics) -> Inputs | None:
    """Reads the inventory, the lexicon and the model, recording every problem.

    Lexicon phones are checked against the inventory (when there is one), and the
    model's words without a pronunciation are reported per the OOV policy.

    Returns:
      The records, or None when an input could not be read at all (the reasons are in
      `diagnostics`). Records are returned even when errors were recorded.
    """
    require_inputs(project)
    diag = diagnostics
    inventory = lexicon = model = None
    if project.phones is not None:
        try:
            inventory = read_phones(project.phones, diag)
        except InputError as err:
            _absorb(diag, err)
    try:
        # With a broken inventory the phones are not checked, so the lexicon's own
        # problems are still found (the inventory's are reported above).
        lexicon = read_lexicon(project.lexicon, inventory, project.options.lexicon, diag)
    except InputError as err:
        _absorb(diag, err)
    try:
        model = read_arpa(project.lm, diag)
    except InputError as err:
        _absorb(diag, err)
    if lexicon is not None and inventory is None and project.phones is None:
        try:
            inventory = inventory_from_lexicon(lexicon, diag)
        except InputError as err:
            _absorb(diag, err)
    if lexicon is not None and model is not None:
        _report_oov(diag, project, model, lexicon)
    cmap = coverage = None
    if project.context is not None and inventory is not None:
        try:
            cmap = read_context_map(project.context, inventory, diag)
        except InputError as err:
            _absorb(diag, err)
        if cmap is not None and lexicon is not None and not diag.has_errors(lexicon.path):
            try:
                coverage = check_coverage(lexicon, inventory, cmap, project.options.lexicon,
                                          diag)
            except InputError as err:
                _absorb(diag, err)
    if inventory is None or lexicon is None or model is None:
        return None
    if project.context is not None and (cmap is None or coverage is None):
        return None
    return Inputs(inventory, lexicon, model, cmap, coverage)


def context_windows(inputs: Inputs) -> dict[tuple[str, ...], str]:
    """Returns every raw phone window that can occur mapped to its model (for C)."""
    cov, cmap = inputs.coverage, inputs.cmap
    assert cov is not None and cmap is not None
    cs = cov.contexts
    tying = {cs.key(i): cmap.rules[k].model for i, k in enumerate(cov.winner.tolist())
             if k >= 0}
    windows = cs.windows
    return window_models((windows.window(i) for i in range(len(windows))), tying, cmap)


def check_inputs(project: Project) -> Diagnostics:
    """Reads every input of `project` and returns all problems found, of all inputs.

    Never raises for problems in the inputs: they are in the returned `Diagnostics`
    (errors and warnings, in the order found).

    Raises:
      ProjectError: the project names no lexicon or no language model.
    """
    diag = Diagnostics()
    read_inputs(project, diag)
    return diag


# --- the atomic output directory --------------------------------------------------------

def _is_build(directory: Path) -> bool:
    try:
        data = json.loads((directory / MANIFEST).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return False
    return isinstance(data, dict) and data.get("format") == MANIFEST_FORMAT


def _publish_modes(directory: Path) -> None:
    """Gives the directory and its files the modes a plain mkdir/open would have.

    mkdtemp and mkstemp create private (0700/0600) entries; the output is not private.
    """
    umask = os.umask(0)
    os.umask(umask)
    os.chmod(directory, 0o777 & ~umask)
    for entry in directory.iterdir():
        if entry.is_file():
            os.chmod(entry, 0o666 & ~umask)


def check_out_dir(out_dir: str | os.PathLike) -> Path:
    """Returns `out_dir` as an absolute path if a build may replace it.

    Raises:
      ProjectError: it exists and is neither an empty directory nor a netbuild build.
    """
    out = Path(out_dir).absolute()
    if out.exists() and not (out.is_dir() and (_is_build(out) or not any(out.iterdir()))):
        raise ProjectError(f"output {out} exists and is not a netbuild build directory",
                           "choose another --out, or remove it first", path=str(out))
    return out


@contextlib.contextmanager
def atomic_directory(out_dir: str | os.PathLike) -> Iterator[Path]:
    """Yields a fresh temporary directory that replaces `out_dir` when the block ends.

    The temporary directory sits beside `out_dir`, so the final renames stay on one
    filesystem. On normal exit an existing `out_dir` is renamed aside, the new one
    renamed in, and the old one deleted; if the second rename fails the old one is
    put back. On any exception (KeyboardInterrupt included) the temporary directory
    is deleted and `out_dir` is left as it was.

    Raises:
      ProjectError: `out_dir` exists and is neither an empty directory nor a
        netbuild build (so it is never replaced by mistake), or cannot be written.
    """
    out = check_out_dir(out_dir)
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
        tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.tmp-", dir=out.parent))
    except OSError as err:
        raise ProjectError(f"cannot create the output directory ({err.strerror})",
                           "choose a writable --out", path=str(out)) from err
    try:
        yield tmp
        _publish_modes(tmp)
        if not out.exists():
            os.rename(tmp, out)
            return
        # The old directory is deleted only once the new one is in place; between the
        # two renames `out` is briefly absent, and put back if the second one fails.
        old = Path(tempfile.mkdtemp(prefix=f".{out.name}.old-", dir=out.parent))
        try:
            os.rename(out, old / "previous")
            try:
                os.rename(tmp, out)
            except BaseException:
                os.rename(old / "previous", out)
                raise
        finally:
            shutil.rmtree(old, ignore_errors=True)
    finally:
        if tmp.exists():
            shutil.rmtree(tmp, ignore_errors=True)


@contextlib.contextmanager
def _sigterm_raises() -> Iterator[None]:
    """Turns SIGTERM into KeyboardInterrupt while the block runs (main thread only)."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return

    def handler(signum, frame):  # noqa: ARG001
        raise KeyboardInterrupt("terminated")

    previous = signal.signal(signal.SIGTERM, handler)
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, previous)


# --- building ---------------------------------------------------------------------------

def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def _input_record(path: Path | None) -> dict[str, str] | None:
    return None if path is None else {"path": str(path), "sha256": _sha256(path)}


def plain_json(value: Any) -> Any:
    """Returns `value` as plain JSON data: dataclasses and mappings become objects,
    sequences lists, numpy scalars Python numbers, infinities and NaN null, and any
    other object its `str`."""
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        value = dataclasses.asdict(value)
    if isinstance(value, dict):
        return {str(k): plain_json(v) for k, v in value.items()}
    if isinstance(value, (list, tuple, set, frozenset)):
        return [plain_json(v) for v in value]
    if hasattr(value, "item") and callable(value.item) and not isinstance(value, str):
        value = value.item()  # numpy scalar
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if value is None or isinstance(value, (bool, int, str)):
        return value
    return str(value)


def _stage_json(record: StageRecord) -> dict[str, Any]:
    entry = {"name": record.name, "states": int(record.states), "arcs": int(record.arcs),
             "seconds": float(record.seconds), "peak_rss_bytes": int(record.peak_rss_bytes),
             "details": plain_json(getattr(record, "details", None) or {})}
    # The size was taken when the stage finished (the FST itself is not kept for it).
    report = record.size
    if report is not None:
        entry["bytes"] = {"const": dataclasses.asdict(report.const),
                          "vector": dataclasses.asdict(report.vector)}
    return entry


def _write_symbols(table: pynini.SymbolTable, path: Path) -> None:
    table.write_text(str(path))


def _manifest(project: Project, opts, stages: list[StageRecord],
              input_symbols: pynini.SymbolTable, lexicon, vocabulary, inputs: Inputs,
              full) -> dict[str, Any]:
    """The manifest of a build (module docstring)."""
    manifest: dict[str, Any] = {
        "format": MANIFEST_FORMAT,
        "version": __version__,
        "graph": GRAPH_FILE,
        "word_symbols": WORD_SYMBOLS_FILE,
        "input_symbols": INPUT_SYMBOLS_FILE,
        "intermediates": {"grammar": GRAMMAR_FILE, "lexicon": LEXICON_FILE,
                          "wordgraph": GRAPH_FILE},
        "stages": [_stage_json(s) for s in stages],
        "inputs": {"lexicon": _input_record(project.lexicon),
                   "lm": _input_record(project.lm),
                   "phones": _input_record(project.phones)},
        "auxiliary_markers": [input_symbols.find(i)
                              for i in range(input_symbols.available_key())
                              if input_symbols.member(i)
                              and is_auxiliary(input_symbols.find(i))],
        "markers": {"count": int(lexicon.num_markers),
                    "words": sorted({m.word for m in lexicon.markers})},
        "vocabulary": {
            "dropped": list(vocabulary.dropped),
            "mapped_to_unk": list(vocabulary.mapped_to_unk),
            "removed_unigram_mass": float(vocabulary.removed_unigram_mass),
        },
        "options": plain_json(opts),
    }
    if full is not None:
        manifest["input_symbols"] = INPUT_SYMBOLS_FILE
        manifest["phone_symbols"] = PHONE_SYMBOLS_FILE
        manifest["intermediates"]["wordgraph"] = WORDGRAPH_FILE
        manifest["inputs"]["context"] = _input_record(project.context)
        manifest["hmm"] = {
            "transition_scale": opts.transition_scale,
            "final_optimize": opts.final_optimize,
            "models": len(inputs.cmap.models),
            "kinds": full.kind_table.num_kinds,
            "emission_classes": full.kind_table.num_classes,
            "windows": int(full.stages[0].details.get("windows", 0)),
        }
    return manifest


def build(project: Project, out_dir: str | os.PathLike,
          progress: Progress | None = None, keep_intermediates: bool = False) -> BuildResult:
    """Compiles `project` and writes the output directory `out_dir` atomically.

    Reads and checks the inputs (all problems raised together), restricts the model's
    vocabulary to the lexicon per the OOV policy, builds G and L, runs the pipeline to
    the word-level graph, and writes the directory described in the module docstring.

    Args:
      project: inputs and options.
      out_dir: the output directory; replaced only when the new one is complete.
      progress: called with each `StageRecord` as its stage finishes.
      keep_intermediates: keep every stage's FST in the result's
        `graph.intermediates` / `full.intermediates` (for inspection and tests; they
        are never written). Without it only G, L, the word-level graph and the final
        graph stay in memory, which bounds the peak.

    Returns:
      A `BuildResult` with the manifest as written.

    Raises:
      InputError: problems in the inputs (every problem of every input).
      StageError: a stage failed or hit a resource limit; with ``options.max_memory``
        also before a stage whose estimated need exceeds it (`netbuild.predict.MemoryGuard`).
      CheckFailed: a stage check failed (a netbuild bug).
      KeyboardInterrupt: interrupted (or SIGTERM); the previous `out_dir` is untouched.
    """
    check_out_dir(out_dir)  # fail before the work, not after it
    with _sigterm_raises():
        diag = Diagnostics()
        inputs = read_inputs(project, diag)
        diag.raise_if_errors()
        assert inputs is not None  # no errors means every input was read
        opts = project.options
        guard = None
        if opts.max_memory:
            # The determinization child may never have more than the whole build.
            opts = dataclasses.replace(opts, determinize_max_memory=min(
                opts.determinize_max_memory, opts.max_memory))
        model, vocabulary = restrict_vocabulary(inputs.model, set(inputs.lexicon.words()),
                                                opts.grammar.oov_policy)
        started = time.perf_counter()
        grammar = build_grammar(model)
        built = {"grammar": time.perf_counter() - started}
        # The model is in G now (20k / 1M: 60 MB of n-gram arrays freed)
        model = None
        inputs = dataclasses.replace(inputs, model=None)
        started = time.perf_counter()
        lexicon = build_lexicon(inputs.lexicon, inputs.inventory, grammar.word_symbols,
                                opts.lexicon)
        built["lexicon"] = time.perf_counter() - started
        if opts.max_memory:
            tree = opts.word_graph == "tree" and \
                tree_inputs(lexicon, grammar)[0] is not None
            order = stage_order(opts, tree)
            if inputs.cmap is not None:
                order += full_stage_order(opts, optimizes_at_model_level(
                    inputs.cmap, lexicon.phone_symbols, opts))
            guard = MemoryGuard(opts.max_memory, order)

        def on_stage(record: StageRecord) -> None:
            # The pipeline times only the checks of its input FSTs; add their build.
            if record.name in built:
                seconds = built.pop(record.name)
                record.details["build_seconds"] = seconds
                record.seconds += seconds
            if progress is not None:
                progress(record)
            if guard is not None:
                guard(record)

        def on_full_stage(record: StageRecord) -> None:
            if progress is not None:
                progress(record)
            if guard is not None:
                guard(record)

        graph = build_word_graph(lexicon, grammar, opts, on_stage, keep_intermediates)
        input_symbols = lexicon.phone_symbols
        with atomic_directory(out_dir) as tmp:
            full = None
            if inputs.cmap is not None:
                # The word-level files are written first, so that G, L and the word
                # graph need not stay in memory while the full graph is built (20k /
                # 1M: 250 MB of the peak); the word graph is handed over and freed
                # once C∘LG is built. `graph.fst` reads the file back if asked for.
                write_fst(graph.fst, tmp / WORDGRAPH_FILE, "vector")
                write_fst(grammar.fst, tmp / GRAMMAR_FILE, "vector")
                write_fst(lexicon.fst, tmp / LEXICON_FILE, "vector")
                word_fst = None
                if not keep_intermediates:
                    word_fst = FstHandoff(graph.spill(tmp / WORDGRAPH_FILE))
                    grammar = dataclasses.replace(grammar, fst=None)
                    lexicon = dataclasses.replace(lexicon, fst=None)
                    release_free_memory()
                full = build_full_graph(graph, lexicon, inputs.cmap,
                                        context_windows(inputs), opts, on_full_stage,
                                        keep_intermediates, word_fst=word_fst)
                del word_fst
            stages = list(graph.stages) + (list(full.stages) if full is not None else [])
            manifest = _manifest(project, opts, stages, input_symbols, lexicon, vocabulary,
                                 inputs, full)
            if full is not None:
                write_fst(full.graph, tmp / GRAPH_FILE, opts.fst_type)
                _write_symbols(full.input_symbols, tmp / INPUT_SYMBOLS_FILE)
                _write_symbols(input_symbols, tmp / PHONE_SYMBOLS_FILE)
            else:
                write_fst(graph.fst, tmp / GRAPH_FILE, opts.fst_type)
                write_fst(grammar.fst, tmp / GRAMMAR_FILE, "vector")
                write_fst(lexicon.fst, tmp / LEXICON_FILE, "vector")
                _write_symbols(input_symbols, tmp / INPUT_SYMBOLS_FILE)
            _write_symbols(grammar.word_symbols, tmp / WORD_SYMBOLS_FILE)
            (tmp / MANIFEST).write_text(json.dumps(manifest, indent=2) + "\n",
                                        encoding="utf-8")
        if full is not None:
            graph.moved(Path(out_dir) / WORDGRAPH_FILE)
        return BuildResult(Path(out_dir), manifest, stages, diag.warnings, graph, full)


# --- loading ---------------------------------------------------------------------------

_FST_MAGIC = struct.pack("<i", 2125659606)  # OpenFst binary header magic (fst/fst.h)


def _is_fst_file(path: Path) -> bool:
    """True when `path` starts with OpenFst's magic number (checked before OpenFst reads
    it, so a wrong file gives our message rather than OpenFst's log lines)."""
    try:
        with open(path, "rb") as f:
            return f.read(4) == _FST_MAGIC
    except OSError:
        return False


def read_fst_file(path: str | os.PathLike) -> pywrapfst.Fst:
    """Reads an FST file keeping its stored type (vector or const), or a build's graph.

    Args:
      path: an OpenFst binary file, or a directory written by `build` (its graph is
        read, with the build's symbol tables attached).

    Raises:
      InputError: the file is not an OpenFst binary FST, or the directory not a build.
    """
    p = Path(path)
    if p.is_dir():
        manifest = _read_manifest(p)
        graph = p / str(manifest.get("graph"))
        fst = read_fst_file(graph)
        for key, setter in (("input_symbols", fst.set_input_symbols),
                            ("word_symbols", fst.set_output_symbols)):
            table = p / str(manifest.get(key))
            if table.is_file():
                setter(pynini.SymbolTable.read_text(str(table)))
        return fst
    if not p.is_file():
        raise InputError("FST file is missing", "check the path", path=str(p))
    if not _is_fst_file(p):
        raise InputError("not an OpenFst binary FST file",
                         "give a file written by 'netbuild build' or by OpenFst", path=str(p))
    try:
        return pywrapfst.Fst.read(str(p))
    except (pywrapfst.FstError, OSError) as err:
        raise InputError(f"cannot read the FST ({err})",
                         "give a file written by 'netbuild build' or by OpenFst",
                         path=str(p)) from err


def _read_manifest(d: Path) -> dict[str, Any]:
    where = str(d)
    if not d.is_dir():
        raise InputError("not a directory", "give the directory written by 'netbuild build'",
                         path=where)
    manifest_path = d / MANIFEST
    try:
        manifest = json.loads(manifest_path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise InputError(f"not a netbuild build directory (no {MANIFEST})",
                         "give the directory written by 'netbuild build --out'",
                         path=where) from None
    except (OSError, ValueError) as err:
        raise InputError(f"{MANIFEST} is unreadable ({err})",
                         "rebuild the directory with 'netbuild build'",
                         path=str(manifest_path)) from err
    if not isinstance(manifest, dict) or manifest.get("format") != MANIFEST_FORMAT:
        raise InputError(f"{MANIFEST} is not a netbuild build manifest",
                         "rebuild the directory with 'netbuild build'", path=str(manifest_path))
    return manifest

def load_build(directory: str | os.PathLike) -> LoadedBuild:
    """Reads an output directory written by `build`.

    Returns:
      The manifest, the graph, G, L (as `pynini.Fst`, so mutable vector copies) and
      the two symbol tables, attached to the FSTs (graph: input/word; G: word/word;
      L: input/word).

    Raises:
      InputError: the directory is not a build, or a file it names is missing or broken.
    """
    d = Path(directory)
    manifest = _read_manifest(d)
    manifest_path = d / MANIFEST

    def named(key: str, sub: str | None = None) -> Path:
        value = manifest.get(key) if sub is None else (manifest.get(key) or {}).get(sub)
        if not isinstance(value, str):
            raise InputError(f"{MANIFEST} has no '{sub or key}' entry",
                             "rebuild the directory with 'netbuild build'",
                             path=str(manifest_path))
        return d / value

    def read_fst(path: Path) -> pynini.Fst:
        if not _is_fst_file(path):
            raise InputError("cannot read the FST (not an OpenFst binary file)",
                             "rebuild the directory with 'netbuild build'", path=str(path))
        try:
            return pynini.Fst.read(str(path))
        except (pywrapfst.FstError, OSError) as err:
            raise InputError(f"cannot read the FST ({err})",
                             "rebuild the directory with 'netbuild build'",
                             path=str(path)) from err

    def read_table(path: Path) -> pynini.SymbolTable:
        if not path.is_file():
            raise InputError("symbol table is missing",
                             "rebuild the directory with 'netbuild build'", path=str(path))
        try:
            return pynini.SymbolTable.read_text(str(path))
        except (pywrapfst.FstError, OSError, RuntimeError) as err:
            raise InputError(f"cannot read the symbol table ({err})",
                             "rebuild the directory with 'netbuild build'",
                             path=str(path)) from err

    for key, sub in (("graph", None), ("intermediates", "grammar"),
                     ("intermediates", "lexicon")):
        p = named(key, sub)
        if not p.is_file():
            raise InputError("FST file is missing", "rebuild the directory with "
                             "'netbuild build'", path=str(p))
    words = read_table(named("word_symbols"))
    phones = read_table(named("input_symbols"))
    lexicon_inputs = read_table(named("phone_symbols")) if "phone_symbols" in manifest \
        else phones
    graph = read_fst(named("graph"))
    grammar = read_fst(named("intermediates", "grammar"))
    lexicon = read_fst(named("intermediates", "lexicon"))
    graph.set_input_symbols(phones)
    graph.set_output_symbols(words)
    grammar.set_input_symbols(words)
    grammar.set_output_symbols(words)
    lexicon.set_input_symbols(lexicon_inputs)
    lexicon.set_output_symbols(words)
    return LoadedBuild(d, manifest, graph, grammar, lexicon, words, phones)


__all__ = ["BuildResult", "Inputs", "LoadedBuild", "atomic_directory", "build", "check_out_dir",
           "check_inputs", "load_build", "missing_pronunciations", "plain_json",
           "read_fst_file", "read_inputs"]
