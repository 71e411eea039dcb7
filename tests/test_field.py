"""recon.field: IGRF-14 against published check values, against a second implementation, and the
coarse-grid interpolation against evaluation at every sample."""

from __future__ import annotations

import datetime as dt

import numpy as np
import ppigrf
import pytest

from recon import field, orbit
from recon.config import OrbitSpec
from recon.core import InputError, frames
from recon.field.along_orbit import dense_orbit

DEMO_TLE = ("1 99990U 26001A   26195.37500000  .00001200  00000-0  61000-4 0  9997",
            "2 99990  97.4100  83.2000 0012000 141.0000 219.2000 15.19000000 28506")
T0 = np.datetime64("2026-07-14T09:00:00", "ns")

# IGRF-14 check values shipped with the model author's reference Python implementation (ciaranbe/pyIGRF,
# tests/tests_igrf14.py, "checked independently against igrf.f", tolerance 1e-2 there; model: Alken
# et al. 2025, Earth Planets Space 77, 79). Geocentric: decimal year, colatitude (deg), east longitude
# (deg), radius (km) -> X north, Y east, Z down (nT).
IGRF14_CHECKS = [
    (2005.0, 35.0, 60.0, 6650.0, 14718.37, 2842.99, 46050.88),
    (2020.0, 15.0, 90.0, 6700.0, 3734.07, 1294.17, 50833.13),
    (2025.0, 90.0, 45.0, 6900.0, 25587.26, -826.43, -7422.32),
    (1990.0, 55.0, 30.0, 6600.0, 25224.81, 1058.25, 30965.61),
]
# Measured: ppigrf (both paths) within 0.008 nT of the table for 2005, 2020, 1990, and 0.077 nT for the
# 2025 row, where pyIGRF14 (an independent port of the Fortran) agrees with ppigrf, not with the
# table, to 0.01 nT. 0.1 nT covers that; the reference tolerance 1e-2 was for the reference code.
IGRF_CHECK_TOL_nT = 0.1


def _geocentric_itrf_km(colat_deg, lon_deg, r_km):
    th, ph = np.radians(colat_deg), np.radians(lon_deg)
    return r_km * np.array([np.sin(th) * np.cos(ph), np.sin(th) * np.sin(ph), np.cos(th)])


def _geocentric_xyz_nT(b_itrf, colat_deg, lon_deg):
    """Project an ITRF vector on geocentric north (-theta hat), east (phi hat), down (-r hat)."""
    th, ph = np.radians(colat_deg), np.radians(lon_deg)
    r_hat = np.array([np.sin(th) * np.cos(ph), np.sin(th) * np.sin(ph), np.cos(th)])
    th_hat = np.array([np.cos(th) * np.cos(ph), np.cos(th) * np.sin(ph), -np.sin(th)])
    ph_hat = np.array([-np.sin(ph), np.cos(ph), 0.0])
    return np.array([-b_itrf @ th_hat, b_itrf @ ph_hat, -b_itrf @ r_hat])


@pytest.mark.parametrize("case", IGRF14_CHECKS, ids=lambda c: str(int(c[0])))
def test_igrf14_published_check_values(case):
    year, colat, lon, r_km, x, y, z = case
    date = dt.datetime(int(year), 1, 1)
    # ppigrf's geocentric path: X = -B_theta, Y = B_phi, Z = -B_r
    b_r, b_th, b_ph = ppigrf.igrf_gc(r_km, colat, lon, date)
    np.testing.assert_allclose([-b_th[0], b_ph[0], -b_r[0]], [x, y, z], rtol=0, atol=IGRF_CHECK_TOL_nT)
    # recon's path (geodetic ppigrf.igrf, local NED -> ITRF), projected back on geocentric axes
    b_itrf = field.igrf_itrf_nT(_geocentric_itrf_km(colat, lon, r_km)[None, :], np.datetime64(date, "ns"))[0]
    np.testing.assert_allclose(_geocentric_xyz_nT(b_itrf, colat, lon), [x, y, z], rtol=0, atol=IGRF_CHECK_TOL_nT)


@pytest.fixture(scope="module")
def leo_pass():
    """The demo orbit (~520 km, 97.4 deg) every 2 s for 100 min (just over one revolution)."""
    t = T0 + (np.arange(0, 6000, 2) * 1_000_000_000).astype("timedelta64[ns]")
    return orbit.orbit_from_tle(*DEMO_TLE, t)


