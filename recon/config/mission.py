"""Read and check a mission file (TOML; the keys are listed in DEVELOPERS.md, "Mission file").

Every problem raises :class:`recon.core.InputError` naming the file, the dotted key, what was
expected and what was found. Paths in the file are resolved relative to the file. Nothing here reads
the logs themselves: that is ``load``'s job.
"""

from __future__ import annotations

import tomllib
from pathlib import Path
from typing import Any

import numpy as np

from ..core import InputError
from .reader import Reader
from .sections import coil_spec, controller_spec, estimator_spec, orbit_spec, sensor_spec
from .specs import GYRO_UNITS, MAG_UNITS, SECTIONS, Mission

__all__ = ["load_mission"]


def _read_toml(path: Path) -> dict[str, Any]:
    """The parsed file, with only the known sections."""
    if not path.is_file():
        raise InputError("expected a mission file (TOML), no such file", path)
    try:
        raw = tomllib.loads(path.read_text(encoding="utf-8"))
    except UnicodeDecodeError as e:
        raise InputError(f"expected UTF-8 text, got undecodable bytes ({e.reason})", path) from None
    except tomllib.TOMLDecodeError as e:
        raise InputError(f"expected valid TOML: {e}", path) from None
    unknown = sorted(set(raw) - SECTIONS)
    if unknown:
        raise InputError(f"expected only the sections {sorted(SECTIONS)}, got unknown {unknown}", path,
                         key=unknown[0])
    return raw


def _pass_window(p: Reader, path: Path) -> tuple[str, np.datetime64 | None, np.datetime64 | None]:
    """The ``[pass]`` section: id (usable as a folder name) and the optional start and stop."""
    pass_id = p.string("id")
    if any(c in pass_id for c in "/\\\0") or pass_id in (".", ".."):
        raise p.err("id", f"expected a name usable as a folder (no slashes), got {pass_id!r}")
    start = p.utc("start", file=path) if p.has("start") else None
    stop = p.utc("stop", file=path) if p.has("stop") else None
    if start is not None and stop is not None and stop <= start:
        raise p.err("stop", f"expected stop after start ({start}), got {stop}")
    return pass_id, start, stop


def _pass_names(p: Reader) -> tuple[str | None, str | None]:
    """The optional ``[pass]`` keys ``satellite`` (which spacecraft) and ``object_id`` (its catalogue number
    or international designator): non-empty strings on one line, or None when absent."""
    names = []
    for key in ("satellite", "object_id"):
        v = p.string(key, default=None)
        if v is not None and ("\n" in v or "\r" in v or v != v.strip()):
            raise p.err(key, f"expected a name on one line without leading or trailing spaces, got {v!r}")
        names.append(v)
    return names[0], names[1]


def _inertia(sc: Reader) -> np.ndarray:
    """``[spacecraft] inertia_kg_m2``: symmetric and positive definite."""
    inertia = sc.matrix("inertia_kg_m2")
    if np.abs(inertia - inertia.T).max() > 1e-9 * np.abs(inertia).max():
        raise sc.err("inertia_kg_m2", f"expected a symmetric matrix, got {inertia.tolist()}")
    eig = np.linalg.eigvalsh(inertia)
    if eig.min() <= 0:
        raise sc.err("inertia_kg_m2", f"expected a positive-definite inertia, got eigenvalues {eig.tolist()}")
    return inertia


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
    raw = _read_toml(path)
    top = Reader(path.resolve(), raw, "")
    pass_r = top.sub("pass")
    pass_id, start, stop = _pass_window(pass_r, path)
    satellite, object_id = _pass_names(pass_r)
    inertia = _inertia(top.sub("spacecraft"))

    mag = sensor_spec(top.sub("magnetometer"), MAG_UNITS, gyro=False)
    gyro_r = top.sub("gyro", required=False)
    gyro = None if gyro_r is None else sensor_spec(gyro_r, GYRO_UNITS, gyro=True)
    coils_r = top.sub("coils", required=False)
    coils = None if coils_r is None else coil_spec(coils_r)
    ctl_r = top.sub("controller", required=False)
    controller = None if ctl_r is None else controller_spec(ctl_r)
    if controller is not None and controller.law != "none" and coils is None:
        raise InputError("expected a [coils] section when [controller] law is not \"none\"", path,
                         key="controller.law")
    orbit_r = top.sub("orbit", required=False)
    orbit = None if orbit_r is None else orbit_spec(orbit_r)
    estimator = estimator_spec(top.sub("estimator", required=False))
    if estimator.mode == "gyro" and gyro is None:
        raise InputError("expected a [gyro] section when estimator.mode = \"gyro\"", path, key="estimator.mode")

    return Mission(path=path.resolve(), pass_id=pass_id, start=start, stop=stop, inertia_kg_m2=inertia,
                   magnetometer=mag, gyro=gyro, coils=coils, controller=controller, orbit=orbit,
                   estimator=estimator, raw=raw, satellite=satellite, object_id=object_id)
