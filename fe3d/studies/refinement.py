"""Mesh-refinement studies: observed order, Richardson extrapolation and the grid
convergence index (GCI) of the quantities a site assessor reports.

References: Roache, P.J. (1994), *Perspective: a method for uniform reporting of grid
refinement studies*, J. Fluids Eng. 116, 405–413 (GCI with safety factor 1.25 for three or
more grids); Celik, I.B. et al. (2008), *Procedure for estimation and reporting of
uncertainty due to discretization in CFD applications*, J. Fluids Eng. 130, 078001 (the
three-grid procedure used here, for a constant refinement ratio).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from fe3d.case.schema import Case
from fe3d.pipeline import run_case
from fe3d.post.files import write_text_atomic
from fe3d.post.report import CAUTION, RunSummary

__all__ = ["Convergence", "converge", "refine_case", "refinement_study"]

SAFETY_FACTOR = 1.25  # Roache (1994), three or more grids


@dataclass(frozen=True)
class Convergence:
    """Convergence of one quantity over three grids (fine value first).

    ``order`` is None when the differences change sign (oscillatory) or vanish; then
    ``extrapolated`` and ``gci`` are None too.
    """

    fine: float
    medium: float
    coarse: float
    order: float | None
    extrapolated: float | None
    gci: float | None


def converge(fine: float, medium: float, coarse: float, ratio: float) -> Convergence:
    """Observed order p = ln(e32/e21)/ln r, Richardson value f1 + (f1 − f2)/(r^p − 1) and
    GCI_fine = Fs |(f1 − f2)/f1| / (r^p − 1) for a constant refinement ratio r > 1."""
    e21, e32 = medium - fine, coarse - medium
    if e21 == 0 or e32 == 0 or (e21 > 0) != (e32 > 0):
        return Convergence(fine, medium, coarse, None, None, None)
    p = math.log(e32 / e21) / math.log(ratio)
    denom = ratio**p - 1.0
    if denom <= 0:
        return Convergence(fine, medium, coarse, p, None, None)
    extrapolated = fine + (fine - medium) / denom
    gci = SAFETY_FACTOR * abs((fine - medium) / fine) / denom if fine != 0 else None
    return Convergence(fine, medium, coarse, p, extrapolated, gci)


def refine_case(case: Case, factor: float) -> Case:
    """The case with every target cell size and the time step divided by ``factor``."""
    m = case.mesh
    mesh = m.model_copy(update={
        "cell_size": m.cell_size / factor,
        "fine_cell_size": None if m.fine_cell_size is None else m.fine_cell_size / factor,
        "layer_cell_thickness": m.layer_cell_thickness / factor,
    })
    time = case.time.model_copy(update={"step": case.time.step / factor})
    return case.model_copy(update={"mesh": mesh, "time": time})


def _metrics(s: RunSummary) -> dict[str, float | None]:
    out: dict[str, float | None] = {}
    for o in s.observations:
        out[f"{o.name}/{o.species}/peak [kg/m3]"] = o.peak
        out[f"{o.name}/{o.species}/peak time [s]"] = o.peak_time
        out[f"{o.name}/{o.species}/first above limit [s]"] = o.first_above_limit
    for sp, p in s.plume.items():
        out[f"plume/{sp}/largest extent [m]"] = p["largest_extent"]
    return out


def refinement_study(
    case: Case, out_dir: Path, *, ratio: float = 1.5, base_dir: Path | None = None,
    progress: Callable[[str, float, float], None] | None = None,
) -> dict[str, Convergence]:
    """Run the case on three grids (the case's own, then cell sizes and step divided by
    ``ratio`` and ``ratio²``), each in ``out_dir/grid_<k>``; write ``refinement.csv`` and
    ``refinement.md``; return the convergence of every reported quantity."""
    summaries = []
    for k in range(3):
        level = refine_case(case, ratio**k)
        summaries.append(run_case(level, out_dir / f"grid_{k}", base_dir=base_dir,
                                  progress=progress, mesh_folders=[]))
    coarse, medium, fine = (_metrics(s) for s in summaries)
    result: dict[str, Convergence] = {}
    for key, f1 in fine.items():
        f2, f3 = medium.get(key), coarse.get(key)
        if f1 is None or f2 is None or f3 is None:
            continue
        result[key] = converge(f1, f2, f3, ratio)
    rows = ["quantity,coarse,medium,fine,observed order [-],extrapolated,GCI fine [-]"]
    for key, c in result.items():
        rows.append(",".join([key, f"{c.coarse:.8g}", f"{c.medium:.8g}", f"{c.fine:.8g}",
                              "" if c.order is None else f"{c.order:.4g}",
                              "" if c.extrapolated is None else f"{c.extrapolated:.8g}",
                              "" if c.gci is None else f"{c.gci:.3e}"]))
    write_text_atomic(out_dir / "refinement.csv", "\n".join(rows) + "\n")
    lines = [f"# Mesh-refinement study: {case.title}", "", f"> {CAUTION}", "",
             f"Three grids, refinement ratio {ratio:g} in every cell size and in the time "
             "step; nodes: " + ", ".join(f"{s.n_nodes:,}" for s in summaries) + ".", "",
             "| quantity | coarse | medium | fine | order | extrapolated | GCI (fine) |",
             "|---|---|---|---|---|---|---|"]
    for key, c in result.items():
        order = "oscillatory" if c.order is None else f"{c.order:.3g}"
        ext = "—" if c.extrapolated is None else f"{c.extrapolated:.4g}"
        gci = "—" if c.gci is None else f"{100 * c.gci:.2g} %"
        lines.append(f"| {key} | {c.coarse:.4g} | {c.medium:.4g} | {c.fine:.4g} | {order} | "
                     f"{ext} | {gci} |")
    lines += ["", "Quantities missing from a grid (a limit never reached there) are left out. "
              "Times are in seconds and concentrations in kg/m³ (SI) in this table. An "
              "oscillatory, negative (diverging) or very large order means the grids are not "
              "yet in the asymptotic range: refine further before relying on the number.", ""]
    write_text_atomic(out_dir / "refinement.md", "\n".join(lines))
    return result
