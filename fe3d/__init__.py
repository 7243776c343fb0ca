"""fe3d: screening-level 3D flow and contaminant transport in layered aquifers.

The stages flow one way: case → mesh → flow → transport → post. Each is a plain function
over frozen records; :func:`fe3d.pipeline.run_case` composes them. Heavy libraries (gmsh,
scikit-fem, VTK) are imported lazily so that ``import fe3d`` and case validation stay fast.
"""

from __future__ import annotations

from typing import Any

__version__ = "0.1.0"

__all__ = ["__version__", "build_mesh", "load_case", "run_case", "run_transport", "solve_flow"]

_LAZY = {
    "load_case": "fe3d.case.load",
    "build_mesh": "fe3d.mesh.build",
    "solve_flow": "fe3d.flow.solve",
    "run_transport": "fe3d.transport.run",
    "run_case": "fe3d.pipeline",
}


def __getattr__(name: str) -> Any:
    """Resolve the public stage functions lazily (PEP 562)."""
    if name in _LAZY:
        import importlib

        return getattr(importlib.import_module(_LAZY[name]), name)
    msg = f"module 'fe3d' has no attribute {name!r}"
    raise AttributeError(msg)
