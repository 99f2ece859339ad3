"""Benchmark harness: ARPA -> G throughput and memory, and the word-level graph's stages.

- `main(argv)`: generates the synthetic inputs when missing (bench/synth.py), runs every
  measurement in a fresh child process, prints a Markdown table and writes
  ``bench/out/results.json`` and ``bench/out/results.md``.
- `measure(kind, params)`: runs one measurement in a child process and returns its record.

Measurements (``--only`` picks some; each runs ``--repeat`` times, one after another):

- ``baseline``: a child that only imports numpy, pynini and netbuild; its peak RSS is
  the fixed cost every other child pays before doing any work.
- ``arpa_g``: `read_arpa` + `build_grammar` on the 1M and 5M n-gram models.
- ``wordgraph``: read the phones, lexicon and model, build G and L, then
  `build_word_graph` (the pipeline's own per-stage `StageRecord`s), with checks on
  (the default) and off (``checks=False``).
- ``workflow``: `netbuild.workflow.build` from a project file (reads, builds, writes the
  output directory).
- ``fullgraph``: `netbuild.workflow.build` of a full-graph project (the synthetic
  triphone map of bench/synth_context.py) on the 5k / 200k and 20k / 1M sets: every
  `StageRecord`, the final graph's size in states, arcs and bytes (vector and const
  files), and the ratio of final arcs to G arcs. On 20k / 1M also with checks off and
  with ``final_optimize = false``.
- ``baseline_full``: the straightforward construction of bench/baseline_full.py
  (plain pynini calls, a Python self-loop loop) on the same inputs.

Memory. Each child reports its VmHWM (Linux /proc/self/status). Before the timed work
it resets the high-water mark (writing 5 to /proc/self/clear_refs) so the reported peak
is the peak *during* the measurement -- it still includes the interpreter and the
imported libraries that stay resident, which is reported separately as ``rss_before``.
`bytes_per_ngram` uses the peak minus ``rss_before`` (what the measurement itself adds);
``total_bytes_per_ngram`` uses the whole peak.

On a shared machine wall-clock times include waiting for a core; the parent therefore
also records the child's CPU time (user + system, whole child lifetime, imports
included) from ``os.wait4``. The parent also records the child's
``ru_maxrss`` from ``os.wait4`` (whole child lifetime, includes imports and any
grandchild the child waited for, e.g. the determinization guard).

Timing uses `time.perf_counter` inside the child, so interpreter start-up and imports
are excluded. The machine's load average is recorded before and after each child.

Usage::

    python bench/run.py                      # everything
    python bench/run.py --only arpa_g --repeat 3
    python bench/run.py --only fullgraph --full-datasets w20k_n1m --variants optimized
    python bench/run.py --only baseline_full --full-datasets w20k_n1m
"""

from __future__ import annotations

import argparse
import datetime
import json
import os
import platform
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from netbuild.memory import reset_peak, status_bytes

HERE = Path(__file__).resolve().parent
REPO = HERE.parent
OUT = HERE / "out"

DATASETS = {
    # name: (synth.py arguments, has lexicon)
    "w20k_n1m": (["--words", "20000", "--ngrams", "1000000"], True),
    "w20k_n5m": (["--words", "20000", "--ngrams", "5000000", "--no-lexicon"], False),
    "w5k_n200k": (["--words", "5000", "--ngrams", "200000"], True),
}

TARGETS = {
    "arpa_g_ngrams_per_second": 1_000_000,
    "arpa_g_bytes_per_ngram": 200,
    "wordgraph_seconds": 15.0,
}


# ---------------------------------------------------------------------------- child side


def _start() -> dict:
    """Resets the RSS high-water mark; returns the memory state before the work."""
    return {"rss_before": status_bytes("VmRSS"), "peak_reset": reset_peak()}


def _child_baseline(params: dict) -> dict:
    import numpy  # noqa: F401
    import pynini  # noqa: F401

    import netbuild.builders.grammar  # noqa: F401
    import netbuild.builders.lexicon  # noqa: F401
    import netbuild.io.arpa  # noqa: F401
    import netbuild.pipeline  # noqa: F401

    return {"peak_rss": status_bytes("VmHWM"), "rss_before": status_bytes("VmRSS")}


