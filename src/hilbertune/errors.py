"""Error types of hilbertune.

Every error that a user can cause derives from ``HilbertuneError``; the command line turns
``InvalidInputError`` (and its subclasses) into exit code 2 with one line, and any other
``HilbertuneError`` into exit code 1. Messages say what was wrong and how to fix it.
"""

from __future__ import annotations


class HilbertuneError(Exception):
    """Base class of every error raised on purpose by hilbertune."""


class InvalidInputError(HilbertuneError, ValueError):
    """Bad data, bad configuration or bad arguments; the message names the fix (exit 2)."""


class ResourceLimitError(InvalidInputError):
    """The requested computation would not fit in the memory budget (exit 2)."""


class ArtifactError(InvalidInputError):
    """A run directory is missing a file, was modified, or was written by a newer format."""


class NotFittedError(HilbertuneError, AttributeError):
    """An estimator was used before ``fit``."""


class TrainingError(HilbertuneError):
    """Training could not continue (non-finite objective or gradient) (exit 1)."""
