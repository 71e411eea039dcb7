"""The archive: one SQLite file that keeps every pass of every satellite, for trends across seasons.

Tables (schema version :data:`SCHEMA_VERSION`, in ``PRAGMA user_version`` and in ``meta``):

- ``passes``: one row per pass, keyed by pass id: satellite, object id, mission file, input hash,
  status ("ok" | "failed") and one-line error, time span (UTC), tool version, verdict, estimate mode,
  per-coil polarity and nominal dipole per amp, anomaly counts per severity, then every
  :data:`recon.fleet.PARAMETERS` figure (calibration, dipoles, gyro bias, latency, accuracy) with its
  1-sigma in ``<name>_sigma``, and the time it was archived. NULL where the pass has no figure.
- ``anomalies``: one row per anomaly (pass id, its order in the pass, code, severity, axis, UTC window,
  value, evidence).
- ``meta``: schema version, the recon version that created the file and when.

Writing: the file is in WAL mode (readers never block the writer), every pass is written in one
``BEGIN IMMEDIATE`` transaction that first deletes the pass's old rows, and a writer that finds the file
busy waits for it (:data:`BUSY_TIMEOUT_S`). So a rerun replaces a pass whole, two batches writing to
one archive at once lose nothing, and a batch killed at any instant leaves every pass either fully
archived or not at all. Only the process that owns a batch opens the archive; workers return records.
"""

from __future__ import annotations

import datetime as dt
import sqlite3
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

from ..core import InputError, __version__
from .catalogue import AXES, PARAMETERS, SEVERITY_ORDER, AnomalyRecord, Measurement, PassRecord

__all__ = ["Archive", "SCHEMA_VERSION", "BUSY_TIMEOUT_S", "PASS_COLUMNS", "ANY_SATELLITE"]

SCHEMA_VERSION = 1
# how long a writer waits for another writer's transaction (a pass's rows take milliseconds to write)
BUSY_TIMEOUT_S = 120.0
_RETRY_PAUSE_S = 0.05  # between tries to open a file another writer holds (see Archive._prepare)
ANY_SATELLITE = object()  # ``records(satellite=ANY_SATELLITE)``: every satellite

_FIXED = [("pass_id", "TEXT PRIMARY KEY"), ("satellite", "TEXT"), ("object_id", "TEXT"),
          ("mission_file", "TEXT NOT NULL"), ("input_hash", "TEXT NOT NULL"),
          ("status", "TEXT NOT NULL CHECK (status IN ('ok', 'failed'))"), ("error", "TEXT"),
          ("start_utc", "TEXT"), ("stop_utc", "TEXT"), ("tool_version", "TEXT"), ("verdict", "TEXT"),
          ("estimate_mode", "TEXT"), ("crosstalk_source", "TEXT")]
_FIXED += [(f"polarity_{a}", "TEXT") for a in AXES]
_FIXED += [(f"dipole_per_amp_nominal_{a}", "REAL") for a in AXES]
_FIXED += [(f"anomalies_{s}", "INTEGER NOT NULL") for s in SEVERITY_ORDER]
_MEASURED = [(c, "REAL") for p in PARAMETERS for c in ((p.name, p.name + "_sigma") if p.has_sigma else (p.name,))]
_COLUMNS = _FIXED + _MEASURED + [("archived_utc", "TEXT NOT NULL")]
PASS_COLUMNS: tuple[str, ...] = tuple(name for name, _ in _COLUMNS)
_ANOMALY_COLUMNS = ("pass_id", "seq", "code", "severity", "axis", "start_utc", "stop_utc", "value", "evidence")

_SCHEMA = (
    "CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL)",
    "CREATE TABLE IF NOT EXISTS passes (" + ", ".join(f"{n} {t}" for n, t in _COLUMNS) + ")",
    "CREATE TABLE IF NOT EXISTS anomalies (pass_id TEXT NOT NULL REFERENCES passes(pass_id) ON DELETE CASCADE, "
    "seq INTEGER NOT NULL, code TEXT NOT NULL, severity TEXT NOT NULL, axis TEXT, start_utc TEXT, stop_utc TEXT, "
    "value REAL, evidence TEXT NOT NULL, PRIMARY KEY (pass_id, seq))",
    "CREATE INDEX IF NOT EXISTS passes_by_satellite ON passes (satellite, start_utc)",
    "CREATE INDEX IF NOT EXISTS anomalies_by_code ON anomalies (code)",
)


