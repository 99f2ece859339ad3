"""The full decoding graph: H∘C∘(L∘G) over emission classes, with HMM self-loops.

- `FullGraph`: the graph, its stage records, kept FSTs and label tables.
- `full_pipeline(cfst, hfst, kind_table, opts)`: the `Pipeline` from the word graph on.
- `build_full_graph(word_graph, lexicon, cmap, contexts, opts, progress=None,
  keep_intermediates=False)`: the run.
- `remove_markers_stage(ifst, marker_ids)`: auxiliary markers replaced by epsilon.
- `minimize_unmarked_stage(ifst)`: encoded minimization that tolerates epsilon arcs.
- `compose_context_stage(cfst, lg, details, classes=None)`: C∘LG, directly or by OpenFst.
- `model_level_plan(hfst, opts)`, `optimizes_at_model_level(cmap, phones, opts)`: whether
  (and with which chains) the full graph is optimized at the model level.

Model level (the default: ``final_optimize`` on, H of `build_hmm`'s shape and the
models' kind chains a prefix code, `model_level_plan`). Stages:

1. ``context``, ``hmm`` (input records), then ``compose-context``: C∘LG, built directly
   (`compose_context_stage`: `netbuild.builders.context_compose`, else OpenFst); models
   with equal chains become one label.
2. ``determinize-models``: guarded determinization of C∘LG over models.
3. ``remove-markers``: markers made epsilon, on the arrays.
4. ``minimize-models``: the output labels pushed toward the start (arcs that then
   write two words carry a pair label, `_labels_pushed`), the weights pushed
   toward the start (tropical; both `netbuild.reweight`), then encoded
   minimization by partition refinement with weights compared to within
   ``opts.weight_quantum`` (`netbuild.refine`).
5. ``expand-hmm``: each state's model arcs expanded into the trie of their kind chains,
   pair labels written as their two words, equal trie nodes merged
   (`netbuild.builders.hmm_expand.trie_arrays`); this is what
   determinizing and minimizing H∘CLG over kinds gives (the argument is in that
   module), on a graph a third of the size. 20k / 1M: the three OpenFst stages over
   kinds took 96 + 14 + 85 s, these four 34 + 2 + 8 + 14 s (docs/performance.md).
6. ``self-loops``, as below.

Kind level (otherwise), stages each followed by its checks (unless ``opts.checks`` is
False):

1. ``context`` and ``hmm`` (input records): C and H are built and checked.
2. ``compose-context``: C∘LG, where LG is the word-level graph as the word pipeline
   left it (determinized, minimized and, with ``push_weights``, log-pushed; its
   markers are still on its input side). Measured on the ropeway demo (triphones,
   2 cores): from the pushed LG the final graph has 69 797 states / 170 804 arcs in
   3.6 s (max stochastic deviation 7.04), from the unpushed one 69 697 / 170 496 in
   3.1 s (6.94). The difference is small either way; the pushed LG is used so the
   graph a decoder reads carries the word-level push.
3. ``compose-hmm``: H∘CLG, built directly by substituting each model arc of CLG with
   its chain of arc kinds (`netbuild.builders.hmm_expand`: `expand_arrays` on CLG's
   arrays, CLG dropped, then `expanded_fst`; the same machine as OpenFst's composition
   up to state numbering); OpenFst's composition when H is not of `build_hmm`'s shape
   or CLG has an input label H does not read (``details["method"]``: "expansion" or
   "composition"). compose-hmm at 20k / 1M: 53.3 s → 7.8 s (plus 8.1 s of checks, which
   now pay for the connectivity DFS), stage peak 3,316 → 1,929 MiB (docs/performance.md).
4. ``determinize-hmm``: guarded transducer determinization (`netbuild.guard`); with the
   delay of C and the markers still present the input is functional and
   determinizable.
5. ``remove-markers``: every auxiliary marker on the input side becomes epsilon.
6. ``minimize-hmm``: labels and weights encoded, the acceptor minimized, decoded.
7. ``self-loops``: `netbuild.builders.hmm.add_self_loops`, then the kinds are emission
   classes + 1.

With ``final_optimize`` False steps 4 and 6 are skipped: the graph is bigger but
tropical-equivalent (demo: 96 627 states / 238 879 arcs in 1.7 s, against
69 797 / 170 804 in 3.6 s optimized over kinds and 69 899 / 170 949 in 3.4 s at the
model level). Every stage records ``stochastic_deviation`` (max over states of
|ln(outgoing probability + final)|, log semiring) in its details.

Memory: every stage gets its input handed over (`netbuild.guard.FstHandoff`) and drops it
when it returns, before its output is measured and checked; the determinization drops it
once the child has its copy, minimize-hmm once its encoded copy is made, and self-loops
once its arrays are read (its result's arrays are then its checks' shared conversion).
Unless `keep_intermediates` is asked for, at most a stage's input and output (with their
array conversions) are alive at a time, besides C and H. At the model level every stage's
result from compose-context on is an `netbuild.io.fstfile.ArrayFst` (its arrays only:
about 24 bytes per state and 20 per arc, against about 100 and 16 as a vector FST), the
determinization child reads and writes files made from and read into arrays, and the
final graph is written from its arrays; no vector FST of the graph is built in this
process. Handed the word-level graph (``word_fst``), the run frees it once C∘LG is
built. 20k / 1M: build peak 1,937 → 1,290 MiB, 1,324 MiB with the child's
(docs/performance.md).
"""

