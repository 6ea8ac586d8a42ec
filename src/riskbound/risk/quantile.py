"""Standard normal quantile function Φ⁻¹, the back-off factor of a Gaussian chance constraint."""

import numpy as np
from scipy.special import ndtri


def standard_normal_quantile(probability):
    """Return Φ⁻¹(probability) for the standard normal distribution, elementwise.

    Raises ValueError when any probability lies outside the open interval (0, 1) or is not finite.
    """
    p = np.asarray(probability, dtype=float)
    if not np.all(np.isfinite(p)) or np.any(p <= 0.0) or np.any(p >= 1.0):
        bad = float(p[~(np.isfinite(p) & (p > 0.0) & (p < 1.0))].ravel()[0])
        raise ValueError(f"probability={bad!r} is outside the open interval (0, 1)")
    return ndtri(p)


def chance_constraint_backoff(risk):
    """Return Φ⁻¹(1 − risk): how many standard deviations a face is pushed out for violation risk `risk`.

    `risk` must lie in (0, 0.5) so that the back-off is positive (a risk of 0.5 or more would allow
    the nominal position to sit on or inside the box).
    """
    a = np.asarray(risk, dtype=float)
    if not np.all(np.isfinite(a)) or np.any(a <= 0.0) or np.any(a >= 0.5):
        bad = float(a[~(np.isfinite(a) & (a > 0.0) & (a < 0.5))].ravel()[0])
        raise ValueError(f"risk={bad!r} is outside the open interval (0, 0.5)")
    # Φ⁻¹(1 − a) = −Φ⁻¹(a): forming 1 − a first loses the digits of a small allocated risk.
    return -ndtri(a)
