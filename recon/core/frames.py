"""Frames, time scales and the quaternion convention: stated once, here.

Quaternion convention
---------------------
Quaternions are scalar-last ``[x, y, z, w]``, scipy's convention. ``q_body_from_gcrf`` is the rotation
with ``Rotation.from_quat(q).apply(v_gcrf) == v_body``, i.e. ``as_matrix(q) @ v_gcrf == v_body``: the
attitude matrix that takes GCRF components of a vector into body components. A rotation of +90 deg
about z applied this way takes the GCRF x axis to body +y, which means the body axes are the GCRF
axes turned by -90 deg about z (tests pin this).

Frames
------
- GCRF: the inertial frame. Here realised with the IAU 2006/2000A precession-nutation and the Earth
  rotation angle (IERS Conventions 2010), through pyerfa's ``c2t06a``; polar motion is neglected
  (about 10 m at the Earth's surface), so ITRF here is the terrestrial intermediate frame.
- TEME: the frame of SGP4's output, as defined in Vallado, Crawford, Hujsak & Kelso (2006), "Revisiting
  Spacetrack Report #3", AIAA 2006-6753, Appendix C: ``r_PEF = R3(GMST82) r_TEME`` with GMST from the
  IAU-82 formula. TEME exists only on the way to ITRF and GCRF.
- ITRF <-> geodetic on the WGS-84 ellipsoid (pyerfa ``gc2gd``/``gd2gc``), and local North-East-Down.

Time
----
``time_utc`` arrays are numpy ``datetime64[ns]`` in UTC. TT comes from pyerfa's leap-second table
(``utctai``) plus 32.184 s. UT1 - UTC (``dut1_s``) defaults to 0: without Earth orientation data
the Earth's angle is then off by up to 0.9 s of rotation (about 0.4 km along track at 400 km height
for a ground point; about 0.004 deg of field direction), well below the field model's own error.
"""

from __future__ import annotations

import erfa
import numpy as np
from scipy.spatial.transform import Rotation

from .constants import WGS84_F, WGS84_A_km

__all__ = [
    "rotation_from_q", "q_from_rotation", "body_from_gcrf",
    "utc_to_jd", "jd_tt", "jd_ut1", "gmst82_rad",
    "teme_to_itrf_matrix", "itrf_to_gcrf_matrix", "teme_to_gcrf_matrix",
    "itrf_to_geodetic", "geodetic_to_itrf", "ned_to_itrf_matrix", "scipy_from_shuster_quaternion", "cross_matrices",
]

_NS_PER_DAY = 86_400 * 1_000_000_000
_UNIX_EPOCH_JD = 2440587.5
TT_MINUS_TAI_s = 32.184  # IAU 1991 Resolution A4 (definition of TT)


# ---------------------------------------------------------------------------------------- quaternions
def rotation_from_q(q_body_from_gcrf: np.ndarray) -> Rotation:
    """The scipy Rotation of ``q_body_from_gcrf`` (..., 4) scalar-last: ``.apply(v_gcrf) == v_body``."""
    return Rotation.from_quat(np.asarray(q_body_from_gcrf, dtype=float))


def q_from_rotation(rot: Rotation) -> np.ndarray:
    """Scalar-last quaternion(s) of a Rotation taking GCRF components to body, with w >= 0."""
    q = np.atleast_2d(rot.as_quat())
    q = np.where(q[:, 3:4] < 0, -q, q)
    return q[0] if rot.single else q


def body_from_gcrf(q_body_from_gcrf: np.ndarray, v_gcrf: np.ndarray) -> np.ndarray:
    """Body components of GCRF vectors: ``(N, 3)`` or ``(3,)`` in, the same out."""
    return rotation_from_q(q_body_from_gcrf).apply(v_gcrf)


