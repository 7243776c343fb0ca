"""Mesh-refinement studies: observed order, Richardson extrapolation, the grid convergence
index (GCI) and a one-word verdict for each quantity a site assessor reports.

References: Celik, I.B., Ghia, U., Roache, P.J., Freitas, C.J., Coleman, H. & Raad, P.E.
(2008), *Procedure for estimation and reporting of uncertainty due to discretization in CFD
applications*, J. Fluids Eng. 130, 078001 (the three-grid procedure with general refinement
ratios, its fixed-point iteration for the apparent order, Eqs. 1–7); Roache, P.J. (1994),
*Perspective: a method for uniform reporting of grid refinement studies*, J. Fluids Eng. 116,
405–413 (the safety factor 1.25 for three or more grids).

By default every level divides every target cell size **and** the time step by the same
factor, so the Courant number v·Δt/h stays the same on every level while the grid Péclet
number falls. A study of the step alone (``refined="step"``: one mesh, the step divided) or of
the mesh alone (``refined="mesh"``: one step, the Courant number growing with the levels)
separates the two errors that the default study lumps together.
Levels run concurrently on the studies' executor (:mod:`fe3d.studies.executors`: a local
dask cluster, or any cluster by address); a level that fails is named
with its message and the levels that ran are still reported and written.
"""

from __future__ import annotations

import csv
import io
import json
import math
from collections.abc import Callable, Sequence
from concurrent.futures import Executor, as_completed
from contextlib import ExitStack
from dataclasses import dataclass
from pathlib import Path
from typing import Literal

import numpy as np

from fe3d.case.schema import Case
from fe3d.errors import CaseError, Fe3dError
from fe3d.mesh.site_mesh import SiteMesh
from fe3d.pipeline import mesh_case, run_case
from fe3d.post.figures import plot_refinement_breakthrough
from fe3d.post.files import write_text_atomic
from fe3d.post.probes import breakthrough
from fe3d.post.report import CAUTION, RunSummary
from fe3d.studies.executors import SerialExecutor, study_executor
from fe3d.studies.run_folder import read_histories
from fe3d.units import from_si

__all__ = [
    "GridConvergence",
    "LevelResult",
    "Quantity",
    "QuantityVerdict",
    "RefinementStudy",
    "SerialExecutor",
    "celik_gci",
    "judge",
    "refine_case",
    "refinement_study",
]

SAFETY_FACTOR = 1.25  # Roache (1994); Celik et al. (2008) step 5, three or more grids
ROUND_OFF = 8.0  # values within 8 eps × |value| of each other are equal (a few roundings)
DEFAULT_THRESHOLD = 0.05  # GCI below 5 % → "converged" (common practice, no source)
_MAX_ITERATIONS = 200

Refined = Literal["both", "mesh", "step"]
"""What a study refines: cell sizes and time step together (``both``), or one of them."""

REFINED_WORDS: dict[str, str] = {
    "both": "sizes and step", "mesh": "sizes", "step": "step"}
"""What a level's factor divides, in the words of the reports."""
_EPS = float(np.finfo(float).eps)


# ----------------------------------------------------------------------------- arithmetic


@dataclass(frozen=True)
class GridConvergence:
    """Celik et al. (2008) steps 3–5 for three values, fine (1) to coarse (3).

    ``order`` is the apparent order p of their Eq. 3 (an absolute value, as there), or None
    when the two differences are not both non-zero or the iteration does not converge; then
    the other fields are None too. Relative errors and the GCI are fractions (0.022 = 2.2 %).
    """

    r21: float
    r32: float
    order: float | None
    extrapolated: float | None  # φ_ext^21, Eq. 4a
    approximate_error: float | None  # e_a^21, Eq. 5a
    extrapolated_error: float | None  # e_ext^21, Eq. 5b
    gci: float | None  # GCI_fine^21, Eq. 6
    iterations: int = 0


