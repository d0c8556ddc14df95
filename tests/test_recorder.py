"""Recordings: the file format round-trips (header, fields, little-endian records), a cut file still reads,
the writer never blocks the caller (full ring: rows dropped and counted), the summary's figures, and
the SVG plot is well-formed XML (W3C SVG 1.1 root element)."""

from __future__ import annotations

import json
import math
import struct
import xml.etree.ElementTree as ET

import numpy as np
import pytest

from twistrate.service import recorder as R  # noqa: N812
from twistrate.solver.errors import InputError
from twistrate.solver.load import load_arm


@pytest.fixture
def arm():
    return load_arm("reach7")


def _push(rec, k, arm, mode="running", health="clear", t_ns=None):
    q = arm.q_home + 0.001 * k
    qd = np.full(arm.n, 0.01 * k)
    tw = np.arange(6, dtype=float) * k
    limits = np.zeros(arm.n, dtype=np.uint8)
    limits[k % arm.n] = 1 if k % 10 == 0 else 0
    rec.push(2_000_000 * k if t_ns is None else t_ns, 1_700_000_000_000_000_000, k, mode, health, limits, q,
             qd, tw, tw * 0.5, 0.5 + 0.001 * k, 1.0, 0.01, 0.05 + 0.001 * k, 1e-3 * (k + 1))
    return q, qd


def test_round_trip_and_header(tmp_path, arm):
    path = tmp_path / "r.trec"
    rec = R.Recorder(path, arm, 500.0)
    rows = [_push(rec, k, arm, mode="running" if k < 60 else "stopping") for k in range(100)]
    rec.close()
    header, data = R.read_recording(path)
    assert header["format"] == "trec" and header["version"] == 1 and header["n"] == 7
    assert header["joints"] == list(arm.joint_names) and header["tick_hz"] == 500.0
    assert header["record_bytes"] == R.record_dtype(7).itemsize == data.dtype.itemsize
    assert len(data) == 100
    for k, (q, qd) in enumerate(rows):
        np.testing.assert_array_equal(data["q"][k], q)
        np.testing.assert_array_equal(data["qd"][k], qd)
    np.testing.assert_allclose(data["t"], np.arange(100) * 0.002)
    assert data["tick"].tolist() == list(range(100))
    modes = [header["modes"][c] for c in data["mode"]]
    assert modes[:60] == ["running"] * 60 and modes[60:] == ["stopping"] * 40
    # the layout is what docs/operation.md says: magic, uint32 header length, JSON, packed records
    raw = path.read_bytes()
    assert raw[:8] == R.MAGIC
    (h,) = struct.unpack("<I", raw[8:12])
    assert json.loads(raw[12:12 + h])["fields"][0] == ["t", "<f8", []]
    assert len(raw) == 12 + h + 100 * header["record_bytes"]


def test_cut_file_reads_whole_records(tmp_path, arm):
    path = tmp_path / "r.trec"
    rec = R.Recorder(path, arm, 500.0)
    for k in range(10):
        _push(rec, k, arm)
    rec.close()
    raw = path.read_bytes()
    path.write_bytes(raw[:-5])
    _, data = R.read_recording(path)
    assert len(data) == 9
    path.write_bytes(b"nope")
    with pytest.raises(InputError, match="recording"):
        R.read_recording(path)


def test_full_ring_drops_and_counts_instead_of_blocking(tmp_path, arm):
    rec = R.Recorder(tmp_path / "r.trec", arm, 500.0, capacity=16)
    rec._stop.set()  # writer thread idle: nothing is written until close()
    rec._thread.join(1.0)
    for k in range(40):
        _push(rec, k, arm)
    assert rec.rows == 16 and rec.dropped == 24
    rec.close()
    _, data = R.read_recording(tmp_path / "r.trec")
    assert data["tick"].tolist() == list(range(16))


