"""The crosstalk of one calibration: the step and synchronous estimates beside the magnitude fit's,
their combination with the prior (:mod:`recon.calibrate.fusion`), the reasons for what stays
undetermined, and the noise the crosstalk's uncertainty leaves in the calibrated field."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .agreement import CrosstalkAgreement
from .estimates import GyroRates, MagnitudeFit, reported, step_estimate, synchronous_estimate
from .fusion import CrosstalkEstimate, CrosstalkFusion, field_covariance_nT2, fuse_crosstalk
from .inputs import CalibrationInputs
from .model import ParamIndex, crosstalk_name
from .prior import prior_note, prior_sigma_nT_per_A
from .steps import StepFit
from .synchronous import SynchronousFit

__all__ = ["MAX_REJECTED_FRACTION", "CrosstalkEstimates", "estimate_crosstalk", "undetermined_parameters", "FieldNoise",
           "field_noise"]

_NAN33 = np.full((3, 3), np.nan)
# A gyro-based estimate whose outlier fence rejects more than this fraction of its rows is left out:
# glitches are rare in a cleaned log, while a time base off by a fraction of a period misplaces one
# step per period (14 % of the rows on a simulated 10 Hz, 1 s period pass; 0 with the right time
# base) and the fence hides the misfit (common practice, no source)
MAX_REJECTED_FRACTION = 0.01


@dataclass(frozen=True)
class CrosstalkEstimates:
    """The crosstalk estimates of one calibration and their combination (``fusion`` None without
    coils), the consistency test, and notes."""

    step: StepFit | None
    synchronous: SynchronousFit | None
    fusion: CrosstalkFusion | None
    agreement: CrosstalkAgreement
    notes: tuple[str, ...]


def estimate_crosstalk(inputs: CalibrationInputs, gyro: GyroRates | None, controller_read, free: MagnitudeFit,
                       dipole_per_amp, prior_sigma) -> CrosstalkEstimates:
    """The step and synchronous estimates, and the combination of all three with the prior."""
    step = step_estimate(inputs, gyro, controller_read)
    sync = synchronous_estimate(inputs, gyro)
    if not inputs.coils:
        none = CrosstalkAgreement(None, 0, None, None, _NAN33, (), "no coil currents: nothing compared")
        return CrosstalkEstimates(step, sync, None, none, ())
    (_, _, k_mag), _ = reported(free)
    estimates = [CrosstalkEstimate("magnitude", k_mag, free.covariance[ParamIndex.CROSSTALK, ParamIndex.CROSSTALK])]
    notes = _reasons("magnitude estimate", {n: w for n, w in free.undetermined.items() if n.startswith("crosstalk_")})
    for name, fit in (("step", step), ("synchronous", sync)):
        if fit is None:
            continue
        notes += _reasons(f"{name} estimate", fit.undetermined)
        if fit.n_rejected > MAX_REJECTED_FRACTION * max(fit.n_pairs, 1):
            notes += (f"{name} estimate left out: {fit.n_rejected} of {fit.n_pairs} rows lie beyond its outlier fence "
                      f"(more than {100 * MAX_REJECTED_FRACTION:g} %): its model misses something systematic, such "
                      f"as a wrong magnetometer time offset or coil-log time base (one row per control period)",)
            continue
        estimates.append(CrosstalkEstimate(name, fit.crosstalk_nT_per_A, fit.covariance))
    sigma_p = (prior_sigma_nT_per_A(dipole_per_amp) if prior_sigma is None
               else np.asarray(prior_sigma, dtype=float).reshape(3))
    fusion = fuse_crosstalk(estimates, sigma_p)
    notes += (prior_note(sigma_p) if prior_sigma is None else
              f"crosstalk prior: zero +- {', '.join(f'{v:.0f}' for v in sigma_p)} nT/A per element (given)",)
    n_used = len(fusion.estimates)
    used = (" and ".join(fusion.estimates) + (" estimates" if n_used > 1 else " estimate") if n_used
            else "estimates (none gives a value)")
    notes += (f"crosstalk: {fusion.n_determined} of 9 directions determined (prior variance shrunk at least "
              f"{fusion.min_variance_shrink:g} times by the {used}); the others are held at the prior",)
    if fusion.prior_widening > 1.0:
        notes += (f"crosstalk prior widened {fusion.prior_widening:.3g} times: the data show a crosstalk larger "
                  f"than the geometric prior expects (the widening that makes them most likely)",)
    if fusion.left_out is not None:
        notes += (f"crosstalk: the {fusion.left_out} estimate disagrees with the others and is left out",)
    return CrosstalkEstimates(step, sync, fusion, fusion.agreement, notes)


def _reasons(label: str, undetermined: dict[str, str]) -> tuple[str, ...]:
    """One note per reason: ``<label>: <names> undetermined: <reason>``."""
    by_reason: dict[str, list[str]] = {}
    for name, why in undetermined.items():
        by_reason.setdefault(why, []).append(name)
    return tuple(f"{label}: {', '.join(names)} undetermined: {why}" for why, names in by_reason.items())


def undetermined_parameters(fit: MagnitudeFit, free: MagnitudeFit, est: CrosstalkEstimates) -> dict[str, str]:
    """Parameter name -> reason: bias and soft iron from the fit with K held, crosstalk from the
    combination (elements whose variance is not shrunk enough), with each estimate's own reason."""
    out = {n: w for n, w in fit.undetermined.items() if not n.startswith("crosstalk_")}
    fusion = est.fusion
    if fusion is None:
        out.update({n: w for n, w in free.undetermined.items() if n.startswith("crosstalk_")})
        return out
    own = [("magnitude", free.undetermined)] + [(name, f.undetermined) for name, f in
                                                (("step", est.step), ("synchronous", est.synchronous)) if f is not None]
    for j in range(3):
        for c in range(3):
            if fusion.elements_determined[j, c]:
                continue
            name = crosstalk_name(j, c)
            why = (f"held at the prior (its part along the undetermined directions is zero), 1-sigma "
                   f"{fusion.sigma_nT_per_A[j, c]:.0f} nT/A: the data shrink its prior variance less than "
                   f"{fusion.min_variance_shrink:g} times")
            why += "".join(f"; {label} estimate: {u[name]}" for label, u in own if name in u)
            out[name] = why
    return out


