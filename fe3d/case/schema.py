"""Frozen section models of a case file. Every physical value is converted to SI on input.

Per-field rules live on the fields (pydantic); rules that relate sections to each other live
in :func:`cross_checks`, which returns one :class:`~fe3d.errors.CaseError` per problem with
the key path of the offending value.
"""

from __future__ import annotations

import itertools
import math
from pathlib import PurePosixPath, PureWindowsPath
from typing import Annotated, Any, Literal

from pydantic import AfterValidator, Field

from fe3d.case.geology import (
    Boundary,
    Lens,
    RefinementLine,
    Stratigraphy,
    base_bottom,
    face_names,
    geology_checks,
    ground_top,
    plan_origin,
    plan_outline,
    point_in_polygon,
)
from fe3d.case.hydro import HeadDependent, Recharge, SpecifiedFlux, Well, hydro_checks
from fe3d.case.schema_types import (
    Angle,
    Concentration,
    Conductivity,
    Diffusivity,
    Fraction,
    Length,
    MassRate,
    MassRatio,
    Name,
    NonNegativeLength,
    Partition,
    Porosity,
    PositiveConcentration,
    PositiveDensity,
    PositiveLength,
    PositiveTime,
    Range,
    ReactionRate,
    SecondOrderRate,
    Section,
    Time,
    _concentration_unit,
    _time_unit,
)
from fe3d.case.uncertain import UncertainInputs, uncertain_checks
from fe3d.errors import CaseError
from fe3d.units import from_si

__all__ = [
    "Case",
    "FixedHead",
    "InputControl",
    "Layer",
    "Material",
    "MeshControl",
    "ModelBox",
    "ObservationPoint",
    "OutputControl",
    "SolverControl",
    "Source",
    "Species",
    "TimeControl",
    "UserReactions",
    "cross_checks",
]



Gradient = Annotated[float, Field(ge=-10.0, le=10.0, allow_inf_nan=False)]
"""A slope [m/m]: at most 10 (84°) either way (common practice, no source)."""


class ModelBox(Section):
    """Axis-aligned model box: plan extent and a flat top; the base is the lowest layer bottom."""

    x: Range
    y: Range
    top: Length


class Material(Section):
    """Hydraulic and transport properties of one hydrostratigraphic material."""

    horizontal_conductivity: Conductivity
    vertical_conductivity: Conductivity | None = None
    porosity: Porosity
    bulk_density: PositiveDensity
    longitudinal_dispersivity: NonNegativeLength
    transverse_dispersivity: NonNegativeLength
    vertical_dispersivity: NonNegativeLength | None = None
    diffusion_coefficient: Diffusivity = 0.0
    tortuosity: Fraction | Literal["millington_quirk"] = 1.0
    conductivity_strike: Angle = 0.0
    conductivity_dip: Angle = 0.0
    conductivity_file: str | None = None

    @property
    def k_vertical(self) -> float:
        """Vertical conductivity [m/s] (defaults to the horizontal one)."""
        if self.vertical_conductivity is None:
            return self.horizontal_conductivity
        return self.vertical_conductivity

    @property
    def effective_diffusion(self) -> float:
        """Effective molecular diffusion D* [m²/s] in the pore water (theory.md T4): the
        free-water coefficient times ``tortuosity``, or times θ^(1/3) with
        ``tortuosity = "millington_quirk"`` (Millington & Quirk 1961, saturated form)."""
        if self.tortuosity == "millington_quirk":
            return self.diffusion_coefficient * self.porosity ** (1.0 / 3.0)
        return self.diffusion_coefficient * self.tortuosity

    @property
    def alpha_vertical(self) -> float:
        """Vertical transverse dispersivity [m] (defaults to the horizontal transverse one)."""
        if self.vertical_dispersivity is None:
            return self.transverse_dispersivity
        return self.vertical_dispersivity


class Layer(Section):
    """A hydrostratigraphic unit between the previous layer's bottom (or the top) and its own."""

    name: Name
    material: Name
    bottom: Length | None = None  # None: the base comes from stratigraphy (borehole picks)
    bottom_gradient: tuple[Gradient, Gradient] = (0.0, 0.0)
    sublayers: Annotated[int, Field(ge=1, le=200)] | None = None
    cell_thickness: PositiveLength | None = None

    def bottom_at(self, x: float, y: float, x0: float, y0: float) -> float:
        """Elevation [m] of the planar bottom at (x, y), given the plan origin (x0, y0)."""
        assert self.bottom is not None
        gx, gy = self.bottom_gradient
        return self.bottom + gx * (x - x0) + gy * (y - y0)


