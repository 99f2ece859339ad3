"""Fitting a decoding graph into a memory budget by pruning its language model.

- `FitStep`: one evaluated pruning threshold (a row of the fit table).
- `FitResult`: what `fit` wrote and the table of every step.
- `fit(project, budget, out_dir, ...)`: prunes the project's model by relative entropy,
  searching the threshold so the final graph fits `budget` and lies within
  `tolerance` (5 %) under it; writes the chosen build.
- `graph_bytes(build_dir, representation)`: the in-memory bytes of a build's graph.
- `format_fit_table(result)`: the table as text.

The budget counts the final graph's in-memory bytes in the chosen representation
(`netbuild.inspectors.size`: const ``20 S + 16 A`` plus the attached symbol tables,
vector as documented there); the graph file is written in that representation.

Search. The pruning criteria are computed once (`netbuild.lm.prune`). The unigram
model (every n-gram of order >= 2 removed) is built first: if its graph does not fit,
no threshold can help and the error names the smallest reachable size. The unpruned
model's graph is then sized by `netbuild.predict.predict_graph_size` (sub-builds, no
full build); it is built for real only when the low end of the prediction fits the
budget, and if it fits nothing is pruned. In between, the threshold is found by
bisection on log10(threshold) against a size estimate aiming at the middle of the
window ``[budget (1 - tolerance), budget]``. The estimate follows the growth law of
`netbuild.predict` -- the final graph grows with G's arcs as
``y - y0 = b (x - x0)^p`` above the unigram build (x0, y0) -- through the two ends of
the current bracket (G is built for each probed threshold, which is cheap). The
chosen threshold is built for real, the bracket narrows to the measured side, and
the search repeats until a real build lands in the window, no n-gram set lies
strictly inside the bracket, or `max_builds` builds ran. When the window cannot be
hit, the largest built graph under the budget is kept and
`FitResult.within_tolerance` is False.

Output directory (atomic, as `netbuild.workflow.build`'s): the chosen build's files
(so every command that takes a build directory accepts it), plus::

    model.arpa      the pruned model (its path is the manifest's "inputs"/"lm")
    fit.json        {"budget", "representation", "tolerance", "threshold",
                     "graph_bytes", "within_tolerance", "unpruned", "heldout", "steps": [
                     {"threshold", "ngrams", "counts", "predicted_bytes",
                      "actual_bytes", "perplexity"}]}

Thresholds are in nats (the criterion of `netbuild.lm.prune`); ``inf`` (JSON null)
stands for the unigram model.
"""

from __future__ import annotations

import dataclasses
import json
import math
import os
import shutil
import tempfile
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any, Literal

import numpy as np

from .builders.grammar import build_grammar
from .builders.vocabulary import restrict_vocabulary
from .errors import Diagnostics, ProjectError
from .inspectors.size import file_size
from .io.arpa import ArpaModel
from .lm.perplexity import perplexity
from .lm.prune import PruneResult, prune_model, pruning_criteria, write_model_atomically
from .lm.query import BackoffScorer
from .pipeline import num_arcs
from .predict import predict_graph_size
from .project import Project, require_inputs
from .workflow import (MANIFEST, atomic_directory, build, check_out_dir, plain_json,
                       read_inputs)

__all__ = ["FitResult", "FitStep", "Representation", "fit", "format_fit_table",
           "graph_bytes"]

Representation = Literal["const", "vector"]
MODEL_FILE = "model.arpa"
FIT_FILE = "fit.json"
_BISECTION_STEPS = 60


@dataclasses.dataclass(frozen=True)
class FitStep:
    """One evaluated threshold: n-grams kept (all orders, and per order), the size
    predicted before building (None for the two end points), the measured size (None
    when not built) and the held-out perplexity (None without held-out text)."""

    threshold: float
    ngrams: int
    counts: tuple[int, ...]
    predicted_bytes: int | None
    actual_bytes: int | None
    perplexity: float | None

    def to_json(self) -> dict[str, Any]:
        return plain_json(dataclasses.asdict(self))


