"""The full decoding graph against a brute-force enumeration straight from the inputs.

The reference below reads the tiny inputs of tests/data/full/ with its own small
parsers (phone inventory, lexicon with a probability column, ARPA model, context map)
and enumerates, in plain Python, every utterance of up to a few words that fits into
`MAX_FRAMES` frames: every pronunciation, every optional-silence choice, every HMM
state duration. It shares no code with netbuild's builders; netbuild is used only to
build the graph under test and to read the build directory back.

What a path of the full graph costs (tropical, negative natural logs), and why:

- Pronunciation: ``-ln(p / max p)`` of the word's pronunciation (the lexicon's
  ``rescale`` default; docs/formats.md, "Plain layout").
- Optional silence: every word boundary -- the utterance start, between two words and
  the end -- has the silence phone with probability ``s`` (cost ``-ln s``) or nothing
  (cost ``-ln(1 - s)``); see the docstring of netbuild/builders/lexicon.py. An
  utterance of n words has n + 1 boundaries; the empty utterance has one.
- Language model: the graph is a transducer whose paths through G's back-off arcs
  survive with the auxiliary markers removed, so a word sequence may be spelt by
  several paths and the graph's cost of (emissions, words) is the cheapest of them
  (tropical sum = min). For a model of order <= 2 (all the tiny models) the cheapest
  path through the back-off automaton scores each word w after history h with
  ``min(-ln P(w | h) if (h, w) is listed, -ln alpha(h) + cost(w | h minus its oldest
  word))`` and keeps the full history h w for the next word: from the unigram state,
  reading w leads to the history w (or folds alpha(w) = 1 when w is no history). So
  the reference computes that minimum from the ARPA numbers themselves. The bigram
  model lists ``no tea`` at log10 -1.5 while the back-off path costs
  -0.2 + -0.8 = -1.0: there the cheaper back-off path must win, and a graph that
  followed only the exact back-off rule would fail.
  # reference: Allauzen, Mohri & Roark (2003), "Generalized algorithms for
  # constructing statistical language models", ACL, section 3 (back-off automaton,
  # failure transitions approximated by epsilon arcs)
- HMM: every emitting state visited for d >= 1 frames costs
  ``(d - 1) * -ln(self) + -ln(forward)``  # common practice, no source
  (a left-to-right model without skips, each state entered once and left once).
  Emission class c is the input label c + 1 (0 is epsilon), spelt ``e<c>``.
- Context: a context-dependent phone sees LEFT phones before it and RIGHT after it,
  ``$`` beyond the utterance edge; a context-independent neighbour is seen as ``$``
  unless ``independent-context yes``; a context-independent phone takes the model of
  the first rule whose centre matches it. The first matching rule wins.

The graph is enumerated with a depth-first search over its arcs, bounded by the number
of non-epsilon input labels (with the exact distance-to-final in frames as pruning),
and both sides are compared as maps (emission names, words) -> cheapest cost: the same
keys, and costs within 1e-4.
"""

from __future__ import annotations

import dataclasses
import functools
import math
import textwrap
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest

DATA = Path(__file__).resolve().parent.parent / "data" / "full"
LN10 = math.log(10.0)
TOLERANCE = 1e-4
SILENCE_PROBABILITY = 0.3
MAX_FRAMES = 10  # every two-word utterance fits (at most 4 + 4 frames without silence)


# ------------------------------------------------------------------ own input parsers


def _lines(path: Path) -> Iterator[list[str]]:
    for raw in path.read_text(encoding="utf-8").splitlines():
        text = raw.split("#", 1)[0].strip()
        if text:
            yield text.split()


@dataclasses.dataclass
class RefPhones:
    phones: list[str]
    silence: str | None
    classes: dict[str, set[str]]


def parse_phones(path: Path) -> RefPhones:
    """Reads the inventory: phone lines (optional role), then ``NAME: phones`` lines."""
    phones, silence, classes = [], None, {}
    for fields in _lines(path):
        if fields[0].endswith(":"):
            classes[fields[0][:-1]] = set(fields[1:])
            continue
        phones.append(fields[0])
        if len(fields) > 1 and fields[1] == "silence" and silence is None:
            silence = fields[0]
    return RefPhones(phones, silence, classes)


