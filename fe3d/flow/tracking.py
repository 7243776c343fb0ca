"""Advective particle tracking, cell by cell (theory.md F8).

The P1 seepage velocity v = q/θ is constant in each cell, so inside a cell a particle moves
on a straight line and its barycentric coordinates λ_i change at the constant rates
∇φ_i·v. The exit face is the one whose λ_i reaches zero first and the exit time is
λ_i / (−∇φ_i·v): exact for the discrete field, one small compiled loop per cell crossed.
The particle then enters the neighbour across that face (the cell adjacency is built once,
in linear time, by :func:`cell_neighbours`).

The normal component of v jumps across faces. Where the velocities of two neighbours both
point into their shared face (around wells, and along flat layer faces where the vertical
component changes sign) the exact motion would slide along the face and cell-by-cell
tracking stalls. There the tracker takes one midpoint step of 0.2 × the cell's length along
the flow on the node-averaged velocity (volume-weighted, interpolated with the P1 basis,
continuous) and resumes cell by cell from where that step ends. A uniform field is
followed exactly, so the travel time in uniform flow equals distance × θ / |q| to round-off.
"""

from __future__ import annotations

from dataclasses import dataclass

import numba
import numpy as np

from fe3d._typing import BoolArray, FloatArray, IndexArray
from fe3d.p1 import cell_gradients, index_array

__all__ = ["Pathline", "Tracker", "cell_neighbours", "thin_pathline"]

_jit = numba.njit(cache=True, nogil=True)

_ENDS = ("boundary", "stagnant", "captured", "max_time", "max_steps")
_BOUNDARY, _STAGNANT, _CAPTURED, _MAX_TIME, _MAX_STEPS = range(5)
_NO_LENGTH = 1e-10
"""A move shorter than this fraction of the cell's length along the flow has no length."""
_IDLE_LIMIT = 8
"""Moves of no length in a row (round an edge or a vertex) before the particle counts as
stalled."""
_INSIDE = 1e-9
"""Barycentric tolerance of point location (as :class:`~fe3d.mesh.locate.CellFinder`)."""


@dataclass(frozen=True)
class Pathline:
    """Positions [m] ``(3, k)`` and times [s] ``(k,)`` of one particle, why it stopped, the
    number of cells it crossed, and at each position the cell the particle moves through
    from there on (``cells`` ``(k,)``; at the last position the cell it ended in; −1 for a
    start outside the mesh)."""

    points: FloatArray
    times: FloatArray
    end: str  # "boundary", "stagnant", "captured", "max_time", "max_steps"
    cells_crossed: int
    cells: IndexArray


# ----------------------------------------------------------------------------- adjacency


@numba.njit(inline="always")
def _face_of(cells: IndexArray, k: int, e: int) -> tuple[int, int, int]:
    """Smallest, middle and largest node of the face of cell e opposite its vertex k."""
    lo, hi, total = np.int64(2**62), np.int64(-1), np.int64(0)
    for j in range(4):
        if j != k:
            node = np.int64(cells[j, e])
            lo = min(lo, node)
            hi = max(hi, node)
            total += node
    return lo, total - lo - hi, hi


@_jit
def _face_buckets(cells: IndexArray, n_nodes: int, face: IndexArray) -> IndexArray:
    """Every face (flat id k·m + e, opposite local vertex k of cell e) into ``face``, in
    buckets by its smallest node; returns where each bucket starts ``(n_nodes + 1,)``."""
    m = cells.shape[1]
    start = np.zeros(n_nodes + 1, dtype=np.int64)
    for e in range(m):
        for k in range(4):
            start[_face_of(cells, k, e)[0] + 1] += 1
    for v in range(n_nodes):
        start[v + 1] += start[v]
    fill = start[:-1].copy()
    for e in range(m):
        for k in range(4):
            lo = _face_of(cells, k, e)[0]
            face[fill[lo]] = k * m + e
            fill[lo] += 1
    return start


