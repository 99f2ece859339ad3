"""The command-line interface (click): options -> one library call -> print.

- `cli`: the click group; `main()`: the console-script entry point.

Commands (``netbuild COMMAND --help`` shows every option):

- ``check``: reads every input and lists every problem; exit 0 when no errors
  (warnings alone do not fail), 1 otherwise. ``--json`` prints
  ``{"errors": [{"file", "line", "message"}], "warnings": [...]}``.
- ``build``: compiles the project into ``--out DIR`` (atomically); stage progress on
  stderr, then a stage table on stdout, or the manifest with ``--json``.
- ``stats FILE``: size and properties of an FST file (or of a build directory's graph);
  ``--json`` prints ``{"file", "fst_type"}`` (the stored type) plus the keys of
  `netbuild.inspectors.stats.fst_stats` (``states``, ``arcs``, ...).
- ``size GRAPH_OR_DIR [--budget SIZE]``: bytes on disk and in memory, const and vector
  (per FST of a build directory); ``--json`` prints ``{"states", "arcs", "const":
  {"disk_bytes", "memory_bytes"}, "vector": {...}, "symbols_bytes"}`` (plus
  ``"stages"`` for a directory, ``"budget"`` with ``--budget``); exit 1 when over budget.
  ``size --project F --predict`` predicts the final graph (`netbuild.predict`).
- ``score --graph DIR [SENTENCE...]``: the language-model cost and the graph's best
  path cost of each sentence; ``--json`` prints a list of
  ``{"sentence", "lm_cost", "best_path_cost", "oov"}`` (infinite costs as null).
- ``estimate --text F -o OUT.arpa``: estimates a back-off model from sentences
  (gzip-compressed when OUT ends in .gz); ``--json`` prints
  ``{"output", "order", "counts", "sentences", "vocabulary_size"}``.
- ``prune --lm F --threshold T -o OUT.arpa``: relative-entropy pruning (back-off
  weights recomputed); ``--json`` prints ``{"output", "threshold", "counts_before",
  "counts_after", "protected", "heldout"}``.
- ``fit --budget SIZE --out DIR``: prunes the model until the graph fits the budget
  (within 5% under it) and writes the build, ``model.arpa`` and ``fit.json``;
  ``--json`` prints `netbuild.fit.FitResult.to_json`.
- ``ambiguity (--graph DIR | --project F)``: homophone and prefix groups, auxiliary
  markers and why, and per stage FST the input non-determinism, epsilon ratio and
  out-degrees; ``--json`` keys are listed in docs/diagnostics.md.
- ``draw [--graph DIR] (--word W | --state N | --sentence "...") -o FILE``: a small
  drawing (DOT, SVG, PNG, PDF by the ending); refused above ``--max-states``.
- ``trace WORD (--graph DIR | --project F)``: follows one word through the lexicon,
  the language model, the context map and every graph stage; prints the verdict (a
  cause code), the reason and the fix. ``--json`` keys are listed in docs/diagnostics.md.
- ``replay --graph DIR [--nbest N] [--expect "WORDS"] PHONE...``: the n best word
  sequences the word-level graph gives a phone sequence, with language-model,
  pronunciation and silence costs; ``--json`` keys are listed in docs/diagnostics.md.

Errors are handled in one place (`_Group.main`): netbuild's own errors print a
message without a traceback (an `InputError` one located problem per line) and exit 1,
`CheckFailed` exits 3, usage errors print one line and exit 2, and an interrupt
prints "interrupted; the previous output is untouched" and exits 130.
"""

from __future__ import annotations

import json
import math
import os
import sys
import tempfile
from pathlib import Path
from typing import Any

import click

from . import __version__
from .errors import CheckFailed, Diagnostics, InputError, NetbuildError, Problem
from .project import apply_overrides, parse_size, read_project, require_inputs

EXIT_ERROR = 1
EXIT_USAGE = 2
EXIT_INTERNAL = 3
EXIT_INTERRUPTED = 130
INTERRUPTED = "interrupted; the previous output is untouched"