def _busy(e: sqlite3.OperationalError) -> bool:
    """Whether SQLite refused because another connection holds the file (worth waiting for): its primary
    result code (the low byte of an extended one such as SQLITE_BUSY_RECOVERY) is BUSY or LOCKED."""
    code = getattr(e, "sqlite_errorcode", None)
    return code is not None and (code & 0xFF) in (sqlite3.SQLITE_BUSY, sqlite3.SQLITE_LOCKED)


def _now_utc() -> str:
    return dt.datetime.now(dt.UTC).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def _pass_row(r: PassRecord, archived_utc: str) -> tuple:
    fixed = [r.pass_id, r.satellite, r.object_id, r.mission_file, r.input_hash, r.status, r.error, r.start_utc,
             r.stop_utc, r.tool_version, r.verdict, r.estimate_mode, r.crosstalk_source, *r.polarity,
             *r.dipole_per_amp_nominal, *(r.count(s) for s in SEVERITY_ORDER)]
    measured = []
    for p in PARAMETERS:
        m = r.measurement(p.name)
        measured += [m.value, m.sigma] if p.has_sigma else [m.value]
    return (*fixed, *measured, archived_utc)


def _anomaly_rows(r: PassRecord) -> list[tuple]:
    return [(r.pass_id, k, a.code, a.severity, a.axis, a.start_utc, a.stop_utc, a.value, a.evidence)
            for k, a in enumerate(r.anomalies)]


