"""One reader per section of the mission file: each turns a checked TOML table into its spec.

The checks that span sections (a controller needs coils, the gyro mode needs a gyro) are made
by :func:`recon.config.mission.load_mission`.
"""

from __future__ import annotations

import numpy as np

from ..core import InputError
from .reader import Reader
from .specs import (
    COIL_UNITS,
    ESTIMATOR_MODES,
    LAWS,
    MAG_SAMPLING,
    TIME_FORMATS,
    CoilSpec,
    ControllerSpec,
    EstimatorSpec,
    OrbitSpec,
    PositionsSpec,
    SensorSpec,
    TimeSpec,
)

__all__ = ["time_spec", "sensor_spec", "coil_spec", "controller_spec", "orbit_spec", "estimator_spec"]


def time_spec(r: Reader, key: str = "time") -> TimeSpec:
    """The ``time = {column, format, epoch?, rate_hz?, rollover_bits?}`` table of a log."""
    t = r.sub(key)
    fmt = t.string("format", TIME_FORMATS)
    col = t.string("column")
    epoch = rate = bits = None
    if fmt == "ticks":
        epoch = t.utc("epoch", file=r.path)
        rate = t.number("rate_hz", positive=True)
        bits = t.get("rollover_bits", None, required=False)
        if bits is not None and (isinstance(bits, bool) or not isinstance(bits, int) or not 1 <= bits <= 64):
            raise t.err("rollover_bits", f"expected a whole number from 1 to 64, got {bits!r}")
    else:
        for k in ("epoch", "rate_hz", "rollover_bits"):
            if t.has(k):
                raise t.err(k, f"only used with format = \"ticks\", got format = {fmt!r}")
    return TimeSpec(col, fmt, epoch, rate, bits)


def sensor_spec(r: Reader, units: tuple[str, ...], *, gyro: bool) -> SensorSpec:
    """The ``[magnetometer]`` or ``[gyro]`` section."""
    return SensorSpec(
        file=r.file("file"),
        time=time_spec(r),
        columns=r.columns("columns"),
        unit=r.string("unit", units),
        sensor_to_body=r.rotation("sensor_to_body"),
        full_scale=r.number("full_scale", None, positive=True),
        noise=r.number("noise", None, positive=True),
        bias_walk=r.number("bias_walk", None, nonnegative=True) if gyro else None,
        scale=r.number("scale", 1.0),
        offset=r.number("offset", 0.0),
        misalignment_deg=None if gyro else r.vector("misalignment_deg", 3, None),
        misalignment_sigma_deg=None if gyro else r.number("misalignment_sigma_deg", None, positive=True),
    )


def coil_spec(r: Reader) -> CoilSpec:
    """The ``[coils]`` section."""
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
        file=r.file("file"), time=time_spec(r), columns=r.columns("columns"),
        unit=r.string("unit", COIL_UNITS), max_current_A=r.vector("max_current_A", positive=True),
        dipole_per_amp=c, mag_sampling=sampling, off_window_s=window,
        scale=r.number("scale", 1.0), offset=r.number("offset", 0.0),
    )


def controller_spec(r: Reader) -> ControllerSpec:
    """The ``[controller]`` section."""
    law = r.string("law", LAWS)
    gain = r.number("gain", 0.0 if law == "none" else ..., nonnegative=True)
    period = r.number("period_s", 1.0 if law == "none" else ..., positive=True)
    first = r.utc("first_tick") if r.get("first_tick", None, required=False) is not None else None
    target = r.vector("target_momentum_Nms", 3, None)
    if law == "cross_product" and target is None:
        target = np.zeros(3)
    return ControllerSpec(law, gain, period, first, target)


def _tle_lines(r: Reader, k: str) -> tuple[str, str]:
    """The two TLE lines of ``tle = [...]`` or ``tle_file = path`` (a name line before them is dropped)."""
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
    return lines[0], lines[1]


def orbit_spec(r: Reader) -> OrbitSpec:
    """The ``[orbit]`` section: exactly one of tle, tle_file, positions, oem."""
    given = [k for k in ("tle", "tle_file", "positions", "oem") if r.has(k)]
    if len(given) != 1:
        raise InputError(f"expected exactly one of tle, tle_file, positions, oem, got {given or 'none'}",
                         r.path, key="orbit")
    k = given[0]
    if k in ("tle", "tle_file"):
        return OrbitSpec(tle=_tle_lines(r, k))
    if k == "oem":
        return OrbitSpec(oem=r.file("oem"))
    p = r.sub("positions")
    return OrbitSpec(positions=PositionsSpec(
        file=p.file("file"), time=time_spec(p), columns=p.columns("columns"),
        frame=p.string("frame", ("itrf", "gcrf")), unit=p.string("unit", ("km", "m"))))


def estimator_spec(r: Reader | None) -> EstimatorSpec:
    """The optional ``[estimator]`` section: a mode and noise-level overrides (numbers >= 0)."""
    if r is None:
        return EstimatorSpec()
    mode = r.string("mode", ESTIMATOR_MODES, "auto")
    overrides = {}
    for k in r.table:
        if k == "mode":
            continue
        overrides[k] = r.number(k, nonnegative=True)
    return EstimatorSpec(mode, overrides)
