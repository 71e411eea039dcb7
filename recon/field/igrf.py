"""IGRF-14 (ppigrf) at ITRF points: the model at geodetic points for one date, turned into ITRF
components with the local north-east-down basis and into GCRF with the Earth's orientation.

ppigrf evaluates the model at geodetic points for one date per call (its dates do not broadcast
against points), returning east, north and up components. One date per block of at most
``DATE_BLOCK_s`` (6 h), the block's midpoint: the secular variation, below 200 nT/yr anywhere at the
surface and less at orbit height, changes the field by at most 0.07 nT over the 3 h either side
(tests measure it over a pass).

References
----------
Alken, P. et al. (2021), "International Geomagnetic Reference Field: the thirteenth generation",
Earth Planets Space 73, 49 (the model's definition, eqs. 1-2).
Alken, P. et al. (2025), "International Geomagnetic Reference Field: the fourteenth generation",
Earth Planets Space 77, 79 (IGRF-14 coefficients, valid 1900.0-2030.0).
Laundal, K. M. (ppigrf, a pure-Python IGRF implementation).
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import numpy as np
import ppigrf

from ..core import DEG_PER_RAD, InputError, frames
from ..orbit import itrf_to_gcrf

__all__ = ["DATE_BLOCK_s", "IGRF14_START_UTC", "IGRF14_STOP_UTC", "check_igrf_span", "igrf_itrf_nT", "igrf_gcrf_nT"]

DATE_BLOCK_s = 6 * 3600.0
# IGRF-14 spans 1900.0 to 2030.0 (Alken et al. 2025); ppigrf only prints when asked outside it
IGRF14_START_UTC = np.datetime64("1900-01-01T00:00:00", "ns")
IGRF14_STOP_UTC = np.datetime64("2030-01-01T00:00:00", "ns")


def check_igrf_span(t: np.ndarray, source: str | Path | None) -> None:
    """Raise when a (non-NaT) instant lies outside IGRF-14's span, naming ``source``."""
    ok = t[~np.isnat(t)]
    if len(ok) and (ok.min() < IGRF14_START_UTC or ok.max() > IGRF14_STOP_UTC):
        raise InputError(f"expected times within IGRF-14's span {IGRF14_START_UTC} to {IGRF14_STOP_UTC} UTC, "
                         f"got {ok.min()} to {ok.max()}", source)


def _py_datetime(t: np.datetime64) -> dt.datetime:
    us = int(np.datetime64(t, "us").astype(np.int64))
    return dt.datetime(1970, 1, 1) + dt.timedelta(microseconds=us)


def igrf_itrf_nT(r_itrf_km: np.ndarray, date: np.datetime64) -> np.ndarray:
    """IGRF-14 at ITRF positions for one date, in ITRF components.

    Parameters
    ----------
    r_itrf_km : (N, 3) array, km, ITRF
    date : datetime64
        The single date the coefficients are interpolated to.

    Returns
    -------
    (N, 3) array, nT, ITRF. NaN rows in, NaN rows out.
    """
    r = np.atleast_2d(np.asarray(r_itrf_km, dtype=float))
    out = np.full(r.shape, np.nan)
    ok = np.all(np.isfinite(r), axis=1)
    if not np.any(ok):
        return out
    lat, lon, h = frames.itrf_to_geodetic(r[ok])
    b_e, b_n, b_u = ppigrf.igrf(lon * DEG_PER_RAD, lat * DEG_PER_RAD, h, _py_datetime(date))
    ned = np.stack([b_n[0], b_e[0], -b_u[0]], axis=-1)
    out[ok] = np.einsum("nij,nj->ni", frames.ned_to_itrf_matrix(lat, lon), ned)
    return out


def igrf_gcrf_nT(time_utc: np.ndarray, r_itrf_km: np.ndarray, date: np.datetime64 | None = None, *,
                 dut1_s: float = 0.0, source: str | Path | None = None) -> np.ndarray:
    """IGRF-14 at every given position, in GCRF. No interpolation: the model is evaluated N times.

    Parameters
    ----------
    time_utc : (N,) datetime64[ns], UTC
    r_itrf_km : (N, 3) array, km, ITRF
    date : datetime64, optional
        One coefficient date for all samples. Default: one date per block of at most
        ``DATE_BLOCK_s``, the block's midpoint.
    dut1_s : float
        UT1 - UTC, s.
    source : str or Path, optional
        Named in the error for times outside IGRF-14's span.

    Returns
    -------
    (N, 3) array, nT, GCRF
    """
    t = np.atleast_1d(np.asarray(time_utc, dtype="datetime64[ns]"))
    r = np.atleast_2d(np.asarray(r_itrf_km, dtype=float))
    if r.shape != (len(t), 3):
        raise ValueError(f"Expected r_itrf_km of shape ({len(t)}, 3), got {r.shape}")
    check_igrf_span(t if date is None else np.array([date], dtype="datetime64[ns]"), source)
    b_itrf = np.full(r.shape, np.nan)
    ok = ~np.isnat(t) & np.all(np.isfinite(r), axis=1)
    if not np.any(ok):
        return b_itrf
    if date is not None:
        b_itrf[ok] = igrf_itrf_nT(r[ok], np.datetime64(date, "ns"))
    else:
        ns = t.astype(np.int64)
        t0 = ns[ok].min()
        block = np.where(ok, (ns - t0) // int(DATE_BLOCK_s * 1e9), -1)
        for k in np.unique(block[ok]):
            sel = block == k
            mid = np.datetime64(int((ns[sel].min() + ns[sel].max()) // 2), "ns")
            b_itrf[sel] = igrf_itrf_nT(r[sel], mid)
    return itrf_to_gcrf(t, b_itrf, dut1_s)