def celik_gci(phi1: float, phi2: float, phi3: float, r21: float, r32: float
              ) -> GridConvergence:
    r"""Apparent order, extrapolated value, relative errors and GCI_fine of three grids.

    Parameters
    ----------
    phi1, phi2, phi3
        The quantity on the fine, medium and coarse grid (any unit).
    r21, r32
        Refinement ratios :math:`h_2/h_1` and :math:`h_3/h_2`, both > 1; they may differ.

    Returns
    -------
    GridConvergence

    Notes
    -----
    Celik et al. (2008) Eqs. 3a–c: with :math:`\varepsilon_{21} = \phi_2-\phi_1`,
    :math:`\varepsilon_{32} = \phi_3-\phi_2` and :math:`s = \mathrm{sign}(\varepsilon_{32}/
    \varepsilon_{21})`, the fixed point of
    :math:`p = |\ln|\varepsilon_{32}/\varepsilon_{21}| + q(p)| / \ln r_{21}`,
    :math:`q(p) = \ln\frac{r_{21}^p - s}{r_{32}^p - s}`, started from q = 0 (the constant-
    ratio order) and iterated until p changes by less than 8 eps. Then
    :math:`\phi_{ext} = (r_{21}^p\phi_1-\phi_2)/(r_{21}^p-1)`,
    :math:`e_a = |(\phi_1-\phi_2)/\phi_1|`, :math:`e_{ext} = |(\phi_{ext}-\phi_1)/\phi_{ext}|`
    and :math:`GCI = 1.25\,e_a/(r_{21}^p-1)`. The paper applies the same formulas to its
    oscillatory case (s < 0); :func:`judge` adds the verdict.
    """
    none = GridConvergence(r21, r32, None, None, None, None, None)
    e21, e32 = phi2 - phi1, phi3 - phi2
    if e21 == 0.0 or e32 == 0.0:
        return none
    s = 1.0 if e32 / e21 > 0 else -1.0
    log_ratio, ln_r21 = math.log(abs(e32 / e21)), math.log(r21)
    p = abs(log_ratio) / ln_r21
    for iterations in range(1, _MAX_ITERATIONS + 1):  # noqa: B007 (kept in the record)
        num, den = r21**p - s, r32**p - s
        if num <= 0.0 or den <= 0.0:
            return none
        p_next = abs(log_ratio + math.log(num / den)) / ln_r21
        done = abs(p_next - p) <= ROUND_OFF * _EPS * max(1.0, p_next)
        p = p_next
        if done:
            break
    else:
        return none
    grow = r21**p - 1.0
    if grow <= 0.0:
        return none
    ext = (r21**p * phi1 - phi2) / grow
    e_a = abs((phi1 - phi2) / phi1) if phi1 != 0.0 else None
    e_ext = abs((ext - phi1) / ext) if ext != 0.0 else None
    gci = None if e_a is None else SAFETY_FACTOR * e_a / grow
    return GridConvergence(r21, r32, p, ext, e_a, e_ext, gci, iterations)


@dataclass(frozen=True)
class QuantityVerdict:
    """The verdict on one quantity over the levels (values coarse → fine, SI).

    ``verdict`` is one word: ``converged``, ``converging``, ``oscillatory``, ``diverging``,
    ``unchanged`` (equal to round-off, or a limit not reached on any of three or more
    levels), ``missing`` (a value is absent on some level only: ``missing_levels``) or
    ``incomplete`` (fewer than three levels ran: values without an order). ``amplitude`` is
    the spread (max − min)/|fine| of the last three values for ``oscillatory`` and
    ``diverging`` (absolute when the fine value is 0), so that a reader sees whether the
    levels disagree by 0.1 % or by 30 %; ``growth`` is |ε21/ε32| for ``diverging``.
    """

    values: tuple[float | None, ...]
    verdict: str
    convergence: GridConvergence | None = None
    amplitude: float | None = None
    growth: float | None = None
    missing_levels: tuple[int, ...] = ()


def _equal(a: float, b: float, scale: float) -> bool:
    return abs(a - b) <= ROUND_OFF * _EPS * scale


