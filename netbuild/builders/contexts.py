"""The context-dependent phones that can occur in a graph, and their tying to models.

- `Provenance`: where a context occurs (consecutive words and their lexicon lines).
- `occurring_windows(lexicon, inventory, cmap, options) -> WindowSet`: every raw phone
  window (``left + centre + right`` phones as on the tape, ``$`` padding) centred on a
  phone, as C needs them to lay out its states.
- `occurring_context_set(...) -> ContextSet`: the same windows as the models see them
  (see `visible_context`), array-backed for large lexicons.
- `occurring_contexts(...) -> dict[tuple, Provenance]`: the same as a plain dict keyed
  by ``(left, centre, right)``.
- `visible_context(cmap, window)`: a raw window as the tying rules see it.
- `model_for(cmap, left, centre, right) -> Model | None`: the first matching rule.
- `tie_contexts(contexts, cmap) -> (mapping, uncovered, unused_rules)`.
- `check_coverage(lexicon, inventory, cmap, options, diagnostics) -> Coverage`.

What can occur. An utterance is ``$``*LEFT, optional silence, then words separated by
optional silence, optional silence, ``$``*RIGHT, with any word after any word (the
lexicon closure of L; the empty utterance included). Optional silence is the
inventory's first silence phone when ``options.silence_probability > 0`` (always
present at every boundary when it is 1, as in L). Every window of LEFT+1+RIGHT
tokens whose centre is a phone can occur.

What the models see (`visible_context`). A context-independent centre takes no
context: its key is ``(("*",)*LEFT, centre, ("*",)*RIGHT)``. When
``independent_is_context`` is false a context-independent neighbour acts as an
utterance edge: it and everything beyond it on that side read ``$`` (for width 1
this is simply ``$`` in its place). When true it is seen as itself.

Method. Word-boundary cuts: every visit of L's word-boundary state splits an
utterance into a left part (``$``*LEFT [sil] (word [sil])*) and a right part
((word [sil])* ``$``*RIGHT), and any left part combines with any right part. A
window either lies inside one segment between two cuts (a word with its trailing
silence, or the padding) or crosses a cut at some split a|b, so the windows are the
segment windows plus, for each split, {last a tokens of a left part} x {first b
tokens of a right part}. Those tails and heads (at most LEFT+RIGHT tokens) are found
by a breadth-first search over tails, where a word at least as long as the tail fixes
it outright, so only short words are combined with earlier tails. The cross
products are formed and deduplicated as integer codes in numpy (one digit per
token, the centre most significant), and the tying rules are matched on arrays,
centre by centre.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Iterable

import numpy as np

from ..errors import Diagnostics, LexiconError, Problem
from ..io.context_map import ANY, CLASS_PREFIX, EDGE, ContextMap, Model, TyingRule
from ..io.lexicon import Lexicon
from ..io.phones import PhoneInventory, suggestion
from ..options import LexiconOptions
from ..bulk import unique_sorted

Context = tuple[tuple[str, ...], str, tuple[str, ...]]
MAX_LISTED = 20  # uncovered contexts reported one by one; the rest are counted


@dataclasses.dataclass(frozen=True)
class Provenance:
    """Where a context occurs: consecutive words (one, a pair, or more for short words)
    and the raw phone window (``$`` padding, silence and all)."""

    words: tuple[str, ...]
    lines: tuple[int, ...]  # lexicon line of each word's pronunciation (0 if unknown)
    window: tuple[str, ...]

    def describe(self, lexicon_path: str = "") -> str:
        """Returns e.g. ``"'cab' 'stop' (lexicon.txt:12, 40)"``."""
        words = " ".join(f"'{w}'" for w in self.words) or "the empty utterance"
        where = ", ".join(str(n) for n in self.lines if n)
        if lexicon_path and where:
            return f"{words} ({lexicon_path}:{where})"
        return words


def format_context(ctx: Context) -> str:
    """Returns the reading-order spelling ``l1 l2 [c] r1 r2`` of a context."""
    left, centre, right = ctx
    return " ".join([*left, f"[{centre}]", *right])


# --- the alphabet ---------------------------------------------------------------------

class _Alphabet:
    """Integer ids: 0 the edge, 1..P the inventory phones, P+1 'any' (keys only)."""

    def __init__(self, inventory: PhoneInventory, cmap: ContextMap) -> None:
        self.symbols = [EDGE, *inventory.phones, ANY]
        self.index = {s: i for i, s in enumerate(self.symbols)}
        self.any = len(self.symbols) - 1
        self.base = len(self.symbols)
        self.left, self.right = cmap.left, cmap.right
        self.n = cmap.left + 1 + cmap.right
        # Digit order: centre first (most significant), then left, then right.
        order = [cmap.left, *range(cmap.left), *range(cmap.left + 1, self.n)]
        weights = np.zeros(self.n, dtype=np.int64)
        for rank, pos in enumerate(order):
            weights[pos] = self.base ** (self.n - 1 - rank)
        self.weights = weights
        ci = np.zeros(self.base, dtype=bool)
        for p in cmap.independent:
            if p in self.index:
                ci[self.index[p]] = True
        self.ci = ci

    def encode(self, mat: np.ndarray) -> np.ndarray:
        codes = np.zeros(len(mat), dtype=np.int64)
        for pos in range(self.n):  # column by column: no int64 copy of the matrix
            codes += mat[:, pos].astype(np.int64) * self.weights[pos]
        return codes

    def decode(self, codes: np.ndarray) -> np.ndarray:
        dtype = np.int16 if self.base < 2**15 else np.int32
        mat = np.empty((len(codes), self.n), dtype=dtype)
        for pos in range(self.n):
            mat[:, pos] = (codes // self.weights[pos]) % self.base
        return mat

    def tokens(self, row: Iterable[int]) -> tuple[str, ...]:
        return tuple(self.symbols[int(i)] for i in row)

    def key(self, row: Iterable[int]) -> Context:
        toks = self.tokens(row)
        return (toks[:self.left], toks[self.left], toks[self.left + 1:])


# --- enumeration ----------------------------------------------------------------------

_Item = tuple[tuple[int, ...], tuple[int, ...]]  # (tokens, owner per token; -1 none)


def _reachable_tails(starts: list[_Item], pieces: list[_Item], width: int
                     ) -> dict[tuple[int, ...], tuple[int, ...]]:
    """Returns the distinct last-`width` tokens (whole strings when shorter) of
    start · piece*, with the owners of the first string found for each."""
    seen: dict[tuple[int, ...], tuple[int, ...]] = {}
    queue: list[tuple[int, ...]] = []

    def add(toks: tuple[int, ...], owners: tuple[int, ...]) -> None:
        if len(toks) > width:
            toks, owners = toks[len(toks) - width:], owners[len(owners) - width:]
        if toks not in seen:
            seen[toks] = owners
            queue.append(toks)

    for toks, owners in starts:
        add(toks, owners)
    # Pieces shorter than the tail, by length: appending a piece of length l to a
    # full-width tail keeps only the tail's last width-l tokens, so each distinct
    # such suffix is combined with those pieces once.
    short: dict[int, dict[tuple[int, ...], tuple[int, ...]]] = {}
    for toks, owners in pieces:
        if len(toks) >= width:  # the piece alone fixes the tail
            add(toks, owners)
        else:
            short.setdefault(len(toks), {}).setdefault(toks, owners)
    done: dict[int, set[tuple[int, ...]]] = {length: set() for length in short}
    i = 0
    while i < len(queue):
        tail = queue[i]
        i += 1
        owners_t = seen[tail]
        for length, group in short.items():
            if len(tail) == width:
                keep = width - length
                head = tail[len(tail) - keep:]
                if head in done[length]:
                    continue
                done[length].add(head)
                head_owners = owners_t[len(owners_t) - keep:]
            else:  # a whole string shorter than the tail: nothing is dropped
                head, head_owners = tail, owners_t
            for toks, owners in group.items():
                add(head + toks, head_owners + owners)
    return seen


def _unique_first(a: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Returns the sorted distinct values of `a` and the index of each one's first
    occurrence (as ``np.unique(a, return_index=True)``, by a stable sort)."""
    order = np.argsort(a, kind="stable")
    s = a[order]
    keep = np.ones(len(s), dtype=bool)
    if len(s):
        np.not_equal(s[1:], s[:-1], out=keep[1:])
    return s[keep], order[keep]


