"""Snapshot: what the transport run yields at every output time."""

from __future__ import annotations

from dataclasses import dataclass

from fe3d._typing import FloatArray
from fe3d.transport.accumulate import TransportDiagnostics
from fe3d.transport.budget import MassBudget
from fe3d.transport.run_wide import RunWideField

__all__ = ["Snapshot"]


@dataclass(frozen=True)
class Snapshot:
    """State at one output time.

    ``concentration`` maps species → nodal concentration [kg/m³]; ``history_times`` [s] and
    ``history`` (species → array ``(n_times, n_rows)`` [kg/m³], one column per row of the
    observation operator: the observation points, then any extra rows the run was given)
    hold every step so far; ``over_run`` (species → :class:`RunWideField`) the largest value
    and first time above the limit at every node over every step so far.
    """

    time: float
    concentration: dict[str, FloatArray]
    budgets: dict[str, MassBudget]
    history_times: FloatArray
    history: dict[str, FloatArray]
    diagnostics: TransportDiagnostics
    over_run: dict[str, RunWideField]
