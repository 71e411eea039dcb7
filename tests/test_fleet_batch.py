"""``recon batch`` on real (short, simulated) passes: what it archives, the same rows from a local pool and
from a Dask LocalCluster, skipping unchanged passes, a worker that dies, two batches at once, and a batch
killed mid-way that a rerun completes."""

from __future__ import annotations

import os
import shutil
import signal
import sqlite3
import subprocess
import sys
import textwrap
import time

import numpy as np
import pandas as pd
import pytest
from conftest import EXAMPLE_MISSION
from test_fleet_archive import consistency

from recon.cli import main
from recon.fleet import PASS_COLUMNS, Archive, PassRecord, run_batch
from recon.simulate import simulate_season

BROKEN = '[pass]\nid = "bad-pass"\n'  # valid TOML, but no [spacecraft] or [magnetometer]


@pytest.fixture(scope="module")
def season(tmp_path_factory):
    """Three 300 s passes of one simulated spacecraft a week apart, and one broken mission file."""
    root = tmp_path_factory.mktemp("fleet")
    simulate_season(3, root / "passes", duration_s=300.0, spacing_days=7.0)
    (root / "passes" / "bad").mkdir()
    (root / "passes" / "bad" / "mission.toml").write_text(BROKEN)
    return root


@pytest.fixture(scope="module")
def local_batch(season):
    return run_batch(season / "passes", season / "local.sqlite", out_root=season / "reports-local", workers=2)


def _rows(path, skip=("archived_utc",)) -> tuple[list, list]:
    """Every pass row (without the columns in ``skip``) and every anomaly row, in key order."""
    keep = [c for c in PASS_COLUMNS if c not in skip]
    db = sqlite3.connect(path)
    try:
        passes = db.execute(f"SELECT {', '.join(keep)} FROM passes ORDER BY pass_id").fetchall()
        anomalies = db.execute("SELECT * FROM anomalies ORDER BY pass_id, seq").fetchall()
    finally:
        db.close()
    return passes, anomalies


def test_batch_archives_every_pass_and_the_failure(season, local_batch):
    r = local_batch
    assert r.found == 4 and r.skipped == () and len(r.records) == 4
    (bad,) = r.failed
    assert bad.pass_id == "bad-pass" and "key 'spacecraft'" in bad.error and "\n" not in bad.error
    with Archive(season / "local.sqlite") as a:
        got = {x.pass_id: x for x in a.records()}
    assert set(got) == {"demo-drift-01", "demo-drift-02", "demo-drift-03", "bad-pass"}
    rec = got["demo-drift-02"]
    out = season / "reports-local" / "demo-drift-02"
    summary = pd.read_json(out / "summary.json", typ="series")
    assert (rec.satellite, rec.object_id, rec.status) == ("demo-drift", "99990", "ok")
    assert rec.measurement("bias_y_nT").value == pytest.approx(summary["calibration"]["bias_nT"][1], rel=1e-12)
    assert rec.measurement("dipole_per_amp_z").sigma == pytest.approx(
        summary["controller"]["z"]["dipole_per_amp_sigma"], rel=1e-12)
    assert rec.measurement("misalignment_x_deg").value == pytest.approx(
        summary["calibration"]["misalignment_deg"][0], rel=1e-12)
    assert rec.measurement("misalignment_x_deg").sigma == pytest.approx(
        summary["calibration"]["misalignment_deg_sigma"][0], rel=1e-12)
    bias_z = pd.read_csv(out / "attitude.csv")["bias_z_dps"]
    assert rec.measurement("gyro_bias_z_dps").value == pytest.approx(float(np.median(bias_z)), rel=1e-12)
    assert len(rec.anomalies) == len(summary["anomalies"]) and rec.start_utc.startswith("2026-01-19T09:12")


def test_dask_local_cluster_gives_the_same_rows(season, local_batch):
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as cluster:
        r = run_batch(season / "passes", season / "dask.sqlite", out_root=season / "reports-dask",
                      scheduler=cluster.scheduler_address)
    assert len(r.records) == 4 and len(r.failed) == 1
    local, dask = _rows(season / "local.sqlite"), _rows(season / "dask.sqlite")
    assert len(local[0]) == 4 and len(local[1]) > 0
    assert dask == local  # every column but the time of archiving, and every anomaly row


def test_unchanged_passes_are_skipped_changed_ones_run(season, local_batch, tmp_path):
    passes = shutil.copytree(season / "passes", tmp_path / "passes")
    archive = shutil.copy(season / "local.sqlite", tmp_path / "archive.sqlite")
    ran = []

    def stub(task) -> PassRecord:
        ran.append(task.pass_id)
        return PassRecord(task.pass_id, str(task.mission_file), task.input_hash, "ok", satellite=task.satellite)

    r = run_batch(passes, archive, out_root=tmp_path / "reports", workers=1, run_one=stub)
    assert ran == [] and len(r.skipped) == 3 and [x.pass_id for x in r.records] == ["bad-pass"]  # failures: again
    mission = passes / "demo-drift-02" / "mission.toml"
    mission.write_text(mission.read_text() + "# edited\n")
    run_batch(passes, archive, out_root=tmp_path / "reports", workers=1, run_one=stub)
    assert ran == ["demo-drift-02"]
    run_batch(passes, archive, out_root=tmp_path / "reports", workers=1, run_one=stub, rerun=True)
    assert ran == ["demo-drift-02", "demo-drift-01", "demo-drift-02", "demo-drift-03"]