def _child_arpa_g(params: dict) -> dict:
    from netbuild.builders.grammar import build_grammar
    from netbuild.io.arpa import read_arpa
    from netbuild.pipeline import num_arcs

    mem = _start()
    t0 = time.perf_counter()
    model = read_arpa(params["arpa"])
    t1 = time.perf_counter()
    peak_read = status_bytes("VmHWM")
    grammar = build_grammar(model)
    t2 = time.perf_counter()
    peak = status_bytes("VmHWM")
    ngrams = sum(model.counts())
    return {**mem, "counts": model.counts(), "ngrams": ngrams,
            "read_seconds": t1 - t0, "build_seconds": t2 - t1, "seconds": t2 - t0,
            "peak_rss": peak, "peak_rss_after_read": peak_read,
            "g_states": grammar.fst.num_states(), "g_arcs": num_arcs(grammar.fst),
            "num_histories": grammar.num_histories, "folded_ngrams": grammar.folded_ngrams}


def _child_wordgraph(params: dict) -> dict:
    import dataclasses

    from netbuild.builders.grammar import build_grammar
    from netbuild.builders.lexicon import build_lexicon
    from netbuild.io.arpa import read_arpa
    from netbuild.io.lexicon import read_lexicon
    from netbuild.io.phones import read_phones
    from netbuild.options import BuildOptions, LexiconOptions
    from netbuild.pipeline import build_word_graph, num_arcs

    opts = BuildOptions(lexicon=LexiconOptions(has_probabilities=True),
                        checks=params["checks"],
                        word_graph=params.get("word_graph", "tree"))
    data = Path(params["data"])
    mem = _start()
    steps: list[dict] = []

    def step(name: str, started: float, fst=None) -> float:
        now = time.perf_counter()
        rec = {"name": name, "seconds": now - started, "peak_rss_bytes": status_bytes("VmHWM")}
        if fst is not None:
            rec["states"], rec["arcs"] = fst.num_states(), num_arcs(fst)
        steps.append(rec)
        reset_peak()
        return time.perf_counter()

    t_begin = t = time.perf_counter()
    inventory = read_phones(data / "inventory.txt")
    lexicon = read_lexicon(data / "lexicon.txt", inventory, opts.lexicon)
    t = step("read lexicon", t)
    model = read_arpa(data / "model.arpa")
    t = step("read model", t)
    grammar = build_grammar(model)
    t = step("build G", t, grammar.fst)
    lex = build_lexicon(lexicon, inventory, grammar.word_symbols, opts.lexicon)
    t = step("build L", t, lex.fst)
    t_pipe = t
    records = []

    def progress(record) -> None:
        records.append(record)
        print(f"  {record}", file=sys.stderr, flush=True)

    graph = build_word_graph(lex, grammar, opts, progress=progress)
    t_end = time.perf_counter()
    return {**mem, "checks": params["checks"], "prep_steps": steps,
            "stages": [dataclasses.asdict(r) for r in records],
            "pipeline_seconds": t_end - t_pipe, "seconds": t_end - t_begin,
            "final_states": graph.fst.num_states(), "final_arcs": num_arcs(graph.fst),
            "markers": lex.num_markers, "words": len(lexicon.words()),
            "pronunciations": len(lexicon.entries), "ngrams": sum(model.counts()),
            "peak_rss": max([s["peak_rss_bytes"] for s in steps]
                            + [r.peak_rss_bytes for r in records])}


def _child_workflow(params: dict) -> dict:
    import dataclasses

    from netbuild.project import read_project
    from netbuild.workflow import build

    project = read_project(params["project"])
    mem = _start()
    records = []
    t0 = time.perf_counter()
    with tempfile.TemporaryDirectory(dir=OUT) as tmp:
        build(project, Path(tmp) / "graph", progress=records.append)
        t1 = time.perf_counter()
    return {**mem, "seconds": t1 - t0, "peak_rss": status_bytes("VmHWM"),
            "stages": [dataclasses.asdict(r) for r in records]}


