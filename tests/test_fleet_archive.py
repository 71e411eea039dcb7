"""The SQLite archive: its schema and version, whole-pass replacement, two writers at once, a killed writer.

The concurrency checks use synthetic records, so that the writers hammer the file hundreds of times a
second; the same write path serves ``recon batch`` (tests/test_fleet_batch.py runs it on real passes).
"""

from __future__ import annotations

import os
import signal
import sqlite3
import subprocess
import sys
import textwrap
import time

import numpy as np
import pytest

from recon.core import InputError
from recon.fleet import PARAMETERS, SCHEMA_VERSION, AnomalyRecord, Archive, Measurement, PassRecord


def synthetic_record(pass_id: str, start_utc: str = "2026-03-01T10:00:00.000Z", *, n_anomalies: int = 2,
                     values: dict | None = None, satellite: str | None = "sat-a", status: str = "ok",
                     duration_min: int = 30) -> PassRecord:
    """A pass record with every parameter set (``values`` overrides name -> (value, sigma))."""
    values = values or {}
    ms = []
    for k, p in enumerate(PARAMETERS):
        v, s = values.get(p.name, (float(k) + 0.5, 0.1 * (k + 1) if p.has_sigma else None))
        ms.append(Measurement(p.name, v, s if p.has_sigma else None))
    t0 = np.datetime64(start_utc.rstrip("Z"), "ms")
    stop = str(t0 + np.timedelta64(duration_min, "m")) + "Z"
    anomalies = tuple(AnomalyRecord(code=("telemetry_gap", "mag_bias_large", "coil_gain_off")[k % 3],
                                    severity=("info", "warning", "critical")[k % 3],
                                    axis="xyz"[k % 3] if k % 2 else None, start_utc=start_utc, stop_utc=stop,
                                    value=float(k), evidence=f"evidence {k}")
                      for k in range(n_anomalies))
    return PassRecord(pass_id=pass_id, mission_file=f"/data/{pass_id}/mission.toml", input_hash=f"h-{pass_id}",
                      status=status, error=None if status == "ok" else "x: expected y", satellite=satellite,
                      object_id="99990", start_utc=start_utc, stop_utc=stop, tool_version="0.1.0",
                      verdict="as_intended", estimate_mode="gyro", crosstalk_source="combined",
                      polarity=("nominal", "nominal", "undetermined"), dipole_per_amp_nominal=(1.5, 1.5, 1.1),
                      measurements=tuple(ms), anomalies=anomalies)


def consistency(path) -> list[str]:
    """What is wrong in an archive: a failed integrity check, or a pass whose anomaly counts disagree with
    its anomaly rows, or anomaly rows without their pass."""
    db = sqlite3.connect(path)
    try:
        problems = [r[0] for r in db.execute("PRAGMA integrity_check") if r[0] != "ok"]
        problems += [f"{pid}: counts {c}+{w}+{i} != {n} rows" for pid, c, w, i, n in db.execute(
            "SELECT p.pass_id, anomalies_critical, anomalies_warning, anomalies_info, "
            "(SELECT COUNT(*) FROM anomalies a WHERE a.pass_id = p.pass_id) FROM passes p")
            if c + w + i != n]
        problems += [f"orphan anomaly rows of {pid}" for (pid,) in db.execute(
            "SELECT DISTINCT pass_id FROM anomalies WHERE pass_id NOT IN (SELECT pass_id FROM passes)")]
    finally:
        db.close()
    return problems


def test_archive_schema_version_and_wal(tmp_path):
    path = tmp_path / "a" / "archive.sqlite"
    with Archive(path):
        pass
    db = sqlite3.connect(path)
    assert db.execute("PRAGMA user_version").fetchone()[0] == SCHEMA_VERSION == 1
    assert db.execute("SELECT value FROM meta WHERE key = 'schema_version'").fetchone()[0] == "1"
    assert db.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    cols = {r[1] for r in db.execute("PRAGMA table_info(passes)")}
    for name in ("pass_id", "satellite", "input_hash", "start_utc", "stop_utc", "tool_version", "verdict",
                 "bias_x_nT", "bias_x_nT_sigma", "soft_iron_xy_sigma", "misalignment_z_deg", "crosstalk_xy_nT_per_A",
                 "dipole_per_amp_y", "polarity_y", "gyro_bias_z_dps", "latency_s", "attitude_3sigma_deg_median",
                 "anomalies_critical"):
        assert name in cols, name
    db.close()


def test_archive_round_trip_and_whole_pass_replacement(tmp_path):
    path = tmp_path / "archive.sqlite"
    first = synthetic_record("p1", n_anomalies=5)
    with Archive(path) as a:
        a.write(first)
        a.write(synthetic_record("p2", "2026-03-08T10:00:00.000Z", n_anomalies=1, satellite=None))
        got = a.records("sat-a")
        assert got == [first]  # every field, measurement and anomaly comes back as written
        assert [r.pass_id for r in a.records()] == ["p1", "p2"]
        assert a.records(None)[0].pass_id == "p2" and a.satellites() == [None, "sat-a"]
        second = synthetic_record("p1", n_anomalies=2, values={"bias_x_nT": (-7.0, 2.0)})
        a.write(second)
        assert a.records("sat-a") == [second]
        assert a.archived() == {"p1": ("h-p1", "ok"), "p2": ("h-p2", "ok")}
    db = sqlite3.connect(path)
    assert db.execute("SELECT COUNT(*) FROM anomalies WHERE pass_id = 'p1'").fetchone()[0] == 2
    assert db.execute("SELECT bias_x_nT, bias_x_nT_sigma FROM passes WHERE pass_id = 'p1'").fetchone() == (-7.0, 2.0)
    db.close()
    assert consistency(path) == []


