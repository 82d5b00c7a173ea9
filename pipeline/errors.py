"""Errors a user can act on: each names the file (or config key) and the problem."""

from __future__ import annotations


class PatchbatchError(Exception):
    """Base class of every error patchbatch raises on purpose."""


class RecordingError(PatchbatchError):
    """A file could not be read as current-clamp recordings.

    Parameters
    ----------
    path : str
        The file concerned.
    problem : str
        What is wrong, in words a user can act on.
    """

    def __init__(self, path: str, problem: str) -> None:
        self.path = str(path)
        self.problem = problem
        super().__init__(f"{self.path}: {problem}")


class UnsupportedFormatError(RecordingError):
    """No reader knows the file's extension or content."""


class CorruptFileError(RecordingError):
    """The file is unreadable, truncated or not what its extension says."""


class NoCurrentClampError(RecordingError):
    """The file holds no current-clamp sweeps (e.g. voltage clamp only)."""


class UnitError(RecordingError):
    """Units are missing, unknown, or of the wrong dimension."""


class ShapeError(RecordingError):
    """Voltage and current disagree in length or rate, or a sweep is malformed."""


class BadSamplesError(RecordingError):
    """NaN or infinite samples where data is needed."""


class ConfigError(PatchbatchError):
    """A configuration file or value is invalid (exit status 2)."""
