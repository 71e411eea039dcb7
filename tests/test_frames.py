"""Frames, time scales and the quaternion convention (recon.frames).

Published values: Vallado, Crawford, Hujsak & Kelso (2006), "Revisiting Spacetrack Report #3",
AIAA 2006-6753, Rev 2, Appendix C (the worked TEME example, also Vallado's Example 3-15).
Second implementation: astropy.coordinates (TEME -> ITRS, TEME -> GCRS), used in tests only.
"""

from __future__ import annotations

import erfa
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.spatial.transform import Rotation

from recon.core import WGS84_F, WGS84_A_km, frames

# ------------------------------------------------------------------ Vallado et al. (2006) App. C
# UTC 2004-04-06 07:51:28.386009, UT1 - UTC = -0.439961 s, xp = -0.140682", yp = 0.333309"
# (AIAA 2006-6753 Rev 2, Appendix C).
VALLADO_T_UTC = np.array(["2004-04-06T07:51:28.386009"], dtype="datetime64[ns]")
VALLADO_DUT1_s = -0.439961
VALLADO_XP_arcsec = -0.140682
VALLADO_YP_arcsec = 0.333309
# r_TEME, km (AIAA 2006-6753 Rev 2, Appendix C)
VALLADO_R_TEME_km = np.array([5094.18016210, 6127.64465950, 6380.34453270])
# r_PEF, km, Earth-fixed without polar motion (Vallado Example 3-15, same case)
VALLADO_R_PEF_km = np.array([-1033.47503130, 7901.30558560, 6380.34453270])
# r_ITRF, km, with polar motion (AIAA 2006-6753 Rev 2, Appendix C)
VALLADO_R_ITRF_km = np.array([-1033.47938300, 7901.29527540, 6380.35659580])
# r_J2000, km (AIAA 2006-6753 Rev 2, Appendix C; IAU-76/FK5 reduction)
VALLADO_R_J2000_km = np.array([5102.50960000, 6123.01152000, 6378.13630000])

ARCSEC_rad = np.pi / (180.0 * 3600.0)

# Tolerances (named, with their reason):
# PEF: the same R3(GMST82) rotation as the paper; pyerfa's gmst82 agrees with the paper's own code
# to well under 1 cm at 10,000 km (measured 8 mm). 2 cm leaves room for the paper's 4-decimal UT.
PEF_TOL_km = 2.0e-5
# GCRF vs J2000: the frame bias between GCRF and mean J2000 is about 23 mas (0.7 m at 8,000 km),
# and the paper reduces with IAU-76/FK5 where recon uses IAU 2006/2000A: a few decimetres more.
GCRF_VS_J2000_TOL_km = 2.0e-3
# ITRF vs PEF: polar motion |(xp, yp)| = 0.36" rotates a 10,208 km vector by at most 17.9 m.
POLAR_MOTION_BOUND_km = (np.hypot(VALLADO_XP_arcsec, VALLADO_YP_arcsec) * ARCSEC_rad
                         * np.linalg.norm(VALLADO_R_ITRF_km))


def test_quaternion_convention_hand_derived_90deg_about_z():
    # q = [0, 0, sin 45, cos 45], scalar last: +90 deg about z. Hand derivation of the active
    # rotation matrix: [[0, -1, 0], [1, 0, 0], [0, 0, 1]], so GCRF x -> body +y, GCRF y -> body -x.
    q = np.array([0.0, 0.0, np.sqrt(0.5), np.sqrt(0.5)])
    m_expected = np.array([[0.0, -1.0, 0.0], [1.0, 0.0, 0.0], [0.0, 0.0, 1.0]])
    np.testing.assert_allclose(Rotation.from_quat(q).as_matrix(), m_expected, atol=1e-15)
    v_gcrf = np.array([[1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]])
    v_body = frames.body_from_gcrf(q, v_gcrf)
    np.testing.assert_allclose(v_body, [[0.0, 1.0, 0.0], [-1.0, 0.0, 0.0], [0.0, 0.0, 1.0]], atol=1e-15)
    np.testing.assert_allclose(v_body, (m_expected @ v_gcrf.T).T, atol=1e-15)
    # the body x axis, seen from GCRF, is GCRF x turned by -90 deg about z
    np.testing.assert_allclose(m_expected.T @ [1.0, 0.0, 0.0], [0.0, -1.0, 0.0], atol=1e-15)


