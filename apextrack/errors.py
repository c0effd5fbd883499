"""The library's error types.

Every error a user can cause (bad file, bad metadata, bad settings, data that cannot support an
estimate) is an :class:`ApextrackError` subclass carrying the file concerned, what is wrong and
what to do. The command line prints such an error as one line and exits with code 2; anything
else is an internal error (exit code 1).
"""

from __future__ import annotations

from pathlib import Path


class ApextrackError(Exception):
    """Base class of every error the user can act on.

    Parameters
    ----------
    what : str
        A plain sentence saying what is wrong.
    path : str or Path, optional
        The file or folder concerned.
    hint : str, optional
        What the user can do about it.
    """

    exit_code = 2

    def __init__(self, what: str, path: str | Path | None = None, hint: str | None = None):
        self.what = str(what)
        self.path = None if path is None else str(path)
        self.hint = hint
        super().__init__(self.one_line())

    def __reduce__(self):
        # rebuilt from its parts when it crosses to another process (a frame measured there)
        return self.__class__, (self.what, self.path, self.hint)

    def one_line(self) -> str:
        """The error as a single line: ``<file>: <what is wrong> — <what to do>``."""
        text = self.what.replace("\n", " ")
        if self.path:
            text = f"{self.path}: {text}"
        if self.hint:
            text = f"{text} — {self.hint}"
        return text


class InputError(ApextrackError):
    """The input file or folder cannot be read as a time-lapse stack."""


class MetadataError(ApextrackError):
    """Pixel size, frame interval, axes or channels are missing, invalid or contradictory."""


class SettingsError(ApextrackError):
    """A setting (command-line option or settings file entry) is unknown, mistyped or out of range."""


class AnalysisError(ApextrackError):
    """The data cannot support the requested analysis (e.g. no primordia were found)."""


class OutputError(ApextrackError):
    """The results cannot be written where asked."""


class ResultsError(ApextrackError):
    """A results folder or table given as input is incomplete or was altered."""
