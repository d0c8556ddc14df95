"""The device stage (latching), evdev capability parsing, device picking, the permission message,
loss and return through a stand-in evdev module, and a virtual uinput device where the machine has one."""

from __future__ import annotations

import errno
import os
import time
from collections import namedtuple
from types import SimpleNamespace
from typing import ClassVar

import numpy as np
import pytest

from twistrate.clients.teleop import evdev_source
from twistrate.clients.teleop.device import DeviceInfo, DeviceStage, button_codes, six_axis_kind
from twistrate.clients.teleop.events import (
    EV_ABS,
    EV_KEY,
    EV_REL,
    EV_SYN,
    SYN_DROPPED,
    SYN_REPORT,
    Back,
    Gone,
    RawEvent,
    ReplaySource,
    axis_frame,
)
from twistrate.solver.errors import ConfigError

BTN_0, BTN_1 = 0x100, 0x101  # linux/input-event-codes.h
KEY_A = 30
REL_INFO = DeviceInfo("/dev/input/event7", "six axis puck", "relative", (BTN_0, BTN_1))
ABS_INFO = DeviceInfo("/dev/input/event8", "six axis knob", "absolute", (BTN_0,),
                      {c: (-500, 500) for c in range(6)})
AbsInfo = namedtuple("AbsInfo", "value min max fuzz flat resolution")  # evdev's field order


def test_six_axis_kind_from_capabilities() -> None:
    assert six_axis_kind({EV_REL: [0, 1, 2, 3, 4, 5, 8]}) == "relative"
    assert six_axis_kind({EV_ABS: [(c, AbsInfo(0, -350, 350, 0, 0, 0)) for c in range(6)]}) == "absolute"
    assert six_axis_kind({EV_REL: [0, 1, 8]}) is None  # an ordinary mouse: X, Y and the wheel
    assert six_axis_kind({EV_ABS: [0, 1, 2, 3, 4]}) is None
    assert button_codes({EV_KEY: [KEY_A, BTN_1, BTN_0]}) == (BTN_0, BTN_1)


def test_info_from_capabilities_reads_absolute_ranges() -> None:
    caps = {EV_ABS: [(c, AbsInfo(0, -350, 350, 0, 0, 0)) for c in range(6)], EV_KEY: [BTN_0]}
    info = evdev_source.info_from_capabilities("/dev/input/event3", "knob", caps)
    assert info is not None and info.kind == "absolute"
    assert info.abs_range == {c: (-350, 350) for c in range(6)}
    assert info.buttons == (BTN_0,)
    assert evdev_source.info_from_capabilities("/dev/input/event4", "mouse", {EV_REL: [0, 1]}) is None


def test_absolute_axes_latch_until_they_change() -> None:
    stage = DeviceStage(ABS_INFO)
    frame = None
    for ev in axis_frame(0.0, [100, 0, 0, 0, 0, -50], EV_ABS):
        frame = stage.feed(ev) or frame
    assert frame is not None
    np.testing.assert_array_equal(frame.raw, [100, 0, 0, 0, 0, -50])
    # the kernel sends only the axis that changed; the others hold, and nothing expires
    stage.feed(RawEvent(0.5, EV_ABS, 1, 20))
    frame = stage.feed(RawEvent(0.5, EV_SYN, SYN_REPORT, 0))
    np.testing.assert_array_equal(frame.raw, [100, 20, 0, 0, 0, -50])
    assert stage.expire(10.0) is None


def test_relative_axes_expire_per_axis_after_the_idle_time() -> None:
    stage = DeviceStage(REL_INFO, idle_s=0.06)
    # translation and rotation in separate reports must not zero each other
    for ev in axis_frame(0.000, [200, 0, 0, 0, 0, 0]):
        stage.feed(ev)
    for ev in [*axis_frame(0.004, [0, 0, 0, 0, 0, 0]), RawEvent(0.004, EV_REL, 5, 90)]:
        stage.feed(ev)
    frame = stage.feed(RawEvent(0.004, EV_SYN, SYN_REPORT, 0))
    np.testing.assert_array_equal(frame.raw, [200, 0, 0, 0, 0, 90])
    assert stage.expire(0.05) is None
    for ev in axis_frame(0.05, [210, 0, 0, 0, 0, 0]):  # X keeps reporting, RZ went quiet (zero dropped)
        stage.feed(ev)
    frame = stage.expire(0.07)
    np.testing.assert_array_equal(frame.raw, [210, 0, 0, 0, 0, 0])
    frame = stage.expire(0.2)
    np.testing.assert_array_equal(frame.raw, np.zeros(6))


def test_buttons_edges_and_dropped_events_and_loss() -> None:
    stage = DeviceStage(REL_INFO)
    stage.feed(RawEvent(0.0, EV_KEY, BTN_1, 1))
    stage.feed(RawEvent(0.0, EV_KEY, KEY_A, 1))  # not one of the device's buttons: ignored
    stage.feed(RawEvent(0.0, EV_REL, 0, 300))
    frame = stage.feed(RawEvent(0.0, EV_SYN, SYN_REPORT, 0))
    assert frame.held == {1} and frame.pressed == [1] and frame.released == []
    stage.feed(RawEvent(0.01, EV_KEY, BTN_1, 2))  # auto-repeat value 2 is not a new press
    frame = stage.feed(RawEvent(0.01, EV_SYN, SYN_REPORT, 0))
    assert frame.pressed == [] and frame.held == {1}
    stage.feed(RawEvent(0.02, EV_SYN, SYN_DROPPED, 0))  # the latch can no longer be trusted
    frame = stage.feed(RawEvent(0.02, EV_SYN, SYN_REPORT, 0))
    assert not frame.raw.any() and frame.held == set() and frame.released == [1]
    stage.feed(RawEvent(0.03, EV_KEY, BTN_0, 1))
    stage.feed(RawEvent(0.03, EV_REL, 2, -100))
    stage.feed(RawEvent(0.03, EV_SYN, SYN_REPORT, 0))
    frame = stage.lose(0.04)
    assert not frame.raw.any() and frame.held == set() and frame.released == [0]


