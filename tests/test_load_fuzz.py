"""Corrupted logs: the loader and cleaner return data with a complete ledger, or raise InputError.

Never any other exception; every line read is either kept or in the ledger as dropped, exactly once.
And the command line reports an InputError in one line with exit status 2.
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from recon.clean import clean_pass
from recon.config import load_mission
from recon.core import InputError
from recon.load import load_pass

REPO = Path(__file__).resolve().parents[1]

MISSION = """\
[pass]
id = "fuzz"

[spacecraft]
inertia_kg_m2 = [[0.02, 0.0, 0.0], [0.0, 0.02, 0.0], [0.0, 0.0, 0.01]]

[magnetometer]
file = "mag.csv"
time = {{ column = "utc", format = "{fmt}" }}
columns = ["mx", "my", "mz"]
unit = "nT"
sensor_to_body = [[1, 0, 0], [0, 1, 0], [0, 0, 1]]
full_scale = 80000.0

[gyro]
file = "mag.csv"
time = {{ column = "utc", format = "{fmt}" }}
columns = ["wx", "wy", "wz"]
unit = "deg/s"
sensor_to_body = [[1, 0, 0], [0, 1, 0], [0, 0, 1]]
"""


def base_lines(fmt: str, n: int = 40) -> list[bytes]:
    rng = np.random.default_rng(11)
    t0 = np.datetime64("2026-07-14T09:12:00", "ms")
    out = [b"utc,mx,my,mz,wx,wy,wz,note"]
    for k in range(n):
        t = (f"{t0 + np.timedelta64(100 * k, 'ms')}Z" if fmt == "iso" else f"{1784020320.0 + 0.1 * k:.1f}")
        b = 30000.0 + 50.0 * k + rng.normal(0, 30, 3)
        w = rng.normal(0, 0.5, 3)
        out.append(f"{t},{b[0]:.1f},{b[1]:.1f},{b[2]:.1f},{w[0]:.4f},{w[1]:.4f},{w[2]:.4f},ok".encode())
    return out


HUGE = [b"1e308", b"-1e308", b"9" * 400, b"1e400", b"inf", b"-inf", b"nan", b"1e-320", b"0x1F", b"--1"]

line_op = st.one_of(
    st.tuples(st.just("truncate"), st.integers(0, 200)),
    st.tuples(st.just("garbage"), st.binary(min_size=1, max_size=12), st.integers(0, 200)),
    st.tuples(st.just("swap"), st.integers(0, 7), st.integers(0, 7)),
    st.tuples(st.just("huge"), st.integers(0, 7), st.sampled_from(HUGE)),
    st.tuples(st.just("delete")),
    st.tuples(st.just("duplicate")),
    st.tuples(st.just("blank")),
    st.tuples(st.just("insert_garbage_line"), st.binary(min_size=0, max_size=30)),
)
file_op = st.sampled_from(["none", "none", "none", "empty", "header_only", "crlf", "cut_bytes", "no_final_lf"])


def corrupt(lines: list[bytes], ops: list[tuple], whole: str, cut: int) -> bytes:
    lines = list(lines)
    for where, op in ops:
        i = where % len(lines)
        kind = op[0]
        if kind == "truncate":
            lines[i] = lines[i][: op[1] % (len(lines[i]) + 1)]
        elif kind == "garbage":
            p = op[2] % (len(lines[i]) + 1)
            lines[i] = lines[i][:p] + op[1] + lines[i][p:]
        elif kind == "swap":
            f = lines[i].split(b",")
            a, b = op[1] % len(f), op[2] % len(f)
            f[a], f[b] = f[b], f[a]
            lines[i] = b",".join(f)
        elif kind == "huge":
            f = lines[i].split(b",")
            f[op[1] % len(f)] = op[2]
            lines[i] = b",".join(f)
        elif kind == "delete" and len(lines) > 1:
            del lines[i]
        elif kind == "duplicate":
            lines.insert(i, lines[i])
        elif kind == "blank":
            lines.insert(i, b"")
        elif kind == "insert_garbage_line":
            lines.insert(i, op[1])
    if whole == "empty":
        return b""
    if whole == "header_only":
        return lines[0] + b"\n"
    data = b"\n".join(lines) + b"\n"
    if whole == "crlf":
        data = data.replace(b"\n", b"\r\n")
    elif whole == "cut_bytes":
        data = data[: cut % (len(data) + 1)]
    elif whole == "no_final_lf":
        data = data[:-1]
    return data


def check_outcome(tmp: Path, data: bytes, fmt: str) -> None:
    (tmp / "mag.csv").write_bytes(data)
    (tmp / "mission.toml").write_text(MISSION.format(fmt=fmt))
    m = load_mission(tmp / "mission.toml")
    try:
        c = clean_pass(load_pass(m), m)
    except InputError as e:
        assert e.file is not None and e.file.endswith("mag.csv"), str(e)
        assert "\n" not in str(e)
        if "column" in e.message and "header" in e.message:
            assert e.line == 1
        return
    led = c.ledger
    for g in c.logs():
        mine = led[(led["sensor"] == g.name) & (led["action"] == "dropped")]
        dropped = mine["line"].to_numpy()
        # every line after the header is kept or dropped, exactly once
        both = np.sort(np.concatenate((g.line, dropped)))
        np.testing.assert_array_equal(both, np.arange(2, g.rows_read + 2))
        assert np.all(np.diff(g.time_utc.astype(np.int64)) > 0)
        assert np.all(np.isfinite(g.values)) and np.all(np.isfinite(g.values_sensor))
    # the inputs summary and anomalies are plain data
    c.inputs_summary()
    for a in c.anomalies:
        a.to_dict()


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(ops=st.lists(st.tuples(st.integers(0, 10_000), line_op), max_size=8), whole=file_op,
       cut=st.integers(0, 10_000), fmt=st.sampled_from(["iso", "unix"]))
def test_corrupted_log_gives_ledger_or_input_error(tmp_path, ops, whole, cut, fmt):
    check_outcome(tmp_path, corrupt(base_lines(fmt), ops, whole, cut), fmt)


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.binary(max_size=400))
def test_arbitrary_bytes_give_ledger_or_input_error(tmp_path, data):
    check_outcome(tmp_path, data, "unix")


def test_swapped_header_columns_are_read_by_name(tmp_path):
    lines = base_lines("iso", 10)
    head = lines[0].split(b",")
    rows = [ln.split(b",") for ln in lines[1:]]
    order = [0, 3, 2, 1, 4, 5, 6, 7]  # mx and mz swapped, header and rows alike
    text = b"\n".join(b",".join(r[k] for k in order) for r in [head, *rows]) + b"\n"
    (tmp_path / "mag.csv").write_bytes(text)
    (tmp_path / "mission.toml").write_text(MISSION.format(fmt="iso"))
    m = load_mission(tmp_path / "mission.toml")
    first = [float(x) for x in lines[1].split(b",")[1:4]]
    np.testing.assert_array_equal(load_pass(m).magnetometer.values_sensor[0], first)


def _cli(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "recon", *args], capture_output=True, text=True, cwd=REPO,
                          timeout=120)


def test_cli_prints_a_bad_log_in_one_line_and_exits_2(tmp_path):
    (tmp_path / "mag.csv").write_bytes(b"utc,mx,my\n2026-07-14T09:12:00Z,1,2\n")
    (tmp_path / "mission.toml").write_text(MISSION.format(fmt="iso"))
    r = _cli("inspect", str(tmp_path / "mission.toml"), "--out", str(tmp_path / "out"))
    assert r.returncode == 2
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and "mag.csv:1" in lines[0] and "'mz'" in lines[0], r.stderr


def test_cli_inspects_a_corrupted_but_usable_log(tmp_path):
    data = corrupt(base_lines("iso"), [(5, ("blank",)), (9, ("garbage", b"\xff\x00", 3))], "none", 0)
    (tmp_path / "mag.csv").write_bytes(data)
    (tmp_path / "mission.toml").write_text(MISSION.format(fmt="iso"))
    r = _cli("inspect", str(tmp_path / "mission.toml"), "--out", str(tmp_path / "out"))
    assert r.returncode == 0, r.stderr
    assert "magnetometer" in r.stdout and "blank 1" in r.stdout
    ledger = (tmp_path / "out" / "fuzz" / "ledger.csv").read_text().splitlines()
    assert ledger[0].startswith("file,line,time_utc,reason,action,detail")
    assert len(ledger) == 1 + 4  # blank and garbage lines, seen by the magnetometer and the gyro