class FixedHead(Section):
    """A fixed hydraulic head on a named face of the model (a boundary edge name, top, bottom).

    Either ``head`` plus ``head_gradient`` · (point − ``reference_point``) (constant or
    varying linearly along the face), or ``head_by_elevation``: (elevation, head) pairs,
    interpolated linearly in z and held constant beyond the first and last pair, plus the
    horizontal part of ``head_gradient`` (theory.md F2).
    """

    face: Name
    head: Length | None = None
    head_gradient: tuple[Gradient, Gradient, Gradient] = (0.0, 0.0, 0.0)
    reference_point: tuple[Length, Length, Length] = (0.0, 0.0, 0.0)
    head_by_elevation: list[tuple[Length, Length]] | None = None

    def head_at(self, points: Any) -> Any:
        """Head [m] at points ``(3, k)``."""
        g, r = self.head_gradient, self.reference_point
        if self.head_by_elevation is None:
            assert self.head is not None
            return self.head + sum(g[i] * (points[i] - r[i]) for i in range(3))
        import numpy as np

        z, h = (np.array(col, dtype=float) for col in zip(*self.head_by_elevation,
                                                              strict=True))
        return np.interp(points[2], z, h) + sum(g[i] * (points[i] - r[i]) for i in range(2))


class Species(Section):
    """A dissolved species: sorption, decay and its compliance limit."""

    kd: Partition | dict[Name, Partition] = 0.0
    half_life: PositiveTime | None = None
    decay_in_sorbed_phase: bool = True
    limit: PositiveConcentration
    initial_concentration: Concentration = 0.0
    sorption: Literal["linear", "freundlich", "langmuir"] = "linear"
    freundlich_kf: Partition | dict[Name, Partition] = 0.0
    freundlich_n: Annotated[float, Field(gt=0.0, le=5.0)] = 1.0
    freundlich_reference: PositiveConcentration = 1e-3
    # concentration at which a nonlinear isotherm is linearised for the retarded velocity
    # (corridor, step rule, SUPG τ); default: the largest source or initial value
    linearisation_concentration: PositiveConcentration | None = None
    langmuir_capacity: MassRatio | dict[Name, MassRatio] = 0.0
    langmuir_affinity: Partition = 0.0
    parent: Name | None = None
    yield_from_parent: Annotated[float, Field(gt=0.0, le=100.0)] = 1.0
    second_order_rate: SecondOrderRate | None = None
    monod_max_rate: ReactionRate | None = None
    monod_half_saturation: PositiveConcentration | None = None

    @property
    def nonlinear_reaction(self) -> tuple[str, dict[str, float]] | None:
        """Second-order or Monod loss of the dissolved phase (theory.md T11), if any."""
        if self.second_order_rate is not None:
            return "second_order", {"rate": self.second_order_rate}
        if self.monod_max_rate is not None and self.monod_half_saturation is not None:
            return "monod", {"max_rate": self.monod_max_rate,
                             "half_saturation": self.monod_half_saturation}
        return None

    def kd_of(self, material: str) -> float:
        """Distribution coefficient [m³/kg] in ``material``."""
        return _per_material(self.kd, material)

    def isotherm_of(self, material: str) -> tuple[str, dict[str, float]]:
        """Isotherm name and its SI parameters in ``material`` (theory.md R1–R3, T10).

        Freundlich: s = K_F c^N with K_F = freundlich_kf · c_ref^(1−N), i.e. the case gives
        the partition coefficient [m³/kg] at the reference concentration c_ref.
        """
        if self.sorption == "freundlich":
            kf = _per_material(self.freundlich_kf, material)
            c_ref = self.freundlich_reference
            return "freundlich", {"k_f": kf * c_ref ** (1.0 - self.freundlich_n),
                                  "n": self.freundlich_n}
        if self.sorption == "langmuir":
            return "langmuir", {"s_max": _per_material(self.langmuir_capacity, material),
                                "k_l": self.langmuir_affinity}
        return "linear", {"kd": self.kd_of(material)}

    @property
    def decay_rate(self) -> float:
        """First-order rate λ = ln 2 / half-life [1/s] (0 without a half-life)."""
        return 0.0 if self.half_life is None else math.log(2.0) / self.half_life


def _per_material(value: float | dict[str, float], material: str) -> float:
    """A single value, or the value for ``material`` from a table (0 when absent)."""
    return value.get(material, 0.0) if isinstance(value, dict) else value


