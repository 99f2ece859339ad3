"""The word-level pipeline: L∘G, determinization, minimization, weight pushing.

- `StageRecord`: size (counts and bytes), time and peak memory of one stage.
- `compose_stage(lfst, gfst)`: arc-sorted L∘G.
- `determinize_stage(ifst, opts, lfst=None, gfst=None)`: guarded transducer determinization.
- `minimize_stage(ifst, method="encoded")`: minimization keeping labels and weights.
- `log_potentials(ifst)`: log-semiring distances to the final states, in bulk.
- `push_stage(ifst, details=None)`: weight pushing in the log semiring.
- `Pipeline`: an ordered list of (name, stage, checks), run with a check after each stage.
- `WordGraph`, `build_word_graph(lexicon, grammar, opts, progress=None,
  keep_intermediates=False)`: the whole run.

Every stage takes an FST and returns a new one; its input is never changed. Each stage's
size is recorded when it finishes, so the intermediate FSTs are dropped as soon as the
next stage is done with them unless they are asked for (`keep_intermediates`).
"""

from __future__ import annotations

import dataclasses
import time
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Literal

import numpy as np
import pynini
import pywrapfst

from . import checks as chk
from .errors import EmptyCompositionError, StageError
from .footprint import SizeReport, fst_size
from .guard import FstHandoff, determinize_guarded
from . import lextree
from .reweight import push_arrays
from .io.fstfile import (FstArrays, as_fst, fst_to_arrays, retain_shared, share_arrays,
                         shared_arrays, shared_conversions)
from .bulk import value_iteration
from .memory import peak_rss, release_free_memory, reset_peak
from .options import BuildOptions

if TYPE_CHECKING:
    from .builders.grammar import GrammarResult
    from .builders.lexicon import LexiconResult

MinimizeMethod = Literal["encoded", "transducer"]
Stage = Callable[[pynini.Fst], pynini.Fst]
Check = Callable[[pynini.Fst, chk.CheckContext], None]


@dataclasses.dataclass
class StageRecord:
    """What one stage produced and cost. `peak_rss_bytes` is the stage's own peak;
    `size` is the byte report of the stage's FST (`netbuild.footprint.fst_size`), taken
    when the stage finished, so the FST itself need not be kept for it."""

    name: str
    states: int
    arcs: int
    seconds: float
    peak_rss_bytes: int
    details: dict = dataclasses.field(default_factory=dict)
    size: SizeReport | None = None

    def __str__(self) -> str:
        return (f"{self.name}: {self.states} states, {self.arcs} arcs, "
                f"{self.seconds:.2f} s, peak {self.peak_rss_bytes / 2**20:.0f} MB")


def num_arcs(fst: pynini.Fst) -> int:
    """Returns the number of arcs of `fst` (summed in OpenFst's order of states)."""
    arrays = shared_arrays(fst)  # a conversion made already costs nothing to count
    if arrays is not None:
        return int(arrays.src.shape[0])
    return sum(fst.num_arcs(s) for s in fst.states())


# ---------------------------------------------------------------------------- stages


def compose_stage(lfst: pynini.Fst, gfst: pynini.Fst) -> pynini.Fst:
    """Constructively composes L with G; the result is arc-sorted on input labels.

    L's output side is arc-sorted on a copy (G's input side may stay as it is); the
    composition is trimmed (connected). Symbol tables: L's input, G's output.

    Raises:
        EmptyCompositionError: L∘G has no path (or no path with a word), almost always because no word of the
            lexicon occurs in the model (different spellings or vocabularies).
    """
    lsorted = pynini.arcsort(lfst, sort_type="olabel")
    try:
        ofst = pynini.compose(lsorted, gfst, connect=True)
    except pywrapfst.FstError as err:
        raise StageError("compose", f"OpenFst could not compose L and G ({err})",
                         "check that L's output and G's input use the same word "
                         "symbol table") from err
    # Sorted before the test below, so the test's array conversion is the one the
    # stage's checks reuse (sorting afterwards would make them convert again).
    ofst.arcsort(sort_type="ilabel")
    # Through the back-off loop L∘G may still accept the empty sentence: no word at all
    # on the output side is the same failure.
    if (ofst.start() == pynini.NO_STATE_ID or ofst.num_states() == 0
            or not fst_to_arrays(ofst).olabel.any()):
        raise EmptyCompositionError(
            "compose", "L∘G has no path: no word of the lexicon occurs in the model "
            "(or no sentence of the model can be spelt with the lexicon)",
            "check that the lexicon and the language model use the same word spellings "
            "and that the model's words have pronunciations")
    return ofst


