"""What an ensemble says: exceedance probability over time, percentiles, sensitivity.

* **Exceedance probability** at each receptor and time: the fraction of finished members
  whose concentration there is above the species' limit (each member's history linearly
  interpolated onto a common grid of 201 times), with a 95 % Clopper–Pearson interval
  (Clopper, C.J. & Pearson, E.S. (1934), *The use of confidence or fiducial limits
  illustrated in the case of the binomial*, Biometrika 26, 404–413): exact for a binomial
  count, so the band widens honestly when there are few members. Latin hypercube members
  are not independent draws; for outputs that grow monotonically with the inputs the
  interval is conservative (McKay et al. 1979).
* **Percentiles** 5, 50 and 95 of each receptor's peak concentration and first time above
  the limit (a member that never exceeds counts as "not reached", later than any time):
  empirical quantiles without interpolation (Hyndman, R.J. & Fan, Y. (1996), *Sample
  quantiles in statistical packages*, Am. Statist. 50, 361–365, definition 1), so every
  percentile is a value some member produced.
* **Sensitivity**: Spearman's rank correlation between each uncertain value and each
  receptor quantity over the members. Rank correlation needs no other design than the
  ensemble itself and holds for any monotone response, however nonlinear (arrival times
  against conductivity spanning decades); a variance-based method (Sobol indices, e.g.
  SALib) would need its own sampling design of N·(2d + 2) runs to separate the inputs'
  shares and interactions. The ranking misses effects that are not monotone; with
  correlated inputs a value correlated with an influential one also ranks high.
"""

from __future__ import annotations

import csv
import io
import math
from dataclasses import dataclass

import numpy as np
from scipy import stats

from fe3d._typing import FloatArray
from fe3d.post.ensemble_figures import plot_exceedance, plot_probability_plan
from fe3d.post.files import write_text_atomic
from fe3d.post.probes import breakthrough
from fe3d.post.report import CAUTION
from fe3d.post.vtk import write_field
from fe3d.studies.ensemble import Ensemble, MemberResult, member_fields
from fe3d.units import from_si

__all__ = [
    "CONFIDENCE",
    "EnsembleStatistics",
    "ProbabilityFields",
    "ReceptorQuantity",
    "ReceptorSeries",
    "clopper_pearson",
    "probability_fields",
    "summarise_ensemble",
    "write_ensemble_tables",
]

CONFIDENCE = 0.95
"""Confidence level of the exceedance band (common practice, no source)."""
PERCENTILES = (5.0, 50.0, 95.0)
GRID_POINTS = 201


@dataclass(frozen=True)
class ProbabilityFields:
    """Per node of the shared mesh, the fraction of finished members above each species'
    limit: ``at_times`` species → ``(n_outputs, n_nodes)`` at ``output_times`` [s];
    ``during_run`` species → ``(n_nodes,)`` above at one time step at least."""

    output_times: FloatArray
    at_times: dict[str, FloatArray]
    during_run: dict[str, FloatArray]
    n_members: int


def probability_fields(ensemble: Ensemble) -> ProbabilityFields | None:
    """The probability fields of an ensemble whose members all ran on the shared mesh with
    the same output times (``None`` otherwise: a member with a mesh of its own, or an
    uncertain end time). Reads each member's saved fields in turn."""
    site, results = ensemble.site, ensemble.results
    if site is None or not results or any(r.own_mesh for r in results):
        return None
    times: FloatArray | None = None
    at: dict[str, FloatArray] = {}
    ever: dict[str, FloatArray] = {}
    for r in results:
        f = member_fields(ensemble.folder, r.index, site.n_nodes)
        if f is None or (times is not None and not np.array_equal(times, f.output_times)):
            return None
        times = f.output_times
        for sp, above in f.above.items():
            at[sp] = at.get(sp, 0.0) + above
            # a member kept before the fields over every step: above at an output time
            ever[sp] = ever.get(sp, 0.0) + f.ever_above.get(sp, above.any(axis=0))
    assert times is not None
    n = len(results)
    return ProbabilityFields(times, {sp: a / n for sp, a in at.items()},
                             {sp: e / n for sp, e in ever.items()}, n)


def clopper_pearson(k: FloatArray, n: int, *, confidence: float = CONFIDENCE
                    ) -> tuple[FloatArray, FloatArray]:
    """Exact binomial interval of a proportion k/n (Clopper & Pearson 1934), arrays of the
    shape of ``k``: lower and upper bounds [-]."""
    k = np.asarray(k, dtype=float)
    a = 1.0 - confidence
    with np.errstate(invalid="ignore"):
        lower = np.where(k > 0, stats.beta.ppf(a / 2, k, n - k + 1), 0.0)
        upper = np.where(k < n, stats.beta.ppf(1 - a / 2, k + 1, n - k), 1.0)
    return lower, upper