def parse_lexicon(path: Path) -> dict[str, dict[tuple[str, ...], float]]:
    """Reads ``word probability phones...``; returns word -> phones -> cost.

    A repeated (word, phones) pair keeps its larger probability; costs are rescaled so
    each word's most likely pronunciation costs 0 (-ln(p / max p)).
    """
    best: dict[str, dict[tuple[str, ...], float]] = {}
    for fields in _lines(path):
        word, p, phones = fields[0], float(fields[1]), tuple(fields[2:])
        prons = best.setdefault(word, {})
        prons[phones] = max(p, prons.get(phones, 0.0))
    return {w: {ph: -math.log(p / max(prons.values())) for ph, p in prons.items()}
            for w, prons in best.items()}


@dataclasses.dataclass
class RefModel:
    """An ARPA back-off model: n-gram tuple -> (log10 P, log10 alpha)."""

    order: int
    ngrams: dict[tuple[str, ...], tuple[float, float]]

    @property
    def words(self) -> list[str]:
        return [g[0] for g in self.ngrams if len(g) == 1 and g[0] not in ("<s>", "</s>")]

    def cheapest(self, history: tuple[str, ...], word: str) -> float:
        """The cheapest back-off-automaton cost (-ln) of `word` after `history`."""
        candidates = []
        if history + (word,) in self.ngrams:
            candidates.append(-LN10 * self.ngrams[history + (word,)][0])
        if history:
            alpha = self.ngrams.get(history, (0.0, 0.0))[1]
            candidates.append(-LN10 * alpha + self.cheapest(history[1:], word))
        return min(candidates) if candidates else math.inf

    def sentence_cost(self, words: tuple[str, ...]) -> float:
        history: tuple[str, ...] = ("<s>",) if self.order > 1 else ()
        total = 0.0
        for w in (*words, "</s>"):
            total += self.cheapest(history, w)
            history = (history + (w,))[-(self.order - 1):] if self.order > 1 else ()
        return total


def parse_arpa(path: Path) -> RefModel:
    ngrams: dict[tuple[str, ...], tuple[float, float]] = {}
    order, current = 0, 0
    for raw in path.read_text(encoding="utf-8").splitlines():
        line = raw.strip()
        if not line or line == "\\data\\":
            continue
        if line.startswith("ngram "):
            order = max(order, int(line.split()[1].split("=")[0]))
        elif line.endswith("-grams:"):
            current = int(line[1:].split("-")[0])
        elif line == "\\end\\":
            break
        elif current:
            fields = line.split()
            gram = tuple(fields[1:1 + current])
            alpha = float(fields[1 + current]) if len(fields) > 1 + current else 0.0
            ngrams[gram] = (float(fields[0]), alpha)
    return RefModel(order, ngrams)


@dataclasses.dataclass(eq=False)
class RefContextMap:
    left: int
    right: int
    independent: set[str]
    independent_is_context: bool
    models: dict[str, list[tuple[int, float, float]]]
    rules: list[tuple[tuple[str, ...], str, tuple[str, ...], str]]
    classes: dict[str, set[str]]

    def _match(self, token: str, ctx: str) -> bool:
        if token == "*":
            return True
        if token == "$":
            return ctx == "$"
        if token.startswith("@"):
            return ctx != "$" and ctx in self.classes[token[1:]]
        return token == ctx

    def model_of(self, phones: list[str], j: int) -> str:
        """The model of position j of the utterance's phone sequence."""
        centre = phones[j]
        if centre in self.independent:
            for _, c, _, model in self.rules:
                if self._match(c, centre):
                    return model
            raise AssertionError(f"no rule for context-independent {centre}")

        def seen(k: int) -> str:
            if k < 0 or k >= len(phones):
                return "$"
            if phones[k] in self.independent and not self.independent_is_context:
                return "$"
            return phones[k]

        left = tuple(seen(j - self.left + i) for i in range(self.left))  # oldest first
        right = tuple(seen(j + 1 + i) for i in range(self.right))  # nearest first
        return self._first_rule(left, centre, right)

    @functools.lru_cache(maxsize=None)
    def _first_rule(self, left: tuple[str, ...], centre: str, right: tuple[str, ...]
                    ) -> str:
        for lt, c, rt, model in self.rules:
            if (self._match(c, centre) and all(map(self._match, lt, left))
                    and all(map(self._match, rt, right))):
                return model
        raise AssertionError(f"uncovered context {left} {centre} {right}")

    def fewest_states(self, phone: str) -> int:
        """A lower bound on the states of `phone`: its smallest candidate model."""
        return min(len(self.models[m]) for _, c, _, m in self.rules
                   if self._match(c, phone))

    __hash__ = object.__hash__


