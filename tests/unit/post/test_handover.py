"""The report to hand over (fe3d.post.handover): report.html is one well-formed HTML page with
every figure embedded, the receptor table equals the values recomputed here from
receptors.csv, the inputs are those of the case file, the mass budget closes, and a
daughter's production from its parent is its own term; read_run's errors name the file."""

from __future__ import annotations

import base64
import csv
import json
import re
import shutil
from html.parser import HTMLParser
from pathlib import Path

import pytest
from _readings import crossing_step, peak_bracket

from fe3d.case.builder import with_changes
from fe3d.case.load import load_case
from fe3d.errors import CaseError
from fe3d.pipeline import run_case
from fe3d.post.case_tables import write_inputs
from fe3d.post.handover import write_handover
from fe3d.post.report import CAUTION
from fe3d.post.run_folder import read_run

TINY = Path(__file__).parents[3] / "cases" / "tiny" / "case.toml"
PUMP = {"name": "fence_pump", "x": "40 m", "y": "10 m", "screens": [["4 m", "2 m"]],
        "rate": "3 m^3/d"}
# The PNG signature: W3C 2003, Portable Network Graphics (PNG) Specification, 2nd ed.
# (ISO/IEC 15948), section 5.2.
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
# HTML void elements have no end tag: WHATWG HTML Living Standard, section 13.1.2.
VOID = {"area", "base", "br", "col", "embed", "hr", "img", "input", "link", "meta", "source",
        "track", "wbr"}
# Values in the report have 4 significant digits: half a unit in the 4th digit, relative.
FOUR_DIGITS = 5e-4


def _run(case_changes: dict, out: Path) -> Path:
    case = with_changes(load_case(TINY), **case_changes)
    run_case(case, out, base_dir=TINY.parent)
    write_inputs(out, case)  # what the end of `fe3d run` is to call (see the module)
    write_handover(out)
    return out


