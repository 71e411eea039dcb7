"""Do two crosstalk estimates agree, and what is their combination? (Any number of them, with the
prior: :mod:`recon.calibrate.fusion`.)"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from .model import crosstalk_name

__all__ = ["CrosstalkAgreement", "compare_crosstalk", "combine_crosstalk", "AGREEMENT_P"]

# Two estimates agree when the chi-square of their difference has a p-value above this
# (a 1 % test; common practice, no source).
AGREEMENT_P = 0.01


@dataclass(frozen=True)
class CrosstalkAgreement:
    """Result of :func:`compare_crosstalk`.

    Attributes
    ----------
    chi2 : float or None
        ``d^T (C_a + C_b)^-1 d`` over the elements both estimates determine (None: none).
    dof : int
        Number of elements compared.
    p_value : float or None
        Chi-square survival function of ``chi2`` with ``dof`` degrees of freedom.
    agree : bool or None
        ``p_value > p_limit``; None when nothing could be compared.
    z : (3, 3) array
        Each element's difference over its combined 1-sigma; NaN where not compared.
    elements_beyond_3_sigma : tuple of str
        Names (``crosstalk_<axis>_coil_<coil>``) of the elements with ``|z| > 3``.
    test : str
        What was tested, in words.
    """

    chi2: float | None
    dof: int
    p_value: float | None
    agree: bool | None
    z: np.ndarray
    elements_beyond_3_sigma: tuple[str, ...]
    test: str


def compare_crosstalk(k_a: np.ndarray, cov_a: np.ndarray, k_b: np.ndarray, cov_b: np.ndarray,
                      *, p_limit: float = AGREEMENT_P) -> CrosstalkAgreement:
    """Do two crosstalk estimates agree within their uncertainty?

    Chi-square of the difference ``d = vec(K_a) - vec(K_b)`` over the elements both determine, with
    the combined covariance ``C_a + C_b`` (the two estimates use different information: the field
    magnitude against a model, and the steps at switching instants against the gyro, so they are
    taken as independent): ``chi2 = d^T (C_a + C_b)^-1 d``, ``dof`` = number of elements; they agree
    when the p-value exceeds ``p_limit``. Each element's ``|d| / sigma`` is reported too.

    Parameters
    ----------
    k_a, k_b : (3, 3) arrays, nT per A (NaN where undetermined)
    cov_a, cov_b : (9, 9) arrays, (nT/A)^2, row-major order

    Returns
    -------
    CrosstalkAgreement
    """
    a, b = np.asarray(k_a, float).ravel(), np.asarray(k_b, float).ravel()
    both = np.isfinite(a) & np.isfinite(b)
    z = np.full(9, np.nan)
    if not np.any(both):
        return CrosstalkAgreement(chi2=None, dof=0, p_value=None, agree=None, z=z.reshape(3, 3),
                                  elements_beyond_3_sigma=(),
                                  test="chi-square of the difference, combined covariance")
    c = np.asarray(cov_a, float)[np.ix_(both, both)] + np.asarray(cov_b, float)[np.ix_(both, both)]
    d = (a - b)[both]
    chi2 = float(d @ np.linalg.pinv(c) @ d)
    dof = int(both.sum())
    p = float(stats.chi2.sf(chi2, dof))
    z[both] = d / np.sqrt(np.diag(c))
    names = tuple(crosstalk_name(k // 3, k % 3) for k in np.flatnonzero(np.abs(z) > 3.0))
    return CrosstalkAgreement(
        chi2=chi2, dof=dof, p_value=p, agree=bool(p > p_limit), z=z.reshape(3, 3), elements_beyond_3_sigma=names,
        test=f"chi-square of the difference with the combined covariance, agree when p > {p_limit:g}")


def combine_crosstalk(k_a: np.ndarray, cov_a: np.ndarray, k_b: np.ndarray,
                      cov_b: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Inverse-covariance weighted combination of two independent crosstalk estimates.

    ``I = I_a + I_b`` with ``I_x`` the pseudo-inverse of each covariance over the elements it
    determines (zero elsewhere); ``K = I^+ (I_a k_a + I_b k_b)``, covariance ``I^+`` (the best
    linear unbiased combination; e.g. Bar-Shalom, Li & Kirubarajan 2001, Estimation with Applications
    to Tracking and Navigation, sec. 3.3). Elements neither determines are NaN.

    Parameters
    ----------
    k_a, k_b : (3, 3) arrays, nT per A (NaN where undetermined)
    cov_a, cov_b : (9, 9) arrays, (nT/A)^2, row-major

    Returns
    -------
    (3, 3) array, (9, 9) array
    """
    info = np.zeros((9, 9))
    vec = np.zeros(9)
    for k, c in ((k_a, cov_a), (k_b, cov_b)):
        k9 = np.asarray(k, float).ravel()
        ok = np.isfinite(k9)
        c = np.asarray(c, float)
        if ok.any():
            sub = c[np.ix_(ok, ok)]
            good = np.all(np.isfinite(sub))
            if not good:
                continue
            i_sub = np.linalg.pinv(sub, hermitian=True)
            info[np.ix_(ok, ok)] += i_sub
            vec[ok] += i_sub @ k9[ok]
    have = np.diag(info) > 0
    out = np.full(9, np.nan)
    cov = np.full((9, 9), np.nan)
    if have.any():
        c_sub = np.linalg.pinv(info[np.ix_(have, have)], hermitian=True)
        out[have] = c_sub @ vec[have]
        cov[np.ix_(have, have)] = c_sub
    return out.reshape(3, 3), cov
