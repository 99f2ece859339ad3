"""Synthetic inputs for the benchmarks: a phone inventory, a lexicon and an ARPA model.

- `PHONES`, `SILENCE_PHONE`, `NOISE_PHONE`: the made-up phone set (40 phones + 2 roles).
- `word_spellings(n)`: n distinct pseudo-words, short ones for frequent ranks.
- `synth_lexicon(n_words, ...) -> SynthLexicon`: pronunciations with a chosen share of
  homophones and of words whose pronunciation is a proper prefix of another's.
- `synth_arpa(n_words, n_ngrams, ...) -> ArpaModel`: a normalised back-off model.
- `write_phones`, `write_lexicon`, `write_arpa_text`: the text forms (bulk formatting).
- `main(argv)`: the command line, e.g.
  ``python bench/synth.py --words 20000 --ngrams 1000000 --out bench/out/w20k_n1m``

Everything is drawn from one `numpy.random.Generator` seeded by `seed`, so the same
arguments give byte-identical files.

The model: unigrams follow a Zipf-like law over the word ranks (word i is rank i); each
higher order k samples its histories among the (k-1)-grams weighted by their joint
probability (so frequent contexts repeat) and its predicted words from the unigram law.
Most k-grams (k >= 3) predict a word that continues their history's suffix (so the
suffix (k-1)-gram exists, as in a model estimated from counts); a share
`suffix_miss_share` does not. A share `hole_share` of the k-grams gets a history that
is *not* a (k-1)-gram (a "hole"; its back-off weight is 1 by the format's rule); hole
histories are taken among the missed suffixes, so each is still reached by a k-gram.
Probabilities come from made-up counts with Witten-Bell-style reserved mass T/(C+T)
per history; each history's back-off weight is then set by the Katz rule

    alpha(h) = (1 - sum_{w in E(h)} P(w|h)) / (1 - sum_{w in E(h)} P_lower(w|h'))

so that, under the ARPA back-off rule, every history's distribution over the words and
</s> sums to 1 (up to the printed precision). For a hole history the explicit
probabilities are scaled so their sum equals the lower-order sum, which makes alpha = 1
exact. Printed values have 6 decimals.

References:
    Katz, S. M. (1987). Estimation of probabilities from sparse data for the language
    model component of a speech recognizer. IEEE Trans. ASSP 35(3), 400-401.
    doi:10.1109/TASSP.1987.1165125
    Witten, I. H., Bell, T. C. (1991). The zero-frequency problem. IEEE Trans. Inf.
    Theory 37(4), 1085-1094. doi:10.1109/18.87000
"""

from __future__ import annotations

import argparse
import dataclasses
import gzip
import json
import sys
import time
from pathlib import Path

import numpy as np

from netbuild.io.arpa import ArpaModel, NgramTable
from netbuild.symbols import SENTENCE_END, SENTENCE_START

VOWELS = [f"v{i:02d}" for i in range(1, 13)]
CONSONANTS = [f"c{i:02d}" for i in range(1, 29)]
PHONES = CONSONANTS + VOWELS  # 40 phones
SILENCE_PHONE = "pause"
NOISE_PHONE = "hum"

# A partition of PHONES into five groups (three of consonants, two of vowels).
PHONE_GROUPS = {"cgA": CONSONANTS[:10], "cgB": CONSONANTS[10:19], "cgC": CONSONANTS[19:],
                "vgA": VOWELS[:6], "vgB": VOWELS[6:]}

_SYLLABLES = [c + v for c in "bdfgklmnprstvz" for v in "aeiou"]  # 70 spelling syllables
_MAX_PRON = 10  # longest generated pronunciation


# --------------------------------------------------------------------------- words


def word_spellings(n: int) -> list[str]:
    """Returns `n` distinct lower-case pseudo-words; index 0 is the shortest.

    Bijective base-70 numbering over CV syllables, so no two indices collide.

    Examples:
        >>> word_spellings(3)
        ['ba', 'be', 'bi']
    """
    base = len(_SYLLABLES)
    out = []
    for i in range(n):
        parts = []
        k = i + 1
        while k > 0:
            k, r = divmod(k - 1, base)
            parts.append(_SYLLABLES[r])
        out.append("".join(reversed(parts)))
    return out


