"""The project file: which inputs to compile and with which settings.

- `Project`: the inputs (absolute paths) and the `BuildOptions`.
- `read_project(path, diagnostics=None)`: reads and validates a project file.
- `apply_overrides(project, **flags)`: returns a copy with command-line settings applied.
- `parse_size(text)`: parses a byte size such as "8GiB", "300MiB" or "1.5GB".

Layout
------
A project file is TOML (UTF-8). Every section and key is optional except that a
lexicon and a language model must be named, here or on the command line.
Unknown sections and keys are errors (with the allowed names and the nearest one).
Relative paths are taken relative to the directory holding the project file::

    [inputs]
    lexicon = "words.lex"        # pronunciation lexicon (string path)
    lm = "model.arpa"            # ARPA back-off language model, plain or .gz
    phones = "inventory.txt"        # phone inventory; when absent the phones are
                                 # taken from the lexicon
    context = "context.txt"      # context map; when given the full graph (H∘C∘L∘G
                                 # over emission classes) is built, else L∘G

    [lexicon]
    layout = "plain"             # "plain" or "cmudict"
    probabilities = false        # the lexicon has a probability column
    keep_stress = true           # cmudict layout: keep stress digits on vowels
    rescale = true               # each word's most likely pronunciation costs 0
    silence_probability = 0.5    # optional silence between words; 0 <= p < 1, 0 disables

    [grammar]
    oov_policy = "drop"          # model words missing from the lexicon:
                                 # "drop" them, map them to "<unk>", or "fail"

    [build]
    push_weights = true          # log-semiring weight pushing of the word-level graph
    fst_type = "vector"          # "vector" or "const" for the written graph
    checks = true                # per-stage checks (the command line's --fast turns them off)
    determinize_max_memory = "8GiB"  # a size string, or an integer number of bytes
    determinize_timeout = 1800   # seconds (integer or float, > 0)
    max_memory = "16GiB"         # stop before a stage estimated to need more (size);
                                 # also caps determinize_max_memory; 0 (default): no limit
    final_optimize = true        # full graph: determinize and minimize H∘C∘L∘G
    weight_quantum = 1e-4        # full graph: weights this close count as equal when
                                 # minimizing (>= 0; 0: bit for bit)
    word_graph = "tree"          # "tree": det(L∘G) built directly; "compose": by OpenFst

    [hmm]
    transition_scale = 1.0       # full graph: scales self-loop and exit costs (>= 0)

Size strings are a number (integer or decimal) followed by an optional unit:
B, kB/KB, MB, GB, TB (powers of 1000) or KiB, MiB, GiB, TiB (powers of 1024);
units are case-sensitive apart from the k of kB.

Command-line flags override the file: each setting has a flag with the key's
name in kebab case (``--oov-policy``, ``--determinize-max-memory``, ...); the
inputs are ``--lexicon``, ``--lm``, ``--phones`` and ``--context`` (relative to the current
directory). `apply_overrides` takes the same names in snake case.
"""

from __future__ import annotations

import dataclasses
import difflib
import math
import re
import tomllib
from pathlib import Path
from typing import Any

from .errors import Diagnostics, ProjectError
from .options import BuildOptions

_SIZE_RE = re.compile(r"^\s*([0-9]+(?:\.[0-9]*)?|\.[0-9]+)\s*([A-Za-z]*)\s*$")
_SIZE_UNITS = {
    "": 1, "B": 1,
    "kB": 1000, "KB": 1000, "MB": 1000**2, "GB": 1000**3, "TB": 1000**4,
    "KiB": 1024, "MiB": 1024**2, "GiB": 1024**3, "TiB": 1024**4,
}


