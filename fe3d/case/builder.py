"""Cases built from Python values, for tests, benchmarks and scripts.

A test states the physics it changes (``Material(porosity=0.3)``,
``Time(scheme="bdf2")``) instead of copying and editing case-file text. The builder writes
the same data a case file holds and validates it through :func:`fe3d.case.load.parse_case`,
so units, defaults, key paths and error messages are exactly those of a TOML file.

A number is taken in the unit named in each field's description (m, m/d, d, mg/L, ...); a
string is a quantity with its own unit (``"1e-4 m/s"``), passed on as written.

Examples
--------
>>> case = box_case(length=100.0, width=10.0, layers=[Layer("sand", -5.0)],
...                 heads={"west": 1.0, "east": 0.0}, cell=5.0, dz=5.0)
>>> case.materials["sand"].horizontal_conductivity * 86400.0
10.0
"""

from __future__ import annotations

import dataclasses
import json
import math
import numbers
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, ClassVar

from pydantic import ValidationError, create_model

from fe3d.case import schema
from fe3d.case.load import _errors_from, completed_case, parse_case
from fe3d.case.schema import Case
from fe3d.case.schema_types import Section
from fe3d.errors import CaseError, CaseErrors

__all__ = [
    "FixedHead",
    "Layer",
    "Material",
    "Mesh",
    "ObservationPoint",
    "Quantity",
    "Solver",
    "Source",
    "Species",
    "Time",
    "box_case",
    "box_case_text",
    "build_case",
    "case_data",
    "with_changes",
]

Quantity = float | str
"""A number in the field's stated unit, or a string with its own unit (``"3 g/d"``)."""


def _number(value: Any) -> str | None:
    """TOML text of a real number (numpy scalars included), or ``None`` for anything else."""
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        return None
    if isinstance(value, numbers.Integral):
        return repr(int(value))
    x = float(value)
    return repr(x) if math.isfinite(x) else ("nan" if math.isnan(x) else f"{x:+}")


def _quantity(value: Any, unit: str) -> Any:
    """``value`` as a case-file quantity: numbers get ``unit``, strings pass as written."""
    text = _number(value)
    return value if text is None else f"{text} {unit}"


def _value(value: Any, unit: str | None) -> Any:
    """A field value as the case file holds it (ranges and point lists element-wise)."""
    if unit is None:
        return value
    if isinstance(value, tuple | list):
        return [_value(v, unit) for v in value]
    return _quantity(value, unit)


@dataclass(frozen=True)
class _Block:
    """A case-file table: every field not ``None`` is written; ``options`` adds other keys
    of the same table as the case file writes them (with units)."""

    _UNITS: ClassVar[dict[str, str]] = {}
    _SKIP: ClassVar[tuple[str, ...]] = ("options",)

    def data(self) -> dict[str, Any]:
        """The table as the case file holds it (strings with units) [-]."""
        out: dict[str, Any] = {}
        for f in dataclasses.fields(self):
            v = getattr(self, f.name)
            if f.name in self._SKIP or v is None:
                continue
            out[f.name] = _value(v, self._UNITS.get(f.name))
        out.update(getattr(self, "options", {}))
        return out


@dataclass(frozen=True)
class Material(_Block):
    """Properties of one material.

    Numbers are in m/d (conductivities), kg/m³ (bulk density), m (dispersivities), m²/s
    (diffusion coefficient) and degrees (strike, dip); ``None`` leaves the case-file default.
    ``name`` is the key in ``[materials]`` (default: the name of the layer that uses it).
    """

    horizontal_conductivity: Quantity = 10.0
    vertical_conductivity: Quantity | None = None
    porosity: float = 0.25
    bulk_density: Quantity = 1600.0
    longitudinal_dispersivity: Quantity = 1.0
    transverse_dispersivity: Quantity = 0.1
    vertical_dispersivity: Quantity | None = None
    diffusion_coefficient: Quantity | None = None
    tortuosity: float | str | None = None
    conductivity_strike: Quantity | None = None
    conductivity_dip: Quantity | None = None
    conductivity_file: str | None = None
    name: str | None = None
    options: Mapping[str, Any] = field(default_factory=dict)

    _UNITS: ClassVar[dict[str, str]] = {
        "horizontal_conductivity": "m/d", "vertical_conductivity": "m/d",
        "bulk_density": "kg/m^3", "longitudinal_dispersivity": "m",
        "transverse_dispersivity": "m", "vertical_dispersivity": "m",
        "diffusion_coefficient": "m^2/s", "conductivity_strike": "deg",
        "conductivity_dip": "deg"}
    _SKIP: ClassVar[tuple[str, ...]] = ("options", "name")


