"""Exceptions for bad input. The command line turns these into exit code 2 with no traceback."""

from __future__ import annotations


class StopwiseInputError(ValueError):
    """Bad input or usage: a file, a column, a value, a model spec or an option.

    The message is written for the researcher: what was found, where, and what was expected.
    """


class StopwiseDataError(StopwiseInputError):
    """A data file failed validation; ``report`` holds every problem found."""

    def __init__(self, message: str, report: object | None = None) -> None:
        super().__init__(message)
        self.report = report
