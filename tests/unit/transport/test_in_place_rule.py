"""Large bounded runs solve their step systems without copies of the free blocks
(fe3d/transport/systems.py, ``splittings_in_place``; fe3d/free_block.py), each solver
keeping a shorter window of earlier solutions (``IN_PLACE_WINDOW``). The reference is the
same run with copied splittings (a property of the code, not a published value): with the
same window the values are formed by the same expression and summed in the same order, so
the fields must be equal bit for bit; with the shorter window each solve starts elsewhere
and stops at the same relative residual. The rule's threshold is arithmetic on the measured
fit it names."""

from __future__ import annotations

import numpy as np
import pytest
from _two_species_strip import two_species_strip

from fe3d.case.builder import Solver
from fe3d.case.parts import TransportInputs
from fe3d.linalg import START_WINDOW
from fe3d.pipeline import mesh_and_flow
from fe3d.transport import systems
from fe3d.transport.run import run_transport, step_context
from fe3d.transport.systems import (
    IN_PLACE_SHARE,
    PEAK_WITH_COPIES,
    TARGET_TOLERANCE,
    splittings_in_place,
)

GiB = 2**30


def test_in_place_only_above_the_share_of_the_memory() -> None:
    fixed, per_node = PEAK_WITH_COPIES
    memory = 24 * GiB
    edge = (IN_PLACE_SHARE * memory - fixed) / per_node  # about 8.4 M nodes on 24 GiB
    assert 8.2e6 < edge < 8.6e6
    assert not splittings_in_place(int(edge) - 1, memory)
    assert splittings_in_place(int(edge) + 1, memory)
    assert not splittings_in_place(10**9, 0)  # the machine does not say: keep the copies


def _run(case: object, memory: int, monkeypatch: pytest.MonkeyPatch,
         ) -> tuple[bool, dict[str, np.ndarray]]:
    monkeypatch.setattr(systems, "machine_memory", lambda: memory)
    site, flow = mesh_and_flow(case)
    inputs = TransportInputs.of(case)
    in_place = step_context(site, flow, inputs, None).systems.in_place
    return in_place, list(run_transport(site, flow, inputs))[-1].concentration


def test_in_place_run_equals_the_copied_one_bit_for_bit(monkeypatch) -> None:
    # Gauss–Seidel-BiCGSTAB: the solver that reads the splitting (small models solve directly)
    case = two_species_strip(Solver(linear_solver="gauss_seidel"))
    copied_flag, copied = _run(case, 0, monkeypatch)  # memory unknown: copies
    short_flag, short = _run(case, 1, monkeypatch)  # one byte: every model is large
    monkeypatch.setattr(systems, "IN_PLACE_WINDOW", START_WINDOW)
    in_place_flag, in_place = _run(case, 1, monkeypatch)
    assert (copied_flag, short_flag, in_place_flag) == (False, True, True)
    for name in copied:
        assert np.array_equal(copied[name], in_place[name]), name
        assert copied[name].max() > 0.0
        # the short window changes where each solve starts, not the residual it stops at:
        # the low-order solve's 1e-10 and the target's TARGET_TOLERANCE (1e-4), which only
        # sets the limiter's raw fluxes; fields solved with target tolerances 1e-4 and 1e-6
        # differ by up to 1.1e-4 (Courant 1) and 5.1e-4 (Courant 10) of the source value
        # (docs/performance.md, systems.TARGET_TOLERANCE), so 10 × TARGET_TOLERANCE of the
        # largest value bounds a change of start
        scale = copied[name].max()
        assert np.max(np.abs(short[name] - copied[name])) <= 10 * TARGET_TOLERANCE * scale


def test_in_place_systems_take_gauss_seidel_whatever_the_automatic_choice(monkeypatch):
    """The free block in place exists for Gauss–Seidel's sweeps: with the automatic solver
    choice (which would factor this small strip, and whose probe picks AMG, a CSR copy and
    a hierarchy, on hard large systems) an in-place system is solved by Gauss–Seidel; with
    copies the automatic choice stands."""
    from fe3d.transport.step import BACKWARD_EULER

    case = two_species_strip()  # linear_solver "auto"
    site, flow = mesh_and_flow(case)
    inputs = TransportInputs.of(case)
    for memory, expected in ((1, "gauss_seidel"), (0, "direct")):
        monkeypatch.setattr(systems, "machine_memory", lambda m=memory: m)
        ctx = step_context(site, flow, inputs, None)
        s = ctx.species[0]
        assert ctx.systems.system(s, 3600.0, BACKWARD_EULER, ()).solver.method == expected
