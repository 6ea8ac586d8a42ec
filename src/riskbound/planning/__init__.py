"""Chance-constrained MPC: build once, solve each control cycle."""