def test_archive_rejects_what_it_cannot_read(tmp_path):
    with pytest.raises(InputError, match="expected an archive written by 'recon batch', no such file"):
        Archive(tmp_path / "none.sqlite", create=False)
    text = tmp_path / "text.sqlite"
    text.write_text("not a database, just words " * 100)
    with pytest.raises(InputError, match=r"expected a recon archive \(SQLite\)"):
        Archive(text)
    other = tmp_path / "other.sqlite"
    db = sqlite3.connect(other)
    db.execute("CREATE TABLE things (x)")
    db.commit()
    db.close()
    with pytest.raises(InputError, match=r"expected a recon archive, got an SQLite file with other tables \(things\)"):
        Archive(other)
    newer = tmp_path / "newer.sqlite"
    with Archive(newer):
        pass
    db = sqlite3.connect(newer)
    db.execute("PRAGMA user_version = 7")
    db.commit()
    db.close()
    with pytest.raises(InputError, match="expected an archive of schema version 1 or older, got version 7"):
        Archive(newer)


WRITER = textwrap.dedent("""
    import sys
    sys.path.insert(0, {tests!r})
    from test_fleet_archive import synthetic_record
    from recon.fleet import Archive
    prefix, n, shared = sys.argv[1], int(sys.argv[2]), int(sys.argv[3])
    with Archive(sys.argv[4]) as a:
        print("open", flush=True)
        k = 0
        while n < 0 or k < n:
            pid = f"shared-{{k % shared}}" if shared and k % 3 == 0 else f"{{prefix}}-{{k}}"
            a.write(synthetic_record(pid, n_anomalies=(k % 7) * (40 if n < 0 else 1)))
            k += 1
""")


def _writer(tmp_path, prefix: str, n: int, shared: int, archive) -> subprocess.Popen:
    script = tmp_path / "writer.py"
    script.write_text(WRITER.format(tests=str(os.path.dirname(__file__))))
    return subprocess.Popen([sys.executable, str(script), prefix, str(n), str(shared), str(archive)],
                            stdout=subprocess.PIPE, text=True, start_new_session=True)


def test_two_writers_at_once_lose_nothing(tmp_path):
    """Two processes write 150 passes each into one new archive at the same time (every third pass id is
    shared between them: both replace it); every pass and every anomaly row must be there."""
    path = tmp_path / "archive.sqlite"
    procs = [_writer(tmp_path, name, 150, 10, path) for name in ("a", "b")]
    codes = []
    for p in procs:
        with p.stdout:  # closed even when a writer failed, so no open pipe leaks into later tests
            codes.append(p.wait(timeout=300))
    assert codes == [0, 0]
    expected = {f"{n}-{k}" for n in ("a", "b") for k in range(150) if k % 3} | {f"shared-{k}" for k in range(10)}
    with Archive(path) as a:
        got = {r.pass_id: r for r in a.records()}
    assert set(got) == expected
    for pid, r in got.items():
        if not pid.startswith("shared"):
            k = int(pid.split("-")[1])
            assert len(r.anomalies) == k % 7, pid
    assert consistency(path) == []


def test_a_killed_writer_leaves_every_pass_whole(tmp_path):
    """A writer killed (SIGKILL) at three different instants while writing passes of up to 240 anomalies
    each: the archive stays intact and no pass is half written; a new writer then goes on normally."""
    path = tmp_path / "archive.sqlite"
    for delay in (0.3, 0.7, 1.1):
        p = _writer(tmp_path, f"k{delay}", -1, 0, path)
        with p.stdout:
            opened = p.stdout.readline().strip()
            time.sleep(delay)
            os.killpg(p.pid, signal.SIGKILL)
            p.wait(timeout=60)
        assert opened == "open"
        assert consistency(path) == []
    with Archive(path) as a:
        n = len(a.archived())
        a.write(synthetic_record("after", n_anomalies=3))
        assert len(a.archived()) == n + 1 and n > 3
    assert consistency(path) == []



OPENER = textwrap.dedent("""
    import sys, time
    sys.path.insert(0, {tests!r})
    from test_fleet_archive import synthetic_record
    from recon.fleet import Archive
    folder, start, me = sys.argv[1], float(sys.argv[2]), sys.argv[3]
    for r in range(20):
        time.sleep(max(0.0, start + 0.25 * r - time.time()))  # every process opens archive r at one instant
        with Archive(f"{{folder}}/archive-{{r}}.sqlite") as a:
            a.write(synthetic_record(f"{{me}}-{{r}}", n_anomalies=2))
""")


def test_batches_that_open_one_new_archive_at_the_same_instant_all_get_in(tmp_path):
    """Four processes create the same new archive at one instant, twenty times over. SQLite's switch to WAL
    does not wait on its busy handler, and the schema check once read the version and the tables in two
    steps: before the fix, about one round in ten failed with "database is locked" or "other tables"."""
    script = tmp_path / "opener.py"
    script.write_text(OPENER.format(tests=str(os.path.dirname(__file__))))
    start = time.time() + 8.0  # after every process has imported recon
    procs = [subprocess.Popen([sys.executable, str(script), str(tmp_path), str(start), f"w{k}"],
                              stderr=subprocess.PIPE, text=True) for k in range(4)]
    errors = [p.communicate(timeout=300)[1] for p in procs]
    assert [p.returncode for p in procs] == [0] * 4, [e.strip().splitlines()[-1:] for e in errors]
    for r in range(20):
        with Archive(tmp_path / f"archive-{r}.sqlite") as a:
            assert len(a.archived()) == 4, r
