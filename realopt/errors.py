"""Errors a user can act on. Each carries a message meant to be printed as is (no traceback)."""
from __future__ import annotations

from dataclasses import dataclass


class RealoptError(Exception):
    """Base class: anything realopt raises on purpose. ``str(err)`` is the user-facing message."""


@dataclass(frozen=True)
class Problem:
    """One located problem in a project file."""

    file: str
    line: int | None
    column: int | None
    key: str
    found: str
    expected: str
    fix: str = ""

    def __str__(self) -> str:
        where = self.file
        if self.line is not None:
            where += f":{self.line}"
            if self.column is not None:
                where += f":{self.column}"
        text = f"{where}: {self.key}: found {self.found}; expected {self.expected}."
        if self.fix:
            text += f" Fix: {self.fix}"
        return text


class ProjectError(RealoptError):
    """The project file is invalid; holds every problem found, in file order."""

    def __init__(self, problems: list[Problem] | tuple[Problem, ...]):
        self.problems = tuple(problems)
        n = len(self.problems)
        head = f"{n} problem{'s' if n != 1 else ''} in the project file:"
        super().__init__("\n".join([head] + [f"  - {p}" for p in self.problems]))


class ValuationError(RealoptError):
    """The project is well formed but cannot be valued as specified (message says what to change)."""


class ModelError(ProjectError, ValuationError):
    """A project built in Python breaks a rule of the model (realopt.validate): the problems a file
    would get, without a file position. Both a ProjectError and a ValuationError."""

    def __init__(self, problems):
        super().__init__(problems)
        n = len(self.problems)
        head = f"{n} problem{'s' if n != 1 else ''} in the project:"
        self.args = ("\n".join([head] + [f"  - {p}" for p in self.problems]),)

    def __str__(self) -> str:
        return self.args[0]