# --------------------------------------------------------------------------- lexicon


@dataclasses.dataclass
class SynthLexicon:
    """A generated lexicon: `entries` are (word, probability, phones) in file order."""

    words: list[str]
    entries: list[tuple[str, float, tuple[str, ...]]]
    homophone_words: set[str]  # words sharing a pronunciation with another word
    prefix_words: set[str]  # words with a pronunciation that is a proper prefix of another's


def _random_sequences(rng: np.random.Generator, count: int) -> tuple[np.ndarray, np.ndarray]:
    """Returns (phone-index matrix (count, _MAX_PRON), lengths) of C/V-alternating strings."""
    lengths = np.minimum(3 + rng.poisson(2.5, size=count), _MAX_PRON)
    start_vowel = rng.random(count) < 0.35
    switch = rng.random((count, _MAX_PRON)) < 0.85  # mostly alternate C and V
    switch[:, 0] = False
    is_vowel = (np.cumsum(switch, axis=1) % 2 == 1) ^ start_vowel[:, None]
    nc, nv = len(CONSONANTS), len(VOWELS)
    cw = 1.0 / (np.arange(nc) + 3.0)
    cw /= cw.sum()
    vw = 1.0 / (np.arange(nv) + 2.0)
    vw /= vw.sum()
    cons = rng.choice(nc, size=(count, _MAX_PRON), p=cw)
    vows = nc + rng.choice(nv, size=(count, _MAX_PRON), p=vw)
    return np.where(is_vowel, vows, cons).astype(np.uint8), lengths


def _prefix_free_pool(rng: np.random.Generator, count: int) -> list[bytes]:
    """Returns `count` distinct pronunciations (one byte per phone), none a prefix of another."""
    prons: set[bytes] = set()
    prefixes: set[bytes] = set()
    out: list[bytes] = []
    while len(out) < count:
        need = count - len(out)
        mat, lengths = _random_sequences(rng, int(need * 1.2) + 16)
        for row, n in zip(mat, lengths.tolist()):
            s = row[:n].tobytes()
            if s in prons or s in prefixes:
                continue
            if any(s[:k] in prons for k in range(1, n)):
                continue
            prons.add(s)
            prefixes.update(s[:k] for k in range(1, n))
            out.append(s)
            if len(out) == count:
                break
    return out


