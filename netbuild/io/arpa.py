"""ARPA back-off language models: the in-memory model and its reader/writer.

- `NgramTable`: the n-grams of one order as numpy arrays.
- `ArpaModel`: vocabulary plus one `NgramTable` per order.
- `read_arpa(path, diagnostics=None)`: streamed, validating reader (plain or gzip).
- `write_arpa(model, path)`: writes the ARPA text form (gzip when the name ends in .gz).

The ARPA back-off layout (an open format, described here from memory):
free text, then a ``\\data\\`` section of ``ngram N=COUNT`` lines, then one
``\\N-grams:`` section per order with lines ``log10prob w1 ... wN [log10backoff]``,
then ``\\end\\``. The highest order has no back-off column. ``-99`` is the
conventional log10 of a zero probability; it is kept as the number -99.

Reading works on the raw bytes of large chunks with numpy (tokens, numbers and
word look-ups are vectorised); a chunk that shows any anomaly is re-read line by
line to locate every problem. Words are separated by ASCII whitespace (spaces,
tabs; CR before LF is ignored); words themselves are UTF-8. A thread reads (and
decompresses) the next chunk while pieces of the 2-grams and higher are parsed by two
worker threads; numpy, file reads and zlib release the GIL, and the rows are taken
in file order, so results and messages are those of a sequential read. Reading limits
the process to the malloc arenas it has (glibc; see `_share_malloc_arenas`), which
holds for the rest of the process.

Writing prints every value with Python's ``repr`` (the shortest text that reads back
as the same float64), so ``read_arpa(write_arpa(m))`` restores the values exactly.
"""

from __future__ import annotations

import dataclasses
import gzip
import io
import os
import collections
import concurrent.futures
import contextlib
import ctypes
import queue
import re
import threading
from collections.abc import Iterator
from typing import BinaryIO

import numpy as np

from ..errors import ArpaError, Diagnostics, Problem
from ..memory import release_free_memory
from ..symbols import SENTENCE_END, SENTENCE_START


@dataclasses.dataclass
class NgramTable:
    """The n-grams of one order.

    `words[i]` holds the word ids (into `ArpaModel.vocab`) of n-gram i, oldest first;
    `logprob` and `backoff` are log10 values as written in the file (backoff 0.0 where
    the file gives none); `lines` are 1-based source line numbers (0 when not from a file).
    Rows are in file order.
    """

    order: int
    words: np.ndarray  # (count, order) int32
    logprob: np.ndarray  # (count,) float64, log10
    backoff: np.ndarray  # (count,) float64, log10
    lines: np.ndarray  # (count,) int64

    def __len__(self) -> int:
        return int(self.words.shape[0])

    @classmethod
    def empty(cls, order: int) -> "NgramTable":
        return cls(order, np.zeros((0, order), np.int32), np.zeros(0), np.zeros(0),
                   np.zeros(0, np.int64))


@dataclasses.dataclass
class ArpaModel:
    """A back-off n-gram model. `orders[k]` holds the (k+1)-grams; `vocab[i]` is word id i."""

    vocab: list[str]
    orders: list[NgramTable]
    path: str = "<memory>"

    @property
    def max_order(self) -> int:
        return len(self.orders)

    def counts(self) -> list[int]:
        return [len(t) for t in self.orders]

    def word_index(self) -> dict[str, int]:
        return {w: i for i, w in enumerate(self.vocab)}


# ---------------------------------------------------------------------------- reading

_CHUNK = 1 << 21  # bytes per read; small enough to keep the transient memory low
_WS = np.zeros(256, bool)
_WS[[9, 10, 11, 12, 13, 32]] = True  # what bytes.split() splits on
_NUM_RE = re.compile(rb"[+-]?(?:[0-9]+\.?[0-9]*|\.[0-9]+)(?:[eE][+-]?[0-9]+)?")
_NONFINITE_RE = re.compile(rb"[+-]?(?:nan|inf|infinity)", re.IGNORECASE)
_COUNT_RE = re.compile(rb"ngram\s+([0-9]+)\s*=\s*([0-9]+)")
_SECTION_RE = re.compile(rb"\\([0-9]+)-grams:")
_ASCII_WS_RE = re.compile(r"[\t\n\x0b\x0c\r ]")
_MAX_KEY_BYTES = 32  # words up to this length are looked up in numpy, longer ones in a dict
_MAX_PROBLEMS = 10_000
_WORKERS = 2  # threads parsing pieces of the higher orders
_HOLE_CAP = 1 << 62


def _ordinal(n: int) -> str:
    return f"{n}-gram"


class _Vocab:
    """Word bytes -> id, with a numpy hash index for vectorised look-ups."""

    def __init__(self) -> None:
        self.ids: dict[bytes, int] = {}
        self.words: list[bytes] = []
        self._index_size = -1
        self._lock = threading.Lock()

    def index(self):
        """(table, table2, shift, mask, key columns, lens): open-address tables of word
        ids by hash (a word that loses its slot in both is found through `ids`)."""
        with self._lock:
            if self._index_size != len(self.words):
                self._index = self._build_index()
                self._index_size = len(self.words)
            return self._index

    def _build_index(self):
        n = len(self.words)
        keys = np.zeros((n, _MAX_KEY_BYTES), np.uint8)
        lens = np.fromiter(map(len, self.words), np.int64, n)
        # every word's bytes into its row at once (longer words stay all zero: they are
        # found through `ids`)
        short = lens <= _MAX_KEY_BYTES
        blob = np.frombuffer(b"".join(w for w, s in zip(self.words, short.tolist()) if s),
                             np.uint8)
        if blob.size:
            slens = lens[short]
            first = np.repeat(np.cumsum(slens) - slens, slens)
            keys[np.repeat(np.flatnonzero(short), slens),
                 np.arange(blob.size) - first] = blob
        x = keys.view(np.uint64)
        cols = [np.ascontiguousarray(x[:, j]) for j in range(x.shape[1])]
        h = _hash_cols(cols)
        bits = max(int(n * 4).bit_length(), 4)
        shift = np.uint64(64 - bits)
        table = np.full(1 << bits, -1, np.int32)
        slot = (h >> shift).astype(np.int64)
        # first word per slot wins; words sharing a slot are found through the second
        # table (other hash bits) or the dict
        table[slot[::-1]] = np.arange(n, dtype=np.int32)[::-1]
        lost = np.flatnonzero(table[slot] != np.arange(n))
        table2 = np.full(1 << bits, -1, np.int32)
        mask = np.uint64((1 << bits) - 1)
        slot2 = (h[lost] & mask).astype(np.int64)
        table2[slot2[::-1]] = lost[::-1].astype(np.int32)
        return table, table2, shift, mask, cols, lens


