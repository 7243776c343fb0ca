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
from fe3d.mesh.geometry import p1_gradients

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
    """Positions [m] ``(3, k)`` and times [s] ``(k,)`` of one particle, why it stopped, and
    the number of cells it crossed."""

    points: FloatArray
    times: FloatArray
    end: str  # "boundary", "stagnant", "captured", "max_time", "max_steps"
    cells_crossed: int = 0


# ----------------------------------------------------------------------------- adjacency


@_jit
def _face_buckets(cells: IndexArray, n_nodes: int) -> tuple[IndexArray, IndexArray,
                                                              IndexArray]:
    """Every face (flat id k·m + e, opposite local vertex k of cell e) in buckets by its
    smallest node, with the key b·n + c of its two other nodes (b < c)."""
    m = cells.shape[1]
    start = np.zeros(n_nodes + 1, dtype=np.int64)
    for e in range(m):
        for k in range(4):
            a = n_nodes
            for j in range(4):
                if j != k:
                    a = min(a, cells[j, e])
            start[a + 1] += 1
    for v in range(n_nodes):
        start[v + 1] += start[v]
    fill = start[:-1].copy()
    face = np.empty(4 * m, dtype=np.int64)
    key = np.empty(4 * m, dtype=np.int64)
    for e in range(m):
        for k in range(4):
            lo, hi, total = n_nodes, -1, 0
            for j in range(4):
                if j != k:
                    lo = min(lo, cells[j, e])
                    hi = max(hi, cells[j, e])
                    total += cells[j, e]
            i = fill[lo]
            fill[lo] += 1
            face[i] = k * m + e
            key[i] = (total - lo - hi) * n_nodes + hi
    return start, face, key


@_jit
def _pair_faces(start: IndexArray, face: IndexArray, key: IndexArray,
                m: int) -> IndexArray:
    """Match the faces with equal keys inside each bucket; unmatched faces keep −1."""
    nb = np.full(face.size, -1, dtype=np.int64)
    paired = np.zeros(face.size, dtype=np.bool_)
    for v in range(start.size - 1):
        for i in range(start[v], start[v + 1]):
            if paired[i]:
                continue
            for j in range(i + 1, start[v + 1]):
                if not paired[j] and key[j] == key[i]:
                    paired[i] = paired[j] = True
                    nb[face[i]] = face[j] % m
                    nb[face[j]] = face[i] % m
                    break
    return nb


def cell_neighbours(cells: IndexArray, n_nodes: int | None = None) -> IndexArray:
    """Neighbour of every tetrahedron across the face opposite each of its vertices.

    Faces are put in buckets by their smallest node (a counting sort) and matched inside a
    bucket by their two other nodes: linear in the number of cells for a mesh of bounded
    node degree, compiled, no sort of all faces.

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
        −1 on the boundary; shape ``(4, n_cells)``.
    """
    cells = np.ascontiguousarray(cells, dtype=np.int64)
    n = int(cells.max()) + 1 if n_nodes is None else int(n_nodes)
    m = cells.shape[1]
    start, face, key = _face_buckets(cells, n)
    return _pair_faces(start, face, key, m).reshape(4, m)


# ------------------------------------------------------------------ cell geometry, location


@numba.njit(inline="always")
def _barycentric(points: FloatArray, cells: IndexArray, grads: FloatArray, e: int,
                 x: FloatArray, lam: FloatArray) -> float:
    """Barycentric coordinates of x in cell e into ``lam`` ``(4,)``; returns their minimum."""
    i0 = cells[0, e]
    dx, dy, dz = x[0] - points[0, i0], x[1] - points[1, i0], x[2] - points[2, i0]
    s = 0.0
    for i in range(1, 4):
        lam[i] = grads[e, i, 0] * dx + grads[e, i, 1] * dy + grads[e, i, 2] * dz
        s += lam[i]
    lam[0] = 1.0 - s
    return min(min(lam[0], lam[1]), min(lam[2], lam[3]))


