"""Exceptions of the project.

`InputError` is everything the user can fix in their input (exit status 2);
any other `SweepError` is a failure of the run itself (exit status 1).
"""
from __future__ import annotations


def shorten(text: str, limit: int = 40) -> str:
    """``text`` cut to ``limit`` characters with "..." for a one-line message (inputs may be pasted blobs)."""
    return text if len(text) <= limit else text[: limit - 3] + "..."


class SweepError(Exception):
    """A failure that is not the user's input (exit status 1)."""


class InputError(SweepError):
    """Bad input: one line naming the file, the field and the fix (exit status 2).

    Parameters
    ----------
    message
        What is wrong and what to do, e.g. ``"unknown name 'Rr'; did you mean 'R'?"``.
    file
        The file the input came from (shown first), if any.
    field
        The dotted field inside the file, e.g. ``"parameters.R.tol"``.
    """

    def __init__(self, message: str, *, file: str | None = None, field: str | None = None):
        self.message = message
        self.file = file
        self.field = field
        super().__init__(self.line())

    def line(self) -> str:
        """The one-line form ``FILE: FIELD: MESSAGE`` (parts that are unknown are left out)."""
        parts = [p for p in (self.file, self.field) if p]
        text = " ".join(self.message.split())  # always one line
        return ": ".join(parts + [text])


class ExpressionError(ValueError):
    """An expression that cannot be parsed or is not allowed where it stands.

    The config loader turns it into an `InputError` naming the field.
    """
