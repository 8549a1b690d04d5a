"""The exceptions kablate raises on purpose.

`KablateError` is the base. `UsageError` (and its subclasses) means the user gave us something
we cannot use: the CLI prints its message and exits with code 2, without a traceback.
"""

from __future__ import annotations

from difflib import get_close_matches


class KablateError(Exception):
    """Base class for every error kablate raises on purpose."""


class UsageError(KablateError):
    """Bad input from the user: a sweep file, a command-line value, a missing dataset."""


class SweepError(UsageError):
    """Something is wrong in a sweep file or a config it includes.

    Args:
        source: the file the problem is in (shown as given, usually relative).
        key: the dotted key path, e.g. ``recipe.epochs`` or ``network.stages[1].out_ch``.
        message: what is wrong and what is allowed.
        line: the line number, when known (syntax errors).
    """

    def __init__(self, source: str, key: str, message: str, line: int | None = None):
        self.source, self.key, self.line = source, key, line
        where = f"{source}, line {line}" if line else source
        text = f"{where}: `{key}` {message}" if key else f"{where}: {message}"
        super().__init__(text)


class PlanError(UsageError):
    """A variant that cannot be built: bad kernel spec, map smaller than 1×1, kernel too large."""


class DataError(UsageError):
    """A dataset that cannot be found or read."""


def did_you_mean(word: str, choices: list[str] | tuple[str, ...]) -> str:
    """Return ``"; did you mean `x`?"`` for the closest choice, or an empty string."""
    close = get_close_matches(word, list(choices), n=1, cutoff=0.6)
    return f"; did you mean `{close[0]}`?" if close else ""
