"""Log review: near-miss events in a recorded bag, what the forecast and planner said around them,
and offline re-solves under other settings (`riskbound review`). No rclpy: bags are read offline."""
