"""Which parameters of the attitude-independent fit the data determine, and why not the others.

A parameter that the data cannot tell apart from others is *undetermined*. Three tests: the span of
each coil's current (a coil that never switches leaves its crosstalk column indistinguishable from
the bias); the singular values of the column-normalised Jacobian (Belsley, Kuh & Welsch 1980,
Regression Diagnostics, ch. 3: the condition number of the scaled design matrix): while it is above
the limit, the parameter that dominates the weakest direction is fixed at its nominal value (0, or 1
on the soft-iron diagonal) and the fit repeated; and a 1-sigma larger than any plausible value of
the parameter, which catches the case magnetic control creates on purpose: a dipole perpendicular to
the field changes ``|b|`` only at second order, so the crosstalk of such coils barely shows in the
magnitude. An undetermined parameter is held at its nominal value, but its plausible range (1-sigma
= the same limit) is carried into the covariance of the others as a consider term
(:mod:`recon.calibrate.magfit`), so a bias that only looks determined because the soft iron was held
at identity is reported as undetermined too.

References
----------
Belsley, D. A., Kuh, E. and Welsch, R. E. (1980). Regression Diagnostics. Wiley, chapter 3.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .model import AXES, N_PARAMS, ParamIndex, crosstalk_name, jacobian

__all__ = ["MIN_CURRENT_SPAN_FRACTION", "MAX_CONDITION", "MAX_SIGMA_FRACTION", "CoilSpan", "coil_span",
           "Screen", "screen", "sigma_bounds", "sigma_reason"]

# A coil whose effective current spans less than this fraction of its maximum current is taken as
# never switching: its crosstalk column is undetermined (common practice, no source).
MIN_CURRENT_SPAN_FRACTION = 0.01
# Limit on the condition number of the column-normalised Jacobian. Above it, the weakest parameter
# combination is known 1e6 times less well than an orthogonal design would give: no trustworthy digit
# at the noise levels of a magnetometer (common practice, no source).
MAX_CONDITION = 1.0e6
# A parameter whose 1-sigma exceeds this fraction of its plausible range (the mean field for the bias
# and for a coil at full current; 1 for the soft iron) is undetermined (common practice, no source).
MAX_SIGMA_FRACTION = 0.1


@dataclass(frozen=True)
class CoilSpan:
    """Result of :func:`coil_span`.

    Attributes
    ----------
    max_current_A : (3,) array, A
        Each coil's maximum current (ones without currents).
    switching : (3,) bool array
        Coils whose current spans enough of their range for their crosstalk column to be fitted.
    undetermined : dict
        ``crosstalk_<axis>_coil_<coil>`` -> reason, for the columns of the other coils.
    """

    max_current_A: np.ndarray
    switching: np.ndarray
    undetermined: dict[str, str]


def coil_span(i_coil_A: np.ndarray | None, max_current_A: np.ndarray | None,
              min_span_fraction: float) -> CoilSpan:
    """Which coils switch enough for their crosstalk to be fitted.

    Parameters
    ----------
    i_coil_A : (N, 3) array, A, or None
        Effective coil currents; None: no coils, every crosstalk element undetermined.
    max_current_A : (3,) array, A, optional
        Each coil's maximum current. Default: the largest |current| seen.
    min_span_fraction : float
        Smallest span of a coil's current, as a fraction of its maximum current.
    """
    undetermined: dict[str, str] = {}
    if i_coil_A is None:
        for j in range(3):
            for c in range(3):
                undetermined[crosstalk_name(j, c)] = "no coil currents available"
        return CoilSpan(np.ones(3), np.zeros(3, bool), undetermined)
    i = i_coil_A
    span = np.ptp(i, axis=0) if len(i) else np.zeros(3)
    imax = (np.max(np.abs(i), axis=0) if max_current_A is None
            else np.asarray(max_current_A, dtype=float))
    imax = np.where(imax > 0, imax, 1.0)
    switching = span >= min_span_fraction * imax
    for c in np.flatnonzero(~switching):
        why = (f"coil {AXES[c]} current spans {100 * span[c] / imax[c]:.2g} % of its range "
               f"({span[c]:.3g} A of {imax[c]:.3g} A; at least {100 * min_span_fraction:g} % needed)")
        for j in range(3):
            undetermined[crosstalk_name(j, c)] = why
    return CoilSpan(imax, switching, undetermined)


@dataclass(frozen=True)
class Screen:
    """Result of :func:`screen`.

    Attributes
    ----------
    condition_number : float
        Of the column-normalised Jacobian over the free parameters (inf when it cannot be formed).
    hold : dict
        Parameter index -> reason, for the parameters to hold at their nominal value (empty when the
        free ones are all determined).
    """

    condition_number: float
    hold: dict[int, str]


def screen(p: np.ndarray, free: np.ndarray, m_sensor_nT: np.ndarray, i_coil_A: np.ndarray,
           max_condition: float) -> Screen:
    """One observability check of the Jacobian at ``p`` over the ``free`` parameters: parameters with
    no sensitivity, else the one dominating the weakest direction when the column-normalised
    condition number exceeds ``max_condition``."""
    if not np.any(free):
        return Screen(np.inf, {})
    jac = jacobian(p, m_sensor_nT, i_coil_A)[:, free]
    norms = np.linalg.norm(jac, axis=0)
    zero = norms <= 1e-12 * max(float(norms.max(initial=0.0)), 1e-300)
    if np.any(zero):
        return Screen(np.inf, {int(k): "the data carry no information on it (zero sensitivity)"
                               for k in np.flatnonzero(free)[zero]})
    sv, vt = np.linalg.svd(jac / norms, full_matrices=False)[1:]
    cond = float(sv[0] / sv[-1]) if sv[-1] > 0 else np.inf
    if cond <= max_condition:
        return Screen(cond, {})
    weakest = vt[-1]
    k_local = int(np.argmax(np.abs(weakest)))
    k = int(np.flatnonzero(free)[k_local])
    return Screen(cond, {k: (f"condition number {cond:.1e} of the normalised Jacobian (limit {max_condition:.0e}); "
                             f"the weakest direction is {100.0 * weakest[k_local] ** 2:.0f} % this parameter")})


def sigma_bounds(mean_field_nT: float, imax: np.ndarray, fraction: float) -> np.ndarray:
    """Largest plausible 1-sigma per parameter: ``fraction`` of the field for the bias and for a coil
    at full current, ``fraction`` (dimensionless) for the soft iron."""
    b = np.empty(N_PARAMS)
    b[ParamIndex.BIAS] = fraction * mean_field_nT
    b[ParamIndex.SOFT_IRON] = fraction
    b[ParamIndex.CROSSTALK] = np.tile(fraction * mean_field_nT / imax, 3)
    return b


def sigma_reason(k: int, sigma: float, bound: float, imax: np.ndarray) -> str:
    """Why parameter ``k``, of 1-sigma ``sigma`` above its plausible ``bound``, is undetermined."""
    if k >= ParamIndex.CROSSTALK_START:
        c = (k - ParamIndex.CROSSTALK_START) % 3
        return (f"1-sigma {sigma:.3g} nT/A ({sigma * imax[c]:.0f} nT at the full {imax[c]:.3g} A) exceeds "
                f"{bound * imax[c]:.0f} nT: the field magnitude barely depends on it (a coil dipole held "
                f"perpendicular to the field, as magnetic control does, leaves |b| unchanged to first order)")
    unit = " nT" if k < ParamIndex.BIAS.stop else ""
    return f"1-sigma {sigma:.3g}{unit} exceeds the plausible {bound:.3g}{unit}: the attitude does not vary enough"

