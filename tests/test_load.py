"""Loading logs: columns, units, rotation to body axes, time bases, line numbers and the ledger."""

from __future__ import annotations

import datetime as dt
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from recon.config import load_mission
from recon.core import InputError
from recon.load import (
    gps_seconds_to_utc,
    iso_to_utc,
    load_log,
    load_pass,
    ticks_to_utc,
    unix_seconds_to_utc,
    unwrap_ticks,
)

HEAD = """\
[pass]
id = "load-test"

[spacecraft]
inertia_kg_m2 = [[0.02, 0.0, 0.0], [0.0, 0.02, 0.0], [0.0, 0.0, 0.01]]
"""

MAG = """
[magnetometer]
file = "mag.csv"
time = {time}
columns = ["mx", "my", "mz"]
unit = "{unit}"
sensor_to_body = [[0, 1, 0], [-1, 0, 0], [0, 0, 1]]
{extra}
"""

ISO = '{ column = "utc", format = "iso" }'


def mission(tmp_path: Path, mag_text: str | bytes, *, unit: str = "uT", time: str = ISO, extra: str = "",
            more: str = "", files: dict | None = None):
    """Write mag.csv (and any other files) and a mission file naming them; return the Mission."""
    data = mag_text.encode() if isinstance(mag_text, str) else mag_text
    (tmp_path / "mag.csv").write_bytes(data)
    for name, text in (files or {}).items():
        (tmp_path / name).write_bytes(text.encode() if isinstance(text, str) else text)
    (tmp_path / "mission.toml").write_text(HEAD + MAG.format(time=time, unit=unit, extra=extra) + more)
    return load_mission(tmp_path / "mission.toml")


def mag_lines(n: int = 5, t0: str = "2026-07-14T09:12:00") -> list[str]:
    base = np.datetime64(t0, "ms")
    return [f"{base + np.timedelta64(100 * k, 'ms')}Z,{10 + k},{20 + k},{30 + k}" for k in range(n)]


def csv_text(lines: list[str], header: str = "utc,mx,my,mz") -> str:
    return "\n".join([header, *lines]) + "\n"


# ------------------------------------------------------------------------------------ units, axes
def test_magnetometer_units_and_rotation_hand_derived(tmp_path):
    # 10, 20, 30 uT on sensor axes; M = [[0,1,0],[-1,0,0],[0,0,1]] so body = (my, -mx, mz)
    m = mission(tmp_path, csv_text(["2026-07-14T09:12:00Z,10,20,30"]))
    log = load_pass(m).magnetometer
    np.testing.assert_array_equal(log.values_sensor, [[10.0, 20.0, 30.0]])
    np.testing.assert_allclose(log.values, [[20_000.0, -10_000.0, 30_000.0]], rtol=0, atol=1e-9)
    assert log.unit == "uT" and log.columns == ("mx", "my", "mz")


def test_raw_counts_through_scale_and_offset(tmp_path):
    # value = raw * scale + offset, in the file unit, before the unit factor
    m = mission(tmp_path, csv_text(["2026-07-14T09:12:00Z,100,-200,0"]), unit="nT",
                extra="scale = 0.5\noffset = -10.0")
    log = load_pass(m).magnetometer
    np.testing.assert_array_equal(log.values_sensor, [[40.0, -110.0, -10.0]])
    np.testing.assert_allclose(log.values, [[-110.0, -40.0, -10.0]], atol=1e-12)


def test_gyro_deg_s_to_rad_s_and_coil_units(tmp_path):
    gyro = """
[gyro]
file = "gyro.csv"
time = { column = "t", format = "unix" }
columns = ["wx", "wy", "wz"]
unit = "deg/s"
sensor_to_body = [[1, 0, 0], [0, 0, -1], [0, 1, 0]]

[coils]
file = "coils.csv"
time = { column = "t", format = "unix" }
columns = ["cx", "cy", "cz"]
unit = "duty"
max_current_A = [0.1, 0.1, 0.2]
dipole_per_amp = [[1.5, 0, 0], [0, 1.5, 0], [0, 0, 1.1]]
mag_sampling = "coils_off"
"""
    m = mission(tmp_path, csv_text(mag_lines(2)), more=gyro,
                files={"gyro.csv": "t,wx,wy,wz\n1784020320.0,90,180,-45\n",
                       "coils.csv": "t,cx,cy,cz\n1784020320.0,0.5,-1,0.25\n"})
    p = load_pass(m)
    # body = (wx, -wz, wy) in rad/s
    np.testing.assert_allclose(p.gyro.values, [[math.pi / 2, math.pi / 4, math.pi]], rtol=1e-15)
    np.testing.assert_array_equal(p.gyro.values_sensor, [[90.0, 180.0, -45.0]])
    # duty x max_current_A per coil, no rotation
    np.testing.assert_allclose(p.coils.values, [[0.05, -0.1, 0.05]], rtol=1e-15)
    np.testing.assert_array_equal(p.coils.values_sensor, [[0.5, -1.0, 0.25]])