@_jit
def _pair_faces(cells: IndexArray, start: IndexArray, face: IndexArray,
                nb: IndexArray) -> None:
    """Match the faces with equal middle and largest nodes inside each bucket: the cell
    across each into ``nb`` (flat, by face id; unmatched faces keep −1)."""
    m = cells.shape[1]
    widest = 0
    for v in range(start.size - 1):
        widest = max(widest, start[v + 1] - start[v])
    mid = np.empty(widest, dtype=np.int64)  # the keys of one bucket
    top = np.empty(widest, dtype=np.int64)
    for v in range(start.size - 1):
        a, b = start[v], start[v + 1]
        for i in range(a, b):
            f = face[i]
            _, mid[i - a], top[i - a] = _face_of(cells, f // m, f % m)
        for i in range(a, b):
            if nb[face[i]] >= 0:
                continue
            for j in range(i + 1, b):
                if nb[face[j]] < 0 and mid[j - a] == mid[i - a] and top[j - a] == top[i - a]:
                    nb[face[i]] = face[j] % m
                    nb[face[j]] = face[i] % m
                    break


def cell_neighbours(cells: IndexArray, n_nodes: int | None = None) -> IndexArray:
    """Neighbour of every tetrahedron across the face opposite each of its vertices.

    Faces are put in buckets by their smallest node (a counting sort) and matched inside a
    bucket by their two other nodes: linear in the number of cells for a mesh of bounded
    node degree, compiled, no sort of all faces. Lean: besides the result it holds one face
    id per face (int32) and one bucket start per node, and reads the face nodes from
    ``cells`` (no copy of it in int32 or int64 alike).

    Parameters
    ----------
    cells
        Tetrahedra, shape ``(4, n_cells)``.
    n_nodes
        Number of nodes (default: the largest node id + 1).

    Returns
    -------
    IndexArray
        ``neighbour[k, e]``: the cell across the face of cell e opposite its local vertex k,
        −1 on the boundary; shape ``(4, n_cells)``, int32 (int64 beyond 2³¹ faces).
    """
    cells = index_array(cells)
    n = int(cells.max()) + 1 if n_nodes is None else int(n_nodes)
    m = cells.shape[1]
    index = np.int32 if 4 * m < 2**31 else np.int64
    face = np.empty(4 * m, dtype=index)
    start = _face_buckets(cells, n, face)
    nb = np.full(4 * m, -1, dtype=index)
    _pair_faces(cells, start, face, nb)
    return nb.reshape(4, m)


# ------------------------------------------------------------------ cell geometry, location


@numba.njit(inline="always")
def _barycentric(points: FloatArray, cells: IndexArray, e: int, x: FloatArray,
                 lam: FloatArray, g: FloatArray) -> float:
    """Barycentric coordinates of x in cell e into ``lam`` ``(4,)`` and the cell's basis
    gradients into ``g`` ``(4, 3)`` (formed here, not stored per cell); returns the least
    coordinate."""
    cell_gradients(points, cells, e, g)
    i0 = cells[0, e]
    dx, dy, dz = x[0] - points[0, i0], x[1] - points[1, i0], x[2] - points[2, i0]
    s = 0.0
    for i in range(1, 4):
        lam[i] = g[i, 0] * dx + g[i, 1] * dy + g[i, 2] * dz
        s += lam[i]
    lam[0] = 1.0 - s
    return min(min(lam[0], lam[1]), min(lam[2], lam[3]))


@_jit
def _locate(points: FloatArray, cells: IndexArray, nb: IndexArray, x: FloatArray,
            start: int, scan: bool) -> int:
    """Cell containing x, or −1: a walk from ``start`` towards x across the face of the most
    negative barycentric coordinate; where the walk meets the boundary or runs long (a
    non-convex outline), a scan of every cell if ``scan`` (else −1: for the short steps of
    a particle, where meeting the boundary means leaving the mesh)."""
    lam = np.empty(4)
    g = np.empty((4, 3))
    m = cells.shape[1]
    e = max(start, 0)
    for _ in range(16 * int(m ** (1.0 / 3.0)) + 64):
        if _barycentric(points, cells, e, x, lam, g) >= -_INSIDE:
            return e
        k = int(np.argmin(lam))
        if nb[k, e] < 0:
            break
        e = nb[k, e]
    if not scan:
        return -1
    for e in range(m):
        if _barycentric(points, cells, e, x, lam, g) >= -_INSIDE:
            return e
    return -1


@numba.njit(inline="always")
def _cell_velocity(velocity: FloatArray, porosity: FloatArray, d: int, e: int) -> float:
    """Component d of the seepage velocity of cell e [m/s]: ``velocity`` itself, or the
    Darcy flux over the porosity where a porosity per cell is given."""
    if porosity.size > 0:
        return velocity[d, e] / porosity[e]
    return velocity[d, e]


@_jit
def _nodal_velocity(points: FloatArray, cells: IndexArray, velocity: FloatArray,
                    porosity: FloatArray) -> FloatArray:
    """Volume-weighted mean of the cell velocities at each node [m/s], ``(3, n_nodes)``."""
    n_nodes = points.shape[1]
    out = np.zeros((3, n_nodes))
    weight = np.zeros(n_nodes)
    g = np.empty((4, 3))
    for e in range(cells.shape[1]):
        w = abs(cell_gradients(points, cells, e, g))
        for i in range(4):
            node = cells[i, e]
            weight[node] += w
            for d in range(3):
                out[d, node] += w * _cell_velocity(velocity, porosity, d, e)
    for node in range(n_nodes):
        if weight[node] > 0.0:
            for d in range(3):
                out[d, node] /= weight[node]
    return out


# ------------------------------------------------------------------------------- tracking


@numba.njit(inline="always")
def _nodal_at(nodal: FloatArray, cells: IndexArray, e: int, lam: FloatArray, sign: float,
              out: FloatArray) -> float:
    """±(P1 interpolation of the node-averaged velocity) at λ in cell e; returns its norm."""
    s2 = 0.0
    for d in range(3):
        out[d] = sign * (nodal[d, cells[0, e]] * lam[0] + nodal[d, cells[1, e]] * lam[1]
                         + nodal[d, cells[2, e]] * lam[2] + nodal[d, cells[3, e]] * lam[3])
        s2 += out[d] * out[d]
    return np.sqrt(s2)


@numba.njit(inline="always")
def _along(g: FloatArray, v: FloatArray, speed: float) -> float:
    """Length along v [m] of the cell of basis gradients ``g`` ``(4, 3)``: 2|v| / Σ|∇φ_i·v|."""
    s = 0.0
    for i in range(4):
        s += abs(g[i, 0] * v[0] + g[i, 1] * v[1] + g[i, 2] * v[2])
    return 2.0 * speed / s


@_jit
def _track(points: FloatArray, cells: IndexArray, nb: IndexArray, velocity: FloatArray,
           porosity: FloatArray, nodal: FloatArray, capture: BoolArray, x0: FloatArray,
           e0: int, sign: float, max_time: float, step_fraction: float,
           out_x: FloatArray, out_t: FloatArray, out_e: IndexArray) -> tuple[int, int, int]:
    """Follow one particle from x0 in cell e0; positions and times go to ``out_x`` ``(3, s)``
    and ``out_t`` ``(s,)``, and the cell it moves through from each position (the last: the
    cell it ended in) to ``out_e`` ``(s,)``. Returns (points written, end code, cells
    crossed)."""
    max_steps = out_t.size - 1
    x = x0.copy()
    e = e0
    t = 0.0
    out_x[:, 0] = x
    out_t[0] = 0.0
    out_e[0] = e
    n = 1
    crossed = 0
    came_from = -1
    idle = 0
    lam = np.empty(4)
    g = np.empty((4, 3))  # basis gradients of the cell at hand
    v = np.empty(3)
    vm = np.empty(3)
    xs = np.empty(3)
    has_capture = capture.size > 0
    for _ in range(max_steps):
        if has_capture and capture[e]:
            return n, _CAPTURED, crossed
        speed = 0.0
        for d in range(3):
            v[d] = sign * _cell_velocity(velocity, porosity, d, e)
            speed += v[d] * v[d]
        speed = np.sqrt(speed)
        stalled = False
        if speed > 1e-30:
            _barycentric(points, cells, e, x, lam, g)
            tau, k = np.inf, -1
            for i in range(4):
                rate = g[i, 0] * v[0] + g[i, 1] * v[1] + g[i, 2] * v[2]
                if rate < 0.0:
                    ti = max(lam[i], 0.0) / -rate
                    if ti < tau:
                        tau, k = ti, i
            if k < 0:
                return n, _STAGNANT, crossed
            if tau * speed <= _NO_LENGTH * _along(g, v, speed):
                f = nb[k, e]
                if f >= 0 and f != came_from and idle < _IDLE_LIMIT:
                    came_from, e, idle = e, f, idle + 1  # round an edge or a vertex
                    out_e[n - 1] = e
                    continue
                stalled = f >= 0
                if not stalled:
                    return n, _BOUNDARY, crossed
            else:
                if t + tau >= max_time:
                    tau = max_time - t
                for d in range(3):
                    x[d] += tau * v[d]
                t += tau
                out_x[:, n] = x
                out_t[n] = t
                out_e[n] = e
                n += 1
                if t >= max_time:
                    return n, _MAX_TIME, crossed
                f = nb[k, e]
                if f < 0:
                    return n, _BOUNDARY, crossed
                crossed += 1
                came_from, e, idle = e, f, 0
                out_e[n - 1] = e
                continue
        # no exact move possible: one midpoint step on the node-averaged velocity
        _barycentric(points, cells, e, x, lam, g)
        s1 = _nodal_at(nodal, cells, e, lam, sign, v)
        if s1 <= 1e-30:
            return n, _STAGNANT, crossed
        dt = step_fraction * _along(g, v, s1) / s1
        if t + dt > max_time:
            dt = max_time - t
        for d in range(3):
            xs[d] = x[d] + 0.5 * dt * v[d]
        em = _locate(points, cells, nb, xs, e, False)
        en = -1
        if em >= 0:
            _barycentric(points, cells, em, xs, lam, g)
            _nodal_at(nodal, cells, em, lam, sign, vm)
            for d in range(3):
                xs[d] = x[d] + dt * vm[d]
            en = _locate(points, cells, nb, xs, em, False)
        if en < 0:
            # leaves the mesh: bisect an Euler step to end on the boundary
            lo, hi = 0.0, 1.0
            for _ in range(60):
                mid = 0.5 * (lo + hi)
                for d in range(3):
                    xs[d] = x[d] + mid * dt * v[d]
                if _locate(points, cells, nb, xs, e, False) >= 0:
                    lo = mid
                else:
                    hi = mid
            for d in range(3):
                x[d] += lo * dt * v[d]
            t += lo * dt
            out_x[:, n] = x
            out_t[n] = t
            last = _locate(points, cells, nb, x, e, False)
            out_e[n] = last if last >= 0 else e
            return n + 1, _BOUNDARY, crossed
        x[:] = xs
        t += dt
        out_x[:, n] = x
        out_t[n] = t
        out_e[n] = en
        n += 1
        if t >= max_time:
            return n, _MAX_TIME, crossed
        if en != e:
            crossed += 1
        came_from, e, idle = -1, en, 0
    return n, _MAX_STEPS, crossed


class Tracker:
    """Track particles through a tetrahedral mesh with a velocity per cell.

    Lean by design (issue 16): it keeps references to ``points``, ``cells`` and ``velocity``
    (no copies when they are already C-contiguous float64 / int32 or int64), the cell
    adjacency (int32, 16 bytes per cell) and the node-averaged velocity (24 bytes per node);
    each cell's basis gradients are formed when a particle or a search visits it. Drop the
    tracker when the pathlines are traced: nothing else it holds is needed afterwards.

    Parameters
    ----------
    points, cells
        Mesh nodes [m] ``(3, n)`` and tetrahedra ``(4, m)``.
    velocity
        Seepage velocity per cell [m/s], shape ``(3, m)``; or, with ``porosity``, the Darcy
        flux per cell [m/s], divided by the porosity cell by cell as it is read (no
        ``(3, m)`` seepage-velocity array).
    porosity
        Porosity per cell [-], shape ``(m,)``, or None (``velocity`` is the seepage
        velocity).
    """

    def __init__(self, points: FloatArray, cells: IndexArray, velocity: FloatArray, *,
                 porosity: FloatArray | None = None) -> None:
        self.points = np.ascontiguousarray(points, dtype=float)
        self.cells = index_array(cells)
        self.velocity = np.ascontiguousarray(velocity, dtype=float)
        self.porosity = (np.zeros(0) if porosity is None
                         else np.ascontiguousarray(porosity, dtype=float))
        self.neighbour = cell_neighbours(self.cells, self.points.shape[1])
        self._nodal = _nodal_velocity(self.points, self.cells, self.velocity, self.porosity)
        self._last = 0  # where the next walk of locate starts

    def locate(self, x: FloatArray) -> int:
        """Index of the cell containing point x [m] (barycentric tolerance 1e-9), or −1
        outside the mesh."""
        e = int(_locate(self.points, self.cells, self.neighbour, np.asarray(x, dtype=float),
                        self._last, True))
        if e >= 0:
            self._last = e
        return e

    def track(self, x0: FloatArray, *, backward: bool = False, max_time: float = np.inf,
              max_steps: int = 100_000, capture_cells: set[int] | BoolArray | None = None,
              step_fraction: float = 0.2) -> Pathline:
        """Follow a particle from x0 [m] forward (or backward) in time.

        Cell by cell on the cells' own velocity (exact for it); where neighbouring cell
        velocities converge on a face, a midpoint step of ``step_fraction`` × the cell's
        length along the flow on the node-averaged velocity. It stops on leaving the mesh
        (on the boundary face), in a capture cell (a set of cell ids or a mask over the
        cells), when the speed vanishes, at ``max_time`` [s], or after ``max_steps`` cell
        crossings and steps. A point is recorded at every crossing and step.
        """
        x = np.asarray(x0, dtype=float).copy()
        e = self.locate(x)
        if e < 0:
            return Pathline(x[:, None], np.zeros(1), "boundary", 0, np.full(1, -1))
        capture = np.zeros(0, dtype=np.bool_)
        if isinstance(capture_cells, np.ndarray):
            capture = np.ascontiguousarray(capture_cells, dtype=np.bool_)
            if capture.shape != (self.cells.shape[1],):
                msg = f"capture mask of shape {capture.shape}, not one flag per cell"
                raise ValueError(msg)
        elif capture_cells:
            capture = np.zeros(self.cells.shape[1], dtype=np.bool_)
            capture[np.fromiter(capture_cells, dtype=np.int64)] = True
        out_x = np.empty((3, max_steps + 1))
        out_t = np.empty(max_steps + 1)
        out_e = np.empty(max_steps + 1, dtype=np.int64)
        n, end, crossed = _track(self.points, self.cells, self.neighbour, self.velocity,
                                 self.porosity, self._nodal, capture, x, e,
                                 -1.0 if backward else 1.0, float(max_time),
                                 float(step_fraction), out_x, out_t, out_e)
        return Pathline(out_x[:, :n].copy(), out_t[:n].copy(), _ENDS[end], int(crossed),
                        out_e[:n].copy())


# ------------------------------------------------------------------------------- thinning


@_jit
def _keep_points(x: FloatArray, tolerance: float) -> BoolArray:
    """Douglas–Peucker on points ``x`` ``(k, 3)``: keep the points the polyline needs to
    stay within ``tolerance`` of all of them."""
    k = x.shape[0]
    keep = np.zeros(k, dtype=np.bool_)
    keep[0] = keep[k - 1] = True
    stack = [(0, k - 1)]
    while len(stack) > 0:
        a, b = stack.pop()
        if b <= a + 1:
            continue
        ab = x[b] - x[a]
        ab2 = ab[0] * ab[0] + ab[1] * ab[1] + ab[2] * ab[2]
        worst, at = -1.0, -1
        for i in range(a + 1, b):
            ap = x[i] - x[a]
            s = 0.0
            if ab2 > 0.0:
                s = min(max((ap[0] * ab[0] + ap[1] * ab[1] + ap[2] * ab[2]) / ab2, 0.0), 1.0)
            d = ap - s * ab
            dist = d[0] * d[0] + d[1] * d[1] + d[2] * d[2]
            if dist > worst:
                worst, at = dist, i
        if worst > tolerance * tolerance:
            keep[at] = True
            stack.append((a, at))
            stack.append((at, b))
    return keep


def thin_pathline(path: Pathline, tolerance: float) -> Pathline:
    """The pathline with only the points that keep it within ``tolerance`` [m] of the
    recorded one (Douglas–Peucker): what a figure or a polyline file needs. The kept points
    keep their exact positions and times; the first and last are always kept."""
    if path.times.size <= 2:
        return path
    keep = _keep_points(np.ascontiguousarray(path.points.T), float(tolerance))
    return Pathline(path.points[:, keep], path.times[keep], path.end, path.cells_crossed,
                    path.cells[keep])
