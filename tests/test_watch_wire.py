"""The watch feed against a running service and its simulated arm, over the wire: the model learns the
arm (the `arm` op) and the lease holder (`status`), follows a drive towards a singularity (the health
state reaches pinched; a stretched arm's translational Jacobian loses rank at the workspace boundary,
Yoshikawa 1985), shows the service gone when it stops and back, restarted, when it starts again."""

from __future__ import annotations

import time

import pytest

pytest.importorskip("aiohttp")

from dashboard_harness import served
from service_harness import make_config, running_service, wait_for

from twistrate.clients.watch.dashboard import Dashboard
from twistrate.clients.watch.model import Fleet
from twistrate.clients.watch.wire_feed import WireFeed

pytestmark = pytest.mark.timeout(120)

#: a tool twist straight out along base x: the arm stretches towards its boundary singularity, m/s
STRETCH = ([0.3, 0.0, 0.0], [0.0, 0.0, 0.0])


def drive_until(link, twist, predicate, limit_s: float = 10.0) -> None:
    end = time.monotonic() + limit_s
    while time.monotonic() < end:
        link.send_twist(*twist)
        if predicate():
            return
        time.sleep(0.01)
    raise AssertionError(f"not reached within {limit_s} s")


def config_on(ep):
    """A service configuration on the given (already bound once) endpoints: a restart on the same ports."""
    return make_config(endpoints={"intake": ep.intake, "output": ep.output, "control": ep.control})


def test_feed_follows_a_service_through_a_singularity_a_stop_and_a_restart():
    fleet = Fleet(gone_after_s=1.0)
    with running_service(make_config()) as run:
        feed = WireFeed("cell-a", run.endpoints, thresholds=(0.06, 0.015))
        with served(Dashboard(fleet, [feed])):
            view = fleet.arm("cell-a")
            wait_for(lambda: view.arm == "reach7" and len(view.joints) == 7 and view.health == "clear")
            assert view.mode == "disabled" and view.holder is None
            link = run.link()
            link.claim("wire-test", lease_ms=60_000)
            link.enable()
            drive_until(link, STRETCH, lambda: view.health == "pinched")
            wait_for(lambda: view.holder == "wire-test")
            wait_for(lambda: view.timing.get("p99") is not None)  # the counters op: tick lateness, s
            assert 0.0 <= view.timing["median"] <= view.timing["p99"] <= view.timing["max"]
            changes = [(c["from"], c["to"]) for c in view.changes if c["what"] == "health"]
            assert ("clear", "narrow") in changes and ("narrow", "pinched") in changes
            assert view.latest["sigma_min"] < 0.015 and view.mode == "running"
            assert any(e["event"] == "lease_claimed" for e in view.events)
            # the state messages: the arm's polyline (base, 7 joints, tool) and its ellipsoid, the tool's
            # position the polyline's last point
            wait_for(lambda: view.received["state"] > 10)
            assert len(view.origins) == 7 + 2 and all(len(p) == 3 for p in view.origins)
            assert view.tool["position"] == pytest.approx(view.origins[-1])
            assert len(view.ellipsoid["radii"]) == 3 and len(view.ellipsoid["axes"]) == 9
            assert len(view.position) == 7 and len(view.rate) == 7
    # the same service address: a new dashboard sees the service, then gone when it stops, then back
    cfg = config_on(run.endpoints)
    fleet = Fleet(gone_after_s=1.0)
    with served(Dashboard(fleet, [WireFeed("cell-a", run.endpoints)])):
        view = fleet.arm("cell-a")
        with running_service(cfg):
            wait_for(lambda: view.connected and view.received["health"] > 30)  # 0.6 s: ticks well past 0
        wait_for(lambda: view.gone)
        with running_service(cfg):
            wait_for(lambda: not view.gone and view.restarts == 1 and view.received["health"] > 60)
        assert [e["event"] for e in view.events if e["event"] in ("gone", "back", "restarted")][:3] == [
            "gone",
            "back",
            "restarted",
        ]
