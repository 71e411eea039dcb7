"""Byte-level scan of a telemetry CSV: line boundaries, header, and lines that cannot be rows.

A log is read as bytes once. Lines are split on LF (a trailing CR is dropped, so CRLF files read
the same). Line numbers are 1-based and the header is line 1; every line after the header counts
as read, blank ones included, and a final LF does not start another line.

Structural problems are found here, vectorised over the whole buffer, so that only well-formed lines
reach the pandas C parser: blank lines, bytes that are not text (control bytes, invalid UTF-8),
and lines whose field count differs from the header's. No quoting is recognised (telemetry logs
are plain numbers and ISO times), so one line is always one record.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..core import InputError

__all__ = ["Scan", "scan_bytes", "read_log_bytes", "REASON_BLANK", "REASON_GARBAGE", "REASON_FIELDS"]

REASON_BLANK = "blank"
REASON_GARBAGE = "garbage_bytes"
REASON_FIELDS = "field_count"

_LF, _CR, _TAB, _COMMA = 10, 13, 9, 44
_BOM = b"\xef\xbb\xbf"
_PLAIN = bytes([_TAB, _LF, *range(32, 127)])  # printable ASCII, TAB and LF
_ODD_BYTE = np.ones(256, dtype=bool)
_ODD_BYTE[list(_PLAIN)] = False
_ODD_BYTE.flags.writeable = False


@dataclass(frozen=True)
class Scan:
    """Where the lines of one CSV are and which of them cannot be parsed as rows.

    Attributes
    ----------
    data : bytes
        The whole file (a UTF-8 byte-order mark, if any, removed).
    header : list of str
        Header field names, stripped of surrounding blanks.
    starts, ends : (L,) int64 arrays
        Byte offsets of each data line (line number = index + 2); ``ends`` excludes LF and a
        trailing CR.
    bad : (B,) int64 array
        Indices (into ``starts``) of lines that cannot be rows, ascending.
    bad_reason, bad_detail : lists of str, length B
    commas : (C,) int64 array
        Byte offsets of every comma in ``data``.
    first_comma : (L,) int64 array
        Index into ``commas`` of the first comma at or after each line's start.
    """

    data: bytes
    header: list[str]
    starts: np.ndarray
    ends: np.ndarray
    bad: np.ndarray
    bad_reason: list[str]
    bad_detail: list[str]
    commas: np.ndarray
    first_comma: np.ndarray

    def field_span(self, rows: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray]:
        """Byte range ``[start, end)`` of field ``k`` (0-based) in each of the well-formed lines ``rows``."""
        n_fields = len(self.header)
        rows = np.asarray(rows, dtype=np.int64)
        c0 = self.first_comma[rows]
        start = self.starts[rows] if k == 0 else self.commas[c0 + k - 1] + 1
        end = self.ends[rows] if k == n_fields - 1 else self.commas[c0 + k]
        return start, end

    @property
    def n_lines(self) -> int:
        """Lines read after the header (blank ones included)."""
        return int(self.starts.size)

    def line_bytes(self, i: int) -> bytes:
        return self.data[int(self.starts[i]):int(self.ends[i])]

    def good_body(self) -> tuple[bytes, np.ndarray]:
        """The well-formed data lines joined by LF, and their indices into ``starts``."""
        n = self.n_lines
        good = np.ones(n, dtype=bool)
        good[self.bad] = False
        idx = np.flatnonzero(good)
        if idx.size == 0:
            return b"", idx
        if self.bad.size == 0 and not self._has_cr():
            return self.data[int(self.starts[0]):], idx
        buf = np.frombuffer(self.data, dtype=np.uint8)
        edges = np.zeros(buf.size + 1, dtype=np.int8)
        # mark [start, end) of each good line with +1/-1 edges, then integrate: O(bytes), no loop
        edges[self.starts[idx]] += 1
        edges[self.ends[idx]] -= 1
        inside = np.cumsum(edges[:-1], dtype=np.int8).astype(bool)
        # each good line is followed by one LF (written over a CR of a CRLF ending)
        term = self.ends[idx]
        term = term[term < buf.size]
        out = buf.copy()
        out[term] = _LF
        inside[term] = True
        out = out[inside].tobytes()
        return out, idx

    def _has_cr(self) -> bool:
        return b"\r" in self.data


def read_log_bytes(path: Path, what: str) -> bytes:
    """Read a whole log; an unreadable or empty file raises InputError."""
    try:
        data = Path(path).read_bytes()
    except FileNotFoundError:
        raise InputError(f"expected the {what} log, no such file", path) from None
    except IsADirectoryError:
        raise InputError(f"expected the {what} log as a file, found a directory", path) from None
    except OSError as e:
        raise InputError(f"expected a readable {what} log, could not read it ({e.strerror})", path) from None
    if data.startswith(_BOM):
        data = data[len(_BOM):]
    if not data.strip():
        raise InputError(f"expected a CSV {what} log with a header line, found an empty file", path, line=1)
    return data


def scan_bytes(data: bytes, path: Path | str) -> Scan:
    """Split ``data`` into header and data lines and find the lines that cannot be rows.

    Raises
    ------
    InputError
        If the header (line 1) is blank or not text.
    """
    buf = np.frombuffer(data, dtype=np.uint8)
    lf = np.flatnonzero(buf == _LF)
    starts = np.concatenate(([0], lf + 1)).astype(np.int64)
    ends = np.concatenate((lf, [buf.size])).astype(np.int64)
    if data.endswith(b"\n"):  # a final LF ends the last line, it does not start another
        starts, ends = starts[:-1], ends[:-1]
    has_cr = np.zeros(ends.shape, dtype=bool)
    nonempty = ends > starts
    has_cr[nonempty] = buf[ends[nonempty] - 1] == _CR
    ends = ends - has_cr

    head = data[int(starts[0]):int(ends[0])]
    try:
        head_text = head.decode("utf-8")
    except UnicodeDecodeError:
        raise InputError("expected a header line of column names, found bytes that are not UTF-8 text",
                         path, line=1) from None
    if not head_text.strip():
        raise InputError("expected a header line of column names, found a blank line", path, line=1)
    bad_char = next((ch for ch in head_text if (ord(ch) < 32 and ch != "\t") or ord(ch) == 127), None)
    if bad_char is not None:
        raise InputError(f"expected a header line of column names, found the control byte "
                         f"0x{ord(bad_char):02x}", path, line=1)
    header = [h.strip() for h in head_text.split(",")]
    n_fields = len(header)
    starts, ends = starts[1:], ends[1:]

    # field count per line from the comma positions
    commas = np.flatnonzero(buf == _COMMA)
    first_comma = np.searchsorted(commas, starts)
    n_commas = np.searchsorted(commas, ends) - first_comma
    suspect = (n_commas != n_fields - 1) | (ends == starts)
    # bytes that are not text: control bytes other than TAB (a CR inside a line included), and any
    # byte >= 0x80 (checked below: valid UTF-8 is text). Most logs have none: ask C first.
    if data.translate(None, _PLAIN):
        odd_pos = np.flatnonzero(_ODD_BYTE[buf])
    else:
        odd_pos = np.zeros(0, dtype=np.int64)
    if odd_pos.size and starts.size:
        # a CR dropped as line ending is not odd
        odd_pos = odd_pos[~np.isin(odd_pos, ends[has_cr[1:]])]
        owner = np.searchsorted(starts, odd_pos, side="right") - 1
        owner = owner[(owner >= 0) & (odd_pos < ends[np.maximum(owner, 0)])]
        suspect[np.unique(owner)] = True

    bad, reasons, details = [], [], []
    for i in np.flatnonzero(suspect):
        raw = data[int(starts[i]):int(ends[i])]
        reason = detail = None
        if not raw.strip(b" \t"):
            reason, detail = REASON_BLANK, "blank line"
        else:
            ctrl = [b for b in raw if (b < 32 and b != _TAB) or b == 127]
            try:
                text = raw.decode("utf-8")
            except UnicodeDecodeError as e:
                reason, detail = REASON_GARBAGE, f"bytes that are not UTF-8 text at column {e.start + 1}"
            else:
                if ctrl:
                    reason, detail = REASON_GARBAGE, f"control byte 0x{ctrl[0]:02x} in the line"
                elif text.count(",") != n_fields - 1:
                    reason = REASON_FIELDS
                    detail = f"expected {n_fields} fields as in the header, found {text.count(',') + 1}"
        if reason is not None:
            bad.append(i)
            reasons.append(reason)
            details.append(detail)
    return Scan(data=data, header=header, starts=starts, ends=ends,
                bad=np.asarray(bad, dtype=np.int64), bad_reason=reasons, bad_detail=details,
                commas=commas, first_comma=first_comma)
