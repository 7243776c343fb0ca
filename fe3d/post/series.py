"""Compact time series: one VTKHDF file holding the mesh once and the fields at every
output time (see docs/outputs.md for the layout and why this format).

The file follows the VTKHDF specification (version 2, ``UnstructuredGrid`` with a ``Steps``
group), read by VTK ≥ 9.3, hence ParaView ≥ 5.12 and pyvista, with its time values. Arrays
given once (the flow field, the unit of each cell) are stored once and shown at every time
(their offsets are all 0); arrays added per time are appended.

While a run goes on the file is written under a hidden temporary name beside its final one
and renamed onto it by :meth:`SeriesFile.close`: like every result file, the final name
either holds a complete file or is absent.
"""

from __future__ import annotations

import os
from pathlib import Path
from types import TracebackType
from typing import Any

import numpy as np

from fe3d._typing import FloatArray, IndexArray

__all__ = ["SERIES_FILE", "VTK_TETRA", "SeriesFile", "array_name", "read_series",
           "read_static"]

#: The file a run writes its fields into: the mesh and flow once, every output time
#: appended (docs/outputs.md).
SERIES_FILE = "results.vtkhdf"

VTK_TETRA = 10  # VTK's cell type number of a linear tetrahedron


def array_name(name: str) -> str:
    """The name an array gets in the file: HDF5 takes ``/`` as a path separator, so a unit
    such as ``mg/L`` is written ``mg per L`` (``solvent [mg/L]`` → ``solvent [mg per L]``)."""
    return name.replace("/", " per ")


