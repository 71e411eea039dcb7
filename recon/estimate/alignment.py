"""The magnetometer's misalignment to the body, the gyro's scale factors and non-orthogonality, and
(when the control law could not say) the magnetometer's time-tag offset: by maximum likelihood around
the attitude filter.

The body frame is the gyro's (its mean axes). The calibrated field in nominal body axes is
``b_c = R(theta)^T b``: theta, the small rotation from the nominally mounted magnetometer to its true
axes, is invisible to a magnitude-only calibration. The gyro reads ``w_g = (I + E) w + beta`` with E
symmetric (scale factors on the diagonal, non-orthogonality off it). Both show when the body turns: the
field measured in body axes and the field carried along by the gyro disagree unless theta and E are
right (in body axes ``db/dt = -w x b + A db_ref/dt``). A late magnetometer stamp shows the same way.
The part of the unmodelled field that stays put over the pass (a constant vector in GCRF, the "field"
block) is not fitted (tried: it traded against the misalignment and the scale, and made the attitude
worse on two of three simulated tumbling passes); its uncertainty is carried as a consider term.

The filter's whitened innovations ``e_k = L_k^-1 (z_k - h_k)`` (S_k = L_k L_k^T) are the measurements'
likelihood: ``-2 ln L = sum |e_k|^2 + sum ln det S_k + const``. Their sum of squares is minimised over
the parameters by Gauss-Newton with a Gaussian prior on each (the ln det S_k term changes little with
them and is left out), the Jacobian by forward differences of the filter run; the parameters'
covariance is the inverse of the resulting information, scaled by the Birge ratio when the innovations
scatter more than the filter expects. The gyro's six scale terms are kept only when Schwarz's criterion
asks for them: a pass too slow to show them leaves them at the prior, whose uncertainty then enters
the attitude's as a consider term (see :mod:`recon.estimate.nuisance`).

References
----------
Maybeck, P. S. (1982). Stochastic Models, Estimation, and Control, vol. 2. Academic Press. Ch. 10
(maximum-likelihood estimation of parameters from the Kalman filter's innovations) (memory).
Schwarz, G. (1978). Estimating the dimension of a model. Ann. Statist. 6(2), 461-464.
Birge, R. T. (1932). The calculation of errors by the method of least squares. Phys. Rev. 40(2),
207-227 (memory).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

from ..calibrate import MAX_OFFSET_S

__all__ = ["AlignmentPrior", "AlignmentFit", "AlignmentResult", "fit_alignment", "sym_from_six", "six_from_sym",
           "DETERMINED_SHRINK", "GAUSS_NEWTON_STEPS"]

# The misalignment counts as determined by the pass when the data shrink its prior variance at least
# this many times on every axis; otherwise the summary says the prior carries it (common practice, no
# source).
DETERMINED_SHRINK = 4.0
# Gauss-Newton steps at most; the model is nearly linear in these small parameters, so two usually do.
GAUSS_NEWTON_STEPS = 3
# Forward-difference step, as a fraction of each parameter's prior sigma.
DIFFERENCE_STEP = 0.1
BLOCK_SIZE = {"theta": 3, "scale": 6, "time": 1, "field": 3}
# Gauss-Newton is guarded: a step moves no parameter more than STEP_SIGMAS of its prior sigma, is halved
# up to HALVINGS times until the penalised cost falls (else the fit stops), and the parameters stay
# within BLOCK_BOUND_SIGMAS prior sigmas of the prior mean; the time-tag offset within the control
# law's search range, +-MAX_OFFSET_S. Unguarded, a pass whose crosstalk feedback fills the field with
# switching steps drove the offset to -5 and -9.5 s (common practice, no source, for the three values).
STEP_SIGMAS = 3.0
HALVINGS = 4
BLOCK_BOUND_SIGMAS = 5.0


@dataclass(frozen=True)
class AlignmentPrior:
    """What is known before the pass (1-sigma).

    Attributes
    ----------
    misalignment_rad : (3,) prior mean of theta (the mission file's, default zero)
    misalignment_sigma_rad : float
    scale_sigma : float, gyro scale factor, per axis
    skew_sigma : float, gyro non-orthogonality, per pair of axes
    time_offset_sigma_s : float or None, the magnetometer's time-tag offset (None: not estimated here,
        the control law already gave it)
    field_sigma_nT : float, per GCRF axis, the constant part of the unmodelled field over the pass
        (the caller sets it from the fitted level of the unmodelled field)
    """

    misalignment_rad: np.ndarray = field(default_factory=lambda: np.zeros(3))
    misalignment_sigma_rad: float = np.deg2rad(1.0)
    scale_sigma: float = 0.03
    skew_sigma: float = 0.01
    time_offset_sigma_s: float | None = None
    field_sigma_nT: float = 100.0 / np.sqrt(3.0)

    @classmethod
    def from_mission(cls, mission, time_offset_known: bool = True) -> AlignmentPrior:
        """From a :class:`recon.config.Mission`: ``[magnetometer] misalignment_deg`` and
        ``misalignment_sigma_deg`` (default zero and 1 deg, the mounting accuracy of a small satellite's
        magnetometer without an alignment measurement: common practice, no source); the time-tag offset
        is fitted (prior 0.3 s, the stamping latencies seen in practice) unless ``time_offset_known``."""
        mag = mission.magnetometer
        mean = np.zeros(3) if mag.misalignment_deg is None else np.deg2rad(np.asarray(mag.misalignment_deg, float))
        sigma = np.deg2rad(1.0 if mag.misalignment_sigma_deg is None else float(mag.misalignment_sigma_deg))
        return cls(mean, float(sigma), time_offset_sigma_s=None if time_offset_known else 0.3)

    def block(self, name: str) -> tuple[np.ndarray, np.ndarray]:
        """Prior mean and sigma of one block of parameters."""
        if name == "theta":
            return np.asarray(self.misalignment_rad, float), np.full(3, self.misalignment_sigma_rad)
        if name == "scale":
            return np.zeros(6), np.r_[np.full(3, self.scale_sigma), np.full(3, self.skew_sigma)]
        if name == "field":
            return np.zeros(3), np.full(3, self.field_sigma_nT)
        return np.zeros(1), np.full(1, self.time_offset_sigma_s or 0.3)


def _at_range_edge(offset_s: float) -> bool:
    """Whether a fitted time-tag offset is pinned at the +-MAX_OFFSET_S bound of the guarded fit."""
    return abs(offset_s) >= MAX_OFFSET_S * (1.0 - 1e-9)


def sym_from_six(e: np.ndarray) -> np.ndarray:
    """Symmetric 3x3 from (xx, yy, zz, xy, xz, yz)."""
    return np.array([[e[0], e[3], e[4]], [e[3], e[1], e[5]], [e[4], e[5], e[2]]])


def six_from_sym(m: np.ndarray) -> np.ndarray:
    """(xx, yy, zz, xy, xz, yz) of a symmetric 3x3."""
    return np.array([m[0, 0], m[1, 1], m[2, 2], m[0, 1], m[0, 2], m[1, 2]])


@dataclass(frozen=True)
class AlignmentFit:
    """The maximum-likelihood parameters and their covariance.

    Attributes
    ----------
    x : (p,) the parameters in ``blocks`` order: "theta" (3, rad), "scale" (6, when kept), "time" (1, s,
        when estimated)
    cov : (p, p) their covariance
    blocks : tuple of names
    scale_kept : bool; scale_gain : float, chi-square gained by the scale terms; scale_penalty : float
    chi2_per_dof : float, Birge ratio of the innovations; equations : int
    theta_shrink : (3,) prior variance over posterior variance per axis (>= 4: the data determine it)
    scale_cov_fitted : (6, 6) the gyro scale's covariance in the fit that had it, kept or not: what
        the pass says about the scale (near the prior when it cannot see it)
    """

    x: np.ndarray
    cov: np.ndarray
    blocks: tuple[str, ...]
    scale_kept: bool
    scale_gain: float
    scale_penalty: float
    chi2_per_dof: float
    equations: int
    theta_shrink: np.ndarray
    scale_cov_fitted: np.ndarray

    def part(self, name: str) -> tuple[np.ndarray, np.ndarray] | None:
        """One block's values and covariance, or None when the block was not fitted."""
        if name not in self.blocks:
            return None
        start = sum(BLOCK_SIZE[n] for n in self.blocks[:self.blocks.index(name)])
        sl = slice(start, start + BLOCK_SIZE[name])
        return self.x[sl], self.cov[sl, sl]

    @property
    def theta_rad(self) -> np.ndarray:
        return self.part("theta")[0]

    @property
    def theta_cov(self) -> np.ndarray:
        return self.part("theta")[1]

    @property
    def E(self) -> np.ndarray:
        p = self.part("scale")
        return np.zeros((3, 3)) if p is None else sym_from_six(p[0])

    @property
    def field_offset_nT(self) -> np.ndarray:
        p = self.part("field")
        return np.zeros(3) if p is None else p[0]

    @property
    def time_offset_s(self) -> float:
        p = self.part("time")
        return 0.0 if p is None else float(p[0][0])


