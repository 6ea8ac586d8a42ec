"""The static world without ROS: occupancy grids and the free-space half-planes built from them."""
