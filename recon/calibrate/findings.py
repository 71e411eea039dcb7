"""What the calibration reports: its anomalies (crosstalk_significant, mag_bias_large,
crosstalk_estimates_disagree) and the thresholds behind them."""

from __future__ import annotations

import numpy as np

from ..core import Anomaly
from .agreement import CrosstalkAgreement
from .model import AXES

__all__ = ["SIGNIFICANCE_SIGMA", "CONTAMINATION_NOISE_FACTOR", "BIAS_FRACTION_LARGE", "BIAS_FRACTION_WARNING",
           "crosstalk_significant", "mag_bias_large", "crosstalk_estimates_disagree"]

# Crosstalk is called significant when an element is beyond 3 sigma of zero AND its field at full
# current exceeds 5 x the magnetometer noise (common practice, no source).
SIGNIFICANCE_SIGMA = 3.0
CONTAMINATION_NOISE_FACTOR = 5.0
# Bias above this fraction of the mean field magnitude: a magnetised part near the sensor or a wrong
# offset in the mission file; a few per cent is usual for a calibrated sensor on a small satellite
# (common practice, no source). recon removes the bias from its calibrated field, but onboard software
# that uses raw readings does not: info above the first level, warning above the second (where the
# field direction an uncorrected onboard estimate sees is off by up to ~6 deg).
BIAS_FRACTION_LARGE = 0.05
BIAS_FRACTION_WARNING = 0.10


def crosstalk_estimates_disagree(agreement: CrosstalkAgreement, scale_factor: float, left_out: str | None,
                                 span) -> Anomaly:
    """The anomaly for crosstalk estimates that differ beyond their uncertainty (unbiased estimates of
    one quantity that differ: at least one model is wrong). ``scale_factor``: the factor applied to
    their sigmas before they were combined; ``left_out``: the estimate left out as the odd one, if
    any; ``span``: (start, stop) UTC."""
    then = (f"the {left_out} estimate alone disagrees with the others and is left out" if left_out else
            f"their sigmas are scaled by {scale_factor:.2g} before they are combined, so fewer directions of K "
            f"count as determined")
    return Anomaly(
        "crosstalk_estimates_disagree", "warning",
        f"the crosstalk estimates differ: chi-square {agreement.chi2:.1f} for {agreement.dof} degrees of "
        f"freedom (p = {agreement.p_value:.2g}; {agreement.test}); "
        f"beyond 3 sigma: {', '.join(agreement.elements_beyond_3_sigma) or 'none singly'}; "
        f"a wrong coil-log time base or latency, a wrong mag_sampling, or a poor reference field can "
        f"cause it; {then}", span[0], span[1])


def crosstalk_significant(k, k_s, imax, noise, mag_sampling, span) -> list[Anomaly]:
    """crosstalk_significant (an empty list when no element is significant).

    Parameters
    ----------
    k, k_s : (3, 3) arrays, nT per A
        Crosstalk and its 1 sigma (NaN where undetermined).
    imax : (3,) array, A
        Each coil's maximum current.
    noise : float
        Magnetometer noise, nT, 1 sigma per axis.
    mag_sampling : str
        "coils_on", "coils_off" or "windowed": sets the severity and the words.
    span : (start, stop) UTC
    """
    contamination = np.abs(k) * imax[None, :]  # nT at full current, per sensor axis and coil
    sig = (np.abs(k) > SIGNIFICANCE_SIGMA * k_s) & (contamination > CONTAMINATION_NOISE_FACTOR * noise)
    sig &= np.isfinite(k)
    if not np.any(sig):
        return []
    j, c = np.unravel_index(np.nanargmax(np.where(sig, contamination, -np.inf)), (3, 3))
    worst = (f"sensor {AXES[j]} sees {k[j, c]:.0f} +- {k_s[j, c]:.0f} nT/A from coil {AXES[c]}, "
             f"{contamination[j, c]:.0f} nT at its full {imax[c]:.3g} A "
             f"({contamination[j, c] / noise:.1f} x the {noise:.0f} nT noise)")
    n_sig = int(sig.sum())
    thresholds = (f"{n_sig} of 9 elements beyond {SIGNIFICANCE_SIGMA:g} sigma and "
                  f"{CONTAMINATION_NOISE_FACTOR:g} x noise at full current")
    if mag_sampling == "coils_off":
        sev, head = "warning", ("the coils are meant to be off while the magnetometer samples, yet the "
                                "readings follow the logged currents: the duty cycle does not work; ")
    elif mag_sampling == "coils_on":
        sev, head = "warning", ("the magnetometer samples with the coils on, so the onboard controller "
                                "sees its own coil field; recon removes it from the calibrated field; ")
    else:
        sev, head = "info", ("samples outside the off windows see the coils; recon removes their field "
                             "from the calibrated field; ")
    a = Anomaly("crosstalk_significant", sev, head + worst + f"; {thresholds}.", span[0], span[1],
                axis=AXES[j], value=float(contamination[j, c]))
    return [a]


def mag_bias_large(bias, bias_s, h, span) -> list[Anomaly]:
    """mag_bias_large when the bias is, at 3 sigma, above a fraction of the mean field (an empty list
    otherwise). ``bias``, ``bias_s``: (3,) nT sensor axes; ``h``: (N,) nT, the reference field
    magnitude of the samples fitted; ``span``: (start, stop) UTC."""
    if not np.all(np.isfinite(bias)) or not len(h):
        return []
    mag = float(np.linalg.norm(bias))
    mean_h = float(np.mean(h))
    sigma = float(np.sqrt(np.sum(bias_s**2)))
    low = mag - SIGNIFICANCE_SIGMA * sigma  # the bias is at least this large (3 sigma)
    if low <= BIAS_FRACTION_LARGE * mean_h:
        return []
    warn = low > BIAS_FRACTION_WARNING * mean_h
    limit = BIAS_FRACTION_WARNING if warn else BIAS_FRACTION_LARGE
    return [Anomaly("mag_bias_large", "warning" if warn else "info",
                    f"magnetometer bias |b| = {mag:.0f} +- {sigma:.0f} nT "
                    f"({np.round(bias).astype(int).tolist()} nT, sensor axes) is {100 * mag / mean_h:.1f} % of "
                    f"the mean field {mean_h:.0f} nT, above {100 * limit:g} %: a magnetised part near the "
                    f"sensor or a wrong offset in the mission file; recon removes it from the calibrated "
                    f"field, onboard software using raw readings does not", span[0], span[1], value=mag)]