def _gauss_newton(evaluate: Callable[[dict], np.ndarray], blocks: tuple[str, ...], prior: AlignmentPrior
                  ) -> tuple[np.ndarray, np.ndarray, float, int]:
    """Minimise |e(x)|^2 + |(x - x0) / s0|^2 over the blocks' parameters: (x, information, chi2, n)."""
    x0 = np.concatenate([prior.block(n)[0] for n in blocks])
    s0 = np.concatenate([prior.block(n)[1] for n in blocks])
    sizes = [BLOCK_SIZE[n] for n in blocks]

    def unpack(x):
        return dict(zip(blocks, np.split(x, np.cumsum(sizes)[:-1]), strict=True))

    bound = np.concatenate([np.full(1, MAX_OFFSET_S) if n == "time" else BLOCK_BOUND_SIGMAS * prior.block(n)[1]
                            for n in blocks])

    def cost(x, e):
        return float(e @ e) + float(np.sum(((x - x0) / s0) ** 2))

    x = x0.copy()
    e = evaluate(unpack(x))
    info = np.diag(1.0 / s0 ** 2)
    for _ in range(GAUSS_NEWTON_STEPS):
        jac = np.empty((e.size, x.size))
        for j in range(x.size):
            xj = x.copy()
            xj[j] += DIFFERENCE_STEP * s0[j]
            jac[:, j] = (evaluate(unpack(xj)) - e) / (DIFFERENCE_STEP * s0[j])
        info = jac.T @ jac + np.diag(1.0 / s0 ** 2)
        grad = jac.T @ e + (x - x0) / s0 ** 2
        step = np.linalg.solve(info, -grad)
        step *= min(1.0, float(np.min(STEP_SIGMAS * s0 / np.maximum(np.abs(step), 1e-300))))  # trust region
        for _half in range(HALVINGS + 1):  # a step is taken only when it lowers the penalised cost
            trial = np.clip(x + step, x0 - bound, x0 + bound)
            e_trial = evaluate(unpack(trial))
            if np.all(np.isfinite(e_trial)) and cost(trial, e_trial) < cost(x, e):
                break
            step = step / 2.0
        else:
            break  # no step lowers the cost: x is the minimum as far as these steps can tell
        x, e = trial, e_trial
        if np.all(np.abs(step) <= 0.1 * np.sqrt(np.diag(np.linalg.inv(info)))):
            break
    return x, info, float(e @ e), int(e.size)


