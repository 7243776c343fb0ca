"""The whole ``fe3d run`` against a straightforward scikit-fem script (issue 16's first
benchmark), measured side by side in one invocation.

The site is the invented Harrow Flats test box of the other benchmarks (400 m × 200 m, sand
over silt, fixed heads west and east) with one fixed-concentration source box, two
observation points down the flow and a linear species (Kd sorption, first-order decay),
100 steps of fixed length. In one process, one after the other:

1. ``fe3d.pipeline.run_case`` as ``fe3d run`` runs it (default settings but what the case
   sets; mesh refined along the plume corridor, flow, travel paths, transport, output files,
   figures and report), wall and CPU time per stage read from its progress callback, the
   output times written during the transport timed by wrapping ``SeriesWriter.add``, and
   the flow's figures (drawn on their own thread beside the transport) timed
   from the run's log line;
2. the run's own mesh, read back from the ``mesh.npz`` it wrote (two processes meshing the
   quick case here gave 42,560 and 42,581 nodes), its steady flow solved again, and on them
   fe3d's travel paths alone and fe3d's transport alone (``run_transport``, no writer) with
   the default bounded scheme and with the SUPG option (``solver.monotone = false``,
   backward Euler), so the stages can be split from the output work the run interleaves
   with them;
3. the straightforward script (:func:`script_transport`): what a competent modeller writes
   with scikit-fem and scipy on that mesh and flow, timed from the first form assembled to
   the last step solved, no outputs;
4. the whole ``fe3d run`` again with the script's own scheme (the SUPG option, backward
   Euler): the same equations as the script, every output file, figure and the report.

The script's answers are checked against fe3d's SUPG run (the same equations, theory.md
T0-T8): at the observation points over every step and over every node at the end.

Usage: ``python benchmarks/script_vs_run.py [--quick | --size h,dz]`` (``--quick``: plan
cell 6 m, layer cell 2 m, about 43 k nodes; default about 223 k nodes; the run folder goes
in ``$SCRIPT_VS_RUN_TMP`` when set). Prints one JSON line and a Markdown table;
docs/performance.md quotes the table by hand.
"""

from __future__ import annotations

import json
import logging
import math
import os
import re
import resource
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from skfem import (
    Basis,
    BilinearForm,
    ElementTetP1,
    FacetBasis,
    MeshTet,
    asm,
    condense,
)
from skfem.helpers import dot, grad

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "benchmarks"))

from run import C0, DAY, SOURCE_BOX, site_case  # noqa: E402
from step_cost import _Counts  # noqa: E402

from fe3d.case.builder import ObservationPoint, Source, with_changes  # noqa: E402
from fe3d.case.parts import FlowInputs, TransportInputs, TravelInputs  # noqa: E402
from fe3d.flow.paths import travel_paths  # noqa: E402
from fe3d.flow.solve import solve_flow  # noqa: E402
from fe3d.mesh.io import load_cached  # noqa: E402
from fe3d.pipeline import run_case  # noqa: E402
from fe3d.post.outputs import SeriesWriter  # noqa: E402
from fe3d.transport.run import run_transport  # noqa: E402

STEPS = 100
SIZES = {"223k": (2.6, 0.8), "quick": (6.0, 2.0)}
"""(plan cell, layer cell thickness) [m]."""
STEP_DAYS = {"223k": 40.0, "quick": 60.0}
"""Step length [d] per size: a largest cell Courant number of a few (reported)."""
SCRATCH = os.environ.get("SCRIPT_VS_RUN_TMP")
"""Folder for the run folder (default: the system's temporary folder)."""
OBSERVATION = (("MW-A", 110.0, 100.0, 7.5), ("MW-B", 180.0, 100.0, 7.0))
"""Observation points (name, x, y, z [m]) down the flow from the source box."""


