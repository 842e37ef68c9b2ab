"""Errors hopper reports to users: bad input (exit status 2) versus internal faults."""
from __future__ import annotations


class HopperError(Exception):
    """Base class for errors hopper raises on purpose."""

    exit_status = 1


class InputError(HopperError, ValueError):
    """Bad input or usage: names the file, line and field at fault and what to do.

    The CLI prints ``str(error)`` as one line on stderr and exits with status 2.
    """

    exit_status = 2

    def __init__(self, message: str, *, file: str | None = None, line: int | None = None,
                 field: str | None = None, hint: str | None = None):
        self.file, self.line, self.field, self.hint = file, line, field, hint
        self.message = message
        super().__init__(self._render())

    def _render(self) -> str:
        where = []
        if self.file:
            where.append(str(self.file))
        if self.line is not None:
            where.append(f"line {self.line}")
        if self.field:
            where.append(f"field '{self.field}'")
        text = (": ".join([", ".join(where), self.message]) if where else self.message)
        if self.hint:
            text += f" ({self.hint})"
        return " ".join(text.split())  # always one line


class StoreBusyError(HopperError):
    """Another process held the store's write lock for longer than we were willing to wait."""

    exit_status = 1
