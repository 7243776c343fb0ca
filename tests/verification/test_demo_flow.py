"""The demo site's water budget closes (issue target ≤ 1e-8 relative; design target of the
consistent residual flux, Hughes et al. 2000)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from fe3d.case.load import load_case
from fe3d.pipeline import mesh_and_flow

DEMO = Path(__file__).parents[2] / "cases" / "demo" / "case.toml"


@pytest.mark.slow
def test_demo_flow_budget_closes():
    case = load_case(DEMO)
    _, flow = mesh_and_flow(case, base_dir=DEMO.parent)
    assert flow.total_inflow > 0
    assert flow.discrepancy <= 1e-8
    assert np.all(np.isfinite(flow.head))
    # every well's head is reported
    assert set(flow.well_heads) == {w.name for w in case.wells}