@_jit
def _locate(points: FloatArray, cells: IndexArray, grads: FloatArray, nb: IndexArray,
            x: FloatArray, start: int, scan: bool) -> int:
    """Cell containing x, or −1: a walk from ``start`` towards x across the face of the most
    negative barycentric coordinate; where the walk meets the boundary or runs long (a
    non-convex outline), a scan of every cell if ``scan`` (else −1: for the short steps of
    a particle, where meeting the boundary means leaving the mesh)."""
    lam = np.empty(4)
    m = cells.shape[1]
    e = max(start, 0)
    for _ in range(16 * int(m ** (1.0 / 3.0)) + 64):
        if _barycentric(points, cells, grads, e, x, lam) >= -_INSIDE:
            return e
        k = int(np.argmin(lam))
        if nb[k, e] < 0:
            break
        e = nb[k, e]
    if not scan:
        return -1
    for e in range(m):
        if _barycentric(points, cells, grads, e, x, lam) >= -_INSIDE:
            return e
    return -1


@_jit
def _nodal_velocity(cells: IndexArray, volumes: FloatArray, velocity: FloatArray,
                    n_nodes: int) -> FloatArray:
    """Volume-weighted mean of the cell velocities at each node [m/s], ``(3, n_nodes)``."""
    out = np.zeros((3, n_nodes))
    weight = np.zeros(n_nodes)
    for e in range(cells.shape[1]):
        w = abs(volumes[e])
        for i in range(4):
            node = cells[i, e]
            weight[node] += w
            for d in range(3):
                out[d, node] += w * velocity[d, e]
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
def _along(grads: FloatArray, e: int, v: FloatArray, speed: float) -> float:
    """Length of cell e along v [m]: 2|v| / Σ|∇φ_i·v|."""
    s = 0.0
    for i in range(4):
        s += abs(grads[e, i, 0] * v[0] + grads[e, i, 1] * v[1] + grads[e, i, 2] * v[2])
    return 2.0 * speed / s