def benchmark_case(h: float, dz: float, step_days: float) -> Any:
    """The Harrow Flats box with one source, two observation points and ``STEPS`` steps."""
    (x0, x1), (y0, y1), (z0, z1) = SOURCE_BOX
    return with_changes(
        site_case(h, dz),
        sources=[Source("spill", species="solvent", shape="box", x=(x0, x1), y=(y0, y1),
                        z=(z0, z1), concentration=f"{C0} kg/m^3")],
        observation_points=[ObservationPoint(n, x=x, y=y, z=z) for n, x, y, z in OBSERVATION],
        time={"end": f"{STEPS * step_days} d", "step": f"{step_days} d"})


# ---------------------------------------------------------------- the straightforward script
# Written as a modeller would: scikit-fem forms, per-cell coefficients, backward Euler with
# SUPG, fixed-concentration nodes by condensation, BiCGSTAB with a diagonal (Jacobi)
# preconditioner started from the last step. Measured on this problem's 223 k-node step
# matrix (step 30, tolerance 1e-10, CPU): Jacobi 21 iterations, 0.18 s per solve; no
# preconditioner 44, 0.35 s; scipy's ILU (drop tolerance 1e-2 / 1e-3 / 1e-4) 10 / 8 / 7
# iterations but 0.60 / 0.87 / 0.97 s per solve and 8 / 15 / 20 s to build; GMRES with the
# same ILUs no faster; one sparse LU (SuperLU) of the 42 k-node matrix already took 2.8 s and
# 48 times the matrix's entries, 32 ms per solve. A modeller who times the options picks Jacobi.

@BilinearForm
def storage(u, v, w):
    return w.m * u * v


@BilinearForm
def advection(u, v, w):
    return -u * dot(w.q, grad(v))


@BilinearForm
def dispersion(u, v, w):
    return dot(np.einsum("ij...,j...->i...", w.thetaD, grad(u)), grad(v))


@BilinearForm
def decay(u, v, w):
    return w.k * u * v


@BilinearForm
def supg_storage(u, v, w):
    return w.tau * dot(w.a, grad(v)) * w.m * u


@BilinearForm
def supg_transport(u, v, w):
    return w.tau * dot(w.a, grad(v)) * (dot(w.q, grad(u)) + w.k * u)


@BilinearForm
def outflow(u, v, w):
    return np.maximum(dot(w.q, w.n), 0.0) * u * v


@dataclass(frozen=True)
class ScriptResult:
    """What the script computed and what it cost."""

    history: np.ndarray  # (STEPS, n_points) [kg/m³]
    final: np.ndarray  # (n_nodes,) [kg/m³]
    assembly_s: float
    assembly_cpu_s: float
    wall_s: float
    cpu_s: float
    iterations: list[int]
    largest_courant: float
    held_nodes: int


def cell_coefficients(case: Any, site: Any, flow: Any, grads: np.ndarray, dt: float
                      ) -> dict[str, np.ndarray]:
    """m, k, q, a, θD, τ and the Courant number per cell (theory.md T0, T4, T7, T8), from
    the case's materials and species and the flow's Darcy flux and porosity."""
    species = case.species["solvent"]
    materials = [case.materials[layer.material] for layer in case.layers]

    def per_cell(value: Any) -> np.ndarray:
        return np.array([value(mt) for mt in materials])[site.cell_layer]

    theta, q = flow.porosity, flow.darcy_flux
    m = theta + per_cell(lambda mt: mt.bulk_density) * species.kd
    k = np.log(2.0) / species.half_life * m
    D = dispersion_tensor(q / theta, per_cell(lambda mt: mt.longitudinal_dispersivity),
                          per_cell(lambda mt: mt.transverse_dispersivity),
                          per_cell(lambda mt: mt.alpha_vertical))
    D += np.eye(3)[:, :, None] * per_cell(lambda mt: mt.effective_diffusion)
    a = q / m
    speed = np.linalg.norm(a, axis=0)
    sweep = np.abs(np.einsum("ij,kij->kj", a, grads)).sum(axis=0)
    h = np.where(sweep > 0, 2 * speed / np.where(sweep > 0, sweep, 1.0),
                 2 / np.linalg.norm(grads, axis=1).max(axis=0))
    unit = np.divide(a, speed, out=np.zeros_like(a), where=speed > 0)
    kappa = np.einsum("ik,ijk,jk->k", unit, D, unit) * theta / m
    tau = ((2 / dt) ** 2 + (2 * speed / h) ** 2 + 9 * (4 * kappa / h**2) ** 2
           + (k / m) ** 2) ** -0.5
    return {"m": m, "k": k, "q": q, "a": a, "thetaD": theta * D, "tau": tau,
            "courant": speed * dt / h}