from __future__ import annotations

import dataclasses
import time
from collections.abc import Callable, Mapping
from typing import TYPE_CHECKING

import numpy as np
import pynini
import pywrapfst

from . import checks as chk
from .builders.context import build_context
from .builders.hmm import (KindTable, add_self_loops, build_hmm, emission_symbols,
                           make_model_symbols, self_loop_arrays)
from .builders.context_compose import compose_context_arrays
from .builders.hmm_expand import (ModelChains, code_classes, expand_arrays, expanded_fst,
                                  model_chains, pair_labels, trie_arrays)
from .errors import EmptyCompositionError, StageError
from .guard import FstHandoff
from .io.context_map import ContextMap
from .io.fstfile import (ArrayFst, FstArrays, arrays_to_fst, as_fst, forget_shared,
                         fst_to_arrays, share_arrays)
from .memory import release_free_memory
from .options import BuildOptions
from .pipeline import (Pipeline, StageRecord, Step, WordGraph, _input_record,
                       determinize_stage)
from .refine import minimize_arrays
from .reweight import distances_to_final, push_arrays, push_output_labels

if TYPE_CHECKING:
    from .builders.lexicon import LexiconResult

__all__ = ["FullGraph", "build_full_graph", "full_pipeline", "minimize_unmarked_stage",
           "compose_context_stage", "model_level_plan", "optimizes_at_model_level",
           "remove_markers_stage"]

MODEL_LEVEL_STAGES = ("determinize-models", "remove-markers", "minimize-models")


@dataclasses.dataclass
class FullGraph:
    """The full graph and what went into it.

    `graph` is the final graph as the pipeline left it: at the model level an
    `ArrayFst`, which `netbuild.io.fstfile.write_fst` writes straight from its arrays;
    `fst` is it as a `pynini.Fst`, built on first use (20k / 1M: about 0.7 GB and 3 s,
    which a build that only writes the graph never pays). `intermediates` holds
    "context" (C) and "hmm" (H); built with `keep_intermediates` also "graph" (`fst`)
    and every stage's result as a `pynini.Fst` (model level: "clg", "determinized_models", "unmarked",
    "minimized_models", "expanded"; kind level: "clg", "hclg_raw",
    "determinized_full", "unmarked", "minimized_full").
    """

    graph: pynini.Fst | ArrayFst
    stages: list[StageRecord]
    intermediates: dict[str, pynini.Fst]
    kind_table: KindTable
    model_symbols: pynini.SymbolTable
    input_symbols: pynini.SymbolTable  # the emission-class table of the final graph
    _fst: pynini.Fst | None = dataclasses.field(default=None, repr=False)

    @property
    def fst(self) -> pynini.Fst:
        if self._fst is None:
            self._fst = as_fst(self.graph)
        return self._fst


