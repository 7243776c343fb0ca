"""Typed errors. The library raises these; only :mod:`fe3d.cli` turns them into exit codes."""

from __future__ import annotations

__all__ = ["CaseError", "CaseErrors", "Fe3dError", "MeshError", "NewtonError", "SolverError"]


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
        shown = repr(self.value) if isinstance(self.value, str) else str(self.value)
        return f"{self.key_path} = {shown}: {self.allowed}"


class CaseErrors(Fe3dError):
    """Several case problems found at once; one line each."""

    def __init__(self, errors: list[CaseError]) -> None:
        self.errors = errors
        super().__init__("\n".join(e.line() for e in errors))


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
