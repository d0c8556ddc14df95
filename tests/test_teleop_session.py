"""The teleop session state machine, alone and behind the core (replayed device streams, keyboard)."""

from __future__ import annotations

import numpy as np
import pytest

from twistrate.clients.teleop.core import TeleopCore, check_buttons
from twistrate.clients.teleop.device import DeviceInfo, Frame
from twistrate.clients.teleop.events import EV_KEY, Gone, RawEvent, ReplaySource, axis_frame
from twistrate.clients.teleop.pipeline import Shaped
from twistrate.clients.teleop.profile import profile_from_dict
from twistrate.clients.teleop.session import Claim, Disable, Enable, Release, Renew, SendTwist, TeleopSession
from twistrate.solver.errors import ConfigError

BTN_0, BTN_1 = 0x100, 0x101
PUCK = DeviceInfo("/dev/input/event7", "six axis puck", "relative", (BTN_0, BTN_1))
PERIOD = 1.0 / 125.0


def _moving(v=(0.05, 0.0, 0.0), w=(0.0, 0.0, 0.0)) -> Shaped:
    return Shaped(np.array(v, float), np.array(w, float), np.ones(6), False)


REST = Shaped(np.zeros(3), np.zeros(3), np.zeros(6), True)


def _frame(held=(), pressed=(), released=()) -> Frame:
    return Frame(0.0, np.zeros(6), frozenset(held), list(pressed), list(released))


def _ready(profile_doc: dict | None = None, keyboard: bool = False) -> TeleopSession:
    """A session that holds the lease and is enabled."""
    s = TeleopSession(profile_from_dict(profile_doc or {}), keyboard=keyboard)
    assert s.start(0.0) == [Claim()]
    s.claimed(True, 0.0, lease_ms=1000)
    s.service_mode("disabled")
    assert s.command("arm", 0.0) == [Enable()]
    s.enabled(True, "holding")
    return s


def _twists(actions) -> list[SendTwist]:
    return [a for a in actions if isinstance(a, SendTwist)]


def test_nothing_moves_before_the_operator_enables() -> None:
    s = TeleopSession(profile_from_dict({}))
    s.start(0.0)
    s.claimed(True, 0.0, lease_ms=1000)
    s.device_frame(_frame(held=[0]), _moving(), 0.0)
    assert _twists(s.tick(0.01)) == []
    assert "disabled (press Enter to enable)" in s.why_not_moving()
    assert s.command("arm", 0.02) == [], "enabling with the controller deflected is refused"
    assert "let go" in s.notice


def test_publishes_every_tick_while_deflected_and_zeros_once_at_rest() -> None:
    s = _ready()
    s.device_frame(_frame(held=[0]), _moving(), 0.0)
    sent = [_twists(s.tick(k * PERIOD)) for k in range(5)]
    assert all(len(t) == 1 and t[0].linear == (0.05, 0.0, 0.0) and t[0].frame == "base" for t in sent)
    s.device_frame(_frame(held=[0]), REST, 0.05)
    zeros = _twists(s.tick(0.05))
    assert len(zeros) == 1 and zeros[0].zero
    assert all(_twists(s.tick(0.05 + k * PERIOD)) == [] for k in range(1, 10)), "zeros go out once"


def test_hold_to_move_button() -> None:
    s = _ready()
    s.device_frame(_frame(held=[]), _moving(), 0.0)
    assert _twists(s.tick(0.0)) == [] and "hold button not held" in s.why_not_moving()
    s.device_frame(_frame(held=[0], pressed=[0]), _moving(), 0.01)
    assert len(_twists(s.tick(0.01))) == 1
    actions = s.device_frame(_frame(held=[], released=[0]), _moving(), 0.012)
    assert _twists(actions) and _twists(actions)[0].zero, "letting go of hold sends zeros at once"
    assert _twists(s.tick(0.02)) == []