def dispersion_tensor(v: np.ndarray, aL: np.ndarray, aTH: np.ndarray, aTV: np.ndarray,
                      ) -> np.ndarray:
    """Mechanical dispersion per cell, shape (3, 3, n_cells) [m²/s] (theory.md T4)."""
    speed = np.linalg.norm(v, axis=0)
    vx, vy, vz = v
    D = np.empty((3, 3, v.shape[1]))
    D[0, 0] = aL * vx**2 + aTH * vy**2 + aTV * vz**2
    D[1, 1] = aTH * vx**2 + aL * vy**2 + aTV * vz**2
    D[2, 2] = aTV * (vx**2 + vy**2) + aL * vz**2
    D[0, 1] = D[1, 0] = (aL - aTH) * vx * vy
    D[0, 2] = D[2, 0] = (aL - aTV) * vx * vz
    D[1, 2] = D[2, 1] = (aL - aTV) * vy * vz
    return D / np.where(speed > 0, speed, 1.0)


def at_points(values: np.ndarray, nqp: int) -> np.ndarray:
    """A per-cell array repeated at the cell's quadrature points (last axis)."""
    return np.broadcast_to(values[..., None], (*values.shape, nqp))


def held_source_nodes(points: np.ndarray) -> np.ndarray:
    """Nodes inside the source box, bounds included (1 mm slack for round-off)."""
    inside = np.ones(points.shape[1], dtype=bool)
    for axis, (lo, hi) in enumerate(SOURCE_BOX):
        inside &= (points[axis] >= lo - 1e-3) & (points[axis] <= hi + 1e-3)
    return np.nonzero(inside)[0]


def script_transport(case: Any, site: Any, flow: Any, dt: float) -> ScriptResult:
    """Backward Euler with SUPG for ``STEPS`` steps of ``dt`` [s]; the step matrix is the
    same at every step (assembled once), and BiCGSTAB starts from the last step."""
    wall, cpu = time.perf_counter(), time.process_time()
    mesh = MeshTet(site.points, site.cells)
    basis = Basis(mesh, ElementTetP1())
    nqp = basis.X.shape[1]
    grads = np.array([basis.basis[i][0].grad[:, :, 0] for i in range(4)])
    c = cell_coefficients(case, site, flow, grads, dt)
    w = {name: at_points(c[name], nqp) for name in ("m", "k", "q", "a", "thetaD", "tau")}
    M = asm(storage, basis, m=w["m"]) + asm(supg_storage, basis, tau=w["tau"], a=w["a"],
                                             m=w["m"])
    K = (asm(advection, basis, q=w["q"]) + asm(dispersion, basis, thetaD=w["thetaD"])
         + asm(decay, basis, k=w["k"])
         + asm(supg_transport, basis, tau=w["tau"], a=w["a"], q=w["q"], k=w["k"]))
    ends = mesh.facets_satisfying(lambda x: np.isclose(x[0], 0.0) | np.isclose(x[0], 400.0),
                                  boundaries_only=True)
    fb = FacetBasis(mesh, ElementTetP1(), facets=ends)
    K = K + asm(outflow, fb, q=at_points(flow.darcy_flux[:, fb.tind], fb.X.shape[1]))
    A = (M / dt + K).tocsr()
    held = held_source_nodes(site.points)
    c_now = np.zeros(mesh.p.shape[1])
    c_now[held] = C0
    A_free, _, _, free = condense(A, sp.csr_matrix(M.shape), x=c_now, D=held)
    lift = A[free][:, held] @ c_now[held]
    assembled, assembled_cpu = time.perf_counter(), time.process_time()
    diagonal = A_free.diagonal()
    precond = spla.LinearOperator(A_free.shape, lambda r: r / diagonal)
    probe = basis.probes(np.array([[x, y, z] for _, x, y, z in OBSERVATION]).T)
    history, iterations, calls = [], [], [0]

    def counted(_x: np.ndarray) -> None:
        calls[0] += 1

    c_old = c_now.copy()
    for _ in range(STEPS):
        b = (M @ c_old)[free] / dt - lift
        before = calls[0]
        x, info = spla.bicgstab(A_free, b, x0=c_old[free], rtol=case.solver.tolerance,
                                atol=0.0, M=precond, callback=counted)
        if info != 0:
            msg = f"BiCGSTAB did not converge (info {info})"
            raise RuntimeError(msg)
        c_old = c_now.copy()
        c_old[free] = x
        history.append(probe @ c_old)
        iterations.append(calls[0] - before)
    return ScriptResult(history=np.array(history), final=c_old,
                        assembly_s=assembled - wall, assembly_cpu_s=assembled_cpu - cpu,
                        wall_s=time.perf_counter() - wall, cpu_s=time.process_time() - cpu,
                        iterations=iterations, largest_courant=float(c["courant"].max()),
                        held_nodes=int(held.size))


