"""Small drawings of a graph: around a word, around a state, or along a sentence.

- `Subgraph`: the states and arcs chosen, and the arcs asked for (highlighted).
- `neighbourhood(arrays, seeds, depth)`: the states within `depth` arcs of the seeds,
  following arcs in both directions, in bulk.
- `word_subgraph(fst, word, depth)`, `state_subgraph(fst, state, depth)`,
  `sentence_subgraph(fst, words, depth)`: the three ways of choosing.
- `subgraph_to_dot(sub, title)`: DOT text with escaped labels and a legend cluster.
- `write_drawing(source, path)`: DOT, SVG, PNG or PDF by the file's ending, atomically.
- `draw(directory, path, word=..., state=..., sentence=..., ...)`: all of it on a build.

What is drawn: the chosen states (the seeds and every state within `depth` arcs of
them, either direction) and every arc between two chosen states. The seeds are the
two ends of every arc whose output is the word (``word``), the state itself
(``state``), or the states of the sentence's best path (``sentence``); the arcs that
emit the word, or the path's arcs, are drawn bold in colour. A chosen state with
arcs to or from states not drawn has a dashed outline.

The sentence's path: the FST's arcs are relabelled with their own index on the input
side (in bulk), composed on the output side with a linear acceptor of the words
(output epsilons, such as the back-off arcs of G, pass freely) and the shortest path
read back, so the path is found in OpenFst and named in the FST's own state ids.

Labels are HTML-like graphviz labels in which every character outside printable
ASCII, and ``< > & " '``, is written as a numeric character reference, so any word
(quotes, angle brackets, backslashes, any script) reaches the drawing unchanged.
Only this module imports graphviz, inside the functions that need it.
"""

from __future__ import annotations

import dataclasses
import os
import shutil
import tempfile
from collections.abc import Sequence
from pathlib import Path

import numpy as np
import pynini

from ..errors import InputError, NetbuildError, StageError, SymbolError
from ..io.fstfile import FstArrays, arrays_to_fst, fst_to_arrays
from ..io.phones import suggestion

__all__ = ["DEFAULT_MAX_STATES", "DrawResult", "GraphvizMissing", "Subgraph", "draw",
           "neighbourhood", "sentence_subgraph", "state_subgraph", "subgraph_to_dot",
           "word_subgraph", "write_drawing"]

DEFAULT_MAX_STATES = 200
# File ending -> graphviz output format (None: the DOT text itself).
FORMATS: dict[str, str | None] = {".dot": None, ".gv": None, ".svg": "svg", ".png": "png",
                                  ".pdf": "pdf"}
INSTALL_HINT = ("install graphviz: the Python package ('pip install graphviz') and the "
                "'dot' program (e.g. 'apt-get install graphviz' or 'brew install graphviz')")
_HIGHLIGHT = "#c0392b"
_START_FILL = "#d6eaf8"
_EPSILON_SHOWN = "\u03b5"


class GraphvizMissing(NetbuildError, ImportError):
    """The graphviz Python package is not installed."""


@dataclasses.dataclass
class Subgraph:
    """States (sorted ids) and arcs (indices into `arrays`) to draw; `highlight` are the
    arcs asked for; `cut` the drawn states with arcs to or from states not drawn."""

    arrays: FstArrays
    states: np.ndarray
    arcs: np.ndarray
    highlight: np.ndarray
    cut: np.ndarray
    what: str


@dataclasses.dataclass(frozen=True)
class DrawResult:
    """What `draw` wrote: the file, its size in states and arcs, whether graphviz
    rendered it (False: DOT text), and a note for the user (empty when all went well)."""

    path: Path
    states: int
    arcs: int
    rendered: bool
    note: str = ""


# --- choosing states -------------------------------------------------------------------

