"""TOML text → validated :class:`Case`. Reads the case file and the data files it names
(borehole picks, surface points, grids, release histories, plume points) under the rules of
:mod:`fe3d.case.data_files`; never evaluates text. Inputs outside their usual range are
logged as warnings (:mod:`fe3d.case.plausible`)."""

from __future__ import annotations

import logging
import math
import os
import tomllib
from pathlib import Path
from typing import Any

from pydantic import ValidationError

from fe3d.case.data_files import (
    MAX_CASE_FILE_BYTES,
    MAX_DATA_FILE_BYTES,
    checked_mesh_file,
    located,
    read_text,
)
from fe3d.case.geology import read_borehole_file, read_grid_file, read_surface_file
from fe3d.case.plausible import plausibility_warnings
from fe3d.case.schema import Case, cross_checks
from fe3d.case.series import read_concentration_points, read_release_file
from fe3d.errors import CaseError, CaseErrors

__all__ = ["MAX_NESTING", "completed_case", "load_case", "parse_case"]

logger = logging.getLogger(__name__)

_MAX_NAME_SHOWN = 64  # longest name of a list item shown in a key path [characters]

MAX_NESTING = 12
"""Deepest nesting of tables and arrays in a case file (the schema needs 6)."""

_ALLOWED_HINTS = {
    "missing": "is required",
    "extra_forbidden": "is not a known key here",
}


class _Shown:
    """A placeholder shown as-is in an error line (not quoted like a value from the file)."""

    def __init__(self, text: str) -> None:
        self.text = text

    def __str__(self) -> str:
        return self.text

    __repr__ = __str__


_MISSING = _Shown("(missing)")
_TABLE = _Shown("{…}")


def _key_path(loc: tuple[Any, ...], raw: Any) -> str:
    """Render a pydantic location as ``layers[clay].bottom`` (list items by their name)."""
    parts: list[str] = []
    node = raw
    for item in loc:
        if isinstance(item, int):
            name = None
            if isinstance(node, list) and 0 <= item < len(node) and isinstance(node[item], dict):
                name = node[item].get("name")
            plain = isinstance(name, str) and len(name) <= _MAX_NAME_SHOWN and name.isprintable()
            parts[-1] = f"{parts[-1]}[{name if plain else item}]"
            node = node[item] if isinstance(node, list) and 0 <= item < len(node) else None
        else:
            key = str(item)
            if key == "[key]":  # the error is about the table key itself, already in the path
                continue
            # pydantic appends the branch name of union/annotated types; those are not keys
            in_file = isinstance(node, dict) and key in node
            if not in_file and parts and _is_type_tag(key):
                continue
            parts.append(key)
            node = node.get(key) if isinstance(node, dict) else None
    return ".".join(parts) if parts else "(case)"


def _is_type_tag(key: str) -> bool:
    return key in {"float", "str", "int", "bool"} or key.startswith(
        ("function-", "dict[", "list[", "tuple[", "literal[", "constrained-"))


def _wrong_branch(loc: tuple[Any, ...], raw: Any) -> bool:
    """True for an error from a union branch that does not match the shape of the input.

    ``kd = { sand = "-1 L/kg" }`` fails both the single-value branch and the per-material
    table branch; only the table branch speaks about what was written (and vice versa).
    """
    node = raw
    for item in loc:
        if isinstance(item, int):
            node = node[item] if isinstance(node, list) and 0 <= item < len(node) else None
        elif isinstance(node, dict) and item in node:
            node = node[item]
        elif _is_type_tag(str(item)):
            if str(item).startswith("dict[") != isinstance(node, dict):
                return True
        else:
            node = None
    return False


def _message(err: dict[str, Any]) -> str:
    kind = err["type"]
    if kind in _ALLOWED_HINTS:
        return _ALLOWED_HINTS[kind]
    msg = str(err["msg"])
    for prefix in ("Value error, ", "Assertion failed, "):
        if msg.startswith(prefix):
            msg = msg[len(prefix):]
    if kind == "literal_error":
        msg = msg.replace("Input should be", "must be one of:")
    elif kind == "string_pattern_mismatch":
        msg = "must be a plain name: a letter, then letters, digits, '_' or '-'"
    elif msg.startswith("Input should be"):
        msg = "must be" + msg[len("Input should be"):]
    return msg


def _errors_from(exc: ValidationError, raw: dict[str, Any]) -> list[CaseError]:
    out: list[CaseError] = []
    seen: set[str] = set()
    for err in exc.errors():
        if _wrong_branch(tuple(err["loc"]), raw):
            continue
        path = _key_path(tuple(err["loc"]), raw)
        if path in seen:  # a union reports one error per branch; keep the first
            continue
        seen.add(path)
        value = err.get("input") if err["type"] != "missing" else _MISSING
        if isinstance(value, dict):
            value = _TABLE
        out.append(CaseError(path, value, _message(err)))
    return out


def _raw_problems(raw: dict[str, Any]) -> list[CaseError]:
    """Non-finite numbers (``nan``, ``inf``) anywhere in the TOML, and nesting deeper than
    :data:`MAX_NESTING`, one line each with the key path."""
    out: list[CaseError] = []
    stack: list[tuple[tuple[Any, ...], Any]] = [((), raw)]
    while stack:
        loc, node = stack.pop()
        if len(loc) > MAX_NESTING:
            out.append(CaseError(_key_path(loc, raw), _Shown("[…]"),
                                 f"nests tables or arrays more than {MAX_NESTING} deep"))
            continue
        if isinstance(node, dict):
            stack += [((*loc, k), v) for k, v in reversed(node.items())]
        elif isinstance(node, list):
            stack += [((*loc, i), v) for i, v in reversed(list(enumerate(node)))]
        elif isinstance(node, float) and not math.isfinite(node):
            out.append(CaseError(_key_path(loc, raw), node, "must be a finite number"))
    return out