@dataclasses.dataclass
class FitResult:
    """The written directory, the chosen step and every step in evaluation order."""

    out_dir: Path
    budget: int
    representation: str
    tolerance: float
    chosen: FitStep
    steps: list[FitStep]
    within_tolerance: bool
    manifest: dict[str, Any]

    @property
    def unpruned(self) -> bool:
        """True when the unpruned model's graph fits and nothing was pruned."""
        return self.chosen.threshold == 0.0

    def to_json(self) -> dict[str, Any]:
        return {"out_dir": str(self.out_dir), "budget": self.budget,
                "representation": self.representation, "tolerance": self.tolerance,
                "threshold": plain_json(self.chosen.threshold),
                "graph_bytes": self.chosen.actual_bytes,
                "within_tolerance": self.within_tolerance, "unpruned": self.unpruned,
                "steps": [s.to_json() for s in self.steps]}


def graph_bytes(build_dir: str | os.PathLike, representation: Representation = "const"
                ) -> int:
    """Returns the in-memory bytes of the graph of a build directory, as `representation`."""
    d = Path(build_dir)
    manifest = json.loads((d / MANIFEST).read_text(encoding="utf-8"))
    report = file_size(d / manifest["graph"])
    return int(getattr(report, representation).memory_bytes)


@dataclasses.dataclass
class _Built:
    step: FitStep
    result: PruneResult
    directory: Path | None  # None: predicted, not built
    grammar_arcs: int


class _Search:
    """Builds candidates in a scratch directory and keeps their measurements."""

    def __init__(self, project: Project, model: ArpaModel, words: set[str],
                 representation: Representation, scratch: Path,
                 heldout: Sequence[Sequence[str]] | None,
                 progress: Callable[[FitStep], None] | None) -> None:
        self.project = project
        self.model = model
        self.words = words
        self.criteria = pruning_criteria(model)
        self.representation = representation
        self.scratch = scratch
        self.heldout = heldout
        self.progress = progress
        self.steps: list[FitStep] = []
        self.built: list[_Built] = []
        self._pruned: dict[float, PruneResult] = {}
        self._grammar_arcs: dict[int, int] = {}

    def prune(self, threshold: float) -> PruneResult:
        if threshold not in self._pruned:
            self._pruned[threshold] = prune_model(self.model, threshold, self.criteria)
        return self._pruned[threshold]

    def grammar_arcs(self, pruned: PruneResult) -> int:
        """Arcs of G for the pruned model (the kept sets are nested, so the n-gram
        count identifies the set)."""
        key = pruned.ngrams
        if key not in self._grammar_arcs:
            restricted, _ = restrict_vocabulary(pruned.model, self.words,
                                                self.project.options.grammar.oov_policy)
            self._grammar_arcs[key] = num_arcs(build_grammar(restricted).fst)
        return self._grammar_arcs[key]

    def _perplexity(self, pruned: PruneResult) -> float | None:
        if self.heldout is None:
            return None
        return perplexity(BackoffScorer(pruned.model), self.heldout).perplexity

    def _record(self, built: _Built) -> _Built:
        self.steps.append(built.step)
        if self.progress is not None:
            self.progress(built.step)
        return built

    def predicted_only(self, threshold: float, predicted: int) -> _Built:
        """A step that is predicted, not built (the unpruned model far over budget)."""
        pruned = self.prune(threshold)
        step = FitStep(float(threshold), pruned.ngrams, tuple(pruned.counts_after),
                       predicted, None, self._perplexity(pruned))
        return self._record(_Built(step, pruned, None, self.grammar_arcs(pruned)))

    def evaluate(self, threshold: float, predicted: int | None) -> _Built:
        pruned = self.prune(threshold)
        index = len(self.built)
        lm = self.scratch / f"candidate-{index}.arpa"
        write_model_atomically(pruned.model, lm)
        out = self.scratch / f"build-{index}"
        opts = dataclasses.replace(self.project.options, fst_type=self.representation)
        build(dataclasses.replace(self.project, lm=lm, options=opts), out)
        step = FitStep(float(threshold), pruned.ngrams, tuple(pruned.counts_after),
                       predicted, graph_bytes(out, self.representation),
                       self._perplexity(pruned))
        built = _Built(step, pruned, out, self.grammar_arcs(pruned))
        self.built.append(built)
        return self._record(built)


def _threshold_range(criteria: list[np.ndarray]) -> tuple[float, float]:
    """log10 bounds that bracket every finite positive criterion."""
    values = np.concatenate([c[np.isfinite(c) & (c > 0)] for c in criteria[1:]] or
                            [np.zeros(0)])
    if values.size == 0:
        return -12.0, 0.0
    return float(np.log10(values.min())) - 0.5, float(np.log10(values.max())) + 0.5