def test_quaternion_round_trip_seeded():
    rng = np.random.default_rng(20260714)
    q = rng.normal(size=(200, 4))
    q /= np.linalg.norm(q, axis=1, keepdims=True)
    q_back = frames.q_from_rotation(frames.rotation_from_q(q))
    assert np.all(q_back[:, 3] >= 0.0)
    # same rotation: q_back = +-q
    sign = np.sign(np.sum(q_back * q, axis=1))
    np.testing.assert_allclose(q_back, q * sign[:, None], atol=1e-12)
    single = frames.q_from_rotation(Rotation.from_quat([0.0, 0.0, 0.0, -1.0]))
    np.testing.assert_allclose(single, [0.0, 0.0, 0.0, 1.0])


def test_vallado2006_teme_to_pef():
    r_pef = frames.teme_to_itrf_matrix(VALLADO_T_UTC, VALLADO_DUT1_s)[0] @ VALLADO_R_TEME_km
    np.testing.assert_allclose(r_pef, VALLADO_R_PEF_km, rtol=0, atol=PEF_TOL_km)


def test_vallado2006_pef_plus_polar_motion_gives_itrf():
    r_pef = frames.teme_to_itrf_matrix(VALLADO_T_UTC, VALLADO_DUT1_s)[0] @ VALLADO_R_TEME_km
    # recon neglects polar motion: the published ITRF is within the polar-motion bound ...
    assert np.linalg.norm(r_pef - VALLADO_R_ITRF_km) < POLAR_MOTION_BOUND_km
    assert np.linalg.norm(r_pef - VALLADO_R_ITRF_km) > 0.005  # ... and the effect is really there
    # ... and adding polar motion (pyerfa pom00, IERS 2003 W matrix) recovers it to the PEF tolerance
    w = erfa.pom00(VALLADO_XP_arcsec * ARCSEC_rad, VALLADO_YP_arcsec * ARCSEC_rad, 0.0)
    np.testing.assert_allclose(w @ r_pef, VALLADO_R_ITRF_km, rtol=0, atol=PEF_TOL_km)


def test_vallado2006_teme_to_gcrf_within_frame_bias_of_j2000():
    r_gcrf = frames.teme_to_gcrf_matrix(VALLADO_T_UTC, VALLADO_DUT1_s)[0] @ VALLADO_R_TEME_km
    np.testing.assert_allclose(r_gcrf, VALLADO_R_J2000_km, rtol=0, atol=GCRF_VS_J2000_TOL_km)


def test_matrices_are_rotations_and_consistent():
    t = np.datetime64("2026-07-14T09:12:00", "ns") + np.arange(0, 6000, 500).astype("timedelta64[s]")
    for m in (frames.teme_to_itrf_matrix(t), frames.itrf_to_gcrf_matrix(t), frames.teme_to_gcrf_matrix(t)):
        assert m.shape == (len(t), 3, 3)
        np.testing.assert_allclose(m @ np.swapaxes(m, -1, -2), np.broadcast_to(np.eye(3), m.shape), atol=1e-14)
        np.testing.assert_allclose(np.linalg.det(m), 1.0, atol=1e-14)
    np.testing.assert_allclose(frames.teme_to_gcrf_matrix(t),
                               frames.itrf_to_gcrf_matrix(t) @ frames.teme_to_itrf_matrix(t), atol=1e-15)


def test_dut1_turns_the_earth_by_its_rotation_rate():
    t = np.array(["2026-07-14T09:12:00"], dtype="datetime64[ns]")
    g0 = frames.gmst82_rad(t, 0.0)
    g1 = frames.gmst82_rad(t, 1.0)
    # IAU-82 GMST (Aoki et al. 1982; Vallado et al. 2006 eq. for GMST): 1 s of UT1 advances GMST by
    # (876600*3600 + 8640184.812866) / (36525*86400) s = 1.0027379093508 s; the T^2 term changes
    # that by < 1e-14. 1e-13 rad is float noise on angles of order 2 pi.
    ratio = (876600 * 3600 + 8640184.812866) / (36525 * 86400)
    assert (g1 - g0)[0] == pytest.approx(2 * np.pi * ratio / 86400.0, abs=1e-13)


