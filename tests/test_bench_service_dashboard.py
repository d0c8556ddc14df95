"""`twistrate bench service --with-dashboard`, very briefly: each rate runs without and then with the
dashboard attached (the dashboard process watching the service under test and invented arms, pages
taking its frames), and the JSON holds both runs and the dashboard's own figures. No timed assertions:
the figures are printed for people; this checks they are there and belong to the runs they claim."""

from __future__ import annotations

import json
import os

import pytest

pytest.importorskip("aiohttp")

from twistrate.clients.watch.priority import DEFAULT_NICE
from twistrate.service.bench.service import run
from twistrate.service.bench.service_dashboard import ARMS, HEALTH_HZ, PAGES

pytestmark = pytest.mark.timeout(600)


def test_both_runs_and_the_dashboard_figures_are_in_the_json(tmp_path, capsys):
    out = tmp_path / "pair.json"
    assert run(["--with-dashboard", "--dashboard-detached", "--seconds", "1", "--rates", "500", "--json",
                str(out)]) == 0
    doc = json.loads(out.read_text())
    assert doc["with_dashboard"] is True
    assert doc["load"] == {"arms": ARMS, "health_hz": HEALTH_HZ, "pages": PAGES}
    pair = doc["rates"]["500"]
    assert set(pair) == {"rate_hz", "without", "detached", "with"}
    for key in ("without", "detached", "with"):
        r = pair[key]
        assert r["rate_hz"] == 500.0 and r["seconds"] == 1.0 and r["ticks"] > 0
        for figure in ("lateness_p99_us", "overrun_fraction", "arrival_to_publish_p99_us", "cpu_fraction"):
            assert isinstance(r[figure], float), (key, figure)
        assert "floor" in r
    assert "dashboard" not in pair["without"]
    dash = pair["with"]["dashboard"]
    assert dash is not None, pair["with"].get("dashboard_error")
    assert dash["arms"] == ARMS and dash["pages"] == PAGES
    assert len(dash["frames_per_s_per_page"]) == PAGES and min(dash["frames_per_s_per_page"]) > 0
    assert len(dash["published_health_per_s_per_arm"]) == ARMS - 1  # the service under test is the 8th
    assert 0.0 < dash["dashboard_cpu_fraction"] < 2.0
    # every arm watched, the service under test included, reached the pages during the window
    assert len(dash["health_per_s_per_arm"]) == ARMS and min(dash["health_per_s_per_arm"]) > 0
    # it ran at its default niceness above ours (nice(2): the dashboard lowered its own priority)
    assert dash["dashboard_nice"] == min(19, os.nice(0) + DEFAULT_NICE)
    # detached: the same load, but nothing of the service under test reached the pages (7 arms had rows)
    apart = pair["detached"]["dashboard"]
    assert apart is not None and len(apart["health_per_s_per_arm"]) == ARMS - 1
    text = capsys.readouterr().out
    assert "without" in text and "with" in text and "detached" in text and "dashboard CPU" in text
    assert "tick thread" in text and "main (control) thread" in text
    for label in ("tick lateness p99", "overruns", "arrival -> publish p99", "service CPU"):
        assert label in text