# ----------------------------------------------------------------------------- fe3d's side

class StageTimes:
    """Wall and CPU time [s] of each stage the run reports through its progress callback
    (from a stage's first report to the next stage's, as fe3d.pipeline.StageClock)."""

    def __init__(self) -> None:
        self.marks: list[tuple[str, float, float]] = []

    def tell(self, stage: str, _done: float, _total: float) -> None:
        if not self.marks or self.marks[-1][0] != stage:
            self.marks.append((stage, time.perf_counter(), time.process_time()))

    def spent(self) -> dict[str, tuple[float, float]]:
        """Stage → (wall, CPU) [s]; call once the run has returned."""
        ends = [*self.marks[1:], ("", time.perf_counter(), time.process_time())]
        out: dict[str, tuple[float, float]] = {}
        for (stage, wall, cpu), (_, wall_end, cpu_end) in zip(self.marks, ends, strict=True):
            before = out.get(stage, (0.0, 0.0))
            out[stage] = (before[0] + wall_end - wall, before[1] + cpu_end - cpu)
        return out


class TimedWrites:
    """Wall and CPU time [s] of the output times written during the transport
    (``SeriesWriter.add``: the series file, plume surfaces, tables), wrapped in this
    benchmark process only."""

    def __init__(self) -> None:
        self.wall = self.cpu = 0.0
        self.calls = 0

    def __enter__(self) -> TimedWrites:
        self._add = SeriesWriter.add

        def add(writer: Any, snap: Any) -> None:
            wall, cpu = time.perf_counter(), time.process_time()
            self._add(writer, snap)
            self.wall += time.perf_counter() - wall
            self.cpu += time.process_time() - cpu
            self.calls += 1

        SeriesWriter.add = add  # type: ignore[method-assign]
        return self

    def __exit__(self, *_exc: object) -> None:
        SeriesWriter.add = self._add  # type: ignore[method-assign]


BESIDE = re.compile(r"flow figures written beside the transport in ([\d.]+) s "
                    r"\(([\d.]+) s CPU\)")
"""The run log's note of the flow's figures, drawn on their own thread."""