@dataclass(frozen=True)
class ReceptorSeries:
    """Exceedance probability at one receptor for one species over the common times:
    ``probability``, ``lower``, ``upper`` [-], shape ``(n_times,)``; ``limit`` [kg/m³]."""

    point: str
    species: str
    limit: float
    probability: FloatArray
    lower: FloatArray
    upper: FloatArray


@dataclass(frozen=True)
class ReceptorQuantity:
    """One receptor quantity over the finished members (SI; ``inf`` = limit not reached).

    ``values`` shape ``(n_finished,)``; ``percentiles`` the 5th, 50th and 95th;
    ``sensitivity`` Spearman's ρ against each uncertain value (NaN where undefined: a value
    or quantity without spread), ``p_values`` the two-sided p-value of each ρ.
    """

    point: str
    species: str
    measure: str  # "peak" or "first above limit"
    values: FloatArray
    percentiles: tuple[float, float, float]
    sensitivity: tuple[float, ...]
    p_values: tuple[float, ...]

    @property
    def kind(self) -> str:
        """``concentration`` or ``time``."""
        return "concentration" if self.measure == "peak" else "time"


@dataclass(frozen=True)
class EnsembleStatistics:
    """The statistics of an ensemble's finished members.

    ``times`` [s], shape ``(n_times,)``: the common grid of the exceedance series;
    ``ever_above`` maps (point, species) → (members above the limit at some time, finished
    members).
    """

    times: FloatArray
    exceedance: tuple[ReceptorSeries, ...]
    quantities: tuple[ReceptorQuantity, ...]
    ever_above: dict[tuple[str, str], tuple[int, int]]
    n_finished: int


def _first_above(times: FloatArray, values: FloatArray, limit: float) -> float:
    """First time above ``limit`` (linear between steps), ``inf`` when never; as
    fe3d.post.probes.breakthrough."""
    first = breakthrough(times, values, limit).first_above_limit
    return math.inf if first is None else first


def _spearman(x: FloatArray, y: FloatArray) -> tuple[float, float]:
    """Spearman's ρ and its p-value; NaN when either has no spread or too few members."""
    if x.size < 3 or np.all(x == x[0]) or np.all(y == y[0]):
        return math.nan, math.nan
    res = stats.spearmanr(x, y)
    return float(res.statistic), float(res.pvalue)


def summarise_ensemble(ensemble: Ensemble) -> EnsembleStatistics:
    """Exceedance series, percentiles and sensitivity of the finished members."""
    case, results = ensemble.case, ensemble.results
    times = np.linspace(0.0, case.time.end, GRID_POINTS)
    n = len(results)
    draws = ensemble.sample.values[[r.index for r in results]]
    names = [o.name for o in case.observation_points]
    series, quantities, ever = [], [], {}
    for sp, species in case.species.items():
        limit = species.limit
        for j, point in enumerate(names):
            above = np.array([_on_grid(r, sp, j, times) > limit for r in results]
                             ).reshape(n, times.size)
            k = above.sum(axis=0)
            lower, upper = clopper_pearson(k, n) if n else (k * 0.0, k * 0.0 + 1.0)
            series.append(ReceptorSeries(point, sp, limit, k / max(n, 1), lower, upper))
            peaks = np.array([float(r.history[sp][:, j].max()) for r in results])
            firsts = np.array([_first_above(r.times, r.history[sp][:, j], limit)
                               for r in results])
            ever[point, sp] = (int(np.isfinite(firsts).sum()), n)
            for measure, values in (("peak", peaks), ("first above limit", firsts)):
                quantities.append(_quantity(point, sp, measure, values, draws))
    return EnsembleStatistics(times, tuple(series), tuple(quantities), ever, n)


def _on_grid(result: MemberResult, species: str, j: int, times: FloatArray) -> FloatArray:
    return np.interp(times, result.times, result.history[species][:, j])


def _quantity(point: str, species: str, measure: str, values: FloatArray,
              draws: FloatArray) -> ReceptorQuantity:
    if values.size:
        pct = np.percentile(values, PERCENTILES, method="inverted_cdf")
        percentiles = (float(pct[0]), float(pct[1]), float(pct[2]))
    else:
        percentiles = (math.nan, math.nan, math.nan)
    rho = [_spearman(draws[:, i], values) for i in range(draws.shape[1])]
    return ReceptorQuantity(point, species, measure, values, percentiles,
                            tuple(r for r, _ in rho), tuple(p for _, p in rho))


# ----------------------------------------------------------------------------- tables


def _show(value: float, unit: str) -> str:
    if math.isnan(value):
        return ""
    return "not reached" if math.isinf(value) else f"{from_si(value, unit):.6g}"


def _csv(rows: list[list[str]]) -> str:
    buf = io.StringIO()
    csv.writer(buf, lineterminator="\n").writerows(rows)
    return buf.getvalue()