def _windows_of(toks: tuple[int, ...], owners: tuple[int, ...], n: int, centre: int
                ) -> Iterable[tuple[tuple[int, ...], tuple[int, ...]]]:
    for s in range(len(toks) - n + 1):
        if toks[s + centre] != 0:
            yield toks[s:s + n], owners[s:s + n]


@dataclasses.dataclass
class WindowSet:
    """Distinct raw windows (rows of `tokens`, ids of `symbols`) and their provenance.

    `codes` are sorted; row i of `tokens` decodes `codes[i]`. Provenance is found on
    demand (`provenance(i)`), so huge sets stay arrays.
    """

    codes: np.ndarray  # int64, sorted, distinct
    tokens: np.ndarray  # (len, LEFT+1+RIGHT) int16 ids into `symbols`
    symbols: list[str]
    _source: list  # per row: a callable giving (window ids, owner ids)
    _first: np.ndarray  # per row: index into the concatenated candidates
    _owners: list[tuple[str, int]]  # owner id -> (word, lexicon line)

    def __len__(self) -> int:
        return len(self.codes)

    def window(self, i: int) -> tuple[str, ...]:
        return tuple(self.symbols[int(t)] for t in self.tokens[i])

    def provenance(self, i: int) -> Provenance:
        owners = _owners_at(self._source, int(self._first[i]))
        # Owner 2k+1 marks the first phone of pronunciation k, 2k its other phones,
        # so repeated words ('ah ah ah') stay apart.
        words: list[int] = []
        previous = -1
        for o in owners:
            if o >= 0 and (o % 2 == 1 or previous < 0 or previous // 2 != o // 2):
                words.append(o // 2)
            previous = o
        return Provenance(tuple(self._owners[k][0] for k in words),
                          tuple(self._owners[k][1] for k in words), self.window(i))


def _owners_at(source: list, index: int) -> tuple[int, ...]:
    """Finds the owners of candidate `index` among the blocks in `source`."""
    for start, size, get in source:
        if start <= index < start + size:
            return get(index - start)
    raise IndexError(index)  # pragma: no cover


def _pronunciation_ids(lexicon: Lexicon, alphabet: _Alphabet
                       ) -> tuple[list[tuple[int, ...]], list[tuple[str, int]]]:
    problems: list[Problem] = []
    prons: dict[tuple[int, ...], int] = {}
    owners: list[tuple[str, int]] = []
    for e in lexicon.entries:
        ids = []
        for p in e.phones:
            i = alphabet.index.get(p)
            if i is None or i in (0, alphabet.any):
                problems.append(Problem(
                    lexicon.path, e.line or None,
                    f"unknown phone '{p}' in the pronunciation of '{e.word}'",
                    f"{suggestion(p, alphabet.symbols[1:-1])}add it to the phone "
                    "inventory or fix the spelling"))
                break
            ids.append(i)
        else:
            if ids and tuple(ids) not in prons:
                prons[tuple(ids)] = len(owners)
                owners.append((e.word, e.line))
    if problems:
        raise LexiconError.from_problems(problems)
    return list(prons), owners


def occurring_windows(lexicon: Lexicon, inventory: PhoneInventory, cmap: ContextMap,
                      options: LexiconOptions = LexiconOptions()) -> WindowSet:
    """Returns every raw window that can occur in a graph built from `lexicon`.

    A window is LEFT+1+RIGHT tokens (phones or ``$``) centred on a phone, exactly as
    on the phone tape (context-independent phones not yet replaced; see
    `visible_context`). The utterance language is in the module docstring.

    Raises:
      LexiconError: a pronunciation uses a phone missing from `inventory`.
    """
    ab = _Alphabet(inventory, cmap)
    n, L, R = ab.n, ab.left, ab.right
    prons, owner_names = _pronunciation_ids(lexicon, ab)
    s = options.silence_probability
    sil = inventory.optional_silence if s > 0.0 else None
    sil_id = ab.index[sil] if sil is not None else None
    mandatory = sil_id is not None and s >= 1.0

    pieces: list[_Item] = []
    for k, ids in enumerate(prons):
        own = (2 * k + 1,) + (2 * k,) * (len(ids) - 1)
        if not mandatory:
            pieces.append((ids, own))
        if sil_id is not None:
            pieces.append((ids + (sil_id,), own + (-1,)))
    starts: list[_Item] = []
    if not mandatory:
        starts.append(((0,) * L, (-1,) * L))
    if sil_id is not None:
        starts.append(((0,) * L + (sil_id,), (-1,) * (L + 1)))
    ends: list[_Item] = [((0,) * R, (-1,) * R)]

    source: list = []  # (start, size, owners(local index))
    code_blocks: list[np.ndarray] = []
    total = 0

    # Windows inside one segment (a word and its silence, or the padding).
    seg_rows: list[tuple[int, ...]] = []
    seg_owners: list[tuple[int, ...]] = []
    for toks, owners in [*starts, *pieces, *ends]:
        for w, o in _windows_of(toks, owners, n, L):
            seg_rows.append(w)
            seg_owners.append(o)
    if seg_rows:
        code_blocks.append(ab.encode(np.asarray(seg_rows, dtype=np.int64)))
        source.append((total, len(seg_rows), seg_owners.__getitem__))
        total += len(seg_rows)

    if n > 1:
        width = n - 1
        tails = _reachable_tails(starts, pieces, width)
        rev = _reachable_tails([(t[::-1], o[::-1]) for t, o in ends],
                               [(t[::-1], o[::-1]) for t, o in pieces], width)
        heads = {t[::-1]: o[::-1] for t, o in rev.items()}
        for a in range(1, n):
            b = n - a
            suf: dict[tuple[int, ...], tuple[int, ...]] = {}
            for t, o in tails.items():
                if len(t) >= a:
                    suf.setdefault(t[len(t) - a:], o[len(o) - a:])
            pre: dict[tuple[int, ...], tuple[int, ...]] = {}
            for h, o in heads.items():
                if len(h) >= b:
                    pre.setdefault(h[:b], o[:b])
            if not suf or not pre:
                continue
            s_keys, p_keys = list(suf), list(pre)
            smat = np.asarray(s_keys, dtype=np.int64).reshape(len(s_keys), a)
            pmat = np.asarray(p_keys, dtype=np.int64).reshape(len(p_keys), b)
            s_idx = np.arange(len(s_keys))
            p_idx = np.arange(len(p_keys))
            if L < a:
                s_idx = s_idx[smat[:, L] != 0]
            else:
                p_idx = p_idx[pmat[:, L - a] != 0]
            if not len(s_idx) or not len(p_idx):
                continue
            s_code = smat[s_idx] @ ab.weights[:a]
            p_code = pmat[p_idx] @ ab.weights[a:]
            codes = (s_code[:, None] + p_code[None, :]).ravel()
            code_blocks.append(codes)
            m = len(p_idx)

            def get(local: int, s_idx=s_idx, p_idx=p_idx, m=m, s_keys=s_keys,
                    p_keys=p_keys, suf=suf, pre=pre) -> tuple[int, ...]:
                i, j = divmod(local, m)
                return suf[s_keys[s_idx[i]]] + pre[p_keys[p_idx[j]]]

            source.append((total, len(codes), get))
            total += len(codes)

    if code_blocks:
        all_codes = np.concatenate(code_blocks)
        codes, first = _unique_first(all_codes)
    else:
        codes = np.zeros(0, dtype=np.int64)
        first = np.zeros(0, dtype=np.int64)
    return WindowSet(codes, ab.decode(codes), ab.symbols, source, first, owner_names)


# --- what the models see --------------------------------------------------------------

def _visible_rows(mat: np.ndarray, ab: _Alphabet, ci_is_context: bool) -> np.ndarray:
    """Applies the context-independent rules of the module docstring to window rows."""
    out = mat.copy()
    L = ab.left
    if not ci_is_context:
        for cols in (range(L - 1, -1, -1), range(L + 1, ab.n)):
            cut = np.zeros(len(out), dtype=bool)
            for col in cols:
                cut |= (out[:, col] == 0) | ab.ci[out[:, col]]
                out[cut, col] = 0
    ci_centre = ab.ci[out[:, L]]
    for col in range(ab.n):
        if col != L:
            out[ci_centre, col] = ab.any
    return out


def visible_context(cmap: ContextMap, window: tuple[str, ...]) -> Context:
    """Returns the raw `window` (LEFT+1+RIGHT tokens) as the tying rules see it.

    Idempotent on its own results, so it also accepts (flattened) keys.
    """
    L = cmap.left
    toks = list(window)
    ci = set(cmap.independent)
    centre = toks[L]
    if centre in ci:
        return ((ANY,) * L, centre, (ANY,) * cmap.right)
    if not cmap.independent_is_context:
        for cols in (range(L - 1, -1, -1), range(L + 1, len(toks))):
            cut = False
            for col in cols:
                cut = cut or toks[col] == EDGE or toks[col] in ci
                if cut:
                    toks[col] = EDGE
    return (tuple(toks[:L]), centre, tuple(toks[L + 1:]))


@dataclasses.dataclass
class ContextSet:
    """Distinct keys ``(left, centre, right)`` as the models see them, with provenance."""

    codes: np.ndarray  # sorted, distinct
    tokens: np.ndarray  # (len, LEFT+1+RIGHT) ids into `windows.symbols`
    windows: WindowSet
    raw_row: np.ndarray  # per key: a row of `windows` that shows it
    left: int

    def __len__(self) -> int:
        return len(self.codes)

    def key(self, i: int) -> Context:
        toks = tuple(self.windows.symbols[int(t)] for t in self.tokens[i])
        return (toks[:self.left], toks[self.left], toks[self.left + 1:])

    def keys(self) -> Iterable[Context]:
        return (self.key(i) for i in range(len(self)))

    def provenance(self, i: int) -> Provenance:
        return self.windows.provenance(int(self.raw_row[i]))

    def to_dict(self) -> dict[Context, Provenance]:
        return {self.key(i): self.provenance(i) for i in range(len(self))}


def occurring_context_set(lexicon: Lexicon, inventory: PhoneInventory, cmap: ContextMap,
                          options: LexiconOptions = LexiconOptions()) -> ContextSet:
    """Returns the keys of every context-dependent phone that can occur (arrays)."""
    windows = occurring_windows(lexicon, inventory, cmap, options)
    ab = _Alphabet(inventory, cmap)
    vis = _visible_rows(windows.tokens, ab, cmap.independent_is_context)
    codes, row = _unique_first(ab.encode(vis))
    return ContextSet(codes, ab.decode(codes), windows, row, cmap.left)


def occurring_contexts(lexicon: Lexicon, inventory: PhoneInventory, cmap: ContextMap,
                       options: LexiconOptions = LexiconOptions()
                       ) -> dict[Context, Provenance]:
    """Returns every context-dependent phone that can occur, with where it occurs.

    Keys are ``(left, centre, right)`` as the models see them (`visible_context`);
    the provenance names consecutive words whose phones (with the optional silence
    and ``$`` padding) show the context. For very large sets prefer
    `occurring_context_set`, which keeps arrays.

    Raises:
      LexiconError: a pronunciation uses a phone missing from `inventory`.
    """
    return occurring_context_set(lexicon, inventory, cmap, options).to_dict()


# --- tying ----------------------------------------------------------------------------

def _token_matches(cmap: ContextMap, token: str, value: str) -> bool:
    if token == ANY:
        return True
    if token == EDGE:
        return value == EDGE
    if token.startswith(CLASS_PREFIX):
        return value in cmap.classes.get(token[len(CLASS_PREFIX):], ())
    return token == value


def model_for(cmap: ContextMap, left: tuple[str, ...], centre: str,
              right: tuple[str, ...]) -> Model | None:
    """Returns the model of the first rule matching the context, or None.

    The context is taken through `visible_context` first, so raw neighbours are fine;
    a context-independent centre matches the first rule whose centre token matches.
    """
    left, centre, right = visible_context(cmap, (*left, centre, *right))
    independent = centre in cmap.independent
    for rule in cmap.rules:
        if not _token_matches(cmap, rule.centre, centre):
            continue
        if independent or (
                all(_token_matches(cmap, t, v) for t, v in zip(rule.left, left))
                and all(_token_matches(cmap, t, v) for t, v in zip(rule.right, right))):
            return cmap.models.get(rule.model)
    return None


def _token_table(cmap: ContextMap, token: str, symbols: list[str]) -> np.ndarray:
    return np.fromiter((_token_matches(cmap, token, s) for s in symbols), dtype=bool,
                       count=len(symbols))


def _tie_rows(mat: np.ndarray, cmap: ContextMap, symbols: list[str]
              ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Returns (winning rule per row or -1, rule matched anything, rule won anything).

    Rows are visible keys sorted with the centre most significant (as encoded).
    """
    L = cmap.left
    n_rules = len(cmap.rules)
    winner = np.full(len(mat), -1, dtype=np.int32)
    matched = np.zeros(n_rules, dtype=bool)
    tables = [[_token_table(cmap, t, symbols) for t in (*r.left, r.centre, *r.right)]
              for r in cmap.rules]
    ci = set(cmap.independent)
    if not len(mat):
        return winner, matched, matched.copy()
    centres = mat[:, L]
    bounds = np.flatnonzero(np.diff(centres)) + 1
    starts = np.concatenate([[0], bounds])
    stops = np.concatenate([bounds, [len(mat)]])
    for lo, hi in zip(starts.tolist(), stops.tolist()):
        c = int(centres[lo])
        rows = mat[lo:hi]
        free = np.ones(hi - lo, dtype=bool)
        for k, rule in enumerate(cmap.rules):
            if not tables[k][L][c]:
                continue
            if symbols[c] in ci:
                hit = np.ones(hi - lo, dtype=bool)
            else:
                hit = np.ones(hi - lo, dtype=bool)
                for col, table in enumerate(tables[k]):
                    if col != L:
                        hit &= table[rows[:, col]]
            if hit.any():
                matched[k] = True
                win = hit & free
                winner[lo:hi][win] = k
                free &= ~win
            if not free.any():
                break
    won = np.zeros(n_rules, dtype=bool)
    won[unique_sorted(winner[winner >= 0])] = True
    # Rules that never win: do they match anything at all (or only shadowed contexts)?
    for k in np.flatnonzero(~won & ~matched).tolist():
        for lo, hi in zip(starts.tolist(), stops.tolist()):
            c = int(centres[lo])
            if not tables[k][L][c]:
                continue
            if symbols[c] in ci:
                matched[k] = True
                break
            hit = np.ones(hi - lo, dtype=bool)
            for col, table in enumerate(tables[k]):
                if col != L:
                    hit &= table[mat[lo:hi, col]]
            if hit.any():
                matched[k] = True
                break
    return winner, matched, won


def tie_contexts(contexts: Iterable[Context], cmap: ContextMap
                 ) -> tuple[dict[Context, str], list[Context], list[TyingRule]]:
    """Ties contexts to models by the first matching rule.

    Args:
      contexts: keys ``(left, centre, right)`` (e.g. those of `occurring_contexts`);
        raw neighbours are taken through `visible_context`.
      cmap: the map.

    Returns:
      (context -> model name for the covered contexts, the uncovered contexts in
      input order, the rules that win for no context, file order).
    """
    items = list(contexts)
    symbols = [EDGE, ANY]
    index = {EDGE: 0, ANY: 1}
    rows = []
    for left, centre, right in items:
        vis = visible_context(cmap, (*left, centre, *right))
        row = []
        for tok in (*vis[0], vis[1], *vis[2]):
            if tok not in index:
                index[tok] = len(symbols)
                symbols.append(tok)
            row.append(index[tok])
        rows.append(row)
    mat = np.asarray(rows, dtype=np.int64).reshape(len(rows), cmap.left + 1 + cmap.right)
    order = np.argsort(mat[:, cmap.left], kind="stable")
    winner_sorted, _, won = _tie_rows(mat[order], cmap, symbols)
    winner = np.empty_like(winner_sorted)
    winner[order] = winner_sorted
    mapping: dict[Context, str] = {}
    uncovered: list[Context] = []
    for ctx, k in zip(items, winner.tolist()):
        if k >= 0:
            mapping[ctx] = cmap.rules[k].model
        else:
            uncovered.append(ctx)
    unused = [r for r, w in zip(cmap.rules, won.tolist()) if not w]
    return mapping, uncovered, unused


# --- the coverage check ---------------------------------------------------------------

@dataclasses.dataclass
class Coverage:
    """The result of `check_coverage`: counts, and the model chosen per context."""

    contexts: ContextSet
    winner: np.ndarray  # per key of `contexts`: index into cmap.rules, or -1
    uncovered: int
    unused_rules: list[TyingRule]

    rules: list[TyingRule] = dataclasses.field(default_factory=list)  # the map's rules

    @property
    def models_used(self) -> int:
        """The number of distinct models some occurring context maps to."""
        return len({self.rules[int(k)].model
                    for k in unique_sorted(self.winner[self.winner >= 0])})


def check_coverage(lexicon: Lexicon, inventory: PhoneInventory, cmap: ContextMap,
                   options: LexiconOptions, diagnostics: Diagnostics) -> Coverage:
    """Checks that every context-dependent phone that can occur maps to a model.

    Adds to `diagnostics` one located error per uncovered context (the first
    `MAX_LISTED`, then one error counting the rest), each naming the context, words
    where it occurs and a rule to add; and one warning per rule that wins for no
    context that can occur. Errors are located at the map's last rule (where a new
    rule would go); warnings at the rule.

    Raises:
      LexiconError: a pronunciation uses a phone missing from `inventory`.
    """
    cs = occurring_context_set(lexicon, inventory, cmap, options)
    winner, matched, won = _tie_rows(cs.tokens, cmap, cs.windows.symbols)
    missing = np.flatnonzero(winner < 0)
    where = cmap.path
    at = max((r.line for r in cmap.rules), default=cmap.widths_line) or None
    for i in missing[:MAX_LISTED].tolist():
        ctx = cs.key(i)
        prov = cs.provenance(i)
        catch_all = " ".join(["rule", *("*" * cmap.left), ctx[1], *("*" * cmap.right),
                              "->", "MODEL"])
        diagnostics.error(
            where, at,
            f"context {format_context(ctx)} has no model; it occurs in "
            f"{prov.describe(lexicon.path)}",
            f"add a rule for it below line {at}, e.g. a catch-all '{catch_all}'")
    if len(missing) > MAX_LISTED:
        diagnostics.error(where, at,
                          f"{len(missing) - MAX_LISTED} more contexts that can occur have "
                          f"no model ({len(missing)} in all)",
                          "add rules for them; a catch-all rule per centre phone covers all")
    for k, rule in enumerate(cmap.rules):
        if won[k]:
            continue
        if matched[k]:
            why = "every context it matches is taken by an earlier rule"
        else:
            why = "it matches no context that can occur with this lexicon"
        diagnostics.warning(where, rule.line, f"rule for '{rule.centre}' is never used: "
                            f"{why}", "remove it or move it above the rule that wins")
    return Coverage(cs, winner, len(missing), [r for r, w in zip(cmap.rules, won) if not w],
                    list(cmap.rules))
