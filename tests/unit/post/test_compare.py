"""Runs compared (fe3d.post.compare): two runs of the tiny case that differ only in the
pumping rate of one well; the comparison shows the well capturing the plume in one and not
the other, and every compared value is that of the run's own CSV files."""

from __future__ import annotations

import csv
import json
from pathlib import Path

import pytest
from _readings import peak_bracket

from fe3d.case.builder import with_changes
from fe3d.case.load import load_case
from fe3d.errors import CaseError
from fe3d.pipeline import run_case
from fe3d.post.compare import write_comparison

TINY = Path(__file__).parents[3] / "cases" / "tiny" / "case.toml"
RATES = {"pumped": 6.0, "trickle": 0.03}  # m³/d
# PNG signature: W3C 2003, PNG Specification 2nd ed. (ISO/IEC 15948), section 5.2.
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
FOUR_DIGITS = 5e-4  # the comparison writes 4 significant digits


def _pump(rate: float) -> dict:
    return {"name": "fence_pump", "x": "40 m", "y": "10 m", "screens": [["4 m", "2 m"]],
            "rate": f"{rate} m^3/d"}


@pytest.fixture(scope="module")
def compared(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, dict[str, Path]]:
    """The two runs and their comparison folder."""
    base = tmp_path_factory.mktemp("compare")
    runs = {}
    for label, rate in RATES.items():
        runs[label] = base / label
        run_case(with_changes(load_case(TINY), wells=[_pump(rate)]), runs[label],
                 base_dir=TINY.parent)
    write_comparison(list(runs.values()), base / "compared", labels=list(runs))
    return base / "compared", runs


def _rows(path: Path) -> list[dict[str, str]]:
    with path.open(encoding="utf-8") as f:
        return list(csv.DictReader(f))


def _value(rows: list[dict[str, str]], item: str, measure: str, label: str) -> float:
    (row,) = [r for r in rows if r["item"] == item and r["measure"] == measure]
    return float(row[label])


@pytest.mark.slow
def test_the_pumped_well_captures_the_plume_and_the_trickle_does_not(compared):
    """The tiny aquifer's sand (4 m thick, K 10 m/d, gradient 0.6 m / 60 m) carries a Darcy
    flux q = 0.1 m/d. A well pumping Q from it captures, far upstream, a band of width
    Q / (B q) (Javandel & Tsang 1986, Capture-zone type curves: a tool for aquifer
    cleanup, Ground Water 24(5)): 15 m at 6 m³/d, wider than the source (4 m) and its
    transverse spread, and 0.075 m at 0.03 m³/d, a sliver of it. So the pumped well must
    take most of the mass that leaves the model (more than half) and the trickle a few per
    cent at most (under 5 %); these loose bounds allow for dispersion and the partial
    screen (common practice, no source). Less mass then leaves by the east face."""
    folder, _ = compared
    rows = _rows(folder / "comparison.csv")
    share = "share of the mass leaving the model [%]"
    assert _value(rows, "fence_pump", share, "pumped") > 50.0
    assert _value(rows, "fence_pump", share, "trickle") < 5.0
    assert _value(rows, "east", "mass out [kg]", "pumped") < _value(
        rows, "east", "mass out [kg]", "trickle")
    md = (folder / "comparison.md").read_text(encoding="utf-8")
    assert "| fence_pump | tracer | share of the mass leaving the model [%] |" in md
    for name in ("comparison_points.png", "comparison_receptors.png"):
        assert (folder / name).read_bytes().startswith(PNG_SIGNATURE)


@pytest.mark.slow
def test_compared_values_are_those_of_each_runs_csv(compared):
    """For each run: the well pumps the rate the case gave it; each receptor's peak is the
    one that run's summary.json gives (read from its receptors.csv rows, one per time step:
    test_run_outputs checks that reading) and its mass out the last row's; each
    observation point's peak lies between the largest of its histories.csv column and the
    vertex of the parabola through that row and its neighbours (4 significant digits)."""
    folder, runs = compared
    rows = _rows(folder / "comparison.csv")
    for label, run in runs.items():
        assert _value(rows, "fence_pump", "water out [m³/d]", label) == pytest.approx(
            RATES[label], rel=FOUR_DIGITS)
        received = _rows(run / "receptors.csv")
        for item in ("fence_pump", "east"):
            mine = [r for r in received if r["receptor"] == item]
            assert len(mine) > 10  # every time step, not only the output times
            summary = json.loads((run / "summary.json").read_text(encoding="utf-8"))
            (peak,) = [r["peak"] * 1e3 for r in summary["receptors"] if r["name"] == item]
            assert _value(rows, item, "peak [mg/L]", label) == pytest.approx(
                peak, rel=FOUR_DIGITS)
            assert _value(rows, item, "mass out [kg]", label) == pytest.approx(
                float(mine[-1]["mass out since start [kg]"]), rel=FOUR_DIGITS)
        history = _rows(run / "histories.csv")
        (low, high), _ = peak_bracket([float(r["time [d]"]) for r in history],
                                      [float(r["BH-A tracer [mg/L]"]) for r in history])
        peak = _value(rows, "BH-A", "peak [mg/L]", label)
        assert low * (1.0 - FOUR_DIGITS) <= peak <= high * (1.0 + FOUR_DIGITS)


@pytest.mark.slow
def test_an_item_missing_from_a_run_is_absent_not_zero(compared, tmp_path):
    """Compared with a run that has no such well, the well's values read "absent"."""
    _, runs = compared
    bare = tmp_path / "no_well"
    run_case(load_case(TINY), bare, base_dir=TINY.parent)
    write_comparison([runs["pumped"], bare], tmp_path / "out", labels=["pumped", "bare"])
    rows = [r for r in _rows(tmp_path / "out" / "comparison.csv") if r["item"] == "fence_pump"]
    assert rows
    assert {r["bare"] for r in rows} == {"absent"}


def test_one_run_or_clashing_labels_are_one_line_errors(tmp_path):
    """Fewer than two folders, or labels that do not match them: a CaseError of one line
    naming the argument."""
    with pytest.raises(CaseError, match="RUN_DIR") as err:
        write_comparison([tmp_path], tmp_path / "out")
    assert "\n" not in err.value.line()
    with pytest.raises(CaseError, match="--labels"):
        write_comparison([tmp_path, tmp_path], tmp_path / "out", labels=["a", "a"])
