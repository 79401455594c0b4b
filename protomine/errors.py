"""The one error type for bad input, and its message format.

Every problem with what a user handed us (a capture folder, a store, a library, a truth CSV,
a config file, a command-line value) is raised as :class:`InputError`.  The CLI turns it into a
single line on stderr and exit code 2, with no traceback.
"""
from __future__ import annotations

from pathlib import Path


class InputError(Exception):
    """Bad input: names the file, the field (or frame/object) and what was expected.

    Parameters
    ----------
    path : the file (or folder) at fault, or None when the input is not a file (a CLI value).
    field : the field, frame or object inside it, e.g. ``frames[3].cam_to_world``.
    message : what was expected and what was found, e.g. "expected 16-bit greyscale, got 8-bit RGB".
    """

    def __init__(self, path: str | Path | None, field: str | None, message: str):
        self.path = None if path is None else str(path)
        self.field = field
        self.message = message
        super().__init__(self.__str__())

    def __str__(self) -> str:
        where = self.path or "<input>"
        if self.field:
            where += f": {self.field}"
        return f"{where}: {self.message}"


class InputErrors(InputError):
    """Several bad inputs found in one check (e.g. every bad capture of an ingest): one line each."""

    def __init__(self, errors: list[InputError]):
        self.errors = list(errors)
        first = self.errors[0]
        super().__init__(first.path, first.field, first.message)

    def __str__(self) -> str:
        return "\n".join(InputError.__str__(e) for e in self.errors)

    def lines(self) -> list[str]:
        return [InputError.__str__(e) for e in self.errors]