def _bytes(b: _Built) -> float:
    """The measured size of a step, or its prediction when it was not built."""
    size = b.step.actual_bytes if b.step.actual_bytes is not None else b.step.predicted_bytes
    assert size is not None
    return float(size)


def _power_law(base: _Built, lo: _Built, hi: _Built, x: float) -> float:
    """The graph size at G arcs `x`, on the curve size - y0 = b (x - x0)^p through the
    bracket's ends (x0, y0: the unigram build); linear when `hi` is the unigram build."""
    x0, y0 = base.grammar_arcs, _bytes(base)
    if x <= x0:
        return y0
    dx_lo, dy_lo = lo.grammar_arcs - x0, _bytes(lo) - y0
    if dx_lo <= 0 or dy_lo <= 0:
        return y0
    dx_hi, dy_hi = hi.grammar_arcs - x0, _bytes(hi) - y0
    if hi is base or dx_hi <= 0 or dy_hi <= 0 or dx_hi == dx_lo:
        return y0 + dy_lo * (x - x0) / dx_lo
    p = math.log(dy_lo / dy_hi) / math.log(dx_lo / dx_hi)
    return y0 + dy_hi * math.exp(p * (math.log(x - x0) - math.log(dx_hi)))


def fit(project: Project, budget: int, out_dir: str | os.PathLike, *,
        heldout: Sequence[Sequence[str]] | None = None,
        representation: Representation = "const", tolerance: float = 0.05,
        max_builds: int = 12, predict: bool = True,
        progress: Callable[[FitStep], None] | None = None) -> FitResult:
    """Prunes the project's model so its graph fits `budget` bytes (see the module docstring).

    Args:
      project: inputs and build options (the graph is written as `representation`).
      budget: the in-memory bytes the final graph may take.
      out_dir: the output directory, replaced atomically when the fit is complete.
      heldout: tokenised sentences; each step's perplexity on them is recorded.
      representation: "const" or "vector", the layout the budget counts.
      tolerance: the fraction under the budget the graph may stay (0.05: within 5 %).
      max_builds: real builds allowed, the unigram one included.
      predict: size the unpruned graph with `netbuild.predict.predict_graph_size`
        and build it only when it may fit; False builds it.
      progress: called with each step.

    Returns:
      A `FitResult`.

    Raises:
      ProjectError: a bad argument, or a budget below the unigram model's graph
        (the message gives that smallest reachable size).
      InputError, StageError: as `netbuild.workflow.build`.
    """
    if representation not in ("const", "vector"):
        raise ProjectError(f"unknown representation '{representation}'",
                           "use const or vector", path="--representation")
    if budget <= 0:
        raise ProjectError(f"budget {budget} is not a positive number of bytes",
                           "give a size such as 2MiB", path="--budget")
    if not 0.0 < tolerance < 1.0:
        raise ProjectError(f"tolerance {tolerance} is not between 0 and 1",
                           "give e.g. 0.05", path="--tolerance")
    if max_builds < 2:
        raise ProjectError(f"max_builds {max_builds} is below 2",
                           "allow at least 2 builds", path="--max-builds")
    require_inputs(project)
    out = check_out_dir(out_dir)
    diag = Diagnostics()
    inputs = read_inputs(project, diag)  # every input problem before any work
    diag.raise_if_errors()
    assert inputs is not None
    out.parent.mkdir(parents=True, exist_ok=True)
    scratch = Path(tempfile.mkdtemp(prefix=f".{out.name}.fit-", dir=out.parent))
    try:
        search = _Search(project, inputs.model, set(inputs.lexicon.words()),
                         representation, scratch, heldout, progress)
        chosen, within = _find(search, budget, tolerance, max_builds, predict)
        return _publish(search, chosen, within, out, budget, tolerance)
    finally:
        shutil.rmtree(scratch, ignore_errors=True)