class _Group(click.Group):
    """The netbuild group: turns errors into messages and exit codes in one place."""

    def main(self, args=None, prog_name=None, complete_var=None,
             standalone_mode=True, **extra):
        if not standalone_mode:
            return super().main(args, prog_name, complete_var, standalone_mode, **extra)
        try:
            rv = super().main(args, prog_name or "netbuild", complete_var,
                              standalone_mode=False, **extra)
        except click.UsageError as err:
            where = err.ctx.command_path if err.ctx is not None else "netbuild"
            msg = " ".join(err.format_message().split())
            click.echo(f"{where}: error: {msg} (see '{where} --help')", err=True)
            sys.exit(EXIT_USAGE)
        except click.ClickException as err:
            err.show()
            sys.exit(err.exit_code)
        except click.Abort:
            # click turns KeyboardInterrupt (and EOF) into Abort.
            click.echo(INTERRUPTED, err=True)
            sys.exit(EXIT_INTERRUPTED)
        except KeyboardInterrupt:
            click.echo(INTERRUPTED, err=True)
            sys.exit(EXIT_INTERRUPTED)
        except CheckFailed as err:
            click.echo(str(err), err=True)
            sys.exit(EXIT_INTERNAL)
        except InputError as err:
            lines = [str(p) for p in err.problems]
            click.echo("\n".join(lines), err=True)
            if len(lines) > 1:
                click.echo(f"{len(lines)} problems found", err=True)
            sys.exit(EXIT_ERROR)
        except NetbuildError as err:
            click.echo(f"error: {err}", err=True)
            sys.exit(EXIT_ERROR)
        except OSError as err:
            where = f"{err.filename}: " if err.filename else ""
            click.echo(f"error: {where}{err.strerror or err}; check the path and "
                       "its permissions", err=True)
            sys.exit(EXIT_ERROR)
        sys.exit(rv if isinstance(rv, int) else 0)


def _size(ctx, param, value):
    if value is None:
        return None
    try:
        return parse_size(value)
    except ValueError as err:
        raise click.BadParameter(str(err), ctx, param) from None


_EXISTING = click.Path(exists=True, dir_okay=False, path_type=Path)


def _input_options(f):
    for option in reversed([
        click.option("--project", "project_file", type=_EXISTING,
                     help="The project file (TOML); flags override its settings."),
        click.option("--lexicon", type=_EXISTING, help="The pronunciation lexicon."),
        click.option("--lm", type=_EXISTING, help="The ARPA language model."),
        click.option("--phones", type=_EXISTING, help="The phone inventory."),
        click.option("--context", type=_EXISTING,
                     help="The context map; when given, the full graph is built."),
    ]):
        f = option(f)
    return f


def _reading_options(f):
    for option in reversed([
        click.option("--layout", type=click.Choice(["plain", "cmudict"]),
                     help="Lexicon layout."),
        click.option("--probabilities/--no-probabilities", default=None,
                     help="The lexicon has a probability column."),
        click.option("--keep-stress/--no-keep-stress", default=None,
                     help="cmudict layout: keep the vowels' stress digits."),
        click.option("--rescale/--no-rescale", default=None,
                     help="Each word's most likely pronunciation costs 0."),
        click.option("--silence-probability", type=click.FloatRange(0.0, 1.0, max_open=True),
                     help="Optional silence between words (0 disables)."),
        click.option("--oov-policy", type=click.Choice(["drop", "unk", "fail"]),
                     help="Model words missing from the lexicon: drop, map to <unk>, fail."),
    ]):
        f = option(f)
    return f


