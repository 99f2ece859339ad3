"""Context maps: context widths, context-independent phones, HMM models and the
ordered tying rules that map a context-dependent phone to a physical model.

- `HmmState`, `Model`, `TyingRule`, `ContextMap`: the records.
- `read_context_map(path, inventory, diagnostics=None)`: validating reader.
- `write_context_map(cmap, path)`: writes the text form the reader reads back.
- `MAX_WIDTH`: the widest left or right context the reader accepts.

A context-dependent phone is written as ``(left, centre, right)``: `left` holds the
`ContextMap.left` phones before the centre (oldest first), `right` the
`ContextMap.right` phones after it (nearest first). `EDGE` ("$") stands for the
utterance edge (padding before the first and after the last phone).

File format (netbuild's own; UTF-8, ``#`` starts a comment, blank lines ignored)::

    widths LEFT RIGHT                 # context widths, each 0..MAX_WIDTH
    independent PHONE...              # context-independent phones (may repeat)
    independent-context yes|no        # do they act as context for neighbours (default no)
    model NAME CLASS:SELF:FORWARD ... # one token per emitting state, left to right
    rule LEFT... CENTRE RIGHT... -> MODEL

- ``widths`` comes once, before any ``rule`` line (the token count depends on it).
- A model state ``CLASS:SELF:FORWARD`` has an emission class (integer >= 0, shared
  ids are tied), a self-loop probability in [0, 1) and a forward probability in
  (0, 1] that add up to 1 (within 1e-6).
- A rule has exactly LEFT tokens, the centre, then exactly RIGHT tokens, ``->`` and a
  model name (models may be declared after the rules that name them). Tokens: a
  phone, ``@class`` (a class of the phone inventory), ``*`` (anything, the edge
  included) or ``$`` (the edge only; not allowed as the centre). The first matching
  rule wins. For a context-independent centre the context tokens are ignored.

Errors (each located ``path:line`` with a fix): unknown keyword, phone or class (the
nearest is suggested), unknown model in a rule, wrong token count for the widths,
duplicate model, a number that does not parse, probabilities out of range or not
adding up to 1, a model with no states, a missing or repeated ``widths`` line, a map
with no models or no rules, and bytes that are not valid UTF-8. Warnings: rules that
can match nothing (an edge token nearer the centre than a phone on the same side, or
a context-independent phone used as context when they do not act as context), a
repeated independent phone, models named by no rule.
"""

from __future__ import annotations

import dataclasses
import math
import os
import re

from ..errors import Diagnostics, PhoneMapError
from .phones import PhoneInventory, decode_lines, read_bytes, suggestion

EDGE = "$"  # the utterance-edge context
ANY = "*"  # a rule token matching any phone or the edge
CLASS_PREFIX = "@"  # a rule token "@vowel" matches any phone of class "vowel"
ARROW = "->"
MAX_WIDTH = 3
KEYWORDS = ("widths", "independent", "independent-context", "model", "rule")
_STATE_RE = re.compile(r"^([0-9]+):([^:]+):([^:]+)$")
_SUM_TOLERANCE = 1e-6


@dataclasses.dataclass(frozen=True)
class HmmState:
    """One emitting state: its emission class (shared ids are tied) and probabilities."""

    emission_class: int  # >= 0
    self_loop: float  # in [0, 1)
    forward: float  # in (0, 1]; self_loop + forward == 1


@dataclasses.dataclass(frozen=True)
class Model:
    """A physical model: a left-to-right HMM of one or more emitting states."""

    name: str
    states: tuple[HmmState, ...]
    line: int = 0


@dataclasses.dataclass(frozen=True)
class TyingRule:
    """Maps context-dependent phones matching (left, centre, right) to `model`.

    Each token is a phone, ``@class``, ``*`` (anything, edge included) or ``$`` (edge).
    """

    left: tuple[str, ...]
    centre: str
    right: tuple[str, ...]
    model: str
    line: int = 0


@dataclasses.dataclass
class ContextMap:
    left: int  # left context width, 0..
    right: int  # right context width, 0..
    independent: list[str]  # context-independent phones (silence, noise)
    independent_is_context: bool  # do they act as context for their neighbours?
    models: dict[str, Model]  # file order
    rules: list[TyingRule]  # file order; the first matching rule wins
    classes: dict[str, list[str]] = dataclasses.field(default_factory=dict)  # from the inventory
    path: str = "<memory>"
    widths_line: int = 0  # line of the widths declaration (0 when not from a file)