def die_on_second_pass(task) -> PassRecord:
    """A pass runner whose process dies on one pass (as on a crash or an out-of-memory kill)."""
    if task.pass_id.endswith("02"):
        os._exit(3)
    return PassRecord(task.pass_id, str(task.mission_file), task.input_hash, "ok")


def test_a_dying_worker_fails_only_its_pass(season, tmp_path):
    r = run_batch(season / "passes", tmp_path / "a.sqlite", out_root=tmp_path / "r", workers=2,
                  run_one=die_on_second_pass)
    status = {x.pass_id: (x.status, x.error) for x in r.records}
    assert status["demo-drift-02"] == ("failed", "the worker process running this pass died (killed, out of "
                                                 "memory or crashed)")
    assert status["demo-drift-01"][0] == status["demo-drift-03"][0] == "ok" and len(status) == 4


CONCURRENT = textwrap.dedent("""
    import dataclasses, sys, time
    sys.path.insert(0, {tests!r})
    from test_fleet_archive import synthetic_record
    from recon.fleet import run_batch

    def stub(task):
        time.sleep(0.005)
        k = int(task.pass_id.rsplit("-", 1)[1])
        return dataclasses.replace(synthetic_record(task.pass_id, n_anomalies=k % 5), input_hash=task.input_hash,
                                   mission_file=str(task.mission_file))

    r = run_batch(sys.argv[1], sys.argv[2], out_root=sys.argv[3], workers=1, run_one=stub)
    print(len(r.records), len(r.skipped))
""")


def _mission_folders(root, names, mission_dir):
    for name in names:
        d = root / name
        d.mkdir(parents=True)
        for f in ("mag.csv", "gyro.csv", "coils.csv"):
            shutil.copy(mission_dir / f, d / f)
        (d / "mission.toml").write_text(EXAMPLE_MISSION.replace("unit-test-pass", name))


def test_two_batches_at_once_lose_no_rows(tmp_path, mission_dir):
    """Two batch processes on one new archive at once, 50 passes each, 10 of them in both folders (the
    same files: one batch may skip what the other archived first)."""
    shared = [f"c-{k:02d}" for k in range(10)]
    for side in ("a", "b"):
        _mission_folders(tmp_path / side, [f"{side}-{k:02d}" for k in range(40)] + shared, mission_dir)
    script = tmp_path / "batch.py"
    script.write_text(CONCURRENT.format(tests=os.path.dirname(__file__)))
    procs = [subprocess.Popen([sys.executable, str(script), str(tmp_path / side), str(tmp_path / "archive.sqlite"),
                               str(tmp_path / "reports")], stdout=subprocess.PIPE, text=True) for side in ("a", "b")]
    outs = [p.communicate(timeout=600)[0].split() for p in procs]
    assert [p.returncode for p in procs] == [0, 0]
    assert all(int(ran) + int(skipped) == 50 for ran, skipped in outs)
    with Archive(tmp_path / "archive.sqlite") as a:
        got = {r.pass_id: r for r in a.records()}
    assert set(got) == {f"{s}-{k:02d}" for s in "ab" for k in range(40)} | set(shared)
    assert all(len(r.anomalies) == int(pid[-2:]) % 5 for pid, r in got.items())
    assert consistency(tmp_path / "archive.sqlite") == []


def test_killed_batch_leaves_the_archive_whole_and_a_rerun_completes_it(season, local_batch, tmp_path, capsys):
    passes = tmp_path / "passes"
    for name in ("demo-drift-01", "demo-drift-02"):
        shutil.copytree(season / "passes" / name, passes / name)
    archive = tmp_path / "archive.sqlite"
    proc = subprocess.Popen([sys.executable, "-m", "recon", "batch", str(passes), "--archive", str(archive),
                             "--out", str(tmp_path / "reports"), "--workers", "1"],
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True)
    deadline = time.monotonic() + 300
    archived = 0
    while time.monotonic() < deadline and proc.poll() is None and archived == 0:
        time.sleep(0.2)
        if archive.exists():
            with Archive(archive) as a:
                archived = len(a.archived())
    os.killpg(proc.pid, signal.SIGKILL)
    proc.wait(timeout=60)
    assert archived == 1, "the batch should have been killed with one of its two passes archived"
    assert consistency(archive) == [] and len(_rows(archive)[0]) == 1
    assert main(["batch", str(passes), "--archive", str(archive), "--out", str(tmp_path / "reports"),
                 "--workers", "1"]) == 0
    out = capsys.readouterr().out
    assert "[1/1] demo-drift-0" in out and "1 skipped (inputs unchanged)" in out
    # the completed archive holds what an uninterrupted batch archived for these two passes
    skip = ("archived_utc", "mission_file")
    local = _rows(season / "local.sqlite", skip)
    done = _rows(archive, skip)
    two = ("demo-drift-01", "demo-drift-02")
    assert done[0] == [row for row in local[0] if row[0] in two]
    assert done[1] == [row for row in local[1] if row[0] in two]


def test_batch_writes_a_line_per_pass_off_a_terminal(season, local_batch, tmp_path, capsys):
    archive = shutil.copy(season / "local.sqlite", tmp_path / "archive.sqlite")
    code = main(["batch", str(season / "passes"), "--archive", str(archive), "--out", str(tmp_path / "r")])
    out = capsys.readouterr().out.splitlines()
    assert code == 1  # a pass failed: exit 1, for scripts
    assert out[0].startswith("[1/1] bad-pass: FAILED: ") and "3 skipped" in out[1]