def parse_case(text: str, *, source: str = "<case>", base_dir: Path | None = None) -> Case:
    """Validate TOML ``text`` and return the :class:`Case`.

    Data files named in the case (borehole picks, surface points) are read relative to
    ``base_dir`` (default: the current folder) and stored in the case.

    Raises
    ------
    CaseErrors
        One :class:`CaseError` per problem found (syntax, per-field, cross-section rules).
    """
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise CaseErrors([CaseError(source, _Shown("(TOML text)"),
                                    f"is not valid TOML: {exc}")]) from None
    except RecursionError:
        raise CaseErrors([CaseError(source, _Shown("(TOML text)"), "nests arrays or tables "
                                    f"too deeply (at most {MAX_NESTING} levels)")]) from None
    problems = _raw_problems(raw)
    if problems:
        raise CaseErrors(problems)
    try:
        case = Case.model_validate(raw)
    except ValidationError as exc:
        raise CaseErrors(_errors_from(exc, raw)) from None
    return completed_case(case, base_dir)


def completed_case(case: Case, base_dir: Path | None, *, geology: bool = True) -> Case:
    """``case`` with its data files read (geology when ``geology``, release histories) from
    ``base_dir`` and the rules between sections checked; raises :class:`CaseErrors`."""
    try:
        if geology:
            case = with_geology_files(case, base_dir or Path())
        case = with_release_files(case, base_dir or Path())
    except CaseError as exc:
        raise CaseErrors([exc]) from None
    problems = cross_checks(case)
    if problems:
        raise CaseErrors(problems)
    return case


def load_case(path: str | Path) -> Case:
    """Read and validate a case file; relative output folders stay relative to the caller."""
    p = Path(path)
    try:
        text = read_text(p, key="case file", shown=str(p), limit=MAX_CASE_FILE_BYTES)
    except CaseError as exc:
        raise CaseErrors([exc]) from None
    case = parse_case(text, source=str(p), base_dir=p.parent)
    for line in plausibility_warnings(case):
        logger.warning("%s", line)
    return case


def with_geology_files(case: Case, base_dir: Path) -> Case:
    """The case with its borehole and surface-point files read into ``stratigraphy``."""
    outside = case.input.allow_outside_files

    def place(name: str, key: str) -> Path:
        return located(base_dir, name, key=key, allow_outside=outside)

    if case.mesh.import_file is not None:
        name = case.mesh.import_file
        path = place(name, "mesh.import_file")
        checked_mesh_file(path, key="mesh.import_file", shown=name)
        case = case.model_copy(update={"mesh": case.mesh.model_copy(
            update={"import_file": str(path)})})
    for mat_name, mat in case.materials.items():
        if mat.conductivity_file is not None:
            key = f"materials.{mat_name}.conductivity_file"
            path = place(mat.conductivity_file, key)
            if not os.path.lexists(path):
                continue  # the flow stage reads it (from its own base folder) and says so
            if path.suffix.lower() in (".vtu", ".vtk"):
                checked_mesh_file(path, key=key, shown=mat.conductivity_file)
            else:  # a CSV of points, read by the flow stage: text of bounded size
                read_text(path, key=key, shown=mat.conductivity_file, limit=MAX_DATA_FILE_BYTES)
    strat = case.stratigraphy
    if strat is None or (strat.borehole_file is None and not strat.surface_files
                         and not strat.grid_files):
        return case
    update: dict[str, Any] = {}
    if strat.borehole_file is not None:
        update["boreholes"] = [*strat.boreholes, *read_borehole_file(
            place(strat.borehole_file, "stratigraphy.borehole_file"))]
    if strat.surface_files:
        pts = dict(strat.surface_points)
        for unit, name in strat.surface_files.items():
            key = f"stratigraphy.surface_files.{unit}"
            pts[unit] = [*pts.get(unit, []), *read_surface_file(place(name, key), key=key)]
        update["surface_points"] = pts
    if strat.grid_files:
        update["grids"] = {**strat.grids, **{
            name: read_grid_file(place(file, f"stratigraphy.grid_files.{name}"),
                                 key=f"stratigraphy.grid_files.{name}")
            for name, file in strat.grid_files.items()}}
    return case.model_copy(update={"stratigraphy": strat.model_copy(update=update)})


def with_release_files(case: Case, base_dir: Path) -> Case:
    """The case with every source's release CSV read into ``release_series`` [s, SI] and
    every initial plume's point file into ``concentration_points`` [m, kg/m³]."""
    if not any(s.release_file or s.concentration_file for s in case.sources):
        return case
    sources = []
    outside = case.input.allow_outside_files
    for s in case.sources:
        if s.release_file is not None and s.kind != "initial_plume":
            key = f"sources[{s.name}].release_file"
            path = located(base_dir, s.release_file, key=key, allow_outside=outside)
            series = read_release_file(path, kind=s.kind, key=key)
            s = s.model_copy(update={"release_series": series})
        if s.concentration_file is not None and s.kind == "initial_plume":
            key = f"sources[{s.name}].concentration_file"
            path = located(base_dir, s.concentration_file, key=key, allow_outside=outside)
            pts = read_concentration_points(path, key=key)
            s = s.model_copy(update={"concentration_points": pts})
        sources.append(s)
    return case.model_copy(update={"sources": sources})
