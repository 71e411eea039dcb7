"""Time bases of onboard logs, converted to UTC as ``datetime64[ns]``.

Four bases are understood: ISO 8601 UTC text, UNIX seconds, GPS seconds (continuous atomic scale,
origin 1980-01-06T00:00:00 UTC) and an onboard tick counter that may wrap; and calendar labels on
the TAI, TT or GPS scale (as an ephemeris file's ``TIME_SYSTEM`` names them). Leap seconds come from
pyerfa's table (``erfa.dat``), never from a constant.

Conventions
-----------
GPS time runs 19 s behind TAI (TAI - GPS = 19 s, fixed when GPS time began on 1980-01-06 with
TAI - UTC = 19 s; ICD-GPS-200), so GPS - UTC = (TAI - UTC) - 19 s, which is 18 s since 2017-01-01
(IERS Bulletin C 52).

``datetime64`` has no 23:59:60: an instant inside a positive leap second is labelled with the UTC
second that follows it (so two GPS seconds map to the same UTC second there).
"""

from __future__ import annotations

import warnings

import erfa
import numpy as np
import pandas as pd
from numpy.lib.stride_tricks import sliding_window_view

from ..core import GPS_EPOCH_UTC, NS_PER_S, frames

__all__ = [
    "TAI_MINUS_GPS_s", "EARLIEST_UTC", "LATEST_UTC",
    "iso_to_utc", "iso_bytes_to_utc", "unix_seconds_to_utc", "gps_seconds_to_utc", "unwrap_ticks", "ticks_to_utc",
    "time_system_to_utc_ns",
]

# TAI - GPS, fixed by the definition of GPS time (ICD-GPS-200: GPS = UTC at 1980-01-06, when
# TAI - UTC was 19 s)
TAI_MINUS_GPS_s = 19

# Telemetry times outside this range are treated as unreadable: before 1970 no such log exists,
# and datetime64[ns] stops at 2262 (the 2200 bound leaves margin). Common practice, no source.
EARLIEST_UTC = np.datetime64("1970-01-01T00:00:00", "ns")
LATEST_UTC = np.datetime64("2200-01-01T00:00:00", "ns")

_NAT = np.datetime64("NaT", "ns")
_NS_PER_DAY = 86_400 * NS_PER_S
_UNIX_EPOCH_JD = 2440587.5  # 1970-01-01T00:00:00 as a Julian date
_GPS_EPOCH_NS = np.datetime64(GPS_EPOCH_UTC, "ns").astype(np.int64)


def _seconds_to_ns(origin_ns: int, seconds: np.ndarray) -> np.ndarray:
    """``origin + seconds`` as datetime64[ns]; NaT where ``seconds`` is not finite or out of range.

    The whole and fractional seconds are converted apart so that float rounding of a large count
    of seconds does not leak into the nanoseconds. A float64 near 1.7e9 s resolves only 0.24 us, so
    the fraction is rounded to the decimal step just coarser than that resolution (1 us there,
    1 ns for counts below ~8e6 s): "1784020329.9" reads back as .900000, not .900000095.
    """
    s = np.asarray(seconds, dtype=float)
    out = np.full(s.shape, _NAT)
    lo = (EARLIEST_UTC.astype(np.int64) - origin_ns) / NS_PER_S
    hi = (LATEST_UTC.astype(np.int64) - origin_ns) / NS_PER_S
    ok = np.isfinite(s) & (s >= lo) & (s < hi)
    v = s[ok]
    whole = np.floor(v)
    ulp_ns = np.spacing(np.abs(v)) * NS_PER_S
    step_ns = 10.0 ** np.ceil(np.log10(np.maximum(ulp_ns, 1.0)))
    frac_ns = (np.rint((v - whole) * NS_PER_S / step_ns) * step_ns).astype(np.int64)
    out[ok] = (origin_ns + whole.astype(np.int64) * NS_PER_S + frac_ns).astype("datetime64[ns]")
    return out


def iso_to_utc(text) -> np.ndarray:
    """Parse ISO 8601 UTC strings ("2026-07-14T09:12:00.25Z", with or without "Z", or with an
    explicit offset) to datetime64[ns]; unreadable entries give NaT.

    Parameters
    ----------
    text : (N,) array-like of str

    Returns
    -------
    (N,) datetime64[ns], UTC
    """
    s = pd.Series(np.asarray(text, dtype=object), dtype=object)
    dt = pd.to_datetime(s, format="ISO8601", utc=True, errors="coerce")
    naive = dt.dt.tz_localize(None).to_numpy()  # resolution chosen by pandas (s ... ns)
    lo = EARLIEST_UTC.astype(naive.dtype)
    hi = LATEST_UTC.astype(naive.dtype)
    ok = ~np.isnat(naive) & (naive >= lo) & (naive < hi)
    out = np.full(naive.shape, _NAT)
    out[ok] = naive[ok].astype("datetime64[ns]")
    return out