def test_replay_source_hands_out_items_when_due() -> None:
    items = [*axis_frame(0.0, [1, 0, 0, 0, 0, 0]), Gone(0.5), Back(1.0)]
    src = ReplaySource(items)
    assert len(src.read(0.0)) == 2
    assert src.read(0.4) == []
    assert src.read(2.0) == [Gone(0.5), Back(1.0)] and src.finished


def test_pick_by_path_name_or_first() -> None:
    devices = [REL_INFO, ABS_INFO]
    assert evdev_source.pick(devices, "") is REL_INFO
    assert evdev_source.pick(devices, "/dev/input/event8") is ABS_INFO
    assert evdev_source.pick(devices, "KNOB") is ABS_INFO
    assert evdev_source.pick(devices, "/dev/input/event9") is None
    lines = evdev_source.describe(devices, [])
    assert "six axis puck" in lines[0] and "relative axes, 2 buttons" in lines[0]


def test_permission_message_names_the_group_and_both_fixes(tmp_path) -> None:
    path = tmp_path / "event5"
    path.write_bytes(b"")
    message = evdev_source.explain_permission(str(path))
    import grp
    group = grp.getgrgid(os.stat(path).st_gid).gr_name
    assert f"group '{group}'" in message and f"usermod -aG {group}" in message
    assert "udev rule" in message and "permission denied" in message


class _FakeDevice:
    """Stands in for evdev.InputDevice: events to read, then ENODEV (unplugged)."""

    registry: ClassVar[dict[str, list]] = {}

    def __init__(self, path: str) -> None:
        if path not in self.registry:
            raise OSError(errno.ENOENT, "No such file or directory")
        self.path, self.name, self.fd = path, "six axis puck", 99
        self._queue = self.registry[path]

    def capabilities(self, absinfo: bool = True) -> dict:
        return {EV_REL: [0, 1, 2, 3, 4, 5], EV_KEY: [BTN_0, BTN_1]}

    def read(self):
        if not self._queue:
            raise BlockingIOError
        item = self._queue.pop(0)
        if isinstance(item, OSError):
            raise item
        return [item]

    def active_keys(self) -> list[int]:
        return [BTN_0]

    def close(self) -> None:
        pass


def test_evdev_source_reports_loss_and_return(monkeypatch) -> None:
    ev = SimpleNamespace(type=EV_REL, code=0, value=120)
    _FakeDevice.registry = {"/dev/input/event7": [ev, OSError(errno.ENODEV, "No such device")]}
    fake = SimpleNamespace(InputDevice=_FakeDevice)
    monkeypatch.setattr(evdev_source, "require_evdev", lambda: fake)
    monkeypatch.setattr(evdev_source.glob, "glob", lambda pattern: list(_FakeDevice.registry))
    src = evdev_source.EvdevSource(REL_INFO)
    assert src.read(1.0) == [RawEvent(1.0, EV_REL, 0, 120)]
    items = src.read(1.1)
    assert len(items) == 1 and isinstance(items[0], Gone) and "No such device" in items[0].reason
    _FakeDevice.registry = {}
    assert src.read(1.2) == [] and src.fileno() is None
    _FakeDevice.registry = {"/dev/input/event9": []}  # back under another node
    assert src.read(1.3) == []  # not before the retry interval
    items = src.read(1.1 + evdev_source.RETRY_S + 0.01)
    assert isinstance(items[0], Back) and src.path == "/dev/input/event9"
    assert RawEvent(items[0].t_s, EV_KEY, BTN_0, 1) in items  # held buttons re-read on return


def test_open_device_explains_denied_devices(monkeypatch) -> None:
    def denied(path: str):
        raise PermissionError(errno.EACCES, "Permission denied")

    monkeypatch.setattr(evdev_source, "require_evdev", lambda: SimpleNamespace(InputDevice=denied))
    monkeypatch.setattr(evdev_source.glob, "glob", lambda pattern: ["/dev/input/event3"])
    with pytest.raises(ConfigError, match=r"permission denied.*udev rule"):
        evdev_source.open_device("")


@pytest.mark.skipif(not os.path.exists("/dev/uinput"),
                    reason="no /dev/uinput on this machine: a virtual input device cannot be made")
def test_virtual_uinput_device_goes_through_the_same_path() -> None:
    evdev = pytest.importorskip("evdev", reason="python-evdev (the teleop extra) is not installed")
    caps = {EV_REL: list(range(6)), EV_KEY: [BTN_0, BTN_1]}
    try:
        ui = evdev.UInput(caps, name="twistrate test puck")
    except (OSError, evdev.UInputError) as exc:
        pytest.skip(f"/dev/uinput exists but cannot be used: {exc}")
    try:
        time.sleep(0.3)  # let the kernel create the event node
        devices, _ = evdev_source.scan()
        info = evdev_source.pick(devices, "twistrate test puck")
        assert info is not None and info.kind == "relative"
        src = evdev_source.EvdevSource(info)
        ui.write(EV_REL, 0, 150)
        ui.syn()
        time.sleep(0.05)
        stage = DeviceStage(info)
        frames = [f for item in src.read(time.monotonic()) if isinstance(item, RawEvent)
                  if (f := stage.feed(item)) is not None]
        assert frames and frames[-1].raw[0] == 150
        src.close()
    finally:
        ui.close()
