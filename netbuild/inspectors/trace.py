"""Why a word is (or is not) recognized: one word followed through every input and stage.

- `CAUSES`: the verdict codes, in the order the inputs and stages are examined.
- `StageTrace`, `WordTrace`: the record (`WordTrace.to_json()` is the documented JSON).
- `TraceSources`: the inputs and FSTs a trace looks at.
- `trace_word(word, sources)`: the trace itself (no file access).
- `trace_project(word, project, context=None)`: reads a project's inputs and builds the
  word-level graph in memory (`project_sources` keeps them for many words).
- `trace_build(word, directory)`: uses a build directory's manifest, inputs and FSTs
  (`build_sources` keeps them for many words).
- `build_inputs(directory)`: a build's manifest, input paths and changed-input warnings.
- `format_trace(trace)`: the text form.
- `label_paths(fst, label, exclude=())`: does any complete path emit an output label,
  its cheapest cost, and the cheapest competitor leaving the same states.
- `near_pronunciations(phones, table, inventory)`: pronunciations one phone edit away.

Stages, in order (each a `StageTrace` named as below):

- ``lexicon``: the word's pronunciations and their costs (-ln p, or -ln(p / max p) when
  the project rescales), phones outside the inventory, homophones (identical phones)
  and near-homophones (one substitution, insertion or deletion away) with their costs;
- ``language_model``: vocabulary membership, the unigram log10 probability and its rank,
  the n-grams of order >= 2 that contain or predict the word, whether it is reached only
  by backing off to the unigram, whether every listed probability is -99 (zero), and
  the contexts that predict it best with the most likely other word in each;
- ``context`` (when a context map is given and its coverage functions exist): the
  contexts of the word's phones, inside the word and across its boundaries, that map
  to no model;
- graph stages (``grammar``, ``lexicon_fst``, ``wordgraph``, and ``graph`` for the full
  graph when it is not the word-level graph): `label_paths` of the word's label.

The verdict is the first cause found in that order (see `CAUSES`); ``ok`` words get the
competitor analysis too. Costs are tropical path costs in nats (-ln P).
"""

from __future__ import annotations

import dataclasses
import difflib
import hashlib
import json
import math
from collections.abc import Iterable, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pynini

from ..errors import InputError, StageError
from ..io.arpa import ArpaModel, read_arpa
from ..io.fstfile import fst_to_arrays
from ..io.lexicon import Lexicon, read_lexicon
from ..io.phones import PhoneInventory, inventory_from_lexicon, read_phones
from ..options import BuildOptions, GrammarOptions, LexiconOptions
from ..symbols import BACKOFF, SENTENCE_END, SENTENCE_START, UNKNOWN

__all__ = ["CAUSES", "StageTrace", "TraceSources", "WordTrace", "build_inputs",
           "build_sources", "format_trace", "label_paths", "near_pronunciations",
           "project_sources", "trace_build", "trace_project", "trace_word"]

CAUSES = ("not_in_lexicon", "unknown_phone", "not_in_language_model", "zero_probability",
          "uncovered_context", "unreachable", "ok")
ZERO_LOG10 = -99.0  # the ARPA convention for log10 of a zero probability
GRAPH_STAGES = ("grammar", "lexicon_fst", "wordgraph", "graph")
_SHOWN = 10  # list entries kept in a report (homophones, contexts, ...)


@dataclasses.dataclass
class StageTrace:
    """One input or stage: is the word there (None: not examined) and what was found."""

    name: str
    present: bool | None
    details: dict[str, Any] = dataclasses.field(default_factory=dict)

    def to_json(self) -> dict[str, Any]:
        return {"name": self.name, "present": self.present, **_plain(self.details)}


@dataclasses.dataclass
class WordTrace:
    """The whole trace: the verdict (one of `CAUSES`), why, what to change, the stages."""

    word: str
    verdict: str
    stage: str | None
    reason: str
    fix: str
    stages: list[StageTrace]
    warnings: list[str] = dataclasses.field(default_factory=list)

    def stage_named(self, name: str) -> StageTrace | None:
        return next((s for s in self.stages if s.name == name), None)

    def to_json(self) -> dict[str, Any]:
        return {"word": self.word, "verdict": self.verdict, "stage": self.stage,
                "reason": self.reason, "fix": self.fix,
                "stages": [s.to_json() for s in self.stages],
                "warnings": list(self.warnings)}