def judge(values: Sequence[float | None], factors: Sequence[float], *,
          threshold: float = DEFAULT_THRESHOLD) -> QuantityVerdict:
    """One-word verdict on a quantity from its values on refinement levels.

    Parameters
    ----------
    values
        The quantity per level, coarse → fine (None where the level did not produce it).
    factors
        Each level's refinement factor (cell sizes divided by it), increasing.
    threshold
        GCI_fine below which the verdict is ``converged`` (a fraction).

    Notes
    -----
    The three finest levels are used. Monotone sequences whose fine difference is too large
    for any positive order are ``diverging``: with h1 = h2/r21 and ε = C h^p, the ratio
    ε32/ε21 = r21^p (r32^p − 1)/(r21^p − 1) increases with p from ln r32 / ln r21 at p → 0,
    so ε32/ε21 ≤ ln r32 / ln r21 admits no p > 0 (for r21 = r32: |ε21| ≥ |ε32|).
    """
    vals = tuple(values)
    missing = tuple(k for k, v in enumerate(vals) if v is None)
    if missing and len(missing) == len(vals) >= 3:  # never reached on any level: one answer
        return QuantityVerdict(vals, "unchanged")
    if missing:
        return QuantityVerdict(vals, "missing", missing_levels=missing)
    if len(vals) < 3:
        return QuantityVerdict(vals, "incomplete")
    phi3, phi2, phi1 = (float(v) for v in vals[-3:])  # type: ignore[arg-type]
    f3, f2, f1 = factors[-3:]
    r21, r32 = f1 / f2, f2 / f3
    scale = max(abs(phi1), abs(phi2), abs(phi3))
    if _equal(phi1, phi2, scale) and _equal(phi2, phi3, scale):
        return QuantityVerdict(vals, "unchanged")
    conv = celik_gci(phi1, phi2, phi3, r21, r32)
    e21, e32 = phi2 - phi1, phi3 - phi2
    if _equal(phi1, phi2, scale):  # the fine pair agrees to round-off: nothing left to gain
        zero = GridConvergence(r21, r32, None, phi1, 0.0, 0.0, 0.0)
        return QuantityVerdict(vals, "converged", zero)
    spread = max(phi1, phi2, phi3) - min(phi1, phi2, phi3)
    amplitude = spread / abs(phi1) if phi1 != 0.0 else spread
    if not _equal(phi2, phi3, scale) and e32 / e21 < 0.0:
        return QuantityVerdict(vals, "oscillatory", conv, amplitude=amplitude)
    if _equal(phi2, phi3, scale) or e32 / e21 <= math.log(r32) / math.log(r21):
        growth = math.inf if e32 == 0.0 else abs(e21 / e32)
        return QuantityVerdict(vals, "diverging", conv, amplitude=amplitude, growth=growth)
    ok = conv.gci is not None and conv.gci < threshold
    return QuantityVerdict(vals, "converged" if ok else "converging", conv)


# ----------------------------------------------------------------------------- levels


def refine_case(case: Case, factor: float, refined: Refined = "both") -> Case:
    """The case with every target cell size and every time step divided by ``factor`` (a
    unit's ``sublayers`` multiplied by it, rounded up); with ``refined="mesh"`` or ``"step"``
    only the sizes or only the steps (for steps that follow the plume, ``time.courant``:
    with the sizes alone such steps still shrink with the cells).

    Dividing the step with the cell sizes keeps the Courant number v·Δt/h of every cell the
    same on every level. Raises :class:`CaseError` for an imported mesh whose sizes would
    change (fe3d cannot refine it).
    """
    out = case
    if refined in ("both", "mesh"):
        out = _finer_mesh(out, factor)
    if refined in ("both", "step"):
        t = case.time
        steps = {
            "step": None if t.step is None else t.step / factor,  # None: steps follow the plume
            "min_step": None if t.min_step is None else t.min_step / factor,
            "max_step": None if t.max_step is None else t.max_step / factor,
        }
        if refined == "step" and t.step is None:  # steps that follow the plume: their target
            steps["courant"] = t.courant / factor
        out = out.model_copy(update={"time": t.model_copy(update=steps)})
    return out