@pytest.fixture(scope="module")
def pumped(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The tiny case with a pumping well, run once, with its handover report."""
    return _run({"wells": [PUMP]}, tmp_path_factory.mktemp("handover") / "pumped")


class _Page(HTMLParser):
    """Collects every start tag with its attributes and checks that tags nest."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.open: list[str] = []
        self.tags: list[tuple[str, dict[str, str | None]]] = []
        self.errors: list[str] = []
        self.text: list[tuple[str, str]] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.append((tag, dict(attrs)))
        if tag not in VOID:
            self.open.append(tag)

    def handle_endtag(self, tag: str) -> None:
        if not self.open or self.open[-1] != tag:
            self.errors.append(f"</{tag}> closes {self.open[-1:] or 'nothing'}")
        else:
            self.open.pop()

    def handle_data(self, data: str) -> None:
        if data.strip():
            self.text.append((self.open[-1] if self.open else "", data.strip()))


def _page(folder: Path) -> _Page:
    page = _Page()
    page.feed((folder / "report.html").read_text(encoding="utf-8"))
    page.close()
    return page


@pytest.mark.slow
def test_report_html_is_well_formed_with_every_image_embedded(pumped):
    """Every tag closes in order (stdlib html.parser, void elements per WHATWG); every
    <img> is a PNG data URI whose bytes are those of a figure file of the run; each
    whole-run figure of the folder is there; nothing refers to an outside file."""
    page = _page(pumped)
    assert page.errors == []
    assert page.open == []
    images = [a["src"] for t, a in page.tags if t == "img"]
    figures = {p.name: p.read_bytes() for p in pumped.glob("*.png")}
    run_wide = {n for n in figures if not re.search(r"_\d{4}\.png$", n)}
    assert len(images) == len(run_wide) >= 6
    embedded = set()
    for src in images:
        assert src is not None
        assert src.startswith("data:image/png;base64,")
        data = base64.b64decode(src.split(",", 1)[1], validate=True)
        assert data.startswith(PNG_SIGNATURE)
        embedded |= {n for n, b in figures.items() if b == data}
    assert embedded == run_wide
    for tag, attrs in page.tags:
        assert tag not in ("script", "link", "iframe")
        assert not any(v and re.match(r"(https?:|//|file:)", v) for k, v in attrs.items()
                       if k in ("src", "href"))


@pytest.mark.slow
def test_caution_comes_before_any_result(pumped):
    """The caution (README, CLI and reports carry it) is the first thing under the title
    in both files, and closes the HTML page."""
    page = _page(pumped)
    first_h2 = next(i for i, (tag, _) in enumerate(page.text) if tag == "h2")
    assert ("p", CAUTION) in page.text[:first_h2]
    assert page.text[-1] == ("p", CAUTION)
    md = (pumped / "report.md").read_text(encoding="utf-8")
    assert md.index(CAUTION) < md.index("\n## ")


def _md_table(md: str, heading: str) -> list[dict[str, str]]:
    """The first table after ``## heading`` in Markdown text, as dicts."""
    lines = md.split(f"## {heading}", 1)[1].splitlines()
    start = next(i for i, ln in enumerate(lines) if ln.startswith("|"))
    end = next((i for i in range(start, len(lines)) if not lines[i].startswith("|")),
               len(lines))
    cells = [[c.strip() for c in ln.strip("|").split("|")] for ln in lines[start:end]]
    return [dict(zip(cells[0], r, strict=True)) for r in cells[2:]]


def _csv_rows(path: Path) -> list[dict[str, str]]:
    with path.open(encoding="utf-8") as f:
        return list(csv.DictReader(f))


@pytest.mark.slow
def test_receptor_table_equals_the_values_recomputed_from_the_csv(pumped):
    """Each receptor row of report.md (and the same row of report.html) holds the water out,
    mass out recomputed here from receptors.csv (one row per time step), to the report's 4
    significant digits; a peak between the largest row and the vertex of the parabola
    through it and its neighbours, at a time between those neighbours; a first time above
    the limit between the two rows around the crossing; the shares add up to 100 %."""
    md = (pumped / "report.md").read_text(encoding="utf-8")
    table = _md_table(md, "What leaves the model")
    rows = _csv_rows(pumped / "receptors.csv")
    limit = 0.01  # mg/L: the tiny case's limit, 10 ug/L
    assert {r["receptor"] for r in table} == {"fence_pump", "east"}
    total_out = sum(float([c for c in rows if c["receptor"] == r["receptor"]][-1][
        "mass out since start [kg]"]) for r in table)
    shares = 0.0
    for rec in table:
        mine = [r for r in rows if r["receptor"] == rec["receptor"]]
        times = [float(r["time [d]"]) for r in mine]
        conc = [float(r["flux-averaged concentration [mg/L]"]) for r in mine]
        assert len(times) > 10  # every time step, not only the output times
        (low, high), (early, late) = peak_bracket(times, conc)
        peak = float(rec["peak [mg/L]"])
        assert low * (1.0 - FOUR_DIGITS) <= peak <= high * (1.0 + FOUR_DIGITS)
        assert early * (1.0 - FOUR_DIGITS) <= float(rec["time of peak [d]"]) <= late * (
            1.0 + FOUR_DIGITS)
        lower, upper = crossing_step(times, conc, limit)
        first = float(rec["first above limit [d]"])
        assert lower * (1.0 - FOUR_DIGITS) <= first <= upper * (1.0 + FOUR_DIGITS)
        expect = {"water out [m³/d]": float(mine[-1]["water out [m3/d]"]),
                  "mass out [kg]": float(mine[-1]["mass out since start [kg]"]),
                  "share of mass out [%]": 100.0 * float(
                      mine[-1]["mass out since start [kg]"]) / total_out}
        for key, value in expect.items():
            assert value is not None
            assert float(rec[key]) == pytest.approx(value, rel=FOUR_DIGITS), key
        shares += float(rec["share of mass out [%]"])
    assert shares == pytest.approx(100.0, rel=FOUR_DIGITS * len(table))
    html_text = {d for _, d in _page(pumped).text}
    for rec in table:
        assert set(rec.values()) <= html_text


@pytest.mark.slow
def test_inputs_are_the_case_files_values_in_display_units(pumped):
    """inputs.json and the report show the case file's own numbers (cases/tiny/case.toml:
    sand 10 m/d, porosity 0.3, limit 10 ug/L = 0.01 mg/L, source 5 mg/L, stop 200 d) and
    the well's rate as given (3 m³/d)."""
    inputs = json.loads((pumped / "inputs.json").read_text(encoding="utf-8"))
    tables = {t["title"]: t for t in inputs["tables"]}
    sand = dict(zip(tables["Materials"]["header"], tables["Materials"]["rows"][0],
                    strict=True))
    assert sand["horizontal conductivity [m/d]"] == "10"
    assert sand["porosity [-]"] == "0.3"
    species = dict(zip(tables["Species"]["header"], tables["Species"]["rows"][0], strict=True))
    assert species["limit [mg/L]"] == "0.01"
    source = dict(zip(tables["Sources"]["header"], tables["Sources"]["rows"][0], strict=True))
    assert (source["strength"], source["stop [d]"]) == ("5 mg/L", "200")
    well = dict(zip(tables["Wells"]["header"], tables["Wells"]["rows"][0], strict=True))
    assert well["rate [m³/d]"] == "3"
    md = (pumped / "report.md").read_text(encoding="utf-8")
    assert "| fence_pump | extraction | 40 | 10 | 4 to 2 | 3 |" in md


@pytest.mark.slow
def test_mass_budget_row_closes(pumped):
    """stored − initial = input + produced − out − decayed (theory.md T9) holds for the
    report's row to its 4 digits (rel 1e-3 of the input: four rounded terms)."""
    row = _md_table((pumped / "report.md").read_text(encoding="utf-8"), "Mass budget")[0]
    produced = 0.0 if row["produced from parent [kg]"] == "none" else float(
        row["produced from parent [kg]"])
    gain = (float(row["source input [kg]"]) + produced
            - float(row["out through boundaries and wells [kg]"]) - float(row["decayed [kg]"]))
    stored = float(row["stored at the end [kg]"]) - float(row["initial [kg]"])
    assert stored == pytest.approx(gain, abs=1e-3 * float(row["source input [kg]"]))
    assert row["produced from parent [kg]"] == "none"  # the tiny case has no decay chain


@pytest.mark.slow
def test_a_daughters_production_is_its_own_term(tmp_path):
    """A daughter without a source of its own gains mass only from its parent: the report
    shows that input as "produced from parent", with source input 0, and it equals the
    parent's decayed mass times the yield (1 here): every parent atom that decays becomes
    a daughter atom (Bateman 1910, The solution of a system of differential equations
    occurring in the theory of radioactive transformations; first-order decay, no other
    loss of the parent). Tolerance: the report's 4 significant digits."""
    out = _run({"species": {"daughter": {"parent": "tracer", "limit": "10 ug/L",
                                         "half_life": "20 yr"}}}, tmp_path / "chain")
    rows = {r["species"]: r for r in _md_table((out / "report.md").read_text(
        encoding="utf-8"), "Mass budget")}
    assert rows["daughter"]["source input [kg]"] == "0"
    produced = float(rows["daughter"]["produced from parent [kg]"])
    assert produced > 0.0
    assert produced == pytest.approx(float(rows["tracer"]["decayed [kg]"]), rel=2 * FOUR_DIGITS)
    assert rows["tracer"]["produced from parent [kg]"] == "none"


def test_read_run_names_the_missing_file(tmp_path):
    """A folder that is not a finished run: one line naming the file and what is allowed."""
    (tmp_path / "summary.json").write_text(json.dumps(
        {"time_unit": "d", "concentration_unit": "mg/L"}), encoding="utf-8")
    with pytest.raises(CaseError) as err:
        read_run(tmp_path)
    line = err.value.line()
    assert "flow_budget.csv" in line or "histories.csv" in line
    assert "\n" not in line
    with pytest.raises(CaseError, match="RUN_DIR"):
        read_run(tmp_path / "nowhere")


@pytest.mark.slow
def test_a_run_without_inputs_says_so_or_takes_the_case(pumped, tmp_path):
    """A run folder without inputs.json (runs before it existed): the report says where the
    inputs are instead of inventing them; given the case, the inputs are written and
    shown."""
    old = tmp_path / "old_run"
    shutil.copytree(pumped, old)
    (old / "inputs.json").unlink()
    md, _ = write_handover(old)
    assert "has no `inputs.json`" in md.read_text(encoding="utf-8")
    md, _ = write_handover(old, case=with_changes(load_case(TINY), wells=[PUMP]))
    text = md.read_text(encoding="utf-8")
    assert "## Inputs (display units)" in text
    assert "| fence_pump | extraction | 40 | 10 | 4 to 2 | 3 |" in text
