"""A run folder read back into typed records (:func:`read_run`): the histories at the
observation points, the receptors, the plume measures, the mass and flow budgets and the
summary, in SI units, from the files a run wrote and nothing else.

This is the Python way to hold a run's results, histories included, after
:func:`fe3d.pipeline.run_case` (which returns the scalars of :class:`RunSummary` only);
docs/scripting.md shows it at work.
"""

from __future__ import annotations

import csv
import json
import math
import re
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from fe3d._typing import FloatArray
from fe3d.errors import CaseError
from fe3d.post.receptors import ReceptorResult, ReceptorRow, receptor_result
from fe3d.units import from_si

__all__ = [
    "INPUTS_FILE",
    "BudgetHistory",
    "FlowItem",
    "PlumeHistory",
    "PointHistory",
    "ReceptorHistory",
    "RunResult",
    "read_run",
]

#: The case's inputs in display units, as tables (written by
#: :func:`fe3d.post.case_tables.write_inputs`); runs written before it have none.
INPUTS_FILE = "inputs.json"
_DAY = 86400.0
_UNIT = re.compile(r"^(?P<name>.*?)\s*\[(?P<unit>[^\]]*)\]$")


@dataclass(frozen=True)
class PointHistory:
    """Concentration at one observation point of one species: ``times`` [s] and
    ``concentration`` [kg/m³], each ``(n_t,)``, every time step of the run."""

    point: str
    species: str
    times: FloatArray
    concentration: FloatArray


@dataclass(frozen=True)
class ReceptorHistory:
    """A place where water leaves (extraction well, outflow face, stream) and one species at
    the times ``times`` [s] (every time step, or the output times in runs that did not
    sample receptors at every step): water leaving [m³/s], its flux-averaged concentration
    [kg/m³] (for a well, that of the water pumped), mass flux [kg/s] and mass carried out
    since the start [kg] (NaN between output times), each ``(n_t,)``."""

    name: str
    kind: str
    species: str
    times: FloatArray
    water_rate: FloatArray
    concentration: FloatArray
    mass_flux: FloatArray
    mass_out: FloatArray

    def rows(self) -> list[ReceptorRow]:
        """The history as :class:`~fe3d.post.receptors.ReceptorRow` records, in time order
        (for :func:`~fe3d.post.receptors.receptor_result`)."""
        return [ReceptorRow(self.name, self.kind, self.species, float(t), float(w), float(c),
                            float(f), float(m))
                for t, w, c, f, m in zip(self.times, self.water_rate, self.concentration,
                                         self.mass_flux, self.mass_out, strict=True)]


@dataclass(frozen=True)
class PlumeHistory:
    """The part of one species' plume above its ``limit`` [kg/m³] at the output times
    ``times`` [s]: aquifer volume [m³], dissolved and sorbed mass [kg], farthest extent from
    the source and distances downstream and upstream of it [m], each ``(n_t,)``."""

    species: str
    times: FloatArray
    limit: float
    volume: FloatArray
    dissolved_mass: FloatArray
    sorbed_mass: FloatArray
    extent: FloatArray
    downstream: FloatArray
    upstream: FloatArray


@dataclass(frozen=True)
class BudgetHistory:
    """The cumulative mass budget of one species at the output times ``times`` [s]:
    ``terms`` maps each column of mass_budget.csv without its unit (``dissolved``,
    ``source input``, ``outflow east``, ``decayed``, ``imbalance``, ...) to its values [kg],
    ``relative_error`` [-], each ``(n_t,)``."""

    species: str
    times: FloatArray
    terms: Mapping[str, FloatArray]
    relative_error: FloatArray


@dataclass(frozen=True)
class FlowItem:
    """One item of the water budget (a fixed-head face, a well, a recharge zone, ...):
    ``inflow`` and ``outflow`` [m³/s]."""

    name: str
    kind: str
    inflow: float
    outflow: float