def neighbourhood(arrays: FstArrays, seeds: np.ndarray, depth: int,
                  limit: int | None = None) -> np.ndarray:
    """Returns a boolean mask of the states within `depth` arcs of `seeds` (both directions).

    One vectorised pass over the arcs per level; stops early once more than `limit`
    states are chosen (the caller refuses such a request anyway).
    """
    chosen = np.zeros(arrays.num_states, dtype=bool)
    chosen[np.asarray(seeds, dtype=np.int64)] = True
    src, dst = arrays.src, arrays.dst
    for _ in range(max(depth, 0)):
        touch = chosen[src] | chosen[dst]
        grown = chosen.copy()
        grown[src[touch]] = True
        grown[dst[touch]] = True
        if np.array_equal(grown, chosen):
            break
        chosen = grown
        if limit is not None and int(chosen.sum()) > limit:
            break
    return chosen


def _finish(arrays: FstArrays, seeds: np.ndarray, highlight: np.ndarray, depth: int,
            max_states: int, what: str, stage: str) -> Subgraph:
    chosen = neighbourhood(arrays, seeds, depth, limit=max_states)
    n = int(chosen.sum())
    if n > max_states:
        shown = f"more than {max_states}" if depth > 0 else str(n)
        ways = [f"a smaller --depth (now {depth})"] if depth else []
        if stage != "grammar":
            ways.append("a smaller stage (--stage grammar)")
        ways.append("a larger --max-states")
        raise StageError(
            "draw", f"{what} in stage '{stage}' spans {shown} states at depth {depth}, over "
            f"the limit of {max_states}", "narrow it: " + ", or ".join(ways))
    inside = chosen[arrays.src] & chosen[arrays.dst]
    touching = chosen[arrays.src] | chosen[arrays.dst]
    outside = touching & ~inside
    cut = np.zeros(arrays.num_states, dtype=bool)
    cut[arrays.src[outside]] = True
    cut[arrays.dst[outside]] = True
    cut &= chosen
    return Subgraph(arrays, np.flatnonzero(chosen), np.flatnonzero(inside),
                    np.unique(np.asarray(highlight, dtype=np.int64)), np.flatnonzero(cut), what)


def _arrays(fst: pynini.Fst | FstArrays) -> FstArrays:
    return fst if isinstance(fst, FstArrays) else fst_to_arrays(fst)


def _word_id(arrays: FstArrays, word: str, where: str, stage: str) -> int:
    table = arrays.osymbols
    if table is None:
        raise SymbolError(f"stage '{stage}' has no output symbol table, so words cannot be "
                          "found", "draw a stage with word outputs (--stage grammar)",
                          path=where)
    wid = table.find(word)
    if wid == pynini.NO_SYMBOL or wid < 0:
        known = [table.find(i) for i in range(table.available_key()) if table.member(i)]
        raise SymbolError(f"word '{word}' is not in the output symbols of stage '{stage}'",
                          f"{suggestion(word, known)}check the spelling", path=where)
    return int(wid)


def word_subgraph(fst: pynini.Fst | FstArrays, word: str, depth: int = 1, *,
                  max_states: int = DEFAULT_MAX_STATES, stage: str = "fst",
                  where: str = "<fst>") -> Subgraph:
    """Returns the arcs that output `word` and the states within `depth` arcs of them.

    Raises:
      SymbolError: the word is not in the FST's output table (`where` names the table).
      StageError: no arc outputs the word, or the drawing would pass `max_states`.
    """
    a = _arrays(fst)
    wid = _word_id(a, word, where, stage)
    hits = np.flatnonzero(a.olabel == wid)
    if not hits.size:
        raise StageError("draw", f"no arc of stage '{stage}' outputs the word '{word}'",
                         "the word may have been pruned or never follow the start; try "
                         "--stage grammar")
    seeds = np.concatenate([a.src[hits], a.dst[hits]])
    return _finish(a, seeds, hits, depth, max_states, f"word '{word}'", stage)


