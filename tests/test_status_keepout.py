"""The nearest keep-out pair and the limiting constraint where an operator looks, through a real service:
the `status` op's reply (and so the client library's `status()`), `twistrate status`'s text and the
`twistrate watch` panel.

The distances are checked outside the service's own pass: forward kinematics at the status reply's
joint position and the exact kernels over every pair (`KeepOut.all_contacts`, checked against coal in
tests/test_distance.py). The stop at the table is the velocity damper's (Faverjon & Tournassoud 1987,
ICRA; the form of Kanoun, Lamiraux & Wieber 2011, IEEE T-RO 27(4)), as in tests/test_e2e_keepout.py.
"""

from __future__ import annotations

import contextlib
import time

import numpy as np
import pytest
from service_harness import make_config, running_service, stream_until

from twistrate.service import wire
from twistrate.service.commands.status import format_status
from twistrate.solver.keepout import KeepOut
from twistrate.solver.kinematics import forward
from twistrate.solver.zones import parse_keepout

pytestmark = pytest.mark.timeout(120)

#: the table of tests/test_e2e_keepout.py: in front of reach7, the tool at home just beyond d_i
KEEPOUT = {"influence_m": 0.12, "security_m": 0.03, "gain_m_s": 0.3, "self_collision": False,
           "zone": [{"name": "table", "kind": "box", "center_m": [0.6, 0.0, 0.2],
                     "size_m": [0.4, 0.8, 0.3]}]}
AT_REST_SCALE = 0.02
AT_REST_COMMANDS = 40
#: how far the arm may move toward the table between the health report the status quotes and the
#: status reply's joint position while it rests against the damper (scale < AT_REST_SCALE), m
AT_REST_DRIFT_M = 2e-4


def _oracle(arm, q):
    """(distance m, link, other, zone) of the nearest pair at q, over every pair, exactly."""
    watch = KeepOut(arm, parse_keepout(KEEPOUT))
    d = watch.all_contacts(forward(arm, np.asarray(q, dtype=float))).distance
    i = int(np.argmin(d))
    link, other, zone = watch.pair_links[i]
    return float(d[i]), link, other, zone


def _healths(link, count, limit_s=5.0):
    got = []
    end = time.monotonic() + limit_s
    while len(got) < count and time.monotonic() < end:
        with contextlib.suppress(TimeoutError):
            m = link.receive(timeout_s=0.05)
            if isinstance(m, wire.HealthMessage):
                got.append(m)
    assert len(got) == count, "too few health messages"
    return got


def test_status_reply_names_the_nearest_pair_and_what_limits_the_scale():
    cfg = make_config(simulation={"lag_s": 0.0}, keepout=KEEPOUT)
    with run_and_link(cfg) as (run, link):
        arm = run.service.arm
        _healths(link, 3)  # health reports have been made at rest (disabled)
        status = link.status()
        d, name, other, zone = _oracle(arm, status["position"])
        ko = status["keepout"]
        assert ko["nearest_m"] == pytest.approx(d, abs=1e-9)  # at rest: the same joint state
        assert (ko["link"], ko["other"], ko["other_kind"]) == (name, other, "zone" if zone else "link")
        assert ko["other"] == "table" and d > KEEPOUT["influence_m"]
        assert status["limiting"] == {"by": "none", "joint": None, "bound": None, "link": None, "other": None}
        text = "\n".join(format_status(status, link.counters()))
        assert f"keep-out nearest {d:.4f} m: {name} to table (zone); scale limited by none" in text

        link.claim("test", lease_ms=60000)
        link.enable()

        def at_rest(cs):
            a = [c for c in cs if c.answers >= 0 and c.mode == "running"]
            return len(a) > AT_REST_COMMANDS and all(c.scale < AT_REST_SCALE for c in a[-AT_REST_COMMANDS:])

        stream_until(link, [0.0, 0.0, -0.1], [0.0, 0.0, 0.0], at_rest, limit_s=30.0)
        link.send_twist([0.0, 0.0, -0.1], [0.0, 0.0, 0.0])  # still running when the status is asked
        status = link.status()
        assert status["mode"] == "running"
        lim, ko = status["limiting"], status["keepout"]
        assert lim["by"] == "keepout" and lim["joint"] is None and lim["bound"] is None
        assert lim["other"] == "table" and lim["link"] == ko["link"]
        d, name, other, _ = _oracle(arm, status["position"])
        assert (ko["link"], ko["other"]) == (name, other)
        assert ko["nearest_m"] == pytest.approx(d, abs=AT_REST_DRIFT_M)
        assert abs(d - KEEPOUT["security_m"]) < 0.005  # resting at d_s, as the damper brings it
        text = "\n".join(format_status(status, link.counters()))
        assert f"scale limited by keep-out {name} to table" in text


def test_status_without_keepout_has_no_pair_and_names_a_joint_bound():
    # a joint pushed against its velocity bound: a twist far beyond what the rates allow (scale < 1)
    cfg = make_config(simulation={"lag_s": 0.0})
    with run_and_link(cfg) as (_, link):
        status = link.status()
        assert status["keepout"] is None and status["limiting"]["by"] == "none"
        assert "keep-out none configured; scale limited by none" in "\n".join(
            format_status(status, link.counters()))
        link.claim("test", lease_ms=60000)
        link.enable()

        def scaled(cs):
            return sum(c.answers >= 0 and c.mode == "running" and c.scale < 1.0 for c in cs) > 20

        stream_until(link, [0.0, 0.0, 0.0], [0.0, 0.0, 20.0], scaled)
        for _ in range(5):  # on a loaded machine the twist may have gone stale before the status is read
            link.send_twist([0.0, 0.0, 0.0], [0.0, 0.0, 20.0])
            status = link.status()
            if status["mode"] == "running":
                break
        assert status["mode"] == "running", status
        lim = status["limiting"]
        assert status["keepout"] is None
        assert lim["by"] == "joint" and 0 <= lim["joint"] < status["n"], status
        assert lim["bound"] in ("position", "velocity", "acceleration") and lim["link"] is None


def test_watch_panel_shows_the_pair_from_a_real_services_health_at_80_columns():
    pytest.importorskip("rich")
    from twistrate.clients.watch.model import Fleet
    from twistrate.clients.watch.terminal import WIDTH, render_text

    cfg = make_config(simulation={"lag_s": 0.0}, keepout=KEEPOUT)
    with run_and_link(cfg) as (run, link):
        fleet = Fleet()
        view = fleet.arm("cell")
        view.set_arm(link.arm())
        h = _healths(link, 2)[-1]
        fleet.feed("cell", "health", h, 1.0)
        d, name, _, _ = _oracle(run.service.arm, link.status()["position"])
    assert view.latest["keepout"]["nearest_m"] == pytest.approx(d, abs=1e-9)  # disabled: at rest
    lines = render_text(fleet, 1.0).splitlines()
    assert max(len(line) for line in lines) <= WIDTH
    row = [line for line in lines if "keep-out" in line]
    assert len(row) == 1 and f"keep-out {d:.3f} m {name} to table   limit none" in row[0], row


@contextlib.contextmanager
def run_and_link(cfg):
    with running_service(cfg) as run:
        yield run, run.link()
