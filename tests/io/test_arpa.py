"""Unit tests of the ARPA reader and writer (netbuild.io.arpa)."""

from __future__ import annotations

import gzip
import pathlib

import numpy as np
import pytest

from netbuild.errors import ArpaError, Diagnostics
from netbuild.io.arpa import ArpaModel, NgramTable, read_arpa, write_arpa

DATA = pathlib.Path(__file__).parent.parent / "data" / "arpa"

GOOD = """\\data\\
ngram 1=4
ngram 2=3

\\1-grams:
-1.0\t</s>
-99\t<s>\t-0.5
-0.5\tcabin\t-0.1
-0.7\tridge

\\2-grams:
-0.2\t<s> cabin
-0.3\tcabin </s>
-0.4\tcabin ridge

\\end\\
"""


def write(tmp_path, text: str, name: str = "lm.arpa") -> str:
    p = tmp_path / name
    p.write_bytes(text.encode("utf-8") if isinstance(text, str) else text)
    return str(p)


def grams(model: ArpaModel, order: int) -> dict[tuple[str, ...], tuple[float, float]]:
    t = model.orders[order - 1]
    return {tuple(model.vocab[i] for i in row): (lp, bo)
            for row, lp, bo in zip(t.words.tolist(), t.logprob.tolist(), t.backoff.tolist())}


def test_reads_fixture_with_hole_and_minus_99():
    d = Diagnostics()
    m = read_arpa(DATA / "holes.arpa", d)
    assert m.counts() == [7, 6, 3]
    assert m.vocab[:3] == ["</s>", "<s>", "the"]
    assert grams(m, 1)[("<s>",)] == (-99.0, -0.5)
    assert grams(m, 1)[("slowly",)] == (-1.5, 0.0)  # absent back-off -> 0.0
    assert grams(m, 3)[("<s>", "cabin", "climbs")] == (-0.3, 0.0)
    assert m.orders[2].lines.tolist() == [24, 25, 26]
    assert [p.severity for p in d.problems] == ["warning"]
    assert d.problems[0].line == 26 and "1 3-gram" in d.problems[0].message


def test_crlf_tabs_and_trailing_spaces():
    m = read_arpa(DATA / "crlf_tabs.arpa")
    assert m.vocab == ["</s>", "<s>", "cabin", "ridge"]
    assert grams(m, 2) == {("<s>", "cabin"): (-0.2, 0.0), ("cabin", "</s>"): (-0.3, 0.0)}


def test_gzip_detected_by_magic_bytes_not_name(tmp_path):
    p = tmp_path / "model.txt"
    p.write_bytes(gzip.compress(GOOD.encode()))
    assert read_arpa(p).counts() == [4, 3]


def test_preamble_text_is_ignored(tmp_path):
    m = read_arpa(write(tmp_path, "made by hand\nfor the ropeway\n\n" + GOOD))
    assert m.orders[1].lines.tolist() == [15, 16, 17]


def test_count_mismatch_message(tmp_path):
    path = write(tmp_path, GOOD.replace("ngram 2=3", "ngram 2=5"))
    with pytest.raises(ArpaError) as info:
        read_arpa(path)
    assert str(info.value) == (f"{path}:3: header promises 5 2-grams but 3 follow; "
                               "fix the count in \\data\\")


@pytest.mark.parametrize("old,new,line,pattern", [
    ("-0.3\tcabin </s>", "-0.3x\tcabin </s>", 13, "malformed log10 probability"),
    ("-0.3\tcabin </s>", "nan\tcabin </s>", 13, "is nan"),
    ("-0.3\tcabin </s>", "-inf\tcabin </s>", 13, "is -inf"),
    ("-0.3\tcabin </s>", "1e999\tcabin </s>", 13, "out of range"),
    ("-0.3\tcabin </s>", "0.3\tcabin </s>", 13, "positive log10 probability"),
    ("-0.3\tcabin </s>", "-0.3\tcabin", 13, "2 fields on a 2-gram line"),
    ("-0.3\tcabin </s>", "-0.3\tcabin </s> ridge x", 13, "5 fields"),
    ("-0.3\tcabin </s>", "-0.3\tcabin </s>\t-0.2", 13, "highest order"),
    ("-0.3\tcabin </s>", "-0.3\tcabin valley", 13, "word 'valley' is not among the 1-grams"),
    ("-0.3\tcabin </s>", "-0.4\tcabin ridge", 14, "duplicate 2-gram 'cabin ridge' .first at line 13"),
    ("-0.7\tridge", "-0.7\tcabin", 9, "duplicate 1-gram 'cabin' .first at line 8"),
    ("-0.5\tcabin\t-0.1", "-0.5\tcabin\t-0.1_0", 8, "malformed log10 back-off"),
    ("\\2-grams:", "\\2-gramz:", 11, "unknown section header"),
    ("\\2-grams:", "\\3-grams:", 11, "declares no such order"),
    ("ngram 2=3", "ngram 2=three", 3, "is not a count line"),
    ("\\end\\\n", "", 15, "ends without \\\\end"),
])
def test_located_errors(tmp_path, old, new, line, pattern):
    assert old in GOOD
    path = write(tmp_path, GOOD.replace(old, new))
    with pytest.raises(ArpaError, match=pattern) as info:
        read_arpa(path)
    first = info.value.problems[0]
    assert (first.path, first.line) == (path, line)
    assert str(first).startswith(f"{path}:{line}: ") and "; " in str(first)


