"""Typed access to the tables of a parsed TOML file, with errors that name the dotted key.

Each accessor checks one kind of value (string from a list, number, vector, 3x3 matrix, rotation,
column names, file, UTC time, sub-table) and raises :class:`recon.core.InputError` naming the file,
the dotted key, what was expected and what was found.
"""

from __future__ import annotations

import datetime as dt
import math
from pathlib import Path
from typing import Any

import numpy as np

from ..core import InputError

__all__ = ["Reader", "parse_utc"]


def parse_utc(text: Any, *, file: Path | str | None = None, key: str | None = None) -> np.datetime64:
    """Parse an ISO 8601 UTC time ("2026-07-14T09:12:00Z" or a TOML datetime) to datetime64[ns]."""
    if isinstance(text, dt.datetime):
        if text.tzinfo is not None:
            text = text.astimezone(dt.UTC).replace(tzinfo=None)
        return np.datetime64(text, "ns")
    if isinstance(text, dt.date):
        return np.datetime64(text, "ns")
    if not isinstance(text, str):
        raise InputError(f"expected a UTC time like \"2026-07-14T09:12:00Z\", got {text!r}", file, key=key)
    s = text.strip()
    if s.endswith(("Z", "z")):
        s = s[:-1]
    elif s.endswith("+00:00"):
        s = s[:-6]
    try:
        return np.datetime64(s, "ns")
    except ValueError:
        raise InputError(f"expected a UTC time like \"2026-07-14T09:12:00Z\", got {text!r}",
                         file, key=key) from None


class Reader:
    """Typed access to one TOML table with errors that name the dotted key."""

    def __init__(self, path: Path, table: dict, prefix: str):
        self.path, self.table, self.prefix = path, table, prefix

    def key(self, key: str) -> str:
        """The dotted key of ``key`` in this table."""
        return f"{self.prefix}.{key}" if self.prefix else key

    def err(self, key: str, message: str) -> InputError:
        return InputError(message, self.path, key=self.key(key))

    def has(self, key: str) -> bool:
        return key in self.table

    def get(self, key: str, default: Any = ..., *, required: bool = True) -> Any:
        if key in self.table:
            return self.table[key]
        if default is not ... or not required:
            return None if default is ... else default
        raise self.err(key, "expected this key, it is missing")

    def string(self, key: str, choices: tuple[str, ...] | None = None, default: Any = ...) -> str:
        v = self.get(key, default)
        if v is None and default is None:
            return None
        if not isinstance(v, str) or not v.strip():
            raise self.err(key, f"expected a non-empty string, got {v!r}")
        if choices is not None and v not in choices:
            raise self.err(key, f"expected one of {', '.join(repr(c) for c in choices)}, got {v!r}")
        return v

    def number(self, key: str, default: Any = ..., *, positive: bool = False,
               nonnegative: bool = False) -> float | None:
        v = self.get(key, default)
        if v is None and default is None:
            return None
        if isinstance(v, bool) or not isinstance(v, int | float) or not math.isfinite(v):
            raise self.err(key, f"expected a finite number, got {v!r}")
        if positive and not v > 0:
            raise self.err(key, f"expected a number > 0, got {v!r}")
        if nonnegative and v < 0:
            raise self.err(key, f"expected a number >= 0, got {v!r}")
        return float(v)

    def vector(self, key: str, n: int = 3, default: Any = ..., *, positive: bool = False) -> np.ndarray | None:
        v = self.get(key, default)
        if v is None and default is None:
            return None
        if (not isinstance(v, list) or len(v) != n
                or any(isinstance(x, bool) or not isinstance(x, int | float) for x in v)):
            raise self.err(key, f"expected a list of {n} numbers, got {v!r}")
        a = np.asarray(v, dtype=float)
        if not np.all(np.isfinite(a)):
            raise self.err(key, f"expected finite numbers, got {v!r}")
        if positive and not np.all(a > 0):
            raise self.err(key, f"expected numbers > 0, got {v!r}")
        return a

    def matrix(self, key: str, default: Any = ...) -> np.ndarray | None:
        v = self.get(key, default)
        if v is None and default is None:
            return None
        ok = (isinstance(v, list) and len(v) == 3
              and all(isinstance(r, list) and len(r) == 3 for r in v)
              and all(not isinstance(x, bool) and isinstance(x, int | float) for r in v for x in r))
        if not ok:
            shape = (f"{len(v)}x{'/'.join(str(len(r)) if isinstance(r, list) else '?' for r in v)}"
                     if isinstance(v, list) else type(v).__name__)
            raise self.err(key, f"expected a 3x3 matrix (3 lists of 3 numbers), got {shape}: {v!r}")
        a = np.asarray(v, dtype=float)
        if not np.all(np.isfinite(a)):
            raise self.err(key, f"expected finite numbers, got {v!r}")
        return a

    def rotation(self, key: str) -> np.ndarray:
        """A 3x3 mounting matrix that must be a proper rotation, re-orthonormalised."""
        m = self.matrix(key)
        # A mounting matrix must be a proper rotation: orthonormal with det +1 (a reflection means an
        # axis was typed with the wrong sign). The tolerance admits matrices typed with ~4 decimals.
        err = np.abs(m @ m.T - np.eye(3)).max()
        if err > 1e-3 or np.linalg.det(m) < 0:
            raise self.err(key, f"expected a rotation matrix (orthonormal, determinant +1), got {m.tolist()} "
                                f"(|M M^T - I| = {err:.3g}, det = {np.linalg.det(m):.3g})")
        # re-orthonormalise so that small typing errors do not leak a scale into the data
        u, _, vt = np.linalg.svd(m)
        return u @ vt

    def columns(self, key: str, n: int = 3) -> tuple[str, ...]:
        v = self.get(key)
        if (not isinstance(v, list) or len(v) != n
                or not all(isinstance(c, str) and c for c in v)):
            raise self.err(key, f"expected a list of {n} column names, got {v!r}")
        return tuple(v)

    def file(self, key: str, *, must_exist: bool = True) -> Path:
        v = self.string(key)
        p = (self.path.parent / v).resolve()
        if must_exist and not p.is_file():
            raise self.err(key, f"expected an existing file, got {v!r} (looked for {p})")
        return p

    def utc(self, key: str, *, file: Path | None = None) -> np.datetime64:
        """The UTC time at ``key`` (see :func:`parse_utc`); ``file`` overrides the file named in errors."""
        return parse_utc(self.get(key), file=self.path if file is None else file, key=self.key(key))

    def sub(self, key: str, *, required: bool = True) -> Reader | None:
        v = self.get(key, required=required)
        if v is None:
            return None
        if not isinstance(v, dict):
            raise self.err(key, f"expected a table, got {v!r}")
        return Reader(self.path, v, self.key(key))