def _finer_mesh(case: Case, factor: float) -> Case:
    """The case with every target cell size divided by ``factor``."""
    m = case.mesh
    if m.import_file is not None:
        err = CaseError("mesh.import_file", m.import_file, "an imported mesh cannot be "
                        "refined by fe3d; refine it where it was made")
        raise err
    mesh = m.model_copy(update={
        "cell_size": m.cell_size / factor,
        "fine_cell_size": None if m.fine_cell_size is None else m.fine_cell_size / factor,
        "layer_cell_thickness": m.layer_cell_thickness / factor,
        # the plume corridor's cells and layers shrink with its Péclet target (theory.md M4)
        "corridor_peclet": m.corridor_peclet / factor,
        "cells_across_source": m.cells_across_source * factor,  # theory.md M6
        "max_nodes": int(m.max_nodes * factor**3),
    })
    lines = [ln.model_copy(update={"cell_size": ln.cell_size / factor})
             for ln in case.refinement_lines]
    # a unit's own layer count or thickness refines too (a count rounded up, so it grows)
    layers = [ly.model_copy(update={
        "sublayers": None if ly.sublayers is None else min(
            200, math.ceil(ly.sublayers * factor - 1e-9)),
        "cell_thickness": None if ly.cell_thickness is None else ly.cell_thickness / factor})
        for ly in case.layers]
    return case.model_copy(update={"mesh": mesh, "refinement_lines": lines, "layers": layers})


@dataclass(frozen=True)
class LevelResult:
    """One refinement level: its factor, folder, and summary or one-line failure."""

    index: int
    factor: float
    folder: Path
    summary: RunSummary | None
    error: str | None = None


def _run_level(case: Case, folder: Path, base_dir: Path | None,
               site: SiteMesh | None = None) -> RunSummary | str:
    """Worker: run one level (on ``site`` when given: the one mesh of a study of the step);
    an :class:`Fe3dError` comes back as its one-line message."""
    try:
        return run_case(case, folder, base_dir=base_dir, mesh_folders=[], overwrite=True,
                        site=site)
    except Fe3dError as exc:
        return f"{type(exc).__name__}: " + "; ".join(str(exc).splitlines())


# ----------------------------------------------------------------------------- quantities


@dataclass(frozen=True)
class Quantity:
    """A reported quantity: its label, kind (``concentration``, ``time``, ``length``)."""

    point: str
    species: str
    measure: str
    kind: str

    @property
    def label(self) -> str:
        """``MW-1 tce peak`` or ``plume tce largest extent``."""
        return f"{self.point} {self.species} {self.measure}"


_MEASURES = (("peak", "concentration"), ("peak time", "time"),
             ("first above limit", "time"), ("last above limit", "time"))


def _level_values(case: Case, level: LevelResult) -> dict[Quantity, float | None]:
    """Every reported quantity of one level, SI (None when its limit is never reached)."""
    s = level.summary
    assert s is not None
    out: dict[Quantity, float | None] = {}
    times, history = read_histories(level.folder, case)
    names = [o.name for o in case.observation_points]
    for o in s.observations:
        b = breakthrough(times, history[o.species][:, names.index(o.name)], o.limit)
        for measure, kind in _MEASURES:
            value = {"peak": o.peak, "peak time": o.peak_time,
                     "first above limit": o.first_above_limit,
                     "last above limit": b.last_above_limit}[measure]
            out[Quantity(o.name, o.species, measure, kind)] = value
    for sp, p in s.plume.items():
        extent = p["largest_extent"]
        out[Quantity("plume", sp, "largest extent", "length")] = extent if extent > 0 else None
    return out


@dataclass(frozen=True)
class RefinementStudy:
    """What ``fe3d refine`` found: the levels, and a verdict per quantity."""

    levels: list[LevelResult]
    verdicts: dict[Quantity, QuantityVerdict]
    threshold: float
    time_unit: str
    concentration_unit: str
    dissimilar_layers: tuple[str, ...] = ()  # units whose cell layers miss the ratio
    refined: Refined = "both"  # what each level's factor divides

    def unit(self, q: Quantity) -> str:
        """Display unit of a quantity."""
        return {"concentration": self.concentration_unit, "time": self.time_unit,
                "length": "m"}[q.kind]

    def show(self, q: Quantity, value: float | None) -> str:
        """A value in display units, 4 significant digits (``not reached`` for None)."""
        return "not reached" if value is None else f"{from_si(value, self.unit(q)):.4g}"

    def line(self, q: Quantity) -> str:
        """``MW-1 tce peak: 6.1 → 6.5 → 6.6 mg/L → converging (order 1.8, GCI 7.2 %)``."""
        v = self.verdicts[q]
        values = " → ".join(self.show(q, x) for x in v.values)
        return f"{q.label}: {values} {self.unit(q)} → {v.verdict}{_detail(v)}"