def _compose(left: pynini.Fst, right: pynini.Fst, stage: str, what: str) -> pynini.Fst:
    """Constructively composes, sorting `left` on output labels; trimmed result."""
    try:
        ofst = pynini.compose(pynini.arcsort(left, sort_type="olabel"), right,
                              connect=True)
    except pywrapfst.FstError as err:
        raise StageError(stage, f"OpenFst could not compose {what} ({err})",
                         "this is a netbuild bug: the symbol tables do not match") from err
    if ofst.start() == pynini.NO_STATE_ID or ofst.num_states() == 0:
        raise _no_path(stage, what)
    ofst.arcsort(sort_type="ilabel")
    return ofst


def _no_path(stage: str, what: str) -> EmptyCompositionError:
    return EmptyCompositionError(
        stage, f"{what} has no path: the context map's C accepts none of the phone "
        "sequences of the word-level graph",
        "check that the context map's phones are the lexicon's phones")


def compose_context_stage(cfst: pynini.Fst, lg: pynini.Fst, details: dict,
                          classes: np.ndarray | None = None, as_arrays: bool = False
                          ) -> pynini.Fst | ArrayFst:
    """Constructively builds C∘LG, trimmed and sorted by input label: directly
    (`netbuild.builders.context_compose`, ``details["method"] = "product"``) or, when
    the inputs do not fit that construction, with OpenFst ("composition"). With
    `classes`, each input label ``m`` becomes ``classes[m]``. With `as_arrays` the
    direct construction's result is an `ArrayFst`.

    Raises:
      EmptyCompositionError: C accepts none of LG's phone sequences.
    """
    out = compose_context_arrays(fst_to_arrays(cfst), fst_to_arrays(lg))
    if out is None:
        details["method"] = "composition"
        clg = _compose(cfst, lg, "compose-context", "C∘LG")
        if classes is not None:
            clg.relabel_pairs(ipairs=[(m, int(c)) for m, c in enumerate(classes.tolist())
                                      if c != m])
            clg.arcsort(sort_type="ilabel")
        return clg
    details["method"] = "product"
    if out.start < 0:
        raise _no_path("compose-context", "C∘LG")
    if classes is not None:
        ilabel = out.ilabel.copy()
        inside = ilabel < classes.shape[0]  # (labels past H's table are markers)
        ilabel[inside] = classes[ilabel[inside]]
        order = np.argsort(out.src.astype(np.int64) << 32 | ilabel, kind="stable")
        out = dataclasses.replace(out, src=out.src[order], ilabel=ilabel[order],
                                  olabel=out.olabel[order], weight=out.weight[order],
                                  dst=out.dst[order])
    return ArrayFst(out) if as_arrays else _fst_of(out)


def remove_markers_stage(ifst: pynini.Fst, marker_ids: list[int]) -> pynini.Fst:
    """Constructively relabels the auxiliary markers `marker_ids` on the input side to
    epsilon (OpenFst's relabel, one pass in C++)."""
    ofst = ifst.copy()
    if marker_ids:
        ofst.relabel_pairs(ipairs=[(m, 0) for m in marker_ids])
    return ofst


def minimize_unmarked_stage(ifst: pynini.Fst | FstHandoff) -> pynini.Fst:
    """Constructively minimizes `ifst` as an acceptor of (input, output, weight) codes.

    After the markers became epsilon, a state may have two arcs with the same code, so
    the encoded acceptor may be non-deterministic; OpenFst then merges only states
    with the same future (``allow_nondet``), which keeps the weighted relation. Weights
    stay where they are and output labels never move. Given as an `FstHandoff`, `ifst`
    is dropped (with any shared conversion of it) once its encoded copy is made; the
    copy is minimized and decoded in place, so at most two graphs are alive at a time.
    """
    handed = isinstance(ifst, FstHandoff)
    if handed:
        ifst = ifst.take()
    # (copies: a table obtained from an FST keeps that FST alive)
    isymbols, osymbols = (None if t is None else t.copy()
                          for t in (ifst.input_symbols(), ifst.output_symbols()))
    mapper = pynini.EncodeMapper(ifst.arc_type(), encode_labels=True, encode_weights=True)
    ofst = pynini.encode(ifst, mapper)
    if handed:
        forget_shared(ifst)
        del ifst
        release_free_memory()
    ofst.minimize(allow_nondet=True)
    ofst.decode(mapper)  # in place: the encoded copy is ours
    ofst.set_input_symbols(isymbols)
    ofst.set_output_symbols(osymbols)
    return ofst


