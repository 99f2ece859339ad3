"""Predicting the size of the final graph before building it.

- `Prediction`: predicted states, arcs and bytes with low/high intervals, and the cost.
- `Sample`: one measured sub-build (fraction, G arcs, final states/arcs).
- `subsample_model(model, fraction, seed=0)`: a prefix-closed share of the n-grams.
- `predict_graph_size(project, fractions=None, seed=0)`: the prediction.
- `MemoryGuard(limit, order)`: a progress callback that stops a build before a stage
  whose estimated need (`stage_need`) exceeds the limit; `stage_order(opts)`,
  `full_stage_order(opts, model_level)`: the stage names a build emits.

Method (docs/size.md has the measurements). The final graph is close to proportional
to the states of C∘LG, and C∘LG is cheap to build in full (the word-level graph is
built directly by netbuild.lextree, C∘LG by a product walk). So C∘LG is built for
the whole model, and the whole build (L∘G to the final graph, checks off) is run on
two sub-models holding every unigram and a share f, then 2f, of the higher-order
n-grams. Each sub-build gives the ratios final states / C∘LG states and final arcs /
C∘LG states; the point estimate is the whole model's C∘LG states times the ratio of
the larger share, and the interval spans the ratios of both shares, widened by a fixed
8 % (5 % until the model-level push of output labels, which shrinks the sub-builds'
graphs a little more than the whole model's: the point estimate is now 2-5 % low on
the demo and w5k_n200k). (The ratio of final to C∘LG states was 2.49-2.54 over shares 0-8 % on
w5k_n200k and 2.52 for the whole model; power laws fitted against the word-level
graph, used before, drifted by up to 15 % over the tenfold extrapolation.)

The sub-models are prefix-closed so that no history is lost: an n-gram (n >= 2) is
kept when a hash of its first two word ids falls below f, so every kept n-gram's
history (same first two words) is kept too, and each order keeps about the share f.
"""

from __future__ import annotations

import dataclasses
import math
import time
from typing import Sequence

import numpy as np
import pynini

from .builders.grammar import build_grammar
from .builders.lexicon import build_lexicon
from .builders.vocabulary import restrict_vocabulary
from .errors import Diagnostics, NetbuildError, StageError
from .inspectors.size import footprints, state_counts
from .io.arpa import ArpaModel, NgramTable
from .memory import current_rss
from .pipeline import build_word_graph
from .project import Project

__all__ = ["Prediction", "Sample", "predict_graph_size", "subsample_model"]

_MIN_SAMPLED_NGRAMS = 1500  # higher-order n-grams in the smallest sub-model
_MIN_FRACTION, _MAX_FRACTION = 0.01, 0.15
_WIDEN = 0.08


@dataclasses.dataclass(frozen=True)
class Sample:
    """One sub-build: the share of n-grams kept, its G's arcs, its word-level graph
    and its final graph."""

    fraction: float
    grammar_arcs: int
    states: int
    arcs: int
    states_with_arcs: int
    seconds: float
    word_states: int = 0
    word_arcs: int = 0
    context_states: int = 0  # states of its C∘LG (0: not built)


@dataclasses.dataclass(frozen=True)
class Prediction:
    """Predicted size of the final graph.

    `states`, `arcs` are point estimates with `states_low/high`, `arcs_low/high`;
    `memory_bytes` and `disk_bytes` map "const"/"vector" to the point estimate, and
    `memory_low`/`memory_high` to the interval ends. `seconds` is the prediction's cost.
    """

    states: int
    arcs: int
    states_low: int
    states_high: int
    arcs_low: int
    arcs_high: int
    memory_bytes: dict[str, int]
    memory_low: dict[str, int]
    memory_high: dict[str, int]
    disk_bytes: dict[str, int]
    grammar_arcs: int
    samples: tuple[Sample, ...]
    seconds: float

    def to_json(self) -> dict:
        return {"states": self.states, "arcs": self.arcs,
                "states_interval": [self.states_low, self.states_high],
                "arcs_interval": [self.arcs_low, self.arcs_high],
                "const": {"memory_bytes": self.memory_bytes["const"],
                          "memory_interval": [self.memory_low["const"],
                                              self.memory_high["const"]],
                          "disk_bytes": self.disk_bytes["const"]},
                "vector": {"memory_bytes": self.memory_bytes["vector"],
                           "memory_interval": [self.memory_low["vector"],
                                               self.memory_high["vector"]],
                           "disk_bytes": self.disk_bytes["vector"]},
                "grammar_arcs": self.grammar_arcs,
                "samples": [dataclasses.asdict(s) for s in self.samples],
                "seconds": self.seconds}


