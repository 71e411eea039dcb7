"""Read and check a mission file (TOML; the keys are listed in DEVELOPERS.md, "Mission file").

Every problem raises :class:`recon.errors.InputError` naming the file, the dotted key, what was
expected and what was found. Paths in the file are resolved relative to the file. Nothing here reads
the logs themselves: that is ``load``'s job.
"""

from __future__ import annotations

import math
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .core import InputError

__all__ = [
    "TimeSpec", "SensorSpec", "CoilSpec", "ControllerSpec", "PositionsSpec", "OrbitSpec",
    "EstimatorSpec", "Mission", "load_mission", "parse_utc",
]

TIME_FORMATS = ("iso", "unix", "gps", "ticks")
MAG_UNITS = ("nT", "uT", "mG", "G", "T")
GYRO_UNITS = ("rad/s", "deg/s")
COIL_UNITS = ("A", "mA", "duty")
MAG_SAMPLING = ("coils_off", "coils_on", "windowed")
LAWS = ("bdot", "cross_product", "none")
ESTIMATOR_MODES = ("auto", "gyro", "dynamics")


@dataclass(frozen=True)
class TimeSpec:
    """How one log stamps its rows.

    ``format``: "iso" (UTC strings), "unix" (s since 1970 UTC), "gps" (s since 1980-01-06 on the GPS
    scale), "ticks" (onboard counter: ``epoch + count / rate_hz``, wrapping at ``2**rollover_bits``).
    """

    column: str
    format: str
    epoch: np.datetime64 | None = None
    rate_hz: float | None = None
    rollover_bits: int | None = None


@dataclass(frozen=True)
class SensorSpec:
    """A magnetometer or gyro log. ``full_scale`` and ``noise`` are in the file's unit (after scale
    and offset); ``sensor_to_body`` is M with v_body = M @ v_sensor."""

    file: Path
    time: TimeSpec
    columns: tuple[str, str, str]
    unit: str
    sensor_to_body: np.ndarray
    full_scale: float | None = None
    noise: float | None = None
    bias_walk: float | None = None
    scale: float = 1.0
    offset: float = 0.0


@dataclass(frozen=True)
class CoilSpec:
    """The coil-current log and the coils' nominal model (m_body = dipole_per_amp @ i)."""

    file: Path
    time: TimeSpec
    columns: tuple[str, str, str]
    unit: str
    max_current_A: np.ndarray
    dipole_per_amp: np.ndarray
    mag_sampling: str
    off_window_s: tuple[float, float] | None = None
    scale: float = 1.0
    offset: float = 0.0


@dataclass(frozen=True)
class ControllerSpec:
    """The onboard magnetic control law. ``gain``: B-dot A m^2 s / T; cross-product 1/s."""

    law: str
    gain: float
    period_s: float
    first_tick: np.datetime64 | None = None
    target_momentum_Nms: np.ndarray | None = None


@dataclass(frozen=True)
class PositionsSpec:
    file: Path
    time: TimeSpec
    columns: tuple[str, str, str]
    frame: str
    unit: str


@dataclass(frozen=True)
class OrbitSpec:
    """Exactly one of ``tle`` (two lines), ``positions`` or ``oem`` is set."""

    tle: tuple[str, str] | None = None
    positions: PositionsSpec | None = None
    oem: Path | None = None

    @property
    def kind(self) -> str:
        return "tle" if self.tle else ("positions" if self.positions else "oem")


@dataclass(frozen=True)
class EstimatorSpec:
    mode: str = "auto"
    overrides: dict[str, float] = field(default_factory=dict)


@dataclass(frozen=True)
class Mission:
    """A checked mission file. Optional sections are ``None`` when absent."""

    path: Path
    pass_id: str
    start: np.datetime64 | None
    stop: np.datetime64 | None
    inertia_kg_m2: np.ndarray
    magnetometer: SensorSpec
    gyro: SensorSpec | None
    coils: CoilSpec | None
    controller: ControllerSpec | None
    orbit: OrbitSpec | None
    estimator: EstimatorSpec
    raw: dict[str, Any] = field(repr=False, default_factory=dict)


# ----------------------------------------------------------------------------------------------
def parse_utc(text: Any, *, file: Path | str | None = None, key: str | None = None) -> np.datetime64:
    """Parse an ISO 8601 UTC time ("2026-07-14T09:12:00Z" or a TOML datetime) to datetime64[ns]."""
    import datetime as _dt

    if isinstance(text, _dt.datetime):
        if text.tzinfo is not None:
            text = text.astimezone(_dt.UTC).replace(tzinfo=None)
        return np.datetime64(text, "ns")
    if isinstance(text, _dt.date):
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


