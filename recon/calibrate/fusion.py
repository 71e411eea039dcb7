"""One crosstalk from several estimates and the prior: their consistency, their combination, which
directions of K the data determine, and the uncertainty the others leave in the calibrated field.

1. Consistency. The estimates (field magnitude, current steps, synchronous detection) use different
   information and are taken as independent. Their covariance-weighted combination ``k_hat`` (without
   the prior) and ``chi2 = sum_x (k_x - k_hat)^T C_x^-1 (k_x - k_hat)`` over the elements each one
   gives, with ``sum_x n_x - rank`` degrees of freedom (for two estimates of the same elements this is
   ``d^T (C_a + C_b)^-1 d``). When they disagree (p below ``AGREEMENT_P``), every covariance is
   multiplied by ``chi2 / dof`` before they are combined: the scale-factor rule of the Particle Data
   Group (Navas et al. 2024, Review of Particle Physics, Phys. Rev. D 110, 030001, Introduction,
   sec. 5.2.2), which makes the spread of the estimates part of the stated uncertainty.
2. Combination with the prior (:mod:`recon.calibrate.prior`: zero mean, ``sigma_p`` per element):
   information ``I = sum_x C_x^-1 + D^-2`` (``D = diag(sigma_p)``), ``P = I^-1``,
   ``k_post = P sum_x C_x^-1 k_x`` (Bar-Shalom, Li & Kirubarajan 2001, Estimation with Applications to
   Tracking and Navigation, sec. 3.3; Gelman et al. 2013, Bayesian Data Analysis, 3rd ed., sec. 3.5).
3. Directions. In the prior's units (``P_w = D^-1 P D^-1``, the prior is then the identity) the
   eigenvectors of ``P_w`` are the directions of K the data inform independently; eigenvalue
   ``lambda`` is the fraction of the prior variance left. A direction is *determined* when the data
   shrink its prior variance at least ``MIN_VARIANCE_SHRINK`` times (``1 / lambda`` at least that).
   The others are held at the prior: their component of K is zero and their variance the prior's.
4. The calibrated field's uncertainty from K at the currents ``i`` that flowed: ``J P_applied J^T``
   with ``J = I_3 (x) i^T`` (3 x 9), per sample.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from .agreement import AGREEMENT_P, CrosstalkAgreement, combine_crosstalk
from .model import crosstalk_name

__all__ = ["MIN_VARIANCE_SHRINK", "CrosstalkEstimate", "CrosstalkDirection", "CrosstalkFusion", "fuse_crosstalk",
           "consistency", "field_covariance_nT2"]

# A direction of K is determined when the data shrink its prior variance at least this many times.
# Four (sigma halved) is the least at which the data, not the prior, say what K is. At a hundred
# (sigma a tenth of the prior's) a K of the size the prior expects, with all nine directions
# determined, is known to 10 % (relative Frobenius norm: nine sigmas of a tenth against the root of
# nine prior variances). A hundred is used: on simulated momentum-management passes (1-2 mA) the
# estimates shrink the variance 6-40 times while their error is 50-100 % of K; those directions are
# held at the prior, which costs the field under 10 nT at such currents.
MIN_VARIANCE_SHRINK = 100.0


@dataclass(frozen=True)
class CrosstalkEstimate:
    """One estimate of K: ``name`` (a word: "magnitude", "step", "synchronous"), ``crosstalk_nT_per_A``
    (3, 3), NaN where it says nothing, and ``covariance`` (9, 9), (nT/A)^2, row-major."""

    name: str
    crosstalk_nT_per_A: np.ndarray
    covariance: np.ndarray

    @property
    def given(self) -> np.ndarray:
        """(9,) bool: the elements this estimate gives (a finite value and covariance)."""
        k = np.asarray(self.crosstalk_nT_per_A, float).ravel()
        ok = np.isfinite(k)
        if ok.any():
            ok[ok] = np.all(np.isfinite(np.asarray(self.covariance, float)[np.ix_(ok, ok)]), axis=1)
        return ok


@dataclass(frozen=True)
class CrosstalkDirection:
    """One direction of K in the prior's units.

    Attributes
    ----------
    direction : (3, 3) array
        The direction in K's elements, unit Frobenius norm.
    sigma_nT_per_A : float
        1-sigma of K along it after the data (before holding).
    variance_shrink : float
        Prior variance over the variance after the data (1: the data say nothing).
    determined : bool
    """

    direction: np.ndarray
    sigma_nT_per_A: float
    variance_shrink: float
    determined: bool


@dataclass(frozen=True)
class CrosstalkFusion:
    """Result of :func:`fuse_crosstalk`.

    Attributes
    ----------
    crosstalk_nT_per_A : (3, 3) array, nT per A
        The combination, with the undetermined directions held at the prior (zero).
    covariance : (9, 9) array, (nT/A)^2, row-major
        Its covariance: the data's in the determined directions, the prior's in the others.
    sigma_nT_per_A : (3, 3) array
    prior_sigma_nT_per_A : (3,) array, per coil column
    directions : tuple of CrosstalkDirection, most shrunk first
    elements_determined : (3, 3) bool array
        Elements whose variance the data shrink at least ``min_variance_shrink`` times.
    agreement : CrosstalkAgreement
        The consistency of the estimates (before the prior).
    scale_factor : float
        The factor applied to every estimate's sigma (1 when they agree).
    estimates : tuple of str
        The names of the estimates combined.
    min_variance_shrink : float
    """

    crosstalk_nT_per_A: np.ndarray
    covariance: np.ndarray
    sigma_nT_per_A: np.ndarray
    prior_sigma_nT_per_A: np.ndarray
    directions: tuple[CrosstalkDirection, ...]
    elements_determined: np.ndarray
    agreement: CrosstalkAgreement
    scale_factor: float
    estimates: tuple[str, ...]
    min_variance_shrink: float

    @property
    def n_determined(self) -> int:
        """How many of the nine directions are determined."""
        return sum(d.determined for d in self.directions)


def consistency(estimates: list[CrosstalkEstimate], *, p_limit: float = AGREEMENT_P) -> CrosstalkAgreement:
    """Are the estimates consistent with one K? (step 1 of the module notes)."""
    usable = [e for e in estimates if e.given.any()]
    info = np.zeros((9, 9))
    for e in usable:
        g = e.given
        info[np.ix_(g, g)] += np.linalg.pinv(np.asarray(e.covariance, float)[np.ix_(g, g)], hermitian=True)
    rank = int(np.linalg.matrix_rank(info)) if usable else 0
    dof = sum(int(e.given.sum()) for e in usable) - rank
    what = " and ".join(e.name for e in usable) or "none"
    test = (f"chi-square of the {what} estimates about their combination, agree when p > {p_limit:g}")
    z = np.full((3, 3), np.nan)
    if len(usable) < 2 or dof <= 0:
        return CrosstalkAgreement(None, 0, None, None, z, (), test)
    k_hat, c_hat = _combine_all(usable)
    chi2, z_best, beyond = 0.0, np.full(9, np.nan), []
    for e in usable:
        g = e.given
        c = np.asarray(e.covariance, float)[np.ix_(g, g)]
        d = np.asarray(e.crosstalk_nT_per_A, float).ravel()[g] - k_hat.ravel()[g]
        chi2 += float(d @ np.linalg.pinv(c, hermitian=True) @ d)
        # k_x - k_hat is uncorrelated with k_hat (best linear combination): its variance is C_x - C_hat
        var = np.diag(c) - np.diag(c_hat)[g]
        ze = d / np.sqrt(np.maximum(var, 1e-12 * np.diag(c)))
        idx = np.flatnonzero(g)
        for q, zq in zip(idx, ze, strict=True):
            if not np.isfinite(z_best[q]) or abs(zq) > abs(z_best[q]):
                z_best[q] = zq
            if abs(zq) > 3.0:
                beyond.append(f"{crosstalk_name(q // 3, q % 3)} ({e.name})")
    p = float(stats.chi2.sf(chi2, dof))
    return CrosstalkAgreement(chi2, dof, p, bool(p > p_limit), z_best.reshape(3, 3), tuple(beyond), test)


def _combine_all(estimates: list[CrosstalkEstimate]) -> tuple[np.ndarray, np.ndarray]:
    """Covariance-weighted combination of any number of estimates (NaN where none gives a value)."""
    k, c = estimates[0].crosstalk_nT_per_A, estimates[0].covariance
    for e in estimates[1:]:
        k, c = combine_crosstalk(k, c, e.crosstalk_nT_per_A, e.covariance)
    return k, c


def fuse_crosstalk(estimates: list[CrosstalkEstimate], prior_sigma_nT_per_A: np.ndarray, *,
                   min_variance_shrink: float = MIN_VARIANCE_SHRINK) -> CrosstalkFusion:
    """The crosstalk to apply, from the estimates and the prior (see the module notes).

    Parameters
    ----------
    estimates : list of CrosstalkEstimate
        Any number (none: K is the prior).
    prior_sigma_nT_per_A : (3,) array, nT per A
        The prior 1-sigma of each element, per coil column (:func:`recon.calibrate.prior.prior_sigma_nT_per_A`).
    min_variance_shrink : float

    Returns
    -------
    CrosstalkFusion
    """
    agreement = consistency(estimates)
    scale2 = agreement.chi2 / agreement.dof if agreement.agree is False else 1.0
    d = np.tile(np.asarray(prior_sigma_nT_per_A, float), 3)  # row-major: element (axis, coil) -> coil
    info = np.diag(1.0 / d**2)
    vec = np.zeros(9)
    for e in estimates:
        g = e.given
        if not g.any():
            continue
        i_sub = np.linalg.pinv(scale2 * np.asarray(e.covariance, float)[np.ix_(g, g)], hermitian=True)
        info[np.ix_(g, g)] += i_sub
        vec[g] += i_sub @ np.asarray(e.crosstalk_nT_per_A, float).ravel()[g]
    post = np.linalg.inv(info)
    post = 0.5 * (post + post.T)
    k_post = post @ vec
    lam, u = np.linalg.eigh(post / np.outer(d, d))  # the prior's units: the prior is the identity
    shrink = 1.0 / np.maximum(lam, 1e-300)
    det = shrink >= min_variance_shrink
    z_post = k_post / d
    z_applied = u[:, det] @ (u[:, det].T @ z_post)
    cov_w = (u[:, det] * lam[det]) @ u[:, det].T + u[:, ~det] @ u[:, ~det].T
    cov = cov_w * np.outer(d, d)
    order = np.argsort(-shrink)
    dirs = []
    for q in order:
        v = d * u[:, q]
        norm = float(np.linalg.norm(v))
        dirs.append(CrosstalkDirection((v / norm).reshape(3, 3), float(np.sqrt(lam[q]) * norm), float(shrink[q]),
                                       bool(det[q])))
    elements = (np.diag(cov) <= d**2 / min_variance_shrink * (1.0 + 1e-9)).reshape(3, 3)
    return CrosstalkFusion(
        crosstalk_nT_per_A=(d * z_applied).reshape(3, 3), covariance=cov,
        sigma_nT_per_A=np.sqrt(np.diag(cov)).reshape(3, 3),
        prior_sigma_nT_per_A=np.asarray(prior_sigma_nT_per_A, float), directions=tuple(dirs),
        elements_determined=elements, agreement=agreement, scale_factor=float(np.sqrt(scale2)),
        estimates=tuple(e.name for e in estimates if e.given.any()), min_variance_shrink=float(min_variance_shrink))


def field_covariance_nT2(covariance: np.ndarray, i_coil_A: np.ndarray) -> np.ndarray:
    """Covariance of ``K i`` per sample (N, 3, 3), nT^2, sensor axes: ``J P J^T`` with ``J = I_3 (x) i^T``.

    Parameters
    ----------
    covariance : (9, 9) array, (nT/A)^2, row-major K
    i_coil_A : (N, 3) array, A (finite)
    """
    p4 = np.asarray(covariance, float).reshape(3, 3, 3, 3)  # [axis a, coil c, axis b, coil d]
    i = np.asarray(i_coil_A, float)
    return np.einsum("nc,acbd,nd->nab", i, p4, i)
