"""CCSDS Orbit Ephemeris Messages (KVN): read and write.

Reads and writes the Orbit Ephemeris Message of CCSDS 502.0-B-3, "Orbit Data Messages" (Blue Book,
April 2023; OEM version 3.0, and the 1.0/2.0 files that follow the same layout): a header
(``CCSDS_OEM_VERS``, ``CREATION_DATE``, ``ORIGINATOR``), then one or more segments, each a metadata
block between ``META_START`` and ``META_STOP`` followed by data lines
``EPOCH X Y Z X_DOT Y_DOT Z_DOT [X_DDOT Y_DDOT Z_DDOT]`` in km, km/s (and km/s^2), optionally a
covariance block (skipped here). ``COMMENT`` lines may appear anywhere.

What recon accepts (anything else raises :class:`recon.core.InputError` naming the line):

- ``CENTER_NAME = EARTH``.
- ``REF_FRAME``: ``GCRF``, ``ICRF`` (Earth-centred, the same axes as GCRF), ``EME2000`` (mean
  equator and equinox of J2000; it differs from GCRF by the frame bias of about 23 mas, under 1 m at
  LEO radius, and is treated as GCRF), ``TEME`` (SGP4's frame, Vallado et al. 2006) and the
  Earth-fixed ``ITRF``, ``ITRF-93``, ``ITRF-97``, ``ITRF2000``, ``ITRF2014``, ``ITRF2020`` ... (any
  name starting ``ITRF``; polar motion is neglected as everywhere in recon).
- ``TIME_SYSTEM``: ``UTC``, ``TAI``, ``TT``, ``GPS`` (converted to UTC with pyerfa's leap-second
  table).
- ``INTERPOLATION``: ``LAGRANGE`` (default), ``HERMITE`` or ``LINEAR``; ``INTERPOLATION_DEGREE``
  default 7 (1 for LINEAR). The interpolators are in :mod:`recon.orbit.interpolate`.

References
----------
CCSDS 502.0-B-3, Orbit Data Messages, Recommended Standard (Blue Book), Issue 3, April 2023.
CCSDS 301.0-B-4, Time Code Formats (ASCII time codes A and B), 2010.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..core import NS_PER_S, InputError
from ..load import time_system_to_utc_ns

__all__ = ["OemSegment", "read_oem", "write_oem", "parse_ccsds_time", "DEFAULT_DEGREE"]

_GCRF_NAMES = ("GCRF", "ICRF", "EME2000")
_TIME_SYSTEMS = ("UTC", "TAI", "TT", "GPS")
_METHODS = ("LAGRANGE", "HERMITE", "LINEAR")
DEFAULT_DEGREE = 7
_REQUIRED_META = ("OBJECT_NAME", "OBJECT_ID", "CENTER_NAME", "REF_FRAME", "TIME_SYSTEM", "START_TIME",
                  "STOP_TIME")
# ASCII time code A (calendar) or B (day of year), CCSDS 301.0-B-4 section 3.5; optional "Z"
_TIME_RE = re.compile(r"^(\d{4})-(?:(\d{2})-(\d{2})|(\d{3}))T(\d{2}):(\d{2}):(\d{2}(?:\.\d*)?)Z?$")
_KEY_VALUE = re.compile(r"^([A-Z_]+)\s*=\s*(.*)$")


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


def _segment_meta(path: Path, meta: dict, meta_line: int, key_lines: dict) -> tuple[str, str, str, int]:
    """Check one metadata block: the frame recon treats it as, the time system, the method, the degree."""
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
    return frame, system, method, 1 if method == "LINEAR" else int(degree_text)


def _segment(path: Path, meta: dict, meta_line: int, key_lines: dict, rows: list) -> OemSegment:
    """One segment from its metadata and its data rows (line, label ns, six numbers, epoch text)."""
    frame, system, method, degree = _segment_meta(path, meta, meta_line, key_lines)

    def when(key: str) -> np.datetime64:
        try:
            label = parse_ccsds_time(meta[key])
        except ValueError:
            raise InputError(f"expected {key} as a CCSDS time like 2026-07-14T09:12:00.000, got "
                             f"{meta[key]!r}", path, line=key_lines[key]) from None
        return np.datetime64(int(time_system_to_utc_ns(np.array([label.astype(np.int64)]), system)[0]), "ns")

    if not rows:
        raise InputError("expected ephemeris data lines after META_STOP, found none", path, line=meta_line)
    lines = np.array([r[0] for r in rows])
    t = time_system_to_utc_ns(np.array([r[1] for r in rows], dtype=np.int64), system)
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


class _Parser:
    """One pass over the lines of an OEM file: header -> meta -> data (-> covariance) -> meta ...

    Each content line goes to the handler of the current state; a segment is checked and kept when
    the next ``META_START`` or the end of the file closes it.
    """

    def __init__(self, path: Path):
        self.path = path
        self.state = "header"
        self.header: dict[str, str] = {}
        self.segments: list[OemSegment] = []
        self._open_segment(0)

    def _open_segment(self, meta_line: int) -> None:
        self.meta: dict[str, str] = {}
        self.key_lines: dict[str, int] = {}
        self.rows: list = []
        self.meta_line = meta_line

    def _close_segment(self) -> None:
        self.segments.append(_segment(self.path, self.meta, self.meta_line, self.key_lines, self.rows))

    def line(self, number: int, line: str) -> None:
        if self.state == "header" and not self.header:
            m = re.match(r"^CCSDS_OEM_VERS\s*=\s*(\S+)$", line)
            if not m or m.group(1) not in ("1.0", "2.0", "3.0"):
                raise InputError(f"expected the first line 'CCSDS_OEM_VERS = 3.0' (or 1.0, 2.0), got {line!r}",
                                 self.path, line=number)
            self.header["CCSDS_OEM_VERS"] = m.group(1)
        elif line == "META_START":
            self._meta_start(number)
        elif self.state == "header":
            m = _KEY_VALUE.match(line)
            if not m:
                raise InputError(f"expected a header line 'KEY = value' or META_START, got {line!r}", self.path,
                                 line=number)
            self.header[m.group(1)] = m.group(2).strip()
        elif self.state == "meta":
            self._meta_line(number, line)
        elif self.state == "covariance":
            if line == "COVARIANCE_STOP":
                self.state = "data"
        else:
            self._data_line(number, line)

    def _meta_start(self, number: int) -> None:
        if self.state == "meta":
            raise InputError("expected META_STOP before the next META_START", self.path, line=number)
        if self.state == "covariance":
            raise InputError("expected COVARIANCE_STOP before META_START", self.path, line=number)
        if self.state == "data":
            self._close_segment()
        self.state = "meta"
        self._open_segment(number)

    def _meta_line(self, number: int, line: str) -> None:
        if line == "META_STOP":
            self.state = "data"
            return
        m = _KEY_VALUE.match(line)
        if not m:
            raise InputError(f"expected a metadata line 'KEY = value' or META_STOP, got {line!r}", self.path,
                             line=number)
        self.meta[m.group(1)] = m.group(2).strip()
        self.key_lines[m.group(1)] = number

    def _data_line(self, number: int, line: str) -> None:
        if line == "COVARIANCE_START":
            self.state = "covariance"
            return
        if line in ("DATA_START", "DATA_STOP"):
            return
        fields = line.split()
        if len(fields) not in (7, 10):
            raise InputError(f"expected a data line 'EPOCH X Y Z X_DOT Y_DOT Z_DOT' (7 or 10 fields), got "
                             f"{len(fields)} fields: {line!r}", self.path, line=number)
        try:
            label = parse_ccsds_time(fields[0])
            values = [float(f) for f in fields[1:7]]
        except ValueError:
            raise InputError(f"expected a CCSDS epoch and six numbers (km, km/s), got {line!r}", self.path,
                             line=number) from None
        if not np.all(np.isfinite(values)):
            raise InputError(f"expected finite numbers, got {line!r}", self.path, line=number)
        self.rows.append((number, int(label.astype(np.int64)), values, fields[0]))

    def finish(self) -> list[OemSegment]:
        """Check how the file ended, close the last segment and return all of them."""
        if not self.header:
            raise InputError("expected a CCSDS OEM file starting 'CCSDS_OEM_VERS = 3.0', the file is empty",
                             self.path)
        if self.state == "header":
            raise InputError("expected at least one META_START ... META_STOP segment, found none", self.path)
        if self.state == "meta":
            raise InputError("expected META_STOP before the end of the file", self.path, line=self.meta_line)
        if self.state == "covariance":
            raise InputError("expected COVARIANCE_STOP before the end of the file", self.path)
        self._close_segment()
        return self.segments


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
    parser = _Parser(path)
    for number, raw in enumerate(text.splitlines(), start=1):
        line = raw.strip()
        if line and not line.startswith("COMMENT"):
            parser.line(number, line)
    return parser.finish()


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
