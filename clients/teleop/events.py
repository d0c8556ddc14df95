"""The raw input event model shared by every event source (real device, recording, synthetic stream).

An event is what the Linux input layer delivers: (time, type, code, value). Sources also deliver two
markers of their own: `Gone` (the device went away: unplugged, or its file stopped working) and
`Back` (it is there again). Codes are those of linux/input-event-codes.h (an open kernel interface).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Protocol

# Event types and codes (linux/input-event-codes.h).
EV_SYN = 0x00
EV_KEY = 0x01
EV_REL = 0x02
EV_ABS = 0x03
SYN_REPORT = 0
SYN_DROPPED = 3
#: REL_X, REL_Y, REL_Z, REL_RX, REL_RY, REL_RZ and ABS_X ... ABS_RZ are codes 0..5 of their type.
SIX_AXIS_CODES = (0, 1, 2, 3, 4, 5)
#: Key codes from BTN_MISC (0x100) up are buttons; below are keyboard keys.
BTN_MISC = 0x100


@dataclass(frozen=True)
class RawEvent:
    """One input event. t_s : s, monotonic clock of this process (sources convert). type, code, value :
    as the kernel reports them (value in device counts for axes; 1 press, 0 release, 2 repeat for keys)."""

    t_s: float
    type: int
    code: int
    value: int


@dataclass(frozen=True)
class Gone:
    """The device went away at t_s (s, monotonic)."""

    t_s: float
    reason: str = "device removed"


@dataclass(frozen=True)
class Back:
    """The device is back at t_s (s, monotonic)."""

    t_s: float


SourceItem = RawEvent | Gone | Back


class DeviceLostError(Exception):
    """Raised inside a source when its device stops working (not part of the public error hierarchy:
    sources turn it into a `Gone` marker)."""


class EventSource(Protocol):
    """Anything that delivers input: a real evdev device, a recording, a synthetic stream.

    `read(now_s)` returns, without blocking, the items that have arrived up to now_s (s, monotonic),
    oldest first: events, and `Gone` / `Back` markers when the device leaves or returns (a source
    that lost its device looks for it again on each call). `fileno()` is a file descriptor to wait
    on, or None when the caller should simply call `read` on its own schedule."""

    path: str
    name: str

    def read(self, now_s: float) -> list[SourceItem]: ...

    def fileno(self) -> int | None: ...

    def close(self) -> None: ...


class ReplaySource:
    """A recorded or synthetic stream: items handed out once their time has come.

    items : RawEvent / Gone / Back in time order. Goes through the same device stage as a real device."""

    def __init__(self, items: list[SourceItem], path: str = "replay", name: str = "replayed stream") -> None:
        self.path = path
        self.name = name
        self._items = sorted(items, key=lambda item: item.t_s)
        self._next = 0

    def read(self, now_s: float) -> list[SourceItem]:
        start = self._next
        while self._next < len(self._items) and self._items[self._next].t_s <= now_s:
            self._next += 1
        return self._items[start:self._next]

    def fileno(self) -> int | None:
        return None

    def close(self) -> None:
        self._next = len(self._items)

    @property
    def finished(self) -> bool:
        return self._next >= len(self._items)


def axis_frame(t_s: float, counts: list[int] | tuple[int, ...], ev_type: int = EV_REL) -> list[RawEvent]:
    """Events of one report: each nonzero axis (a relative device never reports zero) or every axis
    (absolute), then SYN_REPORT. counts : 6 values in device axis order. For synthetic streams."""
    events = [RawEvent(t_s, ev_type, code, int(value))
              for code, value in zip(SIX_AXIS_CODES, counts, strict=True) if ev_type == EV_ABS or value != 0]
    events.append(RawEvent(t_s, EV_SYN, SYN_REPORT, 0))
    return events
