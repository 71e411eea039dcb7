"""What flight never gives exactly: the imperfections a flight-like simulated pass carries.

Each is drawn at random per pass within a stated range and recorded in truth.json, so a test can
recover it and a scorecard can measure how recon copes. The ranges are common practice for a
magnetically controlled small satellite (no source) unless a line says otherwise.

- inertia: the true principal moments differ from the mission file's by 1-5 % each (random sign) and
  the principal axes are tilted by up to 2 deg, which adds small products of inertia;
- a residual magnetic dipole of the spacecraft: 1-5 mA m^2 per axis, constant;
- magnetometer alignment: the true sensor axes are rotated from the nominal mounting by 0.3-1 deg
  (so the full scale-and-soft-iron matrix is no longer symmetric);
- magnetometer time tags: every stamp late or early by a constant up to 0.3 s (an onboard stamping
  latency); the coil and gyro logs keep their own stamps;
- gyro: scale-factor errors up to 3 % and axis non-orthogonality up to 1 % (a symmetric matrix: the
  gyro's mean axes define the body frame, so the magnetometer's misalignment is relative to them), and
  a full-scale range (set by the regime; a fast tumble exceeds it, so samples clip);
- the field the reference model leaves out: "quiet" about 100 nT rms or "disturbed" (storm) about
  500 nT rms, part of it correlated along the orbit over minutes (a Gauss-Markov process) besides the
  large-scale part;
- the TLE in the mission file is an older element set than the one that flew: several km along track;
- the coil-current log is written once per control period at a phase inside the coils' on-window, not
  at the command, and the commanded current starts flowing a fixed latency after the tick.

References
----------
Alken, P. et al. (2025). International Geomagnetic Reference Field: the fourteenth generation.
Earth, Planets and Space 77, 79 (IGRF leaves out crustal and external fields of ~100 nT in quiet
conditions (memory); several hundred nT in a storm (memory)).
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np
from scipy.spatial.transform import Rotation

from ..core import RAD_PER_DEG

__all__ = ["Imperfections", "DrawnImperfections", "IMPERFECTION_NAMES", "draw_imperfections", "ideal_imperfections"]

IMPERFECTION_NAMES = ("inertia", "residual_dipole", "mag_misalignment", "mag_time_offset", "gyro_scale",
                      "unmodelled_field", "tle_age", "coil_log_phase", "actuation_latency")


@dataclass(frozen=True)
class Imperfections:
    """Ranges of the imperfections of a flight-like pass (a range of (0, 0) switches one off).

    Attributes
    ----------
    inertia_error : (lo, hi), relative error of each principal moment (random sign)
    inertia_axes_tilt_deg : float, largest tilt of the principal axes, deg
    residual_dipole_Am2 : (lo, hi), magnitude per axis (random sign), A m^2
    mag_misalignment_deg : (lo, hi), angle of the sensor-axes rotation (random axis), deg
    mag_time_offset_s : (lo, hi), stamp minus true sample instant, s (uniform)
    gyro_scale_error : float, largest scale-factor error per axis (uniform, +-)
    gyro_misalignment : float, largest off-diagonal coupling (uniform, +-, symmetric)
    disturbed_probability : float, chance that the field is "disturbed" rather than "quiet"
    unmodelled_quiet_nT, unmodelled_disturbed_nT : (lo, hi) rms of the unmodelled field, nT
    unmodelled_correlation_s : (lo, hi), correlation time of its Gauss-Markov part, s
    unmodelled_correlated_fraction : float, share of its variance in the Gauss-Markov part
    tle_along_track_km : (lo, hi), along-track error of the mission file's TLE at the pass start, km
        (random sign)
    tle_drift_km_per_orbit : float, largest growth of that error over one orbit, km (uniform, +-)
    coil_log_phase : (lo, hi), instant of the coil log within the control period, as a fraction of
        the coils' on-window
    actuation_latency_s : (lo, hi), tick to current flowing, s (healthy)
    """

    inertia_error: tuple[float, float] = (0.01, 0.05)
    inertia_axes_tilt_deg: float = 2.0
    residual_dipole_Am2: tuple[float, float] = (0.001, 0.005)
    mag_misalignment_deg: tuple[float, float] = (0.3, 1.0)
    mag_time_offset_s: tuple[float, float] = (-0.3, 0.3)
    gyro_scale_error: float = 0.03
    gyro_misalignment: float = 0.01
    disturbed_probability: float = 0.25
    unmodelled_quiet_nT: tuple[float, float] = (80.0, 120.0)
    unmodelled_disturbed_nT: tuple[float, float] = (400.0, 600.0)
    unmodelled_correlation_s: tuple[float, float] = (120.0, 600.0)
    unmodelled_correlated_fraction: float = 0.5
    tle_along_track_km: tuple[float, float] = (2.0, 8.0)
    tle_drift_km_per_orbit: float = 2.0
    coil_log_phase: tuple[float, float] = (0.2, 0.8)
    actuation_latency_s: tuple[float, float] = (0.02, 0.15)

    def only(self, *names: str) -> Imperfections:
        """These ranges with every imperfection switched off except ``names`` (see IMPERFECTION_NAMES)."""
        unknown = sorted(set(names) - set(IMPERFECTION_NAMES))
        if unknown:
            raise ValueError(f"Expected imperfections among {IMPERFECTION_NAMES}, got {unknown}")
        off = {name: _OFF[name] for name in IMPERFECTION_NAMES if name not in names}
        return dataclasses.replace(self, **{k: v for d in off.values() for k, v in d.items()})


# the settings that switch each imperfection off
_OFF = {
    "inertia": {"inertia_error": (0.0, 0.0), "inertia_axes_tilt_deg": 0.0},
    "residual_dipole": {"residual_dipole_Am2": (0.0, 0.0)},
    "mag_misalignment": {"mag_misalignment_deg": (0.0, 0.0)},
    "mag_time_offset": {"mag_time_offset_s": (0.0, 0.0)},
    "gyro_scale": {"gyro_scale_error": 0.0, "gyro_misalignment": 0.0},
    "unmodelled_field": {"disturbed_probability": 0.0, "unmodelled_quiet_nT": (100.0, 100.0),
                         "unmodelled_correlated_fraction": 0.0},
    "tle_age": {"tle_along_track_km": (0.0, 0.0), "tle_drift_km_per_orbit": 0.0},
    "coil_log_phase": {"coil_log_phase": (0.0, 0.0)},
    "actuation_latency": {"actuation_latency_s": (0.0, 0.0)},
}

@dataclass(frozen=True)
class DrawnImperfections:
    """The imperfections of one pass, as drawn (all zero for ideal hardware).

    Attributes
    ----------
    inertia_true_kg_m2 : (3, 3) the inertia that flies (the mission file keeps the nominal one)
    residual_dipole_Am2 : (3,) body frame
    mag_misalignment_rad : (3,) rotation vector (body axes) from the nominally mounted magnetometer
        axes to the true ones: b_meas = S M^T R(theta)^T b_body + ...
    mag_time_offset_s : float, stamp minus true sample instant
    gyro_scale_misalignment : (3, 3) E in w_meas = (I + E) M^T w_body + ..., sensor frame
    field_condition : "quiet" | "disturbed"; unmodelled_rms_nT : float
    unmodelled_correlation_s : float; unmodelled_correlated_fraction : float
    tle_along_track_km : float, at the pass start; tle_drift_km_per_orbit : float
    coil_log_phase_s : float, coil log instant after each tick, s
    actuation_latency_s : float, tick to current flowing (healthy part), s
    """

    inertia_true_kg_m2: np.ndarray
    residual_dipole_Am2: np.ndarray
    mag_misalignment_rad: np.ndarray
    mag_time_offset_s: float
    gyro_scale_misalignment: np.ndarray
    field_condition: str
    unmodelled_rms_nT: float
    unmodelled_correlation_s: float
    unmodelled_correlated_fraction: float
    tle_along_track_km: float
    tle_drift_km_per_orbit: float
    coil_log_phase_s: float
    actuation_latency_s: float

    def to_truth(self) -> dict:
        """The record in truth.json (plain lists and floats; angles also in degrees)."""
        return {
            "inertia_true_kg_m2": self.inertia_true_kg_m2.tolist(),
            "residual_dipole_Am2": self.residual_dipole_Am2.tolist(),
            "mag_misalignment_body_deg": np.rad2deg(self.mag_misalignment_rad).tolist(),
            "mag_misalignment_angle_deg": float(np.rad2deg(np.linalg.norm(self.mag_misalignment_rad))),
            "mag_time_offset_s": self.mag_time_offset_s,
            "gyro_scale_misalignment": self.gyro_scale_misalignment.tolist(),
            "field_condition": self.field_condition, "unmodelled_rms_nT": self.unmodelled_rms_nT,
            "unmodelled_correlation_s": self.unmodelled_correlation_s,
            "unmodelled_correlated_fraction": self.unmodelled_correlated_fraction,
            "tle_along_track_km": self.tle_along_track_km, "tle_drift_km_per_orbit": self.tle_drift_km_per_orbit,
            "coil_log_phase_s": self.coil_log_phase_s, "actuation_latency_s": self.actuation_latency_s,
        }


def _signed(rng: np.random.Generator, lo_hi: tuple[float, float], size=None):
    lo, hi = lo_hi
    return rng.uniform(lo, hi, size) * rng.choice([-1.0, 1.0], size)


def _inertia(imp: Imperfections, nominal: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """True inertia: nominal principal moments scaled by 1 + e_i, principal axes tilted slightly."""
    lam, vec = np.linalg.eigh(nominal)
    lam_true = lam * (1.0 + _signed(rng, imp.inertia_error, 3))
    tilt_axis = rng.normal(size=3)
    tilt = Rotation.from_rotvec(tilt_axis / np.linalg.norm(tilt_axis)
                                * rng.uniform(0.0, imp.inertia_axes_tilt_deg) * RAD_PER_DEG).as_matrix()
    axes = tilt @ vec
    j = axes @ np.diag(lam_true) @ axes.T
    return 0.5 * (j + j.T)


def ideal_imperfections(nominal_inertia_kg_m2, unmodelled_rms_nT: float) -> DrawnImperfections:
    """No imperfection: the nominal inertia exactly, and only the large-scale unmodelled field."""
    z3 = np.zeros(3)
    return DrawnImperfections(np.array(nominal_inertia_kg_m2, float), z3, z3.copy(), 0.0, np.zeros((3, 3)),
                              "quiet", float(unmodelled_rms_nT), 0.0, 0.0, 0.0, 0.0, 0.0, 0.0)


def draw_imperfections(imp: Imperfections, nominal_inertia_kg_m2, on_window_s: tuple[float, float],
                       rng: np.random.Generator) -> DrawnImperfections:
    """Draw one pass's imperfections within the ranges of ``imp``.

    Parameters
    ----------
    imp : Imperfections
    nominal_inertia_kg_m2 : (3, 3) the mission file's inertia
    on_window_s : (start, stop) of the coils' on-window after each tick, s
    rng : numpy Generator (a stream of its own, so that switching one imperfection off leaves the
        others' draws unchanged)
    """
    nominal = np.asarray(nominal_inertia_kg_m2, float)
    inertia = _inertia(imp, nominal, rng)
    m_r = _signed(rng, imp.residual_dipole_Am2, 3)
    axis = rng.normal(size=3)
    theta = axis / np.linalg.norm(axis) * rng.uniform(*imp.mag_misalignment_deg) * RAD_PER_DEG
    offset = float(np.round(rng.uniform(*imp.mag_time_offset_s), 3))  # the log's stamps are whole ms
    scale = rng.uniform(-imp.gyro_scale_error, imp.gyro_scale_error, 3)
    mis = np.triu(rng.uniform(-imp.gyro_misalignment, imp.gyro_misalignment, (3, 3)), 1)
    e = np.diag(scale) + mis + mis.T  # symmetric: the gyro's axes define the body frame (no rotation part)
    disturbed = bool(rng.random() < imp.disturbed_probability)
    rms = float(rng.uniform(*(imp.unmodelled_disturbed_nT if disturbed else imp.unmodelled_quiet_nT)))
    corr = float(rng.uniform(*imp.unmodelled_correlation_s))
    along = float(_signed(rng, imp.tle_along_track_km))
    drift = float(rng.uniform(-imp.tle_drift_km_per_orbit, imp.tle_drift_km_per_orbit))
    a, b = on_window_s
    phase = float(np.round(a + (b - a) * rng.uniform(*imp.coil_log_phase), 3)) if imp.coil_log_phase[1] > 0 else 0.0
    latency = float(np.round(rng.uniform(*imp.actuation_latency_s), 3))
    return DrawnImperfections(inertia, m_r, theta, offset, e, "disturbed" if disturbed else "quiet", rms, corr,
                              imp.unmodelled_correlated_fraction, along, drift, phase, latency)