def test_summary_figures(tmp_path, arm):
    path = tmp_path / "r.trec"
    rec = R.Recorder(path, arm, 500.0)
    for k in range(100):
        mode = "running" if k < 60 else "holding"
        _push(rec, k, arm, mode=mode, health="clear" if k < 90 else "narrow")
    rec.close()
    s = R.summarize(*R.read_recording(path))
    assert s["records"] == 100 and s["ticks"] == 100 and s["missing_ticks"] == 0
    assert s["duration_s"] == pytest.approx(0.2)
    assert s["time_in_mode_s"] == pytest.approx({"running": 0.12, "holding": 0.08})
    assert s["time_in_health_s"] == pytest.approx({"clear": 0.18, "narrow": 0.02})
    assert s["scale_min"] == pytest.approx(0.5) and s["scale_max"] == pytest.approx(0.599, abs=1e-6)
    assert s["limit_events"] == 10
    np.testing.assert_allclose(s["q_min"], arm.q_home)
    text = R.format_summary(s, list(arm.joint_names))
    assert "running 0.12 s" in text and arm.joint_names[0] in text


def test_svg_is_well_formed(tmp_path, arm):
    path = tmp_path / "r.trec"
    rec = R.Recorder(path, arm, 500.0)
    for k in range(50):
        _push(rec, k, arm)
    rec.close()
    header, data = R.read_recording(path)
    out = R.plot_svg(header, data, tmp_path / "r.svg")
    root = ET.parse(out).getroot()
    assert root.tag == "{http://www.w3.org/2000/svg}svg"
    assert len(root.findall("{http://www.w3.org/2000/svg}polyline")) >= 5
    assert not math.isnan(float(root.get("height")))


def test_the_demo_reports_saturation_figures_counted_by_hand(tmp_path, arm):
    # The demo report's scale-0 share, peak acceleration and sign changes, read from a recording whose
    # values are set here so each figure can be counted by hand (definitions: docs/saturation.md).
    from twistrate.service.bench.saturation import recording_figures

    path = tmp_path / "r.trec"
    rec = R.Recorder(path, arm, 500.0)
    T = 1.0 / 500.0
    q = np.asarray(arm.q_home, dtype=float)
    lim = np.zeros(arm.n, dtype=np.uint8)
    tw = np.array([0.1, 0.0, 0.0, 0.0, 0.0, 0.0])
    rate0 = np.array([0.5, -0.5, 0.3, 0.0, 0.0, 0.0, 0.0]) * arm.v_max  # joint 0 +, 1 -, 2 +
    ticks = [*range(10), 12, 13]  # ticks 10 and 11 missing from the file
    for k in ticks:
        qd = rate0 * (0.5 if k < 5 else -0.5)  # a sign change on joints 0 to 2 at tick 5 (a step of rate0)
        if k == 12:
            qd = rate0 * 1.0  # across the gap: a second sign change; its step of 1.5 rate0 is not one tick's
        if k == 13:
            qd = rate0 * 0.0  # a step of rate0 to rest (the dead band, 1e-3 v_max: no sign change)
        mode = "running" if k < 8 else "stopping"
        scale = 0.0 if k in (2, 3) else (0.4 if k == 4 else 1.0)
        rec.push(2_000_000 * k, 1_700_000_000_000_000_000, k, mode, "clear", lim, q, qd,
                 tw if k != 7 else tw * 0.0, tw, scale, 1.0, 0.0, 0.1, 1e-3)
    rec.close()
    header, data = R.read_recording(path)
    m = recording_figures(arm, header, data, 0.3)
    # running: mode running (ticks 0-7) with a non-zero desired twist (not tick 7) -> 7 ticks
    assert m["running_ticks"] == 7
    assert m["scale_zero_fraction"] == pytest.approx(2 / 7)
    assert m["below_half_fraction"] == pytest.approx(3 / 7)
    # the largest change between consecutive ticks is rate0 (the flip at 5, the stop at 13); the larger
    # step from tick 9 to tick 12 spans three periods and is left out
    expected = float(np.max(np.abs(rate0) / (arm.a_max * T)))
    assert m["peak_acceleration_ratio"] == pytest.approx(expected)
    assert m["sign_changes"] == [2, 2, 2, 0, 0, 0, 0]
