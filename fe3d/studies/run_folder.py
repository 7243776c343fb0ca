"""What a study reads back from a run folder written by :func:`fe3d.pipeline.run_case`."""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np

from fe3d._typing import FloatArray
from fe3d.case.schema import Case
from fe3d.units import from_si

__all__ = ["read_histories"]


def read_histories(folder: Path, case: Case) -> tuple[FloatArray, dict[str, FloatArray]]:
    """Times [s] and concentrations [kg/m³] ``(n_times, n_points)`` per species from a run's
    ``histories.csv`` (written in display units, 8 significant digits, by
    fe3d.post.tables.write_histories)."""
    tu, cu = case.output.time_unit, case.output.concentration_unit
    with (folder / "histories.csv").open(newline="") as fh:
        rows = list(csv.reader(fh))
    header, data = rows[0], np.array(rows[1:], dtype=float).reshape(-1, len(rows[0]))
    times = data[:, header.index(f"time [{tu}]")] / from_si(1.0, tu)
    names = [o.name for o in case.observation_points]
    history = {sp: np.stack([data[:, header.index(f"{o} {sp} [{cu}]")] for o in names],
                            axis=1) / from_si(1.0, cu) for sp in case.species}
    return times, history
