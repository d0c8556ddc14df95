"""`twistrate bench teleop`: the event-to-command matching, and one short run end to end (figures are
printed, not asserted: the machine is shared)."""

from __future__ import annotations

import json

import numpy as np
import pytest

from twistrate.service.bench import teleop as bench_teleop


def test_match_takes_the_first_twist_after_each_event_and_the_first_command_answering_it() -> None:
    sends = [(1.000, 10, True), (1.008, 11, True), (1.016, 12, False), (1.024, 13, True)]
    commands = [(1.001, 9), (1.0035, 10), (1.0055, 10), (1.0101, 11), (1.030, 13)]
    events = np.array([0.995, 1.000, 1.003, 1.012, 1.020])
    lat = bench_teleop.match(events, sends, commands)
    # 0.995: before the first moving twist (it waited for the enable): left out; 1.000 -> twist 10 ->
    # the first command answering 10 at 1.0035; 1.003 -> twist 11 -> 1.0101; 1.012 -> twist 12 is
    # zeros (at rest): left out; 1.020 -> twist 13 -> 1.030
    np.testing.assert_allclose(lat, [0.0035, 0.0071, 0.010])


def test_report_times_span_the_gaps() -> None:
    times = bench_teleop.report_times(2.0, np.random.default_rng(1))
    gaps = np.diff(times)
    lo, hi = bench_teleop.REPORT_GAP_S
    assert times[-1] < 2.0 and gaps.min() >= lo and gaps.max() <= hi


@pytest.mark.timeout(120)
def test_a_short_run_prints_and_writes_figures(tmp_path, capsys) -> None:
    out = tmp_path / "teleop.json"
    assert bench_teleop.run(["--seconds", "1", "--json", str(out)]) == 0
    text = capsys.readouterr().out
    assert "device event -> command received: p50" in text and "reference, twist sent at once" in text
    result = json.loads(out.read_text())
    assert result["teleop"]["n"] > 20 and result["direct"]["n"] > 20
    assert result["target_p99_ms"] == pytest.approx(1e3 / 125 + 1e3 / 500 + 1.0)
