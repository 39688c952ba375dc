"""Exception types that users see.

Every message is a single line that names, where it applies, the file, the column
and the row concerned and says what to do about it.  The command-line interface
prints ``str(error)`` and exits with status 2; it never shows a traceback for these.
"""

from __future__ import annotations

__all__ = [
    "FitdynError",
    "InputError",
    "ColumnError",
    "TimeError",
    "TooFewSamplesError",
    "EstimationError",
    "NoRealLogarithmError",
    "SamplingError",
    "ReportError",
    "OutputError",
    "shorten",
    "MAX_MESSAGE",
]

#: Longest message shown; longer ones (a whole line of a broken file quoted) are cut.
MAX_MESSAGE = 1000
#: Longest run of text without a space kept whole inside a message.
_MAX_WORD = 200


def shorten(text: str, limit: int = MAX_MESSAGE) -> str:
    """One line of at most ``limit`` characters: whitespace collapsed, very long
    words (quoted file content) cut in the middle, the tail cut with a count."""
    words = []
    for w in str(text).split():
        if len(w) > _MAX_WORD:
            w = f"{w[: _MAX_WORD // 2]}...({len(w)} characters)...{w[-40:]}"
        words.append(w)
    line = " ".join(words)
    if len(line) > limit:
        cut = len(line) - limit
        line = f"{line[:limit]}... ({cut} more characters)"
    return line


def _where(
    source: str | None = None, column: str | None = None, row: int | str | None = None
) -> str:
    parts = []
    if source:
        parts.append(f"{source}")
    if column is not None:
        parts.append(f"column '{column}'")
    if row is not None:
        parts.append(f"row {row}")
    return ", ".join(parts)


class FitdynError(Exception):
    """Base class of every error fitdyn raises on purpose.

    Parameters
    ----------
    message : str
        What is wrong and what to do, in one line.
    source, column, row : optional
        Where the problem is; prefixed to the message when given.
    """

    def __init__(
        self,
        message: str,
        *,
        source: str | None = None,
        column: str | None = None,
        row: int | str | None = None,
    ) -> None:
        self.source = source
        self.column = column
        self.row = row
        self.detail = message
        where = _where(source, column, row)
        text = f"{where}: {message}" if where else message
        super().__init__(shorten(text))


class InputError(FitdynError):
    """The input cannot be read: missing, empty, unreadable or of an unknown kind."""


class ColumnError(InputError):
    """A column is missing, ambiguous or not numeric."""


class TimeError(InputError):
    """The time column cannot be parsed or runs backwards where it must not."""


class TooFewSamplesError(InputError):
    """Too few usable samples remain for the requested work."""


class EstimationError(FitdynError):
    """An estimator cannot produce a trustworthy matrix from these data."""


class NoRealLogarithmError(EstimationError):
    """The one-step matrix has no real principal logarithm (a negative real eigenvalue)."""


class SamplingError(EstimationError):
    """The sampling does not suit the chosen estimator (irregular steps, aliasing...)."""


class ReportError(FitdynError):
    """A report or output file cannot be written."""


class OutputError(ReportError):
    """An output path is refused: it would overwrite an input or a file fitdyn did
    not write."""
