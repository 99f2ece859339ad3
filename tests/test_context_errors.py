"""Bad context maps through the command line: a located error and exit code 1.

Each case takes the triphone map of tests/data/full/, breaks one line, and runs both
``netbuild check --project P`` and ``netbuild build --project P --out D``. Both must
exit with 1 (an input error; netbuild/cli.py: 0 ok, 1 input or stage error),
print ``MAP:LINE: what is wrong; how to fix it`` for the broken line, print no
traceback, and leave no output directory behind.
"""

from __future__ import annotations

import re
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

from netbuild.cli import cli

DATA = Path(__file__).resolve().parent / "data" / "full"
GOOD = (DATA / "triphone.ctx").read_text(encoding="utf-8").splitlines()


def _line_of(prefix: str) -> int:
    """1-based number of the first line of the good map starting with `prefix`."""
    return next(i for i, line in enumerate(GOOD, start=1) if line.startswith(prefix))


def _replace(prefix: str, new: str | None) -> tuple[list[str], int]:
    """The good map with the line starting with `prefix` replaced (None: deleted)."""
    n = _line_of(prefix)
    lines = list(GOOD)
    if new is None:
        del lines[n - 1]
    else:
        lines[n - 1] = new
    return lines, n


def _insert_after(prefix: str, new: str) -> tuple[list[str], int]:
    n = _line_of(prefix)
    lines = list(GOOD)
    lines.insert(n, new)
    return lines, n + 1


# (case id, map lines, line expected in the message (None: any), words in the message)
def _cases():
    uncovered_within, _ = _replace("rule * i *", None)  # "t i n" in "ten" has no model
    uncovered_cross, _ = _replace("rule * o *", None)  # "n o n": "no" before "no"
    return [
        ("unknown phone", *_replace("rule * i *", "rule * x * -> i_any"), ["'x'"]),
        ("unknown class", *_replace("rule @vowel t *", "rule @vowl t * -> t_vowel"),
         ["vowl", "vowel"]),
        ("unknown model", *_replace("rule * i *", "rule * i * -> i_some"), ["i_some"]),
        ("probabilities do not sum to one",
         *_replace("model t_other", "model t_other 3:0.2:0.7"), ["0.2", "0.7"]),
        ("self-loop probability one",
         *_replace("model t_other", "model t_other 3:1.0:0.0"), ["1.0"]),
        ("negative probability",
         *_replace("model t_other", "model t_other 3:-0.2:1.2"), ["-0.2"]),
        ("not a number", *_replace("model t_other", "model t_other 3:low:0.8"), ["low"]),
        ("negative class", *_replace("model t_other", "model t_other -3:0.2:0.8"),
         ["-3"]),
        ("model without states", *_replace("model t_other", "model t_other"),
         ["t_other"]),
        ("duplicate model", *_insert_after("model t_other", "model t_other 3:0.5:0.5"),
         ["t_other"]),
        ("too few widths", *_replace("widths", "widths 1"), ["widths"]),
        ("wrong token count", *_replace("rule * e *", "rule * e -> e_any"), ["token"]),
        ("no arrow", *_replace("rule * e *", "rule * e * e_any"), []),
        ("unknown directive", *_replace("model t_other", "modle t_other 3:0.2:0.8"),
         ["modle"]),
        ("uncovered context within a word", uncovered_within, None, ["ten"]),
        ("uncovered context across words", uncovered_cross, None, ["no"]),
    ]


CASES = _cases()


def _project(tmp_path: Path, lines: list[str]) -> tuple[Path, Path]:
    cmap = tmp_path / "broken.ctx"
    cmap.write_text("\n".join(lines) + "\n", encoding="utf-8")
    project = tmp_path / "project.toml"
    project.write_text(textwrap.dedent(f"""\
        [inputs]
        phones = "{DATA / 'inventory.txt'}"
        lexicon = "{DATA / 'lexicon.txt'}"
        lm = "{DATA / 'bigram.arpa'}"
        context = "{cmap}"

        [lexicon]
        probabilities = true
        silence_probability = 0.3

        [build]
        determinize_max_memory = "1GiB"
        determinize_timeout = 120
        """), encoding="utf-8")
    return project, cmap


def _assert_located(text: str, cmap: Path, line: int | None, words: list[str]) -> None:
    assert "Traceback" not in text
    where = re.escape(str(cmap)) + (rf":{line}:" if line is not None else r":\d+:")
    found = [ln for ln in text.splitlines() if re.search(where + r" \S", ln)]
    assert found, f"no located error {where!r} in:\n{text}"
    # the message says what is wrong and how to fix it, separated by "; "
    assert any("; " in ln for ln in found), found
    for w in words:
        assert any(w in ln for ln in found), (w, found)


@pytest.mark.parametrize("case,lines,line,words", CASES, ids=[c[0] for c in CASES])
def test_bad_context_map_check(runner, tmp_path, case, lines, line, words):
    project, cmap = _project(tmp_path, lines)
    result = runner.invoke(cli, ["check", "--project", str(project)])
    assert result.exit_code == 1, (result.exit_code, result.stdout, result.stderr)
    assert not isinstance(result.exception, Exception) or isinstance(result.exception,
                                                                     SystemExit)
    _assert_located(result.stdout + result.stderr, cmap, line, words)


@pytest.mark.parametrize("case,lines,line,words", CASES, ids=[c[0] for c in CASES])
def test_bad_context_map_build(runner, tmp_path, case, lines, line, words):
    project, cmap = _project(tmp_path, lines)
    out = tmp_path / "out"
    result = runner.invoke(cli, ["build", "--project", str(project), "--out", str(out)])
    assert result.exit_code == 1, (result.exit_code, result.stdout, result.stderr)
    assert isinstance(result.exception, (SystemExit, type(None)))
    _assert_located(result.stdout + result.stderr, cmap, line, words)
    assert not out.exists()


def test_good_context_map_checks_clean(runner, tmp_path):
    """The unbroken map passes `check` (so the cases above fail for their one line)."""
    project, _ = _project(tmp_path, GOOD)
    result = runner.invoke(cli, ["check", "--project", str(project)])
    assert result.exit_code == 0, (result.stdout, result.stderr)


def test_bad_context_map_in_a_real_process(tmp_path):
    """The console entry point itself: exit status 1 and no traceback on stderr."""
    lines, n = _replace("model t_other", "model t_other 3:0.2:0.7")
    project, cmap = _project(tmp_path, lines)
    proc = subprocess.run([sys.executable, "-m", "netbuild", "build", "--project",
                           str(project), "--out", str(tmp_path / "out")],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 1, proc.stderr
    _assert_located(proc.stdout + proc.stderr, cmap, n, [])


def test_uncovered_cross_word_context_names_the_word_pair(runner, tmp_path):
    """'n o n' occurs only across words ("no" or "know" before "no", "know" or "note"),
    so the error names a pair of words, not a single one."""
    lines, _ = _replace("rule * o *", None)
    project, cmap = _project(tmp_path, lines)
    result = runner.invoke(cli, ["check", "--project", str(project)])
    assert result.exit_code == 1
    found = [ln for ln in result.stdout.splitlines()
             if ln.startswith(f"{cmap}:") and "no model" in ln]
    assert found, result.stdout
    quoted = re.findall(r"'(no|know|note)'", found[0])
    assert len(quoted) >= 2, found[0]
