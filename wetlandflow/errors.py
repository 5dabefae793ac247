"""One tree of errors.

Every error raised on purpose by wetlandflow derives from :class:`WetlandflowError`;
each leaf also inherits the builtin that fits, so callers may catch either
(``except ValueError`` keeps working).  Messages say what was wrong, what was
received, what was expected and how to fix it.
"""

from __future__ import annotations


class WetlandflowError(Exception):
    """Root of all errors raised on purpose by wetlandflow."""


class ProjectFileError(WetlandflowError, ValueError):
    """The project file is malformed: unknown key, wrong type, bad value.

    ``key`` carries the full dotted key path (``validation.block_size_m``).
    """

    def __init__(self, message: str, *, key: str | None = None, file: str | None = None):
        self.key = key
        self.file = file
        self.detail = message
        where = ""
        if file:
            where += f"{file}: "
        if key:
            where += f"[{key}] "
        super().__init__(f"{where}{message}")


class InputFileError(WetlandflowError, OSError):
    """An input file is missing, unreadable, truncated or lacks what it must carry."""

    def __init__(self, message: str, *, path: str | None = None):
        self.path = path
        prefix = f"{path}: " if path else ""
        super().__init__(f"{prefix}{message}")


class GridMismatchError(WetlandflowError, ValueError):
    """A raster is not on the run's reference grid (names the field that differs)."""


class AlignmentError(WetlandflowError, ValueError):
    """An input cannot be brought onto the reference grid (no overlap, no CRS, offset)."""


class DataQualityError(WetlandflowError, ValueError):
    """Values that are implausible for what they claim to be (unscaled reflectance, dB labelled linear)."""


class SamplesError(WetlandflowError, ValueError):
    """Training plots or samples are unusable (outside AOI, unknown labels, duplicate ids)."""


class ValidationDesignError(WetlandflowError, ValueError):
    """A cross-validation design cannot be honoured (class missing from a fold, leaking split)."""


class MonitoringDesignError(WetlandflowError, ValueError):
    """A monitoring analysis cannot be honoured: too few dates before or after an event, a series too
    short for a trend test, no baseline before a disturbance (the message states the minimum and its
    source)."""


class ModelError(WetlandflowError, ValueError):
    """A model or model bundle does not fit the data it is given."""


class OutputError(WetlandflowError, OSError):
    """Outputs cannot be written (folder not writable, not enough disk).

    ``path`` names the file or folder concerned when known; ``disk_full`` holds, for a full disk or a
    file-size limit, the file, folder, step, reason and free space the message gives (else None).
    """

    disk_full: dict | None = None

    def __init__(self, message: str, *, path: str | None = None):
        self.path = path
        super().__init__(message)


class RunFolderLocked(OutputError):
    """Another command holds the run folder's lock (``holder``: its host, PID, command and start time)."""

    def __init__(self, message: str, *, path: str | None = None, holder=None):
        self.holder = holder
        super().__init__(message, path=path)


class BudgetError(WetlandflowError, MemoryError):
    """A computation would exceed the memory or time budget it was given."""


class ParameterError(WetlandflowError, ValueError):
    """A function argument outside its allowed values (names the parameter, the value and the choices)."""


class Cancelled(WetlandflowError):
    """Work was stopped on request (a notebook's cancel button) at a cancel point; finished work is kept.

    ``partial`` holds what a job finished before the cancel, when it has something to hand back.
    """

    partial = None


class PlausibilityWarning(UserWarning):
    """Inputs that are valid but look wrong (a unit, a duplicated file, overlapping plots).

    A run records every such warning in ``manifest.json`` (``plausibility_warnings``) and shows it in its
    summary."""


class ClassDroppedWarning(UserWarning):
    """A class of the scheme that no plot is labelled with left the scheme (``[classes] drop_empty = true``);
    the map cannot show it."""