@dataclasses.dataclass
class TraceSources:
    """What a trace reads. `graphs` maps graph stage names (`GRAPH_STAGES`) to FSTs whose
    output side is the word table `word_symbols`; `dropped` lists words a build removed
    from the model; `context_map` is a `netbuild.io.context_map.ContextMap` or None."""

    lexicon: Lexicon
    inventory: PhoneInventory
    model: ArpaModel | None
    options: BuildOptions = BuildOptions()
    graphs: dict[str, pynini.Fst] = dataclasses.field(default_factory=dict)
    word_symbols: pynini.SymbolTable | None = None
    dropped: list[str] = dataclasses.field(default_factory=list)
    context_map: Any = None
    graph_note: str = ""  # why graph stages are missing, if they are
    warnings: list[str] = dataclasses.field(default_factory=list)
    cache: dict[str, Any] = dataclasses.field(default_factory=dict)  # per graph stage

    def trace(self, word: str) -> "WordTrace":
        """Returns `trace_word(word, self)`; repeated traces reuse the graph analyses."""
        return trace_word(word, self)


def _plain(value: Any) -> Any:
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if isinstance(value, (np.floating, float)):
        v = float(value)
        return v if math.isfinite(v) else None
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, np.bool_):
        return bool(value)
    return value


# ------------------------------------------------------------------------ lexicon


def _costs(lexicon: Lexicon, rescale: bool) -> dict[tuple[str, tuple[str, ...]], float]:
    """(word, phones) -> pronunciation cost as the lexicon builder computes it."""
    best: dict[tuple[str, tuple[str, ...]], float] = {}
    for e in lexicon.entries:
        key = (e.word, e.phones)
        best[key] = max(best.get(key, 0.0), e.probability)
    top: dict[str, float] = {}
    for (w, _), p in best.items():
        top[w] = max(top.get(w, 0.0), p)
    return {k: (-math.log(p / top[k[0]]) if rescale else -math.log(p)) + 0.0
            for k, p in best.items()}


def near_pronunciations(phones: tuple[str, ...],
                        table: dict[tuple[str, ...], list[str]],
                        inventory: Iterable[str]) -> list[tuple[tuple[str, ...], str]]:
    """Returns (pronunciation, edit) for the keys of `table` one phone edit from `phones`.

    Candidates are generated (every deletion, every substitution and insertion of an
    inventory phone) and looked up, so the cost is O(len(phones) x |inventory|) look-ups
    whatever the lexicon size. `edit` reads e.g. "a->e at 2", "+s at 5", "-t at 3"
    (1-based positions).
    """
    alphabet = list(dict.fromkeys(inventory))
    found: dict[tuple[str, ...], str] = {}
    n = len(phones)
    for i in range(n):
        cand = phones[:i] + phones[i + 1:]
        if cand and cand in table:
            found.setdefault(cand, f"-{phones[i]} at {i + 1}")
        for p in alphabet:
            if p != phones[i]:
                cand = phones[:i] + (p,) + phones[i + 1:]
                if cand in table:
                    found.setdefault(cand, f"{phones[i]}->{p} at {i + 1}")
    for i in range(n + 1):
        for p in alphabet:
            cand = phones[:i] + (p,) + phones[i:]
            if cand in table:
                found.setdefault(cand, f"+{p} at {i + 1}")
    return list(found.items())


def _lexicon_stage(word: str, src: TraceSources) -> StageTrace:
    lex = src.lexicon
    known = set(src.inventory.phones)
    costs = _costs(lex, src.options.lexicon.rescale_probabilities)
    mine = [e for e in lex.entries if e.word == word]
    if not mine:
        near = difflib.get_close_matches(word, lex.words(), n=3, cutoff=0.75)
        return StageTrace("lexicon", False, {"path": lex.path, "similar_words": near})
    by_phones: dict[tuple[str, ...], list[str]] = {}
    for (w, ph) in costs:
        by_phones.setdefault(ph, []).append(w)
    prons, homophones, near = [], [], []
    seen: set[tuple[str, ...]] = set()
    for e in mine:
        if e.phones in seen:
            continue
        seen.add(e.phones)
        unknown = [p for p in dict.fromkeys(e.phones) if p not in known]
        prons.append({"phones": list(e.phones), "probability": e.probability,
                      "cost": costs[(word, e.phones)], "line": e.line,
                      "unknown_phones": unknown})
        for other in by_phones.get(e.phones, []):
            if other != word:
                homophones.append({"word": other, "phones": list(e.phones),
                                   "cost": costs[(other, e.phones)],
                                   "own_cost": costs[(word, e.phones)]})
        for ph, edit in near_pronunciations(e.phones, by_phones, src.inventory.phones):
            for other in by_phones[ph]:
                if other != word:
                    near.append({"word": other, "phones": list(ph), "edit": edit,
                                 "cost": costs[(other, ph)], "of": list(e.phones)})
    near.sort(key=lambda d: (d["cost"], d["word"]))
    homophones.sort(key=lambda d: (d["cost"], d["word"]))
    usable = [p for p in prons if not p["unknown_phones"]]
    return StageTrace("lexicon", True, {
        "path": lex.path, "pronunciations": prons, "usable_pronunciations": len(usable),
        "homophones": homophones, "near_homophones": near[:_SHOWN],
        "near_homophone_count": len(near)})