class Source(Section):
    """A source in a box or on a patch of a boundary face (theory.md "Sources").

    ``kind``: ``fixed_concentration`` holds the nodes at ``concentration`` (optionally
    depleting with ``depletion_half_life`` from ``start``; zero holds them clean);
    ``inflow_concentration`` gives the water entering through a face patch this
    concentration (a flux-type, third-type condition); ``mass_loading`` injects ``mass_rate``
    spread evenly over the box's volume (its Galerkin nodal shares);
    ``initial_plume`` sets ``concentration`` in the region at t = 0.
    """

    name: Name
    species: Name
    shape: Literal["box", "face_patch", "point", "line"]
    kind: Literal["fixed_concentration", "inflow_concentration", "mass_loading",
                  "initial_plume"] = "fixed_concentration"
    concentration: Concentration | None = None
    mass_rate: MassRate | None = None
    depletion_half_life: PositiveTime | None = None
    face: Name | None = None
    x: Range | None = None
    y: Range | None = None
    z: Range | None = None
    points: list[tuple[Length, Length, Length]] | None = None  # shape point (one) or line
    start: Time = 0.0
    stop: PositiveTime | None = None
    release_file: str | None = None
    release_series: list[tuple[float, float]] | None = None  # filled from release_file [s, SI]
    concentration_file: str | None = None  # initial_plume: measured points
    concentration_points: list[tuple[float, float, float, float]] | None = None  # filled, SI

    @property
    def plan_centre(self) -> tuple[float, float] | None:
        """Plan centre [m] of the source: of its points, or of its x and y ranges (None
        when a face patch leaves a range open)."""
        if self.points is not None:
            return (sum(p[0] for p in self.points) / len(self.points),
                    sum(p[1] for p in self.points) / len(self.points))
        if self.x is None or self.y is None:
            return None
        return 0.5 * (self.x[0] + self.x[1]), 0.5 * (self.y[0] + self.y[1])

    @property
    def peak_concentration(self) -> float | None:
        """Largest concentration the source holds or carries [kg/m³] (None for a mass
        loading): the constant value or the largest of its release series."""
        if self.kind == "mass_loading":
            return None
        if self.release_series is not None:
            return max(v for _, v in self.release_series)
        if self.concentration_points is not None:
            return max(p[3] for p in self.concentration_points)
        return self.concentration

    def strength(self, t0: float, t1: float) -> float:
        """Mean source value over [t0, t1] [kg/m³ or kg/s]: the concentration or mass rate,
        from the release series (linear between its rows, constant beyond its ends) or the
        constant value, times the depletion factor at the midpoint (theory.md T3c)."""
        if self.release_series is None:
            base = self.concentration if self.mass_rate is None else self.mass_rate
            assert base is not None
            value = base
        else:
            value = _series_mean(self.release_series, t0, t1)
        if self.depletion_half_life is not None:
            tm = 0.5 * (t0 + t1)
            value *= math.exp(-math.log(2.0) * max(tm - self.start, 0.0)
                              / self.depletion_half_life)
        return value


def _series_mean(series: list[tuple[float, float]], t0: float, t1: float) -> float:
    """Exact mean over [t0, t1] of the piecewise-linear series (constant beyond its ends)."""
    import numpy as np

    t, v = (np.array(col, dtype=float) for col in zip(*series, strict=True))
    if t1 <= t0:
        return float(np.interp(t0, t, v))
    inner = t[(t > t0) & (t < t1)]
    knots = np.concatenate([[t0], inner, [t1]])
    vals = np.interp(knots, t, v)
    return float(np.sum(0.5 * (vals[1:] + vals[:-1]) * np.diff(knots)) / (t1 - t0))


class UserReactions(Section):
    """Rate laws written by the user in Python (theory.md R10, T11b): ``function`` names
    ``"module:function"`` (imported from the case folder or the Python path, never evaluated
    from text); it receives the concentrations of ``species`` (rows in this order) and
    returns their rates and derivatives."""

    function: str
    species: list[Name] = Field(min_length=1)


class ObservationPoint(Section):
    """A point (``z``) or a vertical well screen (``screen``) where concentrations are recorded."""

    name: Name
    x: Length
    y: Length
    z: Length | None = None
    screen: Range | None = None
    kind: Literal["monitoring", "receptor"] = "monitoring"


MAX_OUTPUT_TIMES = 10_000
"""Most output times a run writes (each is a field of every node and species, a plume
surface and table rows; more is a mistake, not a result; common practice, no source)."""