def test_sections_out_of_order(tmp_path):
    text = GOOD.replace("ngram 2=3", "ngram 2=3\nngram 3=1")
    text = text.replace("\\end\\", "\\3-grams:\n-0.1 <s> cabin ridge\n\n\\end\\")
    parts = text.split("\n\\2-grams:")
    body2, rest = parts[1].split("\n\\3-grams:")
    swapped = parts[0] + "\n\\3-grams:" + rest.replace("\\end\\", "") + "\\2-grams:" + body2
    swapped += "\\end\\\n"
    with pytest.raises(ArpaError, match="out of order"):
        read_arpa(write(tmp_path, swapped))


def test_empty_file_and_not_arpa(tmp_path):
    with pytest.raises(ArpaError, match="empty"):
        read_arpa(write(tmp_path, ""))
    with pytest.raises(ArpaError, match="no \\\\data\\\\ section"):
        read_arpa(write(tmp_path, "hello\nworld\n"))


def test_missing_file_is_arpa_error(tmp_path):
    with pytest.raises(ArpaError, match="cannot read"):
        read_arpa(tmp_path / "absent.arpa")


def test_invalid_utf8_reports_byte_offset(tmp_path):
    raw = GOOD.encode().replace(b"ridge\n", b"ridg\xff\n", 1)
    offset = raw.index(b"\xff")
    with pytest.raises(ArpaError, match=f"byte offset {offset}") as info:
        read_arpa(write(tmp_path, raw))
    assert info.value.problems[0].line == 9


def test_diagnostics_collects_all_and_still_raises(tmp_path):
    text = GOOD.replace("-0.7\tridge", "-0.7x\tridge").replace("-0.4\tcabin ridge",
                                                               "-0.4\tcabin")
    path = write(tmp_path, text)
    d = Diagnostics()
    with pytest.raises(ArpaError):
        read_arpa(path, d)
    assert [p.line for p in d.errors][:2] == [9, 14]


def test_sentence_marker_warnings(tmp_path):
    text = GOOD.replace("-0.4\tcabin ridge", "-0.4\tcabin <s>")
    d = Diagnostics()
    read_arpa(write(tmp_path, text), d)
    assert any("predict <s>" in p.message for p in d.warnings)


def test_six_gram_model(tmp_path):
    words = ["</s>", "<s>", "a", "b", "c", "d", "e"]
    lines = ["\\data\\"] + [f"ngram {n}=1" for n in range(2, 7)]
    lines.insert(1, f"ngram 1={len(words)}")
    lines += ["", "\\1-grams:"] + [f"-1.0\t{w}\t-0.1" for w in words]
    for n in range(2, 7):
        seq = " ".join(["<s>"] + words[2:2 + n - 1])
        lines += ["", f"\\{n}-grams:", f"-0.5\t{seq}" + ("\t-0.2" if n < 6 else "")]
    lines += ["", "\\end\\", ""]
    m = read_arpa(write(tmp_path, "\n".join(lines)))
    assert m.counts() == [7, 1, 1, 1, 1, 1] and m.max_order == 6
    assert m.orders[5].words.tolist() == [[1, 2, 3, 4, 5, 6]]


@pytest.mark.parametrize("name", ["out.arpa", "out.arpa.gz"])
def test_write_read_round_trip_exact(tmp_path, name):
    m = read_arpa(DATA / "holes.arpa")
    m.orders[1].logprob[0] = -0.1234567890123456789  # needs 17 digits
    path = tmp_path / name
    write_arpa(m, path)
    assert (path.read_bytes()[:2] == b"\x1f\x8b") == name.endswith(".gz")
    back = read_arpa(path)
    assert back.vocab == m.vocab
    for a, b in zip(m.orders, back.orders):
        np.testing.assert_array_equal(a.words, b.words)
        assert a.logprob.tolist() == b.logprob.tolist()
        assert a.backoff.tolist() == b.backoff.tolist()