_DAYS_IN_MONTH = np.array([31, 28, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31], dtype=np.int64)
_DAYS_IN_MONTH.flags.writeable = False


def _days_from_civil(y: np.ndarray, m: np.ndarray, d: np.ndarray) -> np.ndarray:
    """Days since 1970-01-01 of proleptic Gregorian dates (H. Hinnant's days_from_civil algorithm)."""
    y = y - (m <= 2)
    era = np.floor_divide(y, 400)
    yoe = y - era * 400
    doy = (153 * (m + np.where(m > 2, -3, 9)) + 2) // 5 + d - 1
    doe = yoe * 365 + yoe // 4 - yoe // 100 + doy
    return era * 146097 + doe - 719468


def _fixed_iso(chars: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Parse fixed-width "YYYY-MM-DDThh:mm:ss[.f...]" rows (uint8, (N, w), 19 <= w <= 29, no zone).

    Returns ns since 1970 (int64) and a mask of rows that follow that layout exactly and name a
    real instant (month 1-12, a day that exists in that month, hh < 24, mm < 60, ss < 60). Other rows
    are left to the general parser. Digits are read arithmetically: no string parser is involved.
    """
    n, w = chars.shape
    cols = np.ascontiguousarray(chars.T)  # (w, N): one contiguous row per character position
    ok = np.ones(n, dtype=bool)

    def num(*ks):  # the number written by the digits at positions ks; marks non-digits
        nonlocal ok
        total = np.zeros(n, dtype=np.int32)
        for k in ks:
            d = cols[k] - np.uint8(48)  # wraps below "0": one test finds non-digits
            ok &= d <= 9
            total = total * 10 + d
        return total

    year, month, day = num(0, 1, 2, 3), num(5, 6), num(8, 9)
    hour, minute, second = num(11, 12), num(14, 15), num(17, 18)
    ok &= (cols[4] == 45) & (cols[7] == 45) & ((cols[10] == 84) | (cols[10] == 32))
    ok &= (cols[13] == 58) & (cols[16] == 58)
    frac_ns = np.zeros(n, dtype=np.int64)
    if w > 19:
        ok &= (cols[19] == 46) & (w > 20)
        frac_ns = num(*range(20, w)).astype(np.int64) * 10 ** (9 - (w - 20))
    leap = ((year % 4 == 0) & (year % 100 != 0)) | (year % 400 == 0)
    month_ok = (month >= 1) & (month <= 12)
    dim = _DAYS_IN_MONTH[np.clip(month - 1, 0, 11)] + ((month == 2) & leap)
    ok &= month_ok & (day >= 1) & (day <= dim) & (hour <= 23) & (minute <= 59) & (second <= 59)
    # the date changes rarely along a log: convert each run of equal dates once
    ymd = (year * 100 + month) * 100 + day
    first = np.flatnonzero(np.r_[True, ymd[1:] != ymd[:-1]])
    run_days = _days_from_civil(year[first].astype(np.int64), np.clip(month[first], 1, 12).astype(np.int64),
                                day[first].astype(np.int64))
    days = np.repeat(run_days, np.diff(np.r_[first, n]))
    sod = hour.astype(np.int64) * 3600 + minute * 60 + second
    ns = (days * 86_400 + sod) * NS_PER_S + frac_ns
    return np.where(ok, ns, 0), ok


def iso_bytes_to_utc(buf: np.ndarray, start: np.ndarray, end: np.ndarray) -> np.ndarray:
    """ISO 8601 UTC times stored as byte ranges of a buffer, to datetime64[ns]; NaT where unreadable.

    Fast path for logs whose time fields share a few fixed widths ("2026-07-14T09:12:00.100Z"): the
    fields of one width are gathered into an (N, width) byte array and their digits read
    arithmetically (see :func:`_fixed_iso`). Any field off that layout (an explicit offset, a date
    alone, text, an impossible date) goes through :func:`iso_to_utc` (pandas), which decides.

    Parameters
    ----------
    buf : (B,) uint8 array, the file
    start, end : (N,) int64 arrays, ``[start, end)`` of each time field
    """
    n = start.size
    out = np.full(n, _NAT)
    if n == 0:
        return out
    length = end - start
    has_z = np.zeros(n, dtype=bool)
    nz = length > 0
    has_z[nz] = buf[end[nz] - 1] == ord("Z")
    width = length - has_z
    slow = np.zeros(n, dtype=bool)
    keys = width[:1] if width.min() == width.max() else np.unique(width)
    if keys.size > 12:
        slow[:] = True
        keys = keys[:0]
    for w in keys:
        g = np.arange(n) if keys.size == 1 else np.flatnonzero(width == w)
        if w < 19 or w > 29:
            slow[g] = True
            continue
        ns, ok = _fixed_iso(sliding_window_view(buf, int(w))[start[g]])
        out[g[ok]] = ns[ok].astype("datetime64[ns]")
        slow[g[~ok]] = True
    if slow.any():
        idx = np.flatnonzero(slow)
        raw = [bytes(buf[a:b]).decode("utf-8", "replace") for a, b in zip(start[idx], end[idx], strict=True)]
        out[idx] = iso_to_utc(raw)
    bad = np.isnat(out) | (out < EARLIEST_UTC) | (out >= LATEST_UTC)
    out[bad] = _NAT
    return out


def unix_seconds_to_utc(unix_s: np.ndarray) -> np.ndarray:
    """UNIX seconds (UTC, leap seconds not counted) to datetime64[ns]; NaT where unreadable.

    Parameters
    ----------
    unix_s : (N,) float array, s since 1970-01-01T00:00:00 UTC
    """
    return _seconds_to_ns(0, unix_s)


def _tai_minus_utc_s(utc_ns: np.ndarray) -> np.ndarray:
    """TAI - UTC in whole seconds on the UTC dates of ``utc_ns`` (int64 ns), from ``erfa.dat``."""
    day = np.floor_divide(utc_ns, 86_400 * NS_PER_S)
    uniq, inv = np.unique(day, return_inverse=True)
    d = uniq.astype("datetime64[D]")
    year = d.astype("datetime64[Y]").astype(np.int64) + 1970
    month = d.astype("datetime64[M]").astype(np.int64) % 12 + 1
    mday = (d - d.astype("datetime64[M]")).astype(np.int64) + 1
    with warnings.catch_warnings():
        # erfa calls dates beyond its table's horizon "dubious" and then uses the last known count
        warnings.simplefilter("ignore", erfa.ErfaWarning)
        dat = erfa.dat(year.astype(np.int32), month.astype(np.int32), mday.astype(np.int32), 0.0)
    return np.rint(np.asarray(dat)).astype(np.int64)[inv.ravel()]


def gps_seconds_to_utc(gps_s: np.ndarray) -> np.ndarray:
    """GPS seconds (since 1980-01-06T00:00:00 on the GPS scale) to UTC datetime64[ns].

    UTC = TAI - (TAI - UTC), TAI = GPS + 19 s, with TAI - UTC from pyerfa's leap-second table
    (``erfa.dat``) on the UTC date. Because TAI - UTC depends on the UTC date it is looked up twice:
    first on the date of ``TAI - (TAI - UTC on the date of TAI)``, which lands on the right side of a
    leap second. NaT where the input is not finite, negative or out of range.

    Parameters
    ----------
    gps_s : (N,) float array, s on the GPS scale

    Returns
    -------
    (N,) datetime64[ns], UTC

    References
    ----------
    IERS Bulletin C (leap seconds); ICD-GPS-200 (GPS time origin and TAI - GPS = 19 s).
    """
    g = np.asarray(gps_s, dtype=float)
    ok = np.isfinite(g) & (g >= 0)
    # TAI instant written as if it were a UTC label: ahead of UTC by TAI - UTC (about 19-37 s)
    tai = _seconds_to_ns(int(_GPS_EPOCH_NS) + TAI_MINUS_GPS_s * NS_PER_S, np.where(ok, g, np.nan))
    out = np.full(g.shape, _NAT)
    good = ~np.isnat(tai)
    if not good.any():
        return out
    tai_ns = tai[good].astype(np.int64)
    first = tai_ns - _tai_minus_utc_s(tai_ns) * NS_PER_S
    utc_ns = tai_ns - _tai_minus_utc_s(first) * NS_PER_S
    out[good] = utc_ns.astype("datetime64[ns]")
    return out


def unwrap_ticks(count: np.ndarray, rollover_bits: int | None) -> tuple[np.ndarray, np.ndarray]:
    """Undo the wraps of an onboard counter that rolls over at ``2**rollover_bits``.

    A wrap is a step down of more than half the counter's range between consecutive rows in file
    order; a step up of more than half the range (a row written out of order across a wrap) undoes
    one. Every wrap is counted.

    Parameters
    ----------
    count : (N,) float array, counter values in file order (0 <= count < 2**rollover_bits)
    rollover_bits : int or None
        Counter width; None means the counter never wraps.

    Returns
    -------
    unwrapped : (N,) float array, ticks
    wrap_index : (W,) int array, index of the first row after each forward wrap
    """
    c = np.asarray(count, dtype=float)
    if rollover_bits is None or c.size < 2:
        return c.copy(), np.zeros(0, dtype=np.int64)
    modulus = float(2 ** int(rollover_bits))
    step = np.diff(c)
    k = np.zeros(c.shape, dtype=np.int64)
    k[1:] = np.cumsum((step < -modulus / 2).astype(np.int64) - (step > modulus / 2).astype(np.int64))
    wrap_index = np.flatnonzero(step < -modulus / 2) + 1
    return c + k * modulus, wrap_index


def ticks_to_utc(count: np.ndarray, epoch_utc: np.datetime64, rate_hz: float,
                 rollover_bits: int | None) -> tuple[np.ndarray, np.ndarray]:
    """Counter ticks to UTC: ``epoch + unwrapped_count / rate_hz``.

    Parameters
    ----------
    count : (N,) float array, raw counter values in file order
    epoch_utc : datetime64, UTC of count 0
    rate_hz : float, ticks per second
    rollover_bits : int or None

    Returns
    -------
    time_utc : (N,) datetime64[ns], UTC
    wrap_index : (W,) int array, see :func:`unwrap_ticks`
    """
    ticks, wraps = unwrap_ticks(count, rollover_bits)
    whole_s = np.floor(ticks / rate_hz)
    rem_ticks = ticks - whole_s * rate_hz  # exact when rate_hz is a whole number
    seconds = whole_s + rem_ticks / rate_hz
    origin = int(np.datetime64(epoch_utc, "ns").astype(np.int64))
    out = _seconds_to_ns(origin, seconds)
    return out, wraps


def _jd_to_ns(d1: np.ndarray, d2: np.ndarray) -> np.ndarray:
    """Two-part Julian date (d1 a whole day + 0.5, d2 the fraction and any carry) to ns since 1970."""
    whole = np.floor(d2)
    days = np.round(d1 - _UNIX_EPOCH_JD + whole).astype(np.int64)
    return days * _NS_PER_DAY + np.round((d2 - whole) * _NS_PER_DAY).astype(np.int64)


def time_system_to_utc_ns(label_ns: np.ndarray, system: str) -> np.ndarray:
    """Calendar labels on the ``system`` scale ("UTC", "TAI", "TT" or "GPS") to UTC labels.

    TAI = TT - 32.184 s (IAU 1991 Resolution A4) and TAI = GPS + 19 s (ICD-GPS-200); TAI -> UTC with
    pyerfa's ``taiutc`` (leap-second table). datetime64 has no 23:59:60, so erfa's UTC quasi-JD,
    which stretches a leap-second day to 86401 s, is rescaled to 86400 s on such a day.

    Parameters
    ----------
    label_ns : (N,) int64 array, ns since 1970-01-01 of the calendar label on ``system``
    system : str

    Returns
    -------
    (N,) int64 array, ns since 1970-01-01, UTC
    """
    if system == "UTC":
        return label_ns
    shift_s = {"TAI": 0.0, "TT": frames.TT_MINUS_TAI_s, "GPS": -TAI_MINUS_GPS_s}[system]
    tai_ns = label_ns - np.int64(round(shift_s * NS_PER_S))
    u1, u2 = erfa.taiutc(*frames.utc_to_jd(tai_ns.astype("datetime64[ns]")))
    utc_ns = _jd_to_ns(u1, u2)
    # erfa's UTC quasi-JD stretches a leap-second day to 86401 s: undo that for datetime64
    iy, im, iday, _ = erfa.jd2cal(u1, np.floor(u2))
    ny, nm, nday, _ = erfa.jd2cal(u1 + 1.0, np.floor(u2))
    day_s = 86400.0 + (erfa.dat(ny, nm, nday, 0.0) - erfa.dat(iy, im, iday, 0.0))
    day0 = (utc_ns // _NS_PER_DAY) * _NS_PER_DAY
    return day0 + np.round((utc_ns - day0) * (day_s / 86400.0)).astype(np.int64)