def _build_options(f):
    for option in reversed([
        click.option("--push-weights/--no-push-weights", default=None,
                     help="Log-semiring weight pushing of the word-level graph."),
        click.option("--fst-type", type=click.Choice(["vector", "const"]),
                     help="FST type of the written graph."),
        click.option("--checks/--no-checks", default=None, help="Per-stage checks."),
        click.option("--determinize-max-memory", callback=_size, metavar="SIZE",
                     help="Memory limit of determinization, e.g. 8GiB or 300MiB."),
        click.option("--max-memory", callback=_size, metavar="SIZE",
                     help="Stop before a stage estimated to need more memory than this "
                     "(e.g. 16GiB); also caps --determinize-max-memory."),
        click.option("--determinize-timeout", type=click.FloatRange(0.0, min_open=True),
                     metavar="SECONDS", help="Time limit of determinization."),
        click.option("--final-optimize/--no-final-optimize", default=None,
                     help="Full graph: determinize and minimize H∘C∘L∘G."),
        click.option("--word-graph", type=click.Choice(["tree", "compose"]),
                     help="How det(L∘G) is made: built directly (tree) or by OpenFst "
                     "composition and determinization (compose)."),
        click.option("--transition-scale", type=click.FloatRange(0.0), metavar="X",
                     help="Full graph: scale of the HMM self-loop and exit costs."),
        click.option("--weight-quantum", type=click.FloatRange(0.0), metavar="X",
                     help="Full graph: weights that round to the same multiple of X count "
                     "as equal when minimizing (0: bit for bit; default 1e-4)."),
    ]):
        f = option(f)
    return f


def _project(project_file: Path | None, **flags: Any):
    project = read_project(project_file) if project_file is not None else None
    project = apply_overrides(project, **flags)
    require_inputs(project)
    return project


def _echo_json(data: Any) -> None:
    click.echo(json.dumps(data, indent=2, allow_nan=False))


def _problem_line(p: Problem) -> str:
    if p.severity == "error":
        return str(p)
    where = p.path if p.line is None else f"{p.path}:{p.line}"
    text = f"{where}: warning: {p.message}"
    return f"{text}; {p.hint}" if p.hint else text


def _megabytes(n: int) -> str:
    return f"{n / 2**20:.0f} MiB"


@click.group(name="netbuild", cls=_Group, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="netbuild")
def cli() -> None:
    """Compiles speech-recognition decoding graphs from a lexicon and a language model."""


# --- check ------------------------------------------------------------------------

@cli.command()
@_input_options
@_reading_options
@click.option("--json", "as_json", is_flag=True, help="Print the problems as JSON.")
def check(project_file, as_json, **flags) -> None:
    """Reads every input and lists every problem (exit 1 on any error)."""
    from .workflow import check_inputs

    try:
        diag: Diagnostics = check_inputs(_project(project_file, **flags))
    except InputError as err:  # the project itself is broken: report it the same way
        diag = Diagnostics()
        diag.problems.extend(err.problems)
    if as_json:
        _echo_json({"errors": [p.to_json() for p in diag.errors],
                    "warnings": [p.to_json() for p in diag.warnings]})
    else:
        for p in diag.problems:
            click.echo(_problem_line(p))
        n_err, n_warn = len(diag.errors), len(diag.warnings)
        click.echo(f"{n_err} error(s), {n_warn} warning(s)" if diag.problems
                   else "all inputs are clean", err=True)
    if diag.errors:
        click.get_current_context().exit(EXIT_ERROR)


# --- build ------------------------------------------------------------------------

def _stage_row(name: str, states: Any, arcs: Any, seconds: Any, peak: Any) -> str:
    return f"{name:<19} {states:>10} {arcs:>11} {seconds:>9} {peak:>11}"


@cli.command()
@_input_options
@_reading_options
@_build_options
@click.option("--out", "out_dir", required=True,
              type=click.Path(file_okay=False, path_type=Path),
              help="The output directory (replaced only when the build is complete).")
@click.option("--fast", is_flag=True, help="Skip the per-stage checks (as --no-checks).")
@click.option("--json", "as_json", is_flag=True, help="Print the manifest as JSON.")
def build(project_file, out_dir, fast, as_json, **flags) -> None:
    """Compiles the project into the output directory --out."""
    from .workflow import build as run_build

    if fast:
        flags["checks"] = False
    project = _project(project_file, **flags)

    def progress(record) -> None:
        click.echo(f"{record.name}: {record.states} states, {record.arcs} arcs, "
                   f"{record.seconds:.2f} s, peak {_megabytes(record.peak_rss_bytes)}",
                   err=True)

    result = run_build(project, out_dir, progress)
    for p in result.warnings:
        click.echo(_problem_line(p), err=True)
    if as_json:
        _echo_json(result.manifest)
        return
    click.echo(_stage_row("stage", "states", "arcs", "seconds", "peak"))
    for s in result.manifest["stages"]:
        click.echo(_stage_row(s["name"], s["states"], s["arcs"], f"{s['seconds']:.2f}",
                              _megabytes(s["peak_rss_bytes"])))
    click.echo(f"wrote {out_dir}")


