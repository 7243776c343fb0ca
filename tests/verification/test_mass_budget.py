"""Mass budget closure of the transport solution (linear problems).

The budget is built from the consistent residual of the fixed-concentration rows, the
outflow weights and the decay weights (docs/theory.md T9); for a linear problem it closes
to the linear-solver tolerance. Target ≤ 1e-8 relative at every output time (issue
criterion; common practice, no source).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from fe3d.case.load import load_case
from fe3d.pipeline import mesh_and_flow
from fe3d.transport.run import run_transport

pytestmark = pytest.mark.verification

TINY = Path(__file__).parents[2] / "cases" / "tiny" / "case.toml"


@pytest.mark.parametrize("scheme", ["backward_euler", "crank_nicolson"])
@pytest.mark.parametrize("solver", ["direct", "iterative"])
def test_mass_budget_closes_every_output_time(scheme, solver):
    case = load_case(TINY)
    case = case.model_copy(update={
        "time": case.time.model_copy(update={"scheme": scheme}),
        "solver": case.solver.model_copy(update={"linear_solver": solver}),
    })
    site, flow = mesh_and_flow(case)
    snaps = list(run_transport(site, flow, case))
    assert len(snaps) == 1 + len(case.output_schedule())
    for snap in snaps:
        b = snap.budgets["tracer"]
        assert b.relative_error <= 1e-8, (snap.time, b)
    final = snaps[-1].budgets["tracer"]
    # every term is active in this case: the budget is not trivially zero
    assert final.source_input > 0
    assert final.decayed > 0
    assert final.sorbed > 0
    assert final.dissolved > 0
    # stored = initial + input - outflow - decayed, each term non-negative
    assert min(final.outflow.values()) >= 0.0
    assert np.isfinite(final.imbalance)
