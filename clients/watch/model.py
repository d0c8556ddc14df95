"""The per-arm view model the dashboard and the terminal monitor share: what one service said, kept.

It consumes decoded output messages (health, command, event, state; any object with the protocol's
field names, or a plain dict of them) with the receive time, monotonic seconds, passed in by the
caller (no clock here), and keeps:

- the latest health figures, and history windows (the last `window_s` seconds) of manipulability
  (whole, linear, angular), the smallest singular value, scale and damping;
- mode and health state, and the list of their changes;
- the latest joint positions and rates (from `state`, else from `command`), with the joint limits
  when the arm's description (the control op `arm`) was handed in;
- refused input counted by reason (health.rejected), overruns, tick lateness (the `counters` op),
  the tick rate measured from the ticks and stamps of the health messages over the last
  TICK_RATE_BASE_S;
- the lease holder (the control op `status`'s `holder` when handed in; otherwise followed from the
  lease events);
- the events as a list (newest last), with the model's own `gone` and `back` entries;
- the foresight of the newest health message: the time to the pinched threshold along the current
  rates and, per joint, the time to its position limit, with the joint that gets there first;
- the keep-out figures of the newest health message: the nearest keep-out pair (`keepout`: nearest_m,
  link, other, other_kind; None without keep-out) and the constraint that limited the scale
  (`limiting`: by, joint, bound, link, other);
- gone / back: an arm is gone when nothing arrived for `gone_after_s`, and back with the next message;
- restarts: a new instance id (status and event, docs/protocol.md section 6) marks a restarted service;
  a tick count that goes backwards only does so while no id is known (with an id it waits for one).

`snapshot(since)` gives everything as plain JSON-able data (the dashboard's WebSocket schema,
docs/dashboard.md); `since` is the last history index the reader already has.
"""

from __future__ import annotations

import math
import re
from collections import deque
from collections.abc import Mapping
from typing import Any

#: no message for this long: the arm is shown gone, s (health comes at 50 Hz, commands every tick)
GONE_AFTER_S = 1.5
#: history window, s
WINDOW_S = 30.0
#: events kept per arm
MAX_EVENTS = 60
#: state changes kept per arm
MAX_CHANGES = 40
#: the tick rate is measured over about this many seconds of health stamps
TICK_RATE_BASE_S = 1.0
#: a tick count this far below the highest seen means a new service process (streams interleave a
#: little: an event may carry a tick a few behind the latest command)
RESTART_SLACK_TICKS = 50
#: health state names (docs/protocol.md section 10)
HEALTH_STATES = ("clear", "narrow", "pinched")
#: history series, in the order of each history row after its index and time
SERIES = (
    "manipulability",
    "manipulability_linear",
    "manipulability_angular",
    "sigma_min",
    "scale",
    "damping",
)
#: the fields of health.keepout and health.limiting (docs/protocol.md 7.4)
KEEPOUT_FIELDS = ("nearest_m", "link", "other", "other_kind")
LIMITING_FIELDS = ("by", "joint", "bound", "link", "other")
_QUOTED = re.compile(r"'([^']*)'|\"([^\"]*)\"")


def _get(msg: Any, name: str, default: Any = None) -> Any:
    if isinstance(msg, Mapping):
        return msg.get(name, default)
    return getattr(msg, name, default)


def _floats(v: Any) -> list[float] | None:
    """A list of finite floats (non-finite as None) from an array, a list or None."""
    if v is None:
        return None
    out = []
    for x in v.tolist() if hasattr(v, "tolist") else v:
        x = float(x)
        out.append(x if math.isfinite(x) else None)
    return out


def _flat(v: Any) -> list[float | None] | None:
    """_floats of an array of any shape, row-major (a (3, 3) matrix gives its 9 entries row by row)."""
    if v is not None and hasattr(v, "reshape"):
        v = v.reshape(-1)
    elif v is not None and v and isinstance(v[0], (list, tuple)):
        v = [x for row in v for x in row]
    return _floats(v)


def _fields(v: Any, names: tuple[str, ...]) -> dict[str, Any] | None:
    """A keepout or limiting value (a named tuple, a map, or None) as a plain map of `names`; numbers
    not finite become None."""
    if v is None:
        return None
    out = {k: (v.get(k) if isinstance(v, Mapping) else getattr(v, k, None)) for k in names}
    return {k: _num(x) if isinstance(x, float) else x for k, x in out.items()}


def _int(v: Any) -> int | None:
    return None if v is None else int(v)


def _num(v: Any) -> float | None:
    if v is None:
        return None
    x = float(v)
    return x if math.isfinite(x) else None