def write_ensemble_tables(ensemble: Ensemble, st: EnsembleStatistics) -> list[str]:
    """``ensemble_exceedance.csv`` and ``.png``, ``ensemble_percentiles.csv``,
    ``ensemble_sensitivity.csv``, ``ensemble_failures.csv`` and ``ensemble.md`` in the
    study folder, and ``ensemble_probability.vtu`` with its plan map when every member ran
    on the shared mesh (:func:`probability_fields`); returns their names."""
    out, case = ensemble.folder, ensemble.case
    tu, cu = case.output.time_unit, case.output.concentration_unit
    head = [f"time [{tu}]"]
    for s in st.exceedance:
        head += [f"{s.point} {s.species} P(above limit) [-]", f"{s.point} {s.species} "
                 f"lower {100 * CONFIDENCE:g} % [-]", f"{s.point} {s.species} upper "
                 f"{100 * CONFIDENCE:g} % [-]"]
    rows = [head] + [[f"{from_si(t, tu):.6g}", *[f"{x:.4g}" for s in st.exceedance
                                                 for x in (s.probability[i], s.lower[i],
                                                           s.upper[i])]]
                     for i, t in enumerate(st.times)]
    write_text_atomic(out / "ensemble_exceedance.csv", _csv(rows))

    rows = [["point", "species", "quantity", "unit",
             *[f"{p:g}th percentile" for p in PERCENTILES], "members"]]
    for q in st.quantities:
        unit = cu if q.kind == "concentration" else tu
        rows.append([q.point, q.species, q.measure, unit,
                     *[_show(v, unit) for v in q.percentiles], str(q.values.size)])
    write_text_atomic(out / "ensemble_percentiles.csv", _csv(rows))

    names = ensemble.sample.names
    rows = [["point", "species", "quantity", "uncertain value", "rank", "spearman rho [-]",
             "p-value [-]"]]
    for q in st.quantities:
        for rank, i in enumerate(_ranking(q), start=1):
            rows.append([q.point, q.species, q.measure, names[i], str(rank),
                         f"{q.sensitivity[i]:.3f}", f"{q.p_values[i]:.3g}"])
    write_text_atomic(out / "ensemble_sensitivity.csv", _csv(rows))

    rows = [["member", "error", *[f"{n} [{u or '-'}]" for n, u in
                                   zip(names, ensemble.sample.units, strict=True)]]]
    rows += [[str(f.index), f.error, *[f"{x:.10g}" for x in ensemble.sample.values[f.index]]]
             for f in ensemble.failures]
    write_text_atomic(out / "ensemble_failures.csv", _csv(rows))
    write_text_atomic(out / "ensemble.md", "\n".join(report_lines(ensemble, st)) + "\n")
    plot_exceedance(out / "ensemble_exceedance.png", st.times,
                    [(f"{s.point} {s.species}", s.probability, s.lower, s.upper)
                     for s in st.exceedance], time_unit=tu, confidence=CONFIDENCE,
                    n_members=st.n_finished, title=case.title)
    files = ["ensemble_exceedance.png", "ensemble_exceedance.csv", "ensemble_percentiles.csv",
             "ensemble_sensitivity.csv", "ensemble_failures.csv", "ensemble.md"]
    fields = probability_fields(ensemble)
    if fields is not None:
        files += _write_probability(ensemble, fields)
    return files


def _write_probability(ensemble: Ensemble, fields: ProbabilityFields) -> list[str]:
    """``ensemble_probability.vtu`` (every output time and the whole run) and the plan map
    ``ensemble_probability_plan.png`` (the whole run, largest over depth)."""
    site, case, out = ensemble.site, ensemble.case, ensemble.folder
    assert site is not None
    tu = case.output.time_unit
    data: dict[str, FloatArray] = {}
    for sp, at in fields.at_times.items():
        for t, p in zip(fields.output_times, at, strict=True):
            data[f"P({sp} above limit) at {from_si(t, tu):.6g} {tu} [-]"] = p
        data[f"P({sp} above limit) during the run [-]"] = fields.during_run[sp]
    write_field(site, out / "ensemble_probability.vtu", point_data=data)
    # plan positions: the nodes of one vertical column share x and y (extruded mesh)
    plan, column = np.unique(np.round(site.points[:2].T, 6), axis=0, return_inverse=True)
    column = column.ravel()
    largest = {}
    for sp, p in fields.during_run.items():
        best = np.zeros(len(plan))
        np.maximum.at(best, column, p)
        largest[sp] = best
    plot_probability_plan(out / "ensemble_probability_plan.png", plan.T,
                          column[site.faces["top"]], largest,
                          markers={o.name: (o.x, o.y) for o in case.observation_points},
                          n_members=fields.n_members, title=case.title)
    return ["ensemble_probability.vtu", "ensemble_probability_plan.png"]