def test_write_rejects_unwritable_models(tmp_path):
    t1 = NgramTable(1, np.array([[0], [1]], np.int32), np.array([-1.0, -1.0]),
                    np.array([0.0, -0.5]), np.zeros(2, np.int64))
    with pytest.raises(ArpaError, match="highest order"):
        write_arpa(ArpaModel(["a", "b"], [t1]), tmp_path / "x.arpa")
    t1.backoff[:] = 0
    with pytest.raises(ArpaError, match="whitespace"):
        write_arpa(ArpaModel(["a", "b c"], [t1]), tmp_path / "x.arpa")


def test_large_file_crosses_chunks(tmp_path, monkeypatch):
    import netbuild.io.arpa as arpa

    monkeypatch.setattr(arpa, "_CHUNK", 256)  # force many chunk borders
    words = [f"w{i}" for i in range(300)]
    body = [f"-{1 + i / 1000:.4f}\t{w}\t-0.{i % 9 + 1}" for i, w in enumerate(words)]
    big = [f"-0.{i % 9 + 1}5\t{words[i]} {words[(i * 7) % 300]}" for i in range(300)]
    text = "\n".join(["\\data\\", "ngram 1=300", "ngram 2=300", "", "\\1-grams:", *body, "",
                      "\\2-grams:", *big, "", "\\end\\", ""])
    path = write(tmp_path, text)
    m = read_arpa(path)
    assert m.counts() == [300, 300]
    assert m.orders[1].lines.tolist() == list(range(308, 608))
    assert grams(m, 2)[("w10", "w70")] == (-0.25, 0.0)
    bad = text.replace("-0.85\tw250 w250\n", "-0.85\tw250 w250 w1\n")
    assert bad != text
    with pytest.raises(ArpaError) as info:
        read_arpa(write(tmp_path, bad))
    assert info.value.problems[0].line == 308 + 250


def test_control_bytes_stay_inside_words(tmp_path):
    # bytes.split() (the line-by-line reader's rule) splits on ASCII whitespace only, so
    # a control byte such as \x1f is part of a word in both readers.
    text = ("\\data\\\nngram 1=3\nngram 2=1\n\n\\1-grams:\n-1.0\t</s>\n-1.0\t<s>\t-0.5\n"
            "-0.5\ta\x1fb\n\n\\2-grams:\n-0.2\t<s> a\x1fb\n\n\\end\\\n")
    m = read_arpa(write(tmp_path, text))
    assert m.vocab == ["</s>", "<s>", "a\x1fb"]
    assert m.orders[1].words.tolist() == [[1, 2]]


def test_highest_order_backoff_is_zero_and_writable(tmp_path):
    m = read_arpa(write(tmp_path, GOOD))
    top = m.orders[-1]
    assert top.backoff.tolist() == [0.0] * len(top)
    top.backoff[:] = 0.0  # an ordinary array, not a read-only view


def test_many_pieces_keep_file_order_and_report_all_errors(tmp_path, monkeypatch):
    import netbuild.io.arpa as arpa

    monkeypatch.setattr(arpa, "_CHUNK", 64)  # pieces go through the worker threads
    words = [f"w{i}" for i in range(40)]
    uni = [f"-1.5\t{w}\t-0.25" for w in words]
    bi = [f"-0.{i % 9 + 1}\t{words[i]} {words[(i * 3) % 40]}" for i in range(40)]
    lines = ["\\data\\", "ngram 1=40", "ngram 2=40", "", "\\1-grams:", *uni, "",
             "\\2-grams:", *bi, "", "\\end\\", ""]
    m = read_arpa(write(tmp_path, "\n".join(lines)))
    assert m.orders[1].lines.tolist() == list(range(48, 88))
    assert m.orders[1].words[:, 1].tolist() == [(i * 3) % 40 for i in range(40)]
    bad = list(lines)
    bad[47 + 5] = "-0.5\tw5 nosuch"
    bad[47 + 30] = "oops\tw1 w2"
    with pytest.raises(ArpaError) as info:
        read_arpa(write(tmp_path, "\n".join(bad)))
    assert [p.line for p in info.value.problems] == [53, 78]


def test_reader_stops_cleanly_after_end_with_chunks_pending(tmp_path, monkeypatch):
    import threading

    import netbuild.io.arpa as arpa

    monkeypatch.setattr(arpa, "_CHUNK", 32)  # many chunks still queued after \end\
    text = GOOD + "".join(f"trailing text {i}\n" for i in range(200))
    before = threading.active_count()
    m = read_arpa(write(tmp_path, text))
    assert m.counts() == [4, 3]
    assert threading.active_count() == before  # the read-ahead thread has ended
