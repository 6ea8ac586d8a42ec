"""Benchmark baselines on the MPC's robot models, cost and forecasts: mixed-integer, linearised, robust inflation."""