def whole_run(case: Any) -> tuple[dict[str, Any], Any]:
    """``run_case`` in a fresh folder: wall and CPU time of the run and of each stage, of
    the output times written during the transport and of the flow outputs written beside
    it (from the run's log), and the run's own mesh, read back from the mesh cache it wrote
    (``mesh.npz``)."""
    stages = StageTimes()
    with tempfile.TemporaryDirectory(prefix="script_vs_run_", dir=SCRATCH) as folder:
        run_dir = Path(folder) / "run"
        with TimedWrites() as writes:
            wall, cpu = time.perf_counter(), time.process_time()
            run_case(case, run_dir, progress=stages.tell)
            wall, cpu = time.perf_counter() - wall, time.process_time() - cpu
        stage_times = stages.spent()
        written = sum(f.stat().st_size for f in run_dir.rglob("*") if f.is_file())
        digest = json.loads((run_dir / "mesh.json").read_text())["mesh_inputs_sha256"]
        site = load_cached(run_dir, digest)
        beside = BESIDE.search((run_dir / "solver.log").read_text(encoding="utf-8"))
    return {"wall_s": wall, "cpu_s": cpu, "stages": stage_times,
            "written_mib": written / 2**20, "peak_rss_mib": _peak_rss_mib(),
            "series_writes": {"wall_s": writes.wall, "cpu_s": writes.cpu,
                              "calls": writes.calls},
            "flow_figures_beside": {"wall_s": float(beside[1]) if beside else math.nan,
                                    "cpu_s": float(beside[2]) if beside else math.nan}}, site


