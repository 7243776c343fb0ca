"""Concentrations and entered mass of the site-scale patch source, fe3d's defaults, 5 m cells.

The outside audit of issue 11: the patch site of ``_patch_source.PatchSite`` (a 40 m × 10 m
patch held at 20 mg/L on the inflow face of a sand, receptors 100, 200 and 300 m down)
with α_L = 2.5 m, α_T = 0.25 m and a 5 m corridor drawn by hand with 1 m cell layers, as
a practitioner would mesh it, and otherwise fe3d's defaults (no solver options, no
``time.step``, the plume corridor on). ``test_patch_source.py`` checks the first time above
the limit on a coarser mesh (20 m cells, 2 m layers); this module checks what a report
quotes beside it: the concentration at the receptors after 2 and 4 years, and the solute
mass that entered.

References: Wexler, E.J. (1992), *Analytical solutions for one-, two-, and three-dimensional
solute transport in ground-water systems with uniform flow*, USGS TWRI 3-B7, the finite
patch source (as used by West, Kueper & Ungs 2007, *On the use and error of approximation in
the Domenico (1987) solution*, Ground Water 45(2), who call it exact; citation from memory),
evaluated and checked in ``_patch_source.py``. The model's north face (y = 100 m) and base
(z = −20 m) are no-flux planes; by 4 yr the plume feels the base at 300 m (their images
raise the exact value there by 3.9 %), so the reference includes them
(``PatchSite.reference(walls=True)``). The entered mass is ``_patch_source.entered_mass``
(the closed-form net inflow of the exact problem).

Tolerances. Concentrations: 5 % of the exact value where it is above the limit (issue 11's
audit threshold for a peak, a project target, no published source). Entered mass: 2 % of
the exact net inflow (issue 11, "sources the size they are"). The two problems are not the
same on the inflow face outside the patch: the reference holds c = 0 there, so solute that
disperses sideways out of the patch leaves through the plane; fe3d lets clean water in with
zero total solute flux there (theory.md T3), so it does not. fe3d's entered mass is larger
by part of the reference's outward dispersive flux, which scales with α_T; it is one reason
the values below are above exact. The budget closes to 1e-8 (theory.md T9) and no value
falls below −1e-10 c0 (the solver tolerance; issue 11 "Bounds").

Measured when written (74,130 nodes, 291 steps, about 35 s on a shared machine): at 100,
200 and 300 m, +1.05 %, +2.92 % and (below the limit) at 2 yr; +1.04 %, +0.92 %, +0.80 %
at 4 yr; entered +1.86 %; first times −1.6 %, −0.75 %, −0.49 %. With the step 0.1 yr given
(Courant 6.6) the first times are −37 %, −13 %, −7.6 % (−47 %, −17 %, −8.8 % before the
limiter's bounds took in cⁿ, and −72 %, −40 %, −26 % before its passes ran longer, both
3 Dec 2026) and the run warns; not tested here.
"""

from __future__ import annotations

import numpy as np
import pytest
from _patch_source import YEAR, PatchSite, patch_concentration

from fe3d.case.builder import with_changes
from fe3d.case.parts import TransportInputs
from fe3d.pipeline import mesh_and_flow
from fe3d.transport.run import run_transport

pytestmark = pytest.mark.verification

SITE = PatchSite(alpha_l=2.5, alpha_t=0.25, fine_cell=5.0, dz=1.0)


@pytest.mark.slow
def test_receptor_concentrations_and_entered_mass_with_default_settings():
    """Concentrations at the stored steps nearest 2 and 4 yr (the exact solution is taken at
    the same times) within 5 % of exact where above the limit; entered mass within 2 % of
    the exact net inflow (module docstring)."""
    case = with_changes(SITE.case(step=0.1), time={"step": None})
    assert case.solver.monotone and case.solver.flux_limiting and case.mesh.corridor
    site, flow = mesh_and_flow(case)
    *_, last = run_transport(site, flow, TransportInputs.of(case))
    budget = last.budgets["solvent"]
    assert budget.relative_error <= 1e-8, budget
    c0 = SITE.c0 * 1e-3  # [kg/m³]
    assert float(last.diagnostics.min_concentration["solvent"][0]) >= -1e-10 * c0
    times, hist = last.history_times, last.history["solvent"] / c0
    reference = SITE.reference(walls=True)
    rows, checked = [], []
    for years in (2.0, 4.0):
        i = int(np.argmin(np.abs(times - years * YEAR)))
        for k, x in enumerate(SITE.receptors):
            exact = float(patch_concentration(x, 0.0, SITE.receptor_z, times[i], **reference))
            error = (hist[i, k] - exact) / exact
            rows.append(f"{times[i] / YEAR:.3f} yr, {x:.0f} m: fe3d {hist[i, k]:.5g} "
                        f"exact {exact:.5g} c/c0, error {100 * error:+.2f} %")
            if exact > SITE.limit_ratio:
                checked.append(error)
    advective, dispersive = SITE.exact_entered()
    entered_error = budget.source_input / (advective + dispersive) - 1.0
    rows.append(f"entered: fe3d {budget.source_input:.5g} kg, exact "
                f"{advective + dispersive:.5g} kg, error {100 * entered_error:+.2f} %")
    table = "\n".join(rows)
    assert len(checked) >= 5, table
    assert max(abs(e) for e in checked) <= 0.05, table
    assert abs(entered_error) <= 0.02, table