@_jit
def _track(points: FloatArray, cells: IndexArray, grads: FloatArray, nb: IndexArray,
           velocity: FloatArray, nodal: FloatArray, capture: BoolArray, x0: FloatArray,
           e0: int, sign: float, max_time: float, step_fraction: float,
           out_x: FloatArray, out_t: FloatArray) -> tuple[int, int, int]:
    """Follow one particle from x0 in cell e0; positions and times go to ``out_x`` ``(3, s)``
    and ``out_t`` ``(s,)``. Returns (points written, end code, cells crossed)."""
    max_steps = out_t.size - 1
    x = x0.copy()
    e = e0
    t = 0.0
    out_x[:, 0] = x
    out_t[0] = 0.0
    n = 1
    crossed = 0
    came_from = -1
    idle = 0
    lam = np.empty(4)
    v = np.empty(3)
    vm = np.empty(3)
    xs = np.empty(3)
    has_capture = capture.size > 0
    for _ in range(max_steps):
        if has_capture and capture[e]:
            return n, _CAPTURED, crossed
        speed = 0.0
        for d in range(3):
            v[d] = sign * velocity[d, e]
            speed += v[d] * v[d]
        speed = np.sqrt(speed)
        stalled = False
        if speed > 1e-30:
            _barycentric(points, cells, grads, e, x, lam)
            tau, k = np.inf, -1
            for i in range(4):
                rate = grads[e, i, 0] * v[0] + grads[e, i, 1] * v[1] + grads[e, i, 2] * v[2]
                if rate < 0.0:
                    ti = max(lam[i], 0.0) / -rate
                    if ti < tau:
                        tau, k = ti, i
            if k < 0:
                return n, _STAGNANT, crossed
            if tau * speed <= _NO_LENGTH * _along(grads, e, v, speed):
                f = nb[k, e]
                if f >= 0 and f != came_from and idle < _IDLE_LIMIT:
                    came_from, e, idle = e, f, idle + 1  # round an edge or a vertex
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
                n += 1
                if t >= max_time:
                    return n, _MAX_TIME, crossed
                f = nb[k, e]
                if f < 0:
                    return n, _BOUNDARY, crossed
                crossed += 1
                came_from, e, idle = e, f, 0
                continue
        # no exact move possible: one midpoint step on the node-averaged velocity
        _barycentric(points, cells, grads, e, x, lam)
        s1 = _nodal_at(nodal, cells, e, lam, sign, v)
        if s1 <= 1e-30:
            return n, _STAGNANT, crossed
        dt = step_fraction * _along(grads, e, v, s1) / s1
        if t + dt > max_time:
            dt = max_time - t
        for d in range(3):
            xs[d] = x[d] + 0.5 * dt * v[d]
        em = _locate(points, cells, grads, nb, xs, e, False)
        en = -1
        if em >= 0:
            _barycentric(points, cells, grads, em, xs, lam)
            _nodal_at(nodal, cells, em, lam, sign, vm)
            for d in range(3):
                xs[d] = x[d] + dt * vm[d]
            en = _locate(points, cells, grads, nb, xs, em, False)
        if en < 0:
            # leaves the mesh: bisect an Euler step to end on the boundary
            lo, hi = 0.0, 1.0
            for _ in range(60):
                mid = 0.5 * (lo + hi)
                for d in range(3):
                    xs[d] = x[d] + mid * dt * v[d]
                if _locate(points, cells, grads, nb, xs, e, False) >= 0:
                    lo = mid
                else:
                    hi = mid
            for d in range(3):
                x[d] += lo * dt * v[d]
            t += lo * dt
            out_x[:, n] = x
            out_t[n] = t
            return n + 1, _BOUNDARY, crossed
        x[:] = xs
        t += dt
        out_x[:, n] = x
        out_t[n] = t
        n += 1
        if t >= max_time:
            return n, _MAX_TIME, crossed
        if en != e:
            crossed += 1
        came_from, e, idle = -1, en, 0
    return n, _MAX_STEPS, crossed


class Tracker:
    """Track particles through a tetrahedral mesh with a velocity per cell.

    Parameters
    ----------
    points, cells
        Mesh nodes [m] ``(3, n)`` and tetrahedra ``(4, m)``.
    velocity
        Seepage velocity per cell [m/s], shape ``(3, m)``.
    """

    def __init__(self, points: FloatArray, cells: IndexArray, velocity: FloatArray) -> None:
        self.points = np.ascontiguousarray(points, dtype=float)
        self.cells = np.ascontiguousarray(cells, dtype=np.int64)
        self.velocity = np.ascontiguousarray(velocity, dtype=float)
        self.grads, vol = p1_gradients(self.points, self.cells)
        self.neighbour = cell_neighbours(self.cells, self.points.shape[1])
        self._nodal = _nodal_velocity(self.cells, vol, self.velocity, self.points.shape[1])
        self._last = 0  # where the next walk of locate starts

    def locate(self, x: FloatArray) -> int:
        """Index of the cell containing point x [m] (barycentric tolerance 1e-9), or −1
        outside the mesh."""
        e = int(_locate(self.points, self.cells, self.grads, self.neighbour,
                        np.asarray(x, dtype=float), self._last, True))
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
            return Pathline(x[:, None], np.zeros(1), "boundary")
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
        n, end, crossed = _track(self.points, self.cells, self.grads, self.neighbour,
                                 self.velocity, self._nodal, capture, x, e,
                                 -1.0 if backward else 1.0, float(max_time),
                                 float(step_fraction), out_x, out_t)
        return Pathline(out_x[:, :n].copy(), out_t[:n].copy(), _ENDS[end], int(crossed))


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
    return Pathline(path.points[:, keep], path.times[keep], path.end, path.cells_crossed)