def _detail(v: QuantityVerdict) -> str:
    c = v.convergence
    if v.verdict == "missing":
        return " on level " + ", ".join(str(k) for k in v.missing_levels)
    if v.verdict == "oscillatory" and v.amplitude is not None:
        return f" (amplitude {100 * v.amplitude:.2g} % of the fine value)"
    if v.verdict == "diverging" and v.growth is not None:
        spread = "" if v.amplitude is None else (
            f"; the levels span {100 * v.amplitude:.2g} % of the fine value")
        return f" (fine difference {v.growth:.2g}× the coarse one{spread})"
    if v.verdict in ("converged", "converging") and c is not None and c.gci is not None:
        order = "" if c.order is None else f"order {c.order:.3g}, "
        return f" ({order}GCI {100 * c.gci:.2g} %)"
    return ""


# ----------------------------------------------------------------------------- study


def refinement_study(
    case: Case, out_dir: Path, *, ratio: float = 1.5, levels: int = 3,
    refined: Refined = "both", threshold: float = DEFAULT_THRESHOLD,
    base_dir: Path | None = None,
    executor: Executor | None = None,
    on_level: Callable[[LevelResult], None] | None = None,
) -> RefinementStudy:
    """Run the case on refinement levels and judge every reported quantity.

    Parameters
    ----------
    case
        The case; level k divides its cell sizes and time step by ``ratio**k``.
    out_dir
        Study folder: ``level_<k>/`` run folders, ``refinement.csv``, ``refinement.md`` and
        ``refinement_breakthrough.png``.
    ratio, levels
        Refinement ratio between successive levels (> 1) and the number of levels.
    refined
        What the levels refine: ``both`` (cell sizes and time step, the Courant number
        fixed), ``mesh`` (cell sizes only) or ``step`` (the time step only, one mesh).
    threshold
        GCI_fine below which a quantity is ``converged`` (fraction).
    base_dir
        Folder that relative file names in the case are resolved from.
    executor
        Where the level runs go (default: the study executor of
        :func:`fe3d.studies.executors.study_executor`, a dask.distributed local cluster
        with one worker per core and at most ``levels``, closed afterwards). Passed
        executors are not shut down.
    on_level
        Called in the calling process as each level finishes (in completion order).

    Returns
    -------
    RefinementStudy
        Levels that failed carry their one-line message; their values are ``missing``.
        An error other than :class:`Fe3dError` is raised after the reports of the levels
        that ran are written.
    """
    factors = [ratio**k for k in range(levels)]
    cases = [refine_case(case, f, refined) for f in factors]
    results: list[LevelResult | None] = [None] * levels
    unexpected: BaseException | None = None
    with ExitStack() as stack:
        pool = executor if executor is not None else stack.enter_context(
            study_executor(n_runs=levels)).executor
        # a study of the step meshes once (folder ``mesh``) and runs every level on it
        site = None if refined != "step" else mesh_case(case, out_dir / "mesh",
                                                        base_dir=base_dir)[0]
        futures = {pool.submit(_run_level, c, out_dir / f"level_{k}", base_dir, site): k
                   for k, c in enumerate(cases)}
        for fut in as_completed(futures):
            k = futures[fut]
            folder = out_dir / f"level_{k}"
            try:
                got = fut.result()
            except Exception as exc:  # a bug, not bad input: report the rest, then raise
                unexpected = unexpected or exc
                got = f"{type(exc).__name__}: {exc}"
            res = (LevelResult(k, factors[k], folder, got) if isinstance(got, RunSummary)
                   else LevelResult(k, factors[k], folder, None, str(got)))
            results[k] = res
            if on_level is not None:
                on_level(res)
    done = [r for r in results if r is not None]
    study = _judge_levels(case, done, threshold, refined)
    _write_reports(case, study, out_dir)
    if unexpected is not None:
        raise unexpected
    return study


