"""Sensor models of the simulated satellite: the magnetometer (with coil crosstalk) and the gyro.

Magnetometer, in the sensor frame (M is ``sensor_to_body``, v_body = M v_sensor)::

    b_meas = clip(quantise(S (M^T R^T b_body) + bias + K i + noise), +-full_scale)

S (soft iron and scale factor, symmetric, near identity), bias (nT) and K (nT per A of coil current)
all act in the magnetometer's own frame; i is the current actually flowing in the coils. R is the
misalignment of the true sensor axes from the nominal mounting, a small rotation in body axes (the
identity on ideal hardware); the full matrix ``S M^T R^T M`` is then not symmetric.

Gyro, in the sensor frame, at a fixed step dt (Reynolds 2003, the discrete form of the model
``w_meas = w + beta + eta_v, d(beta)/dt = eta_u`` used by the MEKF)::

    beta_{k+1} = beta_k + su sqrt(dt) N(0, 1)
    w_meas_k  = (I + E) M^T w_k + (beta_{k+1} + beta_k) / 2 + sqrt(sv^2 / dt + su^2 dt / 12) N(0, 1)

with sv the angle random walk (rad/sqrt(s)) and su the rate random walk (rad/s/sqrt(s)), E the
scale-factor errors (diagonal) and axis misalignments (off-diagonal), zero on ideal hardware, and
the output clipped at the full scale.

References
----------
Reynolds, R. G. (2003). Asymptotically optimal attitude filtering with guaranteed convergence.
NASA CP-2003-212246 (Flight Mechanics Symposium), the discrete gyro simulation.
Crassidis, J. L. and Junkins, J. L. (2012). Optimal Estimation of Dynamic Systems, 2nd ed.,
sec. 7.2 (gyro model).
Alonso, R. and Shuster, M. D. (2002). TWOSTEP: a fast robust algorithm for attitude-independent
magnetometer-bias determination. J. Astronaut. Sci. 50(4), 433-452 (the bias / soft-iron model).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["MagnetometerHardware", "draw_magnetometer", "magnetometer_reading_nT",
           "GyroNoise", "gyro_bias_path", "gyro_reading_rad_s", "random_symmetric"]


def random_symmetric(rng: np.random.Generator, sigma: float) -> np.ndarray:
    """A symmetric 3x3 matrix with independent N(0, sigma) entries on and above the diagonal."""
    a = rng.normal(0.0, sigma, (3, 3))
    return np.triu(a) + np.triu(a, 1).T


@dataclass(frozen=True)
class MagnetometerHardware:
    """The true magnetometer, sensor frame.

    Attributes
    ----------
    sensor_to_body : (3, 3) M, v_body = M v_sensor
    S : (3, 3) soft iron and scale (symmetric, near identity)
    bias_nT : (3,) nT
    K_nT_per_A : (3, 3) nT per A: field at the sensor from each coil's current
    noise_nT : float, 1 sigma per axis
    lsb_nT : float, quantisation step
    full_scale_nT : float, readings clip at +-full_scale_nT
    misalignment_body : (3, 3) R, rotation from the nominal sensor axes to the true ones, body axes
    """

    sensor_to_body: np.ndarray
    S: np.ndarray
    bias_nT: np.ndarray
    K_nT_per_A: np.ndarray
    noise_nT: float
    lsb_nT: float
    full_scale_nT: float
    misalignment_body: np.ndarray | None = None

    @property
    def S_full(self) -> np.ndarray:
        """The full scale-and-alignment matrix in the sensor frame, ``S M^T R^T M`` (not symmetric)."""
        if self.misalignment_body is None:
            return self.S
        m = self.sensor_to_body
        return self.S @ m.T @ self.misalignment_body.T @ m


def draw_magnetometer(rng: np.random.Generator, sensor_to_body: np.ndarray, *, noise_nT: float,
                      lsb_nT: float, full_scale_nT: float, soft_iron_sigma: float = 0.015,
                      bias_range_nT: tuple[float, float] = (300.0, 3000.0),
                      crosstalk_range_nT_per_A: tuple[float, float] = (800.0, 2500.0),
                      crosstalk_body_diag_nT_per_A: np.ndarray | None = None) -> MagnetometerHardware:
    """Draw a plausible magnetometer: bias of a few hundred to a few thousand nT per axis (random
    sign), soft iron within a few per cent of identity, and a crosstalk column per coil of 800-2500
    nT/A in a random direction (about 100-300 nT at 0.12 A).

    ``crosstalk_body_diag_nT_per_A`` (3,), if given, replaces K by ``M^T diag(k) + small``: each
    coil's field at the sensor lies along that coil's own body axis (the large, aligned crosstalk of
    a magnetometer mounted next to the coils).
    """
    S = np.eye(3) + random_symmetric(rng, soft_iron_sigma)
    bias = rng.uniform(*bias_range_nT, 3) * rng.choice([-1.0, 1.0], 3)
    direction = rng.normal(size=(3, 3))
    direction /= np.linalg.norm(direction, axis=0, keepdims=True)
    K = direction * rng.uniform(*crosstalk_range_nT_per_A, 3)
    if crosstalk_body_diag_nT_per_A is not None:
        K = np.asarray(sensor_to_body).T @ np.diag(crosstalk_body_diag_nT_per_A) + 0.05 * K
    return MagnetometerHardware(np.asarray(sensor_to_body, float), S, bias, K, float(noise_nT),
                                float(lsb_nT), float(full_scale_nT))


def magnetometer_reading_nT(hw: MagnetometerHardware, b_body_nT: np.ndarray, i_coil_A: np.ndarray,
                            noise_unit: np.ndarray) -> np.ndarray:
    """What the magnetometer reports, sensor frame, nT.

    Parameters
    ----------
    hw : MagnetometerHardware
    b_body_nT : (N, 3) true field at the satellite, nT, body frame
    i_coil_A : (N, 3) current flowing in the coils at the sample instants, A
    noise_unit : (N, 3) standard normal draws (scaled here by ``hw.noise_nT``)

    Returns
    -------
    (N, 3) array, nT, sensor frame: quantised to ``lsb_nT`` and clipped at ``full_scale_nT``
    """
    b_body = np.asarray(b_body_nT)
    if hw.misalignment_body is not None:
        b_body = b_body @ hw.misalignment_body  # rows of R^T b
    b_sensor = b_body @ hw.sensor_to_body  # rows of M^T b
    raw = b_sensor @ hw.S.T + hw.bias_nT + np.asarray(i_coil_A) @ hw.K_nT_per_A.T + hw.noise_nT * noise_unit
    if hw.lsb_nT > 0:
        raw = np.round(raw / hw.lsb_nT) * hw.lsb_nT
    return np.clip(raw, -hw.full_scale_nT, hw.full_scale_nT)


@dataclass(frozen=True)
class GyroNoise:
    """Gyro error parameters (sensor frame).

    Attributes
    ----------
    sensor_to_body : (3, 3)
    arw_rad_sqrt_s : float, sv, angle random walk, rad/sqrt(s) (= rad/s per sqrt(Hz))
    rrw_rad_s_sqrt_s : float, su, rate random walk of the bias, rad/s/sqrt(s)
    bias0_rad_s : (3,) initial bias, rad/s
    full_scale_rad_s : float
    scale_misalignment : (3, 3) E, scale-factor errors and axis misalignments, sensor frame, or None
    """

    sensor_to_body: np.ndarray
    arw_rad_sqrt_s: float
    rrw_rad_s_sqrt_s: float
    bias0_rad_s: np.ndarray
    full_scale_rad_s: float
    scale_misalignment: np.ndarray | None = None


def gyro_bias_path(g: GyroNoise, n: int, dt_s: float, walk_unit: np.ndarray,
                   jumps: list[tuple[int, int, float]] = ()) -> np.ndarray:
    """Bias ``beta_0 .. beta_n`` (n + 1, 3), rad/s, sensor frame (Reynolds 2003).

    ``walk_unit`` (n, 3) standard normal draws; ``jumps`` adds ``(k, axis, value)``: from
    beta_k on, the bias of ``axis`` is larger by ``value`` rad/s.
    """
    steps = g.rrw_rad_s_sqrt_s * np.sqrt(dt_s) * walk_unit
    beta = np.vstack([g.bias0_rad_s, g.bias0_rad_s + np.cumsum(steps, axis=0)])
    for k, axis, value in jumps:
        beta[k:, axis] += value
    return beta


def gyro_reading_rad_s(g: GyroNoise, w_body_rad_s: np.ndarray, beta: np.ndarray, dt_s: float,
                       white_unit: np.ndarray) -> np.ndarray:
    """Gyro output, sensor frame, rad/s, (n, 3) (Reynolds 2003).

    Parameters
    ----------
    w_body_rad_s : (n, 3) true rate at the sample instants, body frame
    beta : (n + 1, 3) bias path from :func:`gyro_bias_path`
    white_unit : (n, 3) standard normal draws
    """
    sigma = np.sqrt(g.arw_rad_sqrt_s ** 2 / dt_s + g.rrw_rad_s_sqrt_s ** 2 * dt_s / 12.0)
    w_sensor = np.asarray(w_body_rad_s) @ g.sensor_to_body
    if g.scale_misalignment is not None:
        w_sensor = w_sensor @ (np.eye(3) + g.scale_misalignment).T
    out = w_sensor + 0.5 * (beta[1:] + beta[:-1]) + sigma * white_unit
    return np.clip(out, -g.full_scale_rad_s, g.full_scale_rad_s)