_MULS = [np.uint64(c) for c in (0x9E3779B97F4A7C15, 0xC2B2AE3D27D4EB4F,
                                0x165667B19E3779F9, 0xD6E8FEB86659FD93)]
_MIX1, _MIX2 = np.uint64(0xFF51AFD7ED558CCD), np.uint64(0xC4CEB9FE1A85EC53)
_S29, _S32 = np.uint64(29), np.uint64(32)


def _hash_cols(cols: list[np.ndarray]) -> np.ndarray:
    """A 64-bit hash of rows given as uint64 columns; all-zero columns add nothing, so
    a word hashes the same whatever padding width it was gathered with."""
    h = cols[0] * _MULS[0]
    for j in range(1, len(cols)):
        h ^= cols[j] * _MULS[j]
    h ^= h >> _S29
    h *= _MIX1
    h ^= h >> _S32
    h *= _MIX2
    return h


_LENMASK = np.array([(1 << (8 * i)) - 1 for i in range(8)] + [2**64 - 1], np.uint64)
# _COLMASK[j][n]: the mask keeping the bytes of word column j of a token of n bytes
_COLMASK = [_LENMASK[np.clip(np.arange(64) - 8 * j, 0, 8)] for j in range(_MAX_KEY_BYTES // 8)]


def _windows(padded: bytes, width: int) -> np.ndarray:
    """A view of the `width` bytes starting at every byte offset of `padded`.

    The items are void scalars: indexing copies `width` bytes per index, several
    times faster than gathering from an unaligned uint64 view, which numpy reads
    element by element.
    """
    return np.ndarray(shape=(len(padded) - width + 1,), dtype=f"V{width}", buffer=padded,
                      strides=(1,))


def _token_words(padded: bytes, starts: np.ndarray, lens: np.ndarray, width: int
                 ) -> np.ndarray:
    """The first `width` bytes of each token as (k, width // 8) little-endian uint64
    words, zero past the token's end."""
    x = _windows(padded, width)[starts].view("<u8").reshape(-1, width // 8)
    lc = np.minimum(lens, 63)
    for j in range(width // 8):
        x[:, j] &= _COLMASK[j][lc]
    return x


def _gather(padded: bytes, starts: np.ndarray, lens: np.ndarray, width: int
            ) -> list[np.ndarray]:
    """The bytes of each token as width // 8 uint64 columns, zero past the token's end."""
    x = _token_words(padded, starts, lens, width)
    return list(np.ascontiguousarray(x.T))


_P10I = 10 ** np.arange(19, dtype=np.int64)
_P10F = 10.0 ** np.arange(23)
_B48 = np.uint8(48)
_L1, _L2 = np.uint64(0x00FF00FF00FF00FF), np.uint64(0x0000FFFF0000FFFF)
_L3 = np.uint64(0xFFFFFFFF)
_S8, _S16 = np.uint64(8), np.uint64(16)
_U10, _U100, _U10K, _ONE = np.uint64(10), np.uint64(100), np.uint64(10000), np.uint64(1)


def _plain_decimals(padded: bytes, starts: np.ndarray, lens: np.ndarray
                    ) -> tuple[np.ndarray, np.ndarray]:
    """Values of tokens ``[+-]digits[.digits]`` of at most 16 bytes and 15 digits.

    Returns (values, ok); where ok is False the token needs the general parser. The
    digits form an integer m < 10**15 < 2**53 and m / 10**f (f <= 15, both exact
    doubles) is the correctly rounded value, the same double `float()` returns. The
    digits are combined eight at a time inside 64-bit words (each step joins
    neighbouring lanes: d*10 + d', then pairs*100, then quads*10**4).
    """
    x = _token_words(padded, starts, lens, 16)
    b = x.view(np.uint8)  # (k, 16): the token's bytes, zero past its end
    d = b - _B48
    isd = d < 10
    d *= isd
    bits = np.bitwise_count(isd.view(np.uint64))
    ndig = bits[:, 0] + bits[:, 1]
    dots = (b == 46).view(np.uint64)
    bits = np.bitwise_count(dots)
    ndot = bits[:, 0] + bits[:, 1]
    first = b[:, 0]
    neg = first == 45
    sign = neg | (first == 43)
    ok = (ndig + ndot + sign == lens) & (ndot <= 1) & (ndig >= 1) & (ndig <= 15)
    v = d.view(np.uint64)
    v = (v * _U10 + (v >> _S8)) & _L1
    v = (v * _U100 + (v >> _S16)) & _L2
    v = (v * _U10K + (v >> _S32)) & _L3
    t = v.view(np.int64)
    # 16 places, left-aligned, with sign, dot and padding read as 0 digits
    total = t[:, 0] * 100_000_000 + t[:, 1]
    lk = np.where(ok, lens, 16)
    total //= _P10I[16 - lk]
    # dot position: the bytes below the dot in its word (64 bits where a word has none)
    pre = np.bitwise_count(dots - _ONE)
    pos = (pre[:, 0] >> 3) + np.where(dots[:, 0] == 0, pre[:, 1] >> 3, 0)
    hasdot = ok & (ndot == 1)
    frac = np.where(hasdot, lk - 1 - pos.astype(np.int64), 0)
    scale = _P10I[frac + hasdot]
    hi = total // scale
    mant = np.where(hasdot, hi * _P10I[frac] + (total - hi * scale), total)
    out = mant.astype(np.float64) / _P10F[frac]
    np.negative(out, out=out, where=neg)
    return out, ok


def _parse_numbers(padded: bytes, starts: np.ndarray, lens: np.ndarray,
                   seg: bytes) -> np.ndarray | None:
    """Parses decimal tokens exactly; None if any token is not a finite number.

    Plain decimals go through `_plain_decimals`; other tokens (exponents, more than 15
    digits) through `float()` after the same syntax check as the line-by-line reader.
    """
    if len(starts) == 0:
        return np.empty(0)
    out, ok = _plain_decimals(padded, starts, lens)
    slow = np.flatnonzero(~ok)
    if len(slow):
        try:
            for i in slow.tolist():
                s = int(starts[i])
                tok = seg[s:s + int(lens[i])]
                if not _NUM_RE.fullmatch(tok):
                    return None
                out[i] = float(tok)
        except ValueError:
            return None
        if not np.isfinite(out[slow]).all():
            return None
    return out


def _lookup(vocab: _Vocab, padded: bytes, starts: np.ndarray, lens: np.ndarray,
            seg: bytes) -> np.ndarray | None:
    """Word ids of the tokens; None if any token is not a known word."""
    k = len(starts)
    if k == 0:
        return np.zeros(0, np.int32)
    table, table2, shift, mask, vcols, vlens = vocab.index()
    if len(vlens) == 0:
        return None
    maxlen = int(lens.max())
    width = min(-(-maxlen // 8) * 8, _MAX_KEY_BYTES)
    x = _gather(padded, starts, lens, width)
    h = _hash_cols(x)
    cand = table[h >> shift]
    np.maximum(cand, 0, out=cand)
    ok = vlens[cand] == lens
    for j, col in enumerate(x):
        ok &= vcols[j][cand] == col
    miss = np.flatnonzero(~ok)
    if len(miss):  # second choice for words that lost their slot in the first table
        c2 = np.maximum(table2[h[miss] & mask], 0)
        cand[miss] = c2
        ok2 = vlens[c2] == lens[miss]
        for j, col in enumerate(x):
            ok2 &= vcols[j][c2] == col[miss]
        ok[miss] = ok2
    if maxlen > width:
        ok &= lens <= width
    bad = np.flatnonzero(~ok)
    if len(bad):
        get = vocab.ids.get
        for i in bad.tolist():
            s = int(starts[i])
            wid = get(seg[s:s + int(lens[i])])
            if wid is None:
                return None
            cand[i] = wid
    return cand


class _TableBuilder:
    """Accumulates the rows of one order in preallocated numpy arrays.

    For the highest order (`top`), whose back-off weights are all 0, the back-off
    array is left as allocated by `np.zeros`: its pages stay untouched (they cost no
    resident memory until something writes to them).
    """

    def __init__(self, order: int, capacity: int, top: bool = False) -> None:
        self.order = order
        self.top = top
        self.n = 0
        self._alloc(max(capacity, 16))

    def _alloc(self, cap: int) -> None:
        old = getattr(self, "words", None)
        words = np.empty((cap, self.order), np.int32)
        lp, ln = np.empty(cap), np.empty(cap, np.int64)
        bo = np.zeros(cap) if self.top else np.empty(cap)
        if old is not None:
            words[: self.n] = old[: self.n]
            lp[: self.n] = self.logprob[: self.n]
            if not self.top or np.any(self.backoff[: self.n]):
                bo[: self.n] = self.backoff[: self.n]
            ln[: self.n] = self.lines[: self.n]
        self.words, self.logprob, self.backoff, self.lines = words, lp, bo, ln

    def append(self, words, logprob, backoff, lines) -> None:
        k = len(logprob)
        if self.n + k > len(self.logprob):
            self._alloc(max(int(len(self.logprob) * 1.5), self.n + k))
        sl = slice(self.n, self.n + k)
        self.words[sl], self.logprob[sl], self.lines[sl] = words, logprob, lines
        if not self.top or np.any(backoff):  # (the highest order has none)
            self.backoff[sl] = backoff
        self.n += k

    def table(self) -> NgramTable:
        n = self.n
        if n == len(self.logprob):
            return NgramTable(self.order, self.words, self.logprob, self.backoff, self.lines)
        backoff = (np.zeros(n) if self.top and not np.any(self.backoff[:n])
                   else self.backoff[:n].copy())
        return NgramTable(self.order, self.words[:n].copy(), self.logprob[:n].copy(),
                          backoff, self.lines[:n].copy())


def _open_binary(path: str) -> tuple[BinaryIO, int]:
    """Opens `path` for reading bytes, decompressing gzip (by magic bytes)."""
    try:
        size = os.path.getsize(path)
        raw = open(path, "rb")
    except OSError as err:
        raise ArpaError(f"cannot read the file ({err.strerror})",
                        "check the path and the permissions", path=path) from err
    magic = raw.read(2)
    raw.seek(0)
    if magic == b"\x1f\x8b":
        return gzip.GzipFile(fileobj=raw, mode="rb"), size * 1100  # deflate's ratio is < 1032
    return raw, size


def _share_malloc_arenas() -> None:
    """Makes threads started from now on allocate from the existing malloc arenas
    instead of new ones of their own (glibc's M_ARENA_MAX = 1; a no-op elsewhere).

    A thread's own arena hands the memory freed after each piece back to the system
    and faults it in again for the next one: on the 5M model about 150,000 extra page
    faults, 0.5 s of system time and more in all (2026-12-02, with and without the
    setting, alternating runs). glibc fixes the arena limit the first time a new thread
    needs an arena, so the setting holds for the rest of the process; Python threads
    seldom allocate at the same moment, so sharing costs them nothing measurable.
    """
    try:
        mallopt = ctypes.CDLL(None).mallopt
    except (OSError, AttributeError):
        return
    mallopt(-8, 1)  # M_ARENA_MAX in glibc's malloc.h


def _prefetched(chunks: Iterator[bytes]) -> Iterator[bytes]:
    """Runs `chunks` one piece ahead in a thread (file reads and zlib release the GIL)."""
    q: queue.Queue = queue.Queue(maxsize=2)
    stop = threading.Event()
    done = object()

    def put(item) -> bool:
        """Queues `item` unless the consumer has stopped; False once it has."""
        while not stop.is_set():
            try:
                q.put(item, timeout=0.1)
                return True
            except queue.Full:
                continue
        return False

    def produce() -> None:
        try:
            for c in chunks:
                if not put(c):
                    return
            put((done, None))
        except BaseException as err:  # handed to the consumer
            put((done, err))

    thread = threading.Thread(target=produce, daemon=True)
    thread.start()
    try:
        while True:
            item = q.get()
            if isinstance(item, tuple):
                if item[1] is not None:
                    raise item[1]
                return
            yield item
    finally:
        stop.set()
        thread.join()


def _chunks(f: BinaryIO, path: str, problems: list[Problem]) -> Iterator[bytes]:
    """Yields pieces of the file that end at line ends (the last one ends with '\\n' too)."""
    rest = b""
    while True:
        try:
            data = f.read(_CHUNK)
        except (OSError, EOFError, gzip.BadGzipFile) as err:
            problems.append(Problem(path, None, f"the gzip data is damaged ({err})",
                                    "recompress the file or give the plain text"))
            data = b""
        if not data:
            if rest:
                yield rest + b"\n"
            return
        buf = rest + data
        cut = buf.rfind(b"\n")
        if cut < 0:
            rest = buf
            continue
        rest = buf[cut + 1:]
        yield buf[: cut + 1]


def _next_header(chunk: bytes, pos: int) -> int:
    """The offset of the first line after `pos` that starts with a backslash (a section
    header), or len(chunk); `pos` is the start of a line that is not a header.

    Searches for the backslash alone (rare in n-gram lines, so the search runs at memchr
    speed) and checks that a line feed precedes it.
    """
    while True:
        at = chunk.find(b"\\", pos)
        if at < 0:
            return len(chunk)
        if chunk[at - 1] == 0x0A:
            return at
        pos = at + 1


def _count_lines(seg: bytes) -> int:
    """The number of line feeds in `seg` (numpy's count releases the GIL and beats
    bytes.count for large pieces)."""
    if len(seg) < 4096:
        return seg.count(b"\n")
    return int(np.count_nonzero(np.frombuffer(seg, np.uint8) == 10))


class _ArpaReader:
    def __init__(self, path: str) -> None:
        self.path = path
        self.problems: list[Problem] = []
        self.vocab = _Vocab()
        self.declared: dict[int, tuple[int, int]] = {}  # order -> (count, line)
        self.builders: dict[int, _TableBuilder] = {}
        self.seen_lines: dict[int, int] = {}  # order -> data lines seen
        self.state = "preamble"  # preamble | data | ngrams | skip | end
        self.order = 0
        self.next_order = 1
        self.bad_header = False
        self.line = 0  # lines consumed so far
        self.byte = 0  # bytes consumed so far
        self.size_bound = 0
        self.trailing_text_line = 0
        self.saw_data = False
        self.pool: concurrent.futures.ThreadPoolExecutor | None = None
        self.pending: collections.deque = collections.deque()

    # -- problems
    def error(self, line: int | None, message: str, hint: str) -> None:
        if len(self.problems) < _MAX_PROBLEMS:
            self.problems.append(Problem(self.path, line, message, hint, "error"))

    def warning(self, line: int | None, message: str, hint: str = "") -> None:
        self.problems.append(Problem(self.path, line, message, hint, "warning"))

    # -- driver
    def run(self) -> ArpaModel:
        f, self.size_bound = _open_binary(self.path)
        _share_malloc_arenas()  # before the read-ahead and parsing threads start
        try:
            return self._run(f)
        finally:
            self.pending.clear()
            if self.pool is not None:
                self.pool.shutdown(wait=True, cancel_futures=True)
                release_free_memory()  # what the reading threads freed

    def _run(self, f: BinaryIO) -> ArpaModel:
        nonblank = False
        with f, contextlib.closing(_prefetched(_chunks(f, self.path, self.problems))) as it:
            for chunk in it:
                if not nonblank and chunk.strip():
                    nonblank = True
                self._check_utf8(chunk)
                self._chunk(chunk)
                if self.state == "end":
                    break
        self._drain()
        if not nonblank and self.line <= 1 and not self.problems:
            self.error(None, "the file is empty", "give an ARPA model (\\data\\, sections, \\end\\)")
            return self._finish()
        if self.state != "end":
            self._close_section()
            if not self.saw_data:
                self.error(max(self.line, 1), "no \\data\\ section found; this is not an ARPA file",
                           "start the model with a line \\data\\ followed by 'ngram N=COUNT' lines")
            else:
                self.error(max(self.line, 1), "the file ends without \\end\\",
                           "add a line \\end\\ after the last section")
        return self._finish()

    def _check_utf8(self, chunk: bytes) -> None:
        if chunk.isascii():
            return
        pos = 0
        reported = 0
        while reported < 20:
            try:
                chunk[pos:].decode("utf-8")
                return
            except UnicodeDecodeError as err:
                bad = pos + err.start
                line = self.line + chunk.count(b"\n", 0, bad) + 1
                self.error(line, f"bytes that are not valid UTF-8 at byte offset {self.byte + bad}",
                           "save the file as UTF-8")
                pos = pos + err.end
                reported += 1

    def _chunk(self, chunk: bytes) -> None:
        # Split at header lines (lines starting with a backslash); those are few.
        pos = 0
        n = len(chunk)
        while pos < n:
            if chunk[pos] == 0x5C:  # '\'
                end = chunk.index(b"\n", pos) + 1
                self.line += 1
                self._header(chunk[pos:end].strip(), self.line)
                self.byte += end - pos
                pos = end
                if self.state == "end":
                    self._after_end(chunk[pos:])
                    return
                continue
            end = _next_header(chunk, pos)
            seg = chunk[pos:end]
            self._body(seg, self.line + 1)
            self.line += _count_lines(seg)
            self.byte += end - pos
            pos = end

    def _after_end(self, rest: bytes) -> None:
        if rest.strip():
            offset = len(rest) - len(rest.lstrip())
            line = self.line + rest.count(b"\n", 0, offset) + 1
            self.warning(line, "text after \\end\\ is ignored")

    # -- headers and the \data\ section
    def _header(self, text: bytes, line: int) -> None:
        self._drain()
        if text == b"\\data\\":
            if self.saw_data:
                self.error(line, "a second \\data\\ section", "keep one \\data\\ section at the top")
                self.state = "skip"
                return
            self.saw_data = True
            self.state = "data"
            return
        if text == b"\\end\\":
            if self.state == "preamble":
                self.error(line, "\\end\\ before any \\data\\ section",
                           "start the model with \\data\\")
            self._close_section()
            self._check_missing_sections(line)
            self.state = "end"
            return
        if self.state == "preamble":
            return  # free text before \data\ may contain anything
        m = _SECTION_RE.fullmatch(text)
        if m is None:
            self._close_section()
            self.bad_header = True
            self.state = "skip"
            self.error(line, f"unknown section header '{_show(text)}'",
                       "section headers are \\data\\, \\N-grams: (N = 1, 2, ...) and \\end\\")
            return
        order = int(m.group(1))
        self._close_section()
        if self.state == "data" and not self.declared:
            self.error(line, "the \\data\\ section declares no n-gram counts",
                       "add lines 'ngram N=COUNT' after \\data\\")
        if order not in self.declared:
            self.bad_header = True
            self.state = "skip"
            top = max(self.declared) if self.declared else 0
            self.error(line, f"section \\{order}-grams: but \\data\\ declares "
                       f"{'no such order' if order > top else f'no count for {order}-grams'}",
                       f"add 'ngram {order}=COUNT' to \\data\\ or remove the section")
            return
        if order in self.builders:
            self.bad_header = True
            self.state = "skip"
            self.error(line, f"a second \\{order}-grams: section",
                       "merge the sections into one")
            return
        if order != self.next_order:
            self.bad_header = True
            self.error(line, f"section \\{order}-grams: is out of order (expected "
                       f"\\{self.next_order}-grams:)", "put the sections in increasing order")
        self.next_order = max(self.next_order, order + 1)
        count = self.declared[order][0]
        per_line = 2 * (order + 1)
        cap = min(count, self.size_bound // per_line + 1)
        self.builders[order] = _TableBuilder(order, cap, top=order == max(self.declared))
        self.seen_lines[order] = 0
        self.order = order
        self.state = "ngrams"

    def _data_lines(self, seg: bytes, first_line: int) -> None:
        for i, raw in enumerate(seg.split(b"\n")):
            text = raw.strip()
            if not text:
                continue
            line = first_line + i
            m = _COUNT_RE.fullmatch(text)
            if m is None:
                self.error(line, f"'{_show(text)}' is not a count line",
                           "write counts as 'ngram N=COUNT' in the \\data\\ section")
                continue
            order, count = int(m.group(1)), int(m.group(2))
            if order < 1:
                self.error(line, "n-gram orders start at 1", "write 'ngram 1=COUNT' first")
            elif order in self.declared:
                self.error(line, f"the count of {order}-grams is given twice",
                           "keep one 'ngram N=COUNT' line per order")
            elif order != len(self.declared) + 1:
                self.error(line, f"'ngram {order}=' follows 'ngram {len(self.declared)}='",
                           "list the orders 1, 2, 3, ... without gaps, in increasing order")
                self.declared[order] = (count, line)
            else:
                self.declared[order] = (count, line)

    def _close_section(self) -> None:
        if self.state != "ngrams":
            return
        self._drain()
        order = self.order
        count, line = self.declared[order]
        seen = self.seen_lines[order]
        if seen != count:
            self.error(line, f"header promises {count} {order}-grams but {seen} follow",
                       "fix the count in \\data\\")
        self.state = "closed"

    def _check_missing_sections(self, line: int) -> None:
        if self.bad_header:
            return  # the bad header was probably meant to be the missing section
        for order, (count, dline) in sorted(self.declared.items()):
            if order not in self.builders:
                self.error(dline, f"\\data\\ declares {count} {order}-grams but there is no "
                           f"\\{order}-grams: section",
                           f"add the section before line {line} or remove 'ngram {order}='")

    # -- bodies
    def _body(self, seg: bytes, first_line: int) -> None:
        state = self.state
        if state == "ngrams":
            self._ngrams(seg, first_line)
        elif state == "data":
            self._data_lines(seg, first_line)
        elif state == "closed":
            if seg.strip():
                offset = len(seg) - len(seg.lstrip())
                line = first_line + seg.count(b"\n", 0, offset)
                self.error(line, "text outside any section",
                           "put n-grams after a \\N-grams: header")
                self.state = "skip"

    def _ngrams(self, seg: bytes, first_line: int) -> None:
        order = self.order
        top = order == max(self.declared)
        if order == 1:  # 1-grams define the words, in order: parsed here
            rows = _fast_rows(seg, order, top, None)
            if rows is not None:
                spans, lp, bo, rel = rows
                ids = self._add_words(seg, spans)
                rows = None if ids is None else (ids, lp, bo, rel)
            self._take_rows(rows, seg, first_line, order, top)
            return
        # Higher orders only read the vocabulary: pieces are parsed by worker threads
        # (numpy releases the GIL) and their rows taken in file order.
        if self.pool is None:
            self.pool = concurrent.futures.ThreadPoolExecutor(_WORKERS)
        self.vocab.index()
        self.pending.append((self.pool.submit(_fast_rows, seg, order, top, self.vocab),
                             seg, first_line, order, top))
        while len(self.pending) > _WORKERS:
            self._take_pending()

    def _take_pending(self) -> None:
        future, seg, first_line, order, top = self.pending.popleft()
        self._take_rows(future.result(), seg, first_line, order, top)

    def _drain(self) -> None:
        while self.pending:
            self._take_pending()

    def _take_rows(self, rows, seg: bytes, first_line: int, order: int, top: bool) -> None:
        if rows is None:
            self._slow_rows(seg, first_line, order, top)
            return
        ids, lp, bo, rel = rows
        self.seen_lines[order] += len(rel)
        self.builders[order].append(ids, lp, bo, rel + first_line)

    def _add_words(self, seg: bytes, spans) -> np.ndarray | None:
        starts, lens = spans
        words = [seg[s:s + n] for s, n in zip(starts.tolist(), lens.tolist())]
        base = len(self.vocab.words)
        new = dict(zip(words, range(base, base + len(words))))
        if len(new) != len(words) or (self.vocab.ids.keys() & new.keys()):
            return None
        self.vocab.ids.update(new)
        self.vocab.words.extend(words)
        return np.arange(base, base + len(words), dtype=np.int32)[:, None]

    def _slow_rows(self, seg: bytes, first_line: int, order: int, top: bool) -> None:
        """Re-reads a piece line by line, reporting every problem with its line."""
        ids, lps, bos, rel = [], [], [], []
        nlines = 0
        expect = f"{order + 1}" if top else f"{order + 1} or {order + 2}"
        vocab = self.vocab
        here: dict[bytes, int] = {}  # 1-grams of this piece -> line
        for i, raw in enumerate(seg.split(b"\n")):
            f = raw.split()
            if not f:
                continue
            nlines += 1
            line = first_line + i
            if len(f) not in (order + 1, order + 2) or (top and len(f) == order + 2):
                if top and len(f) == order + 2:
                    self.error(line, f"{order}-gram with a back-off weight, but {order} is the "
                               "highest order", "remove the last field (the highest order has "
                               "no back-off column)")
                else:
                    self.error(line, f"{len(f)} fields on a {order}-gram line; expected {expect}"
                               f" (log10 probability, {order} word{'s' if order > 1 else ''}"
                               f"{'' if top else ', optional log10 back-off'})",
                               "separate the fields by spaces or tabs and check for missing"
                               " or extra words")
                continue
            lp = self._number(f[0], line, "log10 probability")
            bo = 0.0 if len(f) == order + 1 else self._number(f[-1], line, "log10 back-off")
            if lp is None or bo is None:
                continue
            if lp > 0:
                self.error(line, f"positive log10 probability {_show(f[0])} (a probability "
                           "above 1)", "ARPA files store log10 probabilities, which are <= 0")
                continue
            words = f[1: order + 1]
            if order == 1:
                w = words[0]
                if w in vocab.ids:
                    first = here[w] if w in here else self._unigram_line(w)
                    self.error(line, f"duplicate 1-gram '{_show(w)}' (first at line {first})",
                               "remove one of the two lines")
                    continue
                here[w] = line
                vocab.ids[w] = len(vocab.words)
                vocab.words.append(w)
                row = [vocab.ids[w]]
            else:
                row = []
                for w in words:
                    wid = vocab.ids.get(w)
                    if wid is None:
                        self.error(line, f"word '{_show(w)}' is not among the 1-grams",
                                   "add it to the \\1-grams: section or remove this n-gram")
                        break
                    row.append(wid)
                if len(row) != order:
                    continue
            ids.append(row)
            lps.append(lp)
            bos.append(bo)
            rel.append(i)
        arr = np.array(ids, np.int32).reshape(-1, order)
        self.seen_lines[order] += nlines
        if rel:
            self.builders[order].append(arr, np.array(lps), np.array(bos),
                                        np.array(rel, np.int64) + first_line)

    def _unigram_line(self, w: bytes) -> str:
        b = self.builders[1]
        wid = self.vocab.ids[w]
        hit = np.flatnonzero(b.words[: b.n, 0] == wid)
        return str(int(b.lines[hit[0]])) if len(hit) else "?"

    def _number(self, tok: bytes, line: int, what: str) -> float | None:
        if _NUM_RE.fullmatch(tok):
            v = float(tok)
            if np.isfinite(v):
                return v
            self.error(line, f"{what} {_show(tok)} is out of range", "write a number between"
                       " -1e300 and 1e300 (-99 stands for probability zero)")
            return None
        if _NONFINITE_RE.fullmatch(tok):
            self.error(line, f"{what} is {_show(tok)}", "write a finite number (-99 stands for "
                       "probability zero)")
            return None
        self.error(line, f"malformed {what} '{_show(tok)}'",
                   "write a decimal number such as -1.2345")
        return None

    # -- end of file
    def _finish(self) -> ArpaModel:
        vocab = [w.decode("utf-8", "replace") for w in self.vocab.words]
        orders = []
        top = max(self.declared) if self.declared else 0
        for order in range(1, top + 1):
            b = self.builders.get(order)
            orders.append(b.table() if b is not None else NgramTable.empty(order))
        model = ArpaModel(vocab, orders, self.path)
        _check_tables(model, self)
        return model


def _line_counts(starts: np.ndarray, ends: np.ndarray, nl: np.ndarray, order: int,
                 top: bool) -> tuple[np.ndarray, np.ndarray] | None:
    """(non-blank line indices, tokens on each); None if a count is not a row's."""
    ntok, nlines = len(starts), len(nl)
    for t in ((order + 1,) if top else (order + 2, order + 1)):
        # When every line holds t tokens, line j's tokens are t*j .. t*j + t - 1: it is
        # enough that the first of them starts and the last ends on line j.
        if ntok == t * nlines and nlines:
            if (ends[t - 1::t] <= nl).all() and (starts[t::t] > nl[:-1]).all():
                return np.arange(nlines), np.full(nlines, t)
    per_line = np.diff(np.searchsorted(starts, nl), prepend=0)
    filled = np.flatnonzero(per_line)
    c = per_line[filled]
    if top:
        if not (c == order + 1).all():
            return None
    elif not ((c == order + 1) | (c == order + 2)).all():
        return None
    return filled, c


def _field_counts_ok(c: np.ndarray, order: int, top: bool) -> bool:
    """True if every line has as many fields as an n-gram line of `order` may have."""
    if top:
        return bool((c == order + 1).all())
    return bool(((c == order + 1) | (c == order + 2)).all())


# The field separators of the common layout (space, tab, LF), as byte -> True.
_SEPARATOR = np.zeros(256, bool)
_SEPARATOR[[9, 10, 32]] = True


def _single_separated(body: np.ndarray, order: int, top: bool):
    """Token spans of a piece in the common layout, in one pass over its bytes.

    Applies when every field is followed by exactly one space, tab or line feed: no
    blank lines (except at the end of the piece, before the next section), no leading,
    trailing or repeated whitespace, no other bytes below 33 (so no CR, no control
    bytes). Then the bytes <= 32 are exactly the separators, each token runs from one
    separator to the next, and a line's field count is the number of separators up to
    its line feed. Returns None when the piece is laid out in any other way (the
    general tokenizer handles it) or has a line of the wrong length.
    """
    end = len(body)
    while end > 1 and body[end - 1] == 10 and body[end - 2] == 10:
        end -= 1  # blank lines at the end hold no rows
    sep = np.flatnonzero(body[:end] <= 32)
    if not len(sep) or sep[0] == 0:
        return None
    kinds = body[sep]
    if kinds[-1] != 10 or not _SEPARATOR[kinds].all():
        return None
    if (sep[1:] - sep[:-1] == 1).any():
        return None
    line_ends = np.flatnonzero(kinds == 10)  # index of each line's last separator
    c = np.empty(len(line_ends), np.int64)
    c[0] = line_ends[0] + 1
    np.subtract(line_ends[1:], line_ends[:-1], out=c[1:])
    if not _field_counts_ok(c, order, top):
        return None
    starts = np.empty(len(sep), np.int64)
    starts[0] = 0
    np.add(sep[:-1], 1, out=starts[1:])
    off = np.empty(len(line_ends), np.int64)
    off[0] = 0
    np.add(line_ends[:-1], 1, out=off[1:])
    return starts, sep, np.arange(len(c)), c, off


def _tokens(body: np.ndarray, order: int, top: bool):
    """Token spans of a piece in any layout: (starts, ends, non-blank line indices,
    fields per line, index of each line's first token); None if a line has the
    wrong number of fields."""
    n = len(body)
    nw = np.zeros(n + 2, bool)
    control = np.subtract(body, 14, dtype=np.uint8) < 18  # bytes 14..31
    control |= body < 9
    if control.any():
        np.logical_not(_WS[body], out=nw[1:-1])
    else:
        np.greater(body, 32, out=nw[1:-1])  # the only bytes <= 32 left are whitespace
    del control
    edges = np.flatnonzero(nw[1:] != nw[:-1])
    del nw
    starts, ends = edges[0::2], edges[1::2]
    nl = np.flatnonzero(body == 10)
    counted = _line_counts(starts, ends, nl, order, top)
    if counted is None:
        return None
    filled, c = counted
    return starts, ends, filled, c, np.cumsum(c) - c


def _fast_rows(seg: bytes, order: int, top: bool, vocab: _Vocab | None):
    """Vectorised parse of a piece of n-gram lines; None when anything is irregular.

    Returns (word ids (k, order) or, for 1-grams, the (starts, lens) of the words,
    logprob, backoff, relative line numbers of the rows). Runs in worker threads: it
    only reads `vocab`.
    """
    n = len(seg)
    padded = seg + b"\0" * 40
    body = np.frombuffer(padded, np.uint8, count=n)
    tokens = _single_separated(body, order, top)
    if tokens is None:
        tokens = _tokens(body, order, top)
        if tokens is None:
            return None
    starts, ends, filled, c, off = tokens
    lens = ends - starts
    lp = _parse_numbers(padded, starts[off], lens[off], seg)
    if lp is None or (lp > 0).any():
        return None
    bo = np.zeros(len(c))
    has_bo = np.flatnonzero(c == order + 2)
    if len(has_bo):
        bidx = off[has_bo] + order + 1
        vals = _parse_numbers(padded, starts[bidx], lens[bidx], seg)
        if vals is None:
            return None
        bo[has_bo] = vals
    widx = (off[:, None] + np.arange(1, order + 1)).ravel()
    if vocab is None:
        return (starts[widx], lens[widx]), lp, bo, filled
    ids = _lookup(vocab, padded, starts[widx], lens[widx], seg)
    if ids is None:
        return None
    return ids.reshape(-1, order), lp, bo, filled


def _row_codes(tables: list[np.ndarray], radix: int) -> list[np.ndarray]:
    """Exact int64 codes of rows (equal rows <-> equal codes), jointly over `tables`."""
    sizes = [len(t) for t in tables]
    rows = np.concatenate(tables) if len(tables) > 1 else tables[0]
    code = rows[:, 0].astype(np.int64)
    span = radix
    for j in range(1, rows.shape[1]):
        if span * radix >= _HOLE_CAP:
            _, code = np.unique(code, return_inverse=True)
            code = code.astype(np.int64).ravel()
            span = int(code.max()) + 1 if len(code) else 1
        code = code * radix + rows[:, j]
        span *= radix
    return np.split(code, np.cumsum(sizes)[:-1])


def _plain_codes(rows: np.ndarray, radix: int) -> tuple[np.ndarray, np.ndarray]:
    """The codes of the rows' histories (all columns but the last) and of the rows, as
    plain radix numbers; `radix ** rows.shape[1]` must stay below `_HOLE_CAP`."""
    pre = rows[:, 0].astype(np.int64)
    for j in range(1, rows.shape[1] - 1):
        pre *= radix
        pre += rows[:, j]
    code = pre * radix
    code += rows[:, -1]
    return pre, code


def _absent(sorted_keys: np.ndarray, queries: np.ndarray, queries_sorted: bool
            ) -> np.ndarray:
    """True for each query that is not among `sorted_keys`.

    Sorted queries (the histories of an n-gram list in id order) repeat in runs; each
    run is looked up once.
    """
    if len(sorted_keys) == 0:
        return np.ones(len(queries), bool)
    if queries_sorted and len(queries) > 1:
        new = np.empty(len(queries), bool)
        new[0] = True
        np.not_equal(queries[1:], queries[:-1], out=new[1:])
        first = np.flatnonzero(new)
        del new
        distinct = queries[first]
        pos = np.minimum(np.searchsorted(sorted_keys, distinct), len(sorted_keys) - 1)
        absent = sorted_keys[pos] != distinct
        if not absent.any():
            return np.zeros(len(queries), bool)
        return np.repeat(absent, np.diff(np.append(first, len(queries))))
    pos = np.minimum(np.searchsorted(sorted_keys, queries), len(sorted_keys) - 1)
    return sorted_keys[pos] != queries


def _check_tables(model: ArpaModel, reader: _ArpaReader) -> None:
    """Duplicates (errors), history holes and misplaced sentence markers (warnings)."""
    radix = max(len(model.vocab), 1)
    bos, eos = (model.vocab.index(w) if w in model.vocab else None
                for w in (SENTENCE_START, SENTENCE_END))
    # order -> codes, sorted; kept for the hole check of the next order when the codes
    # are plain radix numbers (no compaction): a history's code is then its n-gram's
    plain: dict[int, np.ndarray] = {}
    holes: list[tuple[NgramTable, int, np.ndarray]] = []  # (table, lower order, missing)
    for t in model.orders[1:]:
        if len(t) == 0:
            continue
        if radix ** t.order < _HOLE_CAP:
            pre, code = _plain_codes(t.words, radix)
        else:
            (code,) = _row_codes([t.words], radix)
            pre = None
        # ARPA files usually list n-grams in id order: strictly increasing codes are
        # sorted and free of duplicates, and there is nothing to sort
        presorted = len(code) < 2 or bool((code[1:] > code[:-1]).all())
        if presorted:
            s = code
        else:
            presorted = bool((code[1:] >= code[:-1]).all())
            s = code if presorted else np.sort(code)
            if (s[1:] == s[:-1]).any():
                order = np.argsort(code, kind="stable")
                sc = code[order]
                dup = np.flatnonzero(sc[1:] == sc[:-1]) + 1
                for j in dup[:_MAX_PROBLEMS].tolist():
                    first, second = sorted((int(t.lines[order[j - 1]]),
                                            int(t.lines[order[j]])))
                    words = " ".join(model.vocab[w] for w in t.words[order[j]])
                    reader.error(second, f"duplicate {t.order}-gram '{words}' (first at "
                                 f"line {first})", "remove one of the two lines")
                del order, sc
        if pre is not None:
            plain[t.order] = s
        del code
        if t.order == 2:  # a 1-word history is a known word, hence listed
            continue
        lower = model.orders[t.order - 2]
        if pre is not None and lower.order in plain:
            missing = _absent(plain[lower.order], pre, presorted)
        else:
            pre, low = _row_codes([t.words[:, :-1], lower.words], radix)
            missing = _absent(np.sort(low), pre, False)
        holes.append((t, lower.order, missing))
        del pre
    for t, lower_order, missing in holes:
        k = int(missing.sum())
        if k:
            first = int(t.lines[missing].min())
            reader.warning(first, f"{k} {t.order}-gram(s) have a history that is not listed "
                           f"among the {lower_order}-grams (first at line {first})",
                           "such holes are legal; the history backs off with weight 1")
    del holes, plain
    if bos is None or eos is None:
        missing = " and ".join(w for w, i in ((SENTENCE_START, bos), (SENTENCE_END, eos))
                               if i is None)
        reader.warning(None, f"the 1-grams lack {missing}",
                       "sentence scoring needs <s> as history and </s> as last word")
    for t in model.orders[1:]:
        if len(t) == 0:
            continue
        bad = np.zeros(len(t), bool)
        if bos is not None:
            bad |= t.words[:, -1] == bos
        if eos is not None:
            for j in range(t.order - 1):
                bad |= t.words[:, j] == eos
        if bad.any():
            first = int(t.lines[bad].min())
            reader.warning(first, f"{int(bad.sum())} {t.order}-gram(s) predict <s> or continue "
                           f"after </s> (first at line {first})",
                           "<s> is a history only and </s> ends a sentence")


def _show(text: bytes, limit: int = 40) -> str:
    s = text.decode("utf-8", "replace")
    return s if len(s) <= limit else s[: limit - 3] + "..."


def read_arpa(path: str | os.PathLike, diagnostics: Diagnostics | None = None) -> ArpaModel:
    """Reads an ARPA back-off model (plain text or gzip, detected by its magic bytes).

    The file is streamed in chunks, parsed in worker threads; the n-grams land in
    compact numpy arrays (about 28 bytes per trigram resident: the highest order's
    all-zero back-off array is left untouched). Every problem is reported as
    ``path:line: ...``.

    Args:
      path: the model file.
      diagnostics: where to add problems (errors and warnings). Without one, only
        errors count and they are raised.

    Returns:
      The model; `vocab` lists the 1-gram words in file order.

    Raises:
      ArpaError: carrying every error found (also when `diagnostics` is given, after
        the problems have been added to it).
    """
    path = os.fspath(path)
    reader = _ArpaReader(path)
    model = reader.run()
    problems = sorted(reader.problems, key=lambda p: (p.line is None, p.line or 0))
    errors = [p for p in problems if p.severity == "error"]
    if diagnostics is not None:
        for p in problems:
            if p.severity == "error":
                diagnostics.error(p.path, p.line, p.message, p.hint)
            else:
                diagnostics.warning(p.path, p.line, p.message, p.hint)
    if errors:
        raise ArpaError.from_problems(errors)
    return model


# ---------------------------------------------------------------------------- writing

def write_arpa(model: ArpaModel, path: str | os.PathLike) -> None:
    """Writes `model` in the ARPA text form; gzip-compressed when `path` ends in '.gz'.

    Values are printed with ``repr`` (shortest exact form); back-off weights of 0.0
    are omitted, and the highest order never carries them.

    Raises:
      ArpaError: if a word contains whitespace or is empty, or the highest order
        has a non-zero back-off weight (neither can be written in ARPA).
    """
    path = os.fspath(path)
    for w in model.vocab:
        if not w or _ASCII_WS_RE.search(w):
            raise ArpaError(f"word {w!r} is empty or contains whitespace, which ARPA cannot"
                            " hold", "rename the word", path=path)
    if model.orders and (model.orders[-1].backoff != 0).any():
        raise ArpaError(f"the highest order ({model.max_order}) has back-off weights",
                        "drop them or add a higher order", path=path)
    raw: BinaryIO
    if path.endswith(".gz"):
        raw = gzip.open(path, "wb", compresslevel=6)
    else:
        raw = open(path, "wb")
    with raw, io.TextIOWrapper(raw, encoding="utf-8", newline="\n") as out:
        out.write("\\data\\\n")
        for t in model.orders:
            out.write(f"ngram {t.order}={len(t)}\n")
        vocab = np.array(model.vocab, dtype=object)
        for t in model.orders:
            out.write(f"\n\\{t.order}-grams:\n")
            top = t.order == model.max_order
            step = 1 << 16
            for lo in range(0, len(t), step):
                hi = min(lo + step, len(t))
                words = vocab[t.words[lo:hi]]
                text = [" ".join(r) for r in words.tolist()] if t.order > 1 else words[:, 0]
                lps = map(repr, t.logprob[lo:hi].tolist())
                if top:
                    out.writelines(f"{p}\t{w}\n" for p, w in zip(lps, text))
                else:
                    bos = t.backoff[lo:hi].tolist()
                    out.writelines(f"{p}\t{w}\t{b!r}\n" if b != 0.0 else f"{p}\t{w}\n"
                                   for p, w, b in zip(lps, text, bos))
        out.write("\n\\end\\\n")
