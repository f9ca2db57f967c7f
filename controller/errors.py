"""The project's one error type for problems a user can fix.

Rule: anything caused by input a person wrote (a protocol, a rig file, a CSV series, a CLI
argument, a device reply) is raised as :class:`SquallError`. The CLI catches it once, prints
:meth:`SquallError.one_line` and exits with code 2. Bugs stay ordinary exceptions.
"""

from __future__ import annotations

from pathlib import Path

__all__ = ["RuntimeFailure", "SquallError"]


class SquallError(Exception):
    """A user-fixable problem located, where possible, at ``FILE:LINE: field.path``.

    Parameters
    ----------
    message
        What is wrong and, where it helps, what would be right.
    file
        The file the problem is in, if any.
    line
        1-based line number in ``file``, if known.
    field
        Dotted path of the offending field (``phases.2.temperature.0.rate_c_per_h``).
    """

    def __init__(
        self,
        message: str,
        *,
        file: str | Path | None = None,
        line: int | None = None,
        field: str | None = None,
    ) -> None:
        super().__init__(message)
        self.message = message
        self.file = str(file) if file is not None else None
        self.line = line
        self.field = field

    def one_line(self) -> str:
        """Render as ``FILE:LINE: field.path: message`` (parts that are unknown are left out)."""
        parts: list[str] = []
        if self.file is not None:
            parts.append(f"{self.file}:{self.line}" if self.line is not None else self.file)
        if self.field:
            parts.append(self.field)
        parts.append(" ".join(self.message.split()))
        return ": ".join(parts)

    def __str__(self) -> str:
        return self.one_line()


class RuntimeFailure(Exception):
    """A failure at run time that is not the user's input (device gone, disk full).

    The CLI prints it on one line and exits with code 1.
    """
