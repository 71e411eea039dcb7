"""CCSDS AEM 2.0 writer and reader (CCSDS 504.0-B-2, Attitude Data Messages, January 2024)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from recon.core import InputError
from recon.report import format_aem, read_aem, write_aem

T0 = np.datetime64("2026-07-14T09:12:00", "ns")
CREATED = np.datetime64("2026-07-14T10:00:00", "ns")
KW = dict(creation_date=CREATED, originator="RECON-DEMO", object_name="DEMOSAT-1", object_id="2026-001A")

# Table 4-2 (header) and table 4-3 (metadata) keywords, in the standard's order
HEADER_ORDER = ["CCSDS_AEM_VERS", "COMMENT", "CLASSIFICATION", "CREATION_DATE", "ORIGINATOR", "MESSAGE_ID"]
META_ORDER = ["COMMENT", "OBJECT_NAME", "OBJECT_ID", "CENTER_NAME", "REF_FRAME_A", "REF_FRAME_B", "TIME_SYSTEM",
              "START_TIME", "USEABLE_START_TIME", "USEABLE_STOP_TIME", "STOP_TIME", "ATTITUDE_TYPE", "EULER_ROT_SEQ",
              "ANGVEL_FRAME", "INTERPOLATION_METHOD", "INTERPOLATION_DEGREE"]


def _times(n, step_s=0.1):
    return T0 + (np.arange(n) * step_s * 1e9).astype("timedelta64[ns]")


def test_annex_f2_example_quaternion():
    """CCSDS 504.0-B-2 annex F2.2: frame B is frame A turned +90 deg about Z, so X_A = [1, 0, 0] has
    B coordinates [0, -1, 0] and the quaternion 'from A to B' is Q1 = 0, Q2 = 0, Q3 = 0.7071, QC = 0.7071."""
    m_ba = np.array([[0.0, 1.0, 0.0], [-1.0, 0.0, 0.0], [0.0, 0.0, 1.0]])
    q = Rotation.from_matrix(m_ba).as_quat()  # recon's q_body_from_gcrf: A(q) v_gcrf = v_body
    assert np.allclose(Rotation.from_quat(q).apply([1.0, 0.0, 0.0]), [0.0, -1.0, 0.0])
    text = format_aem(_times(1), q[None], **KW)
    data = text.split("DATA_START\n")[1].split("\nDATA_STOP")[0].split()
    assert [float(x) for x in data[1:]] == pytest.approx([0.0, 0.0, 0.70710678, 0.70710678], abs=1e-8)


def test_keywords_and_layout_follow_504_0_b_2(tmp_path):
    rng = np.random.default_rng(0)
    q = Rotation.random(5, random_state=rng).as_quat()
    w = rng.normal(size=(5, 3)) * 0.01
    text = format_aem(_times(5), q, w_body_rad_s=w, interpolation_method="LAGRANGE", interpolation_degree=5,
                      comments=("reconstructed by recon",), **KW)
    lines = [s for s in text.splitlines() if s.strip()]
    assert lines[0] == "CCSDS_AEM_VERS = 2.0"  # 4.2.2.3: first non-blank line
    i_ms, i_me, i_ds, i_de = (lines.index(k) for k in ("META_START", "META_STOP", "DATA_START", "DATA_STOP"))
    assert i_ms < i_me < i_ds < i_de == len(lines) - 1
    header = [s.split("=")[0].split()[0] for s in lines[:i_ms]]
    meta = [s.split("=")[0].strip() for s in lines[i_ms + 1:i_me]]
    assert all(k in HEADER_ORDER for k in header)
    assert [HEADER_ORDER.index(k) for k in header] == sorted(HEADER_ORDER.index(k) for k in header)
    assert all(k in META_ORDER for k in meta)
    assert [META_ORDER.index(k) for k in meta] == sorted(META_ORDER.index(k) for k in meta)
    for k in ("CREATION_DATE", "ORIGINATOR"):  # mandatory header (table 4-2)
        assert k in header
    for k in ("OBJECT_NAME", "OBJECT_ID", "REF_FRAME_A", "REF_FRAME_B", "TIME_SYSTEM", "START_TIME", "STOP_TIME",
              "ATTITUDE_TYPE"):  # mandatory metadata (table 4-3)
        assert k in meta
    kv = dict(s.split(" = ", 1) for s in lines[i_ms + 1:i_me])
    assert kv["REF_FRAME_A"] == "GCRF" and kv["REF_FRAME_B"] == "SC_BODY_1"
    assert kv["TIME_SYSTEM"] == "UTC" and kv["ATTITUDE_TYPE"] == "QUATERNION/ANGVEL"
    assert kv["ANGVEL_FRAME"] == "SC_BODY_1"
    assert kv["START_TIME"] == "2026-07-14T09:12:00.000000" and kv["STOP_TIME"] == "2026-07-14T09:12:00.400000"
    # version 2.0 dropped these (504.0-B-2 annex J)
    assert "ATTITUDE_DIR" not in text and "QUATERNION_TYPE" not in text
    # QUATERNION/ANGVEL line: EPOCH Q1 Q2 Q3 QC ANGVEL_X ANGVEL_Y ANGVEL_Z (table 4-4)
    assert all(len(s.split()) == 8 for s in lines[i_ds + 1:i_de])


def test_round_trip_gives_back_the_quaternions_and_rates(tmp_path):
    rng = np.random.default_rng(1)
    q = Rotation.random(200, random_state=rng).as_quat()
    w = rng.normal(size=(200, 3)) * 0.05
    p = write_aem(tmp_path / "attitude.aem", _times(200), q, w_body_rad_s=w, **KW)
    aem = read_aem(p)
    assert aem.header["CCSDS_AEM_VERS"] == "2.0" and aem.header["ORIGINATOR"] == "RECON-DEMO"
    seg = aem.segments[0]
    assert np.array_equal(seg.time_utc, _times(200).astype("datetime64[us]").astype("datetime64[ns]"))
    same = np.minimum(np.abs(seg.q_body_from_gcrf - q).max(axis=1), np.abs(seg.q_body_from_gcrf + q).max(axis=1))
    assert same.max() < 1e-11  # 12 decimals written
    assert np.abs(seg.w_body_rad_s - w).max() < 1e-9 * np.abs(w).max()
    # the rotation means the same thing after the trip: same body components of a GCRF vector
    v = np.array([0.3, -0.4, 0.866])
    assert np.abs(Rotation.from_quat(seg.q_body_from_gcrf).apply(v) - Rotation.from_quat(q).apply(v)).max() < 1e-10


def test_output_is_deterministic_and_creation_date_is_an_argument():
    q = Rotation.random(3, random_state=2).as_quat()
    a = format_aem(_times(3), q, **KW)
    b = format_aem(_times(3), q, **KW)
    assert a == b
    assert "CREATION_DATE = 2026-07-14T10:00:00.000000" in a


def test_bad_inputs_and_files_raise_input_error(tmp_path):
    q = Rotation.random(3, random_state=3).as_quat()
    with pytest.raises(InputError, match="strictly increasing"):
        format_aem(_times(3)[::-1], q, **KW)
    with pytest.raises(InputError, match="together"):
        format_aem(_times(3), q, interpolation_method="HERMITE", **KW)
    good = format_aem(_times(3), q, **KW)
    bad = tmp_path / "bad.aem"
    bad.write_text(good.replace("CCSDS_AEM_VERS = 2.0", "CCSDS_AEM_VERS = 1.0"))
    with pytest.raises(InputError, match="2.0"):
        read_aem(bad)
    bad.write_text(good.replace("ATTITUDE_TYPE = QUATERNION", "ATTITUDE_TYPE = SPIN"))
    with pytest.raises(InputError, match="ATTITUDE_TYPE"):
        read_aem(bad)
    bad.write_text(good.replace("QUATERNION\nMETA_STOP", "QUATERNION\nQUATERNION_TYPE = LAST\nMETA_STOP"))
    with pytest.raises(InputError, match=r"bad.aem:\d+: expected a metadata keyword"):
        read_aem(bad)
    lines = good.splitlines()
    k = lines.index("DATA_START") + 1
    lines[k] = lines[k] + " 0.5"
    bad.write_text("\n".join(lines))
    with pytest.raises(InputError, match=f"bad.aem:{k + 1}: expected 5 items"):
        read_aem(bad)
