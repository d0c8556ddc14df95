"""`twistrate plot`: the figure of a short real run (service + simulated arm, its own recording) has its
eight panels, limit and threshold lines, health bands and events; the PNG read back is a PNG of the
figure's size (PNG specification, ISO/IEC 15948:2004, 5.2 signature and 11.2.2 IHDR); the SVG is an
SVG document (W3C SVG 1.1 root element); constant and unrecorded series are drawn honestly."""

from __future__ import annotations

import math
import struct
import xml.etree.ElementTree as ET

import numpy as np
import pytest
from service_harness import make_config, running_service, stream_until

pytest.importorskip("matplotlib")

from twistrate.service import plot as P  # noqa: N812
from twistrate.service.commands import plot as plot_cmd
from twistrate.service.recorder import Recorder, read_recording
from twistrate.solver.load import load_arm

pytestmark = pytest.mark.timeout(120)

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # ISO/IEC 15948:2004, 5.2


def _png_size(data: bytes) -> tuple[int, int]:
    """(width, height) from the IHDR chunk, which must come first (ISO/IEC 15948:2004, 11.2.2)."""
    assert data[:8] == PNG_SIGNATURE
    length, kind = struct.unpack(">I4s", data[8:16])
    assert kind == b"IHDR" and length == 13
    return struct.unpack(">II", data[16:24])


@pytest.fixture(scope="module")
def recording(tmp_path_factory):
    """A short run of the demo arm: streamed fast towards its limits, then left to stop (mode changes)."""
    path = tmp_path_factory.mktemp("plot") / "run.trec"
    cfg = make_config()
    arm = cfg.load_arm()
    with running_service(cfg, recorder=Recorder(path, arm, cfg.tick.rate_hz)) as run:
        link = run.link()
        link.claim("plot-test")
        link.enable()
        stream_until(
            link, [0.25, 0.05, -0.15], [0.0, 0.3, 0.4], lambda cs: sum(c.answers >= 0 for c in cs) > 300
        )
        stream_until(
            link, [0.0, 0.0, 0.0], [0.0, 0.0, 0.0], lambda cs: cs[-1].mode == "holding", period_s=1.0
        )
    return path


def test_figure_of_a_real_run_has_its_panels_lines_bands_and_events(recording):
    header, rec = read_recording(recording)
    arm = load_arm(header["arm"])
    assert len(rec) > 300
    limits = P.JointLimits.of_arm(arm)
    fig = P.build_figure(header, rec, limits, P.Thresholds(0.06, 0.015))
    axes = fig.get_axes()
    assert len(axes) == len(P.PANEL_TITLES) == 9 and P.PANEL_TITLES[0] == "events"
    assert [ax.get_title(loc="left") for ax in axes] == list(P.PANEL_TITLES)
    # one line per joint in the position and rate panels, scaled into the range / limit
    pos_lines = [ln for ln in axes[1].get_lines() if ln.get_label() in arm.joint_names]
    assert len(pos_lines) == arm.n
    for i, line in enumerate(pos_lines):
        j = arm.joints[i]
        y = np.asarray(line.get_ydata(), dtype=float)
        q = rec["q"][:, i]
        want = (q - j.position_min) / (j.position_max - j.position_min)
        assert np.nanmin(y) == pytest.approx(want.min()) and np.nanmax(y) == pytest.approx(want.max())
        assert np.all((y >= 0.0) & (y <= 1.0))  # the simulated arm stays within its limits
    rate_lines = [ln for ln in axes[2].get_lines() if ln.get_label() in arm.joint_names]
    peak = max(np.nanmax(np.abs(np.asarray(ln.get_ydata(), dtype=float))) for ln in rate_lines)
    assert 0.0 < peak <= 1.0 + 1e-9
    # the threshold lines on the smallest-singular-value panel
    labels = [ln.get_label() for ln in axes[8].get_lines()]
    assert "narrow below 0.06 m" in labels and "pinched below 0.015 m" in labels
    # events: the mode changes of the run (disabled -> ... -> running -> stopping -> holding) are marked
    events = P.find_events(header, rec)
    kinds = [e.label for e in events if e.kind == "mode"]
    assert "running -> stopping" in kinds and "stopping -> holding" in kinds
    vertical = [ln for ln in axes[5].get_lines() if len(set(np.asarray(ln.get_xdata(), dtype=float))) == 1]
    assert len(vertical) == sum(e.kind != "limit" for e in events)
    markers = [ln for ln in axes[0].get_lines() if ln.get_marker() != "None"]  # every event, in the strip
    assert len(markers) == len(events)
    # a real time axis: seconds of the recording
    lo, hi = axes[-1].get_xlim()
    assert lo == pytest.approx(rec["t"][0]) and hi == pytest.approx(rec["t"][-1] + 1.0 / header["tick_hz"])
    assert "s" in axes[-1].get_xlabel()
    P.save_figure(fig, recording.with_suffix(".png"))
    w, h = _png_size(recording.with_suffix(".png").read_bytes())
    assert (w, h) == (
        round(P.FIG_WIDTH_IN * P.DPI),
        round(P.PANEL_HEIGHT_IN * (8 + P.EVENT_STRIP_RATIO) * P.DPI),
    )


