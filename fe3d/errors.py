"""Typed errors. The library raises these; only :mod:`fe3d.cli` turns them into exit codes."""

from __future__ import annotations

__all__ = ["MAX_ERROR_LINES", "CaseError", "CaseErrors", "Fe3dError", "MeshError",
           "NewtonError", "SolverError"]

MAX_ERROR_LINES = 20
"""Most problems shown one line each; the rest are counted in one closing line (a case
with 200,000 bad materials must not print 800,000 lines)."""

MAX_SHOWN_VALUE = 300
"""Most characters of a value shown in an error line (a 2 MB title is not echoed; a long
file path still is)."""


def _shown(value: object) -> str:
    """``value`` as an error line shows it: strings quoted with control characters escaped
    (``repr``), at most :data:`MAX_SHOWN_VALUE` characters."""
    text = repr(value) if isinstance(value, str) else str(value)
    if len(text) > MAX_SHOWN_VALUE:
        text = f"{text[:MAX_SHOWN_VALUE - 1]}… ({len(text):,} characters)"
    return text


class Fe3dError(Exception):
    """Base class of every error fe3d raises on purpose."""


class CaseError(Fe3dError):
    """One problem with the case file: the key path, the value found and what is allowed."""

    def __init__(self, key_path: str, value: object, allowed: str) -> None:
        self.key_path = key_path
        self.value = value
        self.allowed = allowed
        super().__init__(self.line())

    def line(self) -> str:
        """The one-line message shown to the user."""
        key = self.key_path
        if len(key) > MAX_SHOWN_VALUE:  # a key path holds names from the file
            key = f"{key[:MAX_SHOWN_VALUE - 1]}…"
        return f"{key} = {_shown(self.value)}: {self.allowed}"


class CaseErrors(Fe3dError):
    """Several case problems found at once; one line each."""

    def __init__(self, errors: list[CaseError]) -> None:
        self.errors = errors
        super().__init__("\n".join(self.lines()))

    def lines(self, limit: int = MAX_ERROR_LINES) -> list[str]:
        """One line per problem, the first ``limit`` only, then ``… and K more errors``."""
        shown = [e.line() for e in self.errors[:limit]]
        if len(self.errors) > limit:
            shown.append(f"… and {len(self.errors) - limit:,} more errors")
        return shown


class MeshError(Fe3dError):
    """The mesh cannot be built or is invalid (inverted cells, empty regions)."""


class SolverError(Fe3dError):
    """A numerical failure: no convergence, a NaN, a singular system."""


class NewtonError(SolverError):
    """Newton's method failed (no convergence, failed line search, non-finite value).

    ``residual_norms`` holds the residual norm of every iterate reached, for the solver log.
    """

    def __init__(self, message: str, residual_norms: list[float] | None = None) -> None:
        self.residual_norms = list(residual_norms or [])
        super().__init__(message)