class Archive:
    """An open archive file (created with its schema when ``create`` and absent). Use as a context manager.

    Raises
    ------
    InputError
        When the file is not a recon archive, was written by a newer schema, or cannot be opened.
    """

    def __init__(self, path: str | Path, *, create: bool = True):
        self.path = Path(path)
        if not create and not self.path.is_file():
            raise InputError("expected an archive written by 'recon batch', no such file", self.path)
        try:
            if create:
                self.path.parent.mkdir(parents=True, exist_ok=True)
            self.db = sqlite3.connect(self.path, timeout=BUSY_TIMEOUT_S, isolation_level=None)
        except (OSError, sqlite3.Error) as e:
            raise InputError(f"expected a writable archive file, got {e}", self.path) from None
        try:
            self._prepare(create)
        except sqlite3.DatabaseError as e:
            self.db.close()
            raise InputError(f"expected a recon archive (SQLite), got {e}", self.path) from None
        except InputError:
            self.db.close()
            raise

    def _prepare(self, create: bool) -> None:
        """Switch the file to WAL and create or check the schema. Changing the journal mode takes the file's
        exclusive lock and does not go through SQLite's busy handler, so while another batch is opening or
        writing the same new file this is retried (a short pause each time) until :data:`BUSY_TIMEOUT_S`."""
        deadline = time.monotonic() + BUSY_TIMEOUT_S
        while True:
            try:
                self.db.execute("PRAGMA foreign_keys = ON")
                mode = self.db.execute("PRAGMA journal_mode").fetchone()[0]
                if create and str(mode).lower() != "wal":  # a reader leaves the file as it is
                    mode = self.db.execute("PRAGMA journal_mode = WAL").fetchone()[0]
                    if str(mode).lower() != "wal":
                        raise InputError(f"expected the archive in WAL mode, the file system gave {mode!r}",
                                         self.path)
                self._schema(create)
                return
            except sqlite3.OperationalError as e:
                if not _busy(e) or time.monotonic() > deadline:
                    raise
                time.sleep(_RETRY_PAUSE_S)

    def __enter__(self) -> Archive:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def close(self) -> None:
        self.db.close()

    @contextmanager
    def _transaction(self) -> Iterator[None]:
        self.db.execute("BEGIN IMMEDIATE")
        try:
            yield
        except BaseException:
            self.db.execute("ROLLBACK")
            raise
        self.db.execute("COMMIT")

    def _tables(self) -> set[str]:
        return {r[0] for r in self.db.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}

    def _check_version(self, version: int) -> None:
        if version > SCHEMA_VERSION:
            raise InputError(f"expected an archive of schema version {SCHEMA_VERSION} or older, got version "
                             f"{version} (written by a newer recon)", self.path)
        if version == 0 and self._tables():
            raise InputError(f"expected a recon archive, got an SQLite file with other tables "
                             f"({', '.join(sorted(self._tables()))})", self.path)

    def _schema(self, create: bool) -> None:
        version = self.db.execute("PRAGMA user_version").fetchone()[0]
        if version == SCHEMA_VERSION:
            return
        if not create:
            self._check_version(version)
            raise InputError("expected a recon archive, got an empty SQLite file", self.path)
        # version and tables are read together only inside the write transaction: between two reads out
        # here, another batch may commit a whole new schema
        with self._transaction():  # another batch may be creating it at the same instant
            version = self.db.execute("PRAGMA user_version").fetchone()[0]
            self._check_version(version)
            if version == SCHEMA_VERSION:
                return
            for statement in _SCHEMA:
                self.db.execute(statement)
            self.db.executemany("INSERT OR REPLACE INTO meta VALUES (?, ?)",
                                [("schema_version", str(SCHEMA_VERSION)), ("created_by", f"recon {__version__}"),
                                 ("created_utc", _now_utc())])
            self.db.execute(f"PRAGMA user_version = {SCHEMA_VERSION}")

    def write(self, record: PassRecord, archived_utc: str | None = None) -> None:
        """Archive one pass, replacing whatever the archive held for its pass id, in one transaction."""
        row = _pass_row(record, archived_utc or _now_utc())
        with self._transaction():
            self.db.execute("DELETE FROM anomalies WHERE pass_id = ?", (record.pass_id,))
            self.db.execute("DELETE FROM passes WHERE pass_id = ?", (record.pass_id,))
            self.db.execute(f"INSERT INTO passes ({', '.join(PASS_COLUMNS)}) "
                            f"VALUES ({', '.join('?' * len(PASS_COLUMNS))})", row)
            self.db.executemany(f"INSERT INTO anomalies ({', '.join(_ANOMALY_COLUMNS)}) "
                                f"VALUES ({', '.join('?' * len(_ANOMALY_COLUMNS))})", _anomaly_rows(record))

    def archived(self) -> dict[str, tuple[str, str]]:
        """Pass id -> (input hash, status) of every archived pass."""
        return {pid: (h, s) for pid, h, s in self.db.execute("SELECT pass_id, input_hash, status FROM passes")}

    def satellites(self, *, with_ok_pass: bool = False) -> list[str | None]:
        """The satellites in the archive (None for passes that name none), sorted; with ``with_ok_pass``
        only those with at least one pass that ran."""
        where = " WHERE status = 'ok'" if with_ok_pass else ""
        rows = self.db.execute(f"SELECT DISTINCT satellite FROM passes{where}").fetchall()
        return sorted((r[0] for r in rows), key=lambda s: (s is not None, s or ""))

    def records(self, satellite: object = ANY_SATELLITE) -> list[PassRecord]:
        """The archived passes (of one satellite, None meaning those that name none), by start time."""
        where, args = "", ()
        if satellite is None:
            where = "WHERE satellite IS NULL"
        elif satellite is not ANY_SATELLITE:
            where, args = "WHERE satellite = ?", (satellite,)
        cur = self.db.execute(f"SELECT {', '.join(PASS_COLUMNS)} FROM passes {where} "
                              "ORDER BY start_utc IS NULL, start_utc, pass_id", args)
        rows = [dict(zip(PASS_COLUMNS, r, strict=True)) for r in cur.fetchall()]
        anomalies: dict[str, list[AnomalyRecord]] = {r["pass_id"]: [] for r in rows}
        for pid, _, code, sev, axis, start, stop, value, evidence in self.db.execute(
                f"SELECT {', '.join(_ANOMALY_COLUMNS)} FROM anomalies ORDER BY pass_id, seq"):
            if pid in anomalies:
                anomalies[pid].append(AnomalyRecord(code, sev, axis, start, stop, value, evidence))
        return [_record(r, tuple(anomalies[r["pass_id"]])) for r in rows]


def _record(row: dict, anomalies: tuple[AnomalyRecord, ...]) -> PassRecord:
    measurements = tuple(Measurement(p.name, row[p.name], row.get(p.name + "_sigma")) for p in PARAMETERS)
    return PassRecord(
        pass_id=row["pass_id"], mission_file=row["mission_file"], input_hash=row["input_hash"], status=row["status"],
        error=row["error"], satellite=row["satellite"], object_id=row["object_id"], start_utc=row["start_utc"],
        stop_utc=row["stop_utc"], tool_version=row["tool_version"], verdict=row["verdict"],
        estimate_mode=row["estimate_mode"], crosstalk_source=row["crosstalk_source"],
        polarity=tuple(row[f"polarity_{a}"] for a in AXES),
        dipole_per_amp_nominal=tuple(row[f"dipole_per_amp_nominal_{a}"] for a in AXES),
        measurements=measurements, anomalies=anomalies)