# --- stats ------------------------------------------------------------------------

@cli.command()
@click.argument("file", type=click.Path(exists=True, path_type=Path))
@click.option("--json", "as_json", is_flag=True, help="Print the statistics as JSON.")
def stats(file: Path, as_json: bool) -> None:
    """Prints the size and properties of an FST file (or a build directory's graph)."""
    import pynini
    import pywrapfst

    from .inspectors.stats import format_stats_table, fst_stats
    from .workflow import plain_json, read_fst_file

    stored = read_fst_file(file)
    vector = stored if stored.fst_type() == "vector" else pywrapfst.convert(stored, "vector")
    result = {"file": str(file), "fst_type": stored.fst_type(),
              **fst_stats(pynini.Fst.from_pywrapfst(vector))}
    if as_json:
        _echo_json(plain_json(result))
    else:
        click.echo(format_stats_table(result))


# --- size -------------------------------------------------------------------------

def _bytes_text(n: int) -> str:
    for unit, scale in (("GiB", 2**30), ("MiB", 2**20), ("KiB", 2**10)):
        if abs(n) >= scale:
            return f"{n / scale:.1f} {unit}"
    return f"{n} B"


@cli.command()
@click.argument("target", required=False, type=click.Path(exists=True, path_type=Path))
@click.option("--project", "project_file", type=_EXISTING,
              help="With --predict: the project whose final graph to predict.")
@click.option("--predict", is_flag=True,
              help="Predict the final graph's size from small sub-builds (needs --project).")
@click.option("--budget", callback=_size, metavar="SIZE",
              help="Say whether the graph, loaded in its stored layout, fits this memory "
              "(e.g. 300MiB, 1.5GB); exit 1 when it does not.")
@click.option("--json", "as_json", is_flag=True, help="Print the sizes as JSON.")
def size(target: Path | None, project_file: Path | None, predict: bool,
         budget: int | None, as_json: bool) -> None:
    """Bytes on disk and in memory of a graph file or a build directory (const and
    vector layouts), or, with --project F --predict, the predicted final graph."""
    from .inspectors.size import build_sizes, check_budget, file_size

    if predict:
        if project_file is None or target is not None:
            raise click.UsageError("--predict needs --project FILE and no GRAPH_OR_DIR")
        from .predict import predict_graph_size

        project = _project(project_file)
        prediction = predict_graph_size(project)
        data = prediction.to_json()
        layout = project.options.fst_type
        need = prediction.memory_high[layout]
    else:
        if target is None or project_file is not None:
            raise click.UsageError("give one GRAPH_OR_DIR (or --project FILE --predict)")
        data = build_sizes(target) if target.is_dir() else file_size(target).to_json()
        layout = data.get("fst_type") if data.get("fst_type") in ("const", "vector") \
            else "vector"
        need = data[layout]["memory_bytes"]
    verdict = None
    if budget is not None:
        fits, margin = check_budget(need, budget)
        verdict = {"budget_bytes": budget, "fits": fits, "margin_bytes": margin,
                   "layout": layout}
    if as_json:
        _echo_json({**data, **({"budget": verdict} if verdict else {})})
    else:
        if predict:
            click.echo(f"predicted states {data['states']} "
                       f"({data['states_interval'][0]} .. {data['states_interval'][1]}), "
                       f"arcs {data['arcs']} ({data['arcs_interval'][0]} .. "
                       f"{data['arcs_interval'][1]}) in {data['seconds']:.1f} s")
            rows = [("final graph", data)]
        else:
            rows = [(s["name"], s) for s in data.get("stages", [])] or [(str(target), data)]
        click.echo(f"{'fst':<18} {'states':>10} {'arcs':>11} {'const file':>11} "
                   f"{'const mem':>11} {'vector file':>11} {'vector mem':>11}")
        for name, d in rows:
            click.echo(f"{name:<18} {d['states']:>10} {d['arcs']:>11} "
                       f"{_bytes_text(d['const']['disk_bytes']):>11} "
                       f"{_bytes_text(d['const']['memory_bytes']):>11} "
                       f"{_bytes_text(d['vector']['disk_bytes']):>11} "
                       f"{_bytes_text(d['vector']['memory_bytes']):>11}")
        if verdict is not None:
            what = "the predicted upper end" if predict else "the graph"
            if verdict["fits"]:
                click.echo(f"fits: {what} needs {_bytes_text(need)} loaded as {layout}, "
                           f"{_bytes_text(verdict['margin_bytes'])} under the budget of "
                           f"{_bytes_text(budget)}")
            else:
                click.echo(f"does not fit: {what} needs {_bytes_text(need)} loaded as "
                           f"{layout}, {_bytes_text(-verdict['margin_bytes'])} over the "
                           f"budget of {_bytes_text(budget)}")
    if verdict is not None and not verdict["fits"]:
        click.get_current_context().exit(EXIT_ERROR)


