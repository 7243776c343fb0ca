"""The ``[uncertain]`` section: case values known only as distributions, for ensembles.

A case value is named by its key path, written as fe3d writes key paths in its error lines:
``materials.sand.horizontal_conductivity``, ``species.tce.half_life``,
``sources[spill].mass_rate``, ``time.end``, ``fixed_heads[0].head``. Entries of a list
section are found by their ``name`` (or, for entries without one, by their position).

Each uncertain value has a distribution in the unit given by ``unit`` (the value's own unit
when the case writes it with one, e.g. ``"m/d"``; no unit for dimensionless values such as
porosity):

* ``normal``: ``mean``, ``std_dev``;
* ``lognormal``: ``median`` and ``ln_std_dev``, the standard deviation of the natural
  logarithm of the value (dimensionless);
* ``uniform``: ``low``, ``high``;
* ``triangular``: ``low``, ``mode``, ``high``;
* a normal or lognormal value with ``low`` and/or ``high`` is truncated to that range.

``correlations`` impose rank correlations between pairs of values (Iman & Conover 1982);
the matrix they make must be positive definite. Values are held here as written (in
``unit``); the SI value of a member is made by the case's own field rules when the drawn
value is applied (:func:`with_field`).
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from functools import lru_cache
from typing import TYPE_CHECKING, Annotated, Any, Literal

import numpy as np
from pydantic import AfterValidator, BaseModel, Field, ValidationError, create_model

from fe3d.case.schema_types import Section
from fe3d.errors import CaseError

if TYPE_CHECKING:
    from fe3d.case.schema import Case

__all__ = [
    "Correlation",
    "UncertainInputs",
    "UncertainValue",
    "ValueTarget",
    "correlation_matrix",
    "field_value",
    "parse_target",
    "uncertain_checks",
    "with_field",
]

DEFAULT_SEED = 20_261_202
"""Seed of the sampling when the case gives none (any fixed number would do; it is recorded
beside the members so a study can be repeated and resumed)."""


def _finite(x: float) -> float:
    if not math.isfinite(x):
        msg = "must be a finite number"
        raise ValueError(msg)
    return x


def _non_negative(x: float) -> float:
    if not x >= 0:
        msg = "must be zero or greater (a spread cannot be negative)"
        raise ValueError(msg)
    return x


def _rank_correlation(x: float) -> float:
    if not -1.0 < x < 1.0:
        msg = "must be strictly between -1 and 1"
        raise ValueError(msg)
    return x


Number = Annotated[float, AfterValidator(_finite)]
Spread = Annotated[float, AfterValidator(_finite), AfterValidator(_non_negative)]

_PARAMETERS: dict[str, tuple[set[str], set[str]]] = {
    # distribution → (required parameters, optional ones)
    "normal": ({"mean", "std_dev"}, {"low", "high"}),
    "lognormal": ({"median", "ln_std_dev"}, {"low", "high"}),
    "uniform": ({"low", "high"}, set()),
    "triangular": ({"low", "mode", "high"}, set()),
}
_ALL_PARAMETERS = ("mean", "std_dev", "median", "ln_std_dev", "low", "mode", "high")


class UncertainValue(Section):
    """One uncertain case value: its key path (``name``), distribution and unit."""

    name: str
    distribution: Literal["normal", "lognormal", "uniform", "triangular"]
    unit: str = ""
    mean: Number | None = None
    std_dev: Spread | None = None
    median: Number | None = None
    ln_std_dev: Spread | None = None
    low: Number | None = None
    mode: Number | None = None
    high: Number | None = None

    def given(self) -> set[str]:
        """Names of the distribution parameters written in the case."""
        return {p for p in _ALL_PARAMETERS if getattr(self, p) is not None}

    @property
    def centre(self) -> float:
        """The value a member gets when the spread is zero: mean, median or mode, else the
        middle of [low, high] (in ``unit``)."""
        for p in ("mean", "median", "mode"):
            v = getattr(self, p)
            if v is not None:
                return float(v)
        assert self.low is not None and self.high is not None
        return 0.5 * (self.low + self.high)

    @property
    def is_fixed(self) -> bool:
        """True when the distribution has no spread (every member gets :attr:`centre`)."""
        return (self.distribution == "normal" and self.std_dev == 0.0) or (
            self.distribution == "lognormal" and self.ln_std_dev == 0.0)

    @property
    def label(self) -> str:
        """Column heading: ``materials.sand.horizontal_conductivity [m/d]``."""
        return f"{self.name} [{self.unit or '-'}]"


class Correlation(Section):
    """A rank (Spearman) correlation between two uncertain values, named by key path."""

    between: Annotated[list[str], Field(min_length=2, max_length=2)]
    rank_correlation: Annotated[float, AfterValidator(_rank_correlation)]


class UncertainInputs(Section):
    """The ``[uncertain]`` section: the values, their rank correlations, the seed."""

    seed: Annotated[int, Field(ge=0, le=2**63 - 1)] = DEFAULT_SEED
    values: Annotated[list[UncertainValue], Field(min_length=1)]
    correlations: list[Correlation] = Field(default_factory=list)


# ----------------------------------------------------------------------------- key paths


@dataclass(frozen=True)
class ValueTarget:
    """Where a key path points: a section, an entry in it (a table key, a list entry's name
    or position, or ``None`` for a one-table section such as ``time``) and a field."""

    section: str
    entry: str | int | None
    field: str


_PART = re.compile(r"^([A-Za-z_][A-Za-z0-9_]*)(?:\[([^\]]+)\])?$")


def parse_target(path: str) -> ValueTarget | None:
    """``sources[spill].mass_rate`` → ``ValueTarget("sources", "spill", "mass_rate")``;
    ``None`` when the text is not a key path of that shape."""
    parts = path.strip().split(".")
    matches = [_PART.match(p) for p in parts]
    if not all(matches) or len(parts) not in (2, 3):
        return None
    first = matches[0]
    assert first is not None
    section, index = first.group(1), first.group(2)
    if len(parts) == 3:  # materials.sand.porosity: a table of named entries
        if index is not None or matches[1] is None or matches[1].group(2) is not None:
            return None
        return ValueTarget(section, parts[1], parts[2])
    if index is not None:  # sources[spill].stop or fixed_heads[0].head
        entry: str | int = int(index) if index.isdigit() else index
        return ValueTarget(section, entry, parts[1])
    return ValueTarget(section, None, parts[1])


def _entry(case: Case, target: ValueTarget) -> tuple[Any, str]:
    """The section entry a target points into, or raise ``LookupError`` with what is known."""
    if target.section not in type(case).model_fields:
        msg = f"no section '{target.section}'"
        raise LookupError(msg)
    section = getattr(case, target.section)
    if isinstance(section, dict):
        if not isinstance(target.entry, str) or target.entry not in section:
            msg = f"no entry '{target.entry}' in {target.section} (has: {', '.join(section)})"
            raise LookupError(msg)
        return section[target.entry], target.section
    if isinstance(section, list):
        if isinstance(target.entry, int):
            if not 0 <= target.entry < len(section):
                msg = f"{target.section} has {len(section)} entries"
                raise LookupError(msg)
            return section[target.entry], target.section
        names = [getattr(e, "name", None) for e in section]
        if target.entry not in names:
            msg = (f"no entry named '{target.entry}' in {target.section} (has: "
                   f"{', '.join(str(n) for n in names if n is not None) or 'none'})")
            raise LookupError(msg)
        return section[names.index(target.entry)], target.section
    if target.entry is not None or not isinstance(section, BaseModel):
        msg = f"'{target.section}' is not a section of named entries"
        raise LookupError(msg)
    return section, target.section


def _is_real(annotation: Any) -> bool:
    """True when a field's type admits a real number (``float``, possibly optional)."""
    if annotation is float:
        return True
    return any(_is_real(a) for a in getattr(annotation, "__args__", ()))