@dataclass(frozen=True)
class RunResult:
    """What a run folder holds, in SI units (times [s], concentrations [kg/m³], masses
    [kg], water [m³/s]), with the display units the run chose.

    ``summary`` is summary.json as written (SI; README.md "The keys of summary.json");
    ``inputs`` the tables of inputs.json (None when the run has none); ``files`` the names
    in the folder, sorted."""

    folder: Path
    summary: Mapping[str, Any]
    time_unit: str
    concentration_unit: str
    histories: tuple[PointHistory, ...]
    receptors: tuple[ReceptorHistory, ...]
    plume: tuple[PlumeHistory, ...]
    mass_budget: tuple[BudgetHistory, ...]
    flow_budget: tuple[FlowItem, ...]
    flow_discrepancy: float
    well_heads: Mapping[str, float]
    inputs: Mapping[str, Any] | None
    files: tuple[str, ...]

    @property
    def title(self) -> str:
        """The case's title."""
        return str(self.summary.get("title", self.folder.name))

    @property
    def species(self) -> tuple[str, ...]:
        """The species, in the order of the case."""
        return tuple(self.summary.get("mass_balance_error", {}))

    def limit(self, species: str) -> float:
        """The species' limit [kg/m³], from summary.json (else the plume table)."""
        known = self.summary.get("extremes", {}).get(species, {}).get("limit")
        if known is not None:
            return float(known)
        for p in self.plume:
            if p.species == species:
                return p.limit
        msg = f"{self.folder / 'plume.csv'}"
        raise CaseError(msg, species, f"species in the run: {', '.join(self.species)}")

    def receptor_results(self) -> tuple[ReceptorResult, ...]:
        """Peak, crossing times, time above the limit and mass out of every receptor and
        species, recomputed from ``receptors.csv`` (SI units)."""
        return tuple(receptor_result(r.rows(), self.limit(r.species)) for r in self.receptors)

    @property
    def receptors_every_step(self) -> bool:
        """Whether ``receptors.csv`` holds every time step (more times than the output
        times of ``plume.csv``), not only the output times."""
        outputs = max((p.times.size for p in self.plume), default=0)
        return any(r.times.size > outputs for r in self.receptors)

    def mass_out_share(self, result: ReceptorResult) -> float:
        """The receptor's share of the mass of its species that left the model through
        all the receptors by the end [-] (0 when none left)."""
        total = sum(float(r.mass_out[-1]) for r in self.receptors
                    if r.species == result.species)
        return result.mass_out / total if total > 0 else 0.0

    def history(self, point: str, species: str) -> PointHistory:
        """The history at ``point`` of ``species``."""
        for h in self.histories:
            if (h.point, h.species) == (point, species):
                return h
        known = ", ".join(f"{h.point} {h.species}" for h in self.histories)
        msg = f"{self.folder / 'histories.csv'}"
        raise CaseError(msg, f"{point} {species}", f"columns in the run: {known}")


def _table(path: Path) -> tuple[list[str], list[list[str]]]:
    """Header and rows of a CSV file of the run."""
    if not path.is_file():
        raise CaseError(str(path), "missing", "a run folder written by `fe3d run` holds this "
                        "file; give the folder of a finished run")
    with path.open(encoding="utf-8", newline="") as f:
        rows = list(csv.reader(f))
    if not rows:
        raise CaseError(str(path), "empty", "a CSV table with a header line")
    return rows[0], rows[1:]


def _unit(header: str) -> tuple[str, str]:
    """(name, unit) of a column header ``name [unit]`` (unit ``""`` when none)."""
    m = _UNIT.match(header)
    return (header, "") if m is None else (m["name"], m["unit"])


def _si(unit: str) -> float:
    """How many ``unit`` make one SI unit (a value in ``unit`` over this is SI)."""
    if unit in ("", "-", "kg", "m", "m3"):
        return 1.0
    if unit in ("m3/d", "kg/d"):
        return _DAY
    return from_si(1.0, unit)


def _number(text: str) -> float:
    return math.nan if text == "" else float(text)


def _column(rows: list[list[str]], k: int, per_si: float = 1.0) -> FloatArray:
    """Column ``k`` in SI, from values in a unit of which ``per_si`` make one SI unit."""
    return np.array([_number(r[k]) for r in rows], dtype=float) / per_si


def _histories(folder: Path) -> tuple[PointHistory, ...]:
    header, rows = _table(folder / "histories.csv")
    times = _column(rows, 0, _si(_unit(header[0])[1]))
    out = []
    for k, h in enumerate(header[1:], start=1):
        name, unit = _unit(h)
        point, species = name.rsplit(" ", 1)  # names have no spaces (case schema Name)
        out.append(PointHistory(point, species, times, _column(rows, k, _si(unit))))
    return tuple(out)