class TimeControl(Section):
    """Simulated period, step and output times.

    Without ``step`` the step follows the plume: the longest ``end``/2^k that keeps the
    cell Courant number at or below ``courant`` in the cells the plume occupies (theory.md
    T14b). With ``step``, steps are that long (or adaptive from it)."""

    end: PositiveTime
    step: PositiveTime | None = None
    courant: Annotated[float, Field(gt=0.0, le=100.0)] = 1.0
    output_interval: PositiveTime | None = None
    output_times: list[Time] | None = None
    scheme: Literal["backward_euler", "crank_nicolson", "bdf2"] = "crank_nicolson"
    adaptive: bool = False
    min_step: PositiveTime | None = None
    max_step: PositiveTime | None = None
    error_tolerance: Annotated[float, Field(gt=0.0, le=0.5)] = 0.01

    def output_schedule(self) -> list[float]:
        """Sorted output times [s] (always ending with the end time)."""
        if self.output_times is not None:
            times = set(self.output_times)
        elif self.output_interval is not None:
            n = math.floor(self.end / self.output_interval + 1e-9)
            times = {k * self.output_interval for k in range(1, n + 1)}
        else:
            times = set()
        times.add(self.end)
        return sorted(x for x in times if x > 0)


class MeshControl(Section):
    """Target cell sizes [m]: plan size away from features, near features, and layer thickness;
    the plume corridor (on by default): its grid Péclet target and the node budget; the plan
    cells across a source box."""

    cell_size: PositiveLength
    fine_cell_size: PositiveLength | None = None
    fine_zone_radius: NonNegativeLength = 0.0
    layer_cell_thickness: PositiveLength
    import_file: str | None = None  # a meshio-readable tetrahedral mesh with unit tags
    corridor: bool = True  # refine along the sources' pathlines (docs/theory.md M1-M4)
    corridor_peclet: Annotated[float, Field(gt=0, le=100)] = 2.0  # grid Péclet h/α_L target
    max_nodes: Annotated[int, Field(ge=1000)] = 1_500_000  # node budget of the corridor
    # plan cells across the shorter plan side of a source box (docs/theory.md M6)
    cells_across_source: Annotated[float, Field(gt=0, le=50)] = 4.0

    @property
    def sample_spacing(self) -> float:
        """Spacing [m] of the points that sample a well screen, an observation screen or a
        line source: a quarter of ``layer_cell_thickness``, so every cell layer a screen
        crosses holds about four points, but no closer than 5 cm (common practice, no
        source)."""
        return max(self.layer_cell_thickness / 4.0, 0.05)


class SolverControl(Section):
    """Transport options.

    By default (``monotone`` and ``flux_limiting``) every step is the low-order backward
    Euler step corrected towards the Galerkin step of ``time.scheme`` as far as the local
    bounds allow (theory.md T16, T16b): no new minimum or maximum at any step length.
    ``monotone = false`` selects SUPG (``supg``, T6) or plain Galerkin, which can undershoot
    next to steep fronts; ``flux_limiting = false`` keeps the low-order step alone."""

    supg: bool = True
    linear_solver: Literal["auto", "direct", "iterative", "gauss_seidel", "jacobi",
                           "amg"] = "auto"
    tolerance: Annotated[float, Field(gt=0, lt=1e-2)] = 1e-10
    max_step_cuts: Annotated[int, Field(ge=0, le=20)] = 6
    shock_capturing: bool = False
    shock_capturing_passes: Annotated[int, Field(ge=1, le=10)] = 2
    monotone: bool = True  # lumped storage + discrete upwinding instead of SUPG (T16)
    flux_limiting: bool = True  # corrected towards the time scheme's Galerkin step (T16b)
    newton_max_iterations: Annotated[int, Field(ge=1, le=200)] = 30


MAX_TITLE_CHARACTERS = 200
"""Longest title or site name [characters]: it heads the report and every figure."""


def _folder_below_here(folder: str) -> str:
    """A run folder named in a case file stays below the folder fe3d is started from: a
    relative path without ``..``, ``~`` or a drive (``--out`` on the command line, the
    user's own choice, may name any folder)."""
    parts = PurePosixPath(folder.replace("\\", "/")).parts
    if not folder.strip() or PurePosixPath(folder).is_absolute() or PureWindowsPath(folder).drive \
            or folder.startswith(("/", "\\", "~")) or ".." in parts or "\0" in folder:
        msg = ("must be a relative folder below the current one, without '..' or '~' (give "
               "--out on the command line to write elsewhere)")
        raise ValueError(msg)
    return folder


class OutputControl(Section):
    """Where results go and in which units they are shown."""

    folder: Annotated[str, AfterValidator(_folder_below_here),
                      Field(max_length=MAX_TITLE_CHARACTERS)] | None = None
    concentration_unit: Annotated[str, AfterValidator(_concentration_unit)] = "mg/L"
    time_unit: Annotated[str, AfterValidator(_time_unit)] = "d"
    vtu_series: bool = False
    """Besides ``results.vtkhdf`` (the mesh once, every output time appended), also write
    ``mesh.msh``, ``mesh.vtu``, ``flow.vtu`` and one ``.vtu`` per output time with a
    ``.pvd`` index, for viewers that cannot open VTKHDF."""