def _find(search: _Search, budget: int, tolerance: float, max_builds: int,
          predict: bool) -> tuple[_Built, bool]:
    floor = budget * (1.0 - tolerance)
    smallest = search.evaluate(math.inf, None)  # the cheapest build first
    if _bytes(smallest) > budget:
        need = int(_bytes(smallest))
        raise ProjectError(
            f"budget of {budget} bytes is below the smallest graph pruning can reach: "
            f"the unigram model's graph takes {need} bytes ({need / 2**20:.2f} MiB, "
            f"{search.representation})",
            f"give --budget {need} or more, or shrink the lexicon or the context map",
            path="--budget")
    full: _Built | None = None
    if predict:
        prediction = predict_graph_size(search.project)
        guess = prediction.memory_bytes[search.representation]
        if prediction.memory_low[search.representation] > budget:
            full = search.predicted_only(0.0, guess)
    if full is None:
        full = search.evaluate(0.0, guess if predict else None)
        if _bytes(full) <= budget:
            return full, _bytes(full) >= floor
    if _bytes(smallest) >= floor:
        return smallest, True
    lo, hi = full, smallest  # lo: over the budget; hi: under it, below the window
    lo_log, hi_log = _threshold_range(search.criteria)
    target = budget * (1.0 - tolerance / 2.0)
    while len(search.built) < max_builds:
        def size(threshold: float) -> float:
            x = search.grammar_arcs(search.prune(threshold))
            return _power_law(smallest, lo, hi, x)

        a = lo_log if lo.step.threshold <= 0 else math.log10(lo.step.threshold)
        b = hi_log if math.isinf(hi.step.threshold) else math.log10(hi.step.threshold)
        for _ in range(_BISECTION_STEPS):
            mid = 0.5 * (a + b)
            if size(10.0 ** mid) > target:
                a = mid
            else:
                b = mid
            if search.prune(10.0 ** a).ngrams - search.prune(10.0 ** b).ngrams <= 1:
                break
        ends = (lo.step.ngrams, hi.step.ngrams)
        threshold = next((10.0 ** t for t in (b, a)
                          if search.prune(10.0 ** t).ngrams not in ends), None)
        if threshold is None:
            break  # no n-gram set lies strictly between the bracket's ends
        cand = search.evaluate(threshold, int(round(size(threshold))))
        if floor <= _bytes(cand) <= budget:
            return cand, True
        if _bytes(cand) > budget:
            lo = cand
        else:
            hi = cand
    return hi, False


def _publish(search: _Search, chosen: _Built, within: bool, out: Path, budget: int,
             tolerance: float) -> FitResult:
    final_lm = out / MODEL_FILE
    assert chosen.directory is not None  # only built steps are chosen
    with atomic_directory(out) as tmp:
        for entry in chosen.directory.iterdir():
            os.replace(entry, tmp / entry.name)
        write_model_atomically(chosen.result.model, tmp / MODEL_FILE)
        manifest = json.loads((tmp / MANIFEST).read_text(encoding="utf-8"))
        manifest["inputs"]["lm"]["path"] = str(final_lm)
        (tmp / MANIFEST).write_text(json.dumps(manifest, indent=2) + "\n", encoding="utf-8")
        result = FitResult(out, int(budget), search.representation, tolerance, chosen.step,
                           list(search.steps), within, manifest)
        data = result.to_json()
        del data["out_dir"]
        data["heldout"] = search.heldout is not None
        (tmp / FIT_FILE).write_text(json.dumps(data, indent=2, allow_nan=False) + "\n",
                                    encoding="utf-8")
    return result


def format_fit_table(result: FitResult) -> str:
    """Returns the fit table: one line per step, the chosen one marked with '*'."""
    lines = [f"  {'threshold':>11} {'n-grams':>9} {'predicted':>12} {'actual':>12} "
             f"{'perplexity':>10}"]
    for s in result.steps:
        mark = "*" if s == result.chosen else " "
        th = "unigram" if math.isinf(s.threshold) else f"{s.threshold:.3e}"
        pred = "-" if s.predicted_bytes is None else str(s.predicted_bytes)
        act = "-" if s.actual_bytes is None else str(s.actual_bytes)
        ppl = "-" if s.perplexity is None else f"{s.perplexity:.2f}"
        lines.append(f"{mark} {th:>11} {s.ngrams:>9} {pred:>12} {act:>12} {ppl:>10}")
    size = result.chosen.actual_bytes or 0
    under = (result.budget - size) / result.budget * 100.0
    if result.within_tolerance:
        verdict = f"within {result.tolerance:.0%}"
    elif result.unpruned:
        verdict = "the unpruned model fits, nothing was pruned"
    else:
        verdict = f"NOT within {result.tolerance:.0%}, the largest graph that fits"
    lines.append(f"graph {size} bytes ({result.representation}), {under:.1f}% under the "
                 f"budget of {result.budget} bytes: {verdict}")
    return "\n".join(lines)
