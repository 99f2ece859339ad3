"""Phone inventories: the phones, their roles (silence, noise) and named classes.

- `PhoneInventory`: the record.
- `read_phones(path, diagnostics=None)`: validating reader of the inventory file.
- `inventory_from_lexicon(lexicon, diagnostics=None)`: an inventory made of the
  phones a lexicon uses, for projects that name no inventory file.
- `decode_lines(data, path, diagnostics)`: splits raw bytes into UTF-8 lines,
  reporting undecodable ones by byte offset (shared with the lexicon reader).

Inventory file format (netbuild's own):

- UTF-8 text (a leading byte-order mark is ignored). Lines are numbered from 1.
- ``#`` starts a comment that runs to the end of the line; blank lines are ignored.
- A *phone line* holds one phone name, optionally followed by one role word,
  ``silence`` or ``noise``, separated by whitespace::

      sil   silence
      brth  noise
      a

- A *class line* is ``NAME: phone phone ...``: the class name, a colon, then one or
  more phones separated by whitespace. Any line containing ``:`` is a class line, so
  phone names cannot contain ``:``. A class may name phones declared further down.
- Phones appear in the inventory in file order; the first ``silence`` phone is the
  optional silence the lexicon transducer inserts between words.
- Errors (each located ``path:line``): a phone declared twice, an unknown role word,
  more than two fields on a phone line, a class naming an unknown phone (the
  nearest known phone is suggested), a class defined twice or with no phones, a
  phone spelled like a reserved symbol (``<epsilon>``, ``<s>``, ``</s>``, or any
  name starting with ``!``, the prefix of auxiliary markers), a file with no
  phones, and bytes that are not valid UTF-8 (reported with their byte offset).
"""

from __future__ import annotations

import dataclasses
import difflib
import os
from typing import TYPE_CHECKING

from ..errors import Diagnostics, PhoneMapError
from ..symbols import is_reserved_word

if TYPE_CHECKING:  # the lexicon module imports this one
    from .lexicon import Lexicon

ROLES = ("silence", "noise")


@dataclasses.dataclass
class PhoneInventory:
    phones: list[str]  # every phone, file order (silence and noise included)
    silence: list[str] = dataclasses.field(default_factory=list)
    noise: list[str] = dataclasses.field(default_factory=list)
    classes: dict[str, list[str]] = dataclasses.field(default_factory=dict)
    path: str = "<memory>"
    lines: dict[str, int] = dataclasses.field(default_factory=dict)  # phone -> 1-based line

    @property
    def optional_silence(self) -> str | None:
        """The phone inserted as optional silence: the first silence phone, if any."""
        return self.silence[0] if self.silence else None


def nearest(name: str, known: list[str] | set[str]) -> str | None:
    """Returns the known name closest to `name` (difflib ratio), or None if none is close."""
    matches = difflib.get_close_matches(name, list(known), n=1, cutoff=0.5)
    return matches[0] if matches else None


def suggestion(name: str, known: list[str] | set[str]) -> str:
    """Returns "did you mean 'x'? " for the nearest known name, or an empty string."""
    near = nearest(name, known)
    return f"did you mean '{near}'? " if near else ""


def read_bytes(path: str | os.PathLike, diagnostics: Diagnostics) -> bytes | None:
    """Reads the whole file, recording an unreadable file as an error (returns None)."""
    try:
        with open(path, "rb") as f:
            return f.read()
    except OSError as err:
        diagnostics.error(str(path), None, f"cannot read the file ({err.strerror or err})",
                          "check the path and the file's permissions")
        return None


def decode_lines(data: bytes, path: str, diagnostics: Diagnostics) -> list[tuple[int, str]]:
    """Splits `data` into (1-based line number, text) pairs.

    A line that is not valid UTF-8 is reported with the byte offset (from the start
    of the file) of its first bad byte and left out; the other lines are kept so that
    every problem of the file is found in one run.
    """
    if data.startswith(b"\xef\xbb\xbf"):
        data = data[3:]
        offset = 3
    else:
        offset = 0
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError:
        text = None
    if text is not None:
        return list(enumerate(text.splitlines(), start=1))
    out: list[tuple[int, str]] = []
    for number, raw in enumerate(data.split(b"\n"), start=1):
        try:
            out.append((number, raw.decode("utf-8").rstrip("\r")))
        except UnicodeDecodeError as err:
            diagnostics.error(
                path, number,
                f"invalid UTF-8 at byte offset {offset + err.start} (byte 0x{raw[err.start]:02x})",
                "save the file as UTF-8")
        offset += len(raw) + 1
    return out


def reserved_phone_problem(phone: str) -> str | None:
    """Returns why `phone` may not be a phone name, or None when it may."""
    if is_reserved_word(phone) or phone.startswith("!"):
        return f"phone '{phone}' is spelled like a reserved symbol"
    return None


