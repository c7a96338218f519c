"""The project's exception hierarchy.

Every error the tool raises on purpose derives from :class:`RenderError`.
The command line turns these into one line and a documented exit code.
"""

from __future__ import annotations

__all__ = [
    "RenderError",
    "ParameterError",
    "RoomError",
    "JobError",
    "AudioInputError",
    "OutputError",
    "AnalysisError",
]


class RenderError(Exception):
    """Root of every error raised on purpose by ``render``."""


class ParameterError(RenderError, ValueError):
    """A DSP function received an argument outside its documented range."""


class RoomError(ParameterError):
    """A room description is out of range or contradicts itself.

    ``field``, ``value`` and ``expected`` let the job layer re-word the message
    with the job file and key path in front.
    """

    def __init__(self, message, *, field=None, value=None, expected=None):
        super().__init__(message)
        self.field = field
        self.value = value
        self.expected = expected


class JobError(RenderError):
    """A job file cannot be read or does not validate."""


class AudioInputError(RenderError):
    """A source audio file cannot be read."""


class OutputError(RenderError):
    """An output cannot be written where it was asked to go."""


class AnalysisError(RenderError):
    """A measurement cannot be made on the given signal (e.g. too little decay range)."""