def parse_size(text: str | int) -> int:
    """Returns the number of bytes a size such as "8GiB", "300MiB" or "1.5GB" stands for.

    Args:
      text: a size string (number plus optional unit, see the module docstring) or
        a non-negative integer number of bytes.

    Returns:
      The size in bytes, rounded down to an integer.

    Raises:
      ValueError: the text is not a size; the message lists the units.

    Examples:
      >>> parse_size("8GiB")
      8589934592
      >>> parse_size("1.5GB")
      1500000000
      >>> parse_size(4096)
      4096
    """
    if isinstance(text, bool):
        raise ValueError(f"{text!r} is not a size")
    if isinstance(text, int):
        if text < 0:
            raise ValueError(f"size {text} is negative; give a number of bytes >= 0")
        return text
    m = _SIZE_RE.match(str(text))
    if not m or m.group(2) not in _SIZE_UNITS:
        units = ", ".join(u for u in _SIZE_UNITS if u)
        raise ValueError(f"{text!r} is not a size; write a number and one of the units "
                         f"{units} (for example \"8GiB\" or \"300MiB\")")
    return int(float(m.group(1)) * _SIZE_UNITS[m.group(2)])


@dataclasses.dataclass(frozen=True)
class Project:
    """What to compile: absolute input paths (phones may be absent) and the settings.

    `path` is the project file, or None when everything came from the command line.
    """

    path: Path | None
    lexicon: Path | None
    lm: Path | None
    phones: Path | None
    options: BuildOptions = BuildOptions()
    context: Path | None = None  # context map; when given the full graph is built


# --- the schema --------------------------------------------------------------
# (section, key) -> (kind, choices); kinds: path, bool, str, prob, size, seconds, scale.
_SCHEMA: dict[str, dict[str, tuple[str, tuple[str, ...]]]] = {
    "inputs": {"lexicon": ("path", ()), "lm": ("path", ()), "phones": ("path", ()),
               "context": ("path", ())},
    "lexicon": {
        "layout": ("str", ("plain", "cmudict")),
        "probabilities": ("bool", ()),
        "keep_stress": ("bool", ()),
        "rescale": ("bool", ()),
        "silence_probability": ("prob", ()),
    },
    "grammar": {"oov_policy": ("str", ("drop", "unk", "fail"))},
    "build": {
        "push_weights": ("bool", ()),
        "fst_type": ("str", ("vector", "const")),
        "checks": ("bool", ()),
        "determinize_max_memory": ("size", ()),
        "determinize_timeout": ("seconds", ()),
        "max_memory": ("size", ()),
        "final_optimize": ("bool", ()),
        "weight_quantum": ("scale", ()),
        "word_graph": ("str", ("tree", "compose")),
    },
    "hmm": {"transition_scale": ("scale", ())},
}

# flag / apply_overrides name -> (section, key); the key names are unique across sections.
SETTINGS: dict[str, tuple[str, str]] = {
    key: (section, key) for section, keys in _SCHEMA.items() for key in keys
}


def _nearest(word: str, allowed: list[str]) -> str:
    close = difflib.get_close_matches(word, allowed, n=1, cutoff=0.5)
    return f"did you mean '{close[0]}'? " if close else ""


class _Locator:
    """Finds the line of a section header or a key by scanning the TOML text.

    tomllib returns no positions; a line scan is enough for the flat layout above.
    """

    _HEADER = re.compile(r"^\s*\[\s*([^\]\s]+)\s*\]")
    _KEY = re.compile(r"^\s*(\"[^\"]*\"|'[^']*'|[A-Za-z0-9_.-]+)\s*=")

    def __init__(self, text: str) -> None:
        self.sections: dict[str, int] = {}
        self.keys: dict[tuple[str, str], int] = {}
        section = ""
        for lineno, line in enumerate(text.splitlines(), 1):
            if m := self._HEADER.match(line):
                section = m.group(1).strip("\"'")
                self.sections.setdefault(section, lineno)
            elif m := self._KEY.match(line):
                key = m.group(1).strip("\"'")
                if "." in key and not section:
                    head, _, key = key.partition(".")
                    self.keys.setdefault((head, key), lineno)
                else:
                    self.keys.setdefault((section, key), lineno)

    def section(self, name: str) -> int | None:
        return self.sections.get(name) or min(
            (n for (s, _), n in self.keys.items() if s == name), default=None)

    def key(self, section: str, key: str) -> int | None:
        return (self.keys.get((section, key)) or self.section(section)
                or self.keys.get(("", section)))  # inline table: `build = {...}`


