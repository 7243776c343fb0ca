"""One folder is one run (issue 15, part 1): a run replaces its folder as a whole, says in
``run.json`` how it ended and lists every file with its checksum; a folder holding anything
else, or an input, is refused. Behaviour requirements of the issue, no outside reference."""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import pytest

from fe3d.case.builder import with_changes
from fe3d.case.load import load_case
from fe3d.errors import CaseError, SolverError
from fe3d.pipeline import run_case
from fe3d.post.run_place import MANIFEST, check_target

TINY = Path(__file__).parents[3] / "cases" / "tiny" / "case.toml"


def test_targets_that_are_refused(tmp_path):
    a_file = tmp_path / "notes.txt"
    a_file.write_text("field notes", encoding="utf-8")
    with pytest.raises(CaseError, match="must be a folder, not a file"):
        check_target(a_file, overwrite=True)
    with pytest.raises(CaseError, match="holds no earlier fe3d run"):
        check_target(tmp_path, overwrite=True)  # a folder of someone's files
    case_folder = tmp_path / "site"
    case_folder.mkdir()
    case_file = case_folder / "case.toml"
    case_file.write_text("", encoding="utf-8")
    with pytest.raises(CaseError, match=r"holds the input file case\.toml"):
        check_target(case_folder, overwrite=True, inputs=[case_file])
    earlier = tmp_path / "earlier"
    earlier.mkdir()
    (earlier / MANIFEST).write_text("{}", encoding="utf-8")
    with pytest.raises(CaseError, match="give --overwrite"):
        check_target(earlier, overwrite=False)
    check_target(earlier, overwrite=True)
    meshed = tmp_path / "meshed"
    meshed.mkdir()
    for name in ("mesh.msh", "mesh.vtu", "mesh.npz", "mesh.json"):
        (meshed / name).write_text("", encoding="utf-8")
    with pytest.raises(CaseError, match="holds a mesh of fe3d mesh; give --overwrite"):
        check_target(meshed, overwrite=False)
    check_target(meshed, overwrite=True)
    check_target(tmp_path / "new", overwrite=False)
    (tmp_path / "empty").mkdir()
    check_target(tmp_path / "empty", overwrite=False)


def _manifest(folder: Path) -> dict:
    return json.loads((folder / MANIFEST).read_text(encoding="utf-8"))


@pytest.mark.slow
def test_a_rerun_replaces_the_folder_as_a_whole_and_a_failure_says_so(tmp_path):
    case = load_case(TINY)
    out = tmp_path / "run"
    run_case(case, out, base_dir=TINY.parent)
    first = _manifest(out)
    assert first["state"] == "finished" and first["detail"] == ""
    listed = {f["name"]: f for f in first["files"]}
    on_disk = {p.name for p in out.iterdir() if p.name != MANIFEST}
    assert set(listed) == on_disk
    for name, entry in listed.items():
        assert hashlib.sha256((out / name).read_bytes()).hexdigest() == entry["sha256"], name
    (out / "stale_from_an_earlier_run.vtu").write_text("old", encoding="utf-8")
    with pytest.raises(CaseError, match="give --overwrite"):
        run_case(case, out, base_dir=TINY.parent)
    assert (out / "stale_from_an_earlier_run.vtu").is_file()  # nothing touched
    # a failing rerun: a step that still fails after no allowed cut
    stiff = with_changes(case, species={"tracer": {"second_order_rate": "1e6 m^3/kg/d"}},
                         solver={"newton_max_iterations": 1, "max_step_cuts": 0})
    with pytest.raises(SolverError):
        run_case(stiff, out, base_dir=TINY.parent, overwrite=True)
    failed = _manifest(out)
    assert failed["state"] == "failed" and failed["detail"]
    assert not (out / "stale_from_an_earlier_run.vtu").exists()
    assert not (out / "summary.json").exists()  # the earlier run's summary went with it
    assert (out / "solver.log").is_file()
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".")]  # no work folder


@pytest.mark.slow
def test_a_compact_run_writes_the_tables_and_fields_only(tmp_path):
    """``compact`` (a study's member, issue 14): no figure, plume surface or report; the
    histories, receptors, summary and the series file are there, and the histories equal a
    full run's to the bit (the same numbers, written the same way)."""
    case = load_case(TINY)
    full, small = tmp_path / "full", tmp_path / "compact"
    run_case(case, full, base_dir=TINY.parent)
    run_case(case, small, base_dir=TINY.parent, compact=True)
    names = {p.name for p in small.iterdir()}
    assert not [n for n in names if n.endswith((".png", ".html")) or n.startswith("plume_")]
    assert "report.md" not in names
    assert {"histories.csv", "summary.json", "results.vtkhdf", MANIFEST} <= names
    assert (small / "histories.csv").read_bytes() == (full / "histories.csv").read_bytes()
    listed = {f["name"] for f in _manifest(small)["files"]}
    assert listed == names - {MANIFEST}
