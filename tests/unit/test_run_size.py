"""Guards before work (issue 15, part 3): the size of a run from the case alone, and a run
that cannot fit refused with its numbers. Behaviour requirements of the issue; the memory
model is fe3d's own measurement (docs/performance.md)."""

from __future__ import annotations

import csv
from pathlib import Path

import pytest

from fe3d.case.builder import with_changes
from fe3d.case.load import load_case
from fe3d.errors import CaseError
from fe3d.mesh.build import build_mesh
from fe3d.run_size import MiB, check_fits, estimate_run

TINY = Path(__file__).parents[2] / "cases" / "tiny" / "case.toml"


def test_the_tiny_case_estimate_against_its_run(tmp_path):
    """Steps: 2 yr in 20 d steps landing on the 0.5 yr output times is 4 × ⌈182.625/20⌉ = 40,
    exactly the rows a run writes after t = 0; nodes within a factor 2 of the mesh as
    written (the estimate counts plan triangles from the cell sizes; common practice, no
    source)."""
    case = load_case(TINY)
    size = estimate_run(case)
    assert size.steps == 40
    assert size.output_times == 5  # t = 0 and four output times
    site = build_mesh(case)
    assert 0.5 <= size.nodes / site.n_nodes <= 2.0, (size.nodes, site.n_nodes)
    assert any("40 steps" in line or "steps: 40" in line for line in size.lines())
    from fe3d.pipeline import run_case

    run_case(case, tmp_path / "run", base_dir=TINY.parent)
    with (tmp_path / "run" / "histories.csv").open(encoding="utf-8") as f:
        rows = [r for r in csv.reader(f) if r and not r[0].startswith("#")]
    assert len(rows) - 2 == size.steps  # header and t = 0


def test_a_run_that_cannot_fit_is_refused_with_its_numbers(tmp_path):
    """One-second steps over 30 yr: about 9.5e8 steps, refused on a 24 GiB machine before
    any work (it used to build the step list until memory ran out)."""
    case = with_changes(load_case(TINY), time={"end": "30 yr", "step": "1 s",
                                               "output_interval": "1 yr"})
    size = estimate_run(case)
    assert size.steps > 9e8
    with pytest.raises(CaseError) as info:
        check_fits(size, tmp_path, memory=24 * 1024 * MiB)
    err = info.value
    assert err.key_path == "--force"
    assert f"{size.steps:,} steps" in err.allowed and "24,576 MiB" in err.allowed
    check_fits(estimate_run(load_case(TINY)), tmp_path, memory=24 * 1024 * MiB)  # fits


def test_the_checkpoint_estimate_covers_a_real_checkpoint(tmp_path):
    """A tiny-case run stopped after 12 steps (past its first output time) leaves a
    checkpoint whose files are no larger than the estimate's share for them at the real node
    count: CHECKPOINT_ARRAYS plus OUTPUT_ARRAYS per output time kept, float64 per node and
    species (the ``.npz`` headers are a few kB: the budget below allows 16 kB)."""
    from fe3d.case.parts import TransportInputs
    from fe3d.pipeline import mesh_and_flow
    from fe3d.run_size import CHECKPOINT_ARRAYS, OUTPUT_ARRAYS
    from fe3d.transport.checkpoint import Checkpointer
    from fe3d.transport.run import run_transport

    case = load_case(TINY)
    site, flow = mesh_and_flow(case)
    keeper = Checkpointer(tmp_path, case="tiny")
    count = [0]

    def stop(_t: float, _end: float) -> None:
        count[0] += 1
        if count[0] == 12:
            raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        for k, snap in enumerate(run_transport(site, flow, TransportInputs.of(case),
                                               checkpoints=keeper, on_step=stop)):
            keeper.add_output(k, snap)
    kept = len(list(tmp_path.glob("output_*.npz")))
    assert kept >= 2  # t = 0 and the first output time
    written = sum(p.stat().st_size for p in tmp_path.iterdir())
    budget = site.n_nodes * len(case.species) * 8 * (CHECKPOINT_ARRAYS + OUTPUT_ARRAYS * kept)
    assert written <= budget + 16_000, (written, budget)


def test_a_model_too_large_for_copies_is_estimated_in_place():
    """A bounded run whose copies would need more than IN_PLACE_SHARE of the machine solves
    its steps in place (fe3d.transport.systems.splittings_in_place) and is estimated with
    that mode's measured fit, PEAK_IN_PLACE (fe3d's own measurement, docs/performance.md):
    the tiny case at 0.095 m cells and 0.1 m layers (about 10 M nodes) on a 24 GiB machine,
    where copies would be refused and in place fits, against a machine large enough for
    copies; arithmetic on the two fits, so exact to round-off."""
    from fe3d.transport.systems import PEAK_IN_PLACE, PEAK_WITH_COPIES

    case = with_changes(load_case(TINY), mesh={
        "cell_size": "0.095 m", "fine_cell_size": "0.095 m", "layer_cell_thickness": "0.1 m"})
    small, large = 24 * 1024 * MiB, 1 << 50
    in_place, copies = estimate_run(case, memory=small), estimate_run(case, memory=large)
    assert in_place.nodes == copies.nodes > 1e7
    (fixed_i, node_i), (fixed_c, node_c) = PEAK_IN_PLACE, PEAK_WITH_COPIES
    expected = fixed_i - fixed_c + in_place.nodes * (node_i - node_c)
    assert in_place.memory - copies.memory == pytest.approx(expected, rel=1e-9)
    from fe3d.run_size import MEMORY_SHARE

    assert copies.memory > MEMORY_SHARE * small > in_place.memory