def parse_context(path: Path, classes: dict[str, set[str]]) -> RefContextMap:
    cmap = RefContextMap(0, 0, set(), False, {}, [], classes)
    for fields in _lines(path):
        head, rest = fields[0], fields[1:]
        if head == "widths":
            cmap.left, cmap.right = int(rest[0]), int(rest[1])
        elif head == "independent":
            cmap.independent.update(rest)
        elif head == "independent-context":
            cmap.independent_is_context = rest[0] == "yes"
        elif head == "model":
            states = []
            for tok in rest[1:]:
                c, s, f = tok.split(":")
                states.append((int(c), float(s), float(f)))
            cmap.models[rest[0]] = states
        elif head == "rule":
            arrow = rest.index("->")
            toks = rest[:arrow]
            assert len(toks) == cmap.left + 1 + cmap.right
            cmap.rules.append((tuple(toks[:cmap.left]), toks[cmap.left],
                               tuple(toks[cmap.left + 1:]), rest[arrow + 1]))
        else:
            raise AssertionError(f"unknown line {fields}")
    return cmap


# ------------------------------------------------------------------ the enumeration


def hmm_sequences(states: tuple[tuple[int, float, float], ...],
                  budget: int) -> dict[tuple[int, ...], float]:
    """Every emission-label sequence of `states` (in order) up to `budget` frames.

    Labels are emission class + 1; each state lasts d >= 1 frames and costs
    (d - 1) * -ln(self) + -ln(forward). Several segmentations giving the same sequence
    keep the cheapest.
    """

    @functools.cache
    def suffix(i: int, left: int) -> dict[tuple[int, ...], float]:
        if i == len(states):
            return {(): 0.0}
        c, self_p, fwd = states[i]
        out: dict[tuple[int, ...], float] = {}
        max_d = left - (len(states) - i - 1)
        loop = -math.log(self_p) if self_p > 0 else math.inf
        for d in range(1, max_d + 1):
            if d > 1 and math.isinf(loop):
                break
            head = (c + 1,) * d
            here = (d - 1) * loop - math.log(fwd)
            for tail, cost in suffix(i + 1, left - d).items():
                key = head + tail
                total = here + cost
                if total < out.get(key, math.inf):
                    out[key] = total
        return out

    if len(states) > budget:
        return {}
    return suffix(0, budget)


