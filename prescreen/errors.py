"""Exceptions and warnings raised by prescreen.

Every error a user can cause is an :class:`InputError` (or a subclass) that names
where the problem is (file, line or entry), the offending value and what was
expected, so the message alone is enough to fix the input.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

__all__ = [
    "PrescreenError",
    "InputError",
    "SchemaMismatchError",
    "CampaignError",
    "LabellingError",
    "PrescreenWarning",
    "Rejection",
]


class PrescreenError(Exception):
    """Base class of every error raised on purpose by prescreen."""


class InputError(PrescreenError, ValueError):
    """Bad user input: a file, a line or an entry that cannot be used.

    Parameters
    ----------
    message
        What is wrong, in plain words.
    path
        The file (or database, folder) the input came from, if any.
    line
        The 1-based line number, frame number or entry key, if known.
    value
        The offending value, if there is one.
    expected
        What would have been accepted.
    """

    def __init__(
        self,
        message: str,
        *,
        path: str | Path | None = None,
        line: int | str | None = None,
        value: Any = None,
        expected: str | None = None,
    ) -> None:
        self.reason = message
        self.path = None if path is None else str(path)
        self.line = line
        self.value = value
        self.expected = expected
        super().__init__(self._render())

    def _render(self) -> str:
        where = ""
        if self.path is not None:
            where = self.path
            if self.line is not None:
                where += f":{self.line}"
            where += ": "
        elif self.line is not None:
            where = f"entry {self.line}: "
        text = where + self.reason
        if self.value is not None:
            shown = repr(self.value)
            if len(shown) > 80:
                shown = shown[:77] + "..."
            text += f" (got {shown}"
            text += f"; expected {self.expected})" if self.expected else ")"
        elif self.expected:
            text += f" (expected {self.expected})"
        return text


class SchemaMismatchError(PrescreenError):
    """A model or cache was built with a feature schema that differs from the current one."""


class CampaignError(PrescreenError):
    """A campaign folder is missing, damaged or used in a way it does not allow."""


class LabellingError(PrescreenError):
    """A DFT labelling calculation failed; the message says which structure and why."""


class NoDirectGap(LabellingError):
    """The occupied and empty bands with spin-orbit coupling touch at some k point, so the
    occupied states, and a Z2 invariant of them, are not defined there.

    ``gap_eV`` is the smallest direct gap found (eV). ``odd_count`` is True when the
    cause is an odd number of valence electrons (the last occupied state meets its
    Kramers partner at the time-reversal-invariant momenta) rather than a computed gap.
    """

    def __init__(self, message: str, gap_eV: float, *, odd_count: bool = False) -> None:
        super().__init__(message)
        self.gap_eV = float(gap_eV)
        self.odd_count = bool(odd_count)


class PrescreenWarning(UserWarning):
    """Something the user should know about that does not stop the work."""


@dataclass(frozen=True)
class Rejection:
    """One input entry that was refused, kept so that it can be reported.

    Attributes
    ----------
    path
        File the entry came from.
    line
        1-based line, frame index or database key of the entry (``None`` when the whole
        file was refused).
    value
        The offending value, shortened for display.
    reason
        Why it was refused and what was expected.
    """

    path: str
    line: int | str | None
    value: str
    reason: str

    @classmethod
    def from_error(cls, exc: InputError) -> "Rejection":
        value = "" if exc.value is None else str(exc.value)[:200]
        reason = exc.reason + (f"; expected {exc.expected}" if exc.expected else "")
        return cls(path=exc.path or "", line=exc.line, value=value, reason=reason)

    def __str__(self) -> str:
        where = self.path + (f":{self.line}" if self.line is not None else "")
        return f"{where}: {self.reason} (got {self.value!r})"