def model_level_plan(hfst: pynini.Fst, opts: BuildOptions
                     ) -> tuple[ModelChains, np.ndarray] | None:
    """Returns H's chains and each model's chain class when the full graph is optimized
    at the model level (``final_optimize``, H of `build_hmm`'s shape, chains a prefix
    code: `netbuild.builders.hmm_expand`), else None (determinized over arc kinds)."""
    if not opts.final_optimize:
        return None
    chains = model_chains(hfst)
    if chains is None:
        return None
    classes = code_classes(chains)
    return None if classes is None else (chains, classes)


def optimizes_at_model_level(cmap: ContextMap, phones: pynini.SymbolTable,
                             opts: BuildOptions) -> bool:
    """Whether `build_full_graph` takes the model-level path for this map (H is cheap to
    build: one chain per model)."""
    hfst, _ = build_hmm(cmap, make_model_symbols(cmap, phones))
    return model_level_plan(hfst, opts) is not None


def _fst_of(arrays: FstArrays) -> pynini.Fst:
    """The FST of `arrays`, which become its shared conversion (read by its checks)."""
    ofst = arrays_to_fst(arrays.num_states, arrays.start, arrays.final_weights, arrays.src,
                         arrays.ilabel, arrays.olabel, arrays.weight, arrays.dst,
                         isymbols=arrays.isymbols, osymbols=arrays.osymbols,
                         arc_type=arrays.arc_type)  # type: ignore[arg-type]
    share_arrays(ofst, arrays)
    return ofst


def _connected(arrays: FstArrays) -> ArrayFst:
    """The `ArrayFst` of arrays known to be connected (its checks need not search)."""
    out = ArrayFst(arrays)
    return out.set_properties(_CONNECTED, _CONNECTED)


def _take_arrays(given: FstHandoff) -> FstArrays:
    """The arrays of the handed-over FST, which is then dropped."""
    f = given.take()
    arrays = fst_to_arrays(f)
    forget_shared(f)
    del f
    release_free_memory()
    return arrays


_STRUCTURE = (chk.check_nonempty, chk.check_connected, chk.check_labels)
_CONNECTED = pywrapfst.ACCESSIBLE | pywrapfst.COACCESSIBLE


def _measured(stage: Callable[[pynini.Fst, dict], pynini.Fst], handoff: bool = False
              ) -> Callable[[FstHandoff, dict], pynini.Fst]:
    """The stage, then its output's deviation; the input is handed over (steps are
    `hands_off`) and, unless `handoff` passes it on to the stage, freed with any
    conversion of it as soon as the stage returns."""
    def run(given: FstHandoff, details: dict) -> pynini.Fst:
        if handoff:
            out = stage(given, details)
        else:
            f = given.take()
            out = stage(f, details)
            if f is not out:
                forget_shared(f)
            del f
            release_free_memory()
        details["stochastic_deviation"] = chk.stochasticity_deviation(out)
        return out
    return run