class InputControl(Section):
    """Where the data files the case names may come from.

    By default every data file must lie inside the case folder and not be reached through
    a symbolic link (:mod:`fe3d.case.data_files`); ``allow_outside_files = true`` lifts both
    rules, for a case that reads shared files elsewhere."""

    allow_outside_files: bool = False


class Case(Section):
    """A whole validated case, every number in SI units."""

    title: Annotated[str, Field(min_length=1, max_length=MAX_TITLE_CHARACTERS)]
    site: Annotated[str, Field(max_length=MAX_TITLE_CHARACTERS)] = ""
    input: InputControl = InputControl()
    box: ModelBox | None = None
    boundary: Boundary | None = None
    stratigraphy: Stratigraphy | None = None
    lenses: list[Lens] = Field(default_factory=list)
    refinement_lines: list[RefinementLine] = Field(default_factory=list)
    materials: dict[Name, Material]
    layers: list[Layer] = Field(min_length=1)
    fixed_heads: list[FixedHead] = Field(default_factory=list)
    species: dict[Name, Species] = Field(min_length=1)
    sources: list[Source] = Field(default_factory=list)
    user_reactions: UserReactions | None = None
    observation_points: list[ObservationPoint] = Field(default_factory=list)
    wells: list[Well] = Field(default_factory=list)
    recharge: list[Recharge] = Field(default_factory=list)
    head_dependent: list[HeadDependent] = Field(default_factory=list)
    specified_fluxes: list[SpecifiedFlux] = Field(default_factory=list)
    time: TimeControl
    mesh: MeshControl
    solver: SolverControl = SolverControl()
    output: OutputControl = OutputControl()
    uncertain: UncertainInputs | None = None  # ensembles only (fe3d/case/uncertain.py)

    @property
    def z_bottom_min(self) -> float:
        """Lowest elevation of the model base [m] (boundary vertices, or the picks)."""
        z = base_bottom(self)
        return math.nan if z is None else z

    @property
    def z_top(self) -> float:
        """Highest ground elevation [m] (box or boundary top, or the highest ground pick)."""
        z = ground_top(self)
        return math.nan if z is None else z

    def outline(self) -> tuple[list[tuple[float, float]], list[str]]:
        """Plan boundary: counter-clockwise vertices [m] and one name per edge."""
        return plan_outline(self)

    def face_names(self) -> list[str]:
        """Boundary face names the geometry defines: edge names, top, bottom."""
        return face_names(self)

    def _corner_bottoms(self, layer: Layer) -> list[float]:
        x0, y0 = plan_origin(self)
        return [layer.bottom_at(x, y, x0, y0) for x, y in self.outline()[0]]

    def output_schedule(self) -> list[float]:
        """Sorted output times [s] (always ending with the end time)."""
        return self.time.output_schedule()


def _in(value: float, lo: float, hi: float) -> bool:
    return lo - 1e-9 <= value <= hi + 1e-9


def _time_text(seconds: float, unit: str) -> str:
    """A time [s] shown in the case's output time unit, as the user wrote times."""
    return f"{from_si(seconds, unit):.6g} {unit}"


def _fixed_head_checks(key: str, fh: FixedHead) -> list[CaseError]:
    """One way of giving the head, and an elevation table that can be interpolated."""
    table = fh.head_by_elevation
    if (fh.head is None) == (table is None):
        return [CaseError(f"{key}.head", "both" if table is not None else "(missing)",
                          "give exactly one of head (with an optional head_gradient) or "
                          "head_by_elevation")]
    if table is None:
        return []
    z = [pair[0] for pair in table]
    if len(z) < 2 or any(b <= a for a, b in itertools.pairwise(z)):
        return [CaseError(f"{key}.head_by_elevation", f"elevations {z} m",
                          "at least two [elevation, head] pairs with strictly increasing "
                          "elevations")]
    if fh.head_gradient[2] != 0.0:
        return [CaseError(f"{key}.head_gradient", f"{list(fh.head_gradient)}",
                          "the vertical component must be 0 with head_by_elevation (the "
                          "table already gives the head against elevation)")]
    return []


