"""The measured field's motion in body axes, read without an attitude: the relation the gyro tests use.

In body axes the measured field obeys ``db/dt = -(w x b) + A db_ref/dt``, where ``A`` is the unknown
attitude and ``db_ref/dt`` the reference field's own turn along the orbit (about 80 nT/s in LEO, as
large as the rotation term at 0.1-0.2 deg/s). With a gyro reading ``w_g = w + beta`` the residual

    e(beta) = P db/dt + (w_g - beta) x b = P A db_ref/dt + noise,        P = I - b b^T / |b|^2,

lies across the field, and its noise-free part has a known length, ``rho = |db_ref/dt across b_ref|``
(a rotation keeps lengths and the angle to the field), but an unknown direction in that plane. So
the residual's *length* is a measurement with a known expectation and no attitude in it: with white
noise of sigma on each axis across the field it follows the Rice distribution of rho and sigma. A
bias fitted to those lengths over a pass does not absorb the field's own turn (a least-squares fit of
``e = 0`` would, by up to rho / |b|, 0.1 deg/s); over a pass the field direction turns in body axes
with the orbit, so one bias is determined even when the body hardly turns.

References
----------
Markley, F. L. and Crassidis, J. L. (2014). Fundamentals of Spacecraft Attitude Determination and
Control. Springer. Sec. 3.3 (kinematics) (memory).
Rice, S. O. (1945). Mathematical analysis of random noise. Bell Syst. Tech. J. 24(1), 46-156
(the density of a sine wave's amplitude in Gaussian noise).
Savitzky, A. and Golay, M. J. E. (1964). Smoothing and differentiation of data by simplified least
squares procedures. Anal. Chem. 36(8), 1627-1639 (the local-slope derivative) (memory).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.special import i0e, i1e

from ..core import local_slope, window_mean

__all__ = ["FieldMotion", "field_motion", "length_moments", "perpendicular_residual",
           "FIELD_TURN_NT_S_AT_1S", "ORBIT_FIELD_TURN_RAD_S", "SLOPE_HALF_WIDTHS_S", "SLOPE_MAX_TURN_RAD",
           "FIELD_STEP_MARGIN_S"]

# The field the reference model leaves out changes the field's own turn: its part correlated over
# minutes (a Gauss-Markov process) has no derivative, and a least-squares slope over +-h of it scatters
# as h^-1/2. For the worst storm of the stated ranges (600 nT rms, half of it correlated over 120 s)
# the slope scatters by 41 nT/s over +-1 s (computed from the process's covariance; 4 nT/s for a quiet
# 100 nT over 300 s). The level of a pass is estimated from its data, bounded by this worst case, so a
# storm cannot pass for a faulty gyro while a quiet pass keeps its precision.
FIELD_TURN_NT_S_AT_1S = 41.0
# Without a reference field the field's own turn is taken as twice the orbital rate of a 500 km orbit
# times |b| (a dipole field seen along a polar orbit turns twice per orbit; 2 x 0.0011 rad/s).
ORBIT_FIELD_TURN_RAD_S = 0.0022
# Half widths of the slopes, s, and the most the body may turn within one: the slope of a line through
# a field turning at w is off by about (w h)^2 / 10 of itself (third-order term of the least-squares
# line), 1 % at 0.3 rad, below the gyro's scale errors; longer slopes beat the magnetometer noise down
# as h^-3/2 (36 nT/s at 1 s, 3.4 nT/s at 5 s for 100 nT at 10 Hz); 0.3 s fits between the steps of a
# field seen with the coils on and a 1 s control period.
SLOPE_HALF_WIDTHS_S = (0.3, 1.0, 2.0, 5.0)
SLOPE_MAX_TURN_RAD = 0.3
# A slope keeps this far after a step of the sensed field (a control tick: the coil current changes a
# short actuation latency after it: up to 0.15 s in a healthy drive, and the stamps may be off by a few
# hundredths of a second) (common practice, no source).
FIELD_STEP_MARGIN_S = 0.25


@dataclass(frozen=True)
class FieldMotion:
    """Independent samples of the field's motion for the attitude-free gyro tests.

    Attributes
    ----------
    t_s : (n,) s; b_body_nT : (n, 3) nT, body axes
    bdot_perp_nT_s : (n, 3) the field's slope across itself, nT/s, body axes
    w_gyro_rad_s : (n, 3) the gyro mean over each slope's window, rad/s, body axes
    rho_nT_s : (n,) length of the reference field's turn across itself, nT/s
    sigma0_nT_s : (n,) 1-sigma per axis of the residual's noise without the unmodelled field's turn, nT/s
    half_width_s : (n,) half width of each slope, s
    """

    t_s: np.ndarray
    b_body_nT: np.ndarray
    bdot_perp_nT_s: np.ndarray
    w_gyro_rad_s: np.ndarray
    rho_nT_s: np.ndarray
    sigma0_nT_s: np.ndarray
    half_width_s: np.ndarray

    def take(self, sel) -> FieldMotion:
        return FieldMotion(self.t_s[sel], self.b_body_nT[sel], self.bdot_perp_nT_s[sel], self.w_gyro_rad_s[sel],
                           self.rho_nT_s[sel], self.sigma0_nT_s[sel], self.half_width_s[sel])

    def sigma(self, field_turn_nT_s: float, scale: float = 1.0) -> np.ndarray:
        """1-sigma per axis with the unmodelled field's turn at ``field_turn_nT_s`` over 1 s slopes, the
        whole scaled by ``scale``, nT/s."""
        return scale * np.sqrt(self.sigma0_nT_s ** 2 + field_turn_nT_s ** 2 / self.half_width_s)


def _across(v: np.ndarray, b: np.ndarray) -> np.ndarray:
    """The part of each row of v across the matching row of b."""
    u = b / np.linalg.norm(b, axis=1, keepdims=True)
    return v - np.sum(v * u, axis=1, keepdims=True) * u


def field_motion(t_mag_s: np.ndarray, b_body_nT: np.ndarray, b_ref_nT: np.ndarray | None, t_gyro_s: np.ndarray,
                 w_gyro_rad_s: np.ndarray, *, mag_noise_nT: float, gyro_arw_rad_sqrt_s: float,
                 gyro_bad: np.ndarray | None = None, rate_model_error: float = 0.0,
                 every_sample: bool = False, half_widths_s: tuple = SLOPE_HALF_WIDTHS_S,
                 field_steps_s: np.ndarray | None = None) -> FieldMotion:
    """The field's motion at independent slopes, with its noise.

    Each slope is a least-squares line through the samples within ``+-h`` (Savitzky-Golay, first
    order), h the longest of ``SLOPE_HALF_WIDTHS_S`` over which the body turns at most
    ``SLOPE_MAX_TURN_RAD`` (the rotation bends the field, and a line's slope is then off by about
    ``(w h)^2 / 10`` of it); the slopes are spaced ``2 h`` apart so that no two share a sample.
    ``half_widths_s`` replaces the candidate half widths (a single short one to locate an event). A
    slope never spans one of ``field_steps_s`` (instants where the field the magnetometer sees can
    jump: a control tick, when the coils are on while it samples) or the ``FIELD_STEP_MARGIN_S`` after
    it; the longest half width that spans none is taken.

    Parameters
    ----------
    t_mag_s : (N,) s, increasing; b_body_nT : (N, 3) nT, calibrated, body axes
    b_ref_nT : (N, 3) nT, reference field (any inertial frame), or None (its turn is then taken as
        ``ORBIT_FIELD_TURN_RAD_S |b|``)
    t_gyro_s : (G,) s; w_gyro_rad_s : (G, 3) rad/s, body axes
    mag_noise_nT : white noise of one magnetometer sample, nT per axis
    gyro_arw_rad_sqrt_s : the gyro's angle random walk, rad/sqrt(s)
    gyro_bad : (G,) bool, gyro samples not to use (clipped at the range); slopes whose window holds
        one are left out
    rate_model_error : fraction of ``|w| |b|`` added to the noise (scale and alignment errors the
        window's constant bias does not absorb)
    every_sample : a slope at every sample (neighbours then share data: for locating an event, not
        for tests)
    field_steps_s : (S,) s, instants where the sensed field can jump, or None

    Returns
    -------
    FieldMotion
    """
    t = np.asarray(t_mag_s, float)
    b = np.asarray(b_body_nT, float)
    ok = np.all(np.isfinite(b), axis=1)
    t, b = t[ok], b[ok]
    ref = None if b_ref_nT is None else np.asarray(b_ref_nT, float)[ok]
    tg = np.asarray(t_gyro_s, float)
    wg = np.asarray(w_gyro_rad_s, float)
    rate = np.linalg.norm(window_mean(tg, wg, t, min(half_widths_s)), axis=1)
    steps = np.sort(np.asarray(field_steps_s, float)) if field_steps_s is not None else np.zeros(0)
    h_of = np.full(len(t), np.nan)
    for h in sorted(half_widths_s):
        ok_h = rate * h <= SLOPE_MAX_TURN_RAD
        if len(steps):
            ok_h &= (np.searchsorted(steps, t - h - FIELD_STEP_MARGIN_S, side="left")
                     == np.searchsorted(steps, t + h, side="right"))
        h_of[ok_h] = h
    if not len(steps):
        h_of[~np.isfinite(h_of)] = min(half_widths_s)
    usable = np.nonzero(np.isfinite(h_of))[0]
    if len(usable) < 3:
        z = np.zeros((0, 3))
        return FieldMotion(np.zeros(0), z, z, z, np.zeros(0), np.zeros(0), np.zeros(0))
    picks = usable if every_sample else usable[_independent(t[usable], h_of[usable])]
    hp = h_of[picks]
    bdot = np.full((len(picks), 3), np.nan)
    w = np.full((len(picks), 3), np.nan)
    rdot = np.full((len(picks), 3), np.nan)
    for h in half_widths_s:
        m = hp == h
        if not m.any():
            continue
        bdot[m] = local_slope(t, b, h)[picks[m]]
        w[m] = window_mean(tg, wg, t[picks[m]], h)
        if ref is not None:
            rdot[m] = local_slope(t, ref, h)[picks[m]]
    bp = b[picks]
    bn = np.linalg.norm(bp, axis=1)
    rho = (np.linalg.norm(_across(rdot, ref[picks]), axis=1) if ref is not None else ORBIT_FIELD_TURN_RAD_S * bn)
    dt = float(np.median(np.diff(t)))
    n = np.maximum(np.round(2.0 * hp / dt) + 1, 2)
    slope_var = mag_noise_nT ** 2 * 12.0 / (n * (n * n - 1) * dt * dt)
    gyro_var = gyro_arw_rad_sqrt_s ** 2 / (2.0 * hp) * bn ** 2
    model_var = (rate_model_error * np.linalg.norm(w, axis=1) * bn) ** 2
    sigma0 = np.sqrt(slope_var + gyro_var + model_var)
    keep = np.all(np.isfinite(bdot), axis=1) & np.all(np.isfinite(w), axis=1) & np.isfinite(rho)
    # a slope whose window reaches past the gyro log, or holds a clipped sample, says nothing of the gyro
    tp = t[picks]
    keep &= (tp - hp >= tg[0]) & (tp + hp <= tg[-1])
    if gyro_bad is not None and np.any(gyro_bad):
        c = np.r_[0, np.cumsum(np.asarray(gyro_bad, int))]
        lo = np.searchsorted(tg, tp - hp, side="left")
        hi = np.searchsorted(tg, tp + hp, side="right")
        keep &= (c[hi] - c[lo]) == 0
    return FieldMotion(tp, bp, _across(bdot, bp), w, rho, sigma0, hp).take(keep)


def _independent(t: np.ndarray, h: np.ndarray) -> np.ndarray:
    """Indices of slopes that share no sample: from the first, each next one at least ``h_i + h_j`` later."""
    out = []
    nxt = -np.inf
    i = 0
    n = len(t)
    while i < n:
        if t[i] - h[i] > nxt:
            out.append(i)
            nxt = t[i] + h[i]
            i = int(np.searchsorted(t, nxt + h[i], side="left"))
        else:
            i += 1
    return np.asarray(out, int)


def perpendicular_residual(fm: FieldMotion, beta_rad_s: np.ndarray) -> np.ndarray:
    """``e(beta) = P db/dt + (w_g - beta) x b``, (n, 3) nT/s, body axes."""
    return fm.bdot_perp_nT_s + np.cross(fm.w_gyro_rad_s - beta_rad_s, fm.b_body_nT)


def length_moments(rho_nT_s: np.ndarray, sigma_nT_s: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Mean and standard deviation of the residual's length ``|x + n|`` for ``|x| = rho`` and white noise
    of sigma on each of the two axes across the field (the Rice distribution).

    ``mean = sigma sqrt(pi/2) L_1/2(-rho^2 / 2 sigma^2)`` with the Laguerre function written through
    exponentially scaled Bessel functions; ``var = 2 sigma^2 + rho^2 - mean^2`` (Rice 1945).
    """
    rho = np.asarray(rho_nT_s, float)
    s = np.asarray(sigma_nT_s, float)
    x = -0.5 * (rho / s) ** 2
    z = -0.5 * x
    mean = s * np.sqrt(np.pi / 2.0) * ((1.0 - x) * i0e(z) - x * i1e(z))
    var = np.maximum(2.0 * s * s + rho * rho - mean * mean, 1e-6 * s * s)
    return mean, np.sqrt(var)