def test_coil_milliamps(tmp_path):
    coils = """
[coils]
file = "coils.csv"
time = { column = "t", format = "unix" }
columns = ["cx", "cy", "cz"]
unit = "mA"
max_current_A = [0.12, 0.12, 0.12]
dipole_per_amp = [[1.5, 0, 0], [0, 1.5, 0], [0, 0, 1.1]]
mag_sampling = "coils_on"
"""
    m = mission(tmp_path, csv_text(mag_lines(2)), more=coils, files={"coils.csv": "t,cx,cy,cz\n0.5,120,-60,0\n"})
    np.testing.assert_allclose(load_pass(m).coils.values, [[0.12, -0.06, 0.0]], rtol=1e-15)


# ------------------------------------------------------------------------------ lines and ledger
def test_line_numbers_count_blank_lines_and_header_is_line_1(tmp_path):
    lines = mag_lines(4)
    text = "\n".join(["utc,mx,my,mz", lines[0], lines[1], "", lines[2], "   ", lines[3]])  # no final LF
    p = load_pass(mission(tmp_path, text))
    log = p.magnetometer
    assert log.rows_read == 6
    np.testing.assert_array_equal(log.line, [2, 3, 5, 7])
    assert sorted(zip(p.ledger["line"], p.ledger["reason"], strict=True)) == [(4, "blank"), (6, "blank")]
    assert (p.ledger["action"] == "dropped").all()


def test_final_newline_does_not_add_a_line_and_crlf_reads_the_same(tmp_path):
    lf = csv_text(mag_lines(3))
    a = load_pass(mission(tmp_path, lf)).magnetometer
    b = load_pass(mission(tmp_path, lf.replace("\n", "\r\n"))).magnetometer
    assert a.rows_read == b.rows_read == 3
    np.testing.assert_array_equal(a.values, b.values)
    np.testing.assert_array_equal(a.time_utc, b.time_utc)
    np.testing.assert_array_equal(a.line, b.line)


def test_every_bad_line_is_in_the_ledger_with_its_reason(tmp_path):
    good = mag_lines(12)
    rows = [
        good[0],
        "2026-07-14T09:12:05Z,1,2",                       # 3: too few fields
        "2026-07-14T09:12:05Z,1,2,3,4",                   # 4: too many fields
        "2026-07-14T09:12:05Z,abc,2,3",                   # 5: not a number
        "2026-07-14T09:12:05Z,,2,3",                      # 6: empty field
        "2026-07-14T09:12:05Z,1e400,2,3",                 # 7: overflows to inf
        "2026-07-14T09:12:05Z,nan,2,3",                   # 8: NaN
        "yesterday,1,2,3",                                # 9: unreadable time
        good[1],
    ]
    data = ("\n".join(["utc,mx,my,mz", *rows]) + "\n").encode()
    data += b"2026-07-14T09:12:05Z,1,\xff\xfe,3\n"          # 11: not UTF-8
    data += b"2026-07-14T09:12:05Z,1,2\x00,3\n"             # 12: NUL byte
    data += (good[2] + "\n").encode()                      # 13
    p = load_pass(mission(tmp_path, data))
    got = dict(zip(p.ledger["line"], p.ledger["reason"], strict=True))
    assert got == {3: "field_count", 4: "field_count", 5: "non_numeric", 6: "missing_value", 7: "non_finite",
                   8: "non_finite", 9: "bad_time", 11: "garbage_bytes", 12: "garbage_bytes"}
    np.testing.assert_array_equal(p.magnetometer.line, [2, 10, 13])
    assert p.magnetometer.rows_read == 12 == len(p.magnetometer) + len(p.ledger)
    # a readable time travels with the ledger row; an unreadable one is NaT
    t = dict(zip(p.ledger["line"], p.ledger["time_utc"], strict=True))
    assert t[5] == np.datetime64("2026-07-14T09:12:05", "ns") and pd.isna(t[9])