def _judge_levels(case: Case, levels: list[LevelResult], threshold: float,
                  refined: Refined = "both") -> RefinementStudy:
    ran = [lv for lv in levels if lv.summary is not None]
    per_level = {lv.index: _level_values(case, lv) for lv in ran}
    keys: list[Quantity] = []
    for vals in per_level.values():
        keys += [q for q in vals if q not in keys]
    factors = [lv.factor for lv in ran]
    verdicts = {q: judge([per_level[lv.index].get(q) for lv in ran], factors,
                         threshold=threshold) for q in keys}
    layers = () if refined == "step" else _dissimilar_layers(ran)  # one mesh: no layers
    return RefinementStudy(levels, verdicts, threshold, case.output.time_unit,
                           case.output.concentration_unit, layers, refined)


def _dissimilar_layers(ran: list[LevelResult]) -> tuple[str, ...]:
    """One line per unit whose cell-layer count does not grow with the levels' factors: the
    count of two successive levels differs from the factors' ratio by more than half of
    that ratio's step above 1 (at ratio 1.25: counts growing by under 12.5 % or over 37.5 %).
    A unit's count is an integer (its thickness over the layer thickness, rounded up, plus
    the levels put through source boxes, lenses and screens), so with a few layers a small
    ratio cannot refine it in step with the plan cells; the levels are then not similar in
    depth, which the grid convergence index assumes (Celik et al. 2008)."""
    counts = [_cell_layers(lv.folder) for lv in ran]
    if len(ran) < 2 or not all(counts):
        return ()
    out = []
    for unit in counts[0]:
        ns = [c.get(unit) for c in counts]
        if any(n is None for n in ns):
            continue
        factors = [lv.factor for lv in ran]
        pairs = zip(ns, ns[1:], factors, factors[1:], strict=False)  # successive levels
        if any(abs(b / a - fb / fa) > 0.5 * (fb / fa - 1.0) for a, b, fa, fb in pairs):
            steps = " → ".join(str(n) for n in ns)
            out.append(f"{unit}: cell layers {steps} over levels whose sizes shrink by "
                       f"{ran[1].factor / ran[0].factor:.4g} each: not similar in depth, so "
                       "the verdicts of quantities set by the vertical spread (peaks near a "
                       "source) are less reliable; a larger --ratio or thinner layers "
                       "(mesh.layer_cell_thickness) make the levels similar")
    return tuple(out)


def _cell_layers(folder: Path) -> dict[str, int]:
    """Each unit's cell-layer count on the mesh of the run in ``folder`` (its mesh.json), or
    nothing when the file is missing."""
    try:
        meta = json.loads((folder / "mesh.json").read_text(encoding="utf-8"))
        return {str(k): int(v) for k, v in meta["sublayers"].items()}
    except (OSError, ValueError, KeyError, TypeError):
        return {}


def _write_reports(case: Case, study: RefinementStudy, out_dir: Path) -> None:
    out_dir.mkdir(parents=True, exist_ok=True)
    ran = [lv for lv in study.levels if lv.summary is not None]
    tu = study.time_unit
    heads = [f"level {lv.index} ({REFINED_WORDS[study.refined]} / {lv.factor:.4g})"
             for lv in ran]
    rows = [["point", "species", "quantity", "unit", *heads, "observed order [-]",
             "extrapolated (unit of the row)", "GCI fine [%]", "verdict",
             "spread of the three finest [%]"]]
    for q, v in study.verdicts.items():
        c = v.convergence
        unit = study.unit(q)
        rows.append([q.point, q.species, q.measure, unit,
                     *["" if x is None else f"{from_si(x, unit):.8g}" for x in v.values],
                     "" if c is None or c.order is None else f"{c.order:.4g}",
                     "" if c is None or c.extrapolated is None
                     else f"{from_si(c.extrapolated, unit):.8g}",
                     "" if c is None or c.gci is None else f"{100 * c.gci:.4g}",
                     v.verdict, "" if v.amplitude is None else f"{100 * v.amplitude:.4g}"])
    buf = io.StringIO()
    csv.writer(buf, lineterminator="\n").writerows(rows)
    write_text_atomic(out_dir / "refinement.csv", buf.getvalue())

    title = {"both": "Mesh-refinement", "mesh": "Mesh-refinement (one time step)",
             "step": "Time-step refinement (one mesh)"}[study.refined]
    lines = [f"# {title} study: {case.title}", "", f"> {CAUTION}", "",
             *_level_lines(study), "",
             f"Verdicts: converged = GCI (fine) below {100 * study.threshold:g} %; converging "
             "= monotone, GCI above that; oscillatory = the differences change sign "
             "(amplitude: max − min of the three finest values over the fine value); "
             "diverging = monotone with differences growing with refinement (its spread "
             "given the same way, to show how much the levels differ); unchanged = "
             "equal to round-off, or a limit not reached on any level; missing = a limit "
             "not reached on some levels only. Order, "
             "extrapolated value and GCI: Celik et al. (2008), safety factor 1.25.", "",
             f"| quantity | unit | {' | '.join(f'level {lv.index}' for lv in ran)} | order | "
             "extrapolated | GCI (fine) | verdict |",
             "|---|---|" + "---|" * len(ran) + "---|---|---|---|"]
    for q, v in study.verdicts.items():
        c = v.convergence
        order = "—" if c is None or c.order is None else f"{c.order:.3g}"
        ext = "—" if c is None or c.extrapolated is None else study.show(q, c.extrapolated)
        gci = "—" if c is None or c.gci is None else f"{100 * c.gci:.2g} %"
        vals = " | ".join(study.show(q, x) for x in v.values)
        lines.append(f"| {q.label} | {study.unit(q)} | {vals} | {order} | {ext} | {gci} | "
                     f"{v.verdict}{_detail(v)} |")
    lines += ["", "Peak, peak time and first time above the limit come from each level's "
              "summary; the last time above the limit is not in the run summary and is "
              f"computed here from each level's `histories.csv` (8 significant digits, {tu}); "
              "a last time equal to the end of the simulated period means the receptor is "
              "still above the limit at the end. "
              "A verdict other than converged means: refine further, or treat the spread "
              "between levels as part of the uncertainty.", ""]
    write_text_atomic(out_dir / "refinement.md", "\n".join(lines))
    _write_figure(case, study, out_dir)