def full_pipeline(cfst: pynini.Fst, hfst: pynini.Fst, kind_table: KindTable,
                  opts: BuildOptions, tables: dict | None = None) -> Pipeline:
    """Returns the pipeline from the word-level graph to the full graph (see module).

    `tables`, when given, receives under ``"minimize-models"`` the output table of that
    stage's graph (the words and the word pairs of `_labels_pushed`) once it has run,
    for its checks.
    """
    plan = model_level_plan(hfst, opts)
    if plan is not None:
        return _model_level_pipeline(cfst, plan, kind_table, opts,
                                     {} if tables is None else tables)

    def compose_context(lg: pynini.Fst, details: dict) -> pynini.Fst:
        return compose_context_stage(cfst, lg, details)

    chains = model_chains(hfst)  # None unless H has build_hmm's shape

    def compose_hmm(given: FstHandoff, details: dict) -> pynini.Fst:
        clg = given.take()
        out, connected = None, False
        if chains is not None and clg.start() != pynini.NO_STATE_ID:
            connected = clg.properties(_CONNECTED, False) == _CONNECTED
            out = expand_arrays(fst_to_arrays(clg), chains)
        if out is None or out.start < 0:
            # (an empty result is reported by the composition's own emptiness test)
            details["method"] = "composition"
            return _compose(hfst, clg, "compose-hmm", "H∘CLG")
        details["method"] = "expansion"
        # Only the arrays are needed now: CLG goes before the result is built.
        forget_shared(clg)
        del clg
        release_free_memory()
        return expanded_fst(out, connected)

    def determinize(f: FstHandoff, details: dict) -> pynini.Fst:
        return determinize_stage(f, opts, details=details)  # drops f once written

    def unmark(f: pynini.Fst, details: dict) -> pynini.Fst:
        details["markers"] = list(kind_table.markers)
        return remove_markers_stage(f, kind_table.marker_ids())

    def minimize(f: FstHandoff, details: dict) -> pynini.Fst:
        details["method"] = "encoded"
        return minimize_unmarked_stage(f)  # drops f once encoded

    def self_loops(f: FstHandoff, details: dict) -> pynini.Fst:
        details["transition_scale"] = opts.transition_scale
        details["kinds"] = kind_table.num_kinds
        # Drops f once its arrays are read; the result comes sorted by input label.
        return add_self_loops(f, kind_table, opts.transition_scale)

    deterministic = _STRUCTURE + (chk.check_input_deterministic,)
    # Every step hands its input over (see `measured`), so it is freed when its stage
    # is done with it unless the pipeline was asked to keep it.
    steps = [Step("compose-context", _measured(compose_context), _STRUCTURE, "clg",
                  hands_off=True),
             Step("compose-hmm", _measured(compose_hmm, handoff=True), _STRUCTURE,
                  "hclg_raw", hands_off=True)]
    if opts.final_optimize:
        steps.append(Step("determinize-hmm", _measured(determinize, handoff=True),
                          deterministic, "determinized_full", hands_off=True))
    steps.append(Step("remove-markers", _measured(unmark),
                      _STRUCTURE + (chk.check_no_auxiliary_markers,), "unmarked",
                      hands_off=True))
    if opts.final_optimize:
        steps.append(Step("minimize-hmm", _measured(minimize, handoff=True),
                          _STRUCTURE + (chk.check_no_auxiliary_markers,), "minimized_full",
                          hands_off=True))
    steps.append(Step("self-loops", _measured(self_loops, handoff=True),
                      _STRUCTURE + (chk.check_no_auxiliary_markers, chk.check_emission_inputs,
                                    chk.check_word_outputs), hands_off=True))
    return Pipeline(steps)


def _labels_pushed(a: FstArrays, details: dict
                   ) -> tuple[FstArrays, tuple[int, np.ndarray] | None]:
    """`a` with its output labels pushed toward the start (`reweight.push_output_labels`),
    the arcs that then write two words carrying pair labels (`hmm_expand.pair_labels`),
    and the pairs (None when there is none).

    Why: a word settled by its marker (a homophone, or a word that is the start of a
    longer one) is written on the marker's arc (demo: 2,001 of 13,602 marker arcs
    after determinize-models); once the markers are epsilon, states that differ only
    in where a word sits become equal when every word that all ways on from a state
    write first moves onto the arcs into it.
    On the 20k / 1M set 11,200 states push a word (22,338 arcs then write two), and
    the final graph has 15,519,867 arcs instead of 15,589,843.
    """
    pushed, second = push_output_labels(a)
    details["arcs_writing_two_words"] = int(np.count_nonzero(second))
    return pair_labels(pushed, second)