def _check_value(kind: str, choices: tuple[str, ...], value: Any) -> tuple[Any, str | None]:
    """Returns (converted value, None) or (None, 'what is wrong; how to fix it')."""
    if kind == "path":
        if isinstance(value, str) and value:
            return value, None
        return None, f"must be a file path in quotes, not {value!r}; write e.g. \"words.lex\""
    if kind == "bool":
        if isinstance(value, bool):
            return value, None
        return None, f"must be true or false, not {value!r}; write true or false without quotes"
    if kind == "str":
        if isinstance(value, str) and value in choices:
            return value, None
        allowed = ", ".join(f'"{c}"' for c in choices)
        near = _nearest(str(value), list(choices)) if isinstance(value, str) else ""
        return None, f"{value!r} is not allowed; {near}use one of {allowed}"
    if kind == "prob":
        if isinstance(value, (int, float)) and not isinstance(value, bool) \
                and 0.0 <= value < 1.0:
            return float(value), None
        return None, (f"must be a number with 0 <= p < 1, not {value!r}; "
                      "write e.g. 0.5 (0 disables)")
    if kind == "size":
        try:
            return parse_size(value), None
        except ValueError as err:
            return None, str(err)
    if kind == "scale":
        if isinstance(value, (int, float)) and not isinstance(value, bool) \
                and value >= 0 and math.isfinite(value):
            return float(value), None
        return None, f"must be a number >= 0, not {value!r}; write e.g. 1.0"
    if kind == "seconds":
        if isinstance(value, (int, float)) and not isinstance(value, bool) \
                and value > 0 and math.isfinite(value):
            return float(value), None
        return None, f"must be a positive number of seconds, not {value!r}; write e.g. 1800"
    raise AssertionError(kind)


def _resolve(base: Path, value: str) -> Path:
    p = Path(value).expanduser()
    return (p if p.is_absolute() else (base / p)).resolve()


def read_project(path: str | Path, diagnostics: Diagnostics | None = None) -> Project:
    """Reads and validates a project file (layout in the module docstring).

    Every problem (unknown sections or keys, wrong types or values, input files that
    do not exist) is collected and raised together.

    Args:
      path: the TOML project file.
      diagnostics: where to collect problems; a new one when None.

    Returns:
      A `Project` with absolute input paths.

    Raises:
      ProjectError: the file is missing, is not valid TOML, or has bad entries;
        each problem reads ``path:line: what is wrong; how to fix it``.
    """
    diag = diagnostics if diagnostics is not None else Diagnostics()
    path = Path(path)
    where = str(path)
    try:
        text = path.read_bytes().decode("utf-8")
    except FileNotFoundError:
        raise ProjectError("project file does not exist",
                           "check the path given to --project", path=where) from None
    except (OSError, UnicodeDecodeError) as err:
        raise ProjectError(f"cannot read the project file ({err})",
                           "give a readable UTF-8 TOML file", path=where) from err
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as err:
        msg = str(err)
        m = re.search(r"\(at line (\d+), column (\d+)\)", msg)
        line = int(m.group(1)) if m else None
        what = re.sub(r"\s*\(at (line \d+, column \d+|end of document)\)", "", msg)
        if m:
            what += f" at column {m.group(2)}"
        raise ProjectError(f"not valid TOML: {what}",
                           "fix the syntax (see https://toml.io)", path=where,
                           line=line) from err
    loc = _Locator(text)
    base = path.resolve().parent
    values: dict[str, Any] = {}
    sections = list(_SCHEMA)
    for section, table in data.items():
        if section not in _SCHEMA:
            diag.error(where, loc.section(section), f"unknown section [{section}]",
                       f"{_nearest(section, sections)}allowed sections are "
                       + ", ".join(f"[{s}]" for s in sections))
            continue
        if not isinstance(table, dict):
            diag.error(where, loc.key("", section), f"'{section}' must be a section",
                       f"write [{section}] on its own line and the keys below it")
            continue
        allowed = list(_SCHEMA[section])
        for key, value in table.items():
            line = loc.key(section, key)
            if key not in _SCHEMA[section]:
                diag.error(where, line, f"unknown key '{key}' in [{section}]",
                           f"{_nearest(key, allowed)}allowed keys are " + ", ".join(allowed))
                continue
            kind, choices = _SCHEMA[section][key]
            converted, problem = _check_value(kind, choices, value)
            if problem is not None:
                what, _, fix = problem.partition("; ")
                diag.error(where, line, f"[{section}] {key} {what}", fix)
                continue
            if kind == "path":
                converted = _resolve(base, converted)
                if not converted.is_file():
                    state = "is not a file" if converted.exists() else "does not exist"
                    diag.error(where, line,
                               f"[{section}] {key} = \"{value}\": {converted} {state}",
                               "fix the path (relative paths start at the project file's "
                               "directory)")
                    continue
            values[key] = converted
    diag.raise_if_errors(ProjectError, where)
    project = Project(path=path.resolve(), lexicon=None, lm=None, phones=None)
    return _with_values(project, values)


