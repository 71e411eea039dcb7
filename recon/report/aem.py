"""CCSDS Attitude Ephemeris Message (AEM), version 2.0, KVN: writer and reader.

The format is CCSDS 504.0-B-2, Attitude Data Messages (Blue Book, January 2024), section 4:

- header: ``CCSDS_AEM_VERS = 2.0``, optional ``COMMENT`` lines, ``CREATION_DATE`` (UTC, an
  argument here so that output is deterministic), ``ORIGINATOR``, optional ``MESSAGE_ID``
  (table 4-2);
- metadata between ``META_START`` and ``META_STOP``, in the order of table 4-3: ``OBJECT_NAME``,
  ``OBJECT_ID``, ``CENTER_NAME``, ``REF_FRAME_A``, ``REF_FRAME_B``, ``TIME_SYSTEM``, ``START_TIME``,
  ``STOP_TIME``, ``ATTITUDE_TYPE``, ``ANGVEL_FRAME`` (with angular velocity),
  ``INTERPOLATION_METHOD``/``INTERPOLATION_DEGREE`` (optional, together);
- data lines between ``DATA_START`` and ``DATA_STOP`` (4.2.4): ``EPOCH Q1 Q2 Q3 QC`` for
  ``QUATERNION``, plus ``ANGVEL_X ANGVEL_Y ANGVEL_Z`` in deg/s for ``QUATERNION/ANGVEL``.

Version 2.0 dropped ATTITUDE_DIR and QUATERNION_TYPE (annex J): the quaternion is always "from
REF_FRAME_A to REF_FRAME_B" with the scalar QC last, in the convention of annex F2, where
``X_B = M_BA X_A`` and ``M_BA[0, 1] = 2 (Q1 Q2 + Q3 QC)``. That is Shuster's convention, so the file
holds the conjugate of recon's scipy-convention ``q_body_from_gcrf`` (converted in
:func:`recon.core.frames.scipy_from_shuster_quaternion`); both describe the same GCRF-to-body transform.
Angular velocity (annex F4) is that of frame B relative to frame A, here in body axes
(``ANGVEL_FRAME = SC_BODY_1``).

``REF_FRAME_A = GCRF``: reference-frame names come from the SANA registries named in annex B3; GCRF
is listed in SANA's celestial-body reference frames (memory). ``SC_BODY_1`` is the spacecraft body
frame name used throughout the standard's examples. ``CENTER_NAME = EARTH`` (annex B8, SANA orbit
centers).

References
----------
CCSDS 504.0-B-2 (2024). Attitude Data Messages. Recommended Standard, Blue Book, issue 2.
CCSDS 502.0-B-3 (2023). Orbit Data Messages (shared KVN rules and time format, 6.8.9 of 504.0-B-2).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..core import InputError, scipy_from_shuster_quaternion

__all__ = ["AemSegment", "Aem", "format_aem", "write_aem", "read_aem", "ATTITUDE_TYPES"]

AEM_VERSION = "2.0"
ATTITUDE_TYPES = ("QUATERNION", "QUATERNION/ANGVEL")  # the two this writer produces (table 4-4)
HEADER_KEYS = ("CCSDS_AEM_VERS", "COMMENT", "CLASSIFICATION", "CREATION_DATE", "ORIGINATOR", "MESSAGE_ID")
META_KEYS = ("COMMENT", "OBJECT_NAME", "OBJECT_ID", "CENTER_NAME", "REF_FRAME_A", "REF_FRAME_B", "TIME_SYSTEM",
             "START_TIME", "USEABLE_START_TIME", "USEABLE_STOP_TIME", "STOP_TIME", "ATTITUDE_TYPE",
             "EULER_ROT_SEQ", "ANGVEL_FRAME", "INTERPOLATION_METHOD", "INTERPOLATION_DEGREE")
META_REQUIRED = ("OBJECT_NAME", "OBJECT_ID", "REF_FRAME_A", "REF_FRAME_B", "TIME_SYSTEM", "START_TIME",
                 "STOP_TIME", "ATTITUDE_TYPE")


def _epoch(t) -> str:
    """CCSDS time string A (504.0-B-2 6.8.9): YYYY-MM-DDThh:mm:ss.ffffff (UTC, no zone letter)."""
    return np.datetime_as_string(np.asarray(t).astype("datetime64[us]"), unit="us")


@dataclass(frozen=True)
class AemSegment:
    """One metadata block with its data.

    Attributes
    ----------
    metadata : dict of keyword -> value (strings, as in the file)
    time_utc : (N,) datetime64[ns]
    q_body_from_gcrf : (N, 4) recon's scipy convention (converted back from the file's Q1 Q2 Q3 QC)
    w_body_rad_s : (N, 3) or None
    comments : list of str
    """

    metadata: dict
    time_utc: np.ndarray
    q_body_from_gcrf: np.ndarray
    w_body_rad_s: np.ndarray | None
    comments: list = field(default_factory=list)


@dataclass(frozen=True)
class Aem:
    """A parsed AEM: header keywords and segments."""

    header: dict
    segments: list
    comments: list = field(default_factory=list)


def format_aem(time_utc: np.ndarray, q_body_from_gcrf: np.ndarray, *, creation_date: np.datetime64 | str,
               originator: str, object_name: str, object_id: str, w_body_rad_s: np.ndarray | None = None,
               center_name: str | None = "EARTH", ref_frame_a: str = "GCRF", ref_frame_b: str = "SC_BODY_1",
               interpolation_method: str | None = None, interpolation_degree: int | None = None,
               message_id: str | None = None, comments: tuple[str, ...] = ()) -> str:
    """AEM 2.0 text for one attitude segment (see the module docstring for the conventions).

    Parameters
    ----------
    time_utc : (N,) datetime64, UTC, strictly increasing (4.2.4.8.1)
    q_body_from_gcrf : (N, 4) scalar-last, recon's (scipy) convention
    creation_date : datetime64 or ISO string, UTC; written as CREATION_DATE
    originator, object_name, object_id : str (OBJECT_ID: international designator or UNKNOWN)
    w_body_rad_s : (N, 3) rad/s, body frame, optional; gives ATTITUDE_TYPE = QUATERNION/ANGVEL
    interpolation_method, interpolation_degree : optional, both or neither (table 4-3)
    comments : header COMMENT lines

    Raises
    ------
    InputError
        Shapes, time order, or an interpolation method without a degree.
    """
    t = np.asarray(time_utc).astype("datetime64[ns]")
    q = np.asarray(q_body_from_gcrf, float)
    if t.ndim != 1 or len(t) < 1 or q.shape != (len(t), 4):
        raise InputError(f"expected N time stamps and (N, 4) quaternions, got {t.shape} and {q.shape}",
                         key="q_body_from_gcrf")
    if len(t) > 1 and np.any(np.diff(t.astype(np.int64)) <= 0):
        raise InputError("expected strictly increasing time stamps (CCSDS 504.0-B-2 4.2.4.8.1)", key="time_utc")
    if (interpolation_method is None) != (interpolation_degree is None):
        raise InputError("expected INTERPOLATION_METHOD and INTERPOLATION_DEGREE together (table 4-3), got "
                         f"{interpolation_method!r} and {interpolation_degree!r}", key="interpolation")
    for name, v in (("originator", originator), ("object_name", object_name), ("object_id", object_id)):
        if not isinstance(v, str) or not v.strip() or "\n" in v:
            raise InputError(f"expected a one-line non-empty string, got {v!r}", key=name)
    qn = q / np.linalg.norm(q, axis=1, keepdims=True)
    qc = scipy_from_shuster_quaternion(qn)  # conjugation: scipy -> Shuster/CCSDS (its own inverse)
    lines = [f"CCSDS_AEM_VERS = {AEM_VERSION}"]
    lines += [f"COMMENT {c}" for c in comments]
    lines.append(f"CREATION_DATE = {_epoch(np.datetime64(str(creation_date).rstrip('Z'), 'ns'))}")
    lines.append(f"ORIGINATOR = {originator}")
    if message_id is not None:
        lines.append(f"MESSAGE_ID = {message_id}")
    lines += ["", "META_START", f"OBJECT_NAME = {object_name}", f"OBJECT_ID = {object_id}"]
    if center_name:
        lines.append(f"CENTER_NAME = {center_name}")
    att_type = "QUATERNION" if w_body_rad_s is None else "QUATERNION/ANGVEL"
    lines += [f"REF_FRAME_A = {ref_frame_a}", f"REF_FRAME_B = {ref_frame_b}", "TIME_SYSTEM = UTC",
              f"START_TIME = {_epoch(t[0])}", f"STOP_TIME = {_epoch(t[-1])}", f"ATTITUDE_TYPE = {att_type}"]
    if w_body_rad_s is not None:
        lines.append(f"ANGVEL_FRAME = {ref_frame_b}")
    if interpolation_method is not None:
        lines += [f"INTERPOLATION_METHOD = {interpolation_method}",
                  f"INTERPOLATION_DEGREE = {int(interpolation_degree)}"]
    lines += ["META_STOP", "", "DATA_START"]
    ep = _epoch(t)
    if w_body_rad_s is None:
        body = [f"{e} {a:.12f} {b:.12f} {c:.12f} {d:.12f}" for e, (a, b, c, d) in zip(ep, qc, strict=True)]
    else:
        w = np.rad2deg(np.asarray(w_body_rad_s, float))
        if w.shape != (len(t), 3):
            raise InputError(f"expected ({len(t)}, 3) rates, got {w.shape}", key="w_body_rad_s")
        body = [f"{e} {a:.12f} {b:.12f} {c:.12f} {d:.12f} {x:.9e} {y:.9e} {z:.9e}"
                for e, (a, b, c, d), (x, y, z) in zip(ep, qc, w, strict=True)]
    lines += body
    lines += ["DATA_STOP", ""]
    return "\n".join(lines)


def write_aem(path: str | Path, time_utc: np.ndarray, q_body_from_gcrf: np.ndarray, **kwargs) -> Path:
    """Write :func:`format_aem` text to ``path`` (ASCII, '\\n' line ends). Returns the path."""
    path = Path(path)
    path.write_text(format_aem(time_utc, q_body_from_gcrf, **kwargs), encoding="ascii")
    return path


def _kv(line: str, path, lineno: int) -> tuple[str, str]:
    if "=" not in line:
        raise InputError(f"expected 'KEYWORD = value', got {line!r}", path, lineno)
    k, v = line.split("=", 1)
    v = v.strip()
    if v.endswith("]") and "[" in v:  # optional units in brackets (504.0-B-2 6.4)
        v = v[:v.rindex("[")].strip()
    return k.strip(), v


def read_aem(path: str | Path) -> Aem:
    """Parse a KVN AEM (version 2.0) with QUATERNION or QUATERNION/ANGVEL segments.

    Returns quaternions in recon's convention (``q_body_from_gcrf`` when REF_FRAME_A is the inertial
    frame and REF_FRAME_B the body) and angular velocity in rad/s.

    Raises
    ------
    InputError
        With the file and line of the first violation of the structure or keywords of 504.0-B-2
        section 4 that this reader checks.
    """
    path = Path(path)
    raw = path.read_text(encoding="ascii", errors="strict").splitlines()
    header: dict = {}
    hcomments: list = []
    segments: list = []
    state = "header"
    meta: dict = {}
    mcomments: list = []
    rows: list = []
    rowlines: list = []
    first = True
    for lineno, text in enumerate(raw, start=1):
        line = text.strip()
        if not line:
            continue
        if first:
            if not line.startswith("CCSDS_AEM_VERS"):
                raise InputError(f"expected the first line to be 'CCSDS_AEM_VERS = 2.0', got {line!r}", path, lineno)
            first = False
        if state == "header":
            if line == "META_START":
                state = "meta"
                meta, mcomments = {}, []
                continue
            if line.startswith("COMMENT"):
                hcomments.append(line[7:].strip())
                continue
            k, v = _kv(line, path, lineno)
            if k not in HEADER_KEYS:
                raise InputError(f"expected a header keyword among {HEADER_KEYS}, got {k!r}", path, lineno)
            header[k] = v
        elif state == "meta":
            if line == "META_STOP":
                missing = [k for k in META_REQUIRED if k not in meta]
                if missing:
                    raise InputError(f"expected metadata keywords {missing}, missing", path, lineno)
                if meta["ATTITUDE_TYPE"] not in ATTITUDE_TYPES:
                    raise InputError(f"expected ATTITUDE_TYPE in {ATTITUDE_TYPES}, got {meta['ATTITUDE_TYPE']!r}",
                                     path, lineno)
                state = "between"
                continue
            if line.startswith("COMMENT"):
                mcomments.append(line[7:].strip())
                continue
            k, v = _kv(line, path, lineno)
            if k not in META_KEYS:
                raise InputError(f"expected a metadata keyword among {META_KEYS}, got {k!r}", path, lineno)
            meta[k] = v
        elif state == "between":
            if line != "DATA_START":
                raise InputError(f"expected DATA_START after META_STOP, got {line!r}", path, lineno)
            state = "data"
            rows, rowlines = [], []
        elif state == "data":
            if line == "DATA_STOP":
                segments.append(_segment(meta, mcomments, rows, rowlines, path))
                state = "header_or_meta"
                continue
            if line.startswith("COMMENT"):
                continue
            rows.append(line.split())
            rowlines.append(lineno)
        elif state == "header_or_meta":
            if line != "META_START":
                raise InputError(f"expected META_START or end of file after DATA_STOP, got {line!r}", path, lineno)
            state = "meta"
            meta, mcomments = {}, []
    if header.get("CCSDS_AEM_VERS") != AEM_VERSION:
        raise InputError(f"expected CCSDS_AEM_VERS = {AEM_VERSION}, got {header.get('CCSDS_AEM_VERS')!r}", path, 1)
    for k in ("CREATION_DATE", "ORIGINATOR"):
        if k not in header:
            raise InputError(f"expected header keyword {k}, missing", path)
    if state != "header_or_meta":
        raise InputError(f"expected the file to end after DATA_STOP, it ended in the {state} section", path,
                         len(raw))
    return Aem(header, segments, hcomments)


def _segment(meta: dict, comments: list, rows: list, rowlines: list, path) -> AemSegment:
    ncol = 5 if meta["ATTITUDE_TYPE"] == "QUATERNION" else 8
    if meta.get("TIME_SYSTEM") != "UTC":
        raise InputError(f"expected TIME_SYSTEM = UTC, got {meta.get('TIME_SYSTEM')!r}", path)
    t, vals = [], []
    for r, ln in zip(rows, rowlines, strict=True):
        if len(r) != ncol:
            raise InputError(f"expected {ncol} items for {meta['ATTITUDE_TYPE']}, got {len(r)}", path, ln)
        try:
            t.append(np.datetime64(r[0].rstrip("Z"), "ns"))
            vals.append([float(x) for x in r[1:]])
        except ValueError:
            raise InputError(f"expected an epoch and {ncol - 1} numbers, got {' '.join(r)!r}", path, ln) from None
    t = np.array(t, dtype="datetime64[ns]")
    v = np.array(vals, dtype=float).reshape(len(t), ncol - 1)
    q = scipy_from_shuster_quaternion(v[:, :4])
    w = np.deg2rad(v[:, 4:7]) if ncol == 8 else None
    return AemSegment(dict(meta), t, q, w, list(comments))
