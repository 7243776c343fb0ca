"""Cost of a second-order (nonlinear) step against a linear one, through the engine itself
(issue 16 part 3): Newton iterations per step, Krylov iterations per Newton correction and
the step in SpMV equivalents.

The Harrow Flats test box of ``benchmarks/run.py`` (invented: 400 m × 200 m, sand over silt,
fixed heads west and east) with a 20 m × 20 m × 3 m source box held at 100 mg/L is meshed
and its flow solved once; then for each species law and Courant number (from the largest
cell rate |a|/h) the run's own step context is built and ``take_step`` marches ``STEPS``
steps from the source switching on, as ``run_transport`` would (budgets included, probes
and outputs not). Two species laws, both with Kd = 0.1 L/kg:

- ``linear``: first-order decay, half-life 20 d;
- ``second_order``: r = −k c², k = 0.5 m³/(kg d) (the concentration halves in 20 d at the
  source's 100 mg/L, as the linear one does).

Each step's processor time is divided by the processor time of one SpMV of a matrix on the
mesh's CSR pattern measured right beside it (the unit survives a shared, loaded machine).
Newton iterations come from the step result; Krylov iterations per correction from the step
module's log (``fe3d.transport.step``), or, for code that solves its corrections with
``fe3d.linalg.solve_with_preconditioner``, from that function's statistics.

Usage: ``python benchmarks/newton_bench.py [--quick] [--scheme supg|bounded]
[--label NAME] [--json FILE]``; ``--quick``: the ~19 k-node mesh only; ``--json``: append
each size's JSON line to FILE. Prints one JSON line per size and Markdown table rows;
docs/performance.md ("Newton steps") quotes them, before and after a change.
"""

from __future__ import annotations

import json
import logging
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "benchmarks"))

from run import C0, SOURCE_BOX, site_case  # noqa: E402

import fe3d.transport.step as step_module  # noqa: E402
from fe3d.case.builder import Source, with_changes  # noqa: E402
from fe3d.case.parts import TransportInputs  # noqa: E402
from fe3d.pipeline import mesh_and_flow  # noqa: E402
from fe3d.transport.run import next_state, step_context  # noqa: E402
from fe3d.transport.sources import initial_fields  # noqa: E402
from fe3d.transport.step import StepState, take_step  # noqa: E402
from fe3d.transport.timeschemes import step_coefficients  # noqa: E402

STEPS = 12
"""Steps timed per law and Courant number; medians of the second half are reported (the
solvers' start windows fill over the first steps)."""

LAWS = {
    "linear": {"half_life": "20 d"},
    "second_order": {"second_order_rate": "0.5 m^3/kg/d"},
}
"""Species options of each law (Kd = 0.1 L/kg for both)."""

SCHEMES = {
    "supg": ({"supg": True, "monotone": False, "flux_limiting": False}, "backward_euler"),
    "bounded": ({}, None),
}
"""Solver settings and time scheme (``None``: the case default) of each variant."""

SIZES = [(6.0, 2.0), (2.6, 0.8)]
"""(plan cell size, layer cell thickness) [m]: about 19 k and 223 k nodes."""


KRYLOV: list[int] = []
"""Krylov iterations of the Newton corrections of the step being measured."""


class _Corrections(logging.Handler):
    """Collects the Krylov iterations of every Newton correction from the step log."""

    def emit(self, record: logging.LogRecord) -> None:
        counts = getattr(record, "krylov_iterations", None)
        if counts is not None:
            KRYLOV.extend(int(k) for k in counts)


def _count_preconditioned_solves() -> None:
    """Code whose corrections go through ``solve_with_preconditioner``: count there."""
    original = getattr(step_module, "solve_with_preconditioner", None)
    if original is None or getattr(original, "counted", False):
        return

    def counted(*args: Any, **kwargs: Any) -> Any:
        stats: dict[str, float] = {}
        out = original(*args, **kwargs, stats=stats)
        KRYLOV.append(int(stats["iterations"]))
        return out

    counted.counted = True  # type: ignore[attr-defined]
    step_module.solve_with_preconditioner = counted  # type: ignore[attr-defined]


def _spmv_seconds(A: Any) -> float:
    """Processor time of one SpMV [s] (processor time, not wall time: on a machine shared
    with other work the wall time of a step drifts with the load)."""
    x = np.ones(A.shape[0])
    t = time.process_time()
    for _ in range(20):
        A @ x
    return (time.process_time() - t) / 20


