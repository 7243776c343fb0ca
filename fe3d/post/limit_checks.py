"""Checks of a run's concentrations against each species' limit; pure numpy, no mesh.

Two questions a reviewer asks of every species, daughters included:

- How far below zero and how far above its physical upper bound did the field go, in
  multiples of the limit (:func:`species_extremes`)? A daughter of a decay chain has no
  source of its own, so a rule measured against the source strength says nothing for it;
  a rule measured against the limit does.
- Does the part above the limit reach a model boundary where no water leaves
  (:func:`boundary_contacts`)? There the boundary cuts the plume: either the model is too
  small or the face is a real no-flow boundary (the base of the aquifer) that the plume
  spreads along.

The functions take plain arrays and numbers [SI] and return new records; the run's writer
(:class:`fe3d.post.outputs.SeriesWriter`) feeds them snapshot by snapshot.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping
from dataclasses import dataclass

import numpy as np

from fe3d._typing import BoolArray, FloatArray, IndexArray

__all__ = [
    "NEGLIGIBLE_SHARE_OF_LIMIT",
    "BoundaryContact",
    "SpeciesExtremes",
    "boundary_contacts",
    "first_times_above",
    "is_significant",
    "outflow_nodes",
    "species_extremes",
    "upper_bound",
    "widen_window",
]

#: Excursions (below zero, above the upper bound) smaller than this share of the limit are
#: not reported as warnings: they cannot move the answer "above or below the limit" by more
#: than 1 % of the limit. Common practice, no source.
NEGLIGIBLE_SHARE_OF_LIMIT = 0.01

Window = tuple[float, float]


def is_significant(excess: float, limit: float) -> bool:
    """True when an excursion ``excess`` ≥ 0 [kg/m³] exceeds 1 % of ``limit`` [kg/m³]."""
    return excess > NEGLIGIBLE_SHARE_OF_LIMIT * limit


def upper_bound(values: Iterable[float], *, has_parent: bool,
                has_mass_loading: bool) -> float | None:
    """The largest concentration a species can physically reach [kg/m³], or None.

    Without a parent and without a mass-loading source, advection, dispersion, sorption and
    decay create no new maximum: the bound is the largest of ``values`` (source, initial,
    injected and initial-plume concentrations; 0 when empty). A mass loading injects a rate,
    not a concentration, so it has no such bound. Neither does a daughter: its production
    follows the parent's total (dissolved and, when the sorbed phase decays, sorbed) mass,
    so a strongly sorbed parent can feed more daughter into the water than its dissolved
    concentration times the yield. For those, only the largest value is reported.
    """
    if has_parent or has_mass_loading:
        return None
    return max(values, default=0.0)


def widen_window(window: Window | None, old: float, new: float, t_before: float, t: float, *,
                 lower: bool) -> Window | None:
    """The output-time interval in which a running extreme was last reached.

    ``old`` and ``new`` are the running extreme [kg/m³] at output times ``t_before`` and
    ``t`` [s]; when ``new`` goes beyond ``old`` (below it if ``lower``), the extreme was
    reached in ``(t_before, t]``, otherwise ``window`` stands.
    """
    moved = new < old if lower else new > old
    return (t_before, t) if moved else window


def first_times_above(first: FloatArray, values: FloatArray, limit: float,
                      time: float) -> FloatArray:
    """First output time each node was above ``limit`` [s] (NaN: not yet).

    ``first`` holds the times so far and ``values`` the concentrations at output time
    ``time``, on the same nodes (shape ``(n,)``); returns a new array.
    """
    return np.where(np.isnan(first) & (values > limit), time, first)


def outflow_nodes(n_nodes: int, face_outflow: Mapping[str, FloatArray],
                  exchange: Mapping[str, FloatArray]) -> BoolArray:
    """Nodes where water leaves the model, shape ``(n_nodes,)``.

    ``face_outflow`` maps each fixed-head face to the outward water flux at its nodes
    [m³/s] (≥ 0, zero where the water enters); ``exchange`` maps every other budget item
    (wells, recharge, flux faces, streams, drains) to its nodal inflow [m³/s] (negative
    where water leaves).
    """
    leaves = np.zeros(n_nodes, dtype=bool)
    for w in face_outflow.values():
        leaves |= w > 0.0
    for f in exchange.values():
        leaves |= f < 0.0
    return leaves


@dataclass(frozen=True)
class BoundaryContact:
    """The part of ``species`` above its limit touches ``face`` at nodes where no water
    leaves, first at output time ``first_time`` [s]."""

    species: str
    face: str
    first_time: float


def boundary_contacts(species: str, first_above: FloatArray, faces: Mapping[str, IndexArray],
                      leaves: BoolArray) -> list[BoundaryContact]:
    """Faces where the part above the limit touches nodes that let no water out.

    ``first_above`` is the first output time each node was above the limit [s] (NaN:
    never), shape ``(n_nodes,)``; ``faces`` maps a face name to node ids (any shape, e.g.
    its triangles ``(3, k)``); ``leaves`` marks the nodes where water leaves
    (:func:`outflow_nodes`). Faces are returned in the order of ``faces``.
    """
    out = []
    for face, nodes in faces.items():
        ids = np.unique(nodes)
        t = first_above[ids[~leaves[ids]]]
        t = t[~np.isnan(t)]
        if t.size:
            out.append(BoundaryContact(species, face, float(t.min())))
    return out


@dataclass(frozen=True)
class SpeciesExtremes:
    """Lowest and highest value of one species over the run, measured against its limit.

    Concentrations in [kg/m³], points [m], times [s]. ``lowest_between`` and
    ``highest_between`` are the output times between which the extreme was reached (None:
    never below zero / not known). ``upper_bound`` is None for a daughter or a
    mass-loading species (:func:`upper_bound`); then ``overshoot`` is None too.
    ``below_zero_in_limits`` = max(0, −lowest) / limit and ``overshoot_in_limits`` =
    overshoot / limit [-].
    """

    species: str
    limit: float
    lowest: float
    lowest_at: tuple[float, ...] | None
    lowest_between: Window | None
    highest: float
    highest_at: tuple[float, ...] | None
    highest_between: Window | None
    upper_bound: float | None
    below_zero_in_limits: float
    overshoot: float | None
    overshoot_in_limits: float | None

    @property
    def negative_is_significant(self) -> bool:
        """The lowest value lies more than 1 % of the limit below zero."""
        return is_significant(-self.lowest, self.limit)

    @property
    def overshoot_is_significant(self) -> bool:
        """The highest value lies more than 1 % of the limit above the upper bound."""
        return self.overshoot is not None and is_significant(self.overshoot, self.limit)


def species_extremes(species: str, limit: float, *,
                     lowest: tuple[float, tuple[float, ...] | None],
                     highest: tuple[float, tuple[float, ...] | None],
                     lowest_between: Window | None = None,
                     highest_between: Window | None = None,
                     bound: float | None = None) -> SpeciesExtremes:
    """Build :class:`SpeciesExtremes` from the run's (value, point) extremes.

    ``lowest`` and ``highest`` are (value [kg/m³], point [m] or None); a highest value of
    −inf (no step taken) counts as 0.
    """
    top = highest[0] if math.isfinite(highest[0]) else 0.0
    over = None if bound is None else max(0.0, top - bound)
    return SpeciesExtremes(
        species=species, limit=limit, lowest=lowest[0], lowest_at=lowest[1],
        lowest_between=lowest_between, highest=top, highest_at=highest[1],
        highest_between=highest_between, upper_bound=bound,
        below_zero_in_limits=max(0.0, -lowest[0]) / limit, overshoot=over,
        overshoot_in_limits=None if over is None else over / limit)