class _Reader:
    """Typed access to one TOML table with errors that name the dotted key."""

    def __init__(self, path: Path, table: dict, prefix: str):
        self.path, self.table, self.prefix = path, table, prefix

    def err(self, key: str, message: str) -> InputError:
        return InputError(message, self.path, key=f"{self.prefix}.{key}" if self.prefix else key)

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

    def sub(self, key: str, *, required: bool = True) -> _Reader | None:
        v = self.get(key, required=required)
        if v is None:
            return None
        if not isinstance(v, dict):
            raise self.err(key, f"expected a table, got {v!r}")
        return _Reader(self.path, v, f"{self.prefix}.{key}" if self.prefix else key)


def _rotation_matrix(r: _Reader, key: str) -> np.ndarray:
    m = r.matrix(key)
    # A mounting matrix must be a proper rotation: orthonormal with det +1 (a reflection means an
    # axis was typed with the wrong sign). The tolerance admits matrices typed with ~4 decimals.
    err = np.abs(m @ m.T - np.eye(3)).max()
    if err > 1e-3 or np.linalg.det(m) < 0:
        raise r.err(key, f"expected a rotation matrix (orthonormal, determinant +1), got {m.tolist()} "
                         f"(|M M^T - I| = {err:.3g}, det = {np.linalg.det(m):.3g})")
    # re-orthonormalise so that small typing errors do not leak a scale into the data
    u, _, vt = np.linalg.svd(m)
    return u @ vt


def _time(r: _Reader, key: str = "time") -> TimeSpec:
    t = r.sub(key)
    fmt = t.string("format", TIME_FORMATS)
    col = t.string("column")
    epoch = rate = bits = None
    if fmt == "ticks":
        epoch = parse_utc(t.get("epoch"), file=r.path, key=f"{t.prefix}.epoch")
        rate = t.number("rate_hz", positive=True)
        bits = t.get("rollover_bits", None, required=False)
        if bits is not None and (isinstance(bits, bool) or not isinstance(bits, int) or not 1 <= bits <= 64):
            raise t.err("rollover_bits", f"expected a whole number from 1 to 64, got {bits!r}")
    else:
        for k in ("epoch", "rate_hz", "rollover_bits"):
            if t.has(k):
                raise t.err(k, f"only used with format = \"ticks\", got format = {fmt!r}")
    return TimeSpec(col, fmt, epoch, rate, bits)


def _sensor(r: _Reader, units: tuple[str, ...], *, gyro: bool) -> SensorSpec:
    return SensorSpec(
        file=r.file("file"),
        time=_time(r),
        columns=r.columns("columns"),
        unit=r.string("unit", units),
        sensor_to_body=_rotation_matrix(r, "sensor_to_body"),
        full_scale=r.number("full_scale", None, positive=True),
        noise=r.number("noise", None, positive=True),
        bias_walk=r.number("bias_walk", None, nonnegative=True) if gyro else None,
        scale=r.number("scale", 1.0),
        offset=r.number("offset", 0.0),
    )


def _coils(r: _Reader) -> CoilSpec:
    sampling = r.string("mag_sampling", MAG_SAMPLING)
    window = None
    if sampling == "windowed":
        w = r.vector("off_window_s", 2)
        if np.any(w < 0):
            raise r.err("off_window_s", f"expected [before, after] in seconds, both >= 0, got {w.tolist()}")
        window = (float(w[0]), float(w[1]))
    elif r.has("off_window_s"):
        raise r.err("off_window_s", f"only used with mag_sampling = \"windowed\", got {sampling!r}")
    c = r.matrix("dipole_per_amp")
    if np.any(np.abs(np.diag(c)) == 0):
        raise r.err("dipole_per_amp", f"expected a non-zero diagonal (A m^2 per A), got {c.tolist()}")
    return CoilSpec(
        file=r.file("file"), time=_time(r), columns=r.columns("columns"),
        unit=r.string("unit", COIL_UNITS), max_current_A=r.vector("max_current_A", positive=True),
        dipole_per_amp=c, mag_sampling=sampling, off_window_s=window,
        scale=r.number("scale", 1.0), offset=r.number("offset", 0.0),
    )


def _controller(r: _Reader) -> ControllerSpec:
    law = r.string("law", LAWS)
    gain = r.number("gain", 0.0 if law == "none" else ..., nonnegative=True)
    period = r.number("period_s", 1.0 if law == "none" else ..., positive=True)
    first = r.get("first_tick", None, required=False)
    first = None if first is None else parse_utc(first, file=r.path, key=f"{r.prefix}.first_tick")
    target = r.vector("target_momentum_Nms", 3, None)
    if law == "cross_product" and target is None:
        target = np.zeros(3)
    return ControllerSpec(law, gain, period, first, target)


