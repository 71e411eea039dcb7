"""What every stage shares: recon's error and anomaly records, constants, frames and time text, and the
signal and coil-current helpers (one implementation each).

Other packages import from here only (``from ..core import Anomaly, NS_PER_S, applied_current``).
"""

from . import constants, frames
from .anomaly import SEVERITIES, Anomaly
from .coils import (
    HOLD_INTERVALS,
    applied_current,
    control_ticks,
    controller_samples,
    current_log_with_off_windows,
    effective_current,
    held_values,
    in_off_window,
    in_off_window_utc,
    infer_first_tick,
    mean_dipole_over_steps,
    tick_phase,
)
from .constants import (
    A_PER_UNIT,
    DAYS_PER_JULIAN_YEAR,
    DEG_PER_RAD,
    GPS_EPOCH_UTC,
    NS_PER_S,
    NT_PER_T,
    NT_PER_UNIT,
    RAD_PER_DEG,
    RAD_S_PER_UNIT,
    WGS84_E2,
    WGS84_F,
    IGRF_REFERENCE_RADIUS_km,
    MU_EARTH_km3_s2,
    MU_EARTH_m3_s2,
    OMEGA_EARTH_rad_s,
    WGS84_A_km,
)
from .errors import InputError
from .frames import (
    body_from_gcrf,
    cross_matrices,
    geodetic_to_itrf,
    gmst82_rad,
    itrf_to_gcrf_matrix,
    itrf_to_geodetic,
    jd_tt,
    jd_ut1,
    ned_to_itrf_matrix,
    q_from_rotation,
    rotation_from_q,
    scipy_from_shuster_quaternion,
    teme_to_gcrf_matrix,
    teme_to_itrf_matrix,
    utc_to_jd,
)
from .laws import bdot_dipole, cross_product_dipole, currents_from_dipole
from .signal import (
    held_integral,
    held_mean,
    local_slope,
    nearest_rows,
    robust_scale,
    white_noise_from_differences,
    window_mean,
)
from .timetext import seconds_since, utc_at, utc_text, utc_texts
from .version import __version__

__all__ = [
    "constants", "frames",
    "Anomaly", "SEVERITIES", "InputError",
    "A_PER_UNIT", "DAYS_PER_JULIAN_YEAR", "DEG_PER_RAD", "GPS_EPOCH_UTC", "IGRF_REFERENCE_RADIUS_km",
    "MU_EARTH_km3_s2", "MU_EARTH_m3_s2",
    "NS_PER_S", "NT_PER_T", "NT_PER_UNIT", "OMEGA_EARTH_rad_s", "RAD_PER_DEG", "RAD_S_PER_UNIT", "WGS84_E2",
    "WGS84_F", "WGS84_A_km",
    "body_from_gcrf", "geodetic_to_itrf", "gmst82_rad", "itrf_to_gcrf_matrix", "itrf_to_geodetic", "jd_tt",
    "jd_ut1", "ned_to_itrf_matrix", "q_from_rotation", "rotation_from_q", "scipy_from_shuster_quaternion",
    "teme_to_gcrf_matrix", "teme_to_itrf_matrix", "utc_to_jd",
    "HOLD_INTERVALS", "applied_current", "control_ticks", "controller_samples", "current_log_with_off_windows",
    "effective_current", "held_values", "in_off_window", "in_off_window_utc", "infer_first_tick",
    "mean_dipole_over_steps", "tick_phase",
    "held_integral", "held_mean", "local_slope", "robust_scale", "white_noise_from_differences", "window_mean",
    "nearest_rows",
    "utc_text", "utc_texts", "seconds_since", "utc_at", "cross_matrices", "__version__",
    "bdot_dipole", "cross_product_dipole", "currents_from_dipole",
]
