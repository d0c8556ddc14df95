"""The synchronous core of a teleop run: event source -> device stage -> axis pipeline -> session.

One code path for a real device, a recording, a synthetic stream and the keyboard: the asyncio
command, the tests and the benchmark all call `poll` (new input) and `tick` (the publish period)
with the time, and carry out the actions they return. No sockets, no clock, no sleeping here.
"""

from __future__ import annotations

import numpy as np

from twistrate.clients.teleop.device import DeviceInfo, DeviceStage
from twistrate.clients.teleop.events import Back, EventSource, Gone, RawEvent
from twistrate.clients.teleop.keyboard import COMMAND_KEYS, KeyHold
from twistrate.clients.teleop.pipeline import AxisPipeline, Shaped
from twistrate.clients.teleop.profile import Profile
from twistrate.clients.teleop.session import Action, TeleopSession
from twistrate.solver.errors import ConfigError, field_error


def check_buttons(profile: Profile, info: DeviceInfo) -> list[str]:
    """Profile button indices against the device's buttons. Raises ConfigError when hold-to-move needs
    a hold button the device lacks; returns notices for other missing buttons (their actions stay on
    the terminal keys)."""
    count = len(info.buttons)
    hold = profile.buttons.hold
    if profile.motion.hold_to_move and hold is not None and hold >= count:
        raise field_error(ConfigError, "buttons.hold", hold,
                          f"a button index below {count} ({info.name!r} has {count} buttons), or "
                          "motion.hold_to_move = false to move without a hold button")
    return [f"buttons.{name} = {index}: {info.name!r} has {count} buttons; use the terminal key"
            for name, index in profile.buttons.model_dump().items()
            if index is not None and index >= count and name != "hold"]


class TeleopCore:
    """profile : the profile. source, info : the device (info None: keyboard mode). client : the
    lease client name. The rest offset is averaged over the profile's settle time from the first
    poll (hands off); until then no deflection reaches the session."""

    def __init__(self, profile: Profile, source: EventSource | None = None, info: DeviceInfo | None = None,
                 client: str = "teleop") -> None:
        self.profile = profile
        self.source = source
        self.keyboard = info is None
        self.stage = DeviceStage(info, profile.device.idle_ms * 1e-3) if info is not None else None
        self.pipeline = AxisPipeline(profile, info)
        self.keys = KeyHold(profile.keyboard.first_gap_ms * 1e-3, profile.keyboard.repeat_gap_ms * 1e-3) \
            if self.keyboard else None
        self.session = TeleopSession(profile, keyboard=self.keyboard, client=client)
        self._settle_until: float | None = None
        self._rest_samples: list[np.ndarray] = []
        self.settled = self.keyboard or profile.device.settle_ms <= 0.0

    def start(self, now_s: float) -> list[Action]:
        self._settle_until = now_s + self.profile.device.settle_ms * 1e-3
        return self.session.start(now_s)

    def _shape(self, u: np.ndarray, now_s: float) -> Shaped:
        s = self.session
        return self.pipeline.shape(u, now_s, lock=s.lock, dominant=s.dominant, scale=s.scale)

    def poll(self, now_s: float) -> list[Action]:
        """Take the input that arrived up to now_s (s, monotonic); returns the actions it causes."""
        actions: list[Action] = []
        if self.keyboard:
            assert self.keys is not None
            self.session.shaped_input(self._shape(self.keys.deflection(now_s), now_s))
            return actions
        assert self.source is not None and self.stage is not None
        frames = []
        for item in self.source.read(now_s):
            if isinstance(item, RawEvent):
                frame = self.stage.feed(item)
                if frame is not None:
                    frames.append(frame)
            elif isinstance(item, Gone):
                self.stage.lose(item.t_s)
                frames.clear()
                actions.extend(self.session.device_lost(now_s, item.reason))
            elif isinstance(item, Back):
                actions.extend(self.session.device_back(now_s))
        expired = self.stage.expire(now_s)
        if expired is not None:
            frames.append(expired)
        if not self.settled:
            self._rest_samples.append(self.stage.raw.copy())
            if self._settle_until is not None and now_s >= self._settle_until:
                self.pipeline.capture_rest(np.array(self._rest_samples))
                self.settled = True
            for frame in frames:  # buttons count while settling; deflections do not
                actions.extend(self.session.device_frame(frame, self.session.shaped, now_s))
            return actions
        for frame in frames:
            shaped = self._shape(self.pipeline.device_stage(frame.raw), frame.t_s)
            actions.extend(self.session.device_frame(frame, shaped, now_s))
        return actions

    def tick(self, now_s: float) -> list[Action]:
        """The publish tick: re-shape the latched state at now_s (the filter advances even without new
        events), then let the session decide what to send."""
        if self.settled and not self.session.shaped.rest:
            if self.keyboard:
                assert self.keys is not None
                u = self.keys.deflection(now_s)
            else:
                assert self.stage is not None
                u = self.pipeline.device_stage(self.stage.raw)
            self.session.shaped_input(self._shape(u, now_s))
        return self.session.tick(now_s)

    def key(self, char: str, now_s: float) -> list[Action]:
        """A character typed in the terminal (keyboard mode: axis keys and commands; device mode:
        commands only)."""
        if self.keys is not None:
            command = self.keys.press(char, now_s)
        else:
            command = COMMAND_KEYS.get(char)
        if command is None:
            return []
        if command in ("stop", "quit") and self.keys is not None:
            self.keys.release_all()
        return self.session.command(command, now_s)