@dataclass(frozen=True)
class Layer(_Block):
    """A layer from the top down: ``bottom`` [m] elevation (``None``: from stratigraphy),
    its ``material`` (a :class:`Material`, or the name of one given to :func:`build_case`),
    ``bottom_gradient`` [-], ``cell_thickness`` [m]."""

    name: str
    bottom: Quantity | None = None
    material: Material | str = field(default_factory=Material)
    bottom_gradient: tuple[float, float] | None = None
    sublayers: int | None = None
    cell_thickness: Quantity | None = None

    _UNITS: ClassVar[dict[str, str]] = {"bottom": "m", "cell_thickness": "m"}

    @property
    def material_name(self) -> str:
        """Key of the layer's material in ``[materials]``."""
        if isinstance(self.material, str):
            return self.material
        return self.material.name or self.name

    def data(self) -> dict[str, Any]:
        """The ``[[layers]]`` entry, naming its material."""
        out = {"name": self.name, "material": self.material_name}
        out.update({k: v for k, v in super().data().items() if k not in out})
        return out


@dataclass(frozen=True)
class FixedHead(_Block):
    """A fixed head on ``face``: ``head`` [m] plus ``head_gradient`` [-] from
    ``reference_point`` [m], or ``head_by_elevation`` as (elevation, head) pairs [m]."""

    face: str
    head: Quantity | None = None
    head_gradient: tuple[float, float, float] | None = None
    reference_point: tuple[Quantity, Quantity, Quantity] | None = None
    head_by_elevation: Sequence[tuple[Quantity, Quantity]] | None = None

    _UNITS: ClassVar[dict[str, str]] = {"head": "m", "reference_point": "m",
                                        "head_by_elevation": "m"}


@dataclass(frozen=True)
class Species(_Block):
    """A dissolved species. Numbers are in mg/L (``limit``, ``initial_concentration``), L/kg
    (``kd``) and d (``half_life``); ``options`` takes the other species keys with units
    (``{"sorption": "langmuir", "langmuir_capacity": "100 mg/kg"}``)."""

    name: str = "tracer"
    limit: Quantity = 1.0
    kd: Quantity | Mapping[str, Quantity] | None = None
    half_life: Quantity | None = None
    initial_concentration: Quantity | None = None
    parent: str | None = None
    options: Mapping[str, Any] = field(default_factory=dict)

    _UNITS: ClassVar[dict[str, str]] = {"limit": "mg/L", "kd": "L/kg", "half_life": "d",
                                        "initial_concentration": "mg/L"}
    _SKIP: ClassVar[tuple[str, ...]] = ("options", "name", "kd")

    def data(self) -> dict[str, Any]:
        """The ``[species.<name>]`` table."""
        out = super().data()
        if isinstance(self.kd, Mapping):
            out["kd"] = {k: _quantity(v, "L/kg") for k, v in self.kd.items()}
        elif self.kd is not None:
            out["kd"] = _quantity(self.kd, "L/kg")
        return out


@dataclass(frozen=True)
class Source(_Block):
    """A source. Numbers are in mg/L (``concentration``), g/d (``mass_rate``), m (``x``,
    ``y``, ``z`` ranges and ``points``) and d (``start``, ``stop``,
    ``depletion_half_life``); ``options`` takes any other key as the case file writes it."""

    name: str
    species: str = "tracer"
    shape: str = "box"
    kind: str | None = None
    concentration: Quantity | None = None
    mass_rate: Quantity | None = None
    face: str | None = None
    x: tuple[Quantity, Quantity] | None = None
    y: tuple[Quantity, Quantity] | None = None
    z: tuple[Quantity, Quantity] | None = None
    points: Sequence[tuple[Quantity, Quantity, Quantity]] | None = None
    start: Quantity | None = None
    stop: Quantity | None = None
    depletion_half_life: Quantity | None = None
    release_file: str | None = None
    concentration_file: str | None = None
    options: Mapping[str, Any] = field(default_factory=dict)

    _UNITS: ClassVar[dict[str, str]] = {
        "concentration": "mg/L", "mass_rate": "g/d", "x": "m", "y": "m", "z": "m",
        "points": "m", "start": "d", "stop": "d", "depletion_half_life": "d"}


@dataclass(frozen=True)
class ObservationPoint(_Block):
    """A monitoring point (``z`` [m]) or well screen (``screen`` = (top, bottom) [m])."""

    name: str
    x: Quantity
    y: Quantity
    z: Quantity | None = None
    screen: tuple[Quantity, Quantity] | None = None
    kind: str | None = None

    _UNITS: ClassVar[dict[str, str]] = {"x": "m", "y": "m", "z": "m", "screen": "m"}