def state_subgraph(fst: pynini.Fst | FstArrays, state: int, depth: int = 1, *,
                   max_states: int = DEFAULT_MAX_STATES, stage: str = "fst") -> Subgraph:
    """Returns the states within `depth` arcs of `state` (both directions).

    Raises:
      StageError: the state does not exist, or the drawing would pass `max_states`.
    """
    a = _arrays(fst)
    if not 0 <= state < a.num_states:
        raise StageError("draw", f"state {state} does not exist in stage '{stage}'",
                         f"give a state from 0 to {a.num_states - 1}")
    return _finish(a, np.array([state]), np.zeros(0, dtype=np.int64), depth, max_states,
                   f"state {state}", stage)


def sentence_path(a: FstArrays, word_ids: Sequence[int]) -> tuple[np.ndarray, float] | None:
    """Returns the arc indices of the best path of `a` whose outputs (epsilons skipped)
    are `word_ids`, and its cost (final weight included); None when there is none."""
    n = a.num_arcs
    relabelled = arrays_to_fst(a.num_states, a.start, a.final_weights, a.src,
                               np.arange(1, n + 1, dtype=np.int32), a.olabel, a.weight, a.dst)
    relabelled.arcsort("olabel")
    k = len(word_ids)
    finals = np.full(k + 1, np.inf, dtype=np.float32)
    finals[k] = 0.0
    ids = np.asarray(word_ids, dtype=np.int32)
    line = arrays_to_fst(k + 1, 0, finals, np.arange(k, dtype=np.int32), ids, ids,
                         np.zeros(k, dtype=np.float32), np.arange(1, k + 1, dtype=np.int32))
    best = pynini.shortestpath(pynini.compose(relabelled, line))
    if best.start() == pynini.NO_STATE_ID:
        return None
    arcs, cost, state = [], 0.0, best.start()
    while True:
        out = list(best.arcs(state))
        if not out:
            break
        arcs.append(out[0].ilabel - 1)
        cost += float(out[0].weight)
        state = out[0].nextstate
    cost += float(best.final(state))
    return np.asarray(arcs, dtype=np.int64), cost


def sentence_subgraph(fst: pynini.Fst | FstArrays, words: Sequence[str], depth: int = 0, *,
                      max_states: int = DEFAULT_MAX_STATES, stage: str = "fst",
                      where: str = "<fst>") -> Subgraph:
    """Returns the best path whose outputs are `words`, and the states within `depth` arcs.

    Raises:
      SymbolError: a word is not in the FST's output table.
      StageError: the stage has no path for the sentence, or the drawing is too large.
    """
    a = _arrays(fst)
    if not words:
        raise StageError("draw", "the sentence is empty", "give at least one word")
    ids = [_word_id(a, w, where, stage) for w in words]
    text = " ".join(words)
    if a.start < 0:
        raise StageError("draw", f"stage '{stage}' has no start state", "rebuild the graph")
    found = sentence_path(a, ids)
    if found is None:
        raise StageError("draw", f"stage '{stage}' has no path for the sentence '{text}'",
                         "check the words' order and spelling, or draw it through "
                         "--stage grammar")
    path, _ = found
    seeds = np.concatenate([[a.start], a.src[path], a.dst[path]])
    return _finish(a, seeds, path, depth, max_states, f"sentence '{text}'", stage)


# --- DOT -------------------------------------------------------------------------------

def _html(text: str) -> str:
    """Escapes `text` for an HTML-like graphviz label (numeric references, ASCII only)."""
    return "".join(c if (32 <= ord(c) < 127 and c not in "<>&\"'") else f"&#{ord(c)};"
                   for c in text)


def _symbol(table: pynini.SymbolTable | None, label: int) -> str:
    if label == 0:
        return _EPSILON_SHOWN
    if table is not None and table.member(int(label)):
        return table.find(int(label))
    return str(int(label))


def _cost(w: float) -> str:
    return "" if w == 0 else f"/{w:.2f}"