def _peak_rss_mib() -> float:
    """Peak resident memory of this process so far [MiB] (Linux reports KiB)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def fe3d_transport(case: Any, site: Any, flow: Any) -> dict[str, Any]:
    """fe3d's transport alone (no writer): wall and CPU, Krylov iterations per step (step
    solve + target solve, from the step's debug record), observation histories, final
    field."""
    counts = _Counts()
    step_log = logging.getLogger("fe3d.transport.step")
    step_log.addHandler(counts)
    level = step_log.level
    step_log.setLevel(logging.DEBUG)
    try:
        wall, cpu = time.perf_counter(), time.process_time()
        snaps = list(run_transport(site, flow, TransportInputs.of(case)))
        wall, cpu = time.perf_counter() - wall, time.process_time() - cpu
    finally:
        step_log.removeHandler(counts)
        step_log.setLevel(level)
    last = snaps[-1]
    its = [int(r["step_iterations"] + r["target_iterations"]) for r in counts.records]
    return {"wall_s": wall, "cpu_s": cpu, "krylov_iterations": its,
            "history": last.history["solvent"], "final": last.concentration["solvent"]}


def _travel_paths_alone(case: Any, site: Any, flow: Any) -> dict[str, float]:
    wall, cpu = time.perf_counter(), time.process_time()
    travel_paths(site, flow, TravelInputs.of(case))
    return {"wall_s": time.perf_counter() - wall, "cpu_s": time.process_time() - cpu}


def _match(script: ScriptResult, other: dict[str, Any]) -> dict[str, float]:
    """Largest differences over C0: at the observation points over every step, and over
    every node at the end; and the observation values at the end [mg/L]."""
    history = other["history"][-STEPS:, : len(OBSERVATION)]
    return {"points_over_c0": float(np.abs(script.history - history).max() / C0),
            "nodes_over_c0": float(np.abs(script.final - other["final"]).max() / C0),
            "points_end_mg_l": [1e3 * float(x) for x in history[-1]]}


def measure(h: float, dz: float, step_days: float) -> dict[str, Any]:
    """Both sides on one mesh, one after the other in this process."""
    case = benchmark_case(h, dz, step_days)
    supg = with_changes(case, solver={"supg": True, "monotone": False,
                                      "flux_limiting": False},
                        time={"scheme": "backward_euler"})
    load = [os.getloadavg()[0]]
    run, site = whole_run(case)
    load.append(os.getloadavg()[0])
    flow = solve_flow(site, FlowInputs.of(case))
    paths = _travel_paths_alone(case, site, flow)
    bounded = fe3d_transport(case, site, flow)
    fe3d_supg = fe3d_transport(supg, site, flow)
    load.append(os.getloadavg()[0])
    script = script_transport(case, site, flow, step_days * DAY)
    load.append(os.getloadavg()[0])
    run_supg, site_supg = whole_run(supg)
    return {
        "nodes": site.n_nodes, "cells": site.n_cells,
        "steps": STEPS, "step_d": step_days, "largest_courant": script.largest_courant,
        "held_nodes": script.held_nodes, "run": run, "travel_paths_alone": paths,
        "run_supg": {k: run_supg[k] for k in ("wall_s", "cpu_s", "stages")},
        "run_supg_nodes": site_supg.n_nodes,
        "transport_alone": {k: bounded[k] for k in ("wall_s", "cpu_s", "krylov_iterations")},
        "supg_transport_alone": {k: fe3d_supg[k] for k in ("wall_s", "cpu_s",
                                                          "krylov_iterations")},
        "script": {"wall_s": script.wall_s, "cpu_s": script.cpu_s,
                   "assembly_s": script.assembly_s, "assembly_cpu_s": script.assembly_cpu_s,
                   "bicgstab_iterations": script.iterations},
        "script_points_end_mg_l": [1e3 * float(x) for x in script.history[-1]],
        "match_supg": _match(script, fe3d_supg), "match_bounded": _match(script, bounded),
        "tolerance": case.solver.tolerance, "load_average": load}


STAGES = ("mesh", "flow", "travel paths", "flow outputs", "transport", "outputs")
"""The stages ``run_case`` reports, in order."""


def table(r: dict[str, Any]) -> list[str]:
    """Markdown table: the run by stage, fe3d's parts alone, the script, ratios, match."""
    run, st, script = r["run"], r["run"]["stages"], r["script"]
    alone, paths = r["transport_alone"], r["travel_paths_alone"]
    outputs = run["wall_s"] - sum(st[k][0] for k in ("mesh", "flow")) - paths["wall_s"] \
        - alone["wall_s"]
    outputs_cpu = run["cpu_s"] - sum(st[k][1] for k in ("mesh", "flow")) - paths["cpu_s"] \
        - alone["cpu_s"]
    writes, beside = run["series_writes"], run["flow_figures_beside"]
    on_path = [sum(x) for x in zip(st["flow outputs"], (writes["wall_s"], writes["cpu_s"]),
                                   st["outputs"], strict=True)]
    its = np.array(script["bicgstab_iterations"])
    rows = [f"| run stage '{k}' (progress callback) | {st[k][0]:.1f} | {st[k][1]:.1f} |"
            for k in STAGES if k in st]
    rows += [
        f"| flow figures, drawn on their own thread beside the transport (run log) | "
        f"{beside['wall_s']:.1f} | {beside['cpu_s']:.1f} |",
        f"| output times written during the transport ({writes['calls']} calls of "
        f"SeriesWriter.add) | {writes['wall_s']:.1f} | {writes['cpu_s']:.1f} |",
        f"| outputs on the run's path, measured: stages 'flow outputs' and 'outputs' + the "
        f"output times | {on_path[0]:.1f} | {on_path[1]:.1f} |",
        f"| **whole `fe3d run`** | **{run['wall_s']:.1f}** | **{run['cpu_s']:.1f}** |",
        f"| fe3d travel paths alone | {paths['wall_s']:.1f} | {paths['cpu_s']:.1f} |",
        f"| fe3d transport alone (default bounded scheme) | {alone['wall_s']:.1f} | "
        f"{alone['cpu_s']:.1f} |",
        f"| fe3d transport alone (SUPG, backward Euler) | "
        f"{r['supg_transport_alone']['wall_s']:.1f} | {r['supg_transport_alone']['cpu_s']:.1f} |",
        f"| output files, figures, report (run − mesh − flow − paths alone − transport alone) "
        f"| {outputs:.1f} | {outputs_cpu:.1f} |",
        f"| script: assembly (7 forms, condensation) | {script['assembly_s']:.1f} | "
        f"{script['assembly_cpu_s']:.1f} |",
        f"| script: {r['steps']} steps | {script['wall_s'] - script['assembly_s']:.1f} | "
        f"{script['cpu_s'] - script['assembly_cpu_s']:.1f} |",
        f"| **script, transport only (assembly + {r['steps']} steps)** | "
        f"**{script['wall_s']:.1f}** | **{script['cpu_s']:.1f}** |"]
    supg_run = r["run_supg"]
    rows.append(f"| whole `fe3d run` with the script's scheme (SUPG, backward Euler; "
                f"{r['run_supg_nodes']:,} nodes), run after the script | "
                f"{supg_run['wall_s']:.1f} | {supg_run['cpu_s']:.1f} |")
    ratio = [("whole run / script transport (target ≤ 0.33)", run["wall_s"] / script["wall_s"],
              run["cpu_s"] / script["cpu_s"]),
             ("whole run with the script's scheme / script transport",
              supg_run["wall_s"] / script["wall_s"], supg_run["cpu_s"] / script["cpu_s"]),
             ("travel paths alone / transport alone (target ≤ 0.10)",
              paths["wall_s"] / alone["wall_s"], paths["cpu_s"] / alone["cpu_s"]),
             ("outputs / transport alone (target ≤ 0.15), outputs as run − the parts alone",
              outputs / alone["wall_s"], outputs_cpu / alone["cpu_s"]),
             ("outputs / transport alone, outputs on the run's path as measured (CPU: and "
              "the flow figures' thread)", on_path[0] / alone["wall_s"],
              (on_path[1] + beside["cpu_s"]) / alone["cpu_s"])]
    ms, mb = r["match_supg"], r["match_bounded"]
    return [
        f"{r['nodes']:,} nodes, {r['cells']:,} cells, {r['steps']} steps of {r['step_d']:g} d "
        f"(largest cell Courant number {r['largest_courant']:.1f}), {r['held_nodes']} held "
        f"source nodes, run folder {run['written_mib']:.0f} MiB; load average (1 min) "
        + " / ".join(f"{x:.1f}" for x in r["load_average"])
        + " (before the run / after it / after fe3d's parts alone / after the script); "
        f"peak resident memory after the run {run['peak_rss_mib']:.0f} MiB.", "",
        "| part | wall [s] | CPU [s] |", "|---|---|---|", *rows, "",
        "| ratio | wall | CPU |", "|---|---|---|",
        *[f"| {name} | {w:.2f} | {c:.2f} |" for name, w, c in ratio], "",
        f"Script: BiCGSTAB iterations per step {its.min()}–{its.max()} (median "
        f"{np.median(its):.0f}; each 2 SpMV and 2 diagonal scalings), relative tolerance "
        f"{r['tolerance']:g} (the case's solver.tolerance). fe3d alone, Krylov iterations "
        f"per step (step + target solve; each 2 products with the preconditioned operator), "
        f"median: default {np.median(alone['krylov_iterations']):.0f}, SUPG "
        f"{np.median(r['supg_transport_alone']['krylov_iterations']):.0f}.",
        f"Match, largest |difference| / C0: script vs fe3d SUPG {ms['points_over_c0']:.1e} at "
        f"the observation points over every step, {ms['nodes_over_c0']:.1e} over every node "
        f"at the end; script vs fe3d default (bounded) {mb['points_over_c0']:.1e} and "
        f"{mb['nodes_over_c0']:.1e}. At the end, MW-A / MW-B: script "
        + " / ".join(f"{x:.2f}" for x in r["script_points_end_mg_l"]) + " mg/L, fe3d SUPG "
        + " / ".join(f"{x:.2f}" for x in ms["points_end_mg_l"]) + " mg/L, fe3d default "
        + " / ".join(f"{x:.2f}" for x in mb["points_end_mg_l"]) + " mg/L."]


def main() -> int:
    size = "quick" if "--quick" in sys.argv else "223k"
    h, dz = SIZES[size]
    if "--size" in sys.argv:
        h, dz = (float(x) for x in sys.argv[sys.argv.index("--size") + 1].split(","))
    result = measure(h, dz, STEP_DAYS[size])
    print(json.dumps(result), flush=True)
    print("\n".join(table(result)))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