def field_value(case: Case, target: ValueTarget) -> float | None:
    """The current SI value at ``target`` (``None`` when unset); raises ``LookupError`` with
    a plain reason when the path names no single real number of the case."""
    entry, section = _entry(case, target)
    fields = type(entry).model_fields
    if target.field not in fields:
        msg = f"{section} entries have no key '{target.field}'"
        raise LookupError(msg)
    if not _is_real(fields[target.field].annotation):
        msg = f"'{target.field}' is not a single number"
        raise LookupError(msg)
    value = getattr(entry, target.field)
    if value is not None and not isinstance(value, float | int):
        msg = f"'{target.field}' is not a single number here (it is a table or list)"
        raise LookupError(msg)
    return None if value is None else float(value)


@lru_cache(maxsize=64)
def _one_field(model: type[BaseModel], name: str) -> type[BaseModel]:
    """A model of the one field ``name`` of ``model``, with that field's own rules."""
    info = model.model_fields[name]
    return create_model(  # type: ignore[call-overload, no-any-return]
        f"One{model.__name__}", __base__=Section, **{name: (info.annotation, info)})


def _written(value: float, unit: str) -> float | str:
    """A drawn value as the case file writes it: ``"12.5 m/d"``, or a bare number."""
    return f"{value!r} {unit}" if unit else value


