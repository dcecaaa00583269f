"""Every failure depthplan names.

User mistakes raise a `DepthplanError` subclass whose text says what is wrong,
where, and how to fix it; the CLI prints that one line and exits with the
class's `exit_code`.
"""
from __future__ import annotations


class DepthplanError(Exception):
    """Base of all errors depthplan raises on purpose."""

    exit_code = 1


class ConfigError(DepthplanError):
    """A sweep file, option or other user input is wrong (exit status 2)."""

    exit_code = 2


class DataError(ConfigError):
    """A data file or measurements table cannot be read as given (exit status 2)."""


class StoreError(DepthplanError):
    """The sweep store is missing, busy, or holds a different sweep."""

    exit_code = 2


class RunFailed(DepthplanError):
    """Training or fitting failed for a reason that is not the user's input."""

    exit_code = 1


def first_line(text: str) -> str:
    """The first line of `text` without surrounding blanks ("" for blank text), for one-line messages."""
    lines = text.strip().splitlines()
    return lines[0].strip() if lines else ""


class ConvergenceWarning(UserWarning):
    """A numerical procedure returned an answer it is not sure of."""