def test_text_fallback_parses_good_rows_exactly_like_the_fast_path(tmp_path):
    rng = np.random.default_rng(7)
    vals = rng.normal(0, 3e4, (200, 3))
    good = [f"{1.7e9 + 0.1 * k!r},{float(a)!r},{b:.2f},{c:.6e}" for k, (a, b, c) in enumerate(vals)]
    unix = '{ column = "t", format = "unix" }'
    fast = load_pass(mission(tmp_path, csv_text(good, "t,mx,my,mz"), time=unix)).magnetometer
    bad = good[:100] + ["1700000010.05,oops,1,2"] + good[100:]  # forces the text path for every row
    slow = load_pass(mission(tmp_path, csv_text(bad, "t,mx,my,mz"), time=unix)).magnetometer
    np.testing.assert_array_equal(fast.values_sensor, slow.values_sensor)
    np.testing.assert_array_equal(fast.time_utc, slow.time_utc)
    np.testing.assert_array_equal(slow.line, np.r_[2:102, 103:203])


def test_columns_found_by_name_in_any_order_with_other_columns(tmp_path):
    text = "note,mz,utc,my,extra,mx\nok,3,2026-07-14T09:12:00Z,2,x,1\n"
    log = load_pass(mission(tmp_path, text)).magnetometer
    np.testing.assert_array_equal(log.values_sensor, [[1.0, 2.0, 3.0]])


def test_byte_identical_lines_share_a_content_id(tmp_path):
    g = mag_lines(3)
    text = csv_text([g[0], g[1], g[1], g[1].replace(",11,", ",99,"), g[2]])
    log = load_pass(mission(tmp_path, text)).magnetometer
    np.testing.assert_array_equal(log.content_id, [0, 1, 1, 3, 4])


def test_two_logs_in_one_file_each_keep_their_own_view(tmp_path):
    gyro = """
[gyro]
file = "mag.csv"
time = { column = "utc", format = "iso" }
columns = ["wx", "wy", "wz"]
unit = "deg/s"
sensor_to_body = [[1, 0, 0], [0, 1, 0], [0, 0, 1]]
"""
    text = ("utc,mx,my,mz,wx,wy,wz\n2026-07-14T09:12:00Z,1,2,3,0.1,0.2,0.3\n"
            "2026-07-14T09:12:01Z,1,2,3,bad,0.2,0.3\n")
    p = load_pass(mission(tmp_path, text, more=gyro))
    assert len(p.magnetometer) == 2 and len(p.gyro) == 1
    assert p.magnetometer.rows_read == p.gyro.rows_read == 2
    row = p.ledger.iloc[0]
    assert (row["sensor"], row["line"], row["reason"]) == ("gyro", 3, "non_numeric")


# ------------------------------------------------------------------------------ whole-file errors
@pytest.mark.parametrize("data, match", [
    (b"", "empty file"),
    (b"\n\n  \n", "empty file"),
    (b"utc,mx,my,mz\n", "no.*data rows|none in"),
    (b"\nutc,mx,my,mz\n2026-07-14T09:12:00Z,1,2,3\n", "blank line"),
    (b"\xff\xfeu,t\n1,2\n", "not UTF-8"),
])
def test_whole_file_problems_raise_input_error(tmp_path, data, match):
    with pytest.raises(InputError, match=match) as e:
        load_pass(mission(tmp_path, data))
    assert e.value.file is not None and "mag.csv" in e.value.file
    assert len(str(e.value).splitlines()) == 1


def test_missing_column_names_it_and_lists_the_header(tmp_path):
    with pytest.raises(InputError, match=r"expected a column 'mz'.*'utc', 'mx', 'my', 'Mz'") as e:
        load_pass(mission(tmp_path, "utc,mx,my,Mz\n2026-07-14T09:12:00Z,1,2,3\n"))
    assert e.value.line == 1 and e.value.key == "mz"


