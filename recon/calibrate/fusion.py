"""One crosstalk from several estimates and the prior: their consistency, their combination, which
directions of K the data determine, and the uncertainty the others leave in the calibrated field.

1. Consistency. The estimates (field magnitude, current steps, synchronous detection) use different
   information and are taken as independent. Their covariance-weighted combination ``k_hat`` (without
   the prior) and ``chi2 = sum_x (k_x - k_hat)^T C_x^-1 (k_x - k_hat)`` over the elements each one
   gives, with ``sum_x n_x - rank`` degrees of freedom (for two estimates of the same elements this is
   ``d^T (C_a + C_b)^-1 d``). When they disagree (p below ``AGREEMENT_P``) and leaving one of three out
   makes the other two agree, that one is left out (the one whose absence agrees best); of two, the
   attitude-independent one is left out when it is one of them (it sees K only through ``|b|``, where
   K trades with soft iron and bias: the cause of a 35,000 nT/A crosstalk applied on slow passes
   before this combination existed). Otherwise every covariance is multiplied by ``chi2 / dof`` before
   they are combined: the scale-factor rule of the Particle Data Group (Navas et al. 2024, Review of
   Particle Physics, Phys. Rev. D 110, 030001, Introduction, sec. 5.2.2), which makes the spread of the
   estimates part of the stated uncertainty.
2. Combination with the prior (:mod:`recon.calibrate.prior`: zero mean, ``sigma_p`` per element):
   information ``I = sum_x C_x^-1 + D^-2`` (``D = diag(s sigma_p)``), ``P = I^-1``,
   ``k_post = P sum_x C_x^-1 k_x`` (Bar-Shalom, Li & Kirubarajan 2001, Estimation with Applications to
   Tracking and Navigation, sec. 3.3; Gelman et al. 2013, Bayesian Data Analysis, 3rd ed., sec. 3.5).
   (2b) The geometric prior is a Gaussian stand-in for a heavy tail (``1 / r^3``): a magnetometer
   closer than the range's middle sees several times its sigma. Its scale ``s`` (at least 1) is
   therefore the one under which the estimates are most likely (empirical Bayes: the marginal
   likelihood of a hyperparameter, Casella 1985, An introduction to empirical Bayes data analysis,
   The American Statistician 39(2), 83-87 (memory)), so that a crosstalk of 40,000 nT/A, which the
   data show plainly in some directions, widens the prior of the directions they barely see instead
   of being pulled to zero in them. Crosstalk of the prior's size or less leaves ``s = 1``.
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
from scipy import optimize, stats

from .agreement import AGREEMENT_P, CrosstalkAgreement, combine_crosstalk
from .model import crosstalk_name

__all__ = ["MIN_VARIANCE_SHRINK", "MAX_PRIOR_WIDENING", "CrosstalkEstimate", "CrosstalkDirection", "CrosstalkFusion",
           "fuse_crosstalk", "consistency", "field_covariance_nT2"]

# A direction of K is determined when the data shrink its prior variance at least this many times.
# Four (sigma halved) is the least at which the data, not the prior, say what K is. At a hundred
# (sigma a tenth of the prior's) a K of the size the prior expects, with all nine directions
# determined, is known to 10 % (relative Frobenius norm: nine sigmas of a tenth against the root of
# nine prior variances). A hundred is used: on simulated momentum-management passes (1-2 mA) the
# estimates shrink the variance 6-40 times while their error is 50-100 % of K; those directions are
# held at the prior, which costs the field under 10 nT at such currents.
MIN_VARIANCE_SHRINK = 100.0
# The prior's sigma is never widened beyond this factor: for 1.5 A m^2/A, the field of a coil 6 cm from
# the magnetometer (no magnetometer worth calibrating sits closer; common practice, no source)
MAX_PRIOR_WIDENING = 100.0


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
        The prior's sigma as used (the geometric one times ``prior_widening``).
    directions : tuple of CrosstalkDirection, most shrunk first
    elements_determined : (3, 3) bool array
        Elements whose variance the data shrink at least ``min_variance_shrink`` times.
    agreement : CrosstalkAgreement
        The consistency of the estimates (before the prior).
    scale_factor : float
        The factor applied to every estimate's sigma (1 when they agree).
    estimates : tuple of str
        The names of the estimates combined.
    left_out : str or None
        The estimate left out because it alone disagreed with the others.
    prior_widening : float
        The factor (at least 1) applied to the geometric prior's sigma (step 2b).
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
    left_out: str | None = None
    prior_widening: float = 1.0

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
    left_out = _odd_one_out(estimates) if agreement.agree is False else None
    if left_out is not None:
        estimates = [e for e in estimates if e.name != left_out]
    scale2 = agreement.chi2 / agreement.dof if agreement.agree is False and left_out is None else 1.0
    info_data, vec = _information(estimates, scale2)
    d0 = np.tile(np.asarray(prior_sigma_nT_per_A, float), 3)  # row-major: element (axis, coil) -> coil
    widen = _prior_widening(info_data, vec, d0)
    d = widen * d0
    post = np.linalg.inv(info_data + np.diag(1.0 / d**2))
    post = 0.5 * (post + post.T)
    k_post = post @ vec
    lam, u = np.linalg.eigh(post / np.outer(d, d))  # the prior's units: the prior is the identity
    shrink = 1.0 / np.maximum(lam, 1e-300)
    det = shrink >= min_variance_shrink
    z_applied = u[:, det] @ (u[:, det].T @ (k_post / d))
    cov = ((u[:, det] * lam[det]) @ u[:, det].T + u[:, ~det] @ u[:, ~det].T) * np.outer(d, d)
    dirs = []
    for q in np.argsort(-shrink):
        v = d * u[:, q]
        norm = float(np.linalg.norm(v))
        dirs.append(CrosstalkDirection((v / norm).reshape(3, 3), float(np.sqrt(lam[q]) * norm), float(shrink[q]),
                                       bool(det[q])))
    return CrosstalkFusion(
        crosstalk_nT_per_A=(d * z_applied).reshape(3, 3), covariance=cov,
        sigma_nT_per_A=np.sqrt(np.diag(cov)).reshape(3, 3),
        prior_sigma_nT_per_A=widen * np.asarray(prior_sigma_nT_per_A, float), directions=tuple(dirs),
        elements_determined=(np.diag(cov) <= d**2 / min_variance_shrink * (1.0 + 1e-9)).reshape(3, 3),
        agreement=agreement, scale_factor=float(np.sqrt(scale2)),
        estimates=tuple(e.name for e in estimates if e.given.any()), min_variance_shrink=float(min_variance_shrink),
        left_out=left_out, prior_widening=float(widen))


def _information(estimates: list[CrosstalkEstimate], scale2: float) -> tuple[np.ndarray, np.ndarray]:
    """The estimates' information (9, 9), (nT/A)^-2, and information-weighted sum (9,), their
    covariances multiplied by ``scale2``."""
    info = np.zeros((9, 9))
    vec = np.zeros(9)
    for e in estimates:
        g = e.given
        if not g.any():
            continue
        i_sub = np.linalg.pinv(scale2 * np.asarray(e.covariance, float)[np.ix_(g, g)], hermitian=True)
        info[np.ix_(g, g)] += i_sub
        vec[g] += i_sub @ np.asarray(e.crosstalk_nT_per_A, float).ravel()[g]
    return 0.5 * (info + info.T), vec


def _prior_widening(info: np.ndarray, vec: np.ndarray, d: np.ndarray) -> float:
    """The factor (at least 1) on the prior's sigma that makes the data most likely (step 2b of the
    module notes): in the prior's units, along each eigenvector ``v`` of the data's information (eigenvalue
    ``mu``), the data's estimate ``z_v`` is distributed ``N(0, s^2 + 1/mu)``; ``s^2`` maximises the
    product of those densities."""
    mu, v = np.linalg.eigh(info * np.outer(d, d))
    keep = mu > 1e-9 * max(float(mu.max(initial=0.0)), 1e-300)
    if not keep.any():
        return 1.0
    mu, v = mu[keep], v[:, keep]
    z = (v.T @ (d * vec)) / mu

    def minus_log_likelihood(log_s2: float) -> float:
        var = np.exp(log_s2) + 1.0 / mu
        return float(np.sum(np.log(var) + z**2 / var))

    best = optimize.minimize_scalar(minus_log_likelihood, bounds=(0.0, np.log(MAX_PRIOR_WIDENING**2)),
                                    method="bounded")
    return float(np.sqrt(np.exp(best.x))) if best.fun < minus_log_likelihood(0.0) else 1.0


def _odd_one_out(estimates: list[CrosstalkEstimate]) -> str | None:
    """Of estimates that disagree, the one to leave out: of three or more, the one whose absence leaves
    the others agreeing best; of two, the attitude-independent one ("magnitude"), which sees K only
    through ``|b|``, where K trades with soft iron and bias, and leans on the reference field, while
    the gyro-based ones measure ``K i`` as a vector. None when no such one exists."""
    usable = [e for e in estimates if e.given.any()]
    if len(usable) == 2:
        names = {e.name for e in usable}
        return "magnitude" if "magnitude" in names else None
    if len(usable) < 3:
        return None
    best, best_p = None, -1.0
    for e in usable:
        rest = consistency([x for x in usable if x is not e])
        if rest.agree is not False and (rest.p_value if rest.p_value is not None else 1.0) > best_p:
            best, best_p = e.name, (rest.p_value if rest.p_value is not None else 1.0)
    return best


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
