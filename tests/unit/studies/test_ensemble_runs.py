"""Running ensembles: a LocalCluster of 2 workers, resuming an interrupted study, refusing a
folder of another study, failed members kept with their drawn values.

No published reference: the checks are identities (a resumed study equals an uninterrupted
one value for value; a member's results do not depend on the process that ran it).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from fe3d.case.builder import (
    Layer,
    Material,
    ObservationPoint,
    Source,
    Species,
    Time,
    box_case,
    with_changes,
)
from fe3d.case.schema import Case
from fe3d.errors import CaseError
from fe3d.studies.ensemble import MemberFailure, run_ensemble
from fe3d.studies.ensemble_results import (
    probability_fields,
    summarise_ensemble,
    write_ensemble_tables,
)
from fe3d.studies.executors import SerialExecutor, StudyExecutor, study_executor

N = 8


def _case(*, seed: int = 3, porosity: dict | None = None) -> Case:
    values = [{"name": "materials.sand.horizontal_conductivity", "distribution": "lognormal",
               "median": 10.0, "ln_std_dev": 0.5, "unit": "m/d"},
              porosity or {"name": "materials.sand.porosity", "distribution": "uniform",
                           "low": 0.2, "high": 0.3}]
    case = box_case(
        length=20.0, width=1.0, cell=1.0, dz=1.0, heads={"west": 0.5, "east": 0.0},
        layers=[Layer("sand", -1.0, Material(10.0, porosity=0.25))],
        species=[Species(limit=100.0)],
        sources=[Source("inlet", shape="face_patch", face="west", concentration=1000.0)],
        observation_points=[ObservationPoint("P", 5.0, 0.5, -0.5)],
        time=Time(6.0, 0.5), sections={"uncertain": {"seed": seed, "values": values}})
    return with_changes(case, mesh={"corridor": False})


def _serial() -> StudyExecutor:
    return StudyExecutor(SerialExecutor(), 1, "this process")


class _DriverStopped(Exception):
    """Stands for the driver being killed: raised from the progress callback."""


@pytest.mark.slow
# dask warns when a worker's scratch folder is slow to create on a busy disk: a note about
# the machine, not about the ensemble
@pytest.mark.filterwarnings("ignore:Creating scratch directories:UserWarning")
def test_local_cluster_resumes_only_missing_members_with_identical_results(tmp_path: Path):
    """2 workers run 8 members; the driver stops after 3 results are saved; started again on
    the same folder it runs only the 5 missing members (the saved files are not rewritten),
    and every member equals the same member of an uninterrupted in-process ensemble."""
    case = _case()
    folder = tmp_path / "cluster"
    seen: list[int] = []

    def stop_after_three(done: int, total: int, outcome: object) -> None:
        seen.append(done)
        if len(seen) == 3:
            raise _DriverStopped

    with study_executor(n_runs=N, workers=2) as ex:
        assert ex.workers == 2 and "local cluster" in ex.where
        with pytest.raises(_DriverStopped):
            run_ensemble(case, folder, n_members=N, executor=ex, on_member=stop_after_three)
        saved = {p: p.stat().st_mtime_ns for p in (folder / "members").glob("member_*.npz")}
        assert len(saved) == 3
        counts: list[int] = []
        resumed = run_ensemble(case, folder, n_members=N, executor=ex,
                               on_member=lambda done, total, _o: counts.append(done))
    assert counts == list(range(1, N + 1))  # the progress counts reused members first
    assert resumed.reused == 3
    assert [r.index for r in resumed.results] == list(range(N)) and not resumed.failures
    assert {p: p.stat().st_mtime_ns for p in saved} == saved  # not recomputed
    reference = run_ensemble(case, tmp_path / "serial", n_members=N, executor=_serial())
    for a, b in zip(resumed.results, reference.results, strict=True):
        assert a.index == b.index
        assert np.array_equal(a.times, b.times)
        assert np.array_equal(a.history["tracer"], b.history["tracer"])
    p_cluster = summarise_ensemble(resumed).exceedance[0].probability
    assert np.array_equal(p_cluster, summarise_ensemble(reference).exceedance[0].probability)


def test_folder_of_another_study_is_refused(tmp_path: Path):
    """Same folder, other seed (or size): one CaseError naming --out, before any run."""
    folder = tmp_path / "study"
    run_ensemble(_case(seed=3), folder, n_members=2, executor=_serial())
    with pytest.raises(CaseError) as info:
        run_ensemble(_case(seed=4), folder, n_members=2, executor=_serial())
    assert info.value.key_path == "--out" and "seed" in info.value.allowed
    with pytest.raises(CaseError, match="member count"):
        run_ensemble(_case(seed=3), folder, n_members=3, executor=_serial())


def test_failed_members_are_reported_with_their_values(tmp_path: Path):
    """A normal porosity of mean 0.25 and standard deviation 0.3 draws values ≤ 0 for some
    members: those fail with the field's own message and their drawn values, the others
    run, and the failures are listed in ensemble_failures.csv and ensemble.md."""
    porosity = {"name": "materials.sand.porosity", "distribution": "normal", "mean": 0.25,
                "std_dev": 0.3}
    ens = run_ensemble(_case(porosity=porosity), tmp_path / "study", n_members=6,
                       executor=_serial())
    bad = [k for k in range(6) if not 0 < ens.sample.values[k, 1] < 1]
    assert bad, "the seed no longer draws a refused porosity; pick another"
    assert [f.index for f in ens.failures] == bad
    assert all(isinstance(f, MemberFailure) and "materials.sand.porosity" in f.error
               for f in ens.failures)
    assert len(ens.results) == 6 - len(bad)
    write_ensemble_tables(ens, summarise_ensemble(ens))
    failures = (tmp_path / "study" / "ensemble_failures.csv").read_text().splitlines()
    assert len(failures) == 1 + len(bad)
    assert f"{ens.sample.values[bad[0], 1]:.10g}" in failures[1]
    assert f"member {bad[0]}" in (tmp_path / "study" / "ensemble.md").read_text()


def test_uncertain_mesh_input_meshes_each_member_and_keeps_runs(tmp_path: Path):
    """A member whose drawn value changes a mesh input (here the plan cell size) meshes on
    its own; the per-node probability field, which needs one mesh, is then left out while
    the receptor results are given; ``keep_runs`` keeps each member's full run folder."""
    base = _case()
    assert base.uncertain is not None
    cell = {"name": "mesh.cell_size", "distribution": "uniform", "low": 0.9, "high": 1.1,
            "unit": "m"}
    case = with_changes(base, uncertain={"values": [base.uncertain.values[0].model_dump(
        exclude_none=True), cell]})
    ens = run_ensemble(case, tmp_path / "study", n_members=2, executor=_serial(),
                       keep_runs=True)
    assert len(ens.results) == 2 and all(r.own_mesh for r in ens.results)
    assert ens.site is None
    assert probability_fields(ens) is None
    assert summarise_ensemble(ens).exceedance[0].probability.shape == (201,)
    assert (tmp_path / "study" / "runs" / "member_0001" / "summary.json").is_file()
    assert len({r.n_nodes for r in ens.results}) == 2  # two different meshes
