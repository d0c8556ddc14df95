"""`twistrate bench vservo` runs end to end and writes every figure (no timing assertion: figures are
measured by the benchmark itself, on a quiet machine)."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from twistrate.service.bench import vservo


def test_bench_vservo_smoke_run_writes_every_figure(tmp_path: Path, capsys) -> None:
    out = tmp_path / "vservo.json"
    assert vservo.run(["--seconds", "3", "--rounds", "1", "--json", str(out)]) == 0
    doc = json.loads(out.read_text())
    for client in vservo.CLIENTS:  # the relay (reference) and vservo
        r = doc[client]
        assert r["frames"] >= 30  # 3 s at 20 frames per second on average, less a few at the edges
        for key in ("sent_to_published", "sent_to_received"):
            assert r[key]["count"] >= r["frames"] - r["unanswered"] - 1
            assert 0.0 < r[key]["median_ms"] <= r[key]["p99_ms"] <= r[key]["max_ms"]
        # the client's own record joins every answer (its timings file), and the three parts are times
        # in causal order on one clock: each positive, together no longer than sent -> published
        parts = [r[part] for part in vservo.PARTS]
        assert all(p["count"] == r["sent_to_published"]["count"] for p in parts)
        assert all(0.0 < p["median_ms"] <= p["p99_ms"] <= p["max_ms"] for p in parts)
        assert sum(p["median_ms"] for p in parts) <= r["sent_to_published"]["max_ms"]
    v, f = doc["vservo"]["sent_to_published"], doc["relay"]["sent_to_published"]
    assert doc["vservo_minus_relay"]["median_ms"] == v["median_ms"] - f["median_ms"]
    assert doc["target_p99_ms"] == 1000.0 / doc["rate_hz"] + vservo.TARGET_EXTRA_MS
    # the path in one process: both forms give the same twist (within pointlaw's 1e-8 relative bound:
    # the normal equations at cond_2 <= 1e8 of L_hat^T L_hat), every stage timed
    path = doc["path"]
    assert path["twist_difference"] <= 1e-7 * path["twist_size"] and path["twist_size"] > 0.0
    for form in ("vservo", "reference"):
        for mode in ("hot", "after_wait"):
            r = path[form][mode]
            assert all(r[stage] > 0.0 for stage in ("decode", "step", "twist", "encode"))
            assert r["total"] >= max(r[stage] for stage in ("decode", "step", "twist", "encode"))
    text = capsys.readouterr().out
    assert "features sent -> command published" in text and "vservo minus relay" in text
    assert "per-frame path in one process" in text


def test_frame_gaps_sample_every_phase_of_the_tick() -> None:
    # Gaps uniform in [0.5, 1.5] frame periods: the send times modulo one service tick (2 ms at 500 Hz)
    # are uniform (a fixed gap of 50 ms, a multiple of the tick, would put every frame at one phase).
    # Kolmogorov-Smirnov against U(0, 1) (scipy.stats.kstest; Massey 1951, "The Kolmogorov-Smirnov test
    # for goodness of fit", J. Am. Stat. Assoc. 46(253)).
    from scipy.stats import kstest

    class Run:
        rng = np.random.default_rng(vservo.SEED)

    times = np.cumsum([vservo._gap(Run) for _ in range(2000)])
    gaps = np.diff(times)
    assert gaps.min() >= 0.5 / vservo.FRAME_HZ and gaps.max() <= 1.5 / vservo.FRAME_HZ
    assert abs(gaps.mean() - 1.0 / vservo.FRAME_HZ) < 0.02 / vservo.FRAME_HZ
    tick = 1.0 / vservo.DEFAULT_RATE_HZ
    assert kstest((times % tick) / tick, "uniform").pvalue > 1e-3
    fixed = np.arange(2000) / vservo.FRAME_HZ
    assert kstest(np.round((fixed % tick) / tick, 9) % 1.0, "uniform").pvalue < 1e-6  # the old way: one phase


def test_bench_vservo_refuses_a_bad_window(capsys) -> None:
    assert vservo.run(["--seconds", "0.1"]) == 2
    assert "--seconds" in capsys.readouterr().err
    assert vservo.run(["--rounds", "0"]) == 2
    assert vservo.run(["--realtime", "100"]) == 2 and "--realtime" in capsys.readouterr().err