def _with_values(project: Project, values: dict[str, Any]) -> Project:
    o = project.options
    lex = {"layout": "layout", "probabilities": "has_probabilities",
           "keep_stress": "keep_stress", "rescale": "rescale_probabilities",
           "silence_probability": "silence_probability"}
    build = {"push_weights", "fst_type", "checks", "determinize_max_memory",
             "determinize_timeout", "final_optimize", "transition_scale", "max_memory",
             "word_graph", "weight_quantum"}
    lex_opts = dataclasses.replace(
        o.lexicon, **{lex[k]: v for k, v in values.items() if k in lex})
    gram_opts = dataclasses.replace(
        o.grammar, **{k: v for k, v in values.items() if k == "oov_policy"})
    opts = dataclasses.replace(o, lexicon=lex_opts, grammar=gram_opts,
                               **{k: v for k, v in values.items() if k in build})
    inputs = {k: v for k, v in values.items() if k in ("lexicon", "lm", "phones", "context")}
    return dataclasses.replace(project, options=opts, **inputs)


def apply_overrides(project: Project | None, **flags: Any) -> Project:
    """Returns a copy of `project` with the given command-line settings applied.

    Args:
      project: the project read from a file, or None to start from the defaults.
      **flags: the settings by snake-case name (see `SETTINGS`; plus ``lexicon``,
        ``lm``, ``phones``); None means "not given" and keeps the current value.
        Paths are relative to the current directory; sizes may be strings.

    Returns:
      A new `Project` (inputs as absolute paths).

    Raises:
      ProjectError: an unknown setting, a bad value, an input file that does not
        exist, or no lexicon or language model at all.
    """
    diag = Diagnostics()
    project = project or Project(path=None, lexicon=None, lm=None, phones=None)
    values: dict[str, Any] = {}
    for name, value in flags.items():
        if value is None:
            continue
        flag = "--" + name.replace("_", "-")
        if name not in SETTINGS:
            diag.error(flag, None, f"unknown setting '{name}'",
                       f"{_nearest(name, list(SETTINGS))}known settings are "
                       + ", ".join(SETTINGS))
            continue
        section, key = SETTINGS[name]
        kind, choices = _SCHEMA[section][key]
        if kind == "path":
            value = str(value)
        converted, problem = _check_value(kind, choices, value)
        if problem is not None:
            what, _, fix = problem.partition("; ")
            diag.error(flag, None, what, fix)
            continue
        if kind == "path":
            converted = Path(converted).expanduser().resolve()
            if not converted.is_file():
                state = "is not a file" if converted.exists() else "does not exist"
                diag.error(flag, None, f"{value} {state}", "fix the path")
                continue
        values[name] = converted
    diag.raise_if_errors(ProjectError)
    return _with_values(project, values)


def require_inputs(project: Project) -> None:
    """Raises `ProjectError` unless the project names a lexicon and a language model."""
    diag = Diagnostics()
    where = str(project.path) if project.path else "command line"
    for key in ("lexicon", "lm"):
        if getattr(project, key) is None:
            diag.error(where, None, f"no {key} given",
                       f"add {key} = \"...\" under [inputs] in the project file "
                       f"or pass --{key}")
    diag.raise_if_errors(ProjectError)