def _orbit(r: _Reader) -> OrbitSpec:
    given = [k for k in ("tle", "tle_file", "positions", "oem") if r.has(k)]
    if len(given) != 1:
        raise InputError(f"expected exactly one of tle, tle_file, positions, oem, got {given or 'none'}",
                         r.path, key="orbit")
    k = given[0]
    if k in ("tle", "tle_file"):
        if k == "tle":
            lines = r.get("tle")
            if not isinstance(lines, list) or not all(isinstance(s, str) for s in lines):
                raise r.err("tle", f"expected a list of two TLE lines, got {lines!r}")
        else:
            p = r.file("tle_file")
            lines = [s.rstrip() for s in p.read_text(errors="replace").splitlines() if s.strip()]
        lines = [s for s in lines if s.startswith(("1 ", "2 "))] if len(lines) == 3 else lines
        if len(lines) != 2 or not lines[0].startswith("1 ") or not lines[1].startswith("2 "):
            raise r.err(k, f"expected two TLE lines starting '1 ' and '2 ' (optionally after a name line), "
                           f"got {lines!r}")
        return OrbitSpec(tle=(lines[0], lines[1]))
    if k == "oem":
        return OrbitSpec(oem=r.file("oem"))
    p = r.sub("positions")
    return OrbitSpec(positions=PositionsSpec(
        file=p.file("file"), time=_time(p), columns=p.columns("columns"),
        frame=p.string("frame", ("itrf", "gcrf")), unit=p.string("unit", ("km", "m"))))


def load_mission(path: str | Path) -> Mission:
    """Read and check a mission file.

    Parameters
    ----------
    path : str or Path
        The TOML file. Paths inside it are relative to it.

    Raises
    ------
    InputError
        With file, key, expectation and what was found.
    """
    path = Path(path)
    if not path.is_file():
        raise InputError("expected a mission file (TOML), no such file", path)
    try:
        raw = tomllib.loads(path.read_text(encoding="utf-8"))
    except UnicodeDecodeError as e:
        raise InputError(f"expected UTF-8 text, got undecodable bytes ({e.reason})", path) from None
    except tomllib.TOMLDecodeError as e:
        raise InputError(f"expected valid TOML: {e}", path) from None
    top = _Reader(path.resolve(), raw, "")
    known = {"pass", "spacecraft", "orbit", "magnetometer", "gyro", "coils", "controller", "estimator"}
    unknown = sorted(set(raw) - known)
    if unknown:
        raise InputError(f"expected only the sections {sorted(known)}, got unknown {unknown}", path,
                         key=unknown[0])

    p = top.sub("pass")
    pass_id = p.string("id")
    if any(c in pass_id for c in "/\\\0") or pass_id in (".", ".."):
        raise p.err("id", f"expected a name usable as a folder (no slashes), got {pass_id!r}")
    start = stop = None
    if p.has("start"):
        start = parse_utc(p.get("start"), file=path, key="pass.start")
    if p.has("stop"):
        stop = parse_utc(p.get("stop"), file=path, key="pass.stop")
    if start is not None and stop is not None and stop <= start:
        raise p.err("stop", f"expected stop after start ({start}), got {stop}")

    sc = top.sub("spacecraft")
    inertia = sc.matrix("inertia_kg_m2")
    if np.abs(inertia - inertia.T).max() > 1e-9 * np.abs(inertia).max():
        raise sc.err("inertia_kg_m2", f"expected a symmetric matrix, got {inertia.tolist()}")
    eig = np.linalg.eigvalsh(inertia)
    if eig.min() <= 0:
        raise sc.err("inertia_kg_m2", f"expected a positive-definite inertia, got eigenvalues {eig.tolist()}")

    mag = _sensor(top.sub("magnetometer"), MAG_UNITS, gyro=False)
    gyro_r = top.sub("gyro", required=False)
    gyro = None if gyro_r is None else _sensor(gyro_r, GYRO_UNITS, gyro=True)
    coils_r = top.sub("coils", required=False)
    coils = None if coils_r is None else _coils(coils_r)
    ctl_r = top.sub("controller", required=False)
    controller = None if ctl_r is None else _controller(ctl_r)
    if controller is not None and controller.law != "none" and coils is None:
        raise InputError("expected a [coils] section when [controller] law is not \"none\"", path,
                         key="controller.law")
    orbit_r = top.sub("orbit", required=False)
    orbit = None if orbit_r is None else _orbit(orbit_r)

    est_r = top.sub("estimator", required=False)
    if est_r is None:
        estimator = EstimatorSpec()
    else:
        mode = est_r.string("mode", ESTIMATOR_MODES, "auto")
        overrides = {}
        for k in est_r.table:
            if k == "mode":
                continue
            overrides[k] = est_r.number(k, nonnegative=True)
        estimator = EstimatorSpec(mode, overrides)
    if estimator.mode == "gyro" and gyro is None:
        raise InputError("expected a [gyro] section when estimator.mode = \"gyro\"", path, key="estimator.mode")

    return Mission(path=path.resolve(), pass_id=pass_id, start=start, stop=stop, inertia_kg_m2=inertia,
                   magnetometer=mag, gyro=gyro, coils=coils, controller=controller, orbit=orbit,
                   estimator=estimator, raw=raw)