def _pushed(a: FstArrays, details: dict) -> FstArrays:
    """`a` with its weights pushed toward the start (tropical), when its distances to
    the final states settle (`reweight.distances_to_final`); else `a` as it is.

    Why before the minimization: determinization leaves each state's weight where its
    subset's residuals put it, so two states with the same future up to where the
    weight sits are not equal as encoded acceptors; after the push every state's
    cheapest way out costs 0 and such states are merged (on the 20k / 1M set the final
    graph has 15,589,843 arcs instead of 15,831,837).
    """
    potentials = distances_to_final(a.num_states, a.src, a.dst, a.weight, a.final_weights)
    details["pushed"] = potentials is not None
    if potentials is None:
        details["push_skipped"] = ("the distances to the final states do not settle "
                                   "(a cycle of negative weight)")
        return a
    return push_arrays(a, potentials)


def _model_level_pipeline(cfst: pynini.Fst, plan: tuple[ModelChains, np.ndarray],
                          kind_table: KindTable, opts: BuildOptions,
                          tables: dict) -> Pipeline:
    """The optimized pipeline at the model level (module docstring, "Model level")."""
    chains, classes = plan
    merged = [(m, int(c)) for m, c in enumerate(classes.tolist()) if c != m]

    def compose_context(lg: pynini.Fst, details: dict) -> pynini.Fst:
        details["merged_models"] = len(merged)
        # (models with one chain become one label: they are indistinguishable)
        return compose_context_stage(cfst, lg, details, classes if merged else None,
                                     as_arrays=True)

    def determinize(f: FstHandoff, details: dict) -> pynini.Fst:
        # drops f once written
        return determinize_stage(f, opts, details=details, as_arrays=True)

    def unmark(given: FstHandoff, details: dict) -> pynini.Fst:
        details["markers"] = list(kind_table.markers)
        arrays = _take_arrays(given)
        table = arrays.isymbols
        marker_ids = np.array([table.find(m) for m in kind_table.markers], dtype=np.int64)
        ilabel = arrays.ilabel.copy()
        ilabel[np.isin(ilabel, marker_ids[marker_ids > 0])] = 0
        return ArrayFst(dataclasses.replace(arrays, ilabel=ilabel))

    words: dict = {}  # the word table and the label pairs, from minimize to expand

    def minimize(given: FstHandoff, details: dict) -> pynini.Fst:
        details["method"] = "refinement"
        details["weight_quantum"] = opts.weight_quantum
        arrays = _take_arrays(given)
        words["table"] = arrays.osymbols
        arrays, words["pairs"] = _labels_pushed(arrays, details)
        tables["minimize-models"] = arrays.osymbols
        return ArrayFst(minimize_arrays(_pushed(arrays, details),
                                        quantum=opts.weight_quantum))

    def expand(given: FstHandoff, details: dict) -> pynini.Fst:
        details["method"] = "trie"
        arrays = dataclasses.replace(_take_arrays(given), osymbols=words.get("table"))
        out = trie_arrays(arrays, chains, words.get("pairs"), opts.weight_quantum)
        if out is None:  # only models and epsilon are left after remove-markers
            raise StageError("expand-hmm", "the model-level graph has a label that is "
                             "not a model", "this is a netbuild bug")
        return _connected(out)

    def self_loops(given: FstHandoff, details: dict) -> pynini.Fst:
        details["transition_scale"] = opts.transition_scale
        details["kinds"] = kind_table.num_kinds
        return ArrayFst(self_loop_arrays(_take_arrays(given), kind_table,
                                         opts.transition_scale))

    deterministic = _STRUCTURE + (chk.check_input_deterministic,)
    unmarked = _STRUCTURE + (chk.check_no_auxiliary_markers,)
    return Pipeline([
        Step("compose-context", _measured(compose_context), _STRUCTURE, "clg",
             hands_off=True),
        Step("determinize-models", _measured(determinize, handoff=True), deterministic,
             "determinized_models", hands_off=True),
        Step("remove-markers", _measured(unmark, handoff=True), unmarked, "unmarked",
             hands_off=True),
        Step("minimize-models", _measured(minimize, handoff=True), unmarked,
             "minimized_models", hands_off=True),
        Step("expand-hmm", _measured(expand, handoff=True), unmarked, "expanded",
             hands_off=True),
        Step("self-loops", _measured(self_loops, handoff=True),
             unmarked + (chk.check_emission_inputs, chk.check_word_outputs),
             hands_off=True)])