def fit_alignment(evaluate: Callable[[dict], np.ndarray], prior: AlignmentPrior) -> AlignmentFit:
    """Maximum-likelihood misalignment, gyro scale and (optionally) time-tag offset.

    Parameters
    ----------
    evaluate : callable(params) -> (n,) the filter's stacked whitened innovations (finite ones only,
        always the same updates) with the parameters ``params`` ({"theta": (3,) rad, "scale": (6,)
        (xx, yy, zz, xy, xz, yz), "time": (1,) s}, blocks absent when not fitted) applied
    prior : AlignmentPrior (a time-tag offset is fitted when its sigma is given)

    Returns
    -------
    AlignmentFit
    """
    base = ("theta",) + (("time",) if prior.time_offset_sigma_s is not None else ())
    with_scale = ("theta", "scale") + base[1:]
    fits = {b: _gauss_newton(evaluate, b, prior) for b in (base, with_scale)}
    (x0, i0, chi0, n), (x1, i1, chi1, _) = fits[base], fits[with_scale]
    unit = max(chi1 / max(n - len(x1), 1), 1.0)
    gain = (chi0 - chi1) / unit
    penalty = 6.0 * float(np.log(n))
    kept = bool(gain > penalty)
    blocks, x, info, chi = (with_scale, x1, i1, chi1) if kept else (base, x0, i0, chi0)
    birge = max(chi / max(n - len(x), 1), 1.0)
    cov = np.linalg.inv(info) * birge
    shrink = prior.misalignment_sigma_rad ** 2 / np.diag(cov)[:3]
    scale_cov = (np.linalg.inv(i1) * max(chi1 / max(n - len(x1), 1), 1.0))[3:9, 3:9]  # ("theta", "scale", ...)
    return AlignmentFit(x, cov, blocks, kept, float(gain), penalty, birge, n, shrink, scale_cov)


