"""Hypothesis properties of the ARPA reader/writer: round trips and located corruptions."""

from __future__ import annotations

import numpy as np
from hypothesis import given
from hypothesis import strategies as st

from netbuild.errors import ArpaError
from netbuild.io.arpa import ArpaModel, NgramTable, read_arpa, write_arpa

WORD = st.text(alphabet="abcdéxyz_'-0123", min_size=1, max_size=12)
LOGP = st.one_of(st.floats(-99.0, 0.0, allow_nan=False), st.sampled_from([-99.0, 0.0, -1.5]))
BACKOFF = st.one_of(st.just(0.0), st.floats(-5.0, 5.0, allow_nan=False))


@st.composite
def models(draw):
    vocab = ["</s>", "<s>"] + draw(st.lists(WORD.filter(lambda w: w not in ("<s>", "</s>")),
                                            min_size=1, max_size=8, unique=True))
    order = draw(st.integers(1, 4))
    v = len(vocab)
    tables = []
    for n in range(1, order + 1):
        if n == 1:
            rows = [(i,) for i in range(v)]
        else:
            rows = draw(st.lists(st.tuples(*[st.integers(0, v - 1)] * n), max_size=12,
                                 unique=True))
        k = len(rows)
        lp = draw(st.lists(LOGP, min_size=k, max_size=k))
        bo = draw(st.lists(BACKOFF, min_size=k, max_size=k)) if n < order else [0.0] * k
        tables.append(NgramTable(n, np.array(rows, np.int32).reshape(k, n), np.array(lp, float),
                                 np.array(bo, float), np.zeros(k, np.int64)))
    return ArpaModel(vocab, tables)


@given(models(), st.booleans())
def test_round_trip_is_exact(tmp_path_factory, model, gz):
    path = tmp_path_factory.mktemp("rt") / ("m.arpa.gz" if gz else "m.arpa")
    write_arpa(model, path)
    back = read_arpa(path)
    assert back.vocab == model.vocab
    for a, b in zip(model.orders, back.orders, strict=True):
        assert a.words.tolist() == b.words.tolist()
        assert a.logprob.tolist() == b.logprob.tolist()
        assert a.backoff.tolist() == b.backoff.tolist()


BASE = """\\data\\
ngram 1=5
ngram 2=4
ngram 3=2

\\1-grams:
-1.0\t</s>
-99\t<s>\t-0.5
-0.5\tcabin\t-0.1
-0.7\tridge\t-0.2
-0.9\tvalley

\\2-grams:
-0.2\t<s> cabin\t-0.3
-0.3\tcabin ridge\t-0.1
-0.4\tridge </s>
-0.5\tcabin valley

\\3-grams:
-0.1\t<s> cabin ridge
-0.2\tcabin ridge </s>

\\end\\
"""
LINES = BASE.split("\n")
DATA_LINES = [i for i, t in enumerate(LINES) if t[:1] == "-"]
HIGHER_LINES = [i for i in DATA_LINES if len(LINES[i].split("\t")[1].split()) > 1]
KINDS = ["number", "fields", "duplicate", "end", "count", "header", "word"]


@given(st.sampled_from(KINDS), st.sampled_from(DATA_LINES), st.integers(0, 2))
def test_single_corruption_is_located(tmp_path_factory, kind, i, which):
    lines = list(LINES)
    f = lines[i].split("\t")
    if kind == "number":
        f[0] = ["-0.x", "nan", "--1"][which]
        expected = i + 1
    elif kind == "fields":
        f = f[:1] if which else f + ["-0.1", "extra"]
        expected = i + 1
    elif kind == "duplicate":
        j = i + 1 if i + 1 in DATA_LINES else i - 1  # same section; the count stays right
        lines[j] = lines[i]
        expected = max(i, j) + 1
    elif kind == "end":
        lines = lines[: lines.index("\\end\\")]
        expected = len(lines) - 1  # the last line of the file (the text ends with '\n')
    elif kind == "count":
        n = [1, 2, 3][which]
        lines[n] = f"ngram {n}={[5, 4, 2][which] + 1}"
        expected = n + 1
    elif kind == "header":
        j = lines.index(["\\1-grams:", "\\2-grams:", "\\3-grams:"][which])
        lines[j] = lines[j].replace("grams", "gramz")
        expected = j + 1
    else:  # a word absent from the 1-grams, in a 2-gram or 3-gram line
        if len(f[1].split()) == 1:
            i = HIGHER_LINES[i % len(HIGHER_LINES)]
            f = lines[i].split("\t")
        words = f[1].split()
        words[which % len(words)] = "funicular"
        f[1] = " ".join(words)
        expected = i + 1
    if kind in ("number", "fields", "word"):
        lines[i] = "\t".join(f)
    path = tmp_path_factory.mktemp("bad") / "m.arpa"
    path.write_text("\n".join(lines), encoding="utf-8")
    try:
        read_arpa(path)
    except ArpaError as err:
        assert err.problems[0].line == expected, (kind, str(err))
        assert str(err.problems[0]).startswith(f"{path}:{expected}: ")
    else:
        raise AssertionError(f"{kind} corruption at line {i + 1} was not reported")


# Decimal tokens as ARPA writers print them, and the odd ones the fast parser must hand
# on to float(): exponents, more than 15 digits, lone signs and dots.
DECIMAL = st.one_of(
    st.builds(lambda v, d: f"{v:.{d}f}", st.floats(-1e6, 1e6, allow_nan=False),
              st.integers(0, 15)),
    st.floats(-1e6, 1e6, allow_nan=False).map(repr),
    st.from_regex(r"\A[+-]?[0-9]{0,17}\.?[0-9]{0,17}\Z").filter(
        lambda s: any(c.isdigit() for c in s)),
    st.sampled_from(["-0", "-0.0", "+.5", "5.", "-99", "1e5", "-1.5E-3", "0.000000000000001"]),
)