@dataclass(frozen=True)
class Time(_Block):
    """The ``[time]`` section; durations in d."""

    end: Quantity = 10.0
    step: Quantity = 1.0
    scheme: str | None = None
    output_interval: Quantity | None = None
    output_times: Sequence[Quantity] | None = None
    adaptive: bool | None = None
    min_step: Quantity | None = None
    max_step: Quantity | None = None
    error_tolerance: float | None = None

    _UNITS: ClassVar[dict[str, str]] = {"end": "d", "step": "d", "output_interval": "d",
                                        "output_times": "d", "min_step": "d", "max_step": "d"}


@dataclass(frozen=True)
class Mesh(_Block):
    """The ``[mesh]`` section; sizes in m."""

    cell_size: Quantity
    layer_cell_thickness: Quantity
    fine_cell_size: Quantity | None = None
    fine_zone_radius: Quantity | None = None
    import_file: str | None = None
    options: Mapping[str, Any] = field(default_factory=dict)

    _UNITS: ClassVar[dict[str, str]] = {"cell_size": "m", "layer_cell_thickness": "m",
                                        "fine_cell_size": "m", "fine_zone_radius": "m"}


@dataclass(frozen=True)
class Solver(_Block):
    """The ``[solver]`` section (no units); ``None`` leaves the case-file default."""

    supg: bool | None = None
    linear_solver: str | None = None
    tolerance: float | None = None
    max_step_cuts: int | None = None
    shock_capturing: bool | None = None
    shock_capturing_passes: int | None = None
    monotone: bool | None = None
    flux_limiting: bool | None = None
    newton_max_iterations: int | None = None


def case_data(
    *, layers: Sequence[Layer], mesh: Mesh, species: Sequence[Species] = (Species(),),
    materials: Mapping[str, Material] | None = None, heads: Mapping[str, Quantity] | None = None,
    fixed_heads: Sequence[FixedHead] = (), sources: Sequence[Source] = (),
    observation_points: Sequence[ObservationPoint] = (), time: Time | None = None,
    solver: Solver | None = None, title: str = "built case",
    sections: Mapping[str, Any] | None = None,
) -> dict[str, Any]:
    """The case as the data a case file holds (the tables of the TOML text, units in strings).

    Parameters are those of :func:`build_case`.

    Returns
    -------
    dict
        Section name → table, list of tables or value, in case-file order.
    """
    mats: dict[str, Any] = {k: m.data() for k, m in (materials or {}).items()}
    for layer in layers:
        if isinstance(layer.material, Material):
            table = layer.material.data()
            if mats.setdefault(layer.material_name, table) != table:
                msg = f"two different materials are named {layer.material_name!r}"
                raise ValueError(msg)
    heads_list = [FixedHead(face, head=h).data() for face, h in (heads or {}).items()]
    typed: dict[str, Any] = {"materials": mats, "layers": [layer.data() for layer in layers],
                             "fixed_heads": heads_list + [f.data() for f in fixed_heads],
                             "species": {s.name: s.data() for s in species},
                             "sources": [s.data() for s in sources],
                             "observation_points": [o.data() for o in observation_points],
                             "time": (time or Time()).data(), "mesh": mesh.data()}
    if solver is not None:
        typed["solver"] = solver.data()
    typed = {k: v for k, v in typed.items() if v != []}
    twice = sorted(typed.keys() & (sections or {}).keys())
    if twice:
        msg = f"sections {twice} are given both as arguments and in sections"
        raise ValueError(msg)
    return {"title": title, **(sections or {}), **typed}