@dataclass(frozen=True)
class AlignmentResult:
    """What gyro mode concluded about the alignment of its sensors (for the summary and the report).

    Attributes
    ----------
    misalignment_rad : (3,) body from magnetometer, small angles; misalignment_cov : (3, 3) rad^2
    misalignment_source : "this pass" (the data shrink the prior at least DETERMINED_SHRINK times on
        every axis) or "prior" (the mission file's value, or zero, carries it)
    gyro_scale : (3, 3) E or None (not estimated: the pass is not dynamic enough by Schwarz's criterion)
    gyro_scale_cov : (6, 6) or None, of (xx, yy, zz, xy, xz, yz)
    gyro_scale_note : str
    time_offset_s, time_offset_sigma_s : the magnetometer's time-tag offset estimated here (None when
        the control law gave it before calibration)
    chi2_per_dof : float, the Birge ratio of the fit's innovations
    """

    misalignment_rad: np.ndarray
    misalignment_cov: np.ndarray
    misalignment_source: str
    gyro_scale: np.ndarray | None
    gyro_scale_cov: np.ndarray | None
    gyro_scale_note: str
    time_offset_s: float | None
    time_offset_sigma_s: float | None
    chi2_per_dof: float

    @classmethod
    def from_fit(cls, fit: AlignmentFit, prior: AlignmentPrior) -> AlignmentResult:
        source = "this pass" if np.all(fit.theta_shrink >= DETERMINED_SHRINK) else "prior"
        note = (f"estimated: the scale terms gain chi-square {fit.scale_gain:.0f} against the Schwarz penalty "
                f"{fit.scale_penalty:.0f}" if fit.scale_kept else
                f"not estimated: the pass does not show them (chi-square gain {fit.scale_gain:.1f}, Schwarz penalty "
                f"{fit.scale_penalty:.0f}); their prior ({100 * prior.scale_sigma:.0f} % scale, "
                f"{100 * prior.skew_sigma:.0f} % skew) enters the attitude's uncertainty")
        scale, tm = fit.part("scale"), fit.part("time")
        offset = None if tm is None else float(tm[0][0])
        offset_sigma = None if tm is None else float(np.sqrt(tm[1][0, 0]))
        if offset is not None and _at_range_edge(offset):
            offset_sigma = max(offset_sigma, MAX_OFFSET_S)  # the data do not tell
        return cls(fit.theta_rad, fit.theta_cov, source, None if scale is None else sym_from_six(scale[0]),
                   None if scale is None else scale[1], note, offset, offset_sigma, fit.chi2_per_dof)

    def to_summary(self) -> dict:
        """The alignment entries of summary.json's calibration block (angles in degrees)."""
        sig = np.rad2deg(np.sqrt(np.diag(self.misalignment_cov)))
        out = {"misalignment_deg": np.rad2deg(self.misalignment_rad).tolist(), "misalignment_deg_sigma": sig.tolist(),
               "misalignment_frame": "body from magnetometer, small angles about body x, y, z",
               "misalignment_source": self.misalignment_source,
               "gyro_scale": None if self.gyro_scale is None else self.gyro_scale.tolist(),
               "gyro_scale_sigma": None if self.gyro_scale_cov is None else
               sym_from_six(np.sqrt(np.diag(self.gyro_scale_cov))).tolist(),
               "gyro_scale_note": self.gyro_scale_note}
        if self.time_offset_s is not None:
            out.update({"time_offset_s": self.time_offset_s, "time_offset_s_sigma": self.time_offset_sigma_s,
                        "time_offset_method": "filter innovations"})
            if _at_range_edge(self.time_offset_s):
                out["time_offset_note"] = (f"at the edge of the searched range (+-{MAX_OFFSET_S:g} s): the "
                                           f"innovations do not determine it; its sigma spans the range")
        return out