def determinize_stage(ifst: pynini.Fst | FstHandoff, opts: BuildOptions, *,
                      lfst: pynini.Fst | None = None, gfst: pynini.Fst | None = None,
                      details: dict | None = None, as_arrays: bool = False) -> pynini.Fst:
    """Constructively determinizes the tropical transducer `ifst` in a guarded child.

    The input must be functional (L∘G with disambiguation and back-off markers is);
    epsilon is treated as an ordinary label. The work runs in a child process limited to
    `opts.determinize_max_memory` bytes and `opts.determinize_timeout` seconds; see
    `netbuild.guard`. When `details` is given, the child's peak memory and time are
    stored in it ("child_peak_rss_bytes", "child_seconds"). Given as an `FstHandoff`,
    the input is dropped once the child has its copy (see `determinize_guarded`).

    With `opts.determinize_in_process` (the size prediction's small sub-builds, whose
    full build is guarded) it determinizes in this process instead, without limits.
    With `as_arrays` a guarded result is an `ArrayFst` (`determinize_guarded`).

    Raises:
        DeterminizeError: a pre-check failed, or the child hit a limit or crashed.
    """
    if opts.determinize_in_process:
        fst = as_fst(ifst.take() if isinstance(ifst, FstHandoff) else ifst)
        try:
            ofst = pynini.determinize(fst, det_type="functional")
        except pywrapfst.FstError as err:
            raise StageError("determinize", f"OpenFst could not determinize ({err})",
                             "build the graph with 'netbuild build' to see the cause"
                             ) from err
        ofst.set_input_symbols(fst.input_symbols())
        ofst.set_output_symbols(fst.output_symbols())
        return ofst
    result = determinize_guarded(ifst, opts.determinize_max_memory,
                                 opts.determinize_timeout, det_type="functional",
                                 lfst=lfst, gfst=gfst, as_arrays=as_arrays)
    if details is not None:
        details["child_peak_rss_bytes"] = result.peak_rss_bytes
        details["child_seconds"] = result.seconds
    if result.arrays is not None:
        share_arrays(result.fst, result.arrays)  # for the checks and the next stage
    return result.fst


def minimize_stage(ifst: pynini.Fst, method: MinimizeMethod = "encoded") -> pynini.Fst:
    """Constructively minimizes the input-deterministic transducer `ifst`.

    "encoded" (the default) encodes each arc's labels and weight as one label with
    `pynini.EncodeMapper`, minimizes the resulting unweighted deterministic acceptor and
    decodes. It keeps every weight where it is (an earlier push survives) and never
    moves output labels. "transducer" is OpenFst's weighted transducer minimization: it
    first pushes labels and weights toward the start state in the tropical semiring,
    which can merge more states but undoes any log-semiring push done before it.

    Measured on generated L∘G graphs (2 cores; 2000 words, random bigram model with
    back-off; determinized graph 15 081 states, 60 440 arcs; two runs each): encoded
    0.17-0.72 s, transducer 0.55-1.37 s, both giving 15 073 states and 60 432 arcs.
    Both are correct (the property tests compare them with OpenFst's equivalence
    tests); the pipeline uses "encoded" because it was two to three times faster at the
    same size and keeps weights in place. Re-measure on larger graphs before changing.
    """
    if method == "transducer":
        ofst = ifst.copy()
        ofst.minimize(allow_nondet=False)
        return ofst
    if method != "encoded":
        raise ValueError(f"unknown minimize method {method!r}; use 'encoded' or "
                         "'transducer'")
    mapper = pynini.EncodeMapper(ifst.arc_type(), encode_labels=True, encode_weights=True)
    ofst = pynini.encode(ifst, mapper)
    ofst.minimize()
    ofst = pynini.decode(ofst, mapper)
    ofst.set_input_symbols(ifst.input_symbols())
    ofst.set_output_symbols(ifst.output_symbols())
    return ofst


