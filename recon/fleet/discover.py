"""Find the mission files under a folder and plan each pass: its id, satellite and input hash.

A mission file is a ``*.toml`` file (in any folder below, hidden folders left out) whose top level has a
``[pass]`` table; a ``*.toml`` that is not valid TOML counts too (it may be a mission file with a typo,
and the batch reports it as failed with the parser's one-line error). Planning reads the mission file
only; the logs are read by the worker that runs the pass.
"""

from __future__ import annotations

import hashlib
import os
import tomllib
from dataclasses import dataclass
from pathlib import Path

from ..config import Mission, load_mission
from ..core import InputError, __version__
from .catalogue import PassRecord

__all__ = ["PassTask", "find_missions", "input_hash", "plan_pass", "failed_record", "one_line"]

# bumped when what the hash covers changes, so that every pass is run again once
HASH_SCHEME = b"recon input hash 1\n"


@dataclass(frozen=True)
class PassTask:
    """One pass to run: what a worker needs (plain, picklable values)."""

    mission_file: Path
    pass_id: str
    input_hash: str
    out_root: Path
    satellite: str | None = None
    object_id: str | None = None


def _is_mission(path: Path) -> bool:
    try:
        raw = tomllib.loads(path.read_text(encoding="utf-8"))
    except (UnicodeDecodeError, tomllib.TOMLDecodeError):
        return True  # reported as a failed pass with the reader's message
    except OSError:
        return False
    return isinstance(raw.get("pass"), dict)


def find_missions(root: Path) -> list[Path]:
    """Every mission file under ``root``, sorted by path (deterministic order)."""
    root = Path(root)
    if not root.is_dir():
        raise InputError("expected a folder of mission files, no such folder", root)
    out = []
    for dirpath, dirnames, filenames in os.walk(root):
        dirnames[:] = sorted(d for d in dirnames if not d.startswith("."))
        out += [Path(dirpath) / f for f in sorted(filenames) if f.endswith(".toml") and not f.startswith(".")]
    return sorted(p for p in out if _is_mission(p))


def _named_files(mission: Mission) -> list[tuple[str, Path]]:
    files = [("mission", mission.path), ("magnetometer", mission.magnetometer.file)]
    if mission.gyro is not None:
        files.append(("gyro", mission.gyro.file))
    if mission.coils is not None:
        files.append(("coils", mission.coils.file))
    orbit = mission.orbit
    if orbit is not None and orbit.positions is not None:
        files.append(("positions", orbit.positions.file))
    if orbit is not None and orbit.oem is not None:
        files.append(("oem", orbit.oem))
    return files


def input_hash(mission: Mission) -> str:
    """SHA-256 (hex) of a pass's inputs: the mission file, every log and orbit file it names, and the TLE
    lines it uses (which may come from a ``tle_file``). Any change to any of them changes the hash."""
    h = hashlib.sha256(HASH_SCHEME)
    for role, path in _named_files(mission):
        h.update(f"{role}\0{path.name}\0{path.stat().st_size}\0".encode())
        with path.open("rb") as f:
            for block in iter(lambda: f.read(1 << 20), b""):
                h.update(block)
    if mission.orbit is not None and mission.orbit.tle is not None:
        h.update(("tle\0" + "\n".join(mission.orbit.tle)).encode())
    return h.hexdigest()


def one_line(e: BaseException) -> str:
    """An exception as one line: recon's own errors as they are, others with their type."""
    text = " ".join(str(e).split()) if isinstance(e, InputError) else f"{type(e).__name__}: {' '.join(str(e).split())}"
    return text[:1000]


def _bytes_hash(path: Path) -> str:
    try:
        return hashlib.sha256(HASH_SCHEME + path.read_bytes()).hexdigest()
    except OSError:
        return ""


def _fallback_names(path: Path, root: Path) -> tuple[str, str | None]:
    """The id and satellite of a pass whose mission file cannot be checked: its ``[pass] id`` and
    ``satellite`` if they can be read, else ``file:<path under root>`` and None."""
    try:
        table = tomllib.loads(path.read_text(encoding="utf-8")).get("pass", {})
        pid, satellite = table.get("id"), table.get("satellite")
    except (OSError, UnicodeDecodeError, tomllib.TOMLDecodeError, AttributeError):
        pid = satellite = None
    satellite = satellite if isinstance(satellite, str) and satellite.strip() else None
    if isinstance(pid, str) and pid.strip() and "/" not in pid and "\\" not in pid:
        return pid, satellite
    try:
        rel = path.resolve().relative_to(root.resolve()).as_posix()
    except ValueError:
        rel = path.as_posix()
    return f"file:{rel}", satellite


def failed_record(pass_id: str, mission_file: Path, input_hash_hex: str, error: str, *,
                  satellite: str | None = None, object_id: str | None = None) -> PassRecord:
    """The record of a pass that failed: its one-line error and nothing else."""
    return PassRecord(pass_id=pass_id, mission_file=str(mission_file), input_hash=input_hash_hex, status="failed",
                      error=error, satellite=satellite, object_id=object_id, tool_version=__version__)


def plan_pass(path: Path, root: Path, out_root: Path) -> PassTask | PassRecord:
    """The task for one mission file, or the failed record when its mission file is bad."""
    path = Path(path).resolve()
    try:
        mission = load_mission(path)
        digest = input_hash(mission)
    except (InputError, OSError) as e:
        pass_id, satellite = _fallback_names(path, root)
        return failed_record(pass_id, path, _bytes_hash(path), one_line(e), satellite=satellite)
    return PassTask(path, mission.pass_id, digest, Path(out_root).resolve(), mission.satellite, mission.object_id)