def _one_word_utterances(word: str, src: TraceSources, lex: StageTrace) -> None:
    """Adds to the lexicon stage, per usable pronunciation, the word's cost as a one-word
    utterance (G's cheapest path for the sentence plus the pronunciation cost) and the
    cheapest homophone's; silence costs are the same for equal phones and left out."""
    grammar = src.graphs.get("grammar")
    if not lex.present or grammar is None:
        return
    from .score import score_sentences

    homos = lex.details["homophones"]
    lm = src.cache.get("one_word_lm")
    if lm is None:  # every lexicon word at once: G is indexed a single time
        names = src.lexicon.words()
        lm = dict(zip(names, (s.best_path_cost for s in
                              score_sentences(grammar, [[w] for w in names]))))
        src.cache["one_word_lm"] = lm
    out = []
    for pr in lex.details["pronunciations"]:
        if pr["unknown_phones"]:
            continue
        own = lm[word] + pr["cost"]
        rivals = [(lm[h["word"]] + h["cost"], h["word"]) for h in homos
                  if h["phones"] == pr["phones"]]
        best = min(rivals) if rivals else None
        out.append({"phones": pr["phones"], "own_cost": own,
                    "best_other": None if best is None
                    else {"word": best[1], "cost": best[0]},
                    "margin": None if best is None else best[0] - own})
    lex.details["one_word_utterances"] = out


# ------------------------------------------------------------------ language model


def _lm_stage(word: str, model: ArpaModel | None) -> StageTrace:
    if model is None:
        return StageTrace("language_model", None, {"note": "no language model given"})
    index = model.word_index()
    wid = index.get(word)
    if wid is None or not model.orders:
        return StageTrace("language_model", False, {
            "path": model.path, "has_unk": UNKNOWN in index,
            "similar_words": difflib.get_close_matches(word, model.vocab, n=3, cutoff=0.75)})
    uni = model.orders[0]
    row = np.flatnonzero(uni.words[:, 0] == wid)
    start_id = index.get(SENTENCE_START, -1)
    end = index.get(SENTENCE_END, -1)
    skip = {start_id}
    ranked = (uni.words[:, 0] != start_id) & (uni.words[:, 0] != end)
    logp = float(uni.logprob[row[0]]) if row.size else None
    rank = None
    if logp is not None:
        rank = int((uni.logprob[ranked] > logp).sum()) + 1
    listed = [logp] if logp is not None else []
    containing: dict[str, int] = {}
    predicting: dict[str, int] = {}
    contexts: list[dict[str, Any]] = []
    for table in model.orders[1:]:
        w = table.words
        if not len(table):
            continue
        has = (w == wid).any(axis=1)
        pred = w[:, -1] == wid
        containing[str(table.order)] = int(has.sum())
        predicting[str(table.order)] = int(pred.sum())
        rows = np.flatnonzero(pred)
        listed.extend(table.logprob[rows].tolist())
        for r in rows[np.argsort(-table.logprob[rows], kind="stable")][:_SHOWN].tolist():
            same = (w[:, :-1] == w[r, :-1]).all(axis=1)
            same &= ~np.isin(w[:, -1], [wid, end, *skip])
            rival = None
            if same.any():
                j = int(np.flatnonzero(same)[np.argmax(table.logprob[same])])
                rival = {"word": model.vocab[w[j, -1]], "log10prob": float(table.logprob[j])}
            contexts.append({"history": [model.vocab[k] for k in w[r, :-1].tolist()],
                             "log10prob": float(table.logprob[r]), "best_other": rival})
    contexts.sort(key=lambda c: -c["log10prob"])
    others = ranked & (uni.words[:, 0] != wid) & (uni.words[:, 0] != end)
    top = None
    if others.any():
        j = int(np.flatnonzero(others)[np.argmax(uni.logprob[others])])
        top = {"word": model.vocab[uni.words[j, 0]], "log10prob": float(uni.logprob[j])}
    return StageTrace("language_model", True, {
        "path": model.path, "order": model.max_order, "unigram_log10prob": logp,
        "unigram_rank": rank, "vocabulary_size": int(ranked.sum()),
        "most_likely_unigram": top, "ngrams_containing": containing,
        "ngrams_predicting": predicting,
        "backoff_only": model.max_order >= 2 and not any(predicting.values()),
        "zero_everywhere": bool(listed) and all(v <= ZERO_LOG10 for v in listed),
        "best_contexts": contexts[:_SHOWN]})


