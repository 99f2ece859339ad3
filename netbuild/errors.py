"""The one exception tree of netbuild, and the record of located problems.

- `Problem`: one located finding (error or warning) in a user file.
- `Diagnostics`: collects problems so a reader can report all of them in one run.
- `NetbuildError` and its subclasses: raised to stop work; every instance has `.hint`.

User-caused messages read ``path:line: what is wrong; what to do``.
"""

from __future__ import annotations

import dataclasses
from typing import Literal

Severity = Literal["error", "warning"]


@dataclasses.dataclass(frozen=True)
class Problem:
    """One finding about a user file, located by path and (1-based) line."""

    path: str
    line: int | None
    message: str
    hint: str = ""
    severity: Severity = "error"

    def __str__(self) -> str:
        where = self.path if self.line is None else f"{self.path}:{self.line}"
        text = f"{where}: {self.message}"
        return f"{text}; {self.hint}" if self.hint else text

    def to_json(self) -> dict:
        return {"file": self.path, "line": self.line, "message": str(self)}


class Diagnostics:
    """Collects problems; readers add to it and raise once at the end.

    A reader given a `Diagnostics` keeps going after an error so that
    `netbuild check` can list every problem of every input in one run.
    """

    def __init__(self, max_errors_per_file: int = 200) -> None:
        self.problems: list[Problem] = []
        self.max_errors_per_file = max_errors_per_file
        self._per_file: dict[str, int] = {}

    def error(self, path: str, line: int | None, message: str, hint: str = "") -> None:
        n = self._per_file.get(path, 0)
        self._per_file[path] = n + 1
        if n < self.max_errors_per_file:
            self.problems.append(Problem(str(path), line, message, hint, "error"))
        elif n == self.max_errors_per_file:
            self.problems.append(
                Problem(str(path), None, f"more than {n} errors; stopped listing them",
                        "fix the ones above and run again", "error"))

    def warning(self, path: str, line: int | None, message: str, hint: str = "") -> None:
        self.problems.append(Problem(str(path), line, message, hint, "warning"))

    @property
    def errors(self) -> list[Problem]:
        return [p for p in self.problems if p.severity == "error"]

    @property
    def warnings(self) -> list[Problem]:
        return [p for p in self.problems if p.severity == "warning"]

    def has_errors(self, path: str | None = None) -> bool:
        return any(p.severity == "error" and (path is None or p.path == str(path))
                   for p in self.problems)

    def raise_if_errors(self, cls: type["InputError"] | None = None,
                        path: str | None = None) -> None:
        """Raises `cls` (default `InputError`) carrying every error so far (of `path`)."""
        errs = [p for p in self.errors if path is None or p.path == str(path)]
        if errs:
            raise (cls or InputError).from_problems(errs)


class NetbuildError(Exception):
    """Base of every error netbuild raises on purpose; `.hint` says what to do."""

    def __init__(self, message: str, hint: str = "") -> None:
        super().__init__(message)
        self.message = message
        self.hint = hint

    def __str__(self) -> str:
        return f"{self.message}; {self.hint}" if self.hint else self.message


class InputError(NetbuildError, ValueError):
    """A bad user file. `.problems` lists every located problem found."""

    def __init__(self, message: str, hint: str = "", *, path: str | None = None,
                 line: int | None = None, column: int | None = None,
                 problems: list[Problem] | None = None) -> None:
        super().__init__(message, hint)
        self.path = path
        self.line = line
        self.column = column
        self.problems = problems or [Problem(str(path or "<input>"), line, message, hint)]

    def __str__(self) -> str:
        return "\n".join(str(p) for p in self.problems)

    @classmethod
    def from_problems(cls, problems: list[Problem]) -> "InputError":
        first = problems[0]
        return cls(first.message, first.hint, path=first.path, line=first.line,
                   problems=list(problems))


class LexiconError(InputError):
    """A problem in a lexicon file."""


class ArpaError(InputError):
    """A problem in an ARPA language-model file."""


class PhoneMapError(InputError):
    """A problem in a phone inventory or context map file."""


class ProjectError(InputError):
    """A problem in a project (TOML) file or in the settings given on the command line."""


class SymbolError(InputError):
    """A label or symbol that does not belong where it was found."""


class StageError(NetbuildError, RuntimeError):
    """An FST operation failed or hit a limit; the message names the likely input cause."""

    def __init__(self, stage: str, message: str, hint: str = "") -> None:
        super().__init__(f"{stage}: {message}", hint)
        self.stage = stage


class DeterminizeError(StageError):
    """Determinization did not finish within its memory or time limit."""


class EmptyCompositionError(StageError):
    """A composition produced no path: the two sides share no vocabulary."""


class CheckFailed(NetbuildError, AssertionError):
    """An invariant broke after a stage: a netbuild bug. `.evidence` names saved files."""

    def __init__(self, stage: str, message: str, evidence: str | None = None,
                 hint: str = "") -> None:
        text = f"internal error after stage '{stage}': {message}"
        if evidence:
            text += f" (evidence saved in {evidence})"
        super().__init__(text, hint or "please report this with the evidence file")
        self.stage = stage
        self.evidence = evidence


class InputCheckFailed(StageError):
    """A stage check failed for a reason traced to the inputs (e.g. homophones without markers)."""
