"""Exception hierarchy of dspeq.

Every error raised for bad user input is a subclass of :class:`DspeqError`,
which is itself a :class:`ValueError`, so callers that only know the
standard library can still catch it.
"""

from __future__ import annotations

__all__ = [
    "DspeqError",
    "CurveError",
    "ExpressionError",
    "DesignError",
    "AudioFileError",
    "JobError",
]


class DspeqError(ValueError):
    """Base class of all dspeq errors."""


class CurveError(DspeqError):
    """An analog curve is malformed, unknown or not realizable."""


class ExpressionError(CurveError):
    """A rational expression in ``s`` (or a network text) could not be parsed.

    Attributes
    ----------
    text : str
        The text that was parsed.
    position : int
        0-based character offset of the offending token.
    """

    def __init__(self, message: str, text: str = "", position: int = -1):
        self.text = text
        self.position = position
        if position >= 0:
            message = f"{message} at position {position + 1}: {text!r}"
        super().__init__(message)


class DesignError(DspeqError):
    """A digital design could not be made or is unstable."""


class AudioFileError(DspeqError):
    """An audio file is missing, unreadable, truncated or corrupt."""


class JobError(DspeqError):
    """A batch job file or its options are invalid."""
