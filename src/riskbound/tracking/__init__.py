"""Obstacle tracking: Kalman filters per track, gated association, track lifecycle and forecasts."""