class ArmView:
    """What one service (one arm) said. name : the label it is shown under (unique per page)."""

    def __init__(
        self,
        name: str,
        window_s: float = WINDOW_S,
        gone_after_s: float = GONE_AFTER_S,
        max_events: int = MAX_EVENTS,
    ) -> None:
        self.name = name
        self.window_s = float(window_s)
        self.gone_after_s = float(gone_after_s)
        self.arm: str | None = None  # the service's arm name
        self.joints: list[dict[str, Any]] = []  # name, kind, position_min/max (None: unlimited), velocity_max
        self.thresholds: dict[str, float] | None = None
        self.mode: str | None = None
        self.health: str | None = None
        self.changes: deque[dict[str, Any]] = deque(maxlen=MAX_CHANGES)
        self.events: deque[dict[str, Any]] = deque(maxlen=max_events)
        self.history: deque[list[Any]] = deque()
        self.index = 0  # history rows ever appended
        self.latest: dict[str, Any] = {}
        self.position: list[float | None] | None = None
        self.rate: list[float | None] | None = None
        self.tool: dict[str, Any] | None = None
        self.origins: list[list[float]] | None = None
        self.ellipsoid: dict[str, Any] | None = None
        self.rejected: dict[str, int] = {}
        self.overruns = 0
        self.tick = -1
        self.tick_hz: float | None = None
        self.timing: dict[str, float | None] = {}  # tick lateness median, p99, max (s) from `counters`
        self.holder: str | None = None
        self._holder_from_status = False
        self.connected = False  # anything received yet
        self.gone = False
        self.gone_count = 0
        self.restarts = 0
        self.instance: int | None = None  # the service instance id (status, events), None until known
        self.last_rx: float | None = None
        self.received = {"health": 0, "command": 0, "event": 0, "state": 0}
        self._tick_base: deque[tuple[int, int]] = deque()  # (tick, stamp_ns) of recent health messages

    # -- descriptions handed in (control ops answer these; the wire streams do not carry them) ---------

    def set_arm(self, description: Mapping[str, Any]) -> None:
        """The control op `arm`'s result: name, n, joints [{name, kind, position_min, position_max,
        velocity_max, ...}] (rad or m, rad/s or m/s; None for an unlimited position)."""
        self.arm = str(description.get("name", self.arm))
        self.joints = [
            {
                "name": str(j["name"]),
                "kind": str(j.get("kind", "revolute")),
                "position_min": _num(j.get("position_min")),
                "position_max": _num(j.get("position_max")),
                "velocity_max": _num(j.get("velocity_max")),
            }
            for j in description.get("joints", ())
        ]

    def set_thresholds(self, narrow_below_m: float, pinched_below_m: float) -> None:
        """Health thresholds on the smallest singular value, m (shown with its history)."""
        self.thresholds = {"narrow_below_m": float(narrow_below_m), "pinched_below_m": float(pinched_below_m)}

    def set_status(self, status: Mapping[str, Any], now: float) -> None:
        """The control op `status`'s result (holder, tick_hz, arm, mode, health; position when neither
        `state` nor `command` messages come)."""
        self._touch(now, None)
        self._see_instance(status.get("instance"), now, status.get("tick"))
        self.holder = status.get("holder")
        self._holder_from_status = True
        if status.get("tick_hz"):
            self.tick_hz = float(status["tick_hz"])
        if status.get("arm") and self.arm is None:
            self.arm = str(status["arm"])
        if status.get("mode"):
            self._set_mode(str(status["mode"]), now)
        if status.get("health"):
            self._set_health(str(status["health"]), now)
        if (
            status.get("position") is not None
            and self.received["state"] == 0
            and self.received["command"] == 0
        ):
            self.position = _floats(status["position"])  # slow (the status rate), but better than nothing

    def set_counters(self, counters: Mapping[str, Any]) -> None:
        """The control op `counters`'s result: the tick lateness figures (ns) are kept, in s."""
        self.timing = {
            k: (float(counters[f"lateness_{k}_ns"]) * 1e-9 if f"lateness_{k}_ns" in counters else None)
            for k in ("median", "p99", "max")
        }

    # -- the streams ------------------------------------------------------------------------------------

    def on_health(self, msg: Any, now: float) -> None:
        """A health message (HealthMessage fields). now : receive time, monotonic s."""
        tick = int(_get(msg, "tick"))
        self._touch(now, tick)
        self.received["health"] += 1
        sv = _floats(_get(msg, "singular_values")) or []
        sigma_min = sv[-1] if sv else None
        self.latest = {
            "tick": tick,
            "manipulability": _num(_get(msg, "manipulability")),
            "manipulability_linear": _num(_get(msg, "manipulability_linear")),
            "manipulability_angular": _num(_get(msg, "manipulability_angular")),
            "singular_values": sv,
            "sigma_min": sigma_min,
            "inverse_condition": _num(_get(msg, "inverse_condition")),
            "weakest_linear": _floats(_get(msg, "weakest_linear")),
            "weakest_angular": _floats(_get(msg, "weakest_angular")),
            "damping": _num(_get(msg, "damping")),
            "scale": _num(_get(msg, "scale")),
            "limit_margin": _floats(_get(msg, "limit_margin")),
            # foresight (docs/protocol.md 7.4): None where the service sends nil (never, undefined)
            "sigma_min_rate_m_s": _num(_get(msg, "sigma_min_rate_m_s")),
            "time_to_pinched_s": _num(_get(msg, "time_to_pinched_s")),
            "time_to_limit_s": _floats(_get(msg, "time_to_limit_s")),
            "first_limit_joint": _int(_get(msg, "first_limit_joint")),
            "time_to_first_limit_s": _num(_get(msg, "time_to_first_limit_s")),
            # keep-out (docs/protocol.md 7.4): the nearest pair (None without keep-out), what limited
            "keepout": _fields(_get(msg, "keepout"), KEEPOUT_FIELDS),
            "limiting": _fields(_get(msg, "limiting"), LIMITING_FIELDS),
        }
        self.rejected = {str(k): int(v) for k, v in (_get(msg, "rejected") or {}).items()}
        self.overruns = int(_get(msg, "overruns", 0))
        stamp = int(_get(msg, "stamp_ns", 0))
        base = self._tick_base
        base.append((tick, stamp))
        while len(base) > 2 and base[-1][1] - base[1][1] >= TICK_RATE_BASE_S * 1e9:
            base.popleft()
        t0, s0 = base[0]
        if tick > t0 and stamp > s0:
            self.tick_hz = (tick - t0) / ((stamp - s0) * 1e-9)
        self._set_mode(str(_get(msg, "mode")), now)
        self._set_health(str(_get(msg, "state")), now)
        row = [self.index, now] + [self.latest[k] for k in SERIES]
        self.index += 1
        self.history.append(row)
        while self.history and self.history[0][1] < now - self.window_s:
            self.history.popleft()

    def on_command(self, msg: Any, now: float) -> None:
        """A command message (CommandMessage fields): mode, health, rates every tick."""
        self._touch(now, int(_get(msg, "tick")))
        self.received["command"] += 1
        self._set_mode(str(_get(msg, "mode")), now)
        self._set_health(str(_get(msg, "health")), now)
        if self.received["state"] == 0:  # `state` carries the positions the tick used; else estimate
            self.rate = _floats(_get(msg, "rate"))
            target = _floats(_get(msg, "target"))
            self.position = target

    def on_event(self, msg: Any, now: float) -> None:
        """An event message (EventMessage fields)."""
        tick = int(_get(msg, "tick"))
        self._see_instance(_get(msg, "instance"), now, tick)
        self._touch(now, tick)
        self.received["event"] += 1
        name, detail = str(_get(msg, "event")), str(_get(msg, "detail", ""))
        self._add_event(now, name, detail, tick)
        if name == "lease_claimed":
            m = _QUOTED.search(detail)
            self.holder = (m.group(1) or m.group(2)) if m else "a client"
        elif name in ("lease_released", "lease_expired"):
            self.holder = None
        mode = _get(msg, "mode")
        if mode:
            self._set_mode(str(mode), now)

    def on_state(self, msg: Any, now: float) -> None:
        """A state message (StateMessage fields: tick, position, rate, tool_position (3,), tool_rotation
        (3, 3), origins (n + 2, 3), ellipsoid_radii (3,), ellipsoid_axes (3, 3) with the principal axes as
        columns; all base frame, m), or a plain map of the wire's layout (tool {position, rotation},
        ellipsoid {radii, axes}, matrices row-major). Kept as the wire's layout."""
        self._touch(now, int(_get(msg, "tick")))
        self.received["state"] += 1
        self.position = _floats(_get(msg, "position"))
        self.rate = _floats(_get(msg, "rate"))
        tool = _get(msg, "tool")
        if tool is None and _get(msg, "tool_position") is not None:
            tool = {"position": _get(msg, "tool_position"), "rotation": _get(msg, "tool_rotation")}
        if tool is not None:
            self.tool = {"position": _flat(_get(tool, "position")), "rotation": _flat(_get(tool, "rotation"))}
        origins = _get(msg, "origins")
        if origins is not None:
            self.origins = [_floats(p) for p in origins]
        ell = _get(msg, "ellipsoid")
        if ell is None and _get(msg, "ellipsoid_radii") is not None:
            ell = {"radii": _get(msg, "ellipsoid_radii"), "axes": _get(msg, "ellipsoid_axes")}
        if ell is not None:
            self.ellipsoid = {"radii": _flat(_get(ell, "radii")), "axes": _flat(_get(ell, "axes"))}

    def check(self, now: float) -> bool:
        """Mark the arm gone when nothing arrived for gone_after_s. True when it just went."""
        if (
            self.connected
            and not self.gone
            and self.last_rx is not None
            and now - self.last_rx > self.gone_after_s
        ):
            self.gone = True
            self.gone_count += 1
            self._add_event(now, "gone", f"nothing received for {now - self.last_rx:.1f} s", None)
            return True
        return False

    # -- bookkeeping ------------------------------------------------------------------------------------

    def _touch(self, now: float, tick: int | None) -> None:
        if self.gone:
            self.gone = False
            self._add_event(now, "back", f"receiving again after {now - (self.last_rx or now):.1f} s", tick)
        if tick is not None:
            if tick + RESTART_SLACK_TICKS < self.tick:  # counts from 0 again: a new service process?
                self._tick_base.clear()
                if self.instance is None:  # no id to go by: the counter decides
                    self.restarts += 1
                    self._add_event(now, "restarted", f"tick {self.tick} -> {tick}", tick)
                # else a hint only: the next status or event's instance id decides
                self.tick = tick
            else:
                self.tick = max(self.tick, tick)
        self.connected = True
        self.last_rx = now

    def _see_instance(self, instance: Any, now: float, tick: int | None = None) -> None:
        """The instance id of a status result or an event: a new one is a restarted service."""
        if not isinstance(instance, int) or isinstance(instance, bool) or instance <= 0:
            return
        old = self.instance
        self.instance = instance
        if old is not None and instance != old:
            self.restarts += 1
            self._tick_base.clear()
            self.tick = -1 if tick is None else tick
            self._add_event(now, "restarted", f"instance {old:016x} -> {instance:016x}", tick)

    def _add_event(self, now: float, name: str, detail: str, tick: int | None) -> None:
        self.events.append({"t": now, "event": name, "detail": detail, "tick": tick})

    def _set_mode(self, mode: str, now: float) -> None:
        if mode and mode != "None" and mode != self.mode:
            if self.mode is not None:
                self.changes.append({"t": now, "what": "mode", "from": self.mode, "to": mode})
            self.mode = mode

    def _set_health(self, state: str, now: float) -> None:
        if state and state != "None" and state != self.health:
            if self.health is not None:
                self.changes.append({"t": now, "what": "health", "from": self.health, "to": state})
            self.health = state

    # -- reading ----------------------------------------------------------------------------------------

    def series(self, name: str) -> list[float | None]:
        """One history series (SERIES), oldest first."""
        k = 2 + SERIES.index(name)
        return [row[k] for row in self.history]

    def snapshot(self, since: int = -1, now: float | None = None) -> dict[str, Any]:
        """Everything as JSON-able data; history rows with index > since (all when -1).

        Times (`t` of history rows, events, changes) are the receive clock, s; `age_s` is now - last_rx.
        """
        rows = [r for r in self.history if r[0] > since] if since >= 0 else list(self.history)
        return {
            "name": self.name,
            "arm": self.arm,
            "connected": self.connected,
            "gone": self.gone,
            "age_s": None if now is None or self.last_rx is None else now - self.last_rx,
            "mode": self.mode,
            "health": self.health,
            "tick": self.tick,
            "tick_hz": self.tick_hz,
            "overruns": self.overruns,
            "rejected": dict(self.rejected),
            "rejected_total": sum(self.rejected.values()),
            "holder": self.holder,
            "latest": dict(self.latest),
            "thresholds": self.thresholds,
            "joints": self.joints,
            "position": self.position,
            "rate": self.rate,
            "tool": self.tool,
            "origins": self.origins,
            "ellipsoid": self.ellipsoid,
            "series": list(SERIES),
            "history": rows,
            "history_index": self.index - 1,
            "window_s": self.window_s,
            "events": list(self.events),
            "changes": list(self.changes),
            "restarts": self.restarts,
            "instance": None if self.instance is None else f"{self.instance:016x}",
            "gone_count": self.gone_count,
        }


class Fleet:
    """The arms on one page or screen, by name, in the order they were added."""

    def __init__(self, **view_kw: Any) -> None:
        self.arms: dict[str, ArmView] = {}
        self._kw = view_kw

    def arm(self, name: str) -> ArmView:
        view = self.arms.get(name)
        if view is None:
            view = self.arms[name] = ArmView(name, **self._kw)
        return view

    def feed(self, name: str, kind: str, msg: Any, now: float) -> None:
        """Hand one decoded message of `kind` (health, command, event, state) to arm `name`."""
        view = self.arm(name)
        handler = {
            "health": view.on_health,
            "command": view.on_command,
            "event": view.on_event,
            "state": view.on_state,
        }.get(kind)
        if handler is not None:
            handler(msg, now)

    def check(self, now: float) -> list[str]:
        """Run gone detection on every arm; the names that just went."""
        return [name for name, view in self.arms.items() if view.check(now)]