def log_potentials(ifst: pynini.Fst, max_iterations: int = 3000,
                   rtol: float = 1e-9) -> np.ndarray | None:
    """Returns each state's log-semiring distance to the final states, or None.

    Solves d = f + M d (probabilities: f the final weights, M the arc weights) by value
    iteration in float64 numpy, one bulk pass over the arcs per iteration, and returns
    -ln d. Returns None when the iteration does not settle within `max_iterations`
    passes (relative change below `rtol`): the total probability is then unbounded
    (spectral radius of M at least 1) or too close to it. A back-off G counts the mass
    of seen words twice (directly and through the back-off arc), and rescaled
    pronunciation probabilities add more, so L∘G is not stochastic and this can happen.
    """
    arcs = fst_to_arrays(ifst)
    prob = np.exp(-arcs.weight.astype(np.float64))
    final = np.exp(-arcs.final_weights.astype(np.float64))
    d = value_iteration(arcs.src, arcs.dst, prob, final, arcs.num_states, max_iterations,
                        rtol)
    if d is None:
        return None
    with np.errstate(divide="ignore"):
        return -np.log(d)




def push_stage(ifst: pynini.Fst, details: dict | None = None) -> pynini.Fst:
    """Constructively pushes the weights of the tropical `ifst` toward its start state,
    in the log semiring when its total probability is finite.

    The log-semiring distances of the states to the final states are computed in bulk
    (`log_potentials`); the arcs are mapped to log arcs, reweighted with them toward the
    initial state (the total weight stays on the start state's side, so every complete
    path keeps its weight) and mapped back. Afterwards the arcs leaving each state form
    a probability distribution (the start state's up to the total), which helps a beam
    search. When the total diverges (see `log_potentials`) the log push is undefined and
    OpenFst's own log push would not finish; the weights are then pushed in the
    tropical semiring instead (always defined for non-negative costs), and `details`,
    when given, records "semiring": "tropical" and the reason.
    """
    potentials = log_potentials(ifst) if ifst.num_states() else None
    if potentials is not None:
        log = pynini.arcmap(ifst, map_type="to_log")
        weights = [pynini.Weight("log", float(p)) if np.isfinite(p)
                   else pynini.Weight.zero("log") for p in potentials]
        log.reweight(weights, reweight_type="to_initial")
        ofst = pynini.arcmap(log, map_type="to_std")
        semiring = "log"
    else:
        ofst = pynini.push(ifst, push_weights=True, reweight_type="to_initial")
        semiring = "tropical"
    if details is not None:
        details["semiring"] = semiring
        if potentials is None:
            details["reason"] = ("the log-semiring total of the graph does not converge; "
                                 "pushed in the tropical semiring")
    ofst.set_input_symbols(ifst.input_symbols())
    ofst.set_output_symbols(ifst.output_symbols())
    return ofst


# -------------------------------------------------------------------------- pipeline


@dataclasses.dataclass(frozen=True)
class Step:
    """One stage of a `Pipeline`: a name, the stage function and its checks."""

    name: str
    stage: Callable[[pynini.Fst, dict], pynini.Fst]
    checks: Sequence[Check] = ()
    keep_as: str | None = None  # key under which the result is kept, if any
    # The stage gets its input as a `netbuild.guard.FstHandoff` and may drop it before
    # it returns (the pipeline then holds no reference of its own while it runs).
    hands_off: bool = False