def _child_fullgraph(params: dict) -> dict:
    """`workflow.build` of a full-graph project; sizes of graph.fst as vector and const."""
    import dataclasses

    import pywrapfst

    from netbuild.project import read_project
    from netbuild.workflow import build

    project = read_project(params["project"])
    mem = _start()
    records = []

    def progress(record) -> None:
        records.append(record)
        print(f"  {record}", file=sys.stderr, flush=True)

    t0 = time.perf_counter()
    with tempfile.TemporaryDirectory(dir=OUT) as tmp:
        result = build(project, Path(tmp) / "graph", progress=progress)
        t1 = time.perf_counter()
        peak = status_bytes("VmHWM")
        graph_file = Path(tmp) / "graph" / result.manifest["graph"]
        written = graph_file.stat().st_size
        fst = pywrapfst.Fst.read(str(graph_file))
        other = "const" if fst.fst_type() == "vector" else "vector"
        pywrapfst.convert(fst, other).write(str(Path(tmp) / "other.fst"))
        sizes = {fst.fst_type(): written, other: (Path(tmp) / "other.fst").stat().st_size}
    stages = [dataclasses.asdict(r) for r in records]
    g_arcs = next(s["arcs"] for s in stages if s["name"] == "grammar")
    final = stages[-1]
    return {**mem, "seconds": t1 - t0, "peak_rss": peak, "stages": stages,
            "final_states": final["states"], "final_arcs": final["arcs"],
            "g_arcs": g_arcs, "final_to_g_arcs": final["arcs"] / g_arcs,
            "graph_bytes": sizes,
            "child_peak_rss": max([int(s["details"].get("child_peak_rss_bytes", 0))
                                   for s in stages] + [0])}


def _child_baseline_full(params: dict) -> dict:
    sys.path.insert(0, str(HERE))
    from baseline_full import straightforward_graph

    mem = _start()
    return {**mem, **straightforward_graph(params["data"])}


CHILDREN = {"baseline": _child_baseline, "arpa_g": _child_arpa_g,
            "wordgraph": _child_wordgraph, "workflow": _child_workflow,
            "fullgraph": _child_fullgraph, "baseline_full": _child_baseline_full}


# ---------------------------------------------------------------------------- parent side


def measure(kind: str, params: dict) -> dict:
    """Runs measurement `kind` in a fresh child process; returns its record.

    Raises:
        RuntimeError: when the child fails (its stderr is shown as it runs).
    """
    with tempfile.NamedTemporaryFile("r", suffix=".json", dir=OUT, delete=False) as fh:
        result_path = fh.name
    load_before = os.getloadavg()
    proc = subprocess.Popen([sys.executable, str(Path(__file__).resolve()), "--child", kind,
                             "--params", json.dumps(params), "--result", result_path],
                            cwd=REPO)
    _, status, usage = os.wait4(proc.pid, 0)
    proc.returncode = os.waitstatus_to_exitcode(status)
    load_after = os.getloadavg()
    try:
        if proc.returncode != 0:
            raise RuntimeError(f"measurement {kind} {params} failed (exit {proc.returncode})")
        record = json.loads(Path(result_path).read_text())
    finally:
        os.unlink(result_path)
    record.update(kind=kind, params=params, child_maxrss=usage.ru_maxrss * 1024,
                  child_cpu_seconds=usage.ru_utime + usage.ru_stime,
                  load_before=load_before, load_after=load_after)
    return record


_REGENERATED: set[str] = set()


def ensure_data(name: str, regenerate: bool) -> Path:
    """Generates dataset `name` with bench/synth.py unless it exists (or, with
    `regenerate`, unless this run generated it already)."""
    args, _ = DATASETS[name]
    out = OUT / name
    if (regenerate and name not in _REGENERATED) or not (out / "synth.json").exists():
        _REGENERATED.add(name)
        subprocess.run([sys.executable, str(HERE / "synth.py"), *args, "--out", str(out)],
                       check=True, stdout=subprocess.DEVNULL)
    return out


