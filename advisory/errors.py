"""The project's error hierarchy.

Every error a user can cause derives from :class:`InputError`; the command line
prints its message and exits with status 2.  Anything else is an internal fault
(exit status 1).
"""

from __future__ import annotations


class AdvisoryError(Exception):
    """Base of all errors raised on purpose by advisory."""


class InputError(AdvisoryError):
    """Bad input from a user: a file, a command-line value, a setting.

    Parameters
    ----------
    message : str
        What is wrong, in plain words.
    file : str, optional
        The file the bad input came from.
    line : int, optional
        1-based line number in that file, where known.
    field : str, optional
        The field, column or option that holds the bad value.
    """

    def __init__(self, message: str, *, file: str | None = None, line: int | None = None,
                 field: str | None = None):
        self.message = message
        self.file = file
        self.line = line
        self.field = field
        super().__init__(self.__str__())

    def __str__(self) -> str:
        where = []
        if self.file:
            where.append(str(self.file))
        if self.line is not None:
            where.append(f"line {self.line}")
        if self.field:
            where.append(f"field '{self.field}'")
        prefix = ", ".join(where)
        return f"{prefix}: {self.message}" if prefix else self.message


class SchemaVersionError(AdvisoryError):
    """The database schema is older or newer than this code expects.

    Raised as a user-facing problem (exit 2) because the fix is an action the
    user takes (``advisory db upgrade`` or installing a newer advisory).
    """


class NotFoundError(InputError):
    """A named farm, block, station or notice does not exist."""