class Pipeline:
    """An ordered list of (name, stage, checks), run one after the other.

    Each stage gets the previous result and a `details` dict it may fill; its checks
    run right after it unless `checks` is False. The previous result is released when
    the stage returns, before the checks of the new one (or, for a step with
    `hands_off`, whenever the stage drops it), unless it is kept.
    """

    def __init__(self, steps: Sequence[Step]) -> None:
        self.steps = list(steps)

    @property
    def names(self) -> list[str]:
        return [s.name for s in self.steps]

    def run(self, ifst: pynini.Fst | FstHandoff, *, checks: bool = True,
            context: Callable[[str], chk.CheckContext] | None = None,
            progress: Callable[[StageRecord], None] | None = None,
            keep: bool = False,
            ) -> tuple[pynini.Fst, list[StageRecord], dict[str, pynini.Fst]]:
        """Runs every step; returns the last FST, the stage records and the kept FSTs.

        Each record carries its FST's size report (`StageRecord.size`), taken inside the
        stage's shared conversion, so no FST is needed for it afterwards. With `keep`,
        the result of each step with a `keep_as` key is returned under that key;
        without, none is, and each result is freed once the next stage is done with it
        (unless the caller holds it: the input `ifst` stays the caller's, unless it
        is handed over as an `FstHandoff`).
        """
        records: list[StageRecord] = []
        kept: dict[str, pynini.Fst] = {}
        # one reference to the current FST: `fst` (a handed-over input is then ours)
        fst, ifst = (ifst.take() if isinstance(ifst, FstHandoff) else ifst), None
        carried: FstArrays | None = None  # the current FST's conversion, if made
        for step in self.steps:
            details: dict = {}
            reset_peak()
            # One block per stage: the stage, its checks and the record share each
            # FST's array conversion instead of converting it once per check; the
            # conversion of a stage's result goes on to the next stage, whose input it
            # is (20k / 1M: a conversion of a 5M-arc graph costs about 1.2 s).
            with shared_conversions():
                if carried is not None:
                    share_arrays(fst, carried)
                    carried = None
                given = FstHandoff(fst) if step.hands_off else fst
                fst = None  # while the stage runs, `given` is the loop's only reference
                started = time.perf_counter()
                fst = step.stage(given, details)
                seconds = time.perf_counter() - started
                # A conversion the stage made of its input (or of a temporary) would
                # keep it alive through the checks, which look only at the new FST.
                given = None
                retain_shared(fst)
                release_free_memory()  # what the input and the stage's temporaries held
                if checks:
                    ctx = context(step.name) if context else chk.CheckContext(step.name)
                    checked = time.perf_counter()
                    for check in step.checks:
                        check(fst, ctx)
                    details["check_seconds"] = time.perf_counter() - checked
                size = fst_size(fst)  # one count: bulk when the checks converted it
                carried = shared_arrays(fst)
            peak = max(peak_rss(), int(details.get("child_peak_rss_bytes", 0)))
            record = StageRecord(step.name, size.states, size.arcs, seconds,
                                 peak, details, size)
            records.append(record)
            if keep and step.keep_as:
                kept[step.keep_as] = as_fst(fst)
            if progress is not None:
                progress(record)
        return fst, records, kept


@dataclasses.dataclass
class WordGraph:
    """The optimized word-level graph, its stage records and kept intermediate FSTs.

    `intermediates` always holds "lexicon", "grammar" and "wordgraph" (the final FST);
    built with `keep_intermediates` also "composed", "determinized", "minimized" and
    "pushed" (when pushing is on). Each stage's size is in its record either way.

    `spill(path)` lets go of the FST once it is written at `path`: `fst` then reads it
    back on first use (the full graph's build does not keep the word-level graph
    through its later stages: 20k / 1M, 200 MB).
    """

    _fst: pynini.Fst | None
    stages: list[StageRecord]
    intermediates: dict[str, pynini.Fst]
    _source: Path | None = None

    @property
    def fst(self) -> pynini.Fst:
        if self._fst is None:
            if self._source is None:
                raise RuntimeError("the word graph was spilled and has no file")
            self._fst = pynini.Fst.read(str(self._source))
        return self._fst

    def spill(self, path: Path) -> pynini.Fst:
        """Forgets the FST (and the intermediates that were built for it) and returns
        it: the caller's is now the only reference. `path`, where it is written, is
        read when `fst` is next asked for (`moved` tells a new place)."""
        fst = self.fst
        self._fst = None
        self._source = Path(path)
        self.intermediates = {}
        return fst

    def moved(self, path: Path) -> None:
        """The spilled FST's file is now at `path`."""
        self._source = Path(path)


