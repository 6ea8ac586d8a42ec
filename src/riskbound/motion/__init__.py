"""Robot and obstacle motion models, their Jacobians and covariance propagation."""