# --- score ------------------------------------------------------------------------

@cli.command()
@click.option("--graph", "graph_dir", required=True,
              type=click.Path(exists=True, file_okay=False, path_type=Path),
              help="A build directory written by 'netbuild build'.")
@click.option("--file", "sentence_file", type=_EXISTING,
              help="Sentences to score, one per line (blank lines are skipped).")
@click.option("--json", "as_json", is_flag=True, help="Print the scores as JSON.")
@click.argument("sentences", nargs=-1)
def score(graph_dir: Path, sentence_file: Path | None, as_json: bool,
          sentences: tuple[str, ...]) -> None:
    """Scores sentences with the model and the graph's best path."""
    from .inspectors.score import score_sentences
    from .workflow import load_build

    texts = list(sentences)
    if sentence_file is not None:
        try:
            data = sentence_file.read_text(encoding="utf-8")
        except UnicodeDecodeError as err:
            raise InputError("the file is not UTF-8 text", "save it as UTF-8",
                             path=str(sentence_file)) from err
        texts += [line.strip() for line in data.splitlines() if line.strip()]
    if not texts:
        raise click.UsageError("no sentences given; pass them as arguments or with --file")
    loaded = load_build(graph_dir)
    results = [r.to_json() for r in score_sentences(loaded.grammar,
                                                     [t.split() for t in texts])]
    if as_json:
        _echo_json(results)
        return
    for r in results:
        oov = f"  (not in the graph: {', '.join(r['oov'])})" if r["oov"] else ""
        click.echo(f"{_cost(r['lm_cost'])}  {_cost(r['best_path_cost'])}  "
                   f"{r['sentence']}{oov}")


def _cost(value: float | None) -> str:
    return f"{'inf':>9}" if value is None or not math.isfinite(value) else f"{value:9.3f}"


# --- estimate ---------------------------------------------------------------------

@cli.command()
@click.option("--text", "text_file", required=True, type=_EXISTING,
              help="Training sentences, one per line.")
@click.option("--order", type=click.IntRange(1, 9), default=3, show_default=True,
              help="The n-gram order.")
@click.option("-o", "--output", required=True, type=click.Path(dir_okay=False, path_type=Path),
              help="The ARPA file to write (atomically).")
@click.option("--unk", is_flag=True, help="Give <unk> a small probability too.")
@click.option("--json", "as_json", is_flag=True, help="Print a summary as JSON.")
def estimate(text_file: Path, order: int, output: Path, unk: bool, as_json: bool) -> None:
    """Estimates a back-off n-gram model from sentences and writes it as ARPA."""
    from .io.arpa import write_arpa
    from .lm.estimate import estimate as run_estimate
    from .lm.estimate import read_sentences

    sentences = read_sentences(text_file)
    model = run_estimate(sentences, order, unk=unk)
    directory = output.absolute().parent
    if not directory.is_dir():
        raise InputError("the output directory does not exist", "create it first",
                         path=str(directory))
    # The temporary name keeps the output's ending: write_arpa compresses '.gz' names.
    fd, tmp = tempfile.mkstemp(prefix=".tmp-", suffix=f".{output.name}", dir=directory)
    os.close(fd)
    try:
        write_arpa(model, tmp)
        os.replace(tmp, output)
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)
    counts = [int(c) for c in model.counts()]
    summary = {"output": str(output), "order": model.max_order, "counts": counts,
               "sentences": len(sentences), "vocabulary_size": len(model.vocab)}
    if as_json:
        _echo_json(summary)
    else:
        grams = ", ".join(f"{c} {k + 1}-grams" for k, c in enumerate(counts))
        click.echo(f"wrote {output}: {grams} from {len(sentences)} sentences")



