"""Pointwise sorption isotherms, rate laws and decay networks (pure numpy; no mesh).

These are building blocks for the transport loop (theory.md, section "Reactions and
sorption", R1–R9). Every law returns its value and its exact derivative so that a Newton
solver can use the full Jacobian.
"""