def subgraph_to_dot(sub: Subgraph, title: str = "") -> str:
    """Returns the DOT text of `sub`: states ``s<id>``, arcs ``in:out/cost`` (one label
    when input and output are the same symbol of the same table), costs rounded to two
    decimals, and a legend cluster (nodes named ``legend_*``).

    Raises:
      GraphvizMissing: the graphviz Python package is not installed.
    """
    try:
        import graphviz
    except ImportError as err:
        raise GraphvizMissing("the graphviz Python package is missing", INSTALL_HINT) from err
    a = sub.arrays
    same_tables = (a.isymbols is not None and a.osymbols is not None
                   and a.isymbols.name() == a.osymbols.name())
    g = graphviz.Digraph("netbuild", graph_attr={
        "rankdir": "LR", "label": f"<{_html(title or sub.what)}>", "labelloc": "t",
        "fontname": "Helvetica"}, node_attr={"fontname": "Helvetica", "shape": "circle"},
        edge_attr={"fontname": "Helvetica", "fontsize": "11"})
    cut = set(sub.cut.tolist())
    for s in sub.states.tolist():
        final = float(a.final_weights[s])
        attrs = {"shape": "doublecircle" if np.isfinite(final) else "circle"}
        label = str(s) + (_cost(final) if np.isfinite(final) else "")
        styles = []
        if s == a.start:
            styles += ["bold", "filled"]
            attrs["fillcolor"] = _START_FILL
        if s in cut:
            styles.append("dashed")
        if styles:
            attrs["style"] = ",".join(styles)
        g.node(f"s{s}", label=f"<{_html(label)}>", **attrs)
    marked = set(sub.highlight.tolist())
    for i in sub.arcs.tolist():
        il, ol = int(a.ilabel[i]), int(a.olabel[i])
        text = _symbol(a.isymbols, il)
        if not (same_tables and il == ol):
            text += ":" + _symbol(a.osymbols, ol)
        text += _cost(float(a.weight[i]))
        attrs = {"color": _HIGHLIGHT, "fontcolor": _HIGHLIGHT, "penwidth": "2.5"} \
            if i in marked else {}
        g.edge(f"s{int(a.src[i])}", f"s{int(a.dst[i])}", label=f"<{_html(text)}>", **attrs)
    with g.subgraph(name="cluster_legend") as legend:
        legend.attr(label="legend", style="rounded", color="gray60", fontsize="11")
        legend.node("legend_start", label="start", style="bold,filled",
                    fillcolor=_START_FILL, shape="circle", fontsize="10")
        legend.node("legend_final", label="<final/cost>", shape="doublecircle",
                    fontsize="10")
        legend.node("legend_cut", label="<more arcs>", shape="circle", style="dashed",
                    fontsize="10")
        legend.edge("legend_start", "legend_final", label="<in:out/cost>", fontsize="10")
        legend.edge("legend_cut", "legend_final", label="<asked for>", color=_HIGHLIGHT,
                    fontcolor=_HIGHLIGHT, penwidth="2.5", fontsize="10")
    return g.source


# --- writing ---------------------------------------------------------------------------

def _atomic_write(data: bytes, path: Path) -> None:
    directory = path.absolute().parent
    if not directory.is_dir():
        raise InputError("the output directory does not exist", "create it first",
                         path=str(directory))
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=directory)
    try:
        with os.fdopen(fd, "wb") as f:
            f.write(data)
        os.chmod(tmp, 0o644)
        os.replace(tmp, path)
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)