def _keep_mask(words: np.ndarray, fraction: float, seed: int) -> np.ndarray:
    """True for rows whose first two word ids hash below `fraction` (splitmix64)."""
    x = (words[:, 0].astype(np.uint64) << np.uint64(32)) | words[:, 1].astype(np.uint64)
    x = x + np.uint64((0x9E3779B97F4A7C15 * (seed + 1)) % 2**64)
    with np.errstate(over="ignore"):
        x = (x ^ (x >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
        x = (x ^ (x >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
        x = x ^ (x >> np.uint64(31))
    return (x >> np.uint64(11)).astype(np.float64) / 2.0**53 < fraction


def subsample_model(model: ArpaModel, fraction: float, seed: int = 0) -> ArpaModel:
    """Constructively keeps every unigram and about `fraction` of the other n-grams.

    The choice is prefix-closed (see the module docstring) and deterministic for a seed.
    """
    orders = [model.orders[0]]
    for table in model.orders[1:]:
        keep = _keep_mask(table.words, fraction, seed)
        orders.append(NgramTable(table.order, table.words[keep], table.logprob[keep],
                                 table.backoff[keep], table.lines[keep]))
    return ArpaModel(list(model.vocab), orders, model.path)


def _fractions(higher: int) -> tuple[float, ...]:
    f = min(_MAX_FRACTION, max(_MIN_FRACTION, _MIN_SAMPLED_NGRAMS / max(higher, 1)))
    return (f, 2 * f)


def _scale(x_whole: float, xs: list[float], ys: list[float]) -> tuple[float, float, float]:
    """Returns (point, low, high) of y at `x_whole` for y proportional to x: the ratio
    of the largest sample (the last) for the point, the smallest and largest ratio of
    all samples, widened by `_WIDEN`, for the interval."""
    ratios = [y / x for x, y in zip(xs, ys) if x > 0]
    if not ratios:
        return 0.0, 0.0, 0.0
    point = ratios[-1] * x_whole
    return (point, min(ratios) * x_whole * (1 - _WIDEN),
            max(ratios) * x_whole * (1 + _WIDEN))


def _context_fst(inputs, model: ArpaModel, opts, windows) -> pynini.Fst:
    """C for the project, the same for every sub-model: its phone table comes from L,
    which depends on the lexicon and the vocabulary only (every sub-model keeps every
    unigram), so L is built here for the unigrams alone."""
    from .builders.context import build_context
    from .builders.hmm import make_model_symbols

    unigrams = ArpaModel(list(model.vocab), [model.orders[0]], model.path)
    lexicon = build_lexicon(inputs.lexicon, inputs.inventory,
                            build_grammar(unigrams).word_symbols, opts.lexicon)
    phones = lexicon.phone_symbols
    return build_context(windows, inputs.cmap, phones, make_model_symbols(inputs.cmap,
                                                                         phones))


def _final_graph(inputs, model: ArpaModel, opts, windows, full: bool = True,
                 cfst: pynini.Fst | None = None):
    """Builds the graph of `model` (checks off); returns (G arcs, word-level states,
    word-level arcs, C∘LG states, final fst) -- the final fst is the word graph when
    `full` is off or the project has no context map; without `full` but with a map,
    C∘LG is still built and counted. `cfst`: C, from `_context_fst`."""
    from .full_pipeline import build_full_graph

    grammar = build_grammar(model)
    lexicon = build_lexicon(inputs.lexicon, inputs.inventory, grammar.word_symbols,
                            opts.lexicon)
    graph = build_word_graph(lexicon, grammar, opts)
    fst = graph.fst
    word = graph.stages[-1]
    context_states = 0
    if inputs.cmap is not None:
        if full:
            built = build_full_graph(graph, lexicon, inputs.cmap, windows, opts,
                                     context_fst=cfst)
            fst = built.graph
            context_states = next(r.states for r in built.stages
                                  if r.name == "compose-context")
        else:
            from .full_pipeline import compose_context_stage

            context_states = compose_context_stage(cfst, graph.fst, {}).num_states()
    return graph.stages[0].arcs, word.states, word.arcs, context_states, fst


def _sample(job) -> Sample:
    """One measurement: the graph of the share `f` of the model (1.0: the whole model;
    0.0: its unigrams), full graph or word level only."""
    inputs, model, opts, windows, f, seed, full, cfst = job
    t0 = time.perf_counter()
    if f >= 1.0:
        sub = model
    elif f > 0.0:
        sub = subsample_model(model, f, seed)
    else:
        sub = ArpaModel(list(model.vocab), [model.orders[0]], model.path)
    g_arcs, w_states, w_arcs, c_states, fst = _final_graph(inputs, sub, opts, windows, full,
                                                           cfst)
    s, a, s1 = state_counts(fst) if full or inputs.cmap is None else (w_states, w_arcs, 0)
    return Sample(f, g_arcs, s, a, s1, time.perf_counter() - t0, w_states, w_arcs,
                  c_states)


_JOBS: list = []  # the jobs of `_run_all`, inherited by forked workers


def _run_job(index: int) -> tuple[str, object]:
    try:
        return "ok", _sample(_JOBS[index])
    except NetbuildError as err:  # pickling our errors loses their fields: send text
        return "error", (type(err).__name__, str(err))


def _run_all(jobs: list) -> list[Sample]:
    """Runs `_sample` on every job, on two forked worker processes when possible
    (largest jobs first), else one after the other; results in job order."""
    import multiprocessing
    import os
    from concurrent.futures import ProcessPoolExecutor

    workers = min(2, os.cpu_count() or 1, len(jobs))
    if workers < 2 or "fork" not in multiprocessing.get_all_start_methods():
        return [_sample(job) for job in jobs]
    global _JOBS
    _JOBS = jobs
    try:
        order = sorted(range(len(jobs)), key=lambda i: -jobs[i][4])  # larger share first
        with ProcessPoolExecutor(workers, mp_context=multiprocessing.get_context("fork")) as ex:
            futures = {i: ex.submit(_run_job, i) for i in order}
            results = {i: futures[i].result() for i in order}
    finally:
        _JOBS = []
    out = []
    for i in range(len(jobs)):
        status, value = results[i]
        if status == "error":
            name, text = value
            raise StageError("predict", f"a sub-build failed: {text}",
                             "run 'netbuild build' on the project to see the stage that "
                             "fails; the full build would fail the same way")
        out.append(value)
    return out


def predict_graph_size(project: Project, fractions: Sequence[float] | None = None,
                       seed: int = 0) -> Prediction:
    """Predicts the final graph's states, arcs and bytes of `project` from sub-builds.

    Reads the inputs (all problems raised at once) and builds the whole word-level
    graph, checks off (cheap since it is built directly; for a project without a
    context map it is the final graph, so the prediction is exact). With a context
    map it builds C∘LG of the whole model and the whole graph, checks off, for
    sub-models holding the share `fractions` of the higher-order n-grams (default:
    f and 2f with f = 1500 / higher-order n-grams, clipped to 0.01 .. 0.15), and
    scales the final states and arcs with C∘LG's states (module docstring). The last
    sample is the whole model's (its word-level graph and C∘LG).

    Raises:
      InputError: problems in the inputs.
      StageError: a sub-build failed (the full build would fail the same way).
    """
    from .workflow import context_windows, read_inputs

    started = time.perf_counter()
    diag = Diagnostics()
    inputs = read_inputs(project, diag)
    diag.raise_if_errors()
    assert inputs is not None
    opts = dataclasses.replace(project.options, checks=False, determinize_in_process=True)
    model, _ = restrict_vocabulary(inputs.model, set(inputs.lexicon.words()),
                                   opts.grammar.oov_policy)
    if fractions is not None and any(not 0.0 < f < 1.0 for f in fractions):
        raise StageError("predict", f"fractions {tuple(fractions)} must lie strictly "
                         "between 0 and 1", "pass shares such as 0.05, 0.1, 0.2")
    if inputs.cmap is None:
        # The word-level graph is the final graph, and building it in full is cheap:
        # the "prediction" is the graph itself.
        whole = _sample((inputs, model, opts, None, 1.0, seed, False, None))
        samples: list[Sample] = [whole]
        st = st_lo = st_hi = float(whole.states)
        ar = ar_lo = ar_hi = float(whole.arcs)
        last = whole
    else:
        higher = sum(len(t) for t in model.orders[1:])
        shares = tuple(fractions) if fractions is not None else _fractions(higher)
        windows = context_windows(inputs)
        # C∘LG of the whole model (the x of the scaling) and the sub-builds are
        # independent: they run on both cores when the machine has two.
        cfst = _context_fst(inputs, model, opts, windows)  # built once, before the fork
        jobs = [(inputs, model, opts, windows, f, seed, True, cfst) for f in shares]
        # (pushing moves weights only, not states or arcs: the whole word-level graph
        # and its C∘LG are counted unpushed, 1.4 s less at 20k / 1M)
        jobs.append((inputs, model, dataclasses.replace(opts, push_weights=False), windows,
                     1.0, seed, False, cfst))
        done = _run_all(jobs)
        rest, whole = done[:-1], done[-1]
        # The final graph is close to proportional to C∘LG's states (final states per
        # C∘LG state: 2.49-2.54 over shares 0-8 % on w5k_n200k, 2.52 for the whole
        # model), where power laws against the word-level graph drifted by 15 %.
        xs = [float(s.context_states) for s in rest]
        st, st_lo, st_hi = _scale(whole.context_states, xs, [float(s.states) for s in rest])
        ar, ar_lo, ar_hi = _scale(whole.context_states, xs, [float(s.arcs) for s in rest])
        last = rest[-1]
        samples = [*rest, whole]
    share = last.states_with_arcs / max(last.states, 1)

    def bytes_of(states: float, arcs: float) -> tuple[dict[str, int], dict[str, int]]:
        const, vector = footprints(int(round(states)), int(round(arcs)),
                                   int(round(states * share)))
        return ({"const": const.memory_bytes, "vector": vector.memory_bytes},
                {"const": const.disk_bytes, "vector": vector.disk_bytes})

    memory, disk = bytes_of(st, ar)
    low, _ = bytes_of(st_lo, ar_lo)
    high, _ = bytes_of(st_hi, ar_hi)
    return Prediction(int(round(st)), int(round(ar)), int(st_lo), int(math.ceil(st_hi)),
                      int(ar_lo), int(math.ceil(ar_hi)), memory, low, high, disk,
                      int(samples[-1].grammar_arcs), tuple(samples),
                      time.perf_counter() - started)


# --- the build-memory guard --------------------------------------------------------

# Output size of each stage relative to its input FST (states and arcs alike), and the
# number of vector-sized copies alive at the stage's peak (input, output, sorted or
# encoded copies). Ratios are upper ends of what the ropeway demo and the synthetic
# benchmark sets gave (docs/size.md); the stage starts only when the current resident
# memory plus `copies * ratio * input` fits the limit.
STAGE_GROWTH: dict[str, tuple[float, float]] = {
    "compose": (4.0, 2.0),  # input: G and L together
    "compose-determinize": (4.0, 2.0),  # the same input; arrays, then the FST
    "determinize": (1.5, 3.0),  # child: input + output; the parent reads it back
    "minimize": (1.0, 3.0),  # encoded copy, minimized, decoded
    "push": (1.0, 3.0),
    "compose-context": (3.0, 2.0),
    "compose-hmm": (3.0, 2.0),
    "determinize-hmm": (1.5, 3.0),
    "remove-markers": (1.0, 2.0),
    "minimize-hmm": (1.0, 3.0),
    # The model-level path: the child determinizes C∘LG; the rest are array passes
    # (input arrays, output arrays and the output FST).
    "determinize-models": (1.5, 3.0),
    "minimize-models": (1.0, 3.0),
    "expand-hmm": (3.0, 3.0),
    "self-loops": (2.0, 2.0),
}
_INPUT_BUILDS = ("grammar", "lexicon", "context", "hmm")  # cheap; not guarded


def stage_need(stage: str, input_states: int, input_arcs: int, resident: int) -> int:
    """Returns the estimated peak resident bytes of `stage` on an input of this size."""
    ratio, copies = STAGE_GROWTH[stage]
    _, vector = footprints(int(input_states * ratio), int(input_arcs * ratio),
                           int(input_states * ratio))
    return int(resident + copies * vector.memory_bytes)


def stage_order(opts, tree: bool = False) -> list[str]:
    """Returns the names of the stage records a build with `opts` emits, in order;
    `tree`: the word-level graph is built directly (`pipeline.tree_pipeline`)."""
    order = ["grammar", "lexicon"]
    order += ["compose-determinize"] if tree else ["compose", "determinize"]
    order.append("minimize")
    if opts.push_weights:
        order.append("push")
    return order


def full_stage_order(opts, model_level: bool = True) -> list[str]:
    """Returns the names of the full-graph stage records, in order (after the word graph);
    `model_level`: optimized over models (`netbuild.full_pipeline.model_level_plan`)."""
    if opts.final_optimize and model_level:
        return ["context", "hmm", "compose-context", "determinize-models",
                "remove-markers", "minimize-models", "expand-hmm", "self-loops"]
    order = ["context", "hmm", "compose-context", "compose-hmm"]
    if opts.final_optimize:
        order.append("determinize-hmm")
    order.append("remove-markers")
    if opts.final_optimize:
        order.append("minimize-hmm")
    order.append("self-loops")
    return order


class MemoryGuard:
    """Stops a build before a stage whose estimated need exceeds `limit` bytes.

    Call it with each finished stage's record (it is a progress callback): it finds the
    stage that runs next, estimates its need from its input's size (the previous
    stage's output; for L∘G, G and L together) and the resident memory now, and raises
    `StageError` instead of letting that stage start. `checked` keeps every estimate.
    """

    def __init__(self, limit: int, order: Sequence[str]) -> None:
        self.limit = int(limit)
        self.order = list(order)
        self.sizes: dict[str, tuple[int, int]] = {}
        self.last: tuple[int, int] | None = None  # output of the last guarded stage
        self.checked: list[tuple[str, int]] = []

    def __call__(self, record) -> None:
        name = record.name
        self.sizes[name] = (int(record.states), int(record.arcs))
        if name not in _INPUT_BUILDS:
            self.last = self.sizes[name]
        if name not in self.order:
            return
        following = self.order[self.order.index(name) + 1:]
        stage = next((s for s in following if s not in _INPUT_BUILDS), None)
        if stage is None or any(s in _INPUT_BUILDS and s not in self.sizes
                                for s in following[:following.index(stage)]):
            return  # the next stage's inputs are not all built yet
        if stage in ("compose", "compose-determinize"):
            g, lx = self.sizes.get("grammar"), self.sizes.get("lexicon")
            if g is None or lx is None:
                return
            size = (g[0] + lx[0], g[1] + lx[1])
        elif self.last is None:
            return
        else:
            size = self.last
        need = stage_need(stage, size[0], size[1], current_rss())
        self.checked.append((stage, need))
        if need > self.limit:
            mib = 2**20
            raise StageError(
                stage, f"estimated to need {need / mib:.0f} MiB (its input has "
                f"{size[0]} states and {size[1]} arcs) but the memory limit is "
                f"{self.limit / mib:.0f} MiB; stopped before starting it",
                "raise --max-memory (max_memory in [build]), run 'netbuild size "
                "--project F --predict' to see the expected size, or shrink the model "
                "(prune it or lower its order)")