def cross_checks(case: Case) -> list[CaseError]:
    """Rules that relate one section to another; one error per problem, with its key path."""
    errs: list[CaseError] = []
    tu = case.output.time_unit
    if case.solver.monotone and case.solver.shock_capturing:
        errs.append(CaseError("solver.shock_capturing", "true",
                              "is not used with solver.monotone = true (the low-order "
                              "scheme needs no shock capturing): set one of them false"))
    explicit = case.solver.model_fields_set
    if "flux_limiting" in explicit and case.solver.flux_limiting and not case.solver.monotone:
        errs.append(CaseError("solver.flux_limiting", "true",
                              "needs solver.monotone = true (it corrects the low-order scheme)"))
    if case.solver.monotone and case.time.scheme == "bdf2":
        errs.append(CaseError("time.scheme", "bdf2",
                              "cannot be bounded (its step can undershoot at any step length): "
                              "choose 'crank_nicolson' (second order, bounded) or "
                              "'backward_euler', or set solver.monotone = false to use BDF2 "
                              "with SUPG, which may undershoot"))
    if case.box is not None:
        if not case.box.x[1] > case.box.x[0]:
            errs.append(CaseError("box.x", f"{list(case.box.x)} m",
                                  "the second value must exceed the first"))
        if not case.box.y[1] > case.box.y[0]:
            errs.append(CaseError("box.y", f"{list(case.box.y)} m",
                                  "the second value must exceed the first"))
    if errs:
        return errs
    geo_errs = geology_checks(case)
    errs += geo_errs
    if any(e.key_path in ("box", "boundary", "boundary.vertices") for e in geo_errs):
        return errs
    verts = case.outline()[0]
    x0, x1 = min(v[0] for v in verts), max(v[0] for v in verts)
    y0, y1 = min(v[1] for v in verts), max(v[1] for v in verts)
    top = case.z_top
    where = "corner of the box" if case.box is not None else "vertex of the boundary"
    upper_name = "box.top" if case.box is not None else "boundary.top"
    upper: list[float] | None = None if math.isnan(top) else [top] * len(verts)
    seen: set[str] = set()
    for layer in case.layers:
        key = f"layers[{layer.name}]"
        if layer.name in seen:
            errs.append(CaseError(f"{key}.name", layer.name, "layer names must be unique"))
        seen.add(layer.name)
        if layer.material not in case.materials:
            errs.append(CaseError(f"{key}.material", layer.material,
                                  f"must be one of the materials: {sorted(case.materials)}"))
        if layer.bottom is None or case.stratigraphy is not None:
            upper = None  # surfaces from picks: the mesher applies and reports its rules
            continue
        here = case._corner_bottoms(layer)
        if upper is not None and any(b >= u for b, u in zip(here, upper, strict=True)):
            errs.append(CaseError(f"{key}.bottom", f"{layer.bottom:g} m",
                                  f"must lie below {upper_name} at every {where}"))
        upper_name, upper = f"layers[{layer.name}].bottom", here
    zmin = case.z_bottom_min
    for i, fh in enumerate(case.fixed_heads):
        errs += _fixed_head_checks(f"fixed_heads[{i}]", fh)
    faces = [fh.face for fh in case.fixed_heads]
    for f in set(faces):
        if faces.count(f) > 1:
            errs.append(CaseError("fixed_heads.face", f, "each face may carry one fixed head"))
    names = [s.name for s in case.sources]
    for s in case.sources:
        key = f"sources[{s.name}]"
        if names.count(s.name) > 1:
            errs.append(CaseError(f"{key}.name", s.name, "source names must be unique"))
        if s.species not in case.species:
            errs.append(CaseError(f"{key}.species", s.species,
                                  f"must be one of the species: {sorted(case.species)}"))
        if s.stop is not None and s.stop <= s.start:
            errs.append(CaseError(f"{key}.stop", _time_text(s.stop, tu),
                                  f"must be later than start ({_time_text(s.start, tu)})"))
        if s.kind == "inflow_concentration" and s.shape != "face_patch":
            errs.append(CaseError(f"{key}.shape", s.shape,
                                  "an inflow_concentration source must be a face_patch"))
        for filled, by in (("release_series", "release_file"),
                           ("concentration_points", "concentration_file")):
            if getattr(s, filled) is not None and getattr(s, by) is None:
                errs.append(CaseError(f"{key}.{filled}", "(given)",
                                      f"is read from {by} (with units); give {by} instead"))
        if s.release_file is not None and s.kind == "initial_plume":
            errs.append(CaseError(f"{key}.release_file", s.release_file,
                                  "an initial_plume has no release in time; use a "
                                  "fixed_concentration, inflow_concentration or mass_loading "
                                  "source"))
        if s.release_file is not None and (s.concentration is not None
                                           or s.mass_rate is not None):
            errs.append(CaseError(f"{key}.release_file", s.release_file,
                                  "give either a release_file or a constant concentration / "
                                  "mass_rate, not both"))
        if s.concentration_file is not None and (s.kind != "initial_plume"
                                                 or s.concentration is not None):
            errs.append(CaseError(f"{key}.concentration_file", s.concentration_file,
                                  "only an initial_plume takes a concentration_file, and then "
                                  "no constant concentration"))
        needs_value = s.kind in ("fixed_concentration", "inflow_concentration") and \
            s.release_file is None
        needs_value |= s.kind == "initial_plume" and s.concentration_file is None
        if needs_value and s.concentration is None:
            errs.append(CaseError(f"{key}.concentration", "(missing)",
                                  f"a {s.kind} source needs a concentration, e.g. '20 mg/L'"))
        if s.kind == "mass_loading" and ((s.mass_rate is None and s.release_file is None)
                                         or s.shape == "face_patch"):
            errs.append(CaseError(f"{key}.mass_rate", "(missing)" if s.mass_rate is None
                                  else s.shape, "a mass_loading source needs a mass_rate "
                                  "(e.g. '2 g/d') and shape = 'box', 'point' or 'line'"))
        if s.shape in ("point", "line"):
            want = 1 if s.shape == "point" else 2
            pts = s.points or []
            if s.kind != "mass_loading":
                errs.append(CaseError(f"{key}.shape", s.shape,
                                      "only a mass_loading source may be a point or a line"))
            if len(pts) < want or (s.shape == "point" and len(pts) != 1):
                errs.append(CaseError(f"{key}.points", f"{len(pts)} points",
                                      "a point source needs points = [[x, y, z]], a line at "
                                      "least two points"))
            for j, (px, py, pz) in enumerate(pts):
                if not (_in(px, x0, x1) and _in(py, y0, y1) and _in(pz, zmin, top)
                        and point_in_polygon(px, py, verts, tol=1e-9 * max(x1 - x0, y1 - y0))):
                    errs.append(CaseError(f"{key}.points[{j}]", f"[{px:g}, {py:g}, {pz:g}] m",
                                          "must lie inside the model"))
        elif s.points is not None:
            errs.append(CaseError(f"{key}.points", "(given)",
                                  "points belong to shape = 'point' or 'line' only"))
        if s.shape == "face_patch" and s.face is None:
            errs.append(CaseError(f"{key}.face", None,
                                  f"a face_patch source needs a face: one of "
                                  f"{case.face_names()}"))
        if s.shape == "box":
            for axis in ("x", "y", "z"):
                if getattr(s, axis) is None:
                    errs.append(CaseError(f"{key}.{axis}", None,
                                          "a box source needs x, y and z ranges"))
        for axis, (lo, hi) in (("x", (x0, x1)), ("y", (y0, y1)), ("z", (zmin, top))):
            rng = getattr(s, axis)
            if rng is not None and not (rng[1] > rng[0] and _in(rng[0], lo, hi)
                                        and _in(rng[1], lo, hi)):
                errs.append(CaseError(f"{key}.{axis}", f"[{rng[0]:g}, {rng[1]:g}] m",
                                      f"must be an increasing range inside [{lo:g}, {hi:g}] m"))
    obs_names = [o.name for o in case.observation_points]
    for o in case.observation_points:
        key = f"observation_points[{o.name}]"
        if obs_names.count(o.name) > 1:
            errs.append(CaseError(f"{key}.name", o.name, "observation names must be unique"))
        if not _in(o.x, x0, x1):
            errs.append(CaseError(f"{key}.x", f"{o.x:g} m",
                                  f"must lie in the box, [{x0:g}, {x1:g}] m"))
        if not _in(o.y, y0, y1):
            errs.append(CaseError(f"{key}.y", f"{o.y:g} m",
                                  f"must lie in the box, [{y0:g}, {y1:g}] m"))
        if _in(o.x, x0, x1) and _in(o.y, y0, y1) and not point_in_polygon(
                o.x, o.y, verts, tol=1e-9 * max(x1 - x0, y1 - y0)):
            errs.append(CaseError(f"{key}", f"x = {o.x:g} m, y = {o.y:g} m",
                                  "must lie inside the model boundary"))
        if (o.z is None) == (o.screen is None):
            errs.append(CaseError(f"{key}", o.name, "give exactly one of z (a point) or screen"))
        if o.z is not None and not _in(o.z, zmin, top):
            errs.append(CaseError(f"{key}.z", f"{o.z:g} m", f"must lie in [{zmin:g}, {top:g}] m"))
        if o.screen is not None and not (o.screen[0] > o.screen[1] and _in(o.screen[0], zmin, top)
                                         and _in(o.screen[1], zmin, top)):
            errs.append(CaseError(f"{key}.screen", f"[{o.screen[0]:g}, {o.screen[1]:g}] m",
                                  f"must be [top, bottom] with top > bottom, inside "
                                  f"[{zmin:g}, {top:g}] m"))
    for name, sp in case.species.items():
        if sp.sorption == "langmuir" and not (sp.langmuir_affinity > 0 and (
                isinstance(sp.langmuir_capacity, dict) or sp.langmuir_capacity > 0)):
            errs.append(CaseError(f"species.{name}.sorption", sp.sorption,
                                  "langmuir needs langmuir_capacity (e.g. '100 mg/kg') and "
                                  "langmuir_affinity (e.g. '0.5 L/mg') greater than zero"))
        if sp.sorption == "freundlich" and not isinstance(sp.freundlich_kf, dict) \
                and sp.freundlich_kf <= 0:
            errs.append(CaseError(f"species.{name}.sorption", sp.sorption,
                                  "freundlich needs freundlich_kf (e.g. '0.2 L/kg' at "
                                  "freundlich_reference) greater than zero"))
        if sp.parent is not None:
            if sp.parent not in case.species or sp.parent == name:
                errs.append(CaseError(f"species.{name}.parent", sp.parent,
                                      f"must name another species: {sorted(case.species)}"))
            elif case.species[sp.parent].half_life is None:
                errs.append(CaseError(f"species.{name}.parent", sp.parent,
                                      "the parent needs a half_life (first-order decay feeds "
                                      "the daughter)"))
            seen_chain, cur = {name}, sp.parent
            while cur is not None and cur in case.species:
                if cur in seen_chain:
                    errs.append(CaseError(f"species.{name}.parent", sp.parent,
                                          "decay chains may not loop back"))
                    break
                seen_chain.add(cur)
                cur = case.species[cur].parent
        if (sp.monod_max_rate is None) != (sp.monod_half_saturation is None):
            errs.append(CaseError(f"species.{name}.monod_max_rate", "(one of two)",
                                  "give both monod_max_rate and monod_half_saturation"))
        if sp.second_order_rate is not None and sp.monod_max_rate is not None:
            errs.append(CaseError(f"species.{name}.second_order_rate", "(with monod)",
                                  "choose one nonlinear reaction: second order or Monod"))
        if isinstance(sp.kd, dict):
            for mat in sp.kd:
                if mat not in case.materials:
                    errs.append(CaseError(f"species.{name}.kd.{mat}", mat,
                                          f"must name a material: {sorted(case.materials)}"))
    if case.user_reactions is not None:
        for j, name in enumerate(case.user_reactions.species):
            if name not in case.species:
                errs.append(CaseError(f"user_reactions.species[{j}]", name,
                                      f"must name a species: {sorted(case.species)}"))
    t = case.time
    if t.step is None and t.adaptive:
        errs.append(CaseError("time.adaptive", "true", "needs time.step (the first step and "
                              "the base of the adaptive steps)"))
    if t.step is not None and t.min_step is not None and t.min_step > t.step:
        errs.append(CaseError("time.min_step", _time_text(t.min_step, tu),
                              f"must not exceed time.step ({_time_text(t.step, tu)})"))
    if t.step is not None and t.max_step is not None and t.max_step < t.step:
        errs.append(CaseError("time.max_step", _time_text(t.max_step, tu),
                              f"must not be below time.step ({_time_text(t.step, tu)})"))
    if t.step is not None and t.step > t.end:
        errs.append(CaseError("time.step", _time_text(t.step, tu),
                              f"must not exceed time.end ({_time_text(t.end, tu)})"))
    if t.output_interval is not None and t.end / t.output_interval > MAX_OUTPUT_TIMES:
        errs.append(CaseError("time.output_interval", _time_text(t.output_interval, tu),
                              f"gives {t.end / t.output_interval:.3g} output times over "
                              f"time.end; at most {MAX_OUTPUT_TIMES:,} are written"))
    for v in t.output_times or []:
        if v > t.end * (1 + 1e-12):
            errs.append(CaseError("time.output_times", _time_text(v, tu),
                                  "every output time must be ≤ time.end "
                                  f"({_time_text(t.end, tu)})"))
    m = case.mesh
    if m.fine_cell_size is not None and m.fine_cell_size > m.cell_size:
        errs.append(CaseError("mesh.fine_cell_size", f"{m.fine_cell_size:g} m",
                              f"must not exceed mesh.cell_size ({m.cell_size:g} m)"))
    errs += hydro_checks(case)
    errs += uncertain_checks(case)
    return errs
