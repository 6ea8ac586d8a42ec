"""Sweeps of ROS-free closed loops over a grid (α × allocation × scenario × seed × parameter file ×
robot model × walker reaction) on Dask distributed, results in SQLite, the operator's report."""