def test_hold_to_move_off_explicitly_and_in_keyboard_mode() -> None:
    s = _ready({"motion": {"hold_to_move": False}})
    s.device_frame(_frame(), _moving(), 0.0)
    assert len(_twists(s.tick(0.0))) == 1
    k = _ready(keyboard=True)
    k.shaped_input(_moving())
    assert len(_twists(k.tick(0.0))) == 1


def test_frame_switch_from_a_button_only_while_not_moving() -> None:
    s = _ready()
    s.device_frame(_frame(held=[0], pressed=[0]), REST, 0.0)
    s.device_frame(_frame(held=[0, 1], pressed=[1]), REST, 0.01)
    assert s.frame == "tool" and s.view().frame == "tool"
    s.device_frame(_frame(held=[0]), _moving(w=(0, 0, 0.2)), 0.02)
    twist = _twists(s.tick(0.02))[0]
    assert twist.frame == "tool" and twist.angular == (0.0, 0.0, 0.2)
    s.device_frame(_frame(held=[0, 1], pressed=[1]), _moving(w=(0, 0, 0.2)), 0.03)
    assert s.frame == "tool" and "let go" in s.notice


def test_device_loss_zeros_at_once_and_needs_the_operator_after_return() -> None:
    s = _ready()
    s.device_frame(_frame(held=[0]), _moving(), 0.0)
    s.tick(0.0)
    actions = s.device_lost(0.003)
    assert _twists(actions)[0].zero and any(isinstance(a, Disable) for a in actions)
    assert _twists(s.tick(0.008)) == [] and "controller lost" in s.why_not_moving()
    s.device_back(1.0)
    s.device_frame(_frame(held=[0]), _moving(), 1.01)
    assert _twists(s.tick(1.01)) == [], "never resumes by itself"
    assert s.command("arm", 1.02) == []  # still deflected
    s.device_frame(_frame(held=[0]), REST, 1.03)
    assert s.command("arm", 1.04) == [Enable()]


def test_quit_zeros_disables_and_releases() -> None:
    s = _ready()
    s.device_frame(_frame(held=[0]), _moving(), 0.0)
    s.tick(0.0)
    actions = s.command("quit", 0.005)
    assert _twists(actions)[0].zero
    assert [type(a) for a in actions[1:]] == [Disable, Release]
    assert s.closed and s.tick(0.01) == []


def test_lease_loss_and_fault_and_restart() -> None:
    s = _ready()
    s.device_frame(_frame(held=[0]), _moving(), 0.0)
    s.tick(0.0)
    actions = s.service_event("lease_expired", "disabled", "teleop")
    assert _twists(actions)[0].zero and any(isinstance(a, Disable) for a in actions)
    assert "no lease" in s.why_not_moving()[0]
    assert Claim() in s.tick(0.01), "claims again (claiming does not move anything)"
    s.claimed(False, 0.02, holder="pad")  # refused: another client took it meanwhile
    assert Claim() not in s.tick(0.03) and "no lease (held by pad)" in s.why_not_moving()
    assert Claim() in s.tick(1.03), "and again a second later, not on every tick"
    s.claimed(True, 1.04, lease_ms=1000)
    assert _twists(s.tick(1.05)) == [] and not s.armed

    s = _ready()
    s.device_frame(_frame(held=[0]), _moving(), 0.0)
    s.tick(0.0)
    actions = s.service_event("fault", "fault", "joint 3 beyond its limit")
    assert _twists(actions)[0].zero and any(isinstance(a, Disable) for a in actions)
    assert "fault: joint 3 beyond its limit" in s.why_not_moving()
    s.device_frame(_frame(held=[0]), REST, 0.1)
    assert s.command("arm", 0.1) == [] and "clear the fault" in s.notice

    s = _ready()
    assert s.service_restarted(5.0) == [Claim()]
    s.claimed(True, 5.1, lease_ms=1000)
    s.device_frame(_frame(held=[0]), _moving(), 5.2)
    assert _twists(s.tick(5.2)) == [] and "disabled (press Enter to enable)" in s.why_not_moving()


