"""Context/phone maps: context widths, context-independent phones, HMM models and the
ordered tying rules that map a context-dependent phone to a physical model.

- `HmmState`, `Model`, `TyingRule`, `ContextMap`: the records.
- `read_context_map(path, inventory, diagnostics=None)`: validating reader.

A context-dependent phone is written as ``(left, centre, right)``: `left` holds the
`ContextMap.left` phones before the centre (oldest first), `right` the
`ContextMap.right` phones after it (nearest first). `EDGE` ("$") stands for the
utterance edge (padding before the first and after the last phone).
"""

from __future__ import annotations

import dataclasses

EDGE = "$"  # the utterance-edge context
ANY = "*"  # a rule token matching any phone or the edge
CLASS_PREFIX = "@"  # a rule token "@vowel" matches any phone of class "vowel"


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
