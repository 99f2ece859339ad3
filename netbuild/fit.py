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
model (every n-gram of order >= 2 removed) and the unpruned model are built first:
if the unigram graph does not fit, no threshold can help and the error names the
smallest reachable size; if the unpruned graph fits, nothing is pruned. Between them the
threshold is found by bisection on log10(threshold) against a size prediction aiming
at the middle of the window ``[budget (1 - tolerance), budget]``; the predicted
threshold is then built for real, the bracket narrows to the measured side, and the
search repeats until a real build lands in the window, the bracket cannot be split
further (two neighbouring n-gram sets), or `max_builds` builds ran. The prediction
is `predictor(model)` when one is given (calibrated by the ratio of the measured to
the predicted size of the nearest built candidate), otherwise a line through the two
bracketing builds' (n-grams, bytes) points. When the window cannot be hit, the
largest graph under the budget is kept and `FitResult.within_tolerance` is False.

Output directory (atomic, as `netbuild.workflow.build`'s): the chosen build's files
(so every command that takes a build directory accepts it), plus::

    model.arpa      the pruned model (its path is the manifest's "inputs"/"lm")
    fit.json        {"budget", "representation", "tolerance", "threshold",
                     "graph_bytes", "within_tolerance", "heldout", "steps": [
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

from .errors import ProjectError
from .inspectors.size import file_size
from .io.arpa import ArpaModel, read_arpa
from .lm.perplexity import perplexity
from .lm.prune import PruneResult, prune_model, pruning_criteria, write_model_atomically
from .lm.query import BackoffScorer
from .project import Project, require_inputs
from .workflow import MANIFEST, atomic_directory, build, check_out_dir, plain_json

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

    def to_json(self) -> dict[str, Any]:
        return {"out_dir": str(self.out_dir), "budget": self.budget,
                "representation": self.representation, "tolerance": self.tolerance,
                "threshold": plain_json(self.chosen.threshold),
                "graph_bytes": self.chosen.actual_bytes,
                "within_tolerance": self.within_tolerance,
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
    directory: Path


class _Search:
    """Builds candidates in a scratch directory and keeps their measurements."""

    def __init__(self, project: Project, model: ArpaModel, representation: Representation,
                 scratch: Path, heldout: Sequence[Sequence[str]] | None,
                 progress: Callable[[FitStep], None] | None) -> None:
        self.project = project
        self.model = model
        self.criteria = pruning_criteria(model)
        self.representation = representation
        self.scratch = scratch
        self.heldout = heldout
        self.progress = progress
        self.steps: list[FitStep] = []
        self.built: list[_Built] = []
        self._pruned: dict[float, PruneResult] = {}

    def prune(self, threshold: float) -> PruneResult:
        if threshold not in self._pruned:
            self._pruned[threshold] = prune_model(self.model, threshold, self.criteria)
        return self._pruned[threshold]

    def evaluate(self, threshold: float, predicted: int | None) -> _Built:
        pruned = self.prune(threshold)
        for b in self.built:  # the same n-gram set was built already
            if b.result.counts_after == pruned.counts_after and \
                    all((k1 == k2).all() for k1, k2 in zip(b.result.kept, pruned.kept)):
                return b
        index = len(self.built)
        lm = self.scratch / f"candidate-{index}.arpa"
        write_model_atomically(pruned.model, lm)
        out = self.scratch / f"build-{index}"
        opts = dataclasses.replace(self.project.options, fst_type=self.representation)
        build(dataclasses.replace(self.project, lm=lm, options=opts), out)
        ppl = None
        if self.heldout is not None:
            ppl = perplexity(BackoffScorer(pruned.model), self.heldout).perplexity
        step = FitStep(float(threshold), pruned.ngrams, tuple(pruned.counts_after),
                       predicted, graph_bytes(out, self.representation), ppl)
        self.steps.append(step)
        if self.progress is not None:
            self.progress(step)
        built = _Built(step, pruned, out)
        self.built.append(built)
        return built


def _threshold_range(criteria: list[np.ndarray]) -> tuple[float, float]:
    """log10 bounds that bracket every finite positive criterion."""
    values = np.concatenate([c[np.isfinite(c) & (c > 0)] for c in criteria[1:]] or
                            [np.zeros(0)])
    if values.size == 0:
        return -12.0, 0.0
    return float(np.log10(values.min())) - 0.5, float(np.log10(values.max())) + 0.5


def fit(project: Project, budget: int, out_dir: str | os.PathLike, *,
        heldout: Sequence[Sequence[str]] | None = None,
        representation: Representation = "const", tolerance: float = 0.05,
        max_builds: int = 12, predictor: Callable[[ArpaModel], int] | None = None,
        progress: Callable[[FitStep], None] | None = None) -> FitResult:
    """Prunes the project's model so its graph fits `budget` bytes (see the module docstring).

    Args:
      project: inputs and build options (the graph is written as `representation`).
      budget: the in-memory bytes the final graph may take.
      out_dir: the output directory, replaced atomically when the fit is complete.
      heldout: tokenised sentences; each step's perplexity on them is recorded.
      representation: "const" or "vector", the layout the budget counts.
      tolerance: the fraction under the budget the graph may stay (0.05: within 5 %).
      max_builds: real builds allowed, the two end points included.
      predictor: a size prediction of the graph of a model (bytes), optional.
      progress: called with each built step.

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
    require_inputs(project)
    out = check_out_dir(out_dir)
    assert project.lm is not None
    model = read_arpa(project.lm)
    out.parent.mkdir(parents=True, exist_ok=True)
    scratch = Path(tempfile.mkdtemp(prefix=f".{out.name}.fit-", dir=out.parent))
    try:
        search = _Search(project, model, representation, scratch, heldout, progress)
        chosen, within = _find(search, budget, tolerance, max_builds, predictor)
        return _publish(search, chosen, within, out, budget, tolerance)
    finally:
        shutil.rmtree(scratch, ignore_errors=True)


def _find(search: _Search, budget: int, tolerance: float, max_builds: int,
          predictor: Callable[[ArpaModel], int] | None) -> tuple[_Built, bool]:
    floor = budget * (1.0 - tolerance)
    smallest = search.evaluate(math.inf, None)  # the cheapest build first
    if smallest.step.actual_bytes > budget:
        need = smallest.step.actual_bytes
        raise ProjectError(
            f"budget of {budget} bytes is below the smallest graph pruning can reach: "
            f"the unigram model's graph takes {need} bytes ({need / 2**20:.2f} MiB, "
            f"{search.representation})",
            f"give --budget {need} or more, or shrink the lexicon or the context map",
            path="--budget")
    full = search.evaluate(0.0, None)
    if full.step.actual_bytes <= budget:
        return full, full.step.actual_bytes >= floor
    if smallest.step.actual_bytes >= floor:
        return smallest, True
    lo, hi = full, smallest  # lo: over the budget; hi: under it, below the window
    lo_log, hi_log = _threshold_range(search.criteria)
    target = budget * (1.0 - tolerance / 2.0)
    while len(search.built) < max_builds:
        def predict(threshold: float) -> float:
            pruned = search.prune(threshold)
            if predictor is not None:
                guess = float(predictor(pruned.model))
                near = min((lo, hi), key=lambda b: abs(b.step.ngrams - pruned.ngrams))
                scale = near.step.actual_bytes / max(float(predictor(near.result.model)), 1.0)
                return guess * scale
            span = lo.step.ngrams - hi.step.ngrams
            frac = (pruned.ngrams - hi.step.ngrams) / span if span else 0.0
            return hi.step.actual_bytes + frac * (lo.step.actual_bytes - hi.step.actual_bytes)

        a = lo_log if lo.step.threshold <= 0 else math.log10(lo.step.threshold)
        b = hi_log if math.isinf(hi.step.threshold) else math.log10(hi.step.threshold)
        for _ in range(_BISECTION_STEPS):
            mid = 0.5 * (a + b)
            if predict(10.0 ** mid) > target:
                a = mid
            else:
                b = mid
        threshold = 10.0 ** b  # the side predicted under the target
        pruned = search.prune(threshold)
        if pruned.ngrams in (lo.step.ngrams, hi.step.ngrams):
            threshold = 10.0 ** a
            pruned = search.prune(threshold)
            if pruned.ngrams in (lo.step.ngrams, hi.step.ngrams):
                break  # no n-gram set lies strictly between the bracket's ends
        cand = search.evaluate(threshold, int(round(predict(threshold))))
        size = cand.step.actual_bytes
        if floor <= size <= budget:
            return cand, True
        if size > budget:
            lo = cand
        else:
            hi = cand
    return hi, False


def _publish(search: _Search, chosen: _Built, within: bool, out: Path, budget: int,
             tolerance: float) -> FitResult:
    final_lm = out / MODEL_FILE
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
    verdict = ("within" if result.within_tolerance else "NOT within")
    lines.append(f"graph {size} bytes ({result.representation}), {under:.1f}% under the "
                 f"budget of {result.budget} bytes: {verdict} {result.tolerance:.0%}")
    return "\n".join(lines)