def synth_lexicon(n_words: int, *, seed: int = 0, homophone_share: float = 0.03,
                  prefix_share: float = 0.03, variant_share: float = 0.05) -> SynthLexicon:
    """Generates a lexicon of `n_words` words over `PHONES`.

    Args:
        n_words: number of distinct words (spelled by `word_spellings`).
        seed: seed of the random generator.
        homophone_share: share of words that share their pronunciation with another word
            (made in pairs, so the realised share is even-rounded: 2*round(share*n/2)/n).
        prefix_share: share of words whose pronunciation is a proper prefix of another
            word's pronunciation (round(share*n) words).
        variant_share: share of words with a second pronunciation; those get
            probabilities p and 1-p (p in [0.55, 0.9]), every other word 1.0.

    Returns:
        A `SynthLexicon`; its `homophone_words` and `prefix_words` are exact: all other
        pronunciations are distinct and prefix-free.
    """
    if n_words < 1:
        raise ValueError("n_words must be at least 1")
    rng = np.random.default_rng(seed)
    words = word_spellings(n_words)
    n_pairs = int(round(homophone_share * n_words / 2))
    n_prefix = int(round(prefix_share * n_words))
    n_variant = int(round(variant_share * n_words))
    if 2 * n_pairs + n_prefix > n_words:
        raise ValueError("homophone and prefix shares add up to more than all words")
    pool = _prefix_free_pool(rng, n_words + n_variant)
    primary = pool[:n_words]

    order = rng.permutation(n_words)
    hom_a = order[:n_pairs]
    hom_b = order[n_pairs:2 * n_pairs]
    pre = order[2 * n_pairs:2 * n_pairs + n_prefix]
    for a, b in zip(hom_a.tolist(), hom_b.tolist()):
        primary[b] = primary[a]

    # Prefix words take a proper prefix (never a full pronunciation, never reused) of a
    # target that is neither a prefix word nor the partner of a homophone pair.
    taken = set(primary)
    is_pre = np.zeros(n_words, dtype=bool)
    is_pre[pre] = True
    targets = np.flatnonzero(~is_pre)
    for p in pre.tolist():
        while True:
            t = int(targets[rng.integers(len(targets))])
            s = primary[t]
            if len(s) < 2:
                continue
            cand = s[:int(rng.integers(1, len(s)))]
            if cand not in taken:
                break
        primary[p] = cand
        taken.add(cand)

    variants: dict[int, bytes] = {}
    if n_variant:
        # Variants only on plain words, so the homophone/prefix sets stay exact.
        plain = np.setdiff1d(np.arange(n_words), order[:2 * n_pairs + n_prefix])
        chosen = rng.choice(plain, size=min(n_variant, len(plain)), replace=False)
        for w, s in zip(sorted(chosen.tolist()), pool[n_words:]):
            variants[w] = s
    p_main = np.round(rng.uniform(0.55, 0.9, size=n_words), 2)

    entries: list[tuple[str, float, tuple[str, ...]]] = []
    for i, w in enumerate(words):
        if i in variants:
            p = float(p_main[i])
            entries.append((w, p, tuple(PHONES[c] for c in primary[i])))
            entries.append((w, round(1.0 - p, 2), tuple(PHONES[c] for c in variants[i])))
        else:
            entries.append((w, 1.0, tuple(PHONES[c] for c in primary[i])))
    homophones = {words[i] for i in hom_a.tolist() + hom_b.tolist()}
    prefixes = {words[i] for i in pre.tolist()}
    return SynthLexicon(words, entries, homophones, prefixes)


def write_lexicon(lexicon: SynthLexicon, path: str | Path, probabilities: bool = True) -> None:
    """Writes the plain layout: `word<TAB>[prob<TAB>]phone phone ...`, UTF-8."""
    if probabilities:
        lines = [f"{w}\t{p:g}\t{' '.join(ph)}\n" for w, p, ph in lexicon.entries]
    else:
        lines = [f"{w}\t{' '.join(ph)}\n" for w, _, ph in lexicon.entries]
    Path(path).write_text("".join(lines), encoding="utf-8")


def write_phones(path: str | Path) -> None:
    """Writes the phone inventory: one phone per line, roles, two classes and the five
    `PHONE_GROUPS`."""
    text = ["# synthetic phone set: 28 consonants, 12 vowels, a pause and a hum"]
    text += PHONES
    text += [f"{SILENCE_PHONE} silence", f"{NOISE_PHONE} noise"]
    text += ["consonant: " + " ".join(CONSONANTS), "vowel: " + " ".join(VOWELS)]
    # Finer groups (a partition of PHONES) for the tying rules of bench/synth_context.py.
    text += [f"{name}: " + " ".join(members) for name, members in PHONE_GROUPS.items()]
    Path(path).write_text("\n".join(text) + "\n", encoding="utf-8")


# --------------------------------------------------------------------------- model


def _keys(ids: np.ndarray, base: int) -> np.ndarray:
    """Packs rows of word ids into int64 keys (row-major, base `base`)."""
    key = np.zeros(ids.shape[0], dtype=np.int64)
    for j in range(ids.shape[1]):
        key = key * base + ids[:, j]
    return key