@given(st.lists(DECIMAL, min_size=1, max_size=40))
def test_vectorised_numbers_equal_float(tokens):
    # reference: Python's float() (correctly rounded decimal-to-double conversion)
    import netbuild.io.arpa as arpa

    seg = (" ".join(tokens) + "\n").encode()
    padded = seg + b"\0" * 40
    starts, pos = [], 0
    for t in tokens:
        starts.append(pos)
        pos += len(t) + 1
    starts = np.array(starts, np.int64)
    lens = np.array([len(t) for t in tokens], np.int64)
    values = arpa._parse_numbers(padded, starts, lens, seg)
    expected = [float(t) for t in tokens]
    assert values is not None
    assert values.tolist() == expected
    assert np.signbit(values).tolist() == [np.signbit(x) for x in expected]


SEPARATORS = st.sampled_from(["\t", " ", "  ", " \t", "\t\t"])


@given(models(), st.data())
def test_any_whitespace_layout_reads_the_same(tmp_path_factory, model, data):
    # Each line of a written model laid out anew: other separators, leading or trailing
    # blanks, CR before LF, blank lines. Pieces in the plain layout take the one-pass
    # tokenizer, the others the general one; both must give the same records.
    root = tmp_path_factory.mktemp("layout")
    write_arpa(model, root / "plain.arpa")
    lines = []
    for line in (root / "plain.arpa").read_text(encoding="utf-8").split("\n"):
        fields = line.split()
        if len(fields) < 2 or line.startswith("ngram"):
            lines.append(line)
            continue
        sep = data.draw(st.lists(SEPARATORS, min_size=len(fields) - 1,
                                 max_size=len(fields) - 1))
        text = fields[0] + "".join(s + f for s, f in zip(sep, fields[1:]))
        text = data.draw(st.sampled_from(["", " ", "\t"])) + text
        text += data.draw(st.sampled_from(["", " ", "\r"]))
        if data.draw(st.booleans()):
            text += "\n"  # a blank line after this one
        lines.append(text)
    (root / "laid_out.arpa").write_text("\n".join(lines), encoding="utf-8")
    a, b = read_arpa(root / "plain.arpa"), read_arpa(root / "laid_out.arpa")
    assert a.vocab == b.vocab
    for x, y in zip(a.orders, b.orders, strict=True):
        assert x.words.tolist() == y.words.tolist()
        assert x.logprob.tobytes() == y.logprob.tobytes()
        assert x.backoff.tobytes() == y.backoff.tobytes()


def test_backslashes_inside_words_are_no_headers(tmp_path):
    # Only a backslash at the start of a line begins a section header.
    text = ("\\data\\\nngram 1=4\nngram 2=3\n\n\\1-grams:\n-1.0\t</s>\n-99\t<s>\t-0.5\n"
            "-0.5\tsum\\mit\t-0.1\n-0.7\tri\\dge\n\n\\2-grams:\n-0.2\t<s> sum\\mit\n"
            "-0.3\tsum\\mit ri\\dge\n-0.4\tri\\dge </s>\n\n\\end\\\n")
    path = tmp_path / "m.arpa"
    path.write_text(text, encoding="utf-8")
    m = read_arpa(path)
    assert m.vocab == ["</s>", "<s>", "sum\\mit", "ri\\dge"]
    assert m.orders[1].words.tolist() == [[1, 2], [2, 3], [3, 0]]
    assert m.orders[1].lines.tolist() == [12, 13, 14]


WORDS_IN_LINE = st.sampled_from(["cabin", "ridge", "é"])


@given(st.integers(1, 3), st.booleans(), st.integers(0, 2), st.booleans(), st.data())
def test_one_pass_tokenizer_agrees_with_the_general_one(order, top, blank_end, plain, data):
    # reference: the general tokenizer (whitespace runs as bytes.split() sees them)
    import netbuild.io.arpa as arpa

    seps = st.sampled_from(["\t", " "]) if plain else SEPARATORS
    ends = st.just("") if plain else st.sampled_from(["", " ", "\r", "\n"])
    text = ""
    for _ in range(data.draw(st.integers(1, 12))):
        # mostly lines of the right length; now and then one word too many or too few
        n = order + data.draw(st.sampled_from([0, 0, 0, 0, 0, 0, 1, -1]))
        words = data.draw(st.lists(WORDS_IN_LINE, min_size=max(n, 1), max_size=max(n, 1)))
        fields = [data.draw(st.sampled_from(["-0.5", "-1.25", "-99"])), *words]
        if not top and data.draw(st.booleans()):
            fields.append("-0.1")
        sep = data.draw(st.lists(seps, min_size=len(fields) - 1, max_size=len(fields) - 1))
        text += fields[0] + "".join(s + f for s, f in zip(sep, fields[1:]))
        text += data.draw(ends) + "\n"
    body = np.frombuffer((text + "\n" * blank_end).encode(), np.uint8)
    general = arpa._tokens(body, order, top)
    fast = arpa._single_separated(body, order, top)
    if fast is None:
        assert not plain or general is None
    else:
        assert general is not None
        for x, y in zip(fast, general, strict=True):
            assert np.asarray(x).tolist() == np.asarray(y).tolist()
