"""Steady confined Darcy flow on the site mesh."""

from fe3d.flow.solve import FlowField, solve_flow

__all__ = ["FlowField", "solve_flow"]
