"""Per-species mass budget, accumulated step by step (theory.md T9)."""

from __future__ import annotations

from dataclasses import dataclass, field

__all__ = ["MassBudget"]


@dataclass(frozen=True)
class MassBudget:
    """Cumulative mass balance of one species from t = 0 to ``time`` [kg, s].

    ``stored`` = dissolved + sorbed. The balance reads
    stored − initial = source_input + produced − Σ outflow − decayed (``produced``: made by
    the decay of the species' parent, T12); ``relative_error`` is the left minus the right
    side over the largest of stored, initial and cumulative input.
    """

    species: str
    time: float
    dissolved: float
    sorbed: float
    initial: float
    source_input: float
    produced: float = 0.0
    outflow: dict[str, float] = field(default_factory=dict)
    decayed: float = 0.0

    @property
    def stored(self) -> float:
        """Dissolved plus sorbed mass [kg]."""
        return self.dissolved + self.sorbed

    @property
    def total_outflow(self) -> float:
        """Mass that left through all boundaries [kg]."""
        return sum(self.outflow.values())

    @property
    def imbalance(self) -> float:
        """Absolute closure error [kg]."""
        return (self.stored - self.initial) - (self.source_input + self.produced
                                               - self.total_outflow - self.decayed)

    @property
    def relative_error(self) -> float:
        """Closure error relative to the largest mass involved [-]."""
        scale = max(abs(self.stored), abs(self.initial),
                    abs(self.source_input) + abs(self.produced), 1e-300)
        return abs(self.imbalance) / scale