def test_against_geocentric_path_along_an_orbit(leo_pass):
    # Second code path: ppigrf.igrf_gc (spherical geocentric coordinates, no geodetic conversion,
    # components rotated here with spherical unit vectors) vs recon (geodetic ppigrf.igrf + NED).
    st = leo_pass
    sel = slice(0, None, 25)
    r = st.r_itrf_km[sel]
    t_mid = st.time_utc[0] + (st.time_utc[-1] - st.time_utc[0]) // 2
    b_recon = field.igrf_itrf_nT(r, t_mid)
    rad = np.linalg.norm(r, axis=1)
    colat = np.degrees(np.arccos(r[:, 2] / rad))
    lon = np.degrees(np.arctan2(r[:, 1], r[:, 0]))
    b_r, b_th, b_ph = ppigrf.igrf_gc(rad, colat, lon, frames_date(t_mid))
    th, ph = np.radians(colat), np.radians(lon)
    r_hat = np.stack([np.sin(th) * np.cos(ph), np.sin(th) * np.sin(ph), np.cos(th)], axis=1)
    th_hat = np.stack([np.cos(th) * np.cos(ph), np.cos(th) * np.sin(ph), -np.sin(th)], axis=1)
    ph_hat = np.stack([-np.sin(ph), np.cos(ph), np.zeros_like(ph)], axis=1)
    b_gc = b_r[0][:, None] * r_hat + b_th[0][:, None] * th_hat + b_ph[0][:, None] * ph_hat
    # ppigrf's geodetic<->geocentric series make the only difference: measured 2e-4 nT; "a few nT"
    # is the requirement, 0.01 nT the tolerance
    assert np.abs(b_recon - b_gc).max() < 0.01


def frames_date(t: np.datetime64) -> dt.datetime:
    return dt.datetime(1970, 1, 1) + dt.timedelta(microseconds=int(np.datetime64(t, "us").astype(np.int64)))


def test_against_pyigrf14_independent_implementation(leo_pass):
    # pyIGRF14 (PyPI, a port of the IGRF Fortran synthesis routine igrf14syn) is a separate code base;
    # used in tests only and skipped where it is not installed.
    calc = pytest.importorskip("pyIGRF14.calculate")
    st = leo_pass
    idx = np.arange(0, len(st.time_utc), 150)
    t_mid = st.time_utc[0] + (st.time_utc[-1] - st.time_utc[0]) // 2
    year = 2026.0 + (t_mid - np.datetime64("2026-01-01", "ns")) / np.timedelta64(365 * 86400, "s")
    b_recon = field.igrf_itrf_nT(st.r_itrf_km[idx], t_mid)
    lat_deg, lon_deg = np.degrees(st.lat_rad[idx]), np.degrees(st.lon_rad[idx])
    for k, i in enumerate(idx):
        # geodetic (itype 1): x north, y east, z down in the local geodetic frame
        x, y, z, _ = calc.igrf12syn(year, 1, st.h_km[i], lat_deg[k], lon_deg[k] % 360.0)
        ned_to_itrf = frames.ned_to_itrf_matrix(st.lat_rad[i], st.lon_rad[i])[0]
        # "a few nT": the two codes use slightly different geodetic conversions and date handling
        # (decimal year on 365 days here); measured 0.05 nT
        np.testing.assert_allclose(ned_to_itrf @ [x, y, z], b_recon[k], rtol=0, atol=1.0)


def test_field_points_down_in_the_north_and_up_in_the_south(leo_pass):
    # Hand check of the sign chain (ENU from ppigrf -> NED -> ITRF): the geomagnetic field points
    # into the Earth in the northern hemisphere and out of it in the southern, at high latitudes
    # (dipole approximation, inclination > 60 deg above 50 deg latitude).
    st = leo_pass
    b = field.igrf_itrf_nT(st.r_itrf_km, st.time_utc[0])
    radial = np.sum(b * st.r_itrf_km, axis=1) / np.linalg.norm(st.r_itrf_km, axis=1)
    lat = np.degrees(st.lat_rad)
    assert np.all(radial[lat > 60] < -20000) and np.all(radial[lat < -60] > 20000)
    # |B| at ~520 km stays within the LEO range of IGRF-14 at 500 km (18.3 to 52.2 uT, computed with
    # ppigrf on a 1-degree grid for 2025-01-01), with 2 uT margin for height and date
    mag = np.linalg.norm(b, axis=1)
    assert mag.min() > 16000 and mag.max() < 54000


def test_one_date_per_pass_secular_variation_is_negligible(leo_pass):
    # Evaluating a 100-minute pass at its start date or at its end date: the difference is the
    # secular variation over 100 min. IGRF-14's SV at 520 km is below ~100 nT/yr, i.e. < 0.02 nT
    # (measured 0.011 nT).
    st = leo_pass
    b0 = field.igrf_itrf_nT(st.r_itrf_km[::10], st.time_utc[0])
    b1 = field.igrf_itrf_nT(st.r_itrf_km[::10], st.time_utc[-1])
    diff = np.abs(b1 - b0).max()
    assert 0 < diff < 0.02


# The requirement: the coarse-grid spline stays within 1 nT of the model at every sample (LEO ~500 km).
INTERP_TOL_nT = 1.0