@dataclass(frozen=True)
class FieldNoise:
    """The calibrated field's noise: ``crosstalk_cov_nT2`` (N, 3, 3) body or None, ``sigma_nT`` (N, 3)
    body, and ``rms_nT`` per axis over the usable samples."""

    crosstalk_cov_nT2: np.ndarray | None
    sigma_nT: np.ndarray
    rms_nT: float


def field_noise(inputs: CalibrationInputs, fusion: CrosstalkFusion | None, soft, b_body) -> FieldNoise:
    """The sensor noise plus the crosstalk's uncertainty at the currents each sample saw, through
    ``M S^-1`` into the body frame (a coil of unknown current counts at its maximum)."""
    n = len(inputs.t_s)
    white = inputs.noise_nT**2
    if fusion is None or inputs.i_apply_A is None:
        sigma = np.full((n, 3), inputs.noise_nT)
        return FieldNoise(None, sigma, float(inputs.noise_nT))
    i = np.where(np.isfinite(inputs.i_apply_A), inputs.i_apply_A, inputs.max_current_A[None, :])
    cov_sensor = field_covariance_nT2(fusion.covariance, i)
    a = inputs.sensor_to_body @ np.linalg.inv(soft)
    cov_body = np.einsum("ab,nbc,dc->nad", a, cov_sensor, a)
    sigma = np.sqrt(white + np.einsum("naa->na", cov_body))
    ok = np.all(np.isfinite(b_body), axis=1)
    rms = float(np.sqrt(np.mean(sigma[ok] ** 2))) if ok.any() else float(inputs.noise_nT)
    return FieldNoise(cov_body, sigma, rms)