def read_phones(path: str | os.PathLike, diagnostics: Diagnostics | None = None) -> PhoneInventory:
    """Reads a phone inventory file (format in the module docstring).

    Args:
      path: the inventory file.
      diagnostics: collects every problem (warnings included); when None a private
        one is used. Either way all problems of the file are raised together.

    Returns:
      The inventory, phones in file order.

    Raises:
      PhoneMapError: listing every located problem of the file.
    """
    diag = diagnostics if diagnostics is not None else Diagnostics()
    where = str(path)
    data = read_bytes(path, diag)
    if data is None:
        diag.raise_if_errors(PhoneMapError, where)
        raise AssertionError("unreachable")  # pragma: no cover
    phones: list[str] = []
    lines: dict[str, int] = {}
    silence: list[str] = []
    noise: list[str] = []
    classes: dict[str, list[str]] = {}
    class_lines: dict[str, int] = {}
    last_line = 0
    for number, text in decode_lines(data, where, diag):
        last_line = number
        body = text.split("#", 1)[0].strip()
        if not body:
            continue
        if ":" in body:
            name, _, rest = body.partition(":")
            name = name.strip()
            members = rest.split()
            if not name or len(name.split()) != 1:
                diag.error(where, number, f"class name {name!r} must be one word",
                           "write the class as 'NAME: phone phone ...'")
                continue
            if name in classes:
                diag.error(where, number,
                           f"class '{name}' is already defined on line {class_lines[name]}",
                           "merge the two lines or rename one class")
                continue
            if not members:
                diag.error(where, number, f"class '{name}' names no phones",
                           "list its phones after the colon")
                continue
            seen = set()
            for m in members:
                if m in seen:
                    diag.warning(where, number, f"class '{name}' lists phone '{m}' twice",
                                 "remove the repeat")
                seen.add(m)
            classes[name] = list(dict.fromkeys(members))
            class_lines[name] = number
            continue
        fields = body.split()
        phone = fields[0]
        if len(fields) > 2:
            diag.error(where, number,
                       f"phone line has {len(fields)} fields, expected a phone and at most one role",
                       "write one phone per line, optionally followed by 'silence' or 'noise'")
            continue
        problem = reserved_phone_problem(phone)
        if problem:
            diag.error(where, number, problem,
                       "rename the phone (names starting with '!' and <epsilon>, <s>, </s> "
                       "are reserved)")
            continue
        if phone in lines:
            diag.error(where, number, f"phone '{phone}' is already declared on line {lines[phone]}",
                       "remove the repeated line")
            continue
        role = fields[1] if len(fields) == 2 else None
        if role is not None and role not in ROLES:
            diag.error(where, number, f"unknown role '{role}' for phone '{phone}'",
                       f"{suggestion(role, ROLES)}allowed roles are 'silence' and 'noise'")
            continue
        phones.append(phone)
        lines[phone] = number
        if role == "silence":
            silence.append(phone)
        elif role == "noise":
            noise.append(phone)
    known = set(phones)
    for name, members in classes.items():
        for m in members:
            if m not in known:
                diag.error(where, class_lines[name],
                           f"class '{name}' names unknown phone '{m}'",
                           f"{suggestion(m, phones)}declare the phone on its own line or "
                           "fix the spelling")
    if not phones and not diag.has_errors(where):
        diag.error(where, 1, "the inventory declares no phones",
                   "list one phone per line")
    diag.raise_if_errors(PhoneMapError, where)
    return PhoneInventory(phones, silence, noise, classes, where, lines)


def inventory_from_lexicon(lexicon: "Lexicon", diagnostics: Diagnostics | None = None
                           ) -> PhoneInventory:
    """Builds an inventory of the phones `lexicon` uses, in first-appearance order.

    For projects that name no inventory file. The inventory has no silence phone,
    so the lexicon transducer inserts no optional silence; a warning says so.
    Phones spelled like reserved symbols are errors located at their lexicon line.

    Raises:
      LexiconError: when a phone is spelled like a reserved symbol.
    """
    from ..errors import LexiconError

    diag = diagnostics if diagnostics is not None else Diagnostics()
    phones: list[str] = []
    lines: dict[str, int] = {}
    for entry in lexicon.entries:
        for p in entry.phones:
            if p in lines:
                continue
            problem = reserved_phone_problem(p)
            if problem:
                diag.error(lexicon.path, entry.line or None, f"{problem} (word '{entry.word}')",
                           "rename the phone in the lexicon")
                lines[p] = entry.line
                continue
            phones.append(p)
            lines[p] = entry.line
    diag.raise_if_errors(LexiconError, lexicon.path)
    diag.warning(lexicon.path, None,
                 f"no phone inventory given; using the {len(phones)} phones found in the lexicon, "
                 "with no silence phone, so no optional silence is inserted",
                 "name a phone inventory in the project to check phones and enable silence")
    return PhoneInventory(phones, [], [], {}, f"<phones of {lexicon.path}>",
                          {p: lines[p] for p in phones})