def _ranking(q: ReceptorQuantity) -> list[int]:
    """Input indices by decreasing |ρ| (undefined ρ last)."""
    return sorted(range(len(q.sensitivity)),
                  key=lambda i: -abs(q.sensitivity[i]) if not math.isnan(q.sensitivity[i])
                  else math.inf)


def report_lines(ensemble: Ensemble, st: EnsembleStatistics) -> list[str]:
    """The study's Markdown report, line by line."""
    case, sample = ensemble.case, ensemble.sample
    tu, cu = case.output.time_unit, case.output.concentration_unit
    n, fin = ensemble.n_members, st.n_finished
    lines = [f"# Uncertainty ensemble: {case.title}", "", f"> {CAUTION}", "",
             f"{n} members, Latin hypercube sample with rank correlations imposed (Iman & "
             f"Conover 1982), seed {sample.seed}; {fin} finished, {len(ensemble.failures)} "
             f"failed ({ensemble.reused} reused from an earlier start); ran on "
             f"{ensemble.where}. The drawn values of every member are in "
             "`ensemble_draws.csv`.", "", "## Uncertain values", "",
             "| value | unit | drawn: 5 % | median | 95 % |", "|---|---|---|---|---|"]
    for k, (name, unit) in enumerate(zip(sample.names, sample.units, strict=True)):
        p = np.percentile(sample.values[:, k], PERCENTILES)
        lines.append(f"| {name} | {unit or '-'} | {p[0]:.4g} | {p[1]:.4g} | {p[2]:.4g} |")
    lines += ["", "## Probability of exceeding the limit", "",
              f"Fraction of the {fin} finished members above the species' limit; the "
              f"interval is the exact {100 * CONFIDENCE:g} % binomial (Clopper–Pearson) "
              "interval for that many members. Over time: `ensemble_exceedance.csv` and "
              "`ensemble_exceedance.png`; per node, when every member ran on the shared mesh: "
              "`ensemble_probability.vtu` (each output time and during the run) and its plan "
              "map `ensemble_probability_plan.png`.", "",
              "| receptor | species | limit | during the run | interval | at the end | "
              "interval |", "|---|---|---|---|---|---|---|"]
    for s in st.exceedance:
        k, m = st.ever_above[s.point, s.species]
        lo, hi = clopper_pearson(np.array([k]), m) if m else (np.array([0.0]),
                                                              np.array([1.0]))
        lines.append(f"| {s.point} | {s.species} | {from_si(s.limit, cu):.4g} {cu} | "
                     f"{k / max(m, 1):.2f} | {lo[0]:.2f}–{hi[0]:.2f} | "
                     f"{s.probability[-1]:.2f} | {s.lower[-1]:.2f}–{s.upper[-1]:.2f} |")
    lines += ["", "## Percentiles over the members", "",
              "Empirical percentiles (no interpolation: each is a member's value); 'not "
              "reached' when that share of members never exceeds the limit.", "",
              "| receptor | species | quantity | unit | 5 % | 50 % | 95 % |",
              "|---|---|---|---|---|---|---|"]
    for q in st.quantities:
        unit = cu if q.kind == "concentration" else tu
        lines.append(f"| {q.point} | {q.species} | {q.measure} | {unit} | "
                     + " | ".join(_show(v, unit) or "—" for v in q.percentiles) + " |")
    lines += ["", "## Which inputs matter", "",
              "Spearman rank correlation between each uncertain value and each receptor "
              "quantity (+1: the quantity rises with the value; 0: no monotone link). Rank "
              "correlation uses the ensemble's own members and holds for any monotone "
              "response; it misses effects that are not monotone, and an input correlated "
              "with an influential one ranks high too. Full table: "
              "`ensemble_sensitivity.csv`.", "",
              "| receptor | species | quantity | ranking (ρ) |", "|---|---|---|---|"]
    for q in st.quantities:
        ranked = ", ".join(f"{sample.names[i]} ({q.sensitivity[i]:+.2f})" for i in _ranking(q)
                           if not math.isnan(q.sensitivity[i])) or "— (no spread)"
        lines.append(f"| {q.point} | {q.species} | {q.measure} | {ranked} |")
    if ensemble.failures:
        lines += ["", "## Failed members", "",
                  "Each with its drawn values (also in `ensemble_failures.csv`); the "
                  "statistics above leave them out, which biases them if failures follow "
                  "the inputs.", ""]
        for f in ensemble.failures:
            drawn = ", ".join(f"{nm} = {x:.6g}{' ' + u if u else ''}" for nm, u, x in zip(
                sample.names, sample.units, sample.values[f.index], strict=True))
            lines.append(f"- member {f.index} ({drawn}): {f.error}")
    return lines
