"""What an identified dipole says about one coil: its polarity, and its uncertainty with the model floor.

The statistical sigma of an identified dipole leaves out the model's own errors (attitude, reference
field); ``MODEL_FLOOR_FRACTION`` of the nominal dipole is added in quadrature before any decision.
"""

from __future__ import annotations

import numpy as np

from ..thresholds import MODEL_FLOOR_FRACTION, NO_RESPONSE_RATIO, POLARITY_SIGMAS

__all__ = ["classify_coil", "dipole_sigma_with_floor"]


def dipole_sigma_with_floor(c_sigma: float, c_nominal: float) -> float:
    """Total 1-sigma of an estimated dipole per amp: the statistical one and the model floor
    ``MODEL_FLOOR_FRACTION |c_nominal|`` in quadrature, A m^2 per A."""
    return float(np.hypot(c_sigma, MODEL_FLOOR_FRACTION * abs(c_nominal)))


def classify_coil(c_est: float, c_sigma: float, c_nominal: float) -> tuple[str, float, float, float]:
    """Polarity of one coil from its estimated diagonal dipole per amp.

    With the ratio r = c_est / c_nominal and its total 1-sigma s (statistical, with the model floor
    ``MODEL_FLOOR_FRACTION`` added in quadrature), and the 3-sigma interval [r - 3 s, r + 3 s]:

    - "nominal" when the interval lies above 0 (a response of the nominal sign, at > 3 sigma);
    - "inverted" when it lies below 0;
    - "no_response" when it contains 0 and lies below 0.5 (consistent with no dipole and
      inconsistent, at > 3 sigma, with even half the nominal one);
    - "undetermined" otherwise (too uncertain to tell, typically a coil that hardly switched).

    Returns
    -------
    polarity : str
    confidence : float, in sigmas: from zero for nominal/inverted, from nominal for no_response, and
        |r| / s for undetermined
    ratio : float, r
    ratio_sigma : float, s
    """
    r = c_est / c_nominal
    s = float(np.hypot(c_sigma / abs(c_nominal), MODEL_FLOOR_FRACTION))
    lo, hi = r - POLARITY_SIGMAS * s, r + POLARITY_SIGMAS * s
    if lo > 0:
        return "nominal", abs(r) / s, r, s
    if hi < 0:
        return "inverted", abs(r) / s, r, s
    if hi < NO_RESPONSE_RATIO:
        return "no_response", (1.0 - r) / s, r, s
    return "undetermined", abs(r) / s, r, s