def build_case(
    *, layers: Sequence[Layer], mesh: Mesh, species: Sequence[Species] = (Species(),),
    materials: Mapping[str, Material] | None = None, heads: Mapping[str, Quantity] | None = None,
    fixed_heads: Sequence[FixedHead] = (), sources: Sequence[Source] = (),
    observation_points: Sequence[ObservationPoint] = (), time: Time | None = None,
    solver: Solver | None = None, title: str = "built case",
    sections: Mapping[str, Any] | None = None, base_dir: Path | None = None,
) -> Case:
    """A validated case of any geometry.

    Parameters
    ----------
    layers
        The layers from the top down; their :class:`Material` objects fill ``[materials]``.
    mesh
        Cell sizes [m].
    species
        The species (default: one ``tracer`` with a 1 mg/L limit).
    materials
        Further materials by name, for layers, lenses or ``sections`` that name them.
    heads
        Fixed head [m] by face name.
    fixed_heads
        Further fixed heads (gradients, elevation tables).
    sources, observation_points
        Sources and observation points.
    time
        The ``[time]`` section (default: 10 d in 1 d steps).
    solver
        The ``[solver]`` section (default: the case-file defaults).
    title
        Case title.
    sections
        Any other section (``box``, ``boundary``, ``stratigraphy``, ``wells``, ``recharge``,
        ``user_reactions``, ...) as the case file writes it: quantities as strings with units.
    base_dir
        Folder that data files named in the case are read from [path].

    Returns
    -------
    Case
        Validated, every value in SI.

    Raises
    ------
    CaseErrors
        The same errors, key paths and messages as the equivalent case file.
    """
    data = case_data(layers=layers, mesh=mesh, species=species, materials=materials,
                     heads=heads, fixed_heads=fixed_heads, sources=sources,
                     observation_points=observation_points, time=time, solver=solver,
                     title=title, sections=sections)
    return parse_case(_toml(data), source="<built case>", base_dir=base_dir)


def box_case(
    *, length: Quantity, width: Quantity, layers: Sequence[Layer], cell: Quantity,
    dz: Quantity, fine_cell: Quantity | None = None, fine_radius: Quantity | None = None,
    heads: Mapping[str, Quantity] | None = None, top: Quantity = 0.0,
    title: str = "box case", **kwargs: Any,
) -> Case:
    """A validated case in the box [0, ``length``] × [0, ``width``] [m] with its top at ``top``
    [m] and layers down from there.

    Parameters
    ----------
    length, width
        Plan extent along x and y [m].
    layers
        The layers from the top down (bottoms [m]).
    cell, dz
        Plan cell size and layer cell thickness [m].
    fine_cell, fine_radius
        Plan cell size near sources, wells and observation points, and the radius of that
        zone [m] (default: the case-file defaults).
    heads
        Fixed head [m] by face name (``west``, ``east``, ``south``, ``north``, ``top``,
        ``bottom``).
    top
        Elevation of the top [m].
    title
        Case title.
    **kwargs
        Any other keyword of :func:`build_case` (species, sources, time, solver, ...).

    Returns
    -------
    Case
        Validated, every value in SI.
    """
    base_dir = kwargs.pop("base_dir", None)
    text = box_case_text(length=length, width=width, layers=layers, cell=cell, dz=dz,
                         fine_cell=fine_cell, fine_radius=fine_radius, heads=heads, top=top,
                         title=title, **kwargs)
    return parse_case(text, source="<built case>", base_dir=base_dir)


def box_case_text(
    *, length: Quantity, width: Quantity, layers: Sequence[Layer], cell: Quantity,
    dz: Quantity, fine_cell: Quantity | None = None, fine_radius: Quantity | None = None,
    heads: Mapping[str, Quantity] | None = None, top: Quantity = 0.0,
    title: str = "box case", mesh_options: Mapping[str, Any] | None = None, **kwargs: Any,
) -> str:
    """The case file text of :func:`box_case` (same arguments, but ``base_dir``), for tests
    of what reads case files: the loader and the command line. ``mesh_options``: further
    ``[mesh]`` keys as a case file writes them (``{"corridor": False}``). Not validated."""
    box = {"x": [_quantity(0, "m"), _quantity(length, "m")],
           "y": [_quantity(0, "m"), _quantity(width, "m")], "top": _quantity(top, "m")}
    sections = {"box": box, **kwargs.pop("sections", {})}
    mesh = Mesh(cell_size=cell, layer_cell_thickness=dz, fine_cell_size=fine_cell,
                fine_zone_radius=fine_radius, options=dict(mesh_options or {}))
    return _toml(case_data(layers=layers, heads=heads, mesh=mesh, title=title,
                           sections=sections, **kwargs))


