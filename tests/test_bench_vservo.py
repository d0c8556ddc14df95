"""`twistrate bench vservo` runs end to end and writes every figure (no timing assertion: figures are
measured by the benchmark itself, on a quiet machine)."""

from __future__ import annotations

import json
from pathlib import Path

from twistrate.service.bench import vservo


def test_bench_vservo_smoke_run_writes_every_figure(tmp_path: Path, capsys) -> None:
    out = tmp_path / "vservo.json"
    assert vservo.run(["--seconds", "1.5", "--json", str(out)]) == 0
    doc = json.loads(out.read_text())
    assert doc["frames"] >= 20  # 1.5 s at 20 frames per second, less a few at the edges
    for key in ("sent_to_published", "sent_to_received"):
        assert doc[key]["count"] >= doc["frames"] - doc["unanswered"] - 1
        assert 0.0 < doc[key]["median_ms"] <= doc[key]["p99_ms"] <= doc[key]["max_ms"]
    assert doc["target_p99_ms"] == 1000.0 / doc["rate_hz"] + vservo.TARGET_EXTRA_MS
    assert "features sent -> command published" in capsys.readouterr().out


def test_bench_vservo_refuses_a_bad_window(capsys) -> None:
    assert vservo.run(["--seconds", "0.1"]) == 2
    assert "--seconds" in capsys.readouterr().err
