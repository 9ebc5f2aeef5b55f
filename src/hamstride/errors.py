"""One exception hierarchy for hamstride.

Every error carries a short code of our own and a message a physiotherapist or sports scientist can act on.
Batch runs record `code` and `message` in manifest.json; nothing here ever needs a traceback to be understood.
"""
from __future__ import annotations

from dataclasses import dataclass

__all__ = ["HamstrideError", "FileFormatError", "LandmarkError", "PlausibilityError", "EventError", "ConfigError",
           "AnalysisWarning", "TrialWarning"]


class HamstrideError(Exception):
    """Base of every error hamstride raises on purpose."""

    code = "error"

    def __init__(self, message: str, *, trial: str | None = None, code: str | None = None):
        self.trial = trial
        if code is not None:
            self.code = code
        self.message = f"trial {trial}: {message}" if trial else message
        super().__init__(self.message)


class FileFormatError(HamstrideError):
    """The file is not a readable C3D (empty, truncated, corrupt header or parameters)."""

    code = "bad_file"


class LandmarkError(HamstrideError):
    """A required anatomical landmark is missing or has too many invalid frames."""

    code = "landmark_missing"


class PlausibilityError(HamstrideError):
    """The data read fine but do not look like a sprint trial we can analyse (units, sides, speed, strides)."""

    code = "implausible"


class EventError(HamstrideError):
    """Foot strikes / toe-offs could not be found or give too few valid strides."""

    code = "events"


class ConfigError(HamstrideError):
    """A marker map, config file or athletes table is malformed."""

    code = "config"


class AnalysisWarning(UserWarning):
    """A problem that does not stop the analysis but should be shown to the user (``--strict`` turns it into an error)."""


@dataclass(frozen=True)
class TrialWarning:
    """A problem that does not stop a trial's analysis: a short code and a message (``--strict`` makes it an error)."""

    code: str
    message: str

    def __str__(self) -> str:
        return self.message