_STRUCTURE: tuple[Check, ...] = (chk.check_nonempty, chk.check_connected, chk.check_labels)
_DETERMINISTIC: tuple[Check, ...] = _STRUCTURE + (chk.check_input_deterministic,
                                                  chk.check_no_input_epsilon_cycles)


def word_pipeline(lfst: pynini.Fst, gfst: pynini.Fst, opts: BuildOptions) -> Pipeline:
    """Returns the pipeline from G to the word graph: compose with L, determinize,
    minimize and (when `opts.push_weights`) push."""

    def compose(g: pynini.Fst, details: dict) -> pynini.Fst:
        return compose_stage(lfst, g)

    def determinize(f: pynini.Fst, details: dict) -> pynini.Fst:
        return determinize_stage(f, opts, lfst=lfst, gfst=gfst, details=details)

    def minimize(f: pynini.Fst, details: dict) -> pynini.Fst:
        details["method"] = "encoded"
        return minimize_stage(f, "encoded")

    def push(f: pynini.Fst, details: dict) -> pynini.Fst:
        return push_stage(f, details)

    steps = [
        Step("compose", compose, _STRUCTURE + (chk.check_no_input_epsilon_cycles,
                                               chk.check_words_reachable), "composed"),
        Step("determinize", determinize, _DETERMINISTIC, "determinized", hands_off=True),
        Step("minimize", minimize, _DETERMINISTIC, "minimized"),
    ]
    if opts.push_weights:
        steps.append(Step("push", push, _DETERMINISTIC, "pushed"))
    return Pipeline(steps)


def tree_pipeline(inputs: lextree.TreeInputs, phones: pynini.SymbolTable | None,
                  words: pynini.SymbolTable | None, opts: BuildOptions) -> Pipeline:
    """Returns the pipeline from G to the word graph that builds det(L∘G) directly.

    Stages: "compose-determinize" (`lextree.build_tree_graph`: the determinized L∘G,
    without composing), "minimize" (`lextree.minimize_tree_graph`, the same encoded
    minimization as `minimize_stage`) and, when `opts.push_weights`, "push" (in the
    log semiring when L∘G's total converges, else in the tropical semiring with the
    distances the construction computed). Each stage hands its arrays to the checks
    (no conversion back from the FST). A stage given an FST other than the one the
    previous stage made falls back to the general stage.
    """
    made: dict[str, tuple] = {}

    def fst_of(arcs: FstArrays) -> pynini.Fst:
        fst = lextree.tree_graph_fst(arcs, phones, words)
        share_arrays(fst, arcs)
        return fst

    def compose_determinize(g: pynini.Fst, details: dict) -> pynini.Fst:
        tree = lextree.build_tree_graph(inputs)
        fst = fst_of(tree.arcs)
        details.update(method="lexicon-tree", pairs=tree.pairs, tree_nodes=tree.tree_nodes,
                       tail_nodes=tree.tail_nodes)
        made["tree"] = (fst, tree)
        return fst

    def minimize(f: pynini.Fst, details: dict) -> pynini.Fst:
        fst, tree = made.pop("tree", (None, None))
        details["method"] = "encoded"
        if f is not fst:
            return minimize_stage(f, "encoded")
        arcs, potentials = lextree.minimize_tree_graph(tree)
        del tree, fst
        out = fst_of(arcs)
        made["minimized"] = (out, arcs, potentials)
        return out

    def push(f: pynini.Fst, details: dict) -> pynini.Fst:
        fst, arcs, potentials = made.pop("minimized", (None, None, None))
        if f is not fst or potentials is None or not lextree.log_total_diverges(inputs):
            return push_stage(f, details)
        out = fst_of(push_arrays(arcs, potentials))
        details["semiring"] = "tropical"
        details["reason"] = ("the log-semiring total of the graph does not converge; "
                             "pushed in the tropical semiring")
        return out

    steps = [
        Step("compose-determinize", compose_determinize,
             _DETERMINISTIC + (chk.check_words_reachable,), "determinized"),
        Step("minimize", minimize, _DETERMINISTIC, "minimized"),
    ]
    if opts.push_weights:
        steps.append(Step("push", push, _DETERMINISTIC, "pushed"))
    return Pipeline(steps)