# --- prune ------------------------------------------------------------------------

def _heldout(path: Path | None):
    if path is None:
        return None
    from .lm.estimate import read_sentences

    return read_sentences(path)


@cli.command()
@click.option("--lm", "lm_file", required=True, type=_EXISTING,
              help="The ARPA model to prune.")
@click.option("--threshold", required=True, type=click.FloatRange(0.0), metavar="T",
              help="Remove n-grams whose relative-entropy change (nats) is below T.")
@click.option("-o", "--output", required=True, type=click.Path(dir_okay=False, path_type=Path),
              help="The pruned ARPA file to write (atomically).")
@click.option("--heldout", "heldout_file", type=_EXISTING,
              help="Sentences, one per line: print the perplexity before and after.")
@click.option("--json", "as_json", is_flag=True, help="Print a summary as JSON.")
def prune(lm_file: Path, threshold: float, output: Path, heldout_file: Path | None,
          as_json: bool) -> None:
    """Prunes a back-off model by relative entropy and writes it as ARPA."""
    from .io.arpa import read_arpa
    from .lm.perplexity import perplexity
    from .lm.prune import prune_model, write_model_atomically

    heldout = _heldout(heldout_file)
    model = read_arpa(lm_file)
    result = prune_model(model, threshold)
    write_model_atomically(result.model, output)
    summary: dict[str, Any] = {
        "output": str(output), "threshold": threshold,
        "counts_before": [int(c) for c in model.counts()],
        "counts_after": [int(c) for c in result.model.counts()],
        "protected": [int(c) for c in result.protected], "heldout": None}
    if heldout is not None:
        before, after = perplexity(model, heldout), perplexity(result.model, heldout)
        summary["heldout"] = {"perplexity_before": before.perplexity,
                              "perplexity_after": after.perplexity,
                              "events": after.events, "oov": after.oov,
                              "oov_policy": after.policy}
    if as_json:
        from .workflow import plain_json

        _echo_json(plain_json(summary))  # an infinite threshold prints as null
        return
    counts = ", ".join(f"{a} -> {b} {k + 1}-grams" for k, (a, b) in enumerate(
        zip(summary["counts_before"], summary["counts_after"] + [0] * model.max_order)))
    click.echo(f"wrote {output}: {counts}")
    if heldout is not None:
        h = summary["heldout"]
        click.echo(f"held-out perplexity {h['perplexity_before']:.3f} -> "
                   f"{h['perplexity_after']:.3f} ({h['events']} events, {h['oov']} unknown "
                   f"words, {h['oov_policy']})")


# --- fit --------------------------------------------------------------------------

@cli.command()
@_input_options
@_reading_options
@click.option("--budget", required=True, callback=_size, metavar="SIZE",
              help="Memory the final graph may take, e.g. 2MiB or 1.5GB.")
@click.option("--heldout", "heldout_file", type=_EXISTING,
              help="Sentences, one per line: record each step's perplexity.")
@click.option("--representation", type=click.Choice(["const", "vector"]), default="const",
              show_default=True, help="The graph layout the budget counts (and written).")
@click.option("--max-builds", type=click.IntRange(2), default=12, show_default=True,
              help="Real builds the search may run.")
@click.option("--predict/--no-predict", default=True, show_default=True,
              help="Size the unpruned graph by prediction instead of building it.")
@click.option("--out", "out_dir", required=True,
              type=click.Path(file_okay=False, path_type=Path),
              help="The output directory (replaced only when the fit is complete).")