# --------------------------------------------------------------------- contexts


def _boundary_tails(prons: dict[tuple[str, ...], str], width: int, sil_options: list[tuple],
                    left: bool) -> dict[tuple[str, ...], str]:
    """The phone tails (left: last `width` tokens before a word boundary; right: first
    `width` tokens after it) that can occur, each with an example of where.

    An utterance is ``$`` padding, optional silence, words each followed by optional
    silence, and ``$`` padding; any word may follow any word. A pronunciation at least
    `width` long fixes the tail by itself, so only short ones are combined with earlier
    tails (a fixed point over a set that is small for widths up to 3).
    """
    pad = ("$",) * width
    if width == 0:
        return {(): "any neighbour"}
    tails: dict[tuple[str, ...], str] = {}
    for sil in sil_options:
        t = (pad + sil)[-width:] if left else (sil + pad)[:width]
        tails.setdefault(t, "the utterance start" if left else "the utterance end")
    pieces = [(q + sil, w) for q, w in prons.items() for sil in sil_options]
    changed = True
    while changed:
        changed = False
        for seq, w in pieces:
            for t, where in list(tails.items()) if len(seq) < width else [(pad, "")]:
                new = (t + seq)[-width:] if left else (seq + t)[:width]
                if new not in tails:
                    tails[new] = f"'{w}'" if len(seq) >= width else f"'{w}' after {where}"
                    changed = True
    return tails


def _context_stage(word: str, src: TraceSources) -> StageTrace | None:
    """The context map's view of the word's phones, or None without a context map.

    Every window centred on a phone of one of the word's usable pronunciations is
    formed, with the word's possible left neighbours (tails of any word, silence or the
    utterance start) and right neighbours, and tied with `contexts.model_for`.
    """
    cmap = src.context_map
    if cmap is None:
        return None
    try:
        from ..builders.contexts import format_context, model_for, visible_context
    except ImportError:
        return StageTrace("context", None, {
            "note": "this netbuild cannot tie contexts (no builders.contexts)"})
    known = set(src.inventory.phones)
    prons: dict[tuple[str, ...], str] = {}
    for e in src.lexicon.entries:
        if all(p in known for p in e.phones):
            prons.setdefault(e.phones, e.word)
    s = src.options.lexicon.silence_probability
    sil = src.inventory.optional_silence
    sil_options: list[tuple] = [()]
    if sil is not None and s > 0:
        sil_options = [(sil,)] if s >= 1 else [(), (sil,)]
    lefts = _boundary_tails(prons, cmap.left, sil_options, left=True)
    nexts = _boundary_tails(prons, cmap.right, sil_options, left=False)
    rights: dict[tuple[str, ...], str] = {}
    for h, where in nexts.items():  # the word's own optional silence comes first
        for so in sil_options:
            rights.setdefault((so + h)[:cmap.right], where)
    uncovered: dict[tuple, str] = {}
    checked = 0
    for phones in dict.fromkeys(e.phones for e in src.lexicon.entries
                                if e.word == word and all(p in known for p in e.phones)):
        n = len(phones)
        for i in range(n):
            ls = {(t + phones)[i:i + cmap.left]: w for t, w in lefts.items()} \
                if i < cmap.left else {phones[i - cmap.left:i]: ""}
            rs = {(phones + h)[i + 1:i + 1 + cmap.right]: w for h, w in rights.items()} \
                if i + cmap.right >= n else {phones[i + 1:i + 1 + cmap.right]: ""}
            for lt, lw in ls.items():
                for rt, rw in rs.items():
                    checked += 1
                    if model_for(cmap, lt, phones[i], rt) is not None:
                        continue
                    key = visible_context(cmap, (*lt, phones[i], *rt))
                    where = f"'{word}'"
                    if lw:
                        where = f"{lw} + {where}"
                    if rw:
                        where = f"{where} + {rw}"
                    uncovered.setdefault(key, where)
    shown = [{"context": format_context(k), "where": w} for k, w in uncovered.items()]
    return StageTrace("context", not shown, {
        "path": cmap.path, "windows_checked": checked, "uncovered": shown[:_SHOWN],
        "uncovered_count": len(shown)})