@dataclasses.dataclass
class Reference:
    phones: RefPhones
    lexicon: dict[str, dict[tuple[str, ...], float]]
    model: RefModel
    cmap: RefContextMap
    silence_probability: float

    @classmethod
    def from_files(cls, phones: Path, lexicon: Path, lm: Path, context: Path,
                   silence_probability: float) -> "Reference":
        inv = parse_phones(phones)
        return cls(inv, parse_lexicon(lexicon), parse_arpa(lm),
                   parse_context(context, inv.classes), silence_probability)

    def phone_sequences(self, max_frames: int) -> Iterator[
            tuple[tuple[str, ...], list[str], float]]:
        """Yields (words, phones with silences, pronunciation + silence + LM cost)."""
        s = self.silence_probability
        sil = self.phones.silence if s > 0 else None
        boundary = [(False, -math.log1p(-s))] + ([(True, -math.log(s))] if sil else [])
        # a phone never takes fewer frames than its smallest candidate model
        min_len = {p: self.cmap.fewest_states(p) for p in self.phones.phones}
        words = [w for w in self.model.words if w in self.lexicon]

        def extend(seq: tuple[str, ...], prons: list[tuple[str, ...]], cost: float,
                   frames: int) -> Iterator[tuple[tuple[str, ...], list, float]]:
            yield seq, prons, cost
            for w in words:
                for ph, c in self.lexicon[w].items():
                    f = frames + sum(min_len[p] for p in ph)
                    if f <= max_frames:
                        yield from extend(seq + (w,), prons + [ph], cost + c, f)

        for seq, prons, cost in extend((), [], 0.0, 0):
            lm = self.model.sentence_cost(seq)
            if math.isinf(lm):
                continue
            n_bound = len(seq) + 1
            for choice in _product(boundary, n_bound):
                phones: list[str] = []
                extra = 0.0
                for k in range(n_bound):
                    with_sil, c = choice[k]
                    extra += c
                    if with_sil:
                        phones.append(sil)
                    if k < len(seq):
                        phones.extend(prons[k])
                yield seq, phones, cost + extra + lm

    def enumerate(self, max_frames: int) -> dict[tuple[tuple[int, ...], tuple[str, ...]],
                                                  float]:
        """(emission labels, words) -> cheapest cost, for every sequence <= max_frames."""
        table: dict[tuple[tuple[int, ...], tuple[str, ...]], float] = {}
        for words, phones, cost in self.phone_sequences(max_frames):
            states: list[tuple[int, float, float]] = []
            for j in range(len(phones)):
                states.extend(self.cmap.models[self.cmap.model_of(phones, j)])
            for labels, hmm_cost in hmm_sequences(tuple(states), max_frames).items():
                key = (labels, words)
                total = cost + hmm_cost
                if total < table.get(key, math.inf):
                    table[key] = total
        return table


def _product(options: list, n: int) -> Iterator[tuple]:
    if n == 0:
        yield ()
        return
    for head in options:
        for tail in _product(options, n - 1):
            yield (head,) + tail


# ------------------------------------------------------------------ the graph side


def frames_to_final(fst) -> np.ndarray:
    """Each state's fewest non-epsilon input labels to a final state (inf if none)."""
    n = fst.num_states()
    dist = np.full(n, np.inf)
    for q in fst.states():
        if fst.final(q) != fst.final(q).zero(fst.weight_type()):
            dist[q] = 0
    arcs = [(q, a.ilabel != 0, a.nextstate) for q in fst.states() for a in fst.arcs(q)]
    for _ in range(n + 1):  # Bellman-Ford on 0/1 lengths
        changed = False
        for q, counts, nxt in arcs:
            d = dist[nxt] + (1 if counts else 0)
            if d < dist[q]:
                dist[q] = d
                changed = True
        if not changed:
            break
    return dist


def enumerate_graph(fst, max_frames: int, max_epsilons: int = 64
                    ) -> dict[tuple[tuple[int, ...], tuple[int, ...]], float]:
    """(input labels, output labels) -> cheapest cost over every path of `fst` with at
    most `max_frames` non-epsilon input labels (epsilons dropped from both sides)."""
    zero = fst.final(fst.start()).zero(fst.weight_type())
    arcs = {q: [(a.ilabel, a.olabel, float(a.weight), a.nextstate) for a in fst.arcs(q)]
            for q in fst.states()}
    final = {q: float(fst.final(q)) for q in fst.states() if fst.final(q) != zero}
    togo = frames_to_final(fst)
    out: dict[tuple[tuple[int, ...], tuple[int, ...]], float] = {}

    def dfs(q: int, ins: tuple, outs: tuple, cost: float, eps: int) -> None:
        if eps > max_epsilons:
            raise AssertionError("input-epsilon cycle (or chain) in the graph")
        if q in final:
            key = (ins, outs)
            total = cost + final[q]
            if total < out.get(key, math.inf):
                out[key] = total
        for il, ol, w, nxt in arcs[q]:
            used = len(ins) + (1 if il else 0)
            if used + togo[nxt] > max_frames:
                continue
            dfs(nxt, ins + (il,) if il else ins, outs + (ol,) if ol else outs,
                cost + w, 0 if il else eps + 1)

    if fst.start() >= 0 and togo[fst.start()] <= max_frames:
        dfs(fst.start(), (), (), 0.0, 0)
    return out