def test_health_bands_follow_the_recorded_state(tmp_path):
    arm = load_arm("planar3")
    path = tmp_path / "bands.trec"
    rec = Recorder(path, arm, 100.0)
    states = ["clear"] * 20 + ["narrow"] * 10 + ["pinched"] * 5 + ["narrow"] * 5 + ["clear"] * 10
    for k, s in enumerate(states):
        rec.push(
            10_000_000 * k,
            1_700_000_000_000_000_000,
            k,
            "running",
            s,
            np.zeros(3, np.uint8),
            arm.q_home,
            np.zeros(3),
            np.zeros(6),
            np.zeros(6),
            1.0,
            1.0,
            0.0,
            0.05,
            0.01,
        )
    rec.close()
    header, data = read_recording(path)
    fig = P.build_figure(header, data, P.JointLimits.of_arm(arm), None)
    spans = [p for p in fig.get_axes()[8].patches if p.get_hatch()]
    # three non-clear stretches: narrow, pinched, narrow; each with its hatch (not colour alone)
    assert [p.get_hatch() for p in spans] == ["//", "xx", "//"]
    xs = [(p.get_x(), p.get_x() + p.get_width()) for p in spans]
    assert xs[0] == pytest.approx((0.20, 0.30)) and xs[1] == pytest.approx((0.30, 0.35))
    health_events = [e.label for e in P.find_events(header, data) if e.kind == "health"]
    assert health_events == [
        "clear -> narrow",
        "narrow -> pinched",
        "pinched -> narrow",
        "narrow -> clear",
    ]
    P.save_figure(fig, tmp_path / "bands.png")


def test_constant_and_unrecorded_series_are_drawn_honestly(tmp_path):
    arm = load_arm("planar3")
    path = tmp_path / "flat.trec"
    rec = Recorder(path, arm, 100.0, source="output", unavailable=("twist_desired", "twist_achieved"))
    for k in range(50):
        rec.push(
            10_000_000 * k,
            1_700_000_000_000_000_000,
            k,
            "running",
            "clear",
            np.zeros(3, np.uint8),
            arm.q_home,
            np.zeros(3),
            None,
            None,
            1.0,
            1.0,
            0.0,
            0.05 + 1e-4 * k,
            0.01,
        )
    rec.close()
    header, data = read_recording(path)
    fig = P.build_figure(header, data, None, None)
    axes = fig.get_axes()
    texts = {i: " ".join(t.get_text() for t in ax.texts) for i, ax in enumerate(axes)}
    assert "not recorded" in texts[3] and "not recorded" in texts[4]  # twists unknown from the wire
    assert "damping constant at 0" in texts[6]
    lo, hi = axes[7].get_ylim()  # manipulability constant 0.01: a range around it, not a collapsed axis
    assert lo < 0.01 < hi and hi - lo == pytest.approx(2 * P.CONSTANT_HALF_SPAN * 0.01)
    assert "joint limits not known" in texts[1]
    assert not P.is_constant(data["sigma_min"].astype(float)) and P.is_constant(np.full(5, 3.0))
    assert not P.is_constant(np.full(4, math.nan))
    P.save_figure(fig, tmp_path / "flat.png")


def test_plot_command_writes_png_and_svg(recording, tmp_path, capsys):
    out = tmp_path / "fig.png"
    assert plot_cmd.main([str(recording), "--out", str(out), "--svg"]) == 0
    printed = capsys.readouterr().out
    assert printed.startswith("CAUTIONS") and "joint limits: the packaged arm" in printed
    assert _png_size(out.read_bytes())[0] == round(P.FIG_WIDTH_IN * P.DPI)
    root = ET.parse(out.with_suffix(".svg")).getroot()
    assert root.tag == "{http://www.w3.org/2000/svg}svg"
    assert plot_cmd.main([str(recording), "--out", str(out), "--arm", "planar3"]) == 2
    assert "accepted: an arm with the recording's joints" in capsys.readouterr().err
    assert plot_cmd.main([str(tmp_path / "missing.trec")]) == 2


def test_demo_report_points_to_its_plot(tmp_path):
    from service_harness import config_dict, twistrate
    from test_watch_commands import _toml

    path = tmp_path / "demo.toml"
    path.write_text(_toml(config_dict(simulation={"enabled": True})))
    recording = tmp_path / "demo.trec"
    proc = twistrate("demo", "--seconds", "2", "--config", str(path), "--record", str(recording))
    out, err = proc.communicate(timeout=120)
    assert proc.returncode == 0, err
    assert f"plot: {recording.with_suffix('.png')}" in out
    w, _h = _png_size(recording.with_suffix(".png").read_bytes())
    assert w == round(P.FIG_WIDTH_IN * P.DPI)
