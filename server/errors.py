"""Errors a surveyor can fix, carrying the data needed to say exactly what is wrong.

Programming errors stay built-in exceptions; only problems with the input are
``SurveyError`` subclasses, and each prints as plain sentences.
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True, slots=True)
class Issue:
    """One problem (or warning) found on one line of a field book."""

    line: int
    token: str
    message: str

    def format(self, source: str = "") -> str:
        """``FILE:LINE: message`` as the command line prints it."""
        prefix = f"{source}:" if source else "line "
        return f"{prefix}{self.line}: {self.message}"


class SurveyError(Exception):
    """Base class of every input problem the user can correct."""


class FieldbookError(SurveyError):
    """The field book has errors; every one found is in ``issues`` (exit status 2)."""

    def __init__(
        self, issues: tuple[Issue, ...] | list[Issue], source: str = "", count: int | None = None
    ) -> None:
        self.issues = tuple(issues)
        self.source = source
        #: Errors found in the file: more than ``issues`` lists once the list is capped.
        self.count = len(self.issues) if count is None else count
        super().__init__(str(self))

    @property
    def headline(self) -> str:
        """ "the field book has N errors" with the true N, not the length of the capped list."""
        return f"the field book has {self.count:,} error{'' if self.count == 1 else 's'}"

    def __str__(self) -> str:
        return "\n".join(issue.format(self.source) for issue in self.issues)


class NetworkError(SurveyError):
    """The network cannot be adjusted; ``points`` names the marks concerned (exit status 3)."""

    def __init__(self, message: str, points: tuple[str, ...] | list[str] = ()) -> None:
        self.message = message
        self.points = tuple(points)
        super().__init__(message)

    def __str__(self) -> str:
        return self.message


class ConvergenceError(NetworkError):
    """The iterations did not settle within the limit."""