def named(table: dict, isyms, osyms) -> dict:
    """The same map with labels spelt by the symbol tables."""
    inames, onames = dict(isyms), dict(osyms)
    return {(tuple(inames[i] for i in ins), tuple(onames[o] for o in outs)): c
            for (ins, outs), c in table.items()}


def reference_named(ref: dict) -> dict:
    return {(tuple(f"e{lab - 1}" for lab in labels), words): c
            for (labels, words), c in ref.items()}


def compare_tables(expected: dict, got: dict, tolerance: float = TOLERANCE) -> list[str]:
    """Lists the differences of two (inputs, words) -> cost maps (empty when equal)."""
    problems = []
    for key in sorted(expected.keys() - got.keys(), key=str)[:5]:
        problems.append(f"missing from the graph: {key} cost {expected[key]:.5f}")
    for key in sorted(got.keys() - expected.keys(), key=str)[:5]:
        problems.append(f"extra in the graph: {key} cost {got[key]:.5f}")
    worse = [(abs(expected[k] - got[k]), k) for k in expected.keys() & got.keys()
             if not abs(expected[k] - got[k]) <= tolerance]
    for diff, key in sorted(worse, key=lambda t: (-t[0], str(t[1])))[:5]:
        problems.append(f"cost of {key}: expected {expected[key]:.5f}, got {got[key]:.5f}")
    if problems:
        problems.insert(0, f"{len(expected.keys() - got.keys())} missing, "
                           f"{len(got.keys() - expected.keys())} extra, "
                           f"{len(worse)} with another cost")
    return problems


# ------------------------------------------------------------------ building the graph


def write_project(directory: Path, lm: str, context: str, *, final_optimize: bool = True,
                  silence_probability: float = SILENCE_PROBABILITY) -> Path:
    """Writes a project file over the tiny inputs and returns its path."""
    project = directory / "project.toml"
    project.write_text(textwrap.dedent(f"""\
        [inputs]
        phones = "{DATA / 'inventory.txt'}"
        lexicon = "{DATA / 'lexicon.txt'}"
        lm = "{DATA / lm}"
        context = "{DATA / context}"

        [lexicon]
        probabilities = true
        silence_probability = {silence_probability}

        [grammar]
        oov_policy = "fail"

        [build]
        final_optimize = {'true' if final_optimize else 'false'}
        determinize_max_memory = "1GiB"
        determinize_timeout = 120
        """), encoding="utf-8")
    return project


def build_tiny(directory: Path, lm: str, context: str, **kw):
    """Builds the tiny project through netbuild's workflow and loads the directory."""
    from netbuild.project import read_project
    from netbuild.workflow import build, load_build

    project = read_project(write_project(directory, lm, context, **kw))
    build(project, directory / "out")
    return load_build(directory / "out")


CASES = [
    ("unigram.arpa", "monophone.ctx"),
    ("bigram.arpa", "monophone.ctx"),
    ("unigram.arpa", "triphone.ctx"),
    ("bigram.arpa", "triphone.ctx"),
    ("bigram.arpa", "triphone_pause_context.ctx"),
]


def reference_for(lm: str, context: str, silence_probability: float = SILENCE_PROBABILITY
                  ) -> Reference:
    return Reference.from_files(DATA / "inventory.txt", DATA / "lexicon.txt", DATA / lm,
                                DATA / context, silence_probability)


# ------------------------------------------------------------------ the reference itself


def test_reference_model_has_a_cheaper_backoff_path():
    """The bigram data is chosen so that the minimum over back-off paths matters."""
    model = parse_arpa(DATA / "bigram.arpa")
    explicit = -LN10 * -1.5  # no tea
    backoff = -LN10 * (-0.2 + -0.8)  # alpha(no) P(tea)
    assert backoff < explicit  # the data's premise
    assert model.cheapest(("no",), "tea") == pytest.approx(backoff)  # from the numbers above
    # <s> ten ... : the explicit bigram -0.5 beats alpha(<s>) P(ten) = -0.25 - 0.9
    assert model.cheapest(("<s>",), "ten") == pytest.approx(-LN10 * -0.5)


