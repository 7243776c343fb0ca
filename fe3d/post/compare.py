"""Runs side by side (:func:`write_comparison`): what each receptor received, the plume
above the limit and the observation points, one column per run, as ``comparison.csv`` and
``comparison.md``, with the breakthrough curves of the runs overlaid
(``comparison_points.png`` at the observation points, ``comparison_receptors.png`` at the
receptors every run has).

Every value comes from the run folders' own files (:func:`fe3d.post.run_folder.read_run`)
and is shown in the display units of the first run.
"""

from __future__ import annotations

import csv
import io
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from fe3d.errors import CaseError
from fe3d.post.figures import plot_refinement_breakthrough
from fe3d.post.files import write_text_atomic
from fe3d.post.probes import breakthrough
from fe3d.post.report import CAUTION
from fe3d.post.run_folder import RunResult, read_run
from fe3d.units import from_si

__all__ = ["ABSENT", "ComparedRow", "Comparison", "compare_runs", "comparison_csv",
           "comparison_markdown", "write_comparison"]

ABSENT = "absent"
"""Shown where a run has no such receptor, point or species."""


@dataclass(frozen=True)
class ComparedRow:
    """One measure of one item in every run: ``group`` (``receptor``, ``plume``,
    ``point``), the item's ``name`` and ``species``, the ``measure`` with its unit, and one
    value per run in display units (None: absent from that run, or "not reached" for a
    time)."""

    group: str
    name: str
    species: str
    measure: str
    values: tuple[float | None, ...]


@dataclass(frozen=True)
class Comparison:
    """The runs' ``labels`` and the compared ``rows``, in display units ``time_unit`` and
    ``concentration_unit``."""

    labels: tuple[str, ...]
    time_unit: str
    concentration_unit: str
    rows: tuple[ComparedRow, ...]


def _receptor_measures(run: RunResult, tu: str, cu: str
                       ) -> dict[tuple[str, str], dict[str, float | None]]:
    out = {}
    for res in run.receptor_results():
        out[res.name, res.species] = {
            "water out [m³/d]": res.water_rate * 86400.0,
            f"peak [{cu}]": from_si(res.peak, cu),
            f"time of peak [{tu}]": from_si(res.peak_time, tu),
            f"first above limit [{tu}]": _maybe(res.first_above_limit, tu),
            f"time above limit [{tu}]": from_si(res.time_above_limit, tu),
            "mass out [kg]": res.mass_out,
            "share of the mass leaving the model [%]": 100.0 * run.mass_out_share(res)}
    return out


def _maybe(t: float | None, unit: str) -> float | None:
    return None if t is None else from_si(t, unit)


def _plume_measures(run: RunResult, tu: str, cu: str
                    ) -> dict[tuple[str, str], dict[str, float | None]]:
    out = {}
    for p in run.plume:
        out["above the limit", p.species] = {
            f"limit [{cu}]": from_si(p.limit, cu),
            "largest volume [m³]": float(p.volume.max()),
            "largest mass, dissolved and sorbed [kg]":
                float((p.dissolved_mass + p.sorbed_mass).max()),
            "largest extent from the source [m]": float(p.extent.max()),
            "farthest downstream [m]": float(p.downstream.max()),
            "volume at the end [m³]": float(p.volume[-1]),
            f"at the end [{tu}]": from_si(float(p.times[-1]), tu)}
    return out


def _point_measures(run: RunResult, tu: str, cu: str
                    ) -> dict[tuple[str, str], dict[str, float | None]]:
    out = {}
    for h in run.histories:
        b = breakthrough(h.times, h.concentration, run.limit(h.species))
        out[h.point, h.species] = {f"peak [{cu}]": from_si(b.peak, cu),
                                   f"time of peak [{tu}]": from_si(b.peak_time, tu),
                                   f"first above limit [{tu}]": _maybe(b.first_above_limit,
                                                                       tu)}
    return out


def compare_runs(runs: Sequence[RunResult], labels: Sequence[str]) -> Comparison:
    """The receptors, plumes and observation points of ``runs`` side by side; an item
    missing from a run gets None there."""
    tu, cu = runs[0].time_unit, runs[0].concentration_unit
    rows: list[ComparedRow] = []
    for group, measures in (("receptor", _receptor_measures), ("plume", _plume_measures),
                            ("point", _point_measures)):
        per_run = [measures(r, tu, cu) for r in runs]
        items = list(dict.fromkeys(k for m in per_run for k in m))
        for name, species in items:
            names = list(dict.fromkeys(q for m in per_run for q in m.get((name, species), {})))
            rows += [ComparedRow(group, name, species, q,
                                 tuple(m.get((name, species), {}).get(q) for m in per_run))
                     for q in names]
    return Comparison(tuple(labels), tu, cu, tuple(rows))


def _text(value: float | None, present: bool) -> str:
    if not present:
        return ABSENT
    return "not reached" if value is None else f"{value:.4g}"