def _lookup(sorted_keys: np.ndarray, keys: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Returns (found mask, index) of `keys` in the sorted array `sorted_keys`."""
    idx = np.searchsorted(sorted_keys, keys)
    idx = np.minimum(idx, max(len(sorted_keys) - 1, 0))
    found = (sorted_keys[idx] == keys) if len(sorted_keys) else np.zeros(len(keys), bool)
    return found, idx


@dataclasses.dataclass
class _Order:
    ids: np.ndarray  # (n, k) int64, rows sorted by key
    keys: np.ndarray  # (n,) sorted
    prob: np.ndarray  # P(w | h), linear
    alpha: np.ndarray  # back-off weight, linear (1.0 when not a history)
    joint: np.ndarray  # P(h, w) approximately, used to weight history sampling


def _unique_sample(rng, draw, count: int, limit_iter: int = 60) -> np.ndarray:
    """Draws keys with `draw(n)` until `count` distinct ones exist; returns a random subset."""
    have = np.empty(0, dtype=np.int64)
    n = int(count * 1.3) + 64
    for _ in range(limit_iter):
        have = np.concatenate([have, draw(n)])
        have.sort()  # sort + neighbour test: much faster here than np.unique's hashing
        have = have[np.concatenate([[True], have[1:] != have[:-1]])]
        if len(have) >= count:
            break
        n = int((count - len(have)) * 2) + 64
    else:
        raise ValueError(f"could not sample {count} distinct n-grams; ask for fewer")
    pick = rng.choice(len(have), size=count, replace=False)
    return np.sort(have[pick])


def _draw(rng: np.random.Generator, cdf: np.ndarray, n: int, shuffle: bool) -> np.ndarray:
    """Draws `n` indices from the law with cumulative sums `cdf` (last entry 1).

    Sorted uniforms make the binary searches cache-friendly; `shuffle` restores a random
    order when the draws are paired with other draws.
    """
    u = np.sort(rng.random(n))
    idx = np.minimum(np.searchsorted(cdf, u, "right"), len(cdf) - 1)
    return rng.permutation(idx) if shuffle else idx


def _lower_prob(orders: list[_Order], unigram: np.ndarray, ctx: np.ndarray,
                w: np.ndarray, base: int) -> np.ndarray:
    """P(w | ctx) by the back-off rule for rows of context ids `ctx` (may have 0 columns)."""
    m = ctx.shape[1]
    if m == 0:
        return unigram[w]
    full = np.concatenate([ctx, w[:, None]], axis=1)
    found, idx = _lookup(orders[m].keys, _keys(full, base))
    out = np.empty(len(w))
    out[found] = orders[m].prob[idx[found]]
    miss = ~found
    if miss.any():
        cfound, cidx = _lookup(orders[m - 1].keys, _keys(ctx[miss], base))
        alpha = np.where(cfound, orders[m - 1].alpha[cidx], 1.0)
        out[miss] = alpha * _lower_prob(orders, unigram, ctx[miss][:, 1:], w[miss], base)
    return out


def synth_arpa(n_words: int, n_ngrams: int, *, order: int = 3, seed: int = 0,
               hole_share: float = 0.01, suffix_miss_share: float = 0.02,
               zipf_exponent: float = 1.0,
               end_probability: float = 0.06, higher_shares: tuple[float, ...] | None = None,
               ) -> ArpaModel:
    """Generates a normalised back-off model with `n_ngrams` n-grams in total.

    Args:
        n_words: vocabulary size without <s> and </s> (words from `word_spellings`).
        n_ngrams: total n-gram count over all orders; the 1-grams are n_words + 2.
        order: highest order, 2 to 4.
        seed: seed of the random generator.
        hole_share: share of the k-grams (k >= 3) whose history is not a (k-1)-gram.
        suffix_miss_share: share of the k-grams (k >= 3) drawn without regard to their
            suffix (k-1)-gram, which is then usually absent; the others predict a word
            that continues the history's suffix, as in a model estimated from counts.
        zipf_exponent: exponent s of the unigram law p(rank r) ~ 1/(r + 2.7)^s.
        end_probability: unigram probability of </s>.
        higher_shares: how the n-grams above the 1-grams split over orders 2..order
            (default: 2-grams 40 %, the rest evenly over the higher orders).

    Returns:
        An `ArpaModel` with vocab [<s>, </s>, words...]; rows of each order sorted by
        word ids; `lines` are zero (not from a file).

    Raises:
        ValueError: when the counts cannot be met (too few n-grams for the vocabulary,
            or more k-grams asked for than can be drawn).
    """
    if not 2 <= order <= 4:
        raise ValueError("order must be 2, 3 or 4")
    base = n_words + 2
    if float(base) ** order >= 2.0**62:
        raise ValueError("vocabulary too large for int64 n-gram keys at this order")
    n1 = n_words + 2
    rest = n_ngrams - n1
    if rest < order - 1:
        raise ValueError(f"{n_ngrams} n-grams cannot hold {n1} 1-grams and higher orders")
    if higher_shares is None:
        higher_shares = (0.4,) + ((0.6 / (order - 2),) * (order - 2) if order > 2 else ())
        if order == 2:
            higher_shares = (1.0,)
    shares = np.asarray(higher_shares, dtype=float)
    shares = shares / shares.sum()
    counts = np.floor(shares * rest).astype(int)
    counts[-1] += rest - counts.sum()

    rng = np.random.default_rng(seed)
    vocab = [SENTENCE_START, SENTENCE_END] + word_spellings(n_words)
    BOS, EOS = 0, 1

    # Unigrams: Zipf over words, fixed mass for </s>, <s> a history only (-99).
    ranks = np.arange(n_words, dtype=float)
    zipf = 1.0 / (ranks + 2.7) ** zipf_exponent
    unigram = np.zeros(base)
    unigram[2:] = (1.0 - end_probability) * zipf / zipf.sum()
    unigram[EOS] = end_probability
    # Sampling laws: predicted words (words + </s>) and first histories (<s> + words).
    pred_p = unigram.copy()
    pred_p[BOS] = 0.0
    pred_p /= pred_p.sum()
    hist_p = unigram.copy()
    hist_p[BOS], hist_p[EOS] = end_probability, 0.0
    hist_p /= hist_p.sum()

    uni_ids = np.arange(base, dtype=np.int64)[:, None]
    orders: list[_Order] = [
        _Order(uni_ids, np.arange(base, dtype=np.int64), unigram.copy(), np.ones(base), hist_p)
    ]

    pred_cdf = np.cumsum(pred_p)
    pred_cdf /= pred_cdf[-1]

    def draw_pred(n: int) -> np.ndarray:
        # A fifth of the draws uniform, so small vocabularies can still be filled.
        w = _draw(rng, pred_cdf, n, shuffle=True)
        uni = rng.integers(1, base, size=n)
        return np.where(rng.random(n) < 0.2, uni, w)

    for k in range(2, order + 1):
        prev = orders[k - 2]
        n_k = int(counts[k - 2])
        # Histories: (k-1)-grams not ending in </s>, weighted by their joint probability.
        usable = np.flatnonzero(prev.ids[:, -1] != EOS)
        weight = prev.joint[usable] / prev.joint[usable].sum()
        n_holes = int(round(hole_share * n_k)) if k >= 3 else 0
        n_regular = n_k - n_holes

        hist_cdf = np.cumsum(weight)
        hist_cdf /= hist_cdf[-1]
        if k >= 3:
            # Continuations of a history's suffix: the (k-1)-grams starting with it, as a
            # row range [lo, hi) per (k-1)-gram, found with sorted queries.
            prefix_keys = _keys(prev.ids[:, :-1], base)
            cum = np.concatenate([[0.0], np.cumsum(prev.prob)])

            def cont_range(hist: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
                sk = _keys(hist[:, 1:], base)
                order_ = np.argsort(sk, kind="stable")
                lo, hi = np.empty(len(sk), np.int64), np.empty(len(sk), np.int64)
                lo[order_] = np.searchsorted(prefix_keys, sk[order_], "left")
                hi[order_] = np.searchsorted(prefix_keys, sk[order_], "right")
                return lo, hi

            prev_lo, prev_hi = cont_range(prev.ids)

        def draw_cont(lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
            """Predicted words for histories whose suffix continuations are rows [lo, hi):
            mostly a listed continuation weighted by its probability (so the suffix
            (k-1)-gram exists), else a unigram draw."""
            w = draw_pred(len(lo))
            if k < 3:
                return w
            use = np.flatnonzero((hi > lo) & (rng.random(len(lo)) >= suffix_miss_share))
            u = cum[lo[use]] + rng.random(len(use)) * (cum[hi[use]] - cum[lo[use]])
            srt = np.argsort(u)
            row = np.empty(len(use), np.int64)
            row[srt] = np.searchsorted(cum, u[srt], "right") - 1
            row = np.clip(row, lo[use], hi[use] - 1)
            w[use] = prev.ids[row, -1]
            return w

        def draw_regular(n: int) -> np.ndarray:
            h = usable[_draw(rng, hist_cdf, n, shuffle=False)]
            if k < 3:
                return h.astype(np.int64) * base + draw_pred(n)
            return h.astype(np.int64) * base + draw_cont(prev_lo[h], prev_hi[h])

        pairs = _unique_sample(rng, draw_regular, n_regular)
        hist_rows, w = pairs // base, pairs % base
        ids = np.concatenate([prev.ids[hist_rows], w[:, None]], axis=1)
        if n_holes:
            # Hole histories: suffixes of the k-grams just drawn that are not (k-1)-grams
            # (the suffix misses). Such a history is reached through the k-gram it ends,
            # as after pruning a (k-1)-gram whose continuations were kept. About three
            # n-grams each, so hole contexts repeat too.
            suffix = ids[:, 1:]
            sfound, _ = _lookup(prev.keys, _keys(suffix, base))
            cand = np.unique(_keys(suffix[~sfound & (suffix[:, -1] != EOS)], base))
            if len(cand) == 0:
                raise ValueError("no hole histories can be drawn; raise suffix_miss_share "
                                 "or set hole_share to 0")
            n_hist = min(len(cand), max(1, n_holes // 3))
            hole_keys = np.sort(rng.choice(cand, size=n_hist, replace=False))
            hole_ctx = np.stack([(hole_keys // base**(k - 2 - j)) % base
                                 for j in range(k - 1)], axis=1)
            hole_lo, hole_hi = cont_range(hole_ctx)

            def draw_hole(n: int) -> np.ndarray:
                h = rng.integers(len(hole_keys), size=n)
                return h.astype(np.int64) * base + draw_cont(hole_lo[h], hole_hi[h])

            hp = _unique_sample(rng, draw_hole, n_holes)
            ids = np.concatenate(
                [ids, np.concatenate([hole_ctx[hp // base], (hp % base)[:, None]], axis=1)])
        keys = _keys(ids, base)
        sort = np.argsort(keys, kind="stable")
        ids, keys = ids[sort], keys[sort]

        # Probabilities from made-up counts, Witten-Bell-style reserved mass per history.
        ctx, w = ids[:, :-1], ids[:, -1]
        lower = _lower_prob(orders, unigram, ctx[:, 1:], w, base)
        lam = np.minimum(2.0 * np.sqrt(lower * base), 50.0)
        c = 1.0 + rng.poisson(lam)
        hkeys = _keys(ctx, base)
        _, start, inv = np.unique(hkeys, return_index=True, return_inverse=True)
        total_c = np.bincount(inv, weights=c)
        types = np.bincount(inv).astype(float)
        prob = c / (total_c + types)[inv]
        sum_lower = np.bincount(inv, weights=lower)
        hfound, hidx = _lookup(prev.keys, hkeys[start])
        # Holes: alpha is 1 by rule, so match the lower-order mass exactly.
        hole_h = ~hfound
        if hole_h.any():
            scale = np.where(hole_h, sum_lower / total_c, 0.0)
            prob = np.where(hole_h[inv], c * scale[inv], prob)
        sum_p = np.bincount(inv, weights=prob)
        den = 1.0 - sum_lower
        covered = den < 1e-9  # the history lists every word: no back-off needed
        if covered.any():
            prob = np.where(covered[inv], prob / sum_p[inv], prob)
            sum_p = np.bincount(inv, weights=prob)
        alpha_h = np.where(covered, 1.0, (1.0 - sum_p) / np.where(covered, 1.0, den))
        prev.alpha[hidx[hfound]] = alpha_h[hfound]
        pj = np.where(hfound, prev.joint[hidx], 0.0)  # hole histories get no weight
        joint = pj[inv] * prob
        orders.append(_Order(ids, keys, prob, np.ones(len(ids)), joint))

    tables = []
    for k, o in enumerate(orders, start=1):
        logp = np.log10(np.maximum(o.prob, 1e-300))
        if k == 1:
            logp[BOS] = -99.0
        backoff = np.log10(o.alpha) if k < order else np.zeros(len(o.ids))
        tables.append(NgramTable(k, o.ids.astype(np.int32), logp, backoff,
                                 np.zeros(len(o.ids), dtype=np.int64)))
    return ArpaModel(vocab, tables)


# --------------------------------------------------------------------------- writing


def _fixed6(values: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Formats numbers in (-1000, 1000) as '%.6f' in bulk (no Python loop per value).

    Returns (bytes matrix (n, 11) right-aligned, start column per row, length per row).
    """
    micro = np.rint(np.abs(values) * 1e6).astype(np.int64)
    if (micro >= 1000 * 10**6).any():
        raise ValueError("values must lie in (-1000, 1000)")
    ip, fp = micro // 10**6, micro % 10**6
    n = len(values)
    mat = np.empty((n, 11), dtype=np.uint8)
    for j in range(6):  # fraction digits, right to left
        mat[:, 10 - j] = 48 + (fp // 10**j) % 10
    mat[:, 4] = ord(".")
    mat[:, 3] = 48 + ip % 10
    mat[:, 2] = 48 + (ip // 10) % 10
    mat[:, 1] = 48 + (ip // 100) % 10
    width = 1 + (ip >= 10) + (ip >= 100)  # integer digits
    neg = (values < 0) & (micro > 0)  # what rounds to zero prints as "0.000000"
    length = 7 + width + neg
    start = 11 - length
    rows = np.arange(n)
    mat[rows, start] = np.where(neg, ord("-"), mat[rows, start])
    return mat, start, length


def _ngram_lines(table: NgramTable, vocab_buf: np.ndarray, vocab_off: np.ndarray,
                 vocab_len: np.ndarray, with_backoff: bool) -> bytes:
    """Returns the section body of `table` as bytes (one line per n-gram)."""
    n, k = table.words.shape
    lp_mat, lp_start, lp_len = _fixed6(table.logprob)
    pieces_src = [vocab_buf, np.frombuffer(b"\t \n", dtype=np.uint8), lp_mat.ravel()]
    const_off = len(vocab_buf)
    lp_off = const_off + 3
    bo_off = lp_off + lp_mat.size
    starts = [lp_off + np.arange(n) * 11 + lp_start]
    lens = [lp_len]
    for j in range(k):
        ids = table.words[:, j]
        starts += [np.full(n, const_off + (0 if j == 0 else 1)), vocab_off[ids]]
        lens += [np.ones(n, dtype=np.int64), vocab_len[ids]]
    if with_backoff:
        has = table.backoff != 0.0
        bo_mat, bo_start, bo_len = _fixed6(table.backoff)
        pieces_src.append(bo_mat.ravel())
        starts += [np.full(n, const_off), bo_off + np.arange(n) * 11 + bo_start]
        lens += [has.astype(np.int64), np.where(has, bo_len, 0)]
    starts.append(np.full(n, const_off + 2))
    lens.append(np.ones(n, dtype=np.int64))
    src = np.concatenate(pieces_src)
    st = np.stack(starts, axis=1).ravel()
    ln = np.stack(lens, axis=1).ravel().astype(np.int64)
    out_pos = np.cumsum(ln) - ln
    total = int(ln.sum())
    idx = np.repeat(st - out_pos, ln) + np.arange(total)
    return src[idx].tobytes()


def write_arpa_text(model: ArpaModel, path: str | Path, chunk: int = 500_000) -> None:
    """Writes `model` in the ARPA text form, gzip-compressed when `path` ends in '.gz'.

    Values are printed with 6 decimals; a back-off column is written only where the
    weight is not 0 (alpha != 1) and never on the highest order.
    """
    path = Path(path)
    enc = [w.encode("utf-8") for w in model.vocab]
    vocab_len = np.array([len(b) for b in enc], dtype=np.int64)
    vocab_off = np.cumsum(vocab_len) - vocab_len
    vocab_buf = np.frombuffer(b"".join(enc), dtype=np.uint8)
    opener = (lambda p: gzip.open(p, "wb", compresslevel=1)) if path.suffix == ".gz" \
        else (lambda p: open(p, "wb"))
    top = model.max_order
    with opener(path) as f:
        f.write(b"\\data\\\n")
        for t in model.orders:
            f.write(f"ngram {t.order}={len(t)}\n".encode())
        for t in model.orders:
            f.write(f"\n\\{t.order}-grams:\n".encode())
            for lo in range(0, len(t), chunk):
                part = NgramTable(t.order, t.words[lo:lo + chunk], t.logprob[lo:lo + chunk],
                                  t.backoff[lo:lo + chunk], t.lines[lo:lo + chunk])
                f.write(_ngram_lines(part, vocab_buf, vocab_off, vocab_len, t.order < top))
        f.write(b"\n\\end\\\n")


# --------------------------------------------------------------------------- CLI


def main(argv: list[str] | None = None) -> int:
    """Writes inventory.txt, lexicon.txt, model.arpa[.gz] and synth.json into --out."""
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--words", type=int, required=True, help="vocabulary size")
    ap.add_argument("--ngrams", type=int, required=True, help="total n-gram count")
    ap.add_argument("--out", required=True, help="output directory")
    ap.add_argument("--order", type=int, default=3)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--homophones", type=float, default=0.03, help="share of words")
    ap.add_argument("--prefixes", type=float, default=0.03, help="share of words")
    ap.add_argument("--variants", type=float, default=0.05,
                    help="share of words with a second pronunciation")
    ap.add_argument("--holes", type=float, default=0.01,
                    help="share of the k-grams (k>=3) whose history is absent")
    ap.add_argument("--suffix-misses", type=float, default=0.02,
                    help="share of the k-grams (k>=3) not continuing their suffix")
    ap.add_argument("--no-probabilities", action="store_true",
                    help="lexicon without the probability column (and no variants)")
    ap.add_argument("--gzip", action="store_true", help="write model.arpa.gz")
    ap.add_argument("--no-lexicon", action="store_true")
    args = ap.parse_args(argv)

    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    report: dict = {"arguments": vars(args)}
    t0 = time.perf_counter()
    model = synth_arpa(args.words, args.ngrams, order=args.order, seed=args.seed,
                       hole_share=args.holes, suffix_miss_share=args.suffix_misses)
    t1 = time.perf_counter()
    arpa_path = out / ("model.arpa.gz" if args.gzip else "model.arpa")
    write_arpa_text(model, arpa_path)
    t2 = time.perf_counter()
    report["model"] = {"path": arpa_path.name, "counts": model.counts(),
                       "generate_seconds": round(t1 - t0, 3),
                       "write_seconds": round(t2 - t1, 3),
                       "bytes": arpa_path.stat().st_size}
    if not args.no_lexicon:
        variants = 0.0 if args.no_probabilities else args.variants
        lex = synth_lexicon(args.words, seed=args.seed + 1, homophone_share=args.homophones,
                            prefix_share=args.prefixes, variant_share=variants)
        write_lexicon(lex, out / "lexicon.txt", probabilities=not args.no_probabilities)
        write_phones(out / "inventory.txt")
        report["lexicon"] = {"path": "lexicon.txt", "words": len(lex.words),
                             "pronunciations": len(lex.entries),
                             "homophone_words": len(lex.homophone_words),
                             "prefix_words": len(lex.prefix_words),
                             "probabilities": not args.no_probabilities,
                             "seconds": round(time.perf_counter() - t2, 3)}
    (out / "synth.json").write_text(json.dumps(report, indent=2) + "\n")
    print(json.dumps(report, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())