def test_reference_hmm_durations():
    """Two states of one class: 'e e e' is (1, 2) or (2, 1) frames; the cheaper wins."""
    states = ((0, 0.5, 0.5), (0, 0.9, 0.1))
    table = hmm_sequences(states, 3)
    # reference: (d - 1) * -ln(self) + -ln(forward) per state  # common practice, no source
    one_two = -math.log(0.5) + (-math.log(0.9) - math.log(0.1))
    two_one = (-math.log(0.5) - math.log(0.5)) + -math.log(0.1)
    assert table[(1, 1)] == pytest.approx(-math.log(0.5) - math.log(0.1))
    assert table[(1, 1, 1)] == pytest.approx(min(one_two, two_one))
    assert set(table) == {(1, 1), (1, 1, 1)}


def test_reference_triphone_contexts():
    """The pause hides from its neighbours unless independent-context is yes."""
    ref = reference_for("bigram.arpa", "triphone.ctx").cmap
    ctx = reference_for("bigram.arpa", "triphone_pause_context.ctx").cmap
    utt = ["hush", "n", "o", "hush", "t", "e"]
    assert [ref.model_of(utt, j) for j in range(len(utt))] == [
        "pause", "n_first", "o_last", "pause", "t_other", "e_any"]
    assert [ctx.model_of(utt, j) for j in range(len(utt))] == [
        "pause", "n_pause", "o_stop", "pause", "t_other", "e_any"]
    cross = ["n", "o", "t", "e"]  # "no tea": cross-word contexts are ordinary contexts
    assert [ref.model_of(cross, j) for j in range(4)] == ["n_first", "o_stop", "t_vowel",
                                                          "e_any"]


# ------------------------------------------------------------------ against the graph


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    cache = {}

    def get(lm: str, context: str, **kw):
        key = (lm, context, tuple(sorted(kw.items())))
        if key not in cache:
            cache[key] = build_tiny(tmp_path_factory.mktemp("full"), lm, context, **kw)
        return cache[key]

    return get


@pytest.mark.parametrize("lm,context", CASES)
def test_graph_matches_bruteforce(built, lm, context):
    loaded = built(lm, context)
    expected = reference_named(reference_for(lm, context).enumerate(MAX_FRAMES))
    got = named(enumerate_graph(loaded.graph, MAX_FRAMES), loaded.input_symbols,
                loaded.word_symbols)
    # the enumeration reaches two-word utterances and the homophones
    assert any(len(words) == 2 for _, words in expected)
    assert any(words == ("know",) for _, words in expected)
    problems = compare_tables(expected, got)
    assert not problems, "\n".join(problems)


@pytest.mark.parametrize("lm,context", [("bigram.arpa", "triphone.ctx")])
def test_unoptimized_graph_matches_bruteforce(built, lm, context):
    """final_optimize = false gives a bigger graph with the same costs."""
    loaded = built(lm, context, final_optimize=False)
    expected = reference_named(reference_for(lm, context).enumerate(MAX_FRAMES))
    got = named(enumerate_graph(loaded.graph, MAX_FRAMES), loaded.input_symbols,
                loaded.word_symbols)
    problems = compare_tables(expected, got)
    assert not problems, "\n".join(problems)


def test_comparison_detects_a_changed_weight(built):
    """The same comparison fails on a graph with one arc weight changed."""
    import pynini

    loaded = built("bigram.arpa", "triphone.ctx")
    broken = loaded.graph.copy()
    q = broken.start()
    arcs = list(broken.arcs(q))
    assert arcs
    broken.delete_arcs(q)
    for k, a in enumerate(arcs):
        w = float(a.weight) + (0.5 if k == 0 else 0.0)
        broken.add_arc(q, pynini.Arc(a.ilabel, a.olabel, w, a.nextstate))
    expected = reference_named(reference_for("bigram.arpa", "triphone.ctx")
                               .enumerate(MAX_FRAMES))
    got = named(enumerate_graph(broken, MAX_FRAMES), loaded.input_symbols,
                loaded.word_symbols)
    assert compare_tables(expected, got)