LEVELS_TEXT: dict[str, str] = {
    "both": "Each level divides every target cell size and the time step by the same factor, "
            "so the Courant number is the same on every level (the largest per level is "
            "listed; it varies with the smallest cells the mesher makes) while the grid Péclet "
            "number falls.",
    "mesh": "Each level divides every target cell size by its factor and keeps the case's "
            "time step, so the Courant number grows with the levels (the largest per level is "
            "listed): the differences are the mesh's error at this step.",
    "step": "Each level divides the time step by its factor on the case's own mesh (the same "
            "on every level), so the Courant number falls with the levels: the differences "
            "are the time step's error on this mesh, and the extrapolated value is this mesh's "
            "answer without it.",
}
"""The levels' paragraph of refinement.md, by what the study refines."""


def _level_lines(study: RefinementStudy) -> list[str]:
    """Per level: factor, step, nodes, largest Courant number; then the failures."""
    out = ["## Levels", "", LEVELS_TEXT[study.refined], ""]
    for lv in study.levels:
        s = lv.summary
        if s is None:
            out.append(f"- level {lv.index} (÷{lv.factor:.4g}): FAILED — {lv.error}")
            continue
        courant = ", ".join(f"{sp} {c:.3g}" for sp, c in s.max_courant.items())
        out.append(f"- level {lv.index} (÷{lv.factor:.4g}): {s.n_nodes:,} nodes, "
                   f"{s.n_steps} steps, largest Courant {courant}, folder `{lv.folder.name}`")
    ran = sum(lv.summary is not None for lv in study.levels)
    if ran < 3:
        out += ["", f"Only {ran} level(s) ran: values are reported without an order."]
    out += ["", *(f"- {line}" for line in study.dissimilar_layers)] \
        if study.dissimilar_layers else []
    return out


def _write_figure(case: Case, study: RefinementStudy, out_dir: Path) -> None:
    names = [o.name for o in case.observation_points]
    ran = [lv for lv in study.levels if lv.summary is not None]
    if not names or not ran:
        return
    curves = []
    for lv in ran:
        times, history = read_histories(lv.folder, case)
        curves.append((f"level {lv.index} (÷{lv.factor:.3g})", times, history))
    plot_refinement_breakthrough(
        out_dir / "refinement_breakthrough.png", curves, names,
        {sp: s.limit for sp, s in case.species.items()}, time_unit=study.time_unit,
        conc_unit=study.concentration_unit, title=f"{case.title}: refinement levels")
