"""Drawdown of the pumping wells: the head the site would have without its extraction and
injection wells, less the head with them (the steady flow of theory.md F1–F7 solved twice).

A pure function of the stage's own inputs: it solves the same steady flow again with the
wells taken out (observation wells, which move no water, stay) and returns the difference.
Positive where pumping lowers the head, negative where injection raises it.
"""

from __future__ import annotations

import logging
from dataclasses import replace
from pathlib import Path

import numpy as np

from fe3d._typing import FloatArray
from fe3d.case.parts import FlowInputs
from fe3d.flow.solve import FlowField, solve_flow
from fe3d.linalg import SpdPreconditioner
from fe3d.mesh.site_mesh import SiteMesh

__all__ = ["moves_water", "well_drawdown", "without_pumping"]

logger = logging.getLogger(__name__)


def moves_water(inputs: FlowInputs) -> bool:
    """Whether any extraction or injection well has a non-zero rate."""
    return any(w.kind != "observation" and w.rate != 0.0 for w in inputs.wells)


def without_pumping(inputs: FlowInputs) -> FlowInputs:
    """A copy of ``inputs`` without its extraction and injection wells (observation wells
    stay); ``inputs`` is not changed."""
    return replace(inputs, wells=tuple(w for w in inputs.wells if w.kind == "observation"))


def well_drawdown(site: SiteMesh, inputs: FlowInputs, pumped: FlowField, *,
                  base_dir: Path | None = None,
                  preconditioner: SpdPreconditioner | None = None) -> FloatArray:
    r"""Drawdown :math:`s = h_0 - h` [m] at the nodes, shape ``(n_nodes,)``.

    Parameters
    ----------
    site
        The mesh ``pumped`` was solved on.
    inputs
        The flow inputs ``pumped`` was solved with.
    pumped
        The flow with the wells, :math:`h` [m].
    base_dir
        Folder against which relative file names in the case resolve (as for
        :func:`~fe3d.flow.solve.solve_flow`).
    preconditioner
        The AMG hierarchy ``pumped`` was solved with (the object passed to its
        :func:`~fe3d.flow.solve.solve_flow` call): the wells change only the right-hand
        side, not the matrix, so the second solve reuses it and costs CG iterations only.
        Without it the second solve builds its own.

    Returns
    -------
    FloatArray
        :math:`h_0 - h` [m], where :math:`h_0` solves the same flow without the extraction
        and injection wells; zeros (and no solve) when no well moves water.

    Notes
    -----
    For a linear problem (no drain, whose active set depends on the head) the drawdown is
    the response to the wells alone, with zero drawdown on every fixed head.
    """
    if not moves_water(inputs):
        return np.zeros(site.n_nodes)
    natural = solve_flow(site, without_pumping(inputs), base_dir=base_dir,
                         preconditioner=preconditioner)
    drawdown = natural.head - pumped.head
    logger.info("drawdown: largest %.4g m, smallest %.4g m (%d CG iterations)",
                float(drawdown.max()), float(drawdown.min()), natural.solver_iterations)
    return drawdown
