"""CCSDS Orbit Ephemeris Messages (KVN) and the interpolators they name.

Reads and writes the Orbit Ephemeris Message of CCSDS 502.0-B-3, "Orbit Data Messages" (Blue Book,
April 2023; OEM version 3.0, and the 1.0/2.0 files that follow the same layout): a header
(``CCSDS_OEM_VERS``, ``CREATION_DATE``, ``ORIGINATOR``), then one or more segments, each a metadata
block between ``META_START`` and ``META_STOP`` followed by data lines
``EPOCH X Y Z X_DOT Y_DOT Z_DOT [X_DDOT Y_DDOT Z_DDOT]`` in km, km/s (and km/s^2), optionally a
covariance block (skipped here). ``COMMENT`` lines may appear anywhere.

What recon accepts (anything else raises :class:`recon.errors.InputError` naming the line):

- ``CENTER_NAME = EARTH``.
- ``REF_FRAME``: ``GCRF``, ``ICRF`` (Earth-centred, the same axes as GCRF), ``EME2000`` (mean
  equator and equinox of J2000; it differs from GCRF by the frame bias of about 23 mas, under 1 m at
  LEO radius, and is treated as GCRF), ``TEME`` (SGP4's frame, Vallado et al. 2006) and the
  Earth-fixed ``ITRF``, ``ITRF-93``, ``ITRF-97``, ``ITRF2000``, ``ITRF2014``, ``ITRF2020`` ... (any
  name starting ``ITRF``; polar motion is neglected as everywhere in recon).
- ``TIME_SYSTEM``: ``UTC``, ``TAI``, ``TT``, ``GPS`` (converted to UTC with pyerfa's leap-second
  table).
- ``INTERPOLATION``: ``LAGRANGE`` (default), ``HERMITE`` or ``LINEAR``; ``INTERPOLATION_DEGREE``
  default 7 (1 for LINEAR).

References
----------
CCSDS 502.0-B-3, Orbit Data Messages, Recommended Standard (Blue Book), Issue 3, April 2023.
CCSDS 301.0-B-4, Time Code Formats (ASCII time codes A and B), 2010.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path

import erfa
import numpy as np

from ..core import NS_PER_S, InputError

__all__ = ["OemSegment", "read_oem", "write_oem", "lagrange_interpolate", "hermite_interpolate",
           "parse_ccsds_time"]

_NS_PER_DAY = 86_400 * 1_000_000_000
_UNIX_EPOCH_JD = 2440587.5
TT_MINUS_TAI_s = 32.184  # IAU 1991 Resolution A4
TAI_MINUS_GPS_s = 19.0  # ICD-GPS-200: GPS time = TAI - 19 s

_GCRF_NAMES = ("GCRF", "ICRF", "EME2000")
_TIME_SYSTEMS = ("UTC", "TAI", "TT", "GPS")
_METHODS = ("LAGRANGE", "HERMITE", "LINEAR")
DEFAULT_DEGREE = 7
_REQUIRED_META = ("OBJECT_NAME", "OBJECT_ID", "CENTER_NAME", "REF_FRAME", "TIME_SYSTEM", "START_TIME",
                  "STOP_TIME")
# ASCII time code A (calendar) or B (day of year), CCSDS 301.0-B-4 section 3.5; optional "Z"
_TIME_RE = re.compile(r"^(\d{4})-(?:(\d{2})-(\d{2})|(\d{3}))T(\d{2}):(\d{2}):(\d{2}(?:\.\d*)?)Z?$")


@dataclass(frozen=True)
class OemSegment:
    """One OEM segment: its metadata and its ephemeris, times converted to UTC.

    Attributes
    ----------
    meta : dict of str to str
        The metadata block as written (keys upper case).
    meta_line : int
        1-based line of ``META_START``.
    frame : str
        "gcrf", "teme" or "itrf": how recon treats ``REF_FRAME``.
    method : str
        "LAGRANGE", "HERMITE" or "LINEAR".
    degree : int
        Interpolation degree.
    time_utc : (M,) datetime64[ns], UTC
        Epochs, strictly increasing.
    r_km : (M, 3) array, km, in ``frame``
    v_km_s : (M, 3) array, km/s, in ``frame``
    lines : (M,) int array
        1-based file line of each epoch.
    start_utc, stop_utc : datetime64[ns]
        The usable span: ``USEABLE_START_TIME``/``USEABLE_STOP_TIME`` when given, else
        ``START_TIME``/``STOP_TIME``, clipped to the first and last epoch.
    """

    meta: dict
    meta_line: int
    frame: str
    method: str
    degree: int
    time_utc: np.ndarray
    r_km: np.ndarray
    v_km_s: np.ndarray
    lines: np.ndarray
    start_utc: np.datetime64
    stop_utc: np.datetime64


# ------------------------------------------------------------------------------------------ time
def _ns_to_jd(ns: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    days, rem = np.divmod(np.asarray(ns, dtype=np.int64), _NS_PER_DAY)
    return _UNIX_EPOCH_JD + days.astype(float), rem.astype(float) / _NS_PER_DAY


def _jd_to_ns(d1: np.ndarray, d2: np.ndarray) -> np.ndarray:
    # d1 is a whole day + 0.5 from _ns_to_jd; d2 carries the fraction (and any carry from erfa)
    whole = np.floor(d2)
    days = np.round(d1 - _UNIX_EPOCH_JD + whole).astype(np.int64)
    return days * _NS_PER_DAY + np.round((d2 - whole) * _NS_PER_DAY).astype(np.int64)


def _to_utc_ns(label_ns: np.ndarray, system: str) -> np.ndarray:
    """Convert instants labelled on ``system`` (TAI/TT/GPS/UTC) to UTC nanoseconds."""
    if system == "UTC":
        return label_ns
    shift_s = {"TAI": 0.0, "TT": TT_MINUS_TAI_s, "GPS": -TAI_MINUS_GPS_s}[system]
    tai_ns = label_ns - np.int64(round(shift_s * NS_PER_S))
    u1, u2 = erfa.taiutc(*_ns_to_jd(tai_ns))
    utc_ns = _jd_to_ns(u1, u2)
    # erfa's UTC quasi-JD stretches a leap-second day to 86401 s: undo that for datetime64
    iy, im, iday, _ = erfa.jd2cal(u1, np.floor(u2))
    ny, nm, nday, _ = erfa.jd2cal(u1 + 1.0, np.floor(u2))
    day_s = 86400.0 + (erfa.dat(ny, nm, nday, 0.0) - erfa.dat(iy, im, iday, 0.0))
    day0 = (utc_ns // _NS_PER_DAY) * _NS_PER_DAY
    return day0 + np.round((utc_ns - day0) * (day_s / 86400.0)).astype(np.int64)


def parse_ccsds_time(text: str) -> np.datetime64:
    """Parse a CCSDS ASCII time (``2026-07-14T09:12:00.5``, ``2026-195T09:12:00`` or with ``Z``).

    Returns the label as datetime64[ns] without any time-scale conversion; raises ValueError.
    """
    m = _TIME_RE.match(text.strip())
    if not m:
        raise ValueError(text)
    year, month, day, doy, hh, mm, ss = m.groups()
    if doy is not None:
        base = np.datetime64(f"{year}-01-01", "ns") + np.timedelta64(int(doy) - 1, "D")
        if int(doy) < 1 or base.astype("datetime64[Y]") != np.datetime64(year, "Y"):
            raise ValueError(text)
    else:
        base = np.datetime64(f"{year}-{month}-{day}", "ns")
    if int(hh) > 23 or int(mm) > 59 or float(ss) >= 60.0:
        raise ValueError(text)
    sec_ns = int(ss.split(".")[0]) * NS_PER_S
    if "." in ss:
        frac = (ss.split(".")[1] + "000000000")[:9]
        sec_ns += int(frac)
    return base + np.timedelta64((int(hh) * 3600 + int(mm) * 60) * NS_PER_S + sec_ns, "ns")


# ------------------------------------------------------------------------------------------ read
def _frame(name: str) -> str | None:
    n = name.strip().upper()
    if n in _GCRF_NAMES:
        return "gcrf"
    if n == "TEME":
        return "teme"
    if n.startswith("ITRF"):
        return "itrf"
    return None


def _segment(path: Path, meta: dict, meta_line: int, key_lines: dict, rows: list) -> OemSegment:
    for k in _REQUIRED_META:
        if k not in meta:
            raise InputError(f"expected {k} in the metadata block that starts here, it is missing", path,
                             line=meta_line)
    center = meta["CENTER_NAME"].strip().upper()
    if center != "EARTH":
        raise InputError(f"expected CENTER_NAME = EARTH (recon handles Earth orbits only), got {center!r}",
                         path, line=key_lines["CENTER_NAME"])
    frame = _frame(meta["REF_FRAME"])
    if frame is None:
        raise InputError(f"expected REF_FRAME GCRF, ICRF, EME2000, TEME or ITRF..., got {meta['REF_FRAME']!r}",
                         path, line=key_lines["REF_FRAME"])
    system = meta["TIME_SYSTEM"].strip().upper()
    if system not in _TIME_SYSTEMS:
        raise InputError(f"expected TIME_SYSTEM one of {', '.join(_TIME_SYSTEMS)}, got {system!r}", path,
                         line=key_lines["TIME_SYSTEM"])
    method = meta.get("INTERPOLATION", "LAGRANGE").strip().upper()
    if method not in _METHODS:
        raise InputError(f"expected INTERPOLATION one of {', '.join(_METHODS)}, got {method!r}", path,
                         line=key_lines["INTERPOLATION"])
    degree_text = meta.get("INTERPOLATION_DEGREE", "1" if method == "LINEAR" else str(DEFAULT_DEGREE))
    if not degree_text.strip().isdigit() or not 1 <= int(degree_text) <= 15:
        raise InputError(f"expected INTERPOLATION_DEGREE a whole number from 1 to 15, got {degree_text!r}",
                         path, line=key_lines.get("INTERPOLATION_DEGREE", meta_line))
    degree = 1 if method == "LINEAR" else int(degree_text)

    def when(key: str) -> np.datetime64:
        try:
            label = parse_ccsds_time(meta[key])
        except ValueError:
            raise InputError(f"expected {key} as a CCSDS time like 2026-07-14T09:12:00.000, got "
                             f"{meta[key]!r}", path, line=key_lines[key]) from None
        return np.datetime64(int(_to_utc_ns(np.array([label.astype(np.int64)]), system)[0]), "ns")

    if not rows:
        raise InputError("expected ephemeris data lines after META_STOP, found none", path, line=meta_line)
    lines = np.array([r[0] for r in rows])
    t = _to_utc_ns(np.array([r[1] for r in rows], dtype=np.int64), system)
    step = np.diff(t)
    if np.any(step <= 0):
        k = int(np.argmax(step <= 0)) + 1
        raise InputError(f"expected epochs in increasing order, got {rows[k][3]!r} after "
                         f"{rows[k - 1][3]!r}", path, line=int(lines[k]))
    xyz = np.array([r[2] for r in rows])
    start = when("USEABLE_START_TIME") if "USEABLE_START_TIME" in meta else when("START_TIME")
    stop = when("USEABLE_STOP_TIME") if "USEABLE_STOP_TIME" in meta else when("STOP_TIME")
    time_utc = t.astype("datetime64[ns]")
    return OemSegment(meta=dict(meta), meta_line=meta_line, frame=frame, method=method, degree=degree,
                      time_utc=time_utc, r_km=xyz[:, 0:3], v_km_s=xyz[:, 3:6], lines=lines,
                      start_utc=max(start, time_utc[0]), stop_utc=min(stop, time_utc[-1]))


def read_oem(path: str | Path) -> list[OemSegment]:
    """Read a CCSDS OEM file (KVN).

    Parameters
    ----------
    path : str or Path

    Returns
    -------
    list of OemSegment
        In file order.

    Raises
    ------
    InputError
        Naming the file and line: missing or malformed header, metadata or data lines, an
        unsupported frame, centre, time system or interpolation.
    """
    path = Path(path)
    if not path.is_file():
        raise InputError("expected a CCSDS OEM file, no such file", path)
    try:
        text = path.read_text(encoding="utf-8")
    except UnicodeDecodeError as e:
        raise InputError(f"expected UTF-8 text, got undecodable bytes ({e.reason})", path) from None
    segments: list[OemSegment] = []
    state = "header"  # header -> meta -> data (-> covariance) -> meta ...
    header: dict[str, str] = {}
    meta: dict[str, str] = {}
    key_lines: dict[str, int] = {}
    rows: list = []
    meta_line = 0
    for number, raw in enumerate(text.splitlines(), start=1):
        line = raw.strip()
        if not line or line.startswith("COMMENT"):
            continue
        if state == "header" and not header:
            m = re.match(r"^CCSDS_OEM_VERS\s*=\s*(\S+)$", line)
            if not m or m.group(1) not in ("1.0", "2.0", "3.0"):
                raise InputError(f"expected the first line 'CCSDS_OEM_VERS = 3.0' (or 1.0, 2.0), got {line!r}",
                                 path, line=number)
            header["CCSDS_OEM_VERS"] = m.group(1)
            continue
        if line == "META_START":
            if state == "meta":
                raise InputError("expected META_STOP before the next META_START", path, line=number)
            if state in ("data", "covariance"):
                if state == "covariance":
                    raise InputError("expected COVARIANCE_STOP before META_START", path, line=number)
                segments.append(_segment(path, meta, meta_line, key_lines, rows))
            state, meta, key_lines, rows, meta_line = "meta", {}, {}, [], number
            continue
        if state == "header":
            m = re.match(r"^([A-Z_]+)\s*=\s*(.*)$", line)
            if not m:
                raise InputError(f"expected a header line 'KEY = value' or META_START, got {line!r}", path,
                                 line=number)
            header[m.group(1)] = m.group(2).strip()
            continue
        if state == "meta":
            if line == "META_STOP":
                state = "data"
                continue
            m = re.match(r"^([A-Z_]+)\s*=\s*(.*)$", line)
            if not m:
                raise InputError(f"expected a metadata line 'KEY = value' or META_STOP, got {line!r}", path,
                                 line=number)
            meta[m.group(1)] = m.group(2).strip()
            key_lines[m.group(1)] = number
            continue
        if state == "covariance":
            if line == "COVARIANCE_STOP":
                state = "data"
            continue
        # state == "data"
        if line == "COVARIANCE_START":
            state = "covariance"
            continue
        if line in ("DATA_START", "DATA_STOP"):
            continue
        fields = line.split()
        if len(fields) not in (7, 10):
            raise InputError(f"expected a data line 'EPOCH X Y Z X_DOT Y_DOT Z_DOT' (7 or 10 fields), got "
                             f"{len(fields)} fields: {line!r}", path, line=number)
        try:
            label = parse_ccsds_time(fields[0])
            values = [float(f) for f in fields[1:7]]
        except ValueError:
            raise InputError(f"expected a CCSDS epoch and six numbers (km, km/s), got {line!r}", path,
                             line=number) from None
        if not np.all(np.isfinite(values)):
            raise InputError(f"expected finite numbers, got {line!r}", path, line=number)
        rows.append((number, int(label.astype(np.int64)), values, fields[0]))
    if not header:
        raise InputError("expected a CCSDS OEM file starting 'CCSDS_OEM_VERS = 3.0', the file is empty", path)
    if state == "header":
        raise InputError("expected at least one META_START ... META_STOP segment, found none", path)
    if state == "meta":
        raise InputError("expected META_STOP before the end of the file", path, line=meta_line)
    if state == "covariance":
        raise InputError("expected COVARIANCE_STOP before the end of the file", path)
    segments.append(_segment(path, meta, meta_line, key_lines, rows))
    return segments


# ----------------------------------------------------------------------------------------- write
def _ccsds_text(t: np.datetime64) -> str:
    return str(np.datetime64(t, "us"))


def write_oem(path: str | Path, time_utc: np.ndarray, r_gcrf_km: np.ndarray, v_gcrf_km_s: np.ndarray,
              object_name: str, object_id: str, *, originator: str = "recon",
              creation_utc: np.datetime64 | None = None, interpolation: str = "LAGRANGE",
              degree: int = DEFAULT_DEGREE) -> Path:
    """Write one OEM segment (CCSDS 502.0-B-3, version 3.0, KVN) in GCRF, UTC, km and km/s.

    Parameters
    ----------
    path : str or Path
    time_utc : (N,) datetime64[ns], UTC, strictly increasing
    r_gcrf_km : (N, 3) array, km, GCRF
    v_gcrf_km_s : (N, 3) array, km/s, GCRF
    object_name, object_id : str
        ``OBJECT_ID`` is usually the international designator (``2026-001A``).
    originator : str
    creation_utc : datetime64, optional
        ``CREATION_DATE``. Default: the last epoch, which keeps the output a pure function of the
        inputs (pass the real creation time when exporting).
    interpolation, degree : str, int
        Written as ``INTERPOLATION`` and ``INTERPOLATION_DEGREE``.

    Returns
    -------
    Path
    """
    t = np.asarray(time_utc, dtype="datetime64[ns]")
    r = np.asarray(r_gcrf_km, dtype=float)
    v = np.asarray(v_gcrf_km_s, dtype=float)
    if t.ndim != 1 or r.shape != (len(t), 3) or v.shape != (len(t), 3) or len(t) == 0:
        raise ValueError(f"Expected time_utc (N,), r (N, 3), v (N, 3) with N > 0, got {t.shape}, {r.shape}, "
                         f"{v.shape}")
    if np.any(np.diff(t.astype(np.int64)) <= 0):
        raise ValueError("Expected strictly increasing time_utc")
    if not (np.all(np.isfinite(r)) and np.all(np.isfinite(v))):
        raise ValueError("Expected finite positions and velocities (drop the NaN rows first)")
    creation = t[-1] if creation_utc is None else np.datetime64(creation_utc, "ns")
    out = [
        "CCSDS_OEM_VERS = 3.0",
        f"CREATION_DATE = {_ccsds_text(creation)}",
        f"ORIGINATOR = {originator}",
        "",
        "META_START",
        f"OBJECT_NAME = {object_name}",
        f"OBJECT_ID = {object_id}",
        "CENTER_NAME = EARTH",
        "REF_FRAME = GCRF",
        "TIME_SYSTEM = UTC",
        f"START_TIME = {_ccsds_text(t[0])}",
        f"STOP_TIME = {_ccsds_text(t[-1])}",
        f"INTERPOLATION = {interpolation}",
        f"INTERPOLATION_DEGREE = {int(degree)}",
        "META_STOP",
        "",
    ]
    # 1e-9 km (micrometre) and 1e-12 km/s resolution: far below any orbit's accuracy
    for ti, ri, vi in zip(t, r, v, strict=True):
        out.append(f"{str(ti)[:29]} {ri[0]:.9f} {ri[1]:.9f} {ri[2]:.9f} {vi[0]:.12f} {vi[1]:.12f} {vi[2]:.12f}")
    path = Path(path)
    path.write_text("\n".join(out) + "\n", encoding="utf-8")
    return path


# ---------------------------------------------------------------------------------- interpolate
def _windows(t_nodes_s: np.ndarray, t_s: np.ndarray, m: int) -> np.ndarray:
    """Start index of the m-node window centred on each sample's interval, (K,) int."""
    n = len(t_nodes_s)
    i = np.clip(np.searchsorted(t_nodes_s, t_s, side="right") - 1, 0, max(n - 2, 0))
    return np.clip(i + 1 - m // 2, 0, n - m)


def _basis(tw: np.ndarray, x: np.ndarray, with_derivative: bool):
    """Lagrange basis L_j(x) (K, m) on nodes tw (K, m), and optionally dL_j/dx (K, m).

    Products of (x - t_l)/(t_j - t_l) over l != j: stable at and near the nodes.
    """
    k, m = tw.shape
    den = tw[:, :, None] - tw[:, None, :]  # t_j - t_l
    eye = np.eye(m, dtype=bool)
    den = np.where(eye, 1.0, den)
    ratio = np.where(eye, 1.0, (x[:, None, None] - tw[:, None, :]) / den)  # (K, j, l)
    basis = np.prod(ratio, axis=2)
    if not with_derivative:
        return basis, None
    d = np.zeros((k, m))
    for l_skip in range(m):
        r = ratio.copy()
        r[:, :, l_skip] = 1.0
        term = np.prod(r, axis=2) / den[:, :, l_skip]
        term[:, l_skip] = 0.0  # l_skip == j is not a term of the sum
        d += term
    return basis, d


def lagrange_interpolate(t_nodes_s: np.ndarray, y_nodes: np.ndarray, t_s: np.ndarray,
                         degree: int) -> np.ndarray:
    """Piecewise Lagrange interpolation on a moving window of ``degree + 1`` nodes.

    Parameters
    ----------
    t_nodes_s : (n,) array, s, strictly increasing
    y_nodes : (n, d) array
    t_s : (K,) array, s, inside [t_nodes_s[0], t_nodes_s[-1]]
    degree : int
        Polynomial degree; reduced to n - 1 when there are fewer nodes.

    Returns
    -------
    (K, d) array
    """
    t_nodes_s = np.asarray(t_nodes_s, dtype=float)
    y_nodes = np.asarray(y_nodes, dtype=float)
    t_s = np.asarray(t_s, dtype=float)
    m = min(degree + 1, len(t_nodes_s))
    start = _windows(t_nodes_s, t_s, m)
    idx = start[:, None] + np.arange(m)
    basis, _ = _basis(t_nodes_s[idx], t_s, False)
    return np.einsum("kj,kjd->kd", basis, y_nodes[idx])


def hermite_interpolate(t_nodes_s: np.ndarray, y_nodes: np.ndarray, dy_nodes: np.ndarray, t_s: np.ndarray,
                        degree: int) -> tuple[np.ndarray, np.ndarray]:
    """Piecewise Hermite interpolation (values and first derivatives) on a moving window.

    A Hermite polynomial of degree ``degree`` matches values and derivatives at
    ``(degree + 1) // 2`` nodes (at least 2): H(x) = sum_j [(1 - 2 c_j (x - t_j)) y_j + (x - t_j) y'_j]
    L_j(x)^2 with c_j = L_j'(t_j) (Hildebrand, Introduction to Numerical Analysis, 2nd ed., 1974,
    sec. 8.2).

    Returns
    -------
    y : (K, d) array
    dy : (K, d) array
        The derivative of the same polynomial.
    """
    t_nodes_s = np.asarray(t_nodes_s, dtype=float)
    y_nodes = np.asarray(y_nodes, dtype=float)
    dy_nodes = np.asarray(dy_nodes, dtype=float)
    t_s = np.asarray(t_s, dtype=float)
    m = min(max((degree + 1) // 2, 2), len(t_nodes_s))
    start = _windows(t_nodes_s, t_s, m)
    idx = start[:, None] + np.arange(m)
    tw = t_nodes_s[idx]
    basis, dbasis = _basis(tw, t_s, True)
    den = tw[:, :, None] - tw[:, None, :]
    eye = np.eye(m, dtype=bool)
    c = np.sum(np.where(eye, 0.0, 1.0 / np.where(eye, 1.0, den)), axis=2)  # L_j'(t_j)
    dx = t_s[:, None] - tw
    l2 = basis * basis
    a = (1.0 - 2.0 * c * dx) * l2
    b = dx * l2
    da = -2.0 * c * l2 + (1.0 - 2.0 * c * dx) * 2.0 * basis * dbasis
    db = l2 + 2.0 * dx * basis * dbasis
    yw, dyw = y_nodes[idx], dy_nodes[idx]
    y = np.einsum("kj,kjd->kd", a, yw) + np.einsum("kj,kjd->kd", b, dyw)
    dy = np.einsum("kj,kjd->kd", da, yw) + np.einsum("kj,kjd->kd", db, dyw)
    return y, dy