# ------------------------------------------------------------------- graph stages


def _distances(fst: pynini.Fst, reverse: bool) -> np.ndarray:
    n = fst.num_states()
    out = np.full(n, np.inf)
    if n == 0 or fst.start() == pynini.NO_STATE_ID:
        return out
    d = pynini.shortestdistance(fst, reverse=reverse)
    k = min(n, len(d))
    out[:k] = [float(w) for w in d[:k]]
    return out


def label_paths(fst: pynini.Fst, label: int, exclude: Sequence[int] = (),
                names: pynini.SymbolTable | None = None,
                cache: dict[str, Any] | None = None) -> dict[str, Any]:
    """Reports whether a complete path of `fst` emits output `label`, and what competes.

    Works in bulk: the arcs come from `fst_to_arrays`, the shortest distances from the
    start and to the final states from OpenFst (tropical), so the cheapest complete
    path through arc a costs ``forward[src] + weight + backward[dst]``.

    Args:
      fst: a tropical FST.
      label: the output label traced.
      exclude: further output labels that are not competitors (e.g. the back-off marker).
      names: the output symbol table, to name the competitors.
      cache: a dict kept by the caller for one `fst`: its arrays and distances are
        computed once and reused for every label traced.

    Returns:
      ``arcs`` (arcs with the label), ``states`` (distinct source states), ``reachable``
      (some such arc lies on a start-to-final path), ``best_cost`` (the cheapest complete
      path emitting the label, None if none), ``competitor`` (the cheapest path through
      another output label leaving the state of that best arc: word, cost, margin =
      competitor cost - best cost; None if none), ``cheapest_at`` (of the states
      whose arcs emit the label and lie on a complete path: in how many the traced
      label's path is the cheapest of all output labels leaving the state).
    """
    if cache is None:
        cache = {}
    if "arrays" not in cache:
        cache["arrays"] = fst_to_arrays(fst)
    a = cache["arrays"]
    mine = a.olabel == label
    report: dict[str, Any] = {"arcs": int(mine.sum()),
                              "states": int(np.unique(a.src[mine]).size),
                              "reachable": False, "best_cost": None, "competitor": None,
                              "cheapest_at": 0}
    if not mine.any():
        return report
    if "distances" not in cache:
        cache["distances"] = (_distances(fst, reverse=False), _distances(fst, reverse=True))
    fwd, bwd = cache["distances"]
    through = fwd[a.src] + a.weight.astype(np.float64) + bwd[a.dst]
    ok = mine & np.isfinite(through)
    if not ok.any():
        return report
    best = int(np.flatnonzero(ok)[np.argmin(through[ok])])
    report["reachable"] = True
    report["best_cost"] = float(through[best])
    rival = (a.olabel != 0) & ~mine & ~np.isin(a.olabel, list(exclude)) \
        & np.isfinite(through)
    here = rival & (a.src == a.src[best])
    if here.any():
        j = int(np.flatnonzero(here)[np.argmin(through[here])])
        lab = int(a.olabel[j])
        report["competitor"] = {
            "word": names.find(lab) if names is not None else str(lab),
            "cost": float(through[j]), "margin": float(through[j] - through[best])}
    states = np.unique(a.src[ok])
    mine_best = np.full(a.num_states, np.inf)
    np.minimum.at(mine_best, a.src[ok], through[ok])
    rival_best = np.full(a.num_states, np.inf)
    np.minimum.at(rival_best, a.src[rival], through[rival])
    report["cheapest_at"] = int((mine_best[states] <= rival_best[states]).sum())
    report["on_path_states"] = int(states.size)
    return report