# ---------------------------------------------------------------------------- time scales
def test_tt_minus_utc_2017_onwards():
    # TAI - UTC = 37 s since 2017-01-01 (IERS Bulletin C 52 and later); TT - TAI = 32.184 s
    # (IAU 1991 Resolution A4): TT - UTC = 69.184 s.
    for text in ("2017-01-01T00:00:00", "2026-07-14T09:12:00"):
        t = np.array([text], dtype="datetime64[ns]")
        u1, u2 = frames.utc_to_jd(t)
        a1, a2 = frames.jd_tt(t)
        assert ((a1 - u1) + (a2 - u2))[0] * 86400.0 == pytest.approx(69.184, abs=1e-6)


def test_tt_minus_utc_before_the_2016_leap_second():
    # TAI - UTC = 36 s from 2015-07-01 to 2016-12-31 (IERS Bulletin C 49/52): TT - UTC = 68.184 s
    t = np.array(["2016-12-31T23:59:59"], dtype="datetime64[ns]")
    u1, u2 = frames.utc_to_jd(t)
    a1, a2 = frames.jd_tt(t)
    assert ((a1 - u1) + (a2 - u2))[0] * 86400.0 == pytest.approx(68.184, abs=1e-6)


def test_gps_minus_utc_from_the_leap_second_table():
    # GPS - UTC = (TAI - UTC) - 19 s = 18 s since 2017-01-01 (IERS Bulletin C; ICD-GPS-200 sets
    # TAI - GPS = 19 s).
    assert erfa.dat(2026, 7, 14, 0.0) - 19.0 == 18.0


def test_utc_to_jd_is_exact_to_the_nanosecond():
    t = np.array(["2000-01-01T12:00:00", "2026-07-14T09:12:00.000000001"], dtype="datetime64[ns]")
    d1, d2 = frames.utc_to_jd(t)
    assert d1[0] + d2[0] == 2451545.0  # J2000.0 is JD 2451545.0 at noon (definition)
    assert d1[1] == 2461235.5  # 2026-07-14 starts at JD 2461235.5 (erfa.cal2jd: 2400000.5 + 61235)
    assert int(np.round(d2[1] * 86400e9)) == (9 * 3600 + 12 * 60) * 1_000_000_000 + 1


# ------------------------------------------------------------------------------- geodetic, NED
def test_geodetic_hand_values_equator_and_pole():
    # WGS-84 (NIMA TR8350.2): a = 6378.137 km, b = a (1 - f) = 6356.752314245 km
    b_km = WGS84_A_km * (1.0 - WGS84_F)
    assert b_km == pytest.approx(6356.752314245, abs=1e-9)
    r = frames.geodetic_to_itrf(np.radians([0.0, 0.0, 90.0, -90.0]), np.radians([0.0, 90.0, 0.0, 0.0]),
                                np.array([0.0, 0.0, 0.0, 500.0]))
    np.testing.assert_allclose(r, [[WGS84_A_km, 0, 0], [0, WGS84_A_km, 0], [0, 0, b_km],
                                   [0, 0, -(b_km + 500.0)]], atol=1e-9)
    lat, lon, h = frames.itrf_to_geodetic(np.array([[WGS84_A_km + 500.0, 0, 0], [0, 0, b_km + 1.0]]))
    np.testing.assert_allclose(lat, [0.0, np.pi / 2], atol=1e-14)
    np.testing.assert_allclose(lon[0], 0.0, atol=1e-14)
    np.testing.assert_allclose(h, [500.0, 1.0], atol=1e-9)


# erfa's gc2gde (Fukushima 2006 iteration-free inversion) round trip, measured over 2e5 random points
# up to 40,000 km height: latitude error x radius <= 1.0 mm (0.02 mm below 2,000 km), height
# error < 1e-7 mm. Tolerances: 2 mm and 1 micrometre.
ROUND_TRIP_POS_TOL_km = 2.0e-6
ROUND_TRIP_H_TOL_km = 1.0e-9


@settings(max_examples=60, deadline=None)
@given(st.floats(-89.9, 89.9), st.floats(-180.0, 179.999), st.floats(-1.0, 40000.0))
def test_geodetic_round_trip(lat_deg, lon_deg, h_km):
    r = frames.geodetic_to_itrf(np.radians([lat_deg]), np.radians([lon_deg]), np.array([h_km]))
    lat, lon, h = frames.itrf_to_geodetic(r)
    radius_km = np.linalg.norm(r[0])
    assert abs(lat[0] - np.radians(lat_deg)) * radius_km < ROUND_TRIP_POS_TOL_km
    dlon = (lon[0] - np.radians(lon_deg) + np.pi) % (2 * np.pi) - np.pi
    assert abs(dlon) * radius_km < ROUND_TRIP_POS_TOL_km
    assert h[0] == pytest.approx(h_km, abs=ROUND_TRIP_H_TOL_km)


