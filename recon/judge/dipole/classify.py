"""What an identified dipole says about one coil: its polarity, and its uncertainty with the model floor.

The statistical sigma of an identified dipole leaves out the model's own errors (attitude, reference
field); ``MODEL_FLOOR_FRACTION`` of the nominal dipole is added in quadrature before any decision.

Polarity, for the ratio r of the identified to the nominal dipole with its 1-sigma s (Gaussian
likelihood), is decided by likelihood ratios between hypotheses:

- nominal against inverted (r = +1 against r = -1): ``ln L+ - ln L- = 2 r / s^2``; its sign names
  the polarity once the coil is seen to respond;
- responding against not (r = 0 against |r| >= ``NO_RESPONSE_RATIO``, half the nominal dipole): the
  coil responds when r = 0 is rejected by ``POLARITY_DELTA_CHI2`` (r^2 / s^2 >= 9, 3 sigma), and gives
  no response when even half the nominal dipole is rejected by as much while r = 0 is not.

A coil whose Fisher information ``1 / s^2`` is too small for either is "undetermined", and the
evidence shows that information. A weak but working coil (a fifth of its dipole, well measured) is
"nominal" with a gain finding, not "no response".

References
----------
Neyman, J. and Pearson, E. S. (1933). On the problem of the most efficient tests of statistical
hypotheses. Phil. Trans. R. Soc. A 231, 289-337 (the likelihood ratio).
"""

from __future__ import annotations

import numpy as np

from ..thresholds import MODEL_FLOOR_FRACTION, NO_RESPONSE_RATIO, POLARITY_DELTA_CHI2

__all__ = ["classify_coil", "dipole_sigma_with_floor", "polarity_log_ratio"]


def dipole_sigma_with_floor(c_sigma: float, c_nominal: float) -> float:
    """Total 1-sigma of an estimated dipole per amp: the statistical one and the model floor
    ``MODEL_FLOOR_FRACTION |c_nominal|`` in quadrature, A m^2 per A."""
    return float(np.hypot(c_sigma, MODEL_FLOOR_FRACTION * abs(c_nominal)))


def polarity_log_ratio(r: float, s: float) -> float:
    """Log-likelihood ratio of nominal (r = +1) against inverted (r = -1) for a ratio r with 1-sigma s:
    ``2 r / s^2`` (positive favours nominal)."""
    return 2.0 * r / (s * s)


def classify_coil(c_est: float, c_sigma: float, c_nominal: float) -> tuple[str, float, float, float]:
    """Polarity of one coil from its estimated diagonal dipole per amp (see the module docstring).

    Returns
    -------
    polarity : "nominal" | "inverted" | "no_response" | "undetermined"
    confidence : float, in sigmas: from zero for nominal and inverted, from half the nominal dipole for
        no response, and |r| / s for undetermined
    ratio : float, r = c_est / c_nominal
    ratio_sigma : float, s (statistical with the model floor)
    """
    r = c_est / c_nominal
    s = float(np.hypot(c_sigma / abs(c_nominal), MODEL_FLOOR_FRACTION))
    z_zero = r / s
    if z_zero * z_zero >= POLARITY_DELTA_CHI2:
        return ("nominal" if polarity_log_ratio(r, s) > 0 else "inverted"), abs(z_zero), r, s
    z_half = (NO_RESPONSE_RATIO - abs(r)) / s
    if z_half > 0 and z_half * z_half >= POLARITY_DELTA_CHI2:
        return "no_response", (1.0 - r) / s, r, s
    return "undetermined", abs(z_zero), r, s
