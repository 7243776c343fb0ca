"""A bounded run frees each species' per-cell coefficients once its operators are built
(``StepContext.set_up``; 32 bytes per cell and species). The reference is the same run
with the coefficients kept (a property of the code, not a published value): the steps never
read them again, so the fields must be equal bit for bit."""

from __future__ import annotations

import numpy as np
import pytest
from _two_species_strip import two_species_strip

from fe3d.case.builder import Solver
from fe3d.case.parts import TransportInputs
from fe3d.pipeline import mesh_and_flow
from fe3d.transport.run import run_transport, step_context
from fe3d.transport.step import StepContext
from fe3d.transport.systems import cell_coefficients


def test_bounded_run_frees_the_coefficients_and_keeps_its_fields(monkeypatch) -> None:
    case = two_species_strip(Solver(linear_solver="gauss_seidel"))
    site, flow = mesh_and_flow(case)
    inputs = TransportInputs.of(case)
    ctx = step_context(site, flow, inputs, None)
    lean = ctx.set_up()
    assert all(s.coefficients is not None for s in ctx.species)
    assert all(s.coefficients is None for s in lean.species)
    assert [s.courant_rate for s in lean.species] == [s.courant_rate for s in ctx.species]
    with pytest.raises(RuntimeError, match="freed after the run's set-up"):
        cell_coefficients(lean.species[0])
    freed = list(run_transport(site, flow, inputs))[-1].concentration
    monkeypatch.setattr(StepContext, "set_up", lambda self: self)  # keep them
    kept = list(run_transport(site, flow, inputs))[-1].concentration
    for name in kept:
        assert np.array_equal(freed[name], kept[name]), name
        assert kept[name].max() > 0.0


def test_supg_and_shock_capturing_runs_keep_them() -> None:
    """SUPG rebuilds its operators for a new step length and shock capturing reads the
    coefficients at every step: there the context is left as it is."""
    for solver in (Solver(monotone=False), Solver(shock_capturing=True, monotone=False)):
        case = two_species_strip(solver)
        site, flow = mesh_and_flow(case)
        ctx = step_context(site, flow, TransportInputs.of(case), None)
        assert ctx.set_up() is ctx