def _graph_stage(name: str, fst: pynini.Fst, word: str,
                 words: pynini.SymbolTable | None, dropped: Sequence[str],
                 cache: dict[str, Any]) -> StageTrace:
    table = words if words is not None else fst.output_symbols()
    label = table.find(word) if table is not None else pynini.NO_SYMBOL
    if label == pynini.NO_SYMBOL or label <= 0:
        details: dict[str, Any] = {"in_word_table": False}
        if word in dropped:
            details["dropped_at_build"] = True
        return StageTrace(name, False, details)
    exclude = [table.find(BACKOFF)] if table.find(BACKOFF) != pynini.NO_SYMBOL else []
    report = label_paths(fst, label, exclude, table, cache)
    report["in_word_table"] = True
    return StageTrace(name, bool(report["reachable"]), report)


# ------------------------------------------------------------------------ verdict


def _verdict(word: str, src: TraceSources, stages: dict[str, StageTrace]
             ) -> tuple[str, str | None, str, str]:
    lex = stages["lexicon"]
    lex_path = src.lexicon.path
    if not lex.present:
        near = lex.details.get("similar_words") or []
        hint = f" (similar words there: {', '.join(near)})" if near else ""
        return ("not_in_lexicon", "lexicon", f"'{word}' has no pronunciation in "
                f"{lex_path}{hint}",
                f"add a line '{word} PHONE...' to {lex_path}")
    if lex.details["usable_pronunciations"] == 0:
        bad = sorted({p for pr in lex.details["pronunciations"] for p in pr["unknown_phones"]})
        line = lex.details["pronunciations"][0]["line"]
        return ("unknown_phone", "lexicon",
                f"every pronunciation of '{word}' uses a phone missing from the inventory "
                f"({', '.join(bad)})",
                f"fix the spelling at {lex_path}:{line} or add the phone(s) to "
                f"{src.inventory.path}")
    lm = stages["language_model"]
    model_path = src.model.path if src.model is not None else "the language model"
    if lm.present is False:
        unk = " (its <unk> does not name this word)" if lm.details.get("has_unk") else ""
        return ("not_in_language_model", "language_model",
                f"'{word}' is not in the vocabulary of {model_path}{unk}",
                "add sentences with it to the training text and re-estimate the model "
                "(netbuild estimate), or add its n-grams to the model")
    if lm.present and lm.details["zero_everywhere"]:
        return ("zero_probability", "language_model",
                f"every probability of '{word}' in {model_path} is 10^{ZERO_LOG10:g} (zero)",
                "re-estimate the model with sentences that use the word, or give it a "
                "real probability in its 1-gram line")
    ctx = stages.get("context")
    if ctx is not None and ctx.present is False:
        first = ctx.details["uncovered"][0]
        return ("uncovered_context", "context",
                f"{ctx.details['uncovered_count']} context(s) of '{word}' have no model, "
                f"e.g. {first['context']} in {first['where']}",
                f"add a rule covering them to {ctx.details['path']} (a rule with '*' "
                "tokens catches every context of a phone)")
    for name in GRAPH_STAGES:
        st = stages.get(name)
        if st is None or st.present is not False:
            continue
        if st.details.get("dropped_at_build"):
            reason = (f"'{word}' was dropped from the grammar when the graph was built "
                      "(the lexicon had no pronunciation for it then)")
        elif not st.details.get("in_word_table", True):
            reason = f"'{word}' is not in the word table of stage '{name}'"
        elif st.details.get("arcs", 0) == 0:
            reason = f"no arc of stage '{name}' emits '{word}'"
        else:
            reason = (f"stage '{name}' has {st.details['arcs']} arc(s) emitting '{word}' "
                      "but none lies on a path from the start to a final state")
        changed = " (the inputs changed since the build)" if src.warnings else ""
        return ("unreachable", name, reason + changed,
                "rebuild the graph with 'netbuild build'; if the word stays unreachable, "
                "report it with this trace")
    return ("ok", None, f"'{word}' can be recognized", "nothing to change")