def write_full_project(data: Path, final_optimize: bool = True, checks: bool = True) -> Path:
    """Writes the synthetic context map (bench/synth_context.py) and a full-graph project
    file for dataset directory `data`; returns the project's path."""
    sys.path.insert(0, str(HERE))
    from synth import write_phones
    from synth_context import write_context_map_text

    write_phones(data / "inventory.txt")  # the tying rules need its group classes
    write_context_map_text(data / "context.txt")
    name = f"project_full{'' if final_optimize else '_noopt'}{'' if checks else '_fast'}"
    path = data / f"{name}.toml"
    path.write_text('[inputs]\nlexicon = "lexicon.txt"\nlm = "model.arpa"\n'
                    'phones = "inventory.txt"\ncontext = "context.txt"\n\n'
                    '[lexicon]\nprobabilities = true\n\n[build]\n'
                    f'final_optimize = {str(final_optimize).lower()}\n'
                    f'checks = {str(checks).lower()}\n', encoding="utf-8")
    return path


def write_project(data: Path) -> Path:
    """Writes a project file for dataset directory `data`; returns its path."""
    path = data / "project.toml"
    path.write_text('[inputs]\nlexicon = "lexicon.txt"\nlm = "model.arpa"\n'
                    'phones = "inventory.txt"\n\n[lexicon]\nprobabilities = true\n',
                    encoding="utf-8")
    return path


def machine() -> dict:
    """Describes the machine and software the numbers were measured on."""
    import numpy
    import pynini

    def run(cmd: list[str]) -> str:
        try:
            return subprocess.run(cmd, capture_output=True, text=True, check=True).stdout
        except (OSError, subprocess.CalledProcessError):
            return ""

    lscpu = run(["lscpu"])
    cpu = {k.strip(): v.strip() for k, v in
           (line.split(":", 1) for line in lscpu.splitlines() if ":" in line)}
    head = run(["git", "-C", str(REPO), "rev-parse", "--short", "HEAD"]).strip()
    return {"date": datetime.datetime.now().astimezone().isoformat(timespec="seconds"),
            "cpu_model": cpu.get("Model name", ""), "cpus": os.cpu_count(),
            "lscpu": lscpu, "free_g": run(["free", "-g"]),
            "python": platform.python_version(), "pynini": pynini.__version__,
            "numpy": numpy.__version__, "platform": platform.platform(), "git_head": head}


def _median(xs: list[float]) -> float:
    return statistics.median(xs) if xs else float("nan")