def build_full_graph(word_graph: WordGraph, lexicon: "LexiconResult", cmap: ContextMap,
                     contexts: Mapping[tuple[str, ...], str], opts: BuildOptions,
                     progress: Callable[[StageRecord], None] | None = None,
                     keep_intermediates: bool = False,
                     context_fst: pynini.Fst | None = None,
                     word_fst: FstHandoff | None = None) -> FullGraph:
    """Builds the full graph from the word-level graph, the context map and the windows.

    Args:
      word_graph: from `netbuild.pipeline.build_word_graph` (its markers kept).
      lexicon: L's result (its phone table is C's output table).
      cmap: the validated context map.
      contexts: every raw phone window that can occur mapped to its model name
        (`netbuild.builders.context.window_models`).
      opts: the build options (`final_optimize`, `transition_scale`, limits, checks).
      progress: called with each stage's record as soon as it is done.
      context_fst: C already built for these windows, map and phones (the size
        prediction's sub-builds share one: building C took 1.0 s of a 2.5 s sub-build
        on w5k_n200k); None builds it.
      keep_intermediates: keep every stage's FST in `FullGraph.intermediates` (else
        only C, H and the final graph; each stage's size is in its record either way).
      word_fst: the word-level graph handed over by a caller that keeps no reference
        to it (`WordGraph.spill`), so it is freed once C∘LG is built; None uses
        ``word_graph.fst``.

    Returns:
      A `FullGraph`; its FST reads emission classes (``e<c>`` at ``c + 1``) and writes
      words.

    Raises:
      EmptyCompositionError, DeterminizeError, StageError: input causes or limits.
      CheckFailed: a netbuild bug (evidence saved on disk).
    """
    phones = lexicon.phone_symbols
    lg = word_graph.fst if word_fst is None else word_fst
    # (a copy: a table obtained from an FST keeps that FST alive)
    words = (lg if word_fst is None else word_fst.peek()).output_symbols().copy()
    records: list[StageRecord] = []

    started = time.perf_counter()
    models = make_model_symbols(cmap, phones)
    cfst = build_context(contexts, cmap, phones, models) if context_fst is None \
        else context_fst
    records.append(_input_record("context", cfst, time.perf_counter() - started))
    started = time.perf_counter()
    hfst, kinds = build_hmm(cmap, models)
    records.append(_input_record("hmm", hfst, time.perf_counter() - started))
    records[0].details["windows"] = len(contexts)
    records[1].details["kinds"] = kinds.num_kinds
    if opts.checks:
        for name, fst, isyms, osyms in (("context", cfst, models, phones),
                                        ("hmm", hfst, kinds.symbols, models)):
            ctx = chk.CheckContext(name, isyms, osyms, output_aux_allowed=True)
            for check in (chk.check_nonempty, chk.check_labels):
                check(fst, ctx)
    for record in records:
        if progress is not None:
            progress(record)

    emissions = emission_symbols(kinds)

    model_level = model_level_plan(hfst, opts) is not None

    tables: dict = {}

    def context(stage: str) -> chk.CheckContext:
        if stage == "compose-context" or (model_level and stage in MODEL_LEVEL_STAGES):
            return chk.CheckContext(stage, models, tables.get(stage, words))
        if stage == "self-loops":
            return chk.CheckContext(stage, emissions, words)
        return chk.CheckContext(stage, kinds.symbols, words)

    final, stage_records, kept = full_pipeline(cfst, hfst, kinds, opts, tables).run(
        lg, checks=opts.checks, context=context, progress=progress,
        keep=keep_intermediates)
    final.set_input_symbols(emissions)
    final.set_output_symbols(words)
    intermediates = {"context": cfst, "hmm": hfst, **kept}
    result = FullGraph(final, records + stage_records, intermediates, kinds, models,
                       emissions)
    if keep_intermediates:
        intermediates["graph"] = result.fst
    return result