def with_field(case: Case, target: ValueTarget, value: float, unit: str, *, key: str) -> Case:
    """``case`` with the value at ``target`` set to ``value`` [``unit``], converted and
    checked by that field's own rules (not the rules between sections).

    Raises
    ------
    CaseError
        Naming ``key`` when the path is unknown or the field refuses the value.
    """
    try:
        field_value(case, target)
        entry, _ = _entry(case, target)
    except LookupError as exc:
        raise CaseError(key, target_text(target), f"is not a number of this case: {exc}"
                        ) from None
    written = _written(value, unit)
    try:
        checked = getattr(_one_field(type(entry), target.field).model_validate(
            {target.field: written}), target.field)
    except ValidationError as exc:
        reason = str(exc.errors()[0]["msg"]).removeprefix("Value error, ")
        raise CaseError(key, written, f"is refused by {target_text(target)}: {reason}"
                        ) from None
    new_entry = entry.model_copy(update={target.field: checked})
    section = getattr(case, target.section)
    if isinstance(section, dict):
        assert isinstance(target.entry, str)
        new_section: Any = {**section, target.entry: new_entry}
    elif isinstance(section, list):
        new_section = [new_entry if e is entry else e for e in section]
    else:
        new_section = new_entry
    return case.model_copy(update={target.section: new_section})


def target_text(target: ValueTarget) -> str:
    """The key path of ``target`` as written in a case."""
    if target.entry is None:
        return f"{target.section}.{target.field}"
    if target.section in ("materials", "species"):
        return f"{target.section}.{target.entry}.{target.field}"
    return f"{target.section}[{target.entry}].{target.field}"


# ----------------------------------------------------------------------------- checks


def _parameter_errors(value: UncertainValue, key: str) -> list[CaseError]:
    """Missing, foreign or inconsistent distribution parameters of one value."""
    required, optional = _PARAMETERS[value.distribution]
    given = value.given()
    errs = [CaseError(f"{key}.{p}", "(missing)", f"is required by a {value.distribution} "
                      f"distribution (it takes {', '.join(sorted(required | optional))})")
            for p in sorted(required - given)]
    errs += [CaseError(f"{key}.{p}", getattr(value, p), f"is not a parameter of a "
                       f"{value.distribution} distribution (it takes "
                       f"{', '.join(sorted(required | optional))})")
             for p in sorted(given - required - optional)]
    if errs:
        return errs
    lo, hi = value.low, value.high
    if lo is not None and hi is not None and not lo < hi:
        return [CaseError(f"{key}.low", lo, f"must be below high ({hi:g})")]
    if value.distribution == "triangular":
        assert lo is not None and hi is not None and value.mode is not None
        if not lo <= value.mode <= hi:
            return [CaseError(f"{key}.mode", value.mode, f"must lie in [low, high] = "
                              f"[{lo:g}, {hi:g}]")]
    if value.distribution == "lognormal":
        assert value.median is not None
        if not value.median > 0:
            return [CaseError(f"{key}.median", value.median, "must be greater than zero "
                              "(a lognormal value is positive)")]
        if lo is not None and not lo >= 0:
            return [CaseError(f"{key}.low", lo, "must be zero or greater for a lognormal "
                              "value")]
    centre = value.centre
    if (lo is not None and centre < lo) or (hi is not None and centre > hi):
        where = "mean" if value.distribution == "normal" else "median"
        return [CaseError(f"{key}.{where}", centre, f"must lie within the truncation range "
                          f"[{'-inf' if lo is None else format(lo, 'g')}, "
                          f"{'inf' if hi is None else format(hi, 'g')}]")]
    return []


