"""Snapshot: what the transport run yields at every output time."""

from __future__ import annotations

from dataclasses import dataclass

from fe3d._typing import FloatArray
from fe3d.transport.accumulate import TransportDiagnostics
from fe3d.transport.budget import MassBudget

__all__ = ["Snapshot"]


@dataclass(frozen=True)
class Snapshot:
    """State at one output time.

    ``concentration`` maps species → nodal concentration [kg/m³]; ``history_times`` [s] and
    ``history`` (species → array ``(n_times, n_observations)`` [kg/m³]) hold every step so far.
    """

    time: float
    concentration: dict[str, FloatArray]
    budgets: dict[str, MassBudget]
    history_times: FloatArray
    history: dict[str, FloatArray]
    diagnostics: TransportDiagnostics
