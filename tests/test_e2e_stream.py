"""End to end over real sockets: twists in, commands out that equal the solver's rates at the same q;
enable/disable; run-time parameter changes; health and events on the output."""

from __future__ import annotations

import contextlib
import itertools
import time

import numpy as np
import pytest
from service_harness import LOOP_LIMIT_S, collect_commands, make_config, running_service, stream_until

from twistrate.service import wire
from twistrate.solver.errors import ControlError
from twistrate.solver.health import assess
from twistrate.solver.kinematics import forward, geometric_jacobian
from twistrate.solver.resolve import DesiredTwist, resolve

pytestmark = pytest.mark.timeout(90)

V = [0.03, -0.02, 0.01]
W = [0.0, 0.0, 0.1]


def test_commands_match_the_solver_at_the_same_q():
    cfg = make_config(simulation={"lag_s": 0.0})
    with running_service(cfg) as run:
        link = run.link()
        link.claim("test")
        assert link.enable() == "holding"  # enabled, no fresh twist yet: at rest

        def enough(cs):
            return sum(1 for c in cs if c.answers >= 0) >= 60

        commands = stream_until(link, V, W, enough)
        svc = run.service
        arm, options, period = svc.arm, svc.pipeline.options, svc.period_s
        twist = DesiredTwist(np.array(V), np.array(W))
        checked = 0
        for prev, cur in itertools.pairwise(commands):
            if cur.tick != prev.tick + 1 or cur.answers < 0 or prev.answers < 0:
                continue
            # The command says q implicitly: target = q + rate * T (docs/protocol.md 7.3).
            q = cur.target - cur.rate * period
            ref = resolve(arm, q, prev.rate, twist, period, options)
            np.testing.assert_allclose(cur.rate, ref.qd, atol=1e-9, rtol=1e-7)
            assert cur.scale == pytest.approx(ref.scale, abs=1e-9)
            assert cur.mode == "running"
            checked += 1
        assert checked >= 20


def test_disabled_at_start_then_enable_then_disable_stops():
    cfg = make_config()
    with running_service(cfg) as run:
        link = run.link()
        link.claim("test")
        # twists from the holder before enable are not followed
        cs = stream_until(link, V, W, lambda cs: len(cs) >= 30)
        assert all(c.mode == "disabled" and c.answers == -1 and not c.rate.any() for c in cs)
        link.enable()
        stream_until(link, V, W, lambda cs: any(c.mode == "running" and c.answers >= 0 for c in cs))
        assert link.status()["mode"] == "running"
        assert link.disable() == "disabled"
        link.drain()
        cs = collect_commands(link, lambda cs: bool(cs) and not cs[-1].rate.any())
        assert all(c.answers == -1 and c.mode == "disabled" for c in cs)


def test_run_time_parameters_apply_and_are_all_or_nothing():
    cfg = make_config()
    with running_service(cfg) as run:
        link = run.link()
        link.claim("test")
        link.enable()
        fast = [0.4, 0.0, 0.0]
        params = link.set(linear_max=0.05)
        assert params["linear_max"] == 0.05
        cs = stream_until(link, fast, [0, 0, 0], lambda cs: sum(c.answers >= 0 for c in cs) > 50)
        # the speed cap scales the desired twist: the service's own record of it
        assert run.service.snapshot.cap == pytest.approx(0.05 / 0.4)
        desired = run.service.snapshot.twist_desired
        assert desired is not None
        assert np.linalg.norm(desired[:3]) == pytest.approx(0.05, rel=1e-9)
        # reduced-speed mode caps the tool point at reduced_linear_max (ISO 10218-1:2011, 5.6: 250 mm/s)
        link.set(linear_max=1.0, reduced_speed=True)
        # wait until the service reports the new cap (0.125 before; the snapshot comes at the health rate)
        stream_until(link, fast, [0, 0, 0], lambda cs: run.service.snapshot.cap > 0.2)
        assert run.service.snapshot.cap == pytest.approx(0.25 / 0.4)
        assert link.status()["reduced_speed"] is True
        # a refused parameter changes nothing
        before = link.set(release_margin=0.2)
        with pytest.raises(ControlError) as err:
            link.set(damping_max=0.01, linear_max=99.0)
        assert err.value.code == "bad_argument" and "linear_max" in str(err.value)
        with pytest.raises(ControlError) as err:
            link.set(no_such_parameter=1.0)
        assert err.value.code == "bad_argument"
        assert link.set(release_margin=0.2) == before
        counters = link.counters()
        assert counters["control_refused_bad_argument"] == 2
        del cs