def test_status_with_another_holder_is_a_lease_loss_and_stale_is_reported() -> None:
    s = _ready()
    s.device_frame(_frame(held=[0]), _moving(), 0.0)
    s.tick(0.0)
    s.service_mode("stopping")
    assert s.why_not_moving() == ["stale (service stopping)"]
    actions = s.service_status({"mode": "disabled", "holder": "other", "fault": None})
    assert _twists(actions)[0].zero and s.why_not_moving()[0] == "no lease (held by other)"


def test_renewal_is_due_every_third_of_the_lease() -> None:
    s = _ready()
    assert not any(isinstance(a, Renew) for a in s.tick(0.3))
    assert any(isinstance(a, Renew) for a in s.tick(0.34))
    assert not any(isinstance(a, Renew) for a in s.tick(0.35)), "one renewal in flight"
    actions = s.renewed(False, 0.4)  # a refused renewal is a lease loss: zeros and disable
    assert _twists(actions)[0].zero and any(isinstance(a, Disable) for a in actions)
    assert not s.lease and not s.armed


def test_reference_point_in_tool_and_base_frames() -> None:
    s = _ready({"motion": {"point": [0.0, 0.0, 0.12]}})
    s.device_frame(_frame(held=[0]), _moving(), 0.0)
    assert _twists(s.tick(0.0)) == [] and any("tool pose" in w for w in s.why_not_moving())
    Rz = np.array([[0, -1, 0], [1, 0, 0], [0, 0, 1]], float)  # 90 deg about z
    Rx = np.array([[1, 0, 0], [0, 0, -1], [0, 1, 0]], float)  # 90 deg about x
    R = Rz @ Rx
    s.tool_pose(R)
    twist = _twists(s.tick(0.01))[0]
    np.testing.assert_allclose(twist.point, R @ [0, 0, 0.12])  # tool-frame offset expressed in base
    s.device_frame(_frame(held=[0]), REST, 0.02)
    s.tick(0.02)
    s.command("frame", 0.03)
    s.device_frame(_frame(held=[0]), _moving(), 0.04)
    assert _twists(s.tick(0.04))[0].point == (0.0, 0.0, 0.12)


def test_speed_lock_and_dominant_commands() -> None:
    s = _ready()
    assert s.scale == 0.25
    s.command("faster", 0.0)
    s.command("faster", 0.0)
    s.command("faster", 0.0)
    assert s.scale == 1.0
    s.command("slower", 0.0)
    assert s.scale == 0.5
    s.command("lock", 0.0)
    assert s.lock == "translation"
    s.command("dominant", 0.0)
    assert s.dominant and s.view().dominant


def _core(items, doc=None) -> TeleopCore:
    profile = profile_from_dict(doc or {"device": {"settle_ms": 0.0}, "filter": {"on": False}})
    core = TeleopCore(profile, ReplaySource(items), PUCK)
    core.start(0.0)
    core.session.claimed(True, 0.0, lease_ms=60000)
    core.session.service_mode("disabled")
    return core


def _run(core: TeleopCore, until: float, t0: float = 0.0) -> list[tuple[float, object]]:
    """Drive the core as the command does: poll and tick at the publish rate."""
    out = []
    for k in range(round((until - t0) / PERIOD)):
        now = t0 + k * PERIOD
        for action in core.poll(now) + core.tick(now):
            out.append((now, action))
    return out


def _held_report(t: float, counts) -> list[RawEvent]:
    return axis_frame(t, counts)