def summarize(results: dict) -> dict:
    """Reduces the raw runs to the numbers the table shows (medians over repeats)."""
    summary: dict = {}
    base = results.get("baseline", [])
    if base:
        summary["baseline_peak_rss"] = _median([r["peak_rss"] for r in base])
    for name, runs in results.get("arpa_g", {}).items():
        secs = [r["seconds"] for r in runs]
        n = runs[0]["ngrams"]
        added = [r["peak_rss"] - r["rss_before"] for r in runs]
        summary.setdefault("arpa_g", {})[name] = {
            "ngrams": n, "counts": runs[0]["counts"], "runs": len(runs),
            "seconds_median": _median(secs), "seconds_min": min(secs),
            "read_seconds_median": _median([r["read_seconds"] for r in runs]),
            "build_seconds_median": _median([r["build_seconds"] for r in runs]),
            "ngrams_per_second_median": n / _median(secs),
            "ngrams_per_second_best": n / min(secs),
            "peak_rss_median": _median([r["peak_rss"] for r in runs]),
            "rss_before_median": _median([r["rss_before"] for r in runs]),
            "child_cpu_seconds_median": _median([r.get("child_cpu_seconds", float("nan"))
                                                 for r in runs]),
            "bytes_per_ngram": _median(added) / n,
            "total_bytes_per_ngram": _median([r["peak_rss"] for r in runs]) / n,
            "g_states": runs[0]["g_states"], "g_arcs": runs[0]["g_arcs"]}
    for label, runs in results.get("wordgraph", {}).items():
        secs = [r["seconds"] for r in runs]
        best = min(runs, key=lambda r: r["seconds"])
        summary.setdefault("wordgraph", {})[label] = {
            "runs": len(runs), "seconds_median": _median(secs), "seconds_min": min(secs),
            "peak_rss_median": _median([r["peak_rss"] for r in runs]),
            "steps": best["prep_steps"] + best["stages"],
            "final_states": best["final_states"], "final_arcs": best["final_arcs"]}
    for label, runs in results.get("fullgraph", {}).items():
        best = min(runs, key=lambda r: r["seconds"])
        summary.setdefault("fullgraph", {})[label] = {
            "runs": len(runs), "seconds_median": _median([r["seconds"] for r in runs]),
            "seconds_min": best["seconds"],
            "peak_rss_median": _median([r["peak_rss"] for r in runs]),
            "child_peak_rss": best["child_peak_rss"], "stages": best["stages"],
            "final_states": best["final_states"], "final_arcs": best["final_arcs"],
            "g_arcs": best["g_arcs"], "final_to_g_arcs": best["final_to_g_arcs"],
            "graph_bytes": best["graph_bytes"],
            "load": [best["load_before"][0], best["load_after"][0]]}
    for label, runs in results.get("baseline_full", {}).items():
        r = runs[0]
        summary.setdefault("baseline_full", {})[label] = {
            k: r[k] for k in ("seconds", "peak_rss", "steps", "final_states", "final_arcs",
                              "vector_bytes", "g_arcs")}
        summary["baseline_full"][label]["load"] = [r["load_before"][0], r["load_after"][0]]
    for label, runs in results.get("workflow", {}).items():
        summary.setdefault("workflow", {})[label] = {
            "runs": len(runs), "seconds_median": _median([r["seconds"] for r in runs]),
            "peak_rss_median": _median([r["peak_rss"] for r in runs])}
    return summary


def _mb(x: float) -> str:
    return f"{x / 2**20:,.0f} MiB"


