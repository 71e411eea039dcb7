"""One run of the compiled filter: the parameter vector from the noise model, the forward MEKF and the
RTS smoother over a step grid, and the estimate on the output rows as a :class:`Track`.

The model and its references are in :mod:`recon.estimate.kernels`.

References
----------
Schweppe, F. C. (1965). Evaluation of likelihood functions for Gaussian signals. IEEE Trans. Inform.
Theory 11(1), 61-70 (the likelihood from the filter's innovations) (memory).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..core import MU_EARTH_m3_s2
from .initial import InitialState
from .kernels import (
    MODE_GYRO,
    N_PRM,
    NP,
    P_ACC,
    P_HNOM,
    P_J,
    P_JINV,
    P_MU,
    P_SIGF,
    P_SIGM,
    P_SIGTAU,
    P_SU,
    P_SV,
    P_TAUF,
    P_TAUREL,
    N,
    forward_pass,
    smoother_pass,
    unpack_covariance,
)
from .types import NoiseModel, Track

__all__ = ["filter_params", "FilterRun", "run_filter", "forward_innovations", "forward_log_likelihood", "extract_track"]


def filter_params(noise: NoiseModel, h_nom: float, inertia: np.ndarray | None) -> np.ndarray:
    """The kernels' parameter vector (layout in :mod:`recon.estimate.kernels.layout`).

    Parameters
    ----------
    noise : NoiseModel with every level filled in (None levels of the gyro count as 0)
    h_nom : float, nominal gyro interval, s (0 in dynamics mode)
    inertia : (3, 3) kg m^2, or None (gyro mode)
    """
    prm = np.zeros(N_PRM)
    prm[P_SV] = noise.gyro_arw_rad_sqrt_s or 0.0
    prm[P_SU] = noise.gyro_bias_walk_rad_s_sqrt_s
    prm[P_ACC] = noise.rate_hold_accel_rad_s2 or 0.0
    prm[P_HNOM] = h_nom
    prm[P_TAUF] = noise.field_model_tau_s
    prm[P_SIGF] = noise.field_model_nT / np.sqrt(3.0)
    prm[P_SIGM] = noise.mag_nT
    prm[P_SIGTAU] = noise.torque_noise_Nm_sqrt_s
    prm[P_TAUREL] = noise.coil_torque_rel_error
    prm[P_MU] = MU_EARTH_m3_s2
    if inertia is not None:
        prm[P_J:P_J + 9] = np.asarray(inertia, float).ravel()
        prm[P_JINV:P_JINV + 9] = np.linalg.inv(inertia).ravel()
    return prm


@dataclass
class FilterRun:
    """Everything one forward + backward run produced, on the step grid.

    Attributes
    ----------
    t : (K,) s
    q_f, v_f, db_f : (K, 4), (K, 3), (K, 3) forward attitude, bias or rate, field-model error
    p_f : (K, NP) forward covariances, packed upper triangles
    nis : (K,) NIS of each update (NaN where there is none)
    q_s, v_s, db_s : the smoothed estimate, as the forward one
    p_s6 : (M, 6, 6) smoothed attitude/rate covariance of each output row
    smoother_bad : int, steps where P- was not positive definite
    """

    t: np.ndarray
    q_f: np.ndarray
    v_f: np.ndarray
    db_f: np.ndarray
    p_f: np.ndarray
    nis: np.ndarray
    q_s: np.ndarray
    v_s: np.ndarray
    db_s: np.ndarray
    p_s6: np.ndarray
    smoother_bad: int


def run_filter(mode: int, t: np.ndarray, u: np.ndarray, is_mag: np.ndarray, z: np.ndarray, r: np.ndarray,
               prm: np.ndarray, init: InitialState, out_idx: np.ndarray, n_out: int) -> FilterRun:
    """Forward MEKF and RTS smoother on plain arrays (the compiled kernels); see :mod:`recon.estimate.kernels`.

    Parameters
    ----------
    mode : 0 gyro, 1 dynamics
    t : (K,) s; u : (K, c) per-step inputs; is_mag : (K,) bool; z : (K, 3) nT body; r : (K, 3) nT GCRF
    prm : parameter vector; init : starting state at t[0]
    out_idx : (K,) row of each step in the output (-1: not output); n_out : number of output rows

    Notes
    -----
    Memory: the forward covariances are kept for the smoother, the upper triangle of K 9 x 9 matrices
    (360 bytes a step, 0.36 GB for a million steps), plus the 6 x 6 smoothed block of each output
    row (288 bytes, 0.29 GB).
    """
    kk = len(t)
    p0 = _initial_covariance(init, prm)
    q_f = np.empty((kk, 4))
    v_f = np.empty((kk, 3))
    db_f = np.empty((kk, 3))
    p_f = np.empty((kk, NP))
    nis = np.empty(kk)
    innov = np.empty((kk, 4))
    forward_pass(mode, t, u, is_mag, z, r, prm, np.asarray(init.q_body_from_gcrf, float),
                 np.asarray(init.v, float), np.zeros(3), p0, q_f, v_f, db_f, p_f, nis, innov)
    q_s = np.empty((kk, 4))
    v_s = np.empty((kk, 3))
    db_s = np.empty((kk, 3))
    p_s6 = np.empty((n_out, 6, 6))
    bad = smoother_pass(mode, t, u, r, prm, q_f, v_f, db_f, p_f, out_idx, q_s, v_s, db_s, p_s6,
                        np.empty((0, N, N)))
    return FilterRun(t, q_f, v_f, db_f, p_f, nis, q_s, v_s, db_s, p_s6, int(bad))


def forward_innovations(mode: int, t: np.ndarray, u: np.ndarray, is_mag: np.ndarray, z: np.ndarray,
                        r: np.ndarray, prm: np.ndarray, init: InitialState, log_det: bool = False) -> np.ndarray:
    """The forward MEKF alone, for its whitened innovations: (K, 3), NaN where there is no update
    (with ``log_det``: (K, 4), the fourth column log det S of each update, S in nT^2).

    Their sum of squares is the sum of the NIS, minus twice the log-likelihood of the measurements up
    to the log-determinant terms: what a maximum-likelihood fit of parameters around the filter
    minimises (Gauss-Newton on the stacked whitened innovations). A fit of the noise levels needs the
    log-determinants too (:func:`forward_log_likelihood`).
    """
    kk = len(t)
    p0 = _initial_covariance(init, prm)
    white = np.empty((kk, 4))
    forward_pass(mode, t, u, is_mag, z, r, prm, np.asarray(init.q_body_from_gcrf, float), np.asarray(init.v, float),
                 np.zeros(3), p0, np.empty((kk, 4)), np.empty((kk, 3)), np.empty((kk, 3)), np.empty((kk, NP)),
                 np.empty(kk), white)
    return white if log_det else white[:, :3]


def forward_log_likelihood(mode: int, t: np.ndarray, u: np.ndarray, is_mag: np.ndarray, z: np.ndarray,
                           r: np.ndarray, prm: np.ndarray, init: InitialState) -> float:
    """-2 log-likelihood of the magnetometer updates under the filter's model, without the constant:
    the sum over updates of NIS + log det S (the prediction-error decomposition; Schweppe 1965)."""
    white = forward_innovations(mode, t, u, is_mag, z, r, prm, init, log_det=True)
    ok = np.isfinite(white).all(axis=1)
    return float(np.sum(white[ok, :3] ** 2) + np.sum(white[ok, 3]))


def _initial_covariance(init: InitialState, prm: np.ndarray) -> np.ndarray:
    p0 = np.zeros((N, N))
    p0[:3, :3] = np.diag(init.sigma_att_rad ** 2)
    p0[3:6, 3:6] = np.diag(init.sigma_v ** 2)
    p0[6:, 6:] = np.eye(3) * prm[P_SIGF] ** 2
    return p0


def extract_track(run: FilterRun, smoothed: bool, sel: np.ndarray, mode: int, w_out: np.ndarray | None,
                  rate_var_extra: float) -> Track:
    """The forward or smoothed estimate at the steps ``sel`` (the output rows) as a :class:`Track`.

    Gyro mode: the body rate is ``w_out`` (the mean gyro rate at each output row) less the estimated
    bias, its variance that of the bias plus ``rate_var_extra`` ((rad/s)^2, the white noise left in
    w_out). Dynamics mode: the state's body rate; the bias is NaN. Quaternions have w >= 0.
    """
    q = (run.q_s if smoothed else run.q_f)[sel]
    v = (run.v_s if smoothed else run.v_f)[sel]
    db = (run.db_s if smoothed else run.db_f)[sel]
    cov = run.p_s6 if smoothed else unpack_covariance(run.p_f[sel], 6)
    d = np.sqrt(np.clip(np.diagonal(cov, axis1=1, axis2=2), 0.0, None))
    if mode == MODE_GYRO:
        w = w_out - v
        bias = v
        s_rate = np.sqrt(d[:, 3:] ** 2 + rate_var_extra)
    else:
        w = v
        bias = np.full_like(v, np.nan)
        s_rate = d[:, 3:]
    q = np.where(q[:, 3:4] < 0, -q, q)
    return Track(q, w, bias, d[:, :3], s_rate, cov, db)
