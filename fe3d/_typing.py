"""Array aliases and option vocabularies shared by every stage (imports nothing from fe3d)."""

from __future__ import annotations

from typing import Literal

import numpy as np
import numpy.typing as npt

FloatArray = npt.NDArray[np.float64]
IndexArray = npt.NDArray[np.int64]
BoolArray = npt.NDArray[np.bool_]

FaceName = Literal["west", "east", "south", "north", "top", "bottom"]
FACE_NAMES: tuple[str, ...] = ("west", "east", "south", "north", "top", "bottom")

SourceShape = Literal["box", "face_patch"]
LinearSolverChoice = Literal["auto", "direct", "iterative"]
