"""The few exception classes of Lacuna.

Every error a user can cause (a bad file, a malformed definition, a wrong option) is an
:class:`InputError`; the command line prints its one-line message and exits with code 2.
Messages name the file, the field (and line where known) and what was expected.
"""

from __future__ import annotations


class LacunaError(Exception):
    """Base class of all errors raised on purpose by Lacuna."""


class InputError(LacunaError):
    """Bad input: a file, a field or an option that cannot be used as given.

    Parameters
    ----------
    message : str
        What is wrong and what was expected.
    source : str, optional
        The file (or option) the problem is in.
    line : int, optional
        1-based line in ``source``.
    field : str, optional
        Dotted name of the field inside ``source``.
    """

    def __init__(self, message: str, *, source: str | None = None,
                 line: int | None = None, field: str | None = None):
        self.message = message
        self.source = None if source is None else str(source)
        self.line = line
        self.field = field
        super().__init__(self.one_line())

    def one_line(self) -> str:
        where = []
        if self.source:
            where.append(self.source + (f":{self.line}" if self.line else ""))
        if self.field:
            where.append(f"field '{self.field}'")
        prefix = ", ".join(where)
        return f"{prefix}: {self.message}" if prefix else self.message


class NotMeasurable(LacunaError):
    """A metric cannot be measured on this volume; the message says why.

    Raised inside a metric family and turned into a "not measured" result with the
    message as its note; it never stops the other metrics.
    """
