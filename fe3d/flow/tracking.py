"""Advective particle tracking (theory.md F8).

The P1 seepage velocity v = q/θ is constant per cell and its normal component jumps across
faces, so exact cell-by-cell tracking stalls where neighbouring velocities converge (around
wells, for example). fe3d therefore averages v to the nodes (volume-weighted), interpolates
it linearly inside each cell, and integrates dx/dt = ±v(x) by fourth-order Runge–Kutta with
steps of a fraction of the local cell height. A uniform field is reproduced exactly, so the
travel time in uniform flow equals distance × θ / |q| to round-off.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from fe3d._typing import FloatArray, IndexArray
from fe3d.mesh.geometry import lump_to_nodes, p1_gradients
from fe3d.mesh.locate import CellFinder

__all__ = ["Pathline", "Tracker"]


@dataclass(frozen=True)
class Pathline:
    """Positions [m] ``(3, k)`` and times [s] ``(k,)`` of one particle, and why it stopped."""

    points: FloatArray
    times: FloatArray
    end: str  # "boundary", "stagnant", "captured", "max_time", "max_steps"


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
        self.points = points
        self.cells = cells
        self.velocity = velocity
        self.grads, vol = p1_gradients(points, cells)
        # neighbour across the face opposite each local vertex (-1 on the boundary)
        m = cells.shape[1]
        faces = np.sort(np.stack([np.delete(cells, k, axis=0) for k in range(4)], axis=1),
                        axis=0)  # (3, 4, m)
        flat = faces.reshape(3, -1)
        _, inv = np.unique(flat, axis=1, return_inverse=True)
        inv = inv.ravel()
        order = np.argsort(inv, kind="stable")
        keys = inv[order]
        same = keys[1:] == keys[:-1]
        a, b = order[:-1][same], order[1:][same]
        # flat index of (local face k, cell e) is k * m + e
        nb = np.full(4 * m, -1, dtype=np.int64)
        nb[a], nb[b] = b % m, a % m
        self.neighbour = nb.reshape(4, m)
        self._size = 1.0 / np.sqrt((self.grads**2).sum(axis=2)).max(axis=1)  # min height [m]
        n = points.shape[1]
        self._nodal = (lump_to_nodes(cells, vol, velocity, n)
                       / lump_to_nodes(cells, vol, np.ones(m), n))  # volume-weighted mean
        self._finder: CellFinder | None = None

    def _barycentric(self, e: int, x: FloatArray) -> FloatArray:
        x0 = self.points[:, self.cells[0, e]]
        lam = self.grads[e] @ (x - x0)
        lam[0] = 1.0 - lam[1:].sum()
        return lam

    def locate(self, x: FloatArray, *, hint: tuple[int, ...] = ()) -> int:
        """Index of the cell containing point x [m], or -1 outside the mesh: the cells in
        ``hint`` first, then the mesh's :class:`~fe3d.mesh.locate.CellFinder`."""
        for e in hint:
            if e >= 0 and np.all(self._barycentric(e, x) >= -1e-9):
                return e
        if self._finder is None:
            self._finder = CellFinder(self.points, self.cells)
        return int(self._finder.find(np.reshape(x, (3, 1)))[0][0])

    def velocity_at(self, x: FloatArray, e: int) -> FloatArray:
        """P1 interpolation of the node-averaged velocity at x in cell e [m/s]."""
        lam = self._barycentric(e, x)
        return self._nodal[:, self.cells[:, e]] @ lam

    def _find(self, x: FloatArray, e: int) -> int:
        return self.locate(x, hint=(e, *[int(n) for n in self.neighbour[:, e]]))

    def track(self, x0: FloatArray, *, backward: bool = False, max_time: float = np.inf,
              max_steps: int = 5_000, capture_cells: set[int] | None = None,
              step_fraction: float = 0.2) -> Pathline:
        """Follow a particle from x0 forward (or backward) in time.

        Classical fourth-order Runge–Kutta on the node-averaged velocity (continuous, so
        particles never stall on faces where neighbouring cell velocities converge), with a
        step of ``step_fraction`` × the cell's length along the flow. It stops on leaving the
        mesh (the last step shortened by bisection to end on the boundary), in a capture cell,
        when the speed vanishes, or at ``max_time`` [s]. Uniform flow is followed exactly.
        """
        x = np.asarray(x0, dtype=float).copy()
        e = self.locate(x)
        pts, times = [x.copy()], [0.0]

        def done(why: str) -> Pathline:
            return Pathline(np.array(pts).T, np.array(times), why)

        if e < 0:
            return done("boundary")
        sign = -1.0 if backward else 1.0
        t = 0.0
        for _ in range(max_steps):
            if capture_cells is not None and e in capture_cells:
                return done("captured")
            v1 = sign * self.velocity_at(x, e)
            speed = float(np.linalg.norm(v1))
            if speed <= 1e-30:
                return done("stagnant")
            # step a fraction of the cell's length along the flow, 2|v| / Σ|∇φ_i·v| (flat
            # layer cells are long horizontally and thin vertically)
            along = 2.0 * speed / float(np.abs(self.grads[e] @ v1).sum())
            dt = step_fraction * along / speed
            if t + dt > max_time:
                dt = max_time - t
            stages = []
            ok = True
            for c, k_prev in ((0.0, None), (0.5, 0), (0.5, 1), (1.0, 2)):
                xs = x if k_prev is None else x + c * dt * stages[k_prev]
                es = e if k_prev is None else self._find(xs, e)
                if es < 0:
                    ok = False
                    break
                stages.append(v1 if k_prev is None else sign * self.velocity_at(xs, es))
            if ok:
                x_new = x + dt / 6.0 * (stages[0] + 2 * stages[1] + 2 * stages[2] + stages[3])
                e_new = self._find(x_new, e)
            if not ok or e_new < 0:
                # leave through the boundary: bisect an Euler step to end on it
                lo, hi = 0.0, 1.0
                for _ in range(60):
                    mid = 0.5 * (lo + hi)
                    if self._find(x + mid * dt * v1, e) >= 0:
                        lo = mid
                    else:
                        hi = mid
                x = x + lo * dt * v1
                t += lo * dt
                pts.append(x.copy())
                times.append(t)
                return done("boundary")
            x, e = x_new, e_new
            t += dt
            pts.append(x.copy())
            times.append(t)
            if t >= max_time:
                return done("max_time")
        return done("max_steps")
