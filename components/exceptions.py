"""The one exceptions module of planetmix (re-exported by ``inversion.exceptions``).

Every error a user can trigger derives from :class:`PlanetmixError`. Bad input raises
:class:`InputError`, which names the file, the row and the field, shows the value and
says how to fix it; the command-line interface prints it on one line and exits with
status 2.
"""

from __future__ import annotations

__all__ = [
    "PlanetmixError",
    "InputError",
    "SolverError",
    "PlanetmixWarning",
    "DiagnosticWarning",
]


class PlanetmixError(Exception):
    """Base class of every planetmix error."""


class InputError(PlanetmixError, ValueError):
    """Invalid user input: a table, a case file or an option.

    Parameters
    ----------
    message : str
        What is wrong and how to fix it.
    file : str, optional
        The file the value came from.
    row : int or str, optional
        Row number (1-based, counting the header as row 1) or row label.
    field : str, optional
        Column or key name.
    value : object, optional
        The offending value, shown in the message.
    """

    def __init__(
        self,
        message: str,
        *,
        file: str | None = None,
        row: int | str | None = None,
        field: str | None = None,
        value: object = None,
    ) -> None:
        self.file = None if file is None else str(file)
        self.row = row
        self.field = field
        self.value = value
        # one line, always: a message from a parser may carry line breaks
        self.reason = " ".join(str(message).split())
        super().__init__(self._compose())

    def _compose(self) -> str:
        where = []
        if self.file is not None:
            where.append(f"{self.file}")
        if self.row is not None:
            where.append(f"row {self.row}")
        if self.field is not None:
            where.append(f"field '{self.field}'")
        head = ", ".join(where)
        shown = "" if self.value is None else f" (got {_short(self.value)})"
        return f"{head}: {self.reason}{shown}" if head else f"{self.reason}{shown}"


def _short(value: object, limit: int = 120) -> str:
    text = repr(value)
    return text if len(text) <= limit else text[: limit - 3] + "..."


class SolverError(PlanetmixError, RuntimeError):
    """A numerical solver failed (not an infeasible problem, which is an answer)."""


class PlanetmixWarning(UserWarning):
    """Base class of planetmix warnings."""


class DiagnosticWarning(PlanetmixWarning):
    """A diagnostic threshold was crossed (convergence, fit quality, data coverage)."""