def test_grid_interpolation_error_below_1_nT(leo_pass):
    spec = OrbitSpec(tle=DEMO_TLE)
    st = leo_pass
    fast = field.field_along_orbit(spec, st.time_utc)
    direct = field.igrf_gcrf_nT(st.time_utc, st.r_itrf_km)
    err = np.linalg.norm(fast.b_gcrf_nT - direct, axis=1).max()
    assert err < INTERP_TOL_nT, err
    # measured 0.035 nT at the default 20 s grid (30 s: 0.18, 60 s: 2.8, 120 s: 42 nT); guard the margin
    assert err < 0.1
    # a coarser grid really is worse: the test can fail
    coarse = field.field_along_orbit(spec, st.time_utc, grid_step_s=240.0)
    assert np.linalg.norm(coarse.b_gcrf_nT - direct, axis=1).max() > err
    # Dense samples take their orbit from nodes 10 s apart (cubic Hermite): the bound is the Hermite
    # remainder (~0.3 mm) plus SGP4's own velocity/position inconsistency (~2e-5 km/s x h / 4 ~ 5 cm);
    # 0.1 m moves the field by ~0.002 nT (about 20 nT per km).
    hermite_tol_km = 1e-4
    np.testing.assert_allclose(fast.r_gcrf_km, st.r_gcrf_km, rtol=0, atol=hermite_tol_km)
    np.testing.assert_allclose(fast.r_itrf_km, st.r_itrf_km, rtol=0, atol=hermite_tol_km)
    np.testing.assert_allclose(fast.lat_deg, np.degrees(st.lat_rad), rtol=0, atol=1e-5)
    np.testing.assert_allclose(fast.h_km, st.h_km, rtol=0, atol=hermite_tol_km)


def test_dense_orbit_path_is_used_and_matches_sgp4(leo_pass):
    """The node path applies only when many samples share a node; then it reproduces SGP4 to < 0.1 m."""
    spec = OrbitSpec(tle=DEMO_TLE)
    t = leo_pass.time_utc
    dense = dense_orbit(spec, t, 0.0, None)
    assert dense is not None
    err_m = 1e3 * np.linalg.norm(dense.r_gcrf_km - leo_pass.r_gcrf_km, axis=1).max()
    assert err_m < 0.1, err_m
    assert dense_orbit(spec, t[::200], 0.0, None) is None  # sparse samples: evaluated directly


def test_gcrf_is_the_rotated_itrf_field(leo_pass):
    st = leo_pass
    b_itrf = field.igrf_itrf_nT(st.r_itrf_km[::50], st.time_utc[0])
    b_gcrf = field.igrf_gcrf_nT(st.time_utc[::50], st.r_itrf_km[::50], st.time_utc[0])
    m = frames.itrf_to_gcrf_matrix(st.time_utc[::50])
    # frames' direct matrix vs the fast one used inside: 1e-11 rad x 50,000 nT = 5e-7 nT
    np.testing.assert_allclose(b_gcrf, np.einsum("nij,nj->ni", m, b_itrf), rtol=0, atol=1e-5)


def test_reference_field_from_a_mission_file(mission_dir):
    from recon.config import load_mission

    mission = load_mission(mission_dir / "mission.toml")
    t = T0 + (np.arange(0, 600, 0.5) * 1e9).astype("timedelta64[ns]")
    ref = field.reference_field(mission, t)
    assert ref.b_gcrf_nT.shape == (len(t), 3) and np.all(ref.valid)
    direct = field.igrf_gcrf_nT(t, ref.r_itrf_km)
    assert np.abs(ref.b_gcrf_nT - direct).max() < INTERP_TOL_nT
    assert np.all((ref.h_km > 480) & (ref.h_km < 560))


def test_nan_orbit_rows_stay_nan(tmp_path):
    st = orbit.orbit_from_tle(*DEMO_TLE, T0 + (np.arange(0, 3601, 60) * 1e9).astype("timedelta64[ns]"))
    keep = np.r_[0:20, 40:61]  # a 20-minute hole between two segments
    from recon.orbit import write_oem

    lines = []
    for part in (keep[:20], keep[20:]):
        p = write_oem(tmp_path / "x.oem", st.time_utc[part], st.r_gcrf_km[part], st.v_gcrf_km_s[part], "DEMO", "X")
        text = p.read_text().splitlines()
        lines += text if not lines else text[4:]
    (tmp_path / "two.oem").write_text("\n".join(lines) + "\n")
    t = T0 + (np.arange(0, 3600, 5) * 1e9).astype("timedelta64[ns]")
    ref = field.field_along_orbit(OrbitSpec(oem=tmp_path / "two.oem"), t)
    gap = (t > st.time_utc[19]) & (t < st.time_utc[40])
    assert np.all(np.isnan(ref.b_gcrf_nT[gap])) and np.all(np.isfinite(ref.b_gcrf_nT[~gap]))
    direct = field.igrf_gcrf_nT(t[~gap], ref.r_itrf_km[~gap])
    assert np.abs(ref.b_gcrf_nT[~gap] - direct).max() < INTERP_TOL_nT


def test_times_outside_igrf14_span_raise():
    t = np.array(["2031-01-01T00:00:00"], dtype="datetime64[ns]")
    with pytest.raises(InputError, match=r"expected times within IGRF-14's span 1900-01-01.* got 2031-01-01"):
        field.igrf_gcrf_nT(t, np.array([[7000.0, 0.0, 0.0]]))