@click.option("--json", "as_json", is_flag=True, help="Print the fit table as JSON.")
def fit(project_file, budget, heldout_file, representation, max_builds, predict, out_dir,
        as_json, **flags) -> None:
    """Prunes the model so the graph fits --budget (within 5% under it) and builds it."""
    from .fit import fit as run_fit
    from .fit import format_fit_table

    project = _project(project_file, **flags)
    heldout = _heldout(heldout_file)

    def progress(step) -> None:
        th = "unigram" if math.isinf(step.threshold) else f"{step.threshold:.3e}"
        size = (f"{step.actual_bytes} bytes" if step.actual_bytes is not None
                else f"predicted {step.predicted_bytes} bytes (not built)")
        click.echo(f"threshold {th}: {step.ngrams} n-grams, {size}", err=True)

    result = run_fit(project, budget, out_dir, heldout=heldout,
                     representation=representation, max_builds=max_builds,
                     predict=predict, progress=progress)
    if as_json:
        _echo_json(result.to_json())
        return
    click.echo(format_fit_table(result))
    if not result.within_tolerance and not result.unpruned:
        click.echo("warning: no threshold gave a graph within 5% under the budget; kept "
                   "the largest graph that fits (raise --max-builds to search longer)",
                   err=True)
    click.echo(f"wrote {out_dir}")


# --- ambiguity --------------------------------------------------------------------

@cli.command()
@click.option("--graph", "graph_dir", type=click.Path(file_okay=False, path_type=Path),
              help="A build directory written by 'netbuild build'.")
@click.option("--project", "project_file", type=_EXISTING,
              help="A project file: inspect its lexicon and G, L and L∘G (no determinization).")
@click.option("--json", "as_json", is_flag=True, help="Print the report as JSON.")
def ambiguity(graph_dir: Path | None, project_file: Path | None, as_json: bool) -> None:
    """Lists homophones, prefix pronunciations, markers and non-deterministic states."""
    from .inspectors.ambiguity import (format_report, graph_ambiguity, project_ambiguity,
                                       report_to_json)
    from .workflow import plain_json

    if (graph_dir is None) == (project_file is None):
        raise click.UsageError("give exactly one of --graph DIR or --project FILE")
    report = (graph_ambiguity(graph_dir) if graph_dir is not None
              else project_ambiguity(_project(project_file)))
    if as_json:
        _echo_json(plain_json(report_to_json(report)))
    else:
        click.echo(format_report(report))


# --- draw -------------------------------------------------------------------------

@cli.command()
@click.option("--graph", "graph_dir", default=".", show_default=True,
              type=click.Path(file_okay=False, path_type=Path),
              help="A build directory written by 'netbuild build'.")
@click.option("--word", help="Draw the arcs that output this word and the states around them.")
@click.option("--state", type=click.IntRange(min=0), help="Draw the states around this state.")
@click.option("--sentence", help="Draw the best path of these words (space-separated).")
@click.option("--depth", type=click.IntRange(min=0),
              help="States this many arcs around (default 1, or 0 with --sentence).")
@click.option("--stage", help="The stage FST to draw from, by its manifest name "
              "(default graph, or grammar with --sentence).")
@click.option("--max-states", type=click.IntRange(min=1), default=200, show_default=True,
              help="Refuse drawings with more states than this.")
@click.option("-o", "--output", required=True, type=click.Path(dir_okay=False, path_type=Path),
              help="The drawing: .dot/.gv (DOT), .svg, .png or .pdf (needs graphviz's dot).")
def draw(graph_dir: Path, word: str | None, state: int | None, sentence: str | None,
         depth: int | None, stage: str | None, max_states: int, output: Path) -> None:
    """Draws a small part of a graph: around a word or a state, or along a sentence."""
    from .inspectors.draw import draw as run_draw

    if sum(x is not None for x in (word, state, sentence)) != 1:
        raise click.UsageError("give exactly one of --word, --state or --sentence")
    words = None if sentence is None else sentence.split()
    result = run_draw(graph_dir, output, word=word, state=state, sentence=words,
                      depth=depth, stage=stage, max_states=max_states)
    if result.note:
        click.echo(f"warning: {result.note}", err=True)
    click.echo(f"wrote {result.path} ({result.states} states, {result.arcs} arcs)")