def test_replayed_stream_through_the_core_moves_along_the_deflected_axis() -> None:
    items = [RawEvent(0.0, EV_KEY, BTN_0, 1)]
    for k in range(40):  # a puck pushed along device X at 2/3 of full scale for 0.32 s, reporting at 125 Hz
        items += _held_report(0.1 + k * PERIOD, [233, 0, 0, 0, 0, 0])
    core = _core(items)
    _run(core, 0.05)
    core.session.command("arm", 0.05)
    core.session.enabled(True, "holding")
    out = _run(core, 1.0, 0.05)
    twists = [a for _, a in out if isinstance(a, SendTwist)]
    moving = [t for t in twists if not t.zero]
    assert len(moving) >= 35
    u = (233 / 350 - 0.1) / 0.9  # deadband, then curve k = 0.5, scale 0.25, linear_max 0.1
    expected = (0.5 * u + 0.5 * u**3) * 0.1 * 0.25
    assert moving[-1].linear[0] == pytest.approx(expected) and moving[-1].linear[1:] == (0.0, 0.0)
    assert twists[-1].zero and sum(t.zero for t in twists) == 1, "at rest after the idle timeout, zeros once"


def test_device_loss_gives_zero_within_one_publish_period() -> None:
    t_gone = 0.3013
    items = [RawEvent(0.0, EV_KEY, BTN_0, 1)]
    items += [e for k in range(60) for e in _held_report(0.1 + k * PERIOD, [300, 0, 0, 0, 0, 0])
              if e.t_s < t_gone]
    items.append(Gone(t_gone))
    core = _core(items)
    _run(core, 0.05)
    core.session.command("arm", 0.05)
    core.session.enabled(True, "holding")
    out = _run(core, 0.6, 0.05)
    zeros = [(t, a) for t, a in out if isinstance(a, SendTwist) and a.zero]
    assert zeros and t_gone <= zeros[0][0] <= t_gone + PERIOD
    assert any(isinstance(a, Disable) for _, a in out)
    assert not any(isinstance(a, SendTwist) and not a.zero for t, a in out if t > t_gone)


def test_settling_captures_the_rest_offset_before_deflections_count() -> None:
    info = DeviceInfo("/dev/input/event8", "knob", "absolute", (BTN_0,), {c: (-500, 500) for c in range(6)})
    from twistrate.clients.teleop.events import EV_ABS

    items = axis_frame(0.0, [40, 0, 0, 0, 0, 0], EV_ABS)  # a controller resting off-centre
    profile = profile_from_dict({"device": {"full_scale": 0.0, "settle_ms": 100.0},
                                 "buttons": {"frame": None}})
    core = TeleopCore(profile, ReplaySource(items), info)
    core.start(0.0)
    _run(core, 0.2)
    np.testing.assert_allclose(core.pipeline.rest, [40, 0, 0, 0, 0, 0])
    assert core.session.shaped.rest


def test_keyboard_mode_core() -> None:
    core = TeleopCore(profile_from_dict({"filter": {"on": False}}))
    core.start(0.0)
    core.session.claimed(True, 0.0, lease_ms=60000)
    core.key("\r", 0.0)
    core.session.enabled(True, "holding")
    core.key("r", 0.01)
    out = _run(core, 0.3, 0.01)
    moving = [a for _, a in out if isinstance(a, SendTwist) and not a.zero]
    assert moving and moving[0].linear == (0.0, 0.0, 0.025)  # +z at full deflection, scale 0.25
    out = _run(core, 1.5, 0.3)
    assert [a for _, a in out if isinstance(a, SendTwist)][-1].zero


def test_check_buttons() -> None:
    one = DeviceInfo("/dev/input/event9", "one-button knob", "relative", (BTN_0,))
    notes = check_buttons(profile_from_dict({}), one)
    assert notes and "buttons.frame = 1" in notes[0]
    none = DeviceInfo("/dev/input/event9", "bare knob", "relative", ())
    with pytest.raises(ConfigError, match=r"buttons.hold.*hold_to_move = false"):
        check_buttons(profile_from_dict({}), none)
    assert check_buttons(profile_from_dict({"motion": {"hold_to_move": False}, "buttons": {"frame": None}}),
                         none) == []