def write_drawing(source: str, path: str | os.PathLike) -> tuple[Path, bool, str]:
    """Writes DOT `source` to `path` as DOT, SVG, PNG or PDF by its ending, atomically.

    Where the 'dot' program is missing an SVG/PNG/PDF request is written as DOT beside
    it (the ending replaced by .dot) and the returned note says how to install graphviz.

    Returns:
      (the path written, whether graphviz rendered it, a note or "").

    Raises:
      InputError: the ending is not one of `FORMATS`, or the directory does not exist.
    """
    out = Path(path)
    suffix = out.suffix.lower()
    if suffix not in FORMATS:
        raise InputError(f"unknown drawing format '{out.suffix or out.name}'",
                         "end the file name in " + ", ".join(FORMATS), path=str(out))
    fmt = FORMATS[suffix]
    if fmt is None:
        _atomic_write(source.encode("utf-8"), out)
        return out, False, ""
    import graphviz

    try:
        data = graphviz.Source(source).pipe(format=fmt)
    except graphviz.ExecutableNotFound:
        dot = out.with_suffix(".dot")
        _atomic_write(source.encode("utf-8"), dot)
        return dot, False, (f"the 'dot' program is missing, so the drawing was written as "
                            f"DOT to {dot} instead of {out}; {INSTALL_HINT}, or render it "
                            "with any DOT viewer")
    except graphviz.CalledProcessError as err:
        raise StageError("draw", f"graphviz could not render the drawing ({err.stderr!r})",
                         "write it as .dot instead and report this") from err
    _atomic_write(data, out)
    return out, True, ""


def dot_available() -> bool:
    """True when graphviz's 'dot' program is on the PATH."""
    return shutil.which("dot") is not None


# --- on a build directory --------------------------------------------------------------

def draw(directory: str | os.PathLike, path: str | os.PathLike, *, word: str | None = None,
         state: int | None = None, sentence: Sequence[str] | None = None,
         depth: int | None = None, stage: str | None = None,
         max_states: int = DEFAULT_MAX_STATES) -> DrawResult:
    """Draws part of a build's stage FST into `path` (exactly one of word/state/sentence).

    Args:
      directory: a build directory.
      path: the drawing; its ending chooses DOT, SVG, PNG or PDF.
      word, state, sentence: what to draw around (see the module docstring).
      depth: states around the seeds; default 1, or 0 with a sentence.
      stage: the stage FST by manifest name; default "graph", or "grammar" with a sentence.
      max_states: refuse drawings with more states than this.

    Raises:
      InputError: not a build, an unknown stage, word or output format.
      StageError: nothing to draw, or too much (the message says how to narrow it).
    """
    from .ambiguity import read_stage, stage_files

    given = [x is not None for x in (word, state, sentence)]
    if sum(given) != 1:
        raise StageError("draw", "give exactly one of a word, a state or a sentence",
                         "pass one of --word, --state or --sentence")
    suffix = Path(path).suffix.lower()
    if suffix not in FORMATS:  # before the work, not after it
        raise InputError(f"unknown drawing format '{Path(path).suffix or Path(path).name}'",
                         "end the file name in " + ", ".join(FORMATS), path=str(path))
    d = Path(directory)
    files = stage_files(d)
    name = stage or ("grammar" if sentence is not None else "graph")
    if name not in files:
        raise InputError(f"stage '{name}' is not in this build",
                         f"{suggestion(name, list(files))}use one of: {', '.join(files)}",
                         path=str(d / "manifest.json"))
    if not files[name].is_file():
        raise InputError("FST file is missing", "rebuild the directory with 'netbuild build'",
                         path=str(files[name]))
    arrays = fst_to_arrays(read_stage(d, files[name]))
    where = str(d / "word.syms")
    if depth is None:
        depth = 0 if sentence is not None else 1
    if depth < 0:
        raise StageError("draw", f"depth {depth} is negative", "give --depth 0 or more")
    if word is not None:
        sub = word_subgraph(arrays, word, depth, max_states=max_states, stage=name,
                            where=where)
    elif state is not None:
        sub = state_subgraph(arrays, state, depth, max_states=max_states, stage=name)
    else:
        sub = sentence_subgraph(arrays, list(sentence), depth, max_states=max_states,
                                stage=name, where=where)
    title = f"{sub.what} in stage '{name}', depth {depth}"
    written, rendered, note = write_drawing(subgraph_to_dot(sub, title), path)
    return DrawResult(written, int(sub.states.size), int(sub.arcs.size), rendered, note)