def correlation_matrix(inputs: UncertainInputs) -> np.ndarray:
    """The declared rank-correlation matrix, shape ``(n_values, n_values)`` (ones on the
    diagonal, zero where no pair is given). Pairs must name declared values."""
    names = [v.name for v in inputs.values]
    c = np.eye(len(names))
    for pair in inputs.correlations:
        i, j = (names.index(n) for n in pair.between)
        c[i, j] = c[j, i] = pair.rank_correlation
    return c


def _correlation_errors(inputs: UncertainInputs) -> list[CaseError]:
    names = [v.name for v in inputs.values]
    errs: list[CaseError] = []
    seen: set[frozenset[str]] = set()
    for k, pair in enumerate(inputs.correlations):
        key = f"uncertain.correlations[{k}].between"
        unknown = [n for n in pair.between if n not in names]
        if unknown:
            errs.append(CaseError(key, unknown[0], "must name a value of uncertain.values "
                                  f"(declared: {', '.join(names)})"))
        elif pair.between[0] == pair.between[1]:
            errs.append(CaseError(key, pair.between[0], "must name two different values"))
        elif frozenset(pair.between) in seen:
            errs.append(CaseError(key, f"{pair.between}", "this pair is given twice"))
        seen.add(frozenset(pair.between))
    if errs or not inputs.correlations:
        return errs
    smallest = float(np.linalg.eigvalsh(correlation_matrix(inputs)).min())
    if smallest <= 1e-10:  # Cholesky needs a strictly positive spectrum (round-off margin)
        errs.append(CaseError("uncertain.correlations", f"smallest eigenvalue {smallest:.3g}",
                              "the rank correlations must form a positive-definite matrix: "
                              "they contradict each other; weaken some of them"))
    return errs


def _field_errors(case: Case, target: ValueTarget, value: UncertainValue, key: str
                  ) -> list[CaseError]:
    """The field's own rules applied to the centre value and to the bounds, in ``unit``
    (one error: the first refused)."""
    centre = next((p for p in ("mean", "median", "mode") if getattr(value, p) is not None),
                  None)
    checked = [(p, getattr(value, p)) for p in (centre, "low", "high")
               if p is not None and getattr(value, p) is not None]
    for param, number in checked:
        try:
            with_field(case, target, number, value.unit, key=f"{key}.name")
        except CaseError as exc:
            if "is refused by" not in exc.allowed:  # the path itself
                return [exc]
            reason = exc.allowed.split(": ", 1)[-1]
            if any(w in reason for w in ("unit", "number", "float")):
                return [CaseError(f"{key}.unit", value.unit or "(none)", exc.allowed)]
            return [CaseError(f"{key}.{param}", number, exc.allowed)]
    return []


def uncertain_checks(case: Case) -> list[CaseError]:
    """Rules of the ``[uncertain]`` section against the rest of the case: every key path
    names a number of the case, each value once; parameters fit the distribution; the
    centre value is accepted by the field's own rules in ``unit``; the correlations form a
    positive-definite matrix."""
    inputs = case.uncertain
    if inputs is None:
        return []
    errs: list[CaseError] = []
    seen: set[str] = set()
    for value in inputs.values:
        key = f"uncertain.values[{value.name}]"
        target = parse_target(value.name)
        if target is None:
            errs.append(CaseError(f"{key}.name", value.name, "must be a key path such as "
                                  "'materials.sand.porosity', 'sources[spill].mass_rate' or "
                                  "'time.end'"))
            continue
        if target_text(target) in seen:
            errs.append(CaseError(f"{key}.name", value.name, "is given twice"))
            continue
        seen.add(target_text(target))
        problems = _parameter_errors(value, key)
        if problems:
            errs += problems
            continue
        errs += _field_errors(case, target, value, key)
    if errs:  # a correlation naming a bad value would only repeat the error
        return errs
    return _correlation_errors(inputs)
