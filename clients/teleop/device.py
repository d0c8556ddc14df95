"""The device stage: what a six-axis controller reports, latched into deflections and buttons.

The Linux input layer sends only changes (common practice), so the stage keeps the last
value of each axis and button. Two kinds of device:

* absolute (ABS_X..ABS_RZ): the kernel drops an absolute value equal to the last one, so a latched
  value holds until the next change; nothing expires.
* relative (REL_X..REL_RZ): the kernel drops a relative value of zero (drivers/input/input.c passes
  EV_REL events only when the value is nonzero; from memory), so the return to rest never arrives
  as an event. Such controllers repeat their report while deflected (common practice), so an axis
  that has not been reported for `idle_s` is taken as at rest. Translation and rotation may come in
  separate reports, so the timeout is per axis, not per report.

Everything is zeroed at once when the device goes away (`lose`) or the kernel reports dropped
events (SYN_DROPPED: the latched state can no longer be trusted; a real source re-reads the state).
The stage is the single code path for real, recorded and synthetic input.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np

from twistrate.clients.teleop.events import (
    BTN_MISC,
    EV_ABS,
    EV_KEY,
    EV_REL,
    EV_SYN,
    SIX_AXIS_CODES,
    SYN_DROPPED,
    SYN_REPORT,
    RawEvent,
)

Kind = Literal["relative", "absolute"]
#: Default relative-axis idle timeout, s: longer than the report period of such controllers while
#: deflected (a few ms to about 16 ms, common practice), short enough that letting go stops quickly.
DEFAULT_IDLE_S = 0.06


@dataclass(frozen=True)
class DeviceInfo:
    """What a device offers. kind : which six axes it reports. buttons : its button key codes,
    ascending (button index i is buttons[i]). abs_range : for absolute axes, code -> (min, max)
    counts as the device declares them (None for relative devices)."""

    path: str
    name: str
    kind: Kind
    buttons: tuple[int, ...] = ()
    abs_range: Mapping[int, tuple[int, int]] | None = None


def six_axis_kind(capabilities: Mapping[int, Iterable[Any]]) -> Kind | None:
    """Which six axes a device reports, from its capabilities {event type: [codes]} (an absolute
    axis may be listed as (code, info) pairs, as evdev does): "relative" when it has all of
    REL_X..REL_RZ, else "absolute" when it has all of ABS_X..ABS_RZ, else None."""
    for ev_type, kind in ((EV_REL, "relative"), (EV_ABS, "absolute")):
        codes = {c[0] if isinstance(c, (tuple, list)) else c for c in capabilities.get(ev_type, ())}
        if set(SIX_AXIS_CODES) <= codes:
            return kind  # type: ignore[return-value]
    return None


def button_codes(capabilities: Mapping[int, Iterable[Any]]) -> tuple[int, ...]:
    """The device's button key codes (BTN_MISC and up), ascending; keyboard keys are not buttons."""
    return tuple(sorted(int(c) for c in capabilities.get(EV_KEY, ()) if int(c) >= BTN_MISC))


@dataclass
class Frame:
    """The device's state after one report. t_s : s, monotonic. raw : (6,) latched counts, device axis
    order (X, Y, Z, RX, RY, RZ). held : indices of the buttons held. pressed, released : indices
    that went down / up since the previous frame, in order."""

    t_s: float
    raw: np.ndarray
    held: frozenset[int]
    pressed: list[int] = field(default_factory=list)
    released: list[int] = field(default_factory=list)


class DeviceStage:
    """Latches one device's events into frames.

    info : the device. idle_s : relative-axis idle timeout, s (ignored for absolute devices).
    """

    def __init__(self, info: DeviceInfo, idle_s: float = DEFAULT_IDLE_S) -> None:
        self.info = info
        self.idle_s = float(idle_s)
        self._axis_type = EV_REL if info.kind == "relative" else EV_ABS
        self._index = {code: i for i, code in enumerate(info.buttons)}
        self.raw = np.zeros(6)
        self._seen = np.full(6, -np.inf)  # time each axis was last reported, s
        self.held: set[int] = set()
        self._pressed: list[int] = []
        self._released: list[int] = []
        self.dropped = 0

    def feed(self, event: RawEvent) -> Frame | None:
        """Take one event; returns a frame at each SYN_REPORT, else None."""
        if event.type == self._axis_type and 0 <= event.code < 6:
            self.raw[event.code] = event.value
            self._seen[event.code] = event.t_s
        elif event.type == EV_KEY and event.code in self._index:
            i = self._index[event.code]
            if event.value == 1 and i not in self.held:
                self.held.add(i)
                self._pressed.append(i)
            elif event.value == 0 and i in self.held:
                self.held.discard(i)
                self._released.append(i)
        elif event.type == EV_SYN and event.code == SYN_DROPPED:
            self.dropped += 1
            self.zero()
        elif event.type == EV_SYN and event.code == SYN_REPORT:
            return self._frame(event.t_s)
        return None

    def expire(self, now_s: float) -> Frame | None:
        """Relative devices: zero the axes not reported for idle_s. Returns a frame when that changed
        anything, else None."""
        if self._axis_type != EV_REL:
            return None
        stale = (now_s - self._seen > self.idle_s) & (self.raw != 0.0)
        if not stale.any():
            return None
        self.raw[stale] = 0.0
        return self._frame(now_s)

    def zero(self) -> None:
        """Forget every deflection and button (released buttons are reported in the next frame)."""
        self.raw[:] = 0.0
        self._seen[:] = -np.inf
        self._released.extend(sorted(self.held))
        self.held.clear()

    def lose(self, now_s: float) -> Frame:
        """The device went away: everything zero at once. Returns the zero frame."""
        self.zero()
        return self._frame(now_s)

    def _frame(self, t_s: float) -> Frame:
        frame = Frame(t_s, self.raw.copy(), frozenset(self.held), self._pressed, self._released)
        self._pressed, self._released = [], []
        return frame