def with_changes(case: Case, *, base_dir: Path | None = None,
                 **sections: Mapping[str, Any] | Sequence[Any]) -> Case:
    """A copy of ``case`` with some sections changed and validated.

    Parameters
    ----------
    case
        The case to start from.
    **sections
        Section name (``time``, ``solver``, ``mesh``, ``box``, ``output``) → fields to change,
        written as in a case file (``time={"step": "0.5 d", "scheme": "bdf2"}``); for
        ``materials`` and ``species``, name → fields (a new name adds an entry, from a
        :class:`Material` or :class:`Species` or a table); for a list section (``sources``,
        ``observation_points``, ``wells``, ...) the whole new list, of builder records
        (:class:`Source`, ...) or tables as the case file writes them.
    base_dir
        Folder that release and concentration files named by the sources are read from
        [path] (default: the current folder), as :func:`~fe3d.case.load.parse_case` does.

    Returns
    -------
    Case
        The changed case, after every per-field rule and the cross-section rules.

    Raises
    ------
    CaseErrors
        The errors of the equivalent case file (key paths such as ``time.step``).
    """
    changed_raw: dict[str, Any] = {}  # changes to sections and entries the case has
    changed_types: dict[str, Any] = {}
    added_raw: dict[str, Any] = {}  # new materials or species
    added_types: dict[str, Any] = {}
    for name, change in sections.items():
        if not isinstance(change, Mapping):  # a whole list: sources, layers, wells, ...
            changed_raw[name] = [c.data() if isinstance(c, _Block) else c for c in change]
            changed_types[name] = Case.model_fields[name].annotation
            continue
        model = _section_model(name)
        if name not in _KEYED:
            changed_raw[name] = dict(change)
            changed_types[name] = _partial(model, change)
            continue
        entries = {k: v.data() if isinstance(v, _Block) else v for k, v in change.items()}
        old = getattr(case, name)
        known = {k: v for k, v in entries.items() if k in old}
        if known:
            changed_raw[name] = known
            changed_types[name] = dict[str, _partial(model, {f for v in known.values()
                                                             for f in v})]  # type: ignore[misc]
        if len(known) < len(entries):
            added_raw[name] = {k: v for k, v in entries.items() if k not in old}
            added_types[name] = dict[str, model]  # type: ignore[valid-type]
    errors: list[CaseError] = []
    checked = _validated(changed_types, changed_raw, errors)
    added = _validated(added_types, added_raw, errors)
    if errors:
        raise CaseErrors(errors)
    update: dict[str, Any] = {}
    for name in sections:
        new = getattr(checked, name, None)
        old = getattr(case, name)
        if isinstance(new, list):
            update[name] = new
        elif name in _KEYED:
            update[name] = {**old, **{k: old[k].model_copy(update=_set(v)) for k, v in
                                      (new or {}).items()}, **getattr(added, name, {})}
        else:
            update[name] = old.model_copy(update=_set(new))
    return completed_case(case.model_copy(update=update), base_dir, geology=False)


_KEYED = ("materials", "species")
"""Sections that are tables of named entries."""


def _partial(model: type[Section], keys: Any) -> Any:
    """A model of the fields ``keys`` of ``model`` only, with their validators."""
    return create_model(  # type: ignore[call-overload]
        f"Partial{model.__name__}", __base__=Section,
        **{k: (model.model_fields[k].annotation, model.model_fields[k])
           for k in keys if k in model.model_fields})


def _validated(types: Mapping[str, Any], raw: dict[str, Any], errors: list[CaseError]) -> Any:
    """``raw`` validated as the sections ``types``; errors, with case-file key paths, are
    added to ``errors``."""
    fields = {k: (v, ...) for k, v in types.items()}
    wrapper = create_model("Changes", **fields)  # type: ignore[call-overload]
    try:
        return wrapper.model_validate(raw)
    except ValidationError as exc:
        errors += _errors_from(exc, raw)
        return None


def _section_model(name: str) -> type[Section]:
    """The model of the one-table section ``name`` (of each entry for materials, species)."""
    models: dict[str, type[Section]] = {"materials": schema.Material,
                                        "species": schema.Species}
    if name in models:
        return models[name]
    annotation = Case.model_fields[name].annotation if name in Case.model_fields else None
    for cls in (annotation, *getattr(annotation, "__args__", ())):
        if isinstance(cls, type) and issubclass(cls, Section):
            return cls
    msg = f"with_changes changes single sections, materials or species, not {name!r}"
    raise CaseError(name, "(change)", msg)


def _set(partial: Section) -> dict[str, Any]:
    """The fields a partial section was given, as an update."""
    return {k: getattr(partial, k) for k in partial.model_fields_set}


def _toml(data: Mapping[str, Any]) -> str:
    """TOML text of ``data``: one ``key = value`` line per section, tables written inline."""
    return "".join(f"{_key(k)} = {_inline(v)}\n" for k, v in data.items())


def _key(key: str) -> str:
    return json.dumps(key)


def _inline(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    number = _number(value)
    if number is not None:
        return number
    if isinstance(value, str):
        return json.dumps(value, ensure_ascii=False)
    if isinstance(value, Mapping):
        return "{" + ", ".join(f"{_key(k)} = {_inline(v)}" for k, v in value.items()) + "}"
    if isinstance(value, Sequence):
        return "[" + ", ".join(_inline(v) for v in value) + "]"
    msg = f"cannot write {type(value).__name__} into a case"
    raise TypeError(msg)