def _present(c: Comparison, row: ComparedRow, k: int) -> bool:
    """Whether the run ``k`` has the item of ``row`` at all (any measure not None)."""
    return any(r.values[k] is not None for r in c.rows
               if (r.group, r.name, r.species) == (row.group, row.name, row.species))


def comparison_csv(c: Comparison) -> str:
    """The comparison as CSV: one row per item and measure, one column per run."""
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["group", "item", "species", "measure", *c.labels])
    for r in c.rows:
        w.writerow([r.group, r.name, r.species, r.measure,
                    *(_text(v, _present(c, r, k)) for k, v in enumerate(r.values))])
    return buf.getvalue()


_TITLES = {"receptor": "What leaves the model: extraction wells and outflow boundaries",
           "plume": "The plume above the limit", "point": "Observation points"}


def comparison_markdown(c: Comparison, folders: Sequence[Path]) -> str:
    """The comparison as Markdown tables, one per group, the caution first."""
    lines = ["# Runs compared", "", f"> **{CAUTION}**", "", "| run | folder |", "|---|---|",
             *(f"| {label} | `{f}` |" for label, f in zip(c.labels, folders, strict=True)),
             ""]
    for group, title in _TITLES.items():
        mine = [r for r in c.rows if r.group == group]
        if not mine:
            continue
        lines += [f"## {title}", "", "| item | species | measure | " + " | ".join(c.labels)
                  + " |", "|---|---|---|" + "---|" * len(c.labels)]
        lines += [f"| {r.name} | {r.species} | {r.measure} | "
                  + " | ".join(_text(v, _present(c, r, k)) for k, v in enumerate(r.values))
                  + " |" for r in mine]
        lines.append("")
    lines += ["Receptor values are taken at every time step, or at the output times in "
              "runs that did not sample them at every step; observation points at every "
              "time step. \"share of the mass leaving the model\" is the receptor's part of "
              "all the mass of its species that left through wells and outflow boundaries "
              "by the end of the run.", ""]
    return "\n".join(lines)


def _plot(path: Path, runs: Sequence[RunResult], labels: Sequence[str],
          curves: list[tuple[str, str]], *, receptors: bool) -> Path | None:
    """Overlaid curves of ``curves`` (name, species) that every run has."""
    if not curves:
        return None
    species = list(dict.fromkeys(sp for _, sp in curves))
    names = list(dict.fromkeys(n for n, _ in curves))
    levels = []
    for label, run in zip(labels, runs, strict=True):
        series = {(r.name, r.species): (r.times, r.concentration) for r in run.receptors} \
            if receptors else {(h.point, h.species): (h.times, h.concentration)
                               for h in run.histories}
        times = series[curves[0]][0]
        history = {sp: np.column_stack([series[n, sp][1] if (n, sp) in series else
                                        np.full(times.shape, np.nan) for n in names])
                   for sp in species}
        levels.append((label, times, history))
    what = "flux-averaged concentration at the receptors" if receptors else \
        "concentration at the observation points"
    return plot_refinement_breakthrough(
        path, levels, names, {sp: runs[0].limit(sp) for sp in species},
        time_unit=runs[0].time_unit, conc_unit=runs[0].concentration_unit,
        title=f"{runs[0].title}: {what}, runs compared")


def _common(keys: list[set[tuple[str, str]]]) -> list[tuple[str, str]]:
    """The (name, species) pairs every run has, sorted."""
    return sorted(set.intersection(*keys))


def write_comparison(folders: Sequence[Path], out_dir: Path, *,
                     labels: Sequence[str] | None = None) -> list[Path]:
    """Compare the run folders ``folders`` (two or more) into ``out_dir``: comparison.csv,
    comparison.md and the overlaid breakthrough figures; ``labels`` name the runs (default:
    the folder names). Returns the paths written.

    Raises
    ------
    CaseError
        Fewer than two folders, labels that do not match them, or a folder that is not a
        finished run.
    """
    if len(folders) < 2:
        key = "RUN_DIR"
        raise CaseError(key, " ".join(map(str, folders)), "give two or more run folders")
    labels = list(labels) if labels is not None else [Path(f).name for f in folders]
    if len(labels) != len(folders) or len(set(labels)) != len(labels):
        key = "--labels"
        raise CaseError(key, ",".join(labels), f"{len(folders)} different names, one per run")
    runs = [read_run(Path(f)) for f in folders]
    c = compare_runs(runs, labels)
    out = Path(out_dir)
    written = [out / "comparison.csv", out / "comparison.md"]
    write_text_atomic(written[0], comparison_csv(c))
    write_text_atomic(written[1], comparison_markdown(c, [Path(f) for f in folders]))
    points = _common([{(h.point, h.species) for h in r.histories} for r in runs])
    wells = _common([{(x.name, x.species) for x in r.receptors} for r in runs])
    for name, curves, at_receptors in (("comparison_points.png", points, False),
                                       ("comparison_receptors.png", wells, True)):
        path = _plot(out / name, runs, labels, curves, receptors=at_receptors)
        if path is not None:
            written.append(path)
    return written