def test_duplicated_column_is_ambiguous(tmp_path):
    with pytest.raises(InputError, match="'mx' once.*2 times"):
        load_pass(mission(tmp_path, "utc,mx,my,mz,mx\n2026-07-14T09:12:00Z,1,2,3,4\n"))


def test_no_usable_row_raises_with_the_reasons(tmp_path):
    with pytest.raises(InputError, match=r"none of 3 lines \(.*field_count 2.*non_numeric 1"):
        load_pass(mission(tmp_path, "utc,mx,my,mz\n1,2\n3,4\n2026-07-14T09:12:00Z,a,b,c\n"))


def test_missing_or_unreadable_log_file(tmp_path):
    m = mission(tmp_path, csv_text(mag_lines(2)))
    (tmp_path / "mag.csv").unlink()
    with pytest.raises(InputError, match="no such file"):
        load_log(m.magnetometer, "magnetometer")
    (tmp_path / "mag.csv").mkdir()
    with pytest.raises(InputError, match="directory"):
        load_log(m.magnetometer, "magnetometer")


# ------------------------------------------------------------------------------------ time bases
def test_iso_with_and_without_z_and_with_an_offset():
    t = iso_to_utc(["2026-07-14T09:12:00Z", "2026-07-14T09:12:00", "2026-07-14T11:12:00+02:00",
                    "2026-07-14 09:12:00.123456789", "not a time", ""])
    want = np.datetime64("2026-07-14T09:12:00", "ns")
    assert t[0] == t[1] == t[2] == want
    assert t[3] == np.datetime64("2026-07-14T09:12:00.123456789", "ns")
    assert np.isnat(t[4]) and np.isnat(t[5])


def test_unix_seconds_keep_microseconds():
    t = unix_seconds_to_utc(np.array([1784020320.25, 0.0, np.nan, 1e30]))
    assert t[0] == np.datetime64("2026-07-14T09:12:00.25", "ns")
    assert t[1] == np.datetime64("1970-01-01", "ns")
    assert np.isnat(t[2]) and np.isnat(t[3])


def _gps_seconds(utc: str, gps_minus_utc_s: int) -> float:
    """GPS seconds of a UTC instant, given GPS - UTC in force."""
    d = dt.datetime.fromisoformat(utc) - dt.datetime(1980, 1, 6)
    return d.total_seconds() + gps_minus_utc_s


def test_gps_minus_utc_is_18_s_since_2017():
    # IERS Bulletin C 52 (July 2016; bulletin number from memory): leap second at the end of
    # 2016-12-31, TAI - UTC = 37 s from 2017-01-01, so GPS - UTC = 37 - 19 = 18 s.
    for utc in ("2017-01-01T00:00:00", "2020-02-29T12:00:00.5", "2026-07-14T09:12:00"):
        got = gps_seconds_to_utc(np.array([_gps_seconds(utc, 18)]))[0]
        assert got == np.datetime64(utc, "ns"), utc


def test_gps_minus_utc_is_13_s_in_2005():
    # IERS Bulletin C: TAI - UTC = 32 s from 1999-01-01 until the leap second at the end of
    # 2005-12-31, so GPS - UTC = 32 - 19 = 13 s through 2005.
    got = gps_seconds_to_utc(np.array([_gps_seconds("2005-06-15T00:00:00", 13)]))[0]
    assert got == np.datetime64("2005-06-15T00:00:00", "ns")


def test_gps_across_the_end_of_2016_leap_second():
    # 2016-12-31T23:59:59 UTC is GPS - UTC = 17 s; the next UTC second 23:59:60 is the leap second
    # (no datetime64 label: it takes the label of the second after it); then 18 s.
    before = _gps_seconds("2016-12-31T23:59:59", 17)
    t = gps_seconds_to_utc(np.array([before, before + 1.0, before + 2.0]))
    assert t[0] == np.datetime64("2016-12-31T23:59:59", "ns")
    assert t[2] == np.datetime64("2017-01-01T00:00:00", "ns")
    assert t[1] in (np.datetime64("2016-12-31T23:59:59", "ns"), np.datetime64("2017-01-01T00:00:00", "ns"))


def test_gps_agrees_with_astropy():
    from astropy.time import Time

    # independent implementation of the same leap-second table; tolerance 1 us covers float input.
    # Up to 1.4e9 s (May 2024): astropy warns about dates past erfa's table horizon.
    gps = np.random.default_rng(3).uniform(1e8, 1.4e9, 200)
    ours = gps_seconds_to_utc(gps)
    theirs = Time(gps, format="gps").utc.to_value("datetime64")
    diff_ns = np.abs((ours - theirs.astype("datetime64[ns]")).astype(np.int64))
    assert diff_ns.max() < 1_000


