"""Outputs: VTK files, CSV tables, figures and the run report. Never recomputes physics."""
