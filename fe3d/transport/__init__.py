"""Solute transport of several species on the steady flow field: advection, dispersion,
linear and nonlinear sorption, first-order, second-order, Monod and user-law reactions,
decay chains; a bounded flux-corrected scheme by default (SUPG as an option), steps that
follow the plume's Courant number, mass budgets. ``run_transport`` (run.py) is the entry
point; theory.md lists the parts."""