def _parse_probability(text: str) -> float | None:
    try:
        value = float(text)
    except ValueError:
        return None
    return value


def _parse_model(fields: list[str], where: str, number: int, diag: Diagnostics
                 ) -> Model | None:
    if len(fields) < 2:
        diag.error(where, number, "model line has no name",
                   "write 'model NAME CLASS:SELF:FORWARD ...'")
        return None
    name = fields[1]
    if name == ARROW or name in (EDGE, ANY) or name.startswith(CLASS_PREFIX):
        diag.error(where, number, f"model name '{name}' is reserved for rule tokens",
                   "use a name that is not '->', '$', '*' and does not start with '@'")
        return None
    tokens = fields[2:]
    if not tokens:
        diag.error(where, number, f"model '{name}' has no states",
                   "list one CLASS:SELF:FORWARD token per emitting state")
        return None
    states: list[HmmState] = []
    ok = True
    for tok in tokens:
        m = _STATE_RE.match(tok)
        if m is None:
            diag.error(where, number, f"state '{tok}' of model '{name}' is not "
                       "CLASS:SELF:FORWARD",
                       "write an integer class >= 0 and two probabilities, e.g. 12:0.6:0.4")
            ok = False
            continue
        cls = int(m.group(1))
        self_loop = _parse_probability(m.group(2))
        forward = _parse_probability(m.group(3))
        if self_loop is None or forward is None:
            bad = m.group(2) if self_loop is None else m.group(3)
            diag.error(where, number, f"probability '{bad}' in state '{tok}' of model "
                       f"'{name}' is not a number", "write a decimal number such as 0.6")
            ok = False
            continue
        if not (0.0 <= self_loop < 1.0):  # also rejects nan
            diag.error(where, number, f"self-loop probability {m.group(2)} in state '{tok}' "
                       f"of model '{name}' is outside [0, 1)",
                       "use a self-loop probability of at least 0 and below 1")
            ok = False
            continue
        if not (0.0 < forward <= 1.0):
            diag.error(where, number, f"forward probability {m.group(3)} in state '{tok}' "
                       f"of model '{name}' is outside (0, 1]",
                       "use a forward probability above 0 and at most 1")
            ok = False
            continue
        if abs(self_loop + forward - 1.0) > _SUM_TOLERANCE:
            diag.error(where, number, f"state '{tok}' of model '{name}': self-loop and "
                       f"forward probabilities add up to {self_loop + forward:.9g}, not 1",
                       "make the two probabilities add up to 1")
            ok = False
            continue
        states.append(HmmState(cls, self_loop, forward))
    return Model(name, tuple(states), number) if ok else None


def _check_token(tok: str, role: str, known: set[str], inventory: PhoneInventory,
                 where: str, number: int, diag: Diagnostics) -> bool:
    if tok in (ANY, EDGE):
        if tok == EDGE and role == "centre":
            diag.error(where, number, "the centre of a rule cannot be the edge '$'",
                       "write a phone, an @class or '*' as the centre")
            return False
        return True
    if tok == ARROW:
        diag.error(where, number, "rule has '->' too early (too few tokens)",
                   "write exactly the widths' number of context tokens around the centre")
        return False
    if tok.startswith(CLASS_PREFIX):
        name = tok[len(CLASS_PREFIX):]
        if name in inventory.classes:
            return True
        classes = list(inventory.classes)
        hint = suggestion(name, classes)
        allowed = (f"classes of {inventory.path} are "
                   + ", ".join(f"'{c}'" for c in classes)) if classes else \
            f"{inventory.path} defines no classes"
        diag.error(where, number, f"unknown phone class '{name}' in a rule",
                   f"{hint}{allowed}")
        return False
    if tok in known:
        return True
    diag.error(where, number, f"unknown phone '{tok}' in a rule",
               f"{suggestion(tok, inventory.phones)}use a phone of {inventory.path}, an "
               "@class, '*' or '$'")
    return False


def _token_can_be_edge(tok: str) -> bool:
    return tok in (ANY, EDGE)