def trace_word(word: str, sources: TraceSources) -> WordTrace:
    """Follows `word` through the lexicon, the model, the context map and the graphs.

    Args:
      word: the word, spelt as in the lexicon.
      sources: the inputs and FSTs (see `TraceSources`).

    Returns:
      A `WordTrace` whose verdict is the first cause (in `CAUSES` order) found.
    """
    stages: dict[str, StageTrace] = {}
    stages["lexicon"] = _lexicon_stage(word, sources)
    stages["language_model"] = _lm_stage(word, sources.model)
    ctx = _context_stage(word, sources)
    if ctx is not None:
        stages["context"] = ctx
    for name in GRAPH_STAGES:
        fst = sources.graphs.get(name)
        if fst is not None:
            stages[name] = _graph_stage(name, fst, word, sources.word_symbols,
                                        sources.dropped, sources.cache.setdefault(name, {}))
    if not sources.graphs:
        stages["wordgraph"] = StageTrace("wordgraph", None, {
            "note": sources.graph_note or "no graph given"})
    _one_word_utterances(word, sources, stages["lexicon"])
    verdict, stage, reason, fix = _verdict(word, sources, stages)
    if verdict == "ok":
        lost = [u for u in stages["lexicon"].details.get("one_word_utterances", [])
                if u["best_other"] is not None and u["best_other"]["cost"] < u["own_cost"]]
        if lost:
            u = lost[0]
            reason += (f", but spoken alone as {' '.join(u['phones'])} it loses to "
                       f"'{u['best_other']['word']}' by {-u['margin']:.3f}")
            fix = ("give it more language-model weight (training sentences with it) or a "
                   "pronunciation of its own")
    return WordTrace(word, verdict, stage, reason, fix, list(stages.values()),
                     list(sources.warnings))


# ----------------------------------------------------------------------- sources


def _usable_lexicon(lexicon: Lexicon, inventory: PhoneInventory) -> Lexicon:
    known = set(inventory.phones)
    return Lexicon([e for e in lexicon.entries if all(p in known for p in e.phones)],
                   lexicon.path)


def _build_graphs(src: TraceSources) -> None:
    """Builds G, L and the word-level graph in memory from `src` (fills `src.graphs`)."""
    from ..builders.grammar import build_grammar
    from ..builders.lexicon import build_lexicon
    from ..builders.vocabulary import restrict_vocabulary
    from ..pipeline import build_word_graph

    if src.model is None:
        src.graph_note = "no language model, so no graph"
        return
    lexicon = _usable_lexicon(src.lexicon, src.inventory)
    words = set(lexicon.words())
    policy = src.options.grammar.oov_policy
    policy = "unk" if policy == "unk" and UNKNOWN in words else "drop"
    try:
        model, report = restrict_vocabulary(src.model, words, policy)
        grammar = build_grammar(model)
        lfst = build_lexicon(lexicon, src.inventory, grammar.word_symbols,
                             src.options.lexicon)
        opts = dataclasses.replace(src.options, checks=False)
        graph = build_word_graph(lfst, grammar, opts)
    except (InputError, StageError) as err:
        src.graph_note = f"the word-level graph could not be built: {err}"
        return
    src.dropped = list(report.dropped)
    src.word_symbols = grammar.word_symbols
    src.graphs = {"grammar": grammar.fst, "lexicon_fst": lfst.fst, "wordgraph": graph.fst}


def _read_context(path: Path | None, inventory: PhoneInventory, warnings: list[str]) -> Any:
    if path is None:
        return None
    try:
        from ..io.context_map import read_context_map
    except ImportError:
        warnings.append(f"{path}: this netbuild cannot read context maps yet; "
                        "the context stage is skipped")
        return None
    return read_context_map(path, inventory)


def _read_sources(lexicon_path: Path, lm_path: Path | None, phones_path: Path | None,
                  options: BuildOptions, warnings: list[str]) -> TraceSources:
    # The lexicon is read without the phone check: trace reports unknown phones itself.
    lexicon = read_lexicon(lexicon_path, None, options.lexicon)
    inventory = read_phones(phones_path) if phones_path is not None \
        else inventory_from_lexicon(lexicon)
    model = read_arpa(lm_path) if lm_path is not None else None
    return TraceSources(lexicon, inventory, model, options, warnings=warnings)


def trace_project(word: str, project: Any, context: str | Path | None = None) -> WordTrace:
    """Traces `word` through a project's inputs (see `project_sources`)."""
    return trace_word(word, project_sources(project, context))


def project_sources(project: Any, context: str | Path | None = None) -> TraceSources:
    """Reads the project's inputs and builds G, L and the word-level graph in memory.

    Args:
      project: a `netbuild.project.Project` (a `context` attribute, when present,
        names the context map).
      context: a context map file to use instead of the project's.

    Raises:
      InputError: an input cannot be read (every located problem of that input).
    """
    warnings: list[str] = []
    src = _read_sources(project.lexicon, project.lm, project.phones, project.options,
                        warnings)
    cpath = context if context is not None else getattr(project, "context", None)
    src.context_map = _read_context(Path(cpath) if cpath is not None else None,
                                    src.inventory, warnings)
    _build_graphs(src)
    return src