def _groups(header: list[str], rows: list[list[str]], keys: tuple[int, ...]
            ) -> dict[tuple[str, ...], list[list[str]]]:
    """Rows grouped by the columns ``keys``, in order of first appearance."""
    groups: dict[tuple[str, ...], list[list[str]]] = {}
    for r in rows:
        if len(r) != len(header):
            continue
        groups.setdefault(tuple(r[k] for k in keys), []).append(r)
    return groups


def _receptors(folder: Path) -> tuple[ReceptorHistory, ...]:
    header, rows = _table(folder / "receptors.csv")
    s = [_si(_unit(h)[1]) for h in header]
    return tuple(ReceptorHistory(name, kind, sp, *(_column(g, k, s[k]) for k in range(3, 8)))
                 for (name, kind, sp), g in _groups(header, rows, (0, 1, 2)).items())


def _plume(folder: Path) -> tuple[PlumeHistory, ...]:
    header, rows = _table(folder / "plume.csv")
    s = [_si(_unit(h)[1]) for h in header]
    return tuple(PlumeHistory(sp, _column(g, 1, s[1]), float(g[0][2]) / s[2],
                              *(_column(g, k, s[k]) for k in range(3, 9)))
                 for (sp,), g in _groups(header, rows, (0,)).items())


def _mass_budget(folder: Path) -> tuple[BudgetHistory, ...]:
    header, rows = _table(folder / "mass_budget.csv")
    names = [_unit(h)[0] for h in header]
    out = []
    for (sp,), g in _groups(header, rows, (0,)).items():
        terms = {n: _column(g, k) for k, n in enumerate(names)
                 if k >= 2 and n != "relative error"}
        out.append(BudgetHistory(sp, _column(g, 1, _si(_unit(header[1])[1])), terms,
                                 _column(g, names.index("relative error"))))
    return tuple(out)


def _flow_budget(folder: Path) -> tuple[tuple[FlowItem, ...], float, dict[str, float]]:
    _, rows = _table(folder / "flow_budget.csv")
    items, heads, discrepancy = [], {}, math.nan
    for r in rows:
        if r[0] == "total":
            continue
        if r[0].startswith("relative discrepancy"):
            discrepancy = float(r[2])
        elif r[0].startswith("head in well "):
            heads[_unit(r[0])[0].removeprefix("head in well ")] = float(r[2])
        else:
            items.append(FlowItem(r[0], r[1], float(r[2]) / _DAY, float(r[3]) / _DAY))
    return tuple(items), discrepancy, heads


def _json(path: Path) -> Any:
    if not path.is_file():
        raise CaseError(str(path), "missing", "a run folder written by `fe3d run` holds this "
                        "file; give the folder of a finished run")
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except json.JSONDecodeError as exc:
        raise CaseError(str(path), f"not JSON ({exc.msg}, line {exc.lineno})",
                        "the file as fe3d wrote it") from None


def read_run(folder: Path) -> RunResult:
    """Read the run folder ``folder`` (written by ``fe3d run`` or
    :func:`fe3d.pipeline.run_case`) into a :class:`RunResult`.

    Raises
    ------
    CaseError
        When the folder or one of its files (summary.json, histories.csv, receptors.csv,
        plume.csv, mass_budget.csv, flow_budget.csv) is missing or unreadable.
    """
    folder = Path(folder)
    if not folder.is_dir():
        key = "RUN_DIR"
        raise CaseError(key, str(folder), "a folder written by `fe3d run`")
    summary = _json(folder / "summary.json")
    inputs_path = folder / INPUTS_FILE
    flow, discrepancy, heads = _flow_budget(folder)
    return RunResult(
        folder=folder, summary=summary, time_unit=summary["time_unit"],
        concentration_unit=summary["concentration_unit"], histories=_histories(folder),
        receptors=_receptors(folder), plume=_plume(folder), mass_budget=_mass_budget(folder),
        flow_budget=flow, flow_discrepancy=discrepancy, well_heads=heads,
        inputs=_json(inputs_path) if inputs_path.is_file() else None,
        files=tuple(sorted(p.name for p in folder.iterdir()
                           if p.is_file() and not p.name.startswith("."))))