class SeriesFile:
    """Writer of one VTKHDF time series on a fixed tetrahedral mesh.

    Parameters
    ----------
    path
        Final file name (``.vtkhdf``).
    points
        Node coordinates [m], shape ``(3, n_nodes)``; stored as float64.
    cells
        Tetrahedra, shape ``(4, n_cells)``; stored as int32 when the node count allows.
    static_point_data, static_cell_data
        Arrays stored once and shown at every time (names carry their units, written
        through :func:`array_name`), shapes
        ``(n_nodes,)`` / ``(n_cells,)`` or ``(n_nodes, 3)`` / ``(n_cells, 3)``.
    time_unit
        Unit of the time values passed to :meth:`add` (kept in the file's ``fe3d`` group).
    dtype
        Storage type of the floating-point arrays, static and per time (float32 by default:
        7 significant digits, for viewing; the run's tables are computed in float64). The
        node coordinates are always float64 (site coordinates of 10⁶ m need them).
    """

    def __init__(self, path: Path, points: FloatArray, cells: IndexArray, *,
                 static_point_data: dict[str, FloatArray] | None = None,
                 static_cell_data: dict[str, FloatArray] | None = None,
                 time_unit: str, dtype: type = np.float32) -> None:
        import h5py

        self.path = Path(path)
        self.n_nodes, self.n_cells = points.shape[1], cells.shape[1]
        self.dtype = np.dtype(dtype)
        self.names: list[str] | None = None
        self.n_steps = 0
        self.path.parent.mkdir(parents=True, exist_ok=True)
        self.partial = self.path.with_name(f".{self.path.name}.partial")
        self._file = h5py.File(self.partial, "w")
        root = self._file.create_group("VTKHDF")
        root.attrs["Version"] = np.array([2, 2], dtype=np.int64)
        _ascii_attribute(root, "Type", "UnstructuredGrid")
        self._write_mesh(root, points, cells)
        # the names of the arrays stored once (the arrays are not held: written, then freed)
        self.static_point = [array_name(k) for k in static_point_data or {}]
        self.static_cell = [array_name(k) for k in static_cell_data or {}]
        for group, arrays in (("PointData", static_point_data), ("CellData", static_cell_data)):
            g = root.create_group(group)
            for name, values in (arrays or {}).items():
                kind = self.dtype if np.issubdtype(values.dtype, np.floating) else values.dtype
                g.create_dataset(array_name(name),
                                 data=np.ascontiguousarray(values, dtype=kind))
        root.create_group("FieldData")
        steps = root.create_group("Steps")
        steps.attrs["NSteps"] = np.int64(0)
        for name in ("Values", "PartOffsets", "NumberOfParts", "PointOffsets",
                     "CellOffsets", "ConnectivityIdOffsets"):
            kind = np.float64 if name == "Values" else np.int64
            width = (0, 1) if name in ("CellOffsets", "ConnectivityIdOffsets") else (0,)
            steps.create_dataset(name, shape=width, maxshape=(None, *width[1:]), dtype=kind,
                                 chunks=True)
        for group in ("PointDataOffsets", "CellDataOffsets", "FieldDataOffsets"):
            steps.create_group(group)
        for name in self.static_point:
            _offsets(steps["PointDataOffsets"], name)
        for name in self.static_cell:
            _offsets(steps["CellDataOffsets"], name)
        info = self._file.create_group("fe3d")  # outside VTKHDF: ignored by VTK's reader
        _ascii_attribute(info, "time_unit", time_unit)

    def _write_mesh(self, root: Any, points: FloatArray, cells: IndexArray) -> None:
        index = np.int32 if self.n_nodes < 2**31 - 1 and cells.size < 2**31 - 1 else np.int64
        root.create_dataset("NumberOfPoints", data=np.array([self.n_nodes], dtype=np.int64))
        root.create_dataset("NumberOfCells", data=np.array([self.n_cells], dtype=np.int64))
        root.create_dataset("NumberOfConnectivityIds",
                            data=np.array([cells.size], dtype=np.int64))
        root.create_dataset("Points", data=np.ascontiguousarray(points.T, dtype=np.float64))
        root.create_dataset("Connectivity", data=np.ascontiguousarray(cells.T, dtype=index)
                            .ravel())
        root.create_dataset("Offsets", data=np.arange(0, 4 * self.n_cells + 1, 4, dtype=index))
        root.create_dataset("Types", data=np.full(self.n_cells, VTK_TETRA, dtype=np.uint8))

    def add_static(self, *, point_data: dict[str, FloatArray] | None = None,
                   cell_data: dict[str, FloatArray] | None = None) -> None:
        """Store further arrays once, shown at every time (e.g. the largest value over the
        run, known only at its end); names must not repeat one already stored."""
        root = self._file["VTKHDF"]
        steps = root.get("Steps")
        for group, arrays, known in (("PointData", point_data, self.static_point),
                                     ("CellData", cell_data, self.static_cell)):
            for name, values in (arrays or {}).items():
                key = array_name(name)
                if key in root[group] or key in (self.names or []):
                    msg = f"array {key!r} is already stored in {self.path.name}"
                    raise ValueError(msg)
                kind = self.dtype if np.issubdtype(values.dtype, np.floating) else values.dtype
                root[group].create_dataset(key, data=np.ascontiguousarray(values, dtype=kind))
                if steps is not None:
                    _offsets(steps[f"{group}Offsets"], key, step_count=self.n_steps)
                known.append(key)
        self._file.flush()

    def add(self, time: float, point_data: dict[str, FloatArray]) -> None:
        """Append one output time (in ``time_unit``) with its nodal arrays [display units],
        each shape ``(n_nodes,)``; every call must give the same names."""
        point_data = {array_name(k): v for k, v in point_data.items()}
        if self.names is None:
            self.names = list(point_data)
            clash = set(self.names) & set(self.static_point)
            if clash:
                msg = f"arrays {sorted(clash)} are already stored once in {self.path.name}"
                raise ValueError(msg)
        elif list(point_data) != self.names:
            msg = f"every output time must give the arrays {self.names}, got {list(point_data)}"
            raise ValueError(msg)
        root = self._file["VTKHDF"]
        steps, k = root["Steps"], self.n_steps
        for name, values in point_data.items():
            if values.shape != (self.n_nodes,):
                msg = f"{name}: expected shape ({self.n_nodes},), got {values.shape}"
                raise ValueError(msg)
            data = root["PointData"].get(name)
            if data is None:
                data = root["PointData"].create_dataset(
                    name, shape=(0,), maxshape=(None,), dtype=self.dtype,
                    chunks=(min(self.n_nodes, 1 << 18),))
                _offsets(steps["PointDataOffsets"], name, step_count=k)
            data.resize(((k + 1) * self.n_nodes,))
            data[k * self.n_nodes:] = values.astype(self.dtype)
            _append(steps["PointDataOffsets"][name], k * self.n_nodes)
        for name in self.static_point:
            _append(steps["PointDataOffsets"][name], 0)
        for name in self.static_cell:
            _append(steps["CellDataOffsets"][name], 0)
        _append(steps["Values"], float(time))
        for name in ("PartOffsets", "PointOffsets"):
            _append(steps[name], 0)
        _append(steps["NumberOfParts"], 1)
        for name in ("CellOffsets", "ConnectivityIdOffsets"):
            _append(steps[name], [0])
        self.n_steps += 1
        steps.attrs["NSteps"] = np.int64(self.n_steps)
        self._file.flush()

    def close(self) -> Path:
        """Close the file and give it its final name; returns that name. A file given no
        output time holds the mesh and its static arrays only (no ``Steps`` group)."""
        if self._file.id.valid:
            if self.n_steps == 0:
                del self._file["VTKHDF/Steps"]
            self._file.close()
            os.replace(self.partial, self.path)
        return self.path

    def __enter__(self) -> SeriesFile:
        return self

    def __exit__(self, kind: type[BaseException] | None, error: BaseException | None,
                 trace: TracebackType | None) -> None:
        if kind is None:
            self.close()
        else:  # a failed run leaves no file under the final name
            self._file.close()
            self.partial.unlink(missing_ok=True)