def markdown(summary: dict) -> str:
    """Formats the summary as Markdown tables."""
    out: list[str] = []
    if "baseline_peak_rss" in summary:
        out.append(f"Import-only child (numpy, pynini, netbuild): peak RSS "
                   f"{_mb(summary['baseline_peak_rss'])}.\n")
    if "arpa_g" in summary:
        out += ["| model | n-grams | runs | read s | build G s | total s | n-grams/s "
                "(median / best) | child CPU s | peak RSS | added bytes/n-gram "
                "| total bytes/n-gram | G states | G arcs |",
                "|---|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|"]
        for name, s in summary["arpa_g"].items():
            out.append(
                f"| {name} | {s['ngrams']:,} | {s['runs']} | {s['read_seconds_median']:.2f} "
                f"| {s['build_seconds_median']:.2f} | {s['seconds_median']:.2f} "
                f"| {s['ngrams_per_second_median']:,.0f} / {s['ngrams_per_second_best']:,.0f} "
                f"| {s.get('child_cpu_seconds_median', float('nan')):.2f} "
                f"| {_mb(s['peak_rss_median'])} | {s['bytes_per_ngram']:.0f} "
                f"| {s['total_bytes_per_ngram']:.0f} | {s['g_states']:,} | {s['g_arcs']:,} |")
        out.append("")
    for label, s in summary.get("wordgraph", {}).items():
        out += [f"Word-level graph, {label}: end to end {s['seconds_median']:.2f} s median "
                f"({s['seconds_min']:.2f} s best of {s['runs']}), peak RSS "
                f"{_mb(s['peak_rss_median'])}; stages of the fastest run:", "",
                "| step | seconds | peak RSS | states | arcs |", "|---|---:|---:|---:|---:|"]
        for r in s["steps"]:
            states = f"{r['states']:,}" if "states" in r else ""
            arcs = f"{r['arcs']:,}" if "arcs" in r else ""
            out.append(f"| {r['name']} | {r['seconds']:.2f} | {_mb(r['peak_rss_bytes'])} "
                       f"| {states} | {arcs} |")
        out.append("")
    for label, s in summary.get("fullgraph", {}).items():
        sizes = ", ".join(f"{k} {v:,} bytes" for k, v in s["graph_bytes"].items())
        out += [f"Full graph, {label}: end to end {s['seconds_median']:.2f} s median "
                f"({s['seconds_min']:.2f} s best of {s['runs']}), peak RSS "
                f"{_mb(s['peak_rss_median'])} (guard child {_mb(s['child_peak_rss'])}); "
                f"final {s['final_states']:,} states / {s['final_arcs']:,} arcs, "
                f"{s['final_to_g_arcs']:.2f} x G's {s['g_arcs']:,} arcs; graph.fst {sizes}; "
                f"load {s['load'][0]:.1f} -> {s['load'][1]:.1f}.", "",
                "| stage | seconds | check s | peak RSS | states | arcs |",
                "|---|---:|---:|---:|---:|---:|"]
        for r in s["stages"]:
            chk_s = r["details"].get("check_seconds")
            out.append(f"| {r['name']} | {r['seconds']:.2f} | "
                       f"{'' if chk_s is None else f'{chk_s:.2f}'} | "
                       f"{_mb(r['peak_rss_bytes'])} | {r['states']:,} | {r['arcs']:,} |")
        out.append("")
    for label, s in summary.get("baseline_full", {}).items():
        out += [f"Straightforward construction, {label}: {s['seconds']:.2f} s (sum of "
                f"steps), peak RSS {_mb(s['peak_rss'])}; final {s['final_states']:,} "
                f"states / {s['final_arcs']:,} arcs, vector file {s['vector_bytes']:,} "
                f"bytes; load {s['load'][0]:.1f} -> {s['load'][1]:.1f}.", "",
                "| step | seconds | peak RSS | states | arcs |", "|---|---:|---:|---:|---:|"]
        for r in s["steps"]:
            states = f"{r['states']:,}" if "states" in r else ""
            arcs = f"{r['arcs']:,}" if "arcs" in r else ""
            out.append(f"| {r['name']} | {r['seconds']:.2f} | {_mb(r['peak_rss_bytes'])} "
                       f"| {states} | {arcs} |")
        out.append("")
    for label, s in summary.get("workflow", {}).items():
        out.append(f"workflow.build, {label}: {s['seconds_median']:.2f} s median over "
                   f"{s['runs']} runs, peak RSS {_mb(s['peak_rss_median'])}.")
    return "\n".join(out) + "\n"


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="netbuild benchmarks (see module docstring)")
    kinds = ["baseline", "arpa_g", "wordgraph", "workflow", "fullgraph", "baseline_full"]
    ap.add_argument("--only", nargs="*", default=kinds, choices=kinds)
    ap.add_argument("--full-datasets", nargs="*", default=["w5k_n200k", "w20k_n1m"],
                    choices=["w5k_n200k", "w20k_n1m"], help="data sets of fullgraph")
    ap.add_argument("--variants", nargs="*", default=["optimized", "fast", "unoptimized"],
                    choices=["optimized", "fast", "unoptimized"],
                    help="fullgraph: checks on (optimized), checks off (fast), "
                         "final_optimize = false (unoptimized)")
    ap.add_argument("--datasets", nargs="*", default=["w20k_n1m", "w20k_n5m"],
                    choices=list(DATASETS),
                    help="models for arpa_g")
    ap.add_argument("--word-graph", nargs="*", default=["tree"], choices=["tree", "compose"],
                    help="wordgraph: how det(L∘G) is made (BuildOptions.word_graph)")
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--regenerate", action="store_true", help="regenerate the inputs")
    ap.add_argument("--results", default=str(OUT / "results.json"))
    ap.add_argument("--update", action="store_true",
                    help="keep the sections of an existing results file not measured now")
    ap.add_argument("--child", help=argparse.SUPPRESS)
    ap.add_argument("--params", help=argparse.SUPPRESS)
    ap.add_argument("--result", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)

    if args.child:
        record = CHILDREN[args.child](json.loads(args.params))
        Path(args.result).write_text(json.dumps(record))
        return 0

    OUT.mkdir(parents=True, exist_ok=True)
    results: dict = {}
    if args.update and Path(args.results).exists():
        results = json.loads(Path(args.results).read_text())
        results.setdefault("machines", []).append(results.get("machine"))
        for kind in args.only:
            if kind not in ("fullgraph", "baseline_full"):  # these replace per label
                results.pop(kind, None)
    results["machine"] = machine()
    if "baseline" in args.only:
        results["baseline"] = [measure("baseline", {}) for _ in range(args.repeat)]
    if "arpa_g" in args.only:
        for name in args.datasets:
            data = ensure_data(name, args.regenerate)
            runs = []
            for i in range(args.repeat):
                r = measure("arpa_g", {"arpa": str(data / "model.arpa")})
                print(f"arpa_g {name} run {i + 1}: {r['seconds']:.2f} s, "
                      f"peak {_mb(r['peak_rss'])}", file=sys.stderr)
                runs.append(r)
            results.setdefault("arpa_g", {})[name] = runs
            _save(results, args.results)
    if "wordgraph" in args.only or "workflow" in args.only:
        data = ensure_data("w20k_n1m", args.regenerate)
    if "wordgraph" in args.only:
        for method, checks in [(m, c) for m in args.word_graph for c in (True, False)]:
            label = f"w20k_n1m {method} checks={'on' if checks else 'off'}"
            runs = []
            for i in range(args.repeat):
                r = measure("wordgraph", {"data": str(data), "checks": checks,
                                          "word_graph": method})
                print(f"wordgraph {label} run {i + 1}: {r['seconds']:.2f} s, "
                      f"peak {_mb(r['peak_rss'])}", file=sys.stderr)
                runs.append(r)
            results.setdefault("wordgraph", {})[label] = runs
            _save(results, args.results)
    if "fullgraph" in args.only or "baseline_full" in args.only:
        for name in args.full_datasets:
            fdata = ensure_data(name, args.regenerate)
            named = {"optimized": (True, True), "fast": (True, False),
                     "unoptimized": (False, True)}
            variants = [named[v] for v in args.variants] if "fullgraph" in args.only else []
            for final_optimize, checks in variants:
                project = write_full_project(fdata, final_optimize, checks)
                label = (f"{name} final_optimize={'on' if final_optimize else 'off'} "
                         f"checks={'on' if checks else 'off'}")
                runs = []
                for i in range(args.repeat):
                    r = measure("fullgraph", {"project": str(project)})
                    print(f"fullgraph {label} run {i + 1}: {r['seconds']:.2f} s, "
                          f"peak {_mb(r['peak_rss'])}", file=sys.stderr)
                    runs.append(r)
                results.setdefault("fullgraph", {})[label] = runs
                _save(results, args.results)
            if "baseline_full" in args.only:
                write_full_project(fdata)
                r = measure("baseline_full", {"data": str(fdata)})
                print(f"baseline_full {name}: {r['seconds']:.2f} s, "
                      f"peak {_mb(r['peak_rss'])}", file=sys.stderr)
                results.setdefault("baseline_full", {})[name] = [r]
                _save(results, args.results)
    if "workflow" in args.only:
        project = write_project(data)
        runs = [measure("workflow", {"project": str(project)}) for _ in range(args.repeat)]
        results["workflow"] = {"w20k_n1m": runs}

    table = _save(results, args.results)
    print(table)
    return 0


def _save(results: dict, path: str) -> str:
    """Writes the raw runs and summary (JSON) and the tables (Markdown); returns the tables.

    Called after every finished group, so a long run interrupted keeps what it measured.
    """
    results["summary"] = summarize(results)
    table = markdown(results["summary"])
    Path(path).write_text(json.dumps(results, indent=2) + "\n")
    Path(path).with_suffix(".md").write_text(table)
    return table


if __name__ == "__main__":
    sys.exit(main())