def test_gps_negative_or_nan_is_unreadable():
    assert np.isnat(gps_seconds_to_utc(np.array([-1.0, np.nan]))).all()


def test_ticks_32_bit_rollover_gives_a_continuous_timeline():
    rate = 256.0
    start = 2**32 - 10 * 256  # wraps after 10 s
    true_ticks = start + 256 * np.arange(30)  # one sample per second
    counts = np.mod(true_ticks, 2**32).astype(float)
    t, wraps = ticks_to_utc(counts, np.datetime64("2026-07-01T00:00:00", "ns"), rate, 32)
    np.testing.assert_array_equal(np.diff(t), np.full(29, np.timedelta64(1_000_000_000, "ns")))
    np.testing.assert_array_equal(wraps, [10])
    assert t[0] == np.datetime64("2026-07-01", "ns") + np.timedelta64(int(start / rate * 1e9), "ns")


def test_ticks_count_every_wrap_of_a_small_counter():
    counts = np.mod(7 * np.arange(200), 2**8).astype(float)  # 7 ticks per sample, 8-bit counter
    ticks, wraps = unwrap_ticks(counts, 8)
    np.testing.assert_array_equal(ticks, 7 * np.arange(200))
    assert wraps.size == (7 * 199) // 256
    # a single corrupt count far out does not shift the rest (it un-wraps itself)
    c = counts.copy()
    c[50] = 250.0 if c[50] < 128 else 3.0
    ticks2, _ = unwrap_ticks(c, 8)
    np.testing.assert_array_equal(np.delete(ticks2, 50), np.delete(7 * np.arange(200), 50))


def test_ticks_log_through_load_with_rollover(tmp_path):
    time = '{ column = "obt", format = "ticks", epoch = "2026-07-01T00:00:00Z", rate_hz = 256, rollover_bits = 32 }'
    counts = np.mod(2**32 - 512 + 128 * np.arange(8), 2**32)
    lines = [f"{c},1,2,3" for c in counts] + ["4294967296,1,2,3", "12.5,1,2,3"]  # out of range, fraction
    p = load_pass(mission(tmp_path, csv_text(lines, "obt,mx,my,mz"), time=time))
    log = p.magnetometer
    np.testing.assert_array_equal(np.diff(log.time_utc).astype(np.int64), np.full(7, 500_000_000))
    np.testing.assert_array_equal(log.wrap_line, [6])
    assert sorted(p.ledger["line"]) == [10, 11] and set(p.ledger["reason"]) == {"bad_time"}


def test_iso_fast_byte_path_agrees_with_pandas_path():
    # the fixed-width numpy parse of the bytes and pandas' ISO 8601 parse of the text must agree,
    # field by field, on valid and invalid times alike
    from recon.load.timescales import iso_bytes_to_utc

    rng = np.random.default_rng(5)
    base = np.datetime64("2026-07-14T09:12:00", "ns")
    texts = []
    for k in range(3000):
        t = base + np.timedelta64(int(rng.integers(0, 10**15)), "ns")
        unit = ["s", "ms", "us", "ns"][k % 4]
        s = np.datetime_as_string(t, unit=unit)
        if k % 3 == 0:
            s += "Z"
        if k % 5 == 0:
            s = s.replace("T", " ")
        texts.append(s)
    for k in rng.choice(3000, 40, replace=False):  # corrupt some: offsets, text, impossible dates
        texts[k] = ["2026-07-14T09:12:00+02:00", "garbage", "2026-02-30T00:00:00", "", "2026-07-14T09:12:60Z",
                    "9999999-01-01", "2026-07-14T09:12:00-05:30"][k % 7]
    data = "\n".join(texts).encode()
    start = np.cumsum([0] + [len(s) + 1 for s in texts[:-1]])
    end = start + np.array([len(s) for s in texts])
    fast = iso_bytes_to_utc(np.frombuffer(data, np.uint8), start, end)
    np.testing.assert_array_equal(fast, iso_to_utc(texts))
    assert np.isnat(fast).sum() >= 15
