"""Chance constraints made deterministic: quantiles, inflated boxes, enclosing ellipsoids, risk allocation."""