def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def _options_from_manifest(manifest: dict[str, Any]) -> BuildOptions:
    opts = manifest.get("options") or {}

    def pick(cls, values):
        names = {f.name for f in dataclasses.fields(cls)}
        return cls(**{k: v for k, v in (values or {}).items() if k in names})

    lex = pick(LexiconOptions, opts.get("lexicon"))
    gram = pick(GrammarOptions, opts.get("grammar"))
    rest = {k: v for k, v in opts.items() if k not in ("lexicon", "grammar")}
    base = pick(BuildOptions, rest)
    return dataclasses.replace(base, lexicon=lex, grammar=gram)


def build_inputs(directory: str | Path) -> tuple[dict[str, Any], dict[str, Path | None],
                                                  list[str]]:
    """Returns a build's manifest, its input paths by name, and warnings about inputs
    that changed since the build (their sha256 differs from the manifest's).

    Raises:
      InputError: the directory is not a build, or an input it names no longer exists.
    """
    from ..workflow import MANIFEST, _read_manifest

    d = Path(directory)
    manifest = _read_manifest(d)
    paths: dict[str, Path | None] = {}
    warnings: list[str] = []
    for name, record in (manifest.get("inputs") or {}).items():
        if not record:
            paths[name] = None
            continue
        p = Path(record["path"])
        if not p.is_file():
            raise InputError(f"input '{name}' of the build ({p}) no longer exists",
                             "restore it, or trace with --project", path=str(d / MANIFEST))
        paths[name] = p
        if record.get("sha256") and _sha256(p) != record["sha256"]:
            warnings.append(f"{p}: changed since the graph in {d} was built; the graph "
                            "stages show the old input")
    if paths.get("lexicon") is None:
        raise InputError(f"{MANIFEST} names no lexicon input",
                         "rebuild the directory with 'netbuild build'", path=str(d / MANIFEST))
    return manifest, paths, warnings


def trace_build(word: str, directory: str | Path) -> WordTrace:
    """Traces `word` through a build directory (see `build_sources`)."""
    return trace_word(word, build_sources(directory))


def build_sources(directory: str | Path) -> TraceSources:
    """Returns the sources of a build directory: its inputs (from the manifest) and FSTs.

    The grammar, the lexicon transducer, the word-level graph and (when the build's
    graph is not the word-level graph) the full graph are examined. An input whose
    sha256 differs from the manifest's gives a warning.

    Raises:
      InputError: the directory is not a build, or a file it names is missing or broken.
    """
    from ..workflow import load_build

    manifest, paths, warnings = build_inputs(directory)
    options = _options_from_manifest(manifest)
    src = _read_sources(paths["lexicon"], paths.get("lm"), paths.get("phones"), options,
                        warnings)
    src.context_map = _read_context(paths.get("context"), src.inventory, warnings)
    loaded = load_build(directory)
    d = Path(directory)
    inter = manifest.get("intermediates") or {}
    src.word_symbols = loaded.word_symbols
    src.graphs = {"grammar": loaded.grammar, "lexicon_fst": loaded.lexicon}
    word_file = inter.get("wordgraph")
    if word_file and word_file != manifest.get("graph"):
        path = d / word_file
        try:
            src.graphs["wordgraph"] = pynini.Fst.read(str(path))
        except Exception as err:  # OpenFst raises its own error types
            raise InputError(f"cannot read the word-level graph ({err})",
                             "rebuild the directory with 'netbuild build'",
                             path=str(path)) from err
        src.graphs["graph"] = loaded.graph
    else:
        src.graphs["wordgraph"] = loaded.graph
    src.dropped = list((manifest.get("vocabulary") or {}).get("dropped") or [])
    return src


def format_trace(trace: WordTrace) -> str:
    """Returns the trace as text: the verdict first, then one block per stage."""
    lines = [f"{trace.word}: {trace.verdict}"
             + (f" (at {trace.stage})" if trace.stage else ""),
             f"  reason: {trace.reason}", f"  fix:    {trace.fix}"]
    for w in trace.warnings:
        lines.append(f"  warning: {w}")
    for st in trace.stages:
        mark = {True: "yes", False: "NO", None: "-"}[st.present]
        lines.append(f"{st.name}: {mark}")
        for key, value in st.details.items():
            if value in (None, [], {}, ""):
                continue
            text = json.dumps(_plain(value), ensure_ascii=False)
            if len(text) > 160:
                text = text[:157] + "..."
            lines.append(f"  {key}: {text}")
    return "\n".join(lines)
