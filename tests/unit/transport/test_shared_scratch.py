"""The species of a run share one flux-limiter scratch space (fe3d/transport/systems.py):
the species are corrected one after another and the scratch carries nothing between calls,
so sharing it must change no value. The reference is the same run with a scratch space of
its own for every species (a property of the code, not a published value): the fields must
be equal bit for bit."""

from __future__ import annotations

import numpy as np
from _two_species_strip import two_species_strip

from fe3d.case.parts import TransportInputs
from fe3d.pipeline import mesh_and_flow
from fe3d.transport.limiter import TargetFluxes
from fe3d.transport.run import run_transport, step_context
from fe3d.transport.systems import StepSystems


def _last_fields(case: object) -> dict[str, np.ndarray]:
    site, flow = mesh_and_flow(case)
    return list(run_transport(site, flow, TransportInputs.of(case)))[-1].concentration


def test_species_share_the_scratch_and_it_changes_no_value(monkeypatch) -> None:
    case = two_species_strip()
    site, flow = mesh_and_flow(case)
    ctx = step_context(site, flow, TransportInputs.of(case), None)
    for s in ctx.species:
        ctx.systems.operators(s, 0.0)
    fast, slow = (ctx.systems.limiter(s) for s in ctx.species)
    assert fast is not None and slow is not None and fast.work is slow.work
    shared = _last_fields(case)
    monkeypatch.setattr(StepSystems, "_limiter_scratch",
                        lambda self: np.empty(TargetFluxes.scratch_size(
                            self.site.pattern.nnz, self.site.n_nodes)))
    own = _last_fields(case)
    assert set(shared) == {"fast", "slow"}
    for name in shared:
        assert np.array_equal(shared[name], own[name]), name
        assert shared[name].max() > 0.0  # both species moved
    assert not np.array_equal(shared["fast"], shared["slow"])  # they differ (kd, source)
