"""Case files: TOML text with units → a validated, frozen :class:`~fe3d.case.schema.Case` in SI."""

from fe3d.case.load import load_case, parse_case
from fe3d.case.schema import Case

__all__ = ["Case", "load_case", "parse_case"]