def _impossible(rule: TyingRule, independent: set[str], ci_context: bool,
                classes: dict[str, list[str]]) -> str | None:
    """Returns why `rule` can never match a context (ignoring the lexicon), or None."""
    if rule.centre in independent:
        return None  # context tokens are ignored for a context-independent centre
    # Beyond the edge there is only edge: nearest-first, once '$' is forced, every
    # farther token must accept the edge.
    for side, tokens in (("left", tuple(reversed(rule.left))), ("right", rule.right)):
        forced = False
        for tok in tokens:
            if forced and not _token_can_be_edge(tok):
                return (f"on the {side} it puts '{tok}' beyond the edge '$', where only "
                        "the edge can be")
            if tok == EDGE:
                forced = True
    if not ci_context:
        for tok in (*rule.left, *rule.right):
            members = classes.get(tok[1:], []) if tok.startswith(CLASS_PREFIX) else [tok]
            if tok not in (ANY, EDGE) and members and all(m in independent for m in members):
                return (f"it uses context-independent '{tok}' as context, but neighbours "
                        "see '$' in their place (independent-context is no)")
    return None


def read_context_map(path: str | os.PathLike, inventory: PhoneInventory,
                     diagnostics: Diagnostics | None = None) -> ContextMap:
    """Reads a context map file (format in the module docstring).

    Args:
      path: the context map file.
      inventory: the phone inventory; rule tokens and independent phones must be its
        phones or classes.
      diagnostics: collects every problem (warnings included); when None a private
        one is used. Either way all errors of the file are raised together.

    Returns:
      The map; `classes` is the inventory's classes.

    Raises:
      PhoneMapError: listing every located problem of the file.
    """
    diag = diagnostics if diagnostics is not None else Diagnostics()
    where = str(path)
    data = read_bytes(path, diag)
    if data is None:
        diag.raise_if_errors(PhoneMapError, where)
        raise AssertionError("unreachable")  # pragma: no cover
    known = set(inventory.phones)
    widths: tuple[int, int] | None = None
    widths_line = 0
    independent: list[str] = []
    independent_lines: dict[str, int] = {}
    ci_context = False
    ci_context_line = 0
    models: dict[str, Model] = {}
    rules: list[TyingRule] = []
    last_line = 0
    for number, text in decode_lines(data, where, diag):
        last_line = number
        fields = text.split("#", 1)[0].split()
        if not fields:
            continue
        key = fields[0]
        if key == "widths":
            if widths is not None:
                diag.error(where, number, f"widths are already given on line {widths_line}",
                           "keep one widths line")
                continue
            if len(fields) != 3:
                diag.error(where, number, "widths line needs two numbers",
                           "write 'widths LEFT RIGHT', e.g. 'widths 1 1' for triphones")
                widths_line = number
                continue
            values = []
            for f in fields[1:]:
                if not re.fullmatch(r"[0-9]+", f) or int(f) > MAX_WIDTH:
                    diag.error(where, number, f"context width '{f}' is not a whole number "
                               f"from 0 to {MAX_WIDTH}",
                               f"write a width from 0 to {MAX_WIDTH}")
                    values.append(None)
                else:
                    values.append(int(f))
            widths_line = number
            if None not in values:
                widths = (values[0], values[1])
            continue
        if key == "independent":
            if len(fields) == 1:
                diag.error(where, number, "independent line names no phones",
                           "list the context-independent phones after 'independent'")
            for p in fields[1:]:
                if p not in known:
                    diag.error(where, number, f"unknown phone '{p}' declared independent",
                               f"{suggestion(p, inventory.phones)}use a phone of "
                               f"{inventory.path}")
                elif p in independent_lines:
                    diag.warning(where, number, f"phone '{p}' is already independent "
                                 f"(line {independent_lines[p]})", "remove the repeat")
                else:
                    independent.append(p)
                    independent_lines[p] = number
            continue
        if key == "independent-context":
            if ci_context_line:
                diag.error(where, number, "independent-context is already given on line "
                           f"{ci_context_line}", "keep one independent-context line")
                continue
            ci_context_line = number
            if len(fields) != 2 or fields[1] not in ("yes", "no"):
                diag.error(where, number, "independent-context takes 'yes' or 'no'",
                           "write 'independent-context yes' or 'independent-context no'")
                continue
            ci_context = fields[1] == "yes"
            continue
        if key == "model":
            model = _parse_model(fields, where, number, diag)
            if model is None:
                continue
            if model.name in models:
                diag.error(where, number, f"model '{model.name}' is already declared on "
                           f"line {models[model.name].line}",
                           "rename one of the two models or remove the repeat")
                continue
            models[model.name] = model
            continue
        if key == "rule":
            if widths is None:
                if not widths_line:
                    diag.error(where, number, "rule before the widths line",
                               "put 'widths LEFT RIGHT' above the first rule")
                    widths_line = -1  # report the missing widths once
                continue
            body = fields[1:]
            if ARROW not in body:
                diag.error(where, number, "rule has no '->'",
                           "write 'rule LEFT... CENTRE RIGHT... -> MODEL'")
                continue
            at = body.index(ARROW)
            tokens, target = body[:at], body[at + 1:]
            want = widths[0] + 1 + widths[1]
            if len(tokens) != want:
                diag.error(where, number, f"rule has {len(tokens)} context/centre tokens, "
                           f"widths {widths[0]} {widths[1]} need {want}",
                           f"write {widths[0]} left token(s), the centre, then "
                           f"{widths[1]} right token(s) ('*' matches anything)")
                continue
            if len(target) != 1:
                diag.error(where, number, "rule needs exactly one model name after '->'",
                           "write 'rule ... -> MODEL'")
                continue
            roles = ["left"] * widths[0] + ["centre"] + ["right"] * widths[1]
            if not all([_check_token(t, r, known, inventory, where, number, diag)
                        for t, r in zip(tokens, roles)]):
                continue
            rules.append(TyingRule(tuple(tokens[:widths[0]]), tokens[widths[0]],
                                   tuple(tokens[widths[0] + 1:]), target[0], number))
            continue
        near = suggestion(key, list(KEYWORDS))
        diag.error(where, number, f"unknown keyword '{key}'",
                   f"{near}lines start with " + ", ".join(f"'{k}'" for k in KEYWORDS))
    if widths is None and widths_line <= 0:
        diag.error(where, last_line or 1, "the map has no widths line",
                   "add 'widths LEFT RIGHT' (e.g. 'widths 1 1') above the rules")
    if not models and not diag.has_errors(where):
        diag.error(where, last_line or 1, "the map declares no models",
                   "add 'model NAME CLASS:SELF:FORWARD ...' lines")
    if not rules and not diag.has_errors(where):
        diag.error(where, last_line or 1, "the map has no rules",
                   "add 'rule ... -> MODEL' lines, e.g. a catch-all per phone")
    used: set[str] = set()
    ci = set(independent)
    for rule in rules:
        used.add(rule.model)
        if rule.model not in models:
            diag.error(where, rule.line, f"rule names unknown model '{rule.model}'",
                       f"{suggestion(rule.model, list(models))}declare it with a 'model' line")
            continue
        why = _impossible(rule, ci, ci_context, inventory.classes)
        if why:
            diag.warning(where, rule.line, f"rule can never match: {why}",
                         "fix or remove the rule")
    for name, model in models.items():
        if name not in used and rules:
            diag.warning(where, model.line, f"model '{name}' is named by no rule",
                         "remove it or add a rule that uses it")
    diag.raise_if_errors(PhoneMapError, where)
    assert widths is not None
    return ContextMap(widths[0], widths[1], independent, ci_context, models, rules,
                      {k: list(v) for k, v in inventory.classes.items()}, where, widths_line)


def _format_probability(p: float) -> str:
    text = repr(float(p))
    return text if math.isfinite(p) else "nan"


def write_context_map(cmap: ContextMap, path: str | os.PathLike) -> None:
    """Writes `cmap` in the text form `read_context_map` reads (UTF-8).

    Probabilities are written with `repr`, so they read back exactly; the line
    numbers of the records are not kept.
    """
    out = [f"widths {cmap.left} {cmap.right}"]
    if cmap.independent:
        out.append("independent " + " ".join(cmap.independent))
    out.append(f"independent-context {'yes' if cmap.independent_is_context else 'no'}")
    for model in cmap.models.values():
        states = " ".join(f"{s.emission_class}:{_format_probability(s.self_loop)}:"
                          f"{_format_probability(s.forward)}" for s in model.states)
        out.append(f"model {model.name} {states}")
    for rule in cmap.rules:
        out.append(" ".join(["rule", *rule.left, rule.centre, *rule.right, ARROW, rule.model]))
    with open(path, "w", encoding="utf-8", newline="\n") as f:
        f.write("\n".join(out) + "\n")
