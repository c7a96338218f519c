"""render: batch, offline room rendering for audio post-production."""

from __future__ import annotations

__version__ = "0.1.0"

from .errors import (  # noqa: F401
    AnalysisError,
    AudioInputError,
    JobError,
    OutputError,
    ParameterError,
    RenderError,
    RoomError,
)
from .room import Room  # noqa: F401

__all__ = [
    "__version__",
    "AnalysisError",
    "AudioInputError",
    "JobError",
    "OutputError",
    "ParameterError",
    "RenderError",
    "RoomError",
    "Room",
]