def _march(site: Any, flow: Any, case: Any, dt: float, unit_matrix: Any) -> dict[str, Any]:
    """STEPS steps of one case; medians of the second half."""
    inputs = TransportInputs.of(case)
    ctx = step_context(site, flow, inputs, None)
    start = initial_fields(inputs, site, ctx.sources)
    state = StepState(fields={s.name: start[s.name] for s in ctx.species},
                      held_before={s.name: np.zeros(site.n_nodes, dtype=bool)
                                   for s in ctx.species}, older=None, last_budget={})
    costs, seconds, newton, krylov = [], [], [], []
    dt_prev = None
    for k in range(STEPS):
        formula = step_coefficients(case.time.scheme, dt, dt_prev)
        KRYLOV.clear()
        before = _spmv_seconds(unit_matrix)
        t = time.process_time()
        result = take_step(ctx, state, k * dt, (k + 1) * dt, dt, formula)
        spent = time.process_time() - t
        unit = 0.5 * (before + _spmv_seconds(unit_matrix))
        costs.append(spent / unit)
        seconds.append(spent)
        newton.append(result.newton_iterations if result.solver_kind == "newton" else 0)
        krylov.append(list(KRYLOV))
        state = next_state(result, site.n_nodes, restart=False)
        dt_prev = dt
    half = STEPS // 2
    late = [k for ks in krylov[half:] for k in ks]
    return {"dt_s": dt, "step_spmv": float(np.median(costs[half:])),
            "first_steps_spmv": float(np.median(costs[:half])),
            "step_s": float(np.median(seconds[half:])),
            "newton_per_step": float(np.mean(newton[half:])),
            "krylov_per_correction": float(np.mean(late)) if late else 0.0,
            "newton_iterations": newton, "krylov_iterations": krylov}


def measure(h: float, dz: float, scheme: str) -> dict[str, Any]:
    """Step costs of both laws at Courant 1 and 10 on one mesh."""
    (x0, x1), (y0, y1), (z0, z1) = SOURCE_BOX
    base = with_changes(site_case(h, dz), mesh={"corridor": False}, sources=[
        Source("spill", species="solvent", shape="box", x=(x0, x1), y=(y0, y1), z=(z0, z1),
               concentration=f"{C0} kg/m^3")])
    site, flow = mesh_and_flow(base)
    unit_matrix = site.pattern.matrix(np.ones(site.pattern.indices.size))
    step_log = logging.getLogger("fe3d.transport.step")
    if not any(isinstance(h, _Corrections) for h in step_log.handlers):
        step_log.addHandler(_Corrections())
    step_log.setLevel(logging.INFO)
    _count_preconditioned_solves()
    solver, time_scheme = SCHEMES[scheme]
    out: dict[str, Any] = {"nodes": site.n_nodes, "scheme": scheme, "variants": {}}
    for law, options in LAWS.items():
        species = {"solvent": {"half_life": None, **options}}
        for courant in (1.0, 10.0):
            probe = with_changes(base, time={"end": "1 d", "step": "1 d"}, species=species)
            rate = step_context(site, flow, TransportInputs.of(probe), None)
            dt = courant / max(s.courant_rate for s in rate.species)
            time_changes: dict[str, Any] = {"end": f"{dt * STEPS} s", "step": f"{dt} s"}
            if time_scheme is not None:
                time_changes["scheme"] = time_scheme
            case = with_changes(base, time=time_changes, solver=solver, species=species)
            out["variants"][f"{law} C{courant:g}"] = _march(site, flow, case, dt, unit_matrix)
    return out


def table(rows: list[dict[str, Any]], label: str) -> list[str]:
    """Markdown rows: per size and Courant number, the linear and the second-order step."""
    lines = []
    for r in rows:
        v = r["variants"]
        for c in ("1", "10"):
            lin, non = v[f"linear C{c}"], v[f"second_order C{c}"]
            lines.append(
                f"| {label} | {r['scheme']} | {r['nodes']:,} | {c} | {lin['step_spmv']:.0f} | "
                f"{non['step_spmv']:.0f} | {non['step_spmv'] / lin['step_spmv']:.2f} | "
                f"{non['newton_per_step']:.2f} | {non['krylov_per_correction']:.1f} | "
                f"{non['step_s']:.3f} |")
    return lines


HEADER = ["| code | scheme | nodes | Courant | linear step [SpMV] | second-order step [SpMV] | "
          "ratio | Newton its per step | Krylov its per correction | "
          "second-order step [processor s] |",
          "|---|---|---|---|---|---|---|---|---|---|"]


def _arg(name: str, default: str) -> str:
    return sys.argv[sys.argv.index(name) + 1] if name in sys.argv else default


def main() -> int:
    sizes = SIZES[:1] if "--quick" in sys.argv else SIZES
    scheme, label = _arg("--scheme", "supg"), _arg("--label", "now")
    rows = []
    for h, dz in sizes:
        rows.append({**measure(h, dz, scheme), "label": label})
        print(json.dumps(rows[-1]), flush=True)
        if "--json" in sys.argv:
            with Path(_arg("--json", "")).open("a", encoding="utf-8") as f:
                f.write(json.dumps(rows[-1]) + "\n")
    print("\n".join(HEADER + table(rows, label)))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