def _input_record(name: str, fst: pynini.Fst, seconds: float) -> StageRecord:
    size = fst_size(fst)
    return StageRecord(name, size.states, size.arcs, seconds, peak_rss(),
                       {"check_seconds": seconds}, size)


def build_word_graph(lexicon: LexiconResult, grammar: GrammarResult, opts: BuildOptions,
                     progress: Callable[[StageRecord], None] | None = None,
                     keep_intermediates: bool = False) -> WordGraph:
    """Builds the optimized word-level graph push(min(det(L∘G))) from L and G.

    Checks L and G first (unless `opts.checks` is False): structure, labels, homophones
    without markers, the back-off pass-through. Then composes, determinizes (guarded),
    minimizes and pushes, checking after each stage. `progress` is called with each
    stage's record as soon as the stage is done. Neither input FST is changed. With
    `keep_intermediates` every stage's FST is kept in `WordGraph.intermediates`;
    without, only G, L and the final graph are, and each stage's FST is freed once the
    next stage is done with it (its size is in its `StageRecord`).

    Raises:
        InputCheckFailed, EmptyCompositionError, DeterminizeError: input causes.
        CheckFailed: a netbuild bug (evidence saved on disk).
    """
    lfst, gfst = lexicon.fst, grammar.fst
    phones = lexicon.phone_symbols if lexicon.phone_symbols is not None \
        else lfst.input_symbols()
    words = grammar.word_symbols if grammar.word_symbols is not None \
        else gfst.output_symbols()
    records: list[StageRecord] = []

    def context(stage: str) -> chk.CheckContext:
        if stage == "grammar":
            return chk.CheckContext(stage, words, words, False, None, gfst)
        if stage == "lexicon":
            return chk.CheckContext(stage, phones, words, True, lfst, gfst)
        return chk.CheckContext(stage, phones, words, False, lfst, gfst)

    inputs = (("grammar", gfst, (chk.check_nonempty, chk.check_connected, chk.check_labels)),
              ("lexicon", lfst, (chk.check_nonempty, chk.check_labels,
                                 chk.check_homophones, chk.check_backoff_passthrough)))
    pipeline = None
    # One conversion of G (and of L) serves the input checks and the tree's inputs.
    with shared_conversions():
        for name, fst, checks in inputs:
            started = time.perf_counter()
            if opts.checks:
                ctx = context(name)
                for check in checks:
                    check(fst, ctx)
            record = _input_record(name, fst, time.perf_counter() - started)
            records.append(record)
            if progress is not None:
                progress(record)
        if opts.word_graph == "tree":
            tree_in, _ = lextree.tree_inputs(lexicon, grammar)
            if tree_in is not None:
                pipeline = tree_pipeline(tree_in, phones, words, opts)
    if pipeline is None:
        pipeline = word_pipeline(lfst, gfst, opts)
    final, stage_records, kept = pipeline.run(gfst, checks=opts.checks, context=context,
                                              progress=progress, keep=keep_intermediates)
    final.set_input_symbols(phones)
    final.set_output_symbols(words)
    intermediates = {"grammar": gfst, "lexicon": lfst, **kept, "wordgraph": final}
    return WordGraph(final, records + stage_records, intermediates)