# ------------------------------------------------------------------------------------------ time
def utc_to_jd(time_utc: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Two-part Julian date of UTC instants (pyerfa's quasi-JD for UTC, exact to the nanosecond).

    Parameters
    ----------
    time_utc : (N,) datetime64 array, UTC
    """
    ns = np.asarray(time_utc, dtype="datetime64[ns]").astype(np.int64)
    days, rem = np.divmod(ns, _NS_PER_DAY)
    return _UNIX_EPOCH_JD + days.astype(float), rem.astype(float) / _NS_PER_DAY


def jd_tt(time_utc: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Two-part Julian date on the TT scale, via pyerfa's leap-second table."""
    u1, u2 = utc_to_jd(time_utc)
    # erfa's UTC quasi-JD counts a leap-second day as 86401 s: rescale the fraction on such days
    # (datetime64 has no 23:59:60, so the fraction above is always seconds / 86400)
    iy, im, iday, _ = erfa.jd2cal(u1, 0.0)
    ny, nm, nday, _ = erfa.jd2cal(u1 + 1.0, 0.0)
    day_s = 86400.0 + (erfa.dat(ny, nm, nday, 0.0) - erfa.dat(iy, im, iday, 0.0))
    a1, a2 = erfa.utctai(u1, u2 * (86400.0 / day_s))
    return a1, a2 + TT_MINUS_TAI_s / 86400.0


def jd_ut1(time_utc: np.ndarray, dut1_s: float | np.ndarray = 0.0) -> tuple[np.ndarray, np.ndarray]:
    """Two-part Julian date on the UT1 scale; ``dut1_s`` is UT1 - UTC in seconds (0 without EOP)."""
    u1, u2 = utc_to_jd(time_utc)
    return u1, u2 + np.asarray(dut1_s, dtype=float) / 86400.0


def gmst82_rad(time_utc: np.ndarray, dut1_s: float | np.ndarray = 0.0) -> np.ndarray:
    """Greenwich mean sidereal time, IAU-82 model (pyerfa ``gmst82``), radians in [0, 2 pi)."""
    return erfa.gmst82(*jd_ut1(time_utc, dut1_s))


# ------------------------------------------------------------------------------------- rotations
def _r3(angle: np.ndarray) -> np.ndarray:
    """Frame rotation R3(angle) about z, (N, 3, 3): components in the turned frame."""
    c, s = np.cos(angle), np.sin(angle)
    m = np.zeros(np.shape(angle) + (3, 3))
    m[..., 0, 0] = c
    m[..., 0, 1] = s
    m[..., 1, 0] = -s
    m[..., 1, 1] = c
    m[..., 2, 2] = 1.0
    return m


def teme_to_itrf_matrix(time_utc: np.ndarray, dut1_s: float | np.ndarray = 0.0) -> np.ndarray:
    """Matrices M (N, 3, 3) with r_itrf = M @ r_teme (R3(GMST82), Vallado et al. 2006 App. C).

    Polar motion is neglected, so this is TEME -> PEF, which recon uses as ITRF.
    """
    return _r3(gmst82_rad(np.atleast_1d(time_utc), dut1_s))


def itrf_to_gcrf_matrix(time_utc: np.ndarray, dut1_s: float | np.ndarray = 0.0) -> np.ndarray:
    """Matrices M (N, 3, 3) with r_gcrf = M @ r_itrf.

    IAU 2006/2000A celestial-to-terrestrial matrix from pyerfa ``c2t06a`` with zero polar motion,
    transposed.
    """
    t = np.atleast_1d(time_utc)
    tt1, tt2 = jd_tt(t)
    ut1, ut2 = jd_ut1(t, dut1_s)
    c2t = erfa.c2t06a(tt1, tt2, ut1, ut2, 0.0, 0.0)
    return np.swapaxes(c2t, -1, -2)


def teme_to_gcrf_matrix(time_utc: np.ndarray, dut1_s: float | np.ndarray = 0.0) -> np.ndarray:
    """Matrices M (N, 3, 3) with r_gcrf = M @ r_teme (TEME -> ITRF -> GCRF)."""
    return itrf_to_gcrf_matrix(time_utc, dut1_s) @ teme_to_itrf_matrix(time_utc, dut1_s)


# ------------------------------------------------------------------------------------- geodetic
def itrf_to_geodetic(r_itrf_km: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """WGS-84 geodetic latitude (rad), longitude (rad) and height (km) of ITRF positions (N, 3) km."""
    r = np.atleast_2d(np.asarray(r_itrf_km, dtype=float))
    lon, lat, h_m = erfa.gc2gde(WGS84_A_km * 1000.0, WGS84_F, r * 1000.0)
    return lat, lon, h_m / 1000.0


def geodetic_to_itrf(lat_rad: np.ndarray, lon_rad: np.ndarray, h_km: np.ndarray) -> np.ndarray:
    """ITRF positions (N, 3) km of WGS-84 geodetic latitude, longitude (rad) and height (km)."""
    xyz_m = erfa.gd2gce(WGS84_A_km * 1000.0, WGS84_F, np.asarray(lon_rad, dtype=float),
                        np.asarray(lat_rad, dtype=float), np.asarray(h_km, dtype=float) * 1000.0)
    return np.atleast_2d(xyz_m) / 1000.0


def ned_to_itrf_matrix(lat_rad: np.ndarray, lon_rad: np.ndarray) -> np.ndarray:
    """Matrices M (N, 3, 3) with v_itrf = M @ [north, east, down] at geodetic lat/lon (rad)."""
    lat = np.atleast_1d(np.asarray(lat_rad, dtype=float))
    lon = np.atleast_1d(np.asarray(lon_rad, dtype=float))
    sl, cl, so, co = np.sin(lat), np.cos(lat), np.sin(lon), np.cos(lon)
    m = np.empty(lat.shape + (3, 3))
    m[..., :, 0] = np.stack([-sl * co, -sl * so, cl], axis=-1)  # north
    m[..., :, 1] = np.stack([-so, co, np.zeros_like(lat)], axis=-1)  # east
    m[..., :, 2] = np.stack([-cl * co, -cl * so, -sl], axis=-1)  # down
    return m


def scipy_from_shuster_quaternion(q_shuster: np.ndarray) -> np.ndarray:
    """The one place where another quaternion convention is converted into recon's (and back).

    Shuster's convention, used by Markley & Crassidis (2014, ch. 2 (memory)) and by CCSDS 504.0-B-2
    (annex F2, the ADM quaternion "from frame A to frame B"), writes the attitude matrix of a
    scalar-last quaternion as ``A = (q4^2 - |q|^2) I + 2 q q^T - 2 q4 [q x]``; scipy (recon's
    convention, this module) has ``+ 2 w [v x]``. The same attitude matrix therefore has
    conjugate quaternions in the two conventions, and this conversion is its own inverse.

    Parameters
    ----------
    q_shuster : (..., 4) scalar-last quaternion in Shuster's convention (or scipy's, to go back)

    Returns
    -------
    (..., 4) scalar-last quaternion in the other convention, scalar part >= 0

    References
    ----------
    Shuster, M. D. (1993). A survey of attitude representations. J. Astronaut. Sci. 41(4), 439-517
    (memory).
    """
    q = np.array(q_shuster, dtype=float, copy=True)
    q[..., :3] *= -1.0
    return np.where(q[..., 3:4] < 0, -q, q)


def cross_matrices(v: np.ndarray) -> np.ndarray:
    """The cross-product matrix ``[v x]`` of each row of v: (N, 3) -> (N, 3, 3), ``[v x] u = v x u``."""
    v = np.asarray(v, float)
    m = np.zeros((len(v), 3, 3))
    m[:, 0, 1], m[:, 0, 2], m[:, 1, 2] = -v[:, 2], v[:, 1], -v[:, 0]
    m[:, 1, 0], m[:, 2, 0], m[:, 2, 1] = v[:, 2], -v[:, 1], v[:, 0]
    return m