def test_ned_hand_values_and_round_trip():
    m = frames.ned_to_itrf_matrix(np.array([0.0, np.pi / 2]), np.array([0.0, 0.0]))
    # on the equator at lon 0: north = +z, east = +y, down = -x
    np.testing.assert_allclose(m[0], [[0, 0, -1], [0, 1, 0], [1, 0, 0]], atol=1e-15)
    # at the north pole (lon 0): north = -x, east = +y, down = -z
    np.testing.assert_allclose(m[1], [[-1, 0, 0], [0, 1, 0], [0, 0, -1]], atol=1e-15)
    rng = np.random.default_rng(7)
    lat = rng.uniform(-np.pi / 2, np.pi / 2, 50)
    lon = rng.uniform(-np.pi, np.pi, 50)
    m = frames.ned_to_itrf_matrix(lat, lon)
    np.testing.assert_allclose(m @ np.swapaxes(m, -1, -2), np.broadcast_to(np.eye(3), m.shape), atol=1e-14)
    np.testing.assert_allclose(np.linalg.det(m), 1.0, atol=1e-14)
    v_ned = rng.normal(size=(50, 3))
    v_back = np.einsum("nji,nj->ni", m, np.einsum("nij,nj->ni", m, v_ned))
    np.testing.assert_allclose(v_back, v_ned, atol=1e-13)
    # "down" is the negative of the ellipsoid normal: a point 1 km above lies 1 km "up"
    r0 = frames.geodetic_to_itrf(lat, lon, np.zeros(50))
    r1 = frames.geodetic_to_itrf(lat, lon, np.ones(50))
    np.testing.assert_allclose(r1 - r0, -m[:, :, 2], atol=1e-9)


# ------------------------------------------------------------------------------ vs astropy
@pytest.fixture(scope="module")
def astropy_frames():
    from astropy.utils import iers

    iers.conf.auto_download = False  # offline: use the bundled IERS-B table
    import astropy.units as u
    from astropy.coordinates import GCRS, ITRS, TEME, CartesianRepresentation
    from astropy.time import Time

    return u, GCRS, ITRS, TEME, CartesianRepresentation, Time


def test_teme_to_itrf_and_gcrf_against_astropy(astropy_frames):
    u, GCRS, ITRS, TEME, CartesianRepresentation, Time = astropy_frames
    rng = np.random.default_rng(11)
    times = ["2004-04-06T07:51:28.386009", "2012-03-01T00:00:00", "2019-10-10T12:34:56.5"]
    for text in times:
        t_ap = Time(text, scale="utc")
        dut1_s = float(t_ap.delta_ut1_utc)  # give recon the same UT1 that astropy uses
        r_teme = rng.normal(size=3)
        r_teme *= 7000.0 / np.linalg.norm(r_teme)
        teme = TEME(CartesianRepresentation(r_teme * u.km), obstime=t_ap)
        r_itrs = teme.transform_to(ITRS(obstime=t_ap)).cartesian.xyz.to_value(u.km)
        r_gcrs = teme.transform_to(GCRS(obstime=t_ap)).cartesian.xyz.to_value(u.km)
        t = np.array([text], dtype="datetime64[ns]")
        r_itrf = frames.teme_to_itrf_matrix(t, dut1_s)[0] @ r_teme
        r_gcrf = frames.teme_to_gcrf_matrix(t, dut1_s)[0] @ r_teme
        # astropy includes polar motion (< 0.6" in these years, IERS EOP C04: < 21 m at 7,000 km);
        # recon neglects it
        assert np.linalg.norm(r_itrf - r_itrs) < 0.6 * ARCSEC_rad * 7000.0
        # GCRS: same IAU 2006/2000A model via erfa on both sides; astropy's TEME -> GCRS goes
        # through the equinox-based matrices, recon's through c2t06a: 1 mm agreement expected
        np.testing.assert_allclose(r_gcrf, r_gcrs, rtol=0, atol=1e-6)