# --- trace ------------------------------------------------------------------------

@cli.command()
@click.argument("word")
@click.option("--graph", "graph_dir", type=click.Path(file_okay=False, path_type=Path),
              help="A build directory written by 'netbuild build'.")
@click.option("--project", "project_file", type=_EXISTING,
              help="A project file: read its inputs and build the word-level graph in memory.")
@click.option("--json", "as_json", is_flag=True, help="Print the trace as JSON.")
def trace(word: str, graph_dir: Path | None, project_file: Path | None,
          as_json: bool) -> None:
    """Follows WORD through every input and stage and says where it is lost and why."""
    from .inspectors.trace import format_trace, trace_build, trace_project

    if (graph_dir is None) == (project_file is None):
        raise click.UsageError("give exactly one of --graph DIR or --project FILE")
    if not word.strip() or len(word.split()) != 1:
        raise click.UsageError(f"WORD must be one word, not {word!r}")
    result = (trace_build(word, graph_dir) if graph_dir is not None
              else trace_project(word, _project(project_file)))
    if as_json:
        _echo_json(result.to_json())
    else:
        for w in result.warnings:
            click.echo(f"warning: {w}", err=True)
        click.echo(format_trace(result))


# --- replay -----------------------------------------------------------------------

@cli.command()
@click.option("--graph", "graph_dir", required=True,
              type=click.Path(file_okay=False, path_type=Path),
              help="A build directory written by 'netbuild build'.")
@click.option("--nbest", type=click.IntRange(min=1), default=5, show_default=True,
              help="How many distinct word sequences to show.")
@click.option("--expect", help="Words expected for the phones (space-separated): "
              "show their cost and the winner's margin.")
@click.option("--max-words", type=click.IntRange(min=1),
              help="Keep only hypotheses of at most this many words.")
@click.option("--json", "as_json", is_flag=True, help="Print the result as JSON.")
@click.argument("phones", nargs=-1)
def replay(graph_dir: Path, nbest: int, expect: str | None, max_words: int | None,
           as_json: bool, phones: tuple[str, ...]) -> None:
    """Decodes PHONES through the word-level graph and prints the n best word sequences."""
    from .errors import SymbolError
    from .inspectors.replay import replay_build

    if not phones:
        raise click.UsageError("no phones given; pass them as arguments, e.g. k a b i n")
    expected = None if expect is None else expect.split()
    if expected is not None and not expected:
        raise click.UsageError("--expect needs at least one word")
    try:
        result = replay_build(graph_dir, list(phones), nbest, expected, max_words)
    except SymbolError as err:
        if err.path != "PHONES":
            raise
        raise click.UsageError(str(err.message) + (f"; {err.hint}" if err.hint else "")
                               ) from None
    if as_json:
        _echo_json(result.to_json())
        return
    click.echo(f"{'total':>9} {'lm':>9} {'pron':>9} {'silence':>9}  words")
    for h in result.hypotheses:
        click.echo(f"{_cost(h.total)} {_cost(h.lm)} {_cost(h.pronunciation)} "
                   f"{_cost(h.silence)}  {' '.join(h.words)}")
    if not result.hypotheses:
        click.echo("no word sequence of the graph produces these phones")
    if result.expect is not None:
        if result.expected is None:
            click.echo(f"expected '{' '.join(result.expect)}': {result.reason}")
        else:
            h = result.expected
            margin = result.margin if result.margin is not None else math.inf
            verdict = ("it is the best hypothesis" if margin <= 1e-3 or
                       result.hypotheses[0].words == h.words
                       else f"the winner beats it by {margin:.3f}")
            click.echo(f"expected '{' '.join(h.words)}': total {h.total:.3f} (lm "
                       f"{h.lm:.3f}, pron {h.pronunciation:.3f}, silence {h.silence:.3f}); "
                       f"{verdict}")


def main() -> None:
    """Runs the command line (the `netbuild` console script)."""
    cli.main(prog_name="netbuild")


if __name__ == "__main__":  # pragma: no cover
    main()
