"""Fields over the whole run: the largest concentration and the first time above the limit
at every node (theory.md O4), folded in after every time step by the transport loop."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from fe3d._typing import FloatArray

__all__ = ["RunWideField"]


@dataclass(frozen=True)
class RunWideField:
    """One species over the time steps so far, at every node, shape ``(n_nodes,)``.

    ``largest`` [kg/m³] the largest value and ``time_of_largest`` [s] the end of the step it
    was reached at; ``first_above`` [s] the first time above the limit, interpolated
    linearly between the two step ends around the crossing (NaN: never above; 0: above at
    the start)."""

    largest: FloatArray
    time_of_largest: FloatArray
    first_above: FloatArray

    @classmethod
    def start(cls, n_nodes: int) -> RunWideField:
        """Before the start."""
        return cls(np.full(n_nodes, -np.inf), np.full(n_nodes, np.nan),
                   np.full(n_nodes, np.nan))

    def add(self, conc: FloatArray, time: float, limit: float,
            previous: tuple[FloatArray, float] | None) -> RunWideField:
        """Fold in the field ``conc`` [kg/m³] at ``time`` [s]; ``previous`` is the field and
        time of the step before (None at the start). Returns a new record."""
        higher = conc > self.largest
        crossing = np.isnan(self.first_above) & (conc > limit)
        first = self.first_above.copy()
        if previous is None:
            first[crossing] = time
        else:
            c0, t0 = previous[0][crossing], previous[1]
            c1 = conc[crossing]
            share = np.clip((limit - c0) / (c1 - c0), 0.0, 1.0)  # c0 ≤ limit < c1
            first[crossing] = t0 + share * (time - t0)
        return RunWideField(largest=np.where(higher, conc, self.largest),
                            time_of_largest=np.where(higher, time, self.time_of_largest),
                            first_above=first)