def _ascii_attribute(group: Any, name: str, text: str) -> None:
    """A fixed-length ASCII string attribute (what VTK's reader expects for ``Type``)."""
    import h5py

    kind = h5py.string_dtype("ascii", len(text))
    group.attrs.create(name, np.array(text.encode("ascii"), dtype=kind))


def _offsets(group: Any, name: str, *, step_count: int = 0) -> None:
    """An empty (or zero-filled for the steps already written) offsets dataset."""
    group.create_dataset(name, data=np.zeros(step_count, dtype=np.int64),
                         maxshape=(None,), chunks=True)


def _append(data: Any, value: float | int | list[int]) -> None:
    """Append one row to a resizable dataset."""
    n = data.shape[0]
    data.resize(n + 1, axis=0)
    data[n] = value


def read_series(path: Path, names: list[str]) -> tuple[FloatArray, dict[str, FloatArray]]:
    """The output times (in the file's time unit) and, for each name (as given to
    :meth:`SeriesFile.add`), the values at every output time, shape ``(n_times, n_nodes)``,
    of a file :class:`SeriesFile` wrote."""
    import h5py

    with h5py.File(path, "r") as f:
        root = f["VTKHDF"]
        n = int(root["NumberOfPoints"][0])
        times = np.array(root["Steps/Values"], dtype=float) if "Steps" in root else np.zeros(0)
        out = {}
        for name in names:
            key = array_name(name)
            data, offsets = root["PointData"][key], root["Steps/PointDataOffsets"][key]
            out[name] = np.stack([np.asarray(data[int(o):int(o) + n], dtype=float)
                                  for o in np.asarray(offsets).ravel()])
    return times, out


def read_static(path: Path, names: list[str]) -> dict[str, FloatArray]:
    """For each name (as given to :meth:`SeriesFile.add_static`), its point values, shape
    ``(n_nodes,)``, of a file :class:`SeriesFile` wrote: stored once, read once (every
    output time's offset points at the same values)."""
    import h5py

    with h5py.File(path, "r") as f:
        root = f["VTKHDF"]
        n = int(root["NumberOfPoints"][0])
        return {name: np.asarray(root["PointData"][array_name(name)][:n], dtype=float)
                for name in names}