def test_health_and_events_are_published():
    cfg = make_config()
    with running_service(cfg) as run:
        link = run.link(topics=wire.OUTPUT_TOPICS)
        link.claim("test")
        event = link.receive_event()
        assert event.event == "lease_claimed" and event.mode == "disabled" and "test" in event.detail
        health = link.receive_health()
        assert health.mode == "disabled"
        assert health.singular_values.shape == (6,)
        assert 0.0 < health.inverse_condition <= 1.0
        margin = health.limit_margin
        assert margin.shape == (7,) and np.all((margin > 0) & (margin <= 0.5))
        link.enable()
        names = []
        while "enabled" not in names:
            names.append(link.receive_event().event)
        assert link.receive_event().event == "mode"  # disabled -> holding


def _health_with_q(link, period, count, running):
    """count (health message, q) pairs, q the joint state of the health message's tick, rebuilt from that
    tick's command: target - rate T (docs/protocol.md 7.3). running: only ticks in mode running."""
    commands, healths, pairs = {}, [], []
    end = time.monotonic() + LOOP_LIMIT_S
    while len(pairs) < count:
        assert time.monotonic() < end, f"only {len(pairs)} health messages matched a command"
        if running:
            link.send_twist(V, W)
        with contextlib.suppress(TimeoutError):
            msg = link.receive(timeout_s=0.01)
            if isinstance(msg, wire.CommandMessage):
                commands[msg.tick] = msg
            elif not running or msg.mode == "running":
                healths.append(msg)
        for h in [h for h in healths if h.tick in commands]:
            healths.remove(h)
            c = commands[h.tick]
            pairs.append((h, c.target - c.rate * period))
    return pairs


def test_health_margins_and_weakest_direction_are_what_solver_health_gives():
    # The health message carries twistrate.solver.health's limit margins (fractions of each joint's range)
    # and weakest direction (m/s and rad/s parts, same normalisation) unchanged (docs/protocol.md 7.4),
    # at rest (measures from the Jacobian) and running (from the tick's resolution).
    cfg = make_config(simulation={"lag_s": 0.0})
    with running_service(cfg) as run:
        link = run.link(topics=(wire.TOPIC_COMMAND, wire.TOPIC_HEALTH))
        arm = run.service.arm
        options = cfg.solver_options(arm)
        period = 1.0 / cfg.tick.rate_hz
        L = options.characteristic_length
        link.claim("test")
        at_rest = _health_with_q(link, period, 2, running=False)
        link.enable()
        moving = _health_with_q(link, period, 4, running=True)
        assert len({h.tick for h, _ in moving}) == 4
        for h, q in at_rest + moving:
            ref = assess(arm, q, geometric_jacobian(arm, forward(arm, q)), options)
            np.testing.assert_allclose(h.limit_margin, ref.limit_margin, rtol=0, atol=1e-9)
            np.testing.assert_allclose(h.weakest_linear, ref.weakest_linear, rtol=0, atol=1e-9)
            np.testing.assert_allclose(h.weakest_angular, ref.weakest_angular, rtol=0, atol=1e-9)
            np.testing.assert_allclose(h.singular_values, ref.singular_values, rtol=1e-9, atol=1e-12)
            # the documented normalisation: a unit weighted twist, |v|^2 + L^2 |w|^2 = 1
            assert np.sum(h.weakest_linear**2) + L**2 * np.sum(h.weakest_angular**2) == pytest.approx(1.0)
            # and the documented margin definition, per joint (fraction of the range to the nearer limit)
            frac = np.minimum(q - arm.q_min, arm.q_max - q) / (arm.q_max - arm.q_min)
            np.testing.assert_allclose(h.limit_margin, frac, rtol=0, atol=1e-9)
            assert np.all(h.limit_margin <= 0.5)


def test_health_state_follows_its_thresholds_with_its_release_margin_and_reports_changes():
    # Thresholds moved above the arm's smallest singular value at rest: the state escalates at once and
    # comes back one level at a time, each change an event (docs/protocol.md section 10).
    cfg = make_config()
    with running_service(cfg) as run:
        link = run.link(topics=(wire.TOPIC_EVENT, wire.TOPIC_HEALTH))
        link.claim("test")
        sigma = float(link.receive_health().singular_values[-1])
        link.set(narrow_below_m=min(1.0, 4 * sigma), pinched_below_m=2 * sigma)
        event = link.receive_event()
        while event.event != "health":
            event = link.receive_event()
        assert event.detail.startswith("clear -> pinched")
        assert link.receive_health().state == "pinched"
        link.set(narrow_below_m=min(1.0, 4 * sigma), pinched_below_m=0.5 * sigma)
        event = link.receive_event()
        while event.event != "health":
            event = link.receive_event()
        assert event.detail.startswith("pinched -> narrow")
        link.set(narrow_below_m=0.5 * sigma, pinched_below_m=0.25 * sigma)
        event = link.receive_event()
        while event.event != "health":
            event = link.receive_event()
        assert event.detail.startswith("narrow -> clear")
