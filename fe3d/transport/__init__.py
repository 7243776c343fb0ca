"""Solute transport: SUPG finite elements, linear sorption, first-order decay, mass budgets."""
