"""Covariance propagation of the robot along a nominal trajectory (linearised model).

    P₀ = odometry covariance,   P_{k+1} = F_k P_k F_kᵀ + G_k W G_kᵀ

with F_k, G_k the state and input Jacobians of the discrete model at the nominal (x_k, u_k) and W
the covariance of white noise on the inputs: the prediction step of the extended Kalman filter
without measurement updates.
"""

import numpy as np


def propagate_along_trajectory(model, states, inputs, dt, P0, accel_sigma, turn_sigma=0.0):
    """Return covariances (N+1, n, n) along the nominal `states` (N+1, n) driven by `inputs` (N, m)."""
    states = np.asarray(states, dtype=float)
    inputs = np.asarray(inputs, dtype=float)
    P0 = np.asarray(P0, dtype=float)
    n = model.state_dim
    steps = len(inputs)
    if P0.shape != (n, n):
        raise ValueError(f"P0 has shape {P0.shape}, expected ({n}, {n})")
    if states.shape != (steps + 1, n):
        raise ValueError(f"states has shape {states.shape}, expected ({steps + 1}, {n})")
    if not (np.all(np.isfinite(P0)) and np.all(np.isfinite(states)) and np.all(np.isfinite(inputs))):
        raise ValueError("P0, states or inputs contain NaN or Inf")
    sequence = model.covariance_sequence_function(steps)
    stacked = np.asarray(sequence(states.T, inputs.T, dt, P0, accel_sigma, turn_sigma))
    return stacked.reshape(steps + 1, n, n)
