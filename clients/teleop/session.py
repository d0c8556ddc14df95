"""The teleoperation session: a pure state machine from operator input and service news to link actions.

The session never touches a socket or a clock. Its inputs are method calls with the time (s,
monotonic) where it matters: device frames and shaped twists, operator commands (keys, buttons),
the publish tick, service modes and events, link results. Its outputs are `Action`s for a driver to
carry out against a `TeleopLink` (the few link methods it needs). Rules:

* Motion needs all of: the lease, motion enabled by the operator (`arm`, never automatic), the
  device present, the hold button held (when hold-to-move is on), the service not in fault.
* While those hold and the controller is deflected, a twist goes out on every tick (the fixed
  publish rate); on the return to rest (or when any condition lapses) zeros go out once.
* Device loss, `quit` (Ctrl-C), lease loss and a service fault send zeros at once (not at the next
  tick) and disable; the service's watchdog is the second line of defence, not the first.
* After any of those, motion resumes only after the operator enables again, with the controller
  at rest. A restarted service starts disabled; the session claims again but does not enable.
* The frame (base / tool) switches only while no motion is being sent.
"""

from __future__ import annotations

from collections.abc import AsyncIterator, Sequence
from dataclasses import dataclass, field
from typing import Any, Protocol

import numpy as np

from twistrate.clients.teleop import axes
from twistrate.clients.teleop.device import Frame
from twistrate.clients.teleop.pipeline import Shaped
from twistrate.clients.teleop.profile import Profile

#: Operator commands (from terminal keys or device buttons).
COMMANDS = ("arm", "stop", "frame", "faster", "slower", "lock", "dominant", "quit")
#: Renew the lease when this fraction of its duration has passed (docs/protocol.md section 9).
RENEW_FRACTION = 1.0 / 3.0
#: After a refused claim (another holder, no reply), claim again no sooner than this, s.
CLAIM_RETRY_S = 1.0
#: A point shorter than this is the tool origin (no pose needed to express it in the base frame), m.
ZERO_POINT_M = 1e-9
ZERO3 = (0.0, 0.0, 0.0)


class TeleopLink(Protocol):
    """What the session's driver needs from a client of the service (the asyncio client implements it;
    tests use a fake). linear (3,) m/s, angular (3,) rad/s and point (3,) m are in `frame`."""

    def send_twist(self, linear: Sequence[float], angular: Sequence[float], frame: str = "base",
                   point: Sequence[float] | None = None) -> int: ...

    async def claim(self, client: str | None = None, lease_ms: int | None = None) -> str: ...

    async def renew(self) -> int: ...

    async def release(self) -> None: ...

    async def enable(self) -> str: ...

    async def disable(self) -> str: ...

    async def status(self) -> dict[str, Any]: ...

    def events(self) -> AsyncIterator[Any]: ...


@dataclass(frozen=True)
class SendTwist:
    linear: tuple[float, float, float]
    angular: tuple[float, float, float]
    frame: str
    point: tuple[float, float, float] | None

    @property
    def zero(self) -> bool:
        return not any(self.linear) and not any(self.angular)


@dataclass(frozen=True)
class Claim:
    pass


@dataclass(frozen=True)
class Renew:
    pass


@dataclass(frozen=True)
class Release:
    pass


@dataclass(frozen=True)
class Enable:
    pass


@dataclass(frozen=True)
class Disable:
    reason: str


Action = SendTwist | Claim | Renew | Release | Enable | Disable


@dataclass
class View:
    """What the live line shows. linear (3,) m/s and angular (3,) rad/s: the twist last sent, in
    `frame`. mode, health, achieved: the service's mode, health state and achieved scale, as last
    heard (None: not yet). why: the reasons the arm does not move (empty while it may)."""

    frame: str
    scale: float
    lock: str
    dominant: bool
    linear: tuple[float, ...]
    angular: tuple[float, ...]
    mode: str | None
    health: str | None
    achieved: float | None
    why: list[str] = field(default_factory=list)
    notice: str = ""


class TeleopSession:
    """profile : the validated profile. keyboard : keyboard mode (each axis key is itself held, so there
    is no hold button). client : the name claimed with."""

    def __init__(self, profile: Profile, *, keyboard: bool = False, client: str = "teleop") -> None:
        self.profile = profile
        self.client = client
        self.keyboard = keyboard
        self.frame: str = profile.motion.frame
        self.scales = list(profile.speed.scales)
        self.scale_index = self.scales.index(profile.speed.start)
        self.lock: str = profile.motion.lock
        self.dominant = profile.motion.dominant
        self.hold_to_move = profile.motion.hold_to_move and not keyboard
        self.point_tool = np.array(profile.motion.point, dtype=float)
        buttons = profile.buttons
        self._button_command = {getattr(buttons, name): name
                                for name in ("frame", "faster", "slower", "lock", "dominant")
                                if getattr(buttons, name) is not None}
        self._hold_button = buttons.hold
        # session state
        self.closed = False
        self.lease = False
        self.lease_ms: int | None = None
        self._renewed_at = 0.0
        self._claiming = False
        self._next_claim = 0.0
        self.armed = False  # the operator enabled motion and nothing has disabled it since
        self._enabling = False
        self.device_present = True
        self.hold = False
        self.shaped = Shaped(np.zeros(3), np.zeros(3), np.zeros(6), True)
        self._sending = False  # the last twist sent was not zero
        self.last = SendTwist(ZERO3, ZERO3, self.frame, None)
        self.R_base_tool: np.ndarray | None = None
        self.mode: str | None = None
        self.health: str | None = None
        self.achieved: float | None = None
        self.fault: str | None = None
        self.holder: str | None = None
        self.notice = ""

    # -- derived -------------------------------------------------------------------------------------

    @property
    def scale(self) -> float:
        return self.scales[self.scale_index]

    def may_move(self) -> bool:
        """Every condition for motion holds (deflection aside)."""
        return (self.lease and self.armed and self.device_present and not self.closed
                and (self.hold or not self.hold_to_move) and self.mode not in ("fault", "shutdown")
                and self._point() is not None)

    def _point(self) -> tuple[float, float, float] | None:
        """The reference point in the current frame, m; None when the base frame needs the tool pose
        and none has been heard yet."""
        if float(np.linalg.norm(self.point_tool)) < ZERO_POINT_M:
            return ZERO3
        if self.frame == "tool":
            return tuple(float(v) for v in self.point_tool)  # type: ignore[return-value]
        if self.R_base_tool is None:
            return None
        return tuple(float(v) for v in self.R_base_tool @ self.point_tool)  # type: ignore[return-value]

    def why_not_moving(self) -> list[str]:
        """The reasons the arm does not move now, most basic first (empty: it may move)."""
        why: list[str] = []
        if self.closed:
            return ["closed"]
        if not self.lease:
            why.append(f"no lease (held by {self.holder})" if self.holder else "no lease")
        if not self.device_present:
            why.append("controller lost")
        if self.mode == "fault":
            why.append(f"fault: {self.fault}" if self.fault else "fault")
        elif self.mode == "shutdown":
            why.append("service shutting down")
        if not self.armed:
            why.append("disabled (press Enter to enable)")
        elif self.mode == "disabled" and not self._enabling:
            why.append("disabled by the service")
        if self.hold_to_move and not self.hold and not self.shaped.rest:
            why.append("hold button not held")
        if self._point() is None:
            why.append("waiting for the tool pose (reference point in the base frame)")
        if not why and self._sending and self.mode in ("stopping", "holding"):
            why.append(f"stale (service {self.mode})")
        return why

    def view(self) -> View:
        return View(self.frame, self.scale, self.lock, self.dominant, self.last.linear, self.last.angular,
                    self.mode, self.health, self.achieved, self.why_not_moving(), self.notice)

    # -- actions -------------------------------------------------------------------------------------

    def _zero(self) -> SendTwist:
        self._sending = False
        self.last = SendTwist(ZERO3, ZERO3, self.frame, None)
        return self.last

    def _halt(self, reason: str, *, disable: bool = True) -> list[Action]:
        """Zeros at once (when a lease is held), then disable; the operator must enable again."""
        actions: list[Action] = []
        if self.lease:
            actions.append(self._zero())
            if disable and (self.armed or self._enabling):
                actions.append(Disable(reason))
        self._sending = False
        self.armed = self._enabling = False
        return actions

    def start(self, now_s: float) -> list[Action]:
        """The session begins: claim the lease (not enable)."""
        self._claiming = True
        return [Claim()]

    def tick(self, now_s: float) -> list[Action]:
        """The publish tick (profile motion.rate_hz): a twist while deflected and allowed; zeros once
        after; a claim retry when there is no lease; a renewal when due."""
        actions: list[Action] = []
        if self.closed:
            return actions
        if self.may_move() and not self.shaped.rest:
            point = self._point()
            self.last = SendTwist(tuple(float(v) for v in self.shaped.linear),  # type: ignore[arg-type]
                                  tuple(float(v) for v in self.shaped.angular),  # type: ignore[arg-type]
                                  self.frame, None if point == ZERO3 else point)
            self._sending = True
            actions.append(self.last)
        elif self._sending:
            actions.append(self._zero())
        if self.lease and self.lease_ms and now_s - self._renewed_at >= self.lease_ms * 1e-3 * RENEW_FRACTION:
            self._renewed_at = now_s  # one renewal in flight at a time; the result resets it
            actions.append(Renew())
        elif not self.lease and not self._claiming and now_s >= self._next_claim:
            self._claiming = True
            actions.append(Claim())
        return actions

    # -- operator ------------------------------------------------------------------------------------

    def command(self, name: str, now_s: float) -> list[Action]:
        """An operator command (one of COMMANDS)."""
        if self.closed:
            return []
        if name == "quit":
            actions = self._halt("operator quit")
            if self.lease:
                actions.append(Release())
            self.lease = False
            self.closed = True
            return actions
        if name == "stop":
            self.notice = "stopped: press Enter to enable again"
            return self._halt("operator stop")
        if name == "arm":
            return self._arm()
        if name == "frame":
            if self._sending:
                self.notice = "let go of the controller to switch frames"
            else:
                self.frame = "tool" if self.frame == "base" else "base"
                self.notice = f"frame: {self.frame}"
            return []
        if name in ("faster", "slower"):
            self.scale_index = axes.step_scale(self.scale_index, 1 if name == "faster" else -1, self.scales)
            self.notice = f"speed scale {self.scale:g}"
        elif name == "lock":
            self.lock = axes.LOCKS[(axes.LOCKS.index(self.lock) + 1) % len(axes.LOCKS)]
            self.notice = f"lock: {self.lock}"
        elif name == "dominant":
            self.dominant = not self.dominant
            self.notice = f"dominant axis: {'on' if self.dominant else 'off'}"
        return []

    def _arm(self) -> list[Action]:
        if self.armed or self._enabling:
            return []
        if not self.lease:
            self.notice = "no lease yet: cannot enable"
            return []
        if not self.device_present:
            self.notice = "the controller is lost: plug it in again first"
            return []
        if not self.shaped.rest:
            self.notice = "let go of the controller, then enable"
            return []
        if self.mode == "fault":
            self.notice = f"service in fault ({self.fault}): clear the fault first"
            return []
        self._enabling = True
        return [Enable()]

    def device_frame(self, frame: Frame, shaped: Shaped, now_s: float) -> list[Action]:
        """A new device frame (buttons) and its shaped twist. Button presses become commands."""
        self.shaped = shaped
        if self._hold_button is not None:
            self.hold = self._hold_button in frame.held
        actions: list[Action] = []
        for index in frame.pressed:
            if index in self._button_command:
                actions.extend(self.command(self._button_command[index], now_s))
        if self._sending and not self.may_move():
            actions.append(self._zero())  # hold released: zeros now, not at the next tick
        return actions

    def shaped_input(self, shaped: Shaped) -> None:
        """A new shaped twist without a device frame (keyboard mode)."""
        self.shaped = shaped

    def device_lost(self, now_s: float, reason: str = "controller lost") -> list[Action]:
        self.device_present = False
        self.hold = False
        self.shaped = Shaped(np.zeros(3), np.zeros(3), np.zeros(6), True)
        self.notice = f"{reason}: waiting for it to return"
        return self._halt(reason)

    def device_back(self, now_s: float) -> list[Action]:
        self.device_present = True
        self.notice = "controller back: let go of it, then press Enter to enable"
        return []

    # -- link results and service news ---------------------------------------------------------------

    def claimed(self, ok: bool, now_s: float, lease_ms: int | None = None,
                holder: str | None = None) -> list[Action]:
        self._claiming = False
        if not ok:
            self._next_claim = now_s + CLAIM_RETRY_S
        self.lease = ok
        self.lease_ms = lease_ms if ok else None
        self._renewed_at = now_s
        self.holder = self.client if ok else holder
        return []

    def renewed(self, ok: bool, now_s: float, lease_ms: int | None = None) -> list[Action]:
        if ok:
            self._renewed_at = now_s
            self.lease_ms = lease_ms or self.lease_ms
            return []
        return self.lease_lost("lease renewal refused")

    def enabled(self, ok: bool, mode: str | None = None, error: str = "") -> list[Action]:
        self._enabling = False
        self.armed = ok and not self.closed
        if mode is not None:
            self.mode = mode
        self.notice = "enabled" if self.armed else f"enable refused: {error}"
        return []

    def lease_lost(self, reason: str) -> list[Action]:
        actions = self._halt(reason)
        self.lease = False
        self.lease_ms = None
        self.notice = f"{reason}: the lease is lost"
        return actions

    def service_mode(self, mode: str, health: str | None = None,
                     achieved: float | None = None) -> list[Action]:
        """Mode (and health state, achieved scale) from a command, health message or status."""
        self.mode = mode
        if health is not None:
            self.health = health
        if achieved is not None:
            self.achieved = achieved
        if mode == "fault" and (self.armed or self._sending):
            return self._halt("service fault")
        if mode == "shutdown":
            return self._halt("service shutting down", disable=False)
        return []

    def service_event(self, event: str, mode: str, detail: str = "") -> list[Action]:
        """An event from the service (docs/protocol.md section 10)."""
        if event == "fault":
            self.fault = detail
        if event in ("lease_expired", "lease_released") and self.lease:
            actions = self.lease_lost(f"service: {event}")
            self.mode = mode
            return actions
        if event == "disabled" and self.armed and not self._enabling:
            self.armed = False
            self.notice = f"disabled by the service ({detail})" if detail else "disabled by the service"
            actions: list[Action] = [self._zero()] if self._sending else []
            self.mode = mode
            return actions
        if event == "fault_cleared":
            self.fault = None
        return self.service_mode(mode)

    def service_status(self, status: dict[str, Any]) -> list[Action]:
        """A `status` reply (docs/protocol.md 8.2): mode, holder, fault."""
        self.fault = status.get("fault")
        holder = status.get("holder")
        actions: list[Action] = []
        if self.lease and holder != self.client:
            why = f"status: the lease is held by {holder}" if holder else "status: no lease held"
            actions = self.lease_lost(why)
        self.holder = holder
        return actions + self.service_mode(str(status.get("mode")), status.get("health"))

    def service_restarted(self, now_s: float) -> list[Action]:
        """The service restarted (new instance): it starts disabled and without a lease. Claim again;
        never enable."""
        self.lease = False
        self.lease_ms = None
        self._sending = False
        self.armed = self._enabling = False
        self.mode = "disabled"
        self.notice = "service restarted: press Enter to enable again"
        self._claiming = True
        return [Claim()]

    def tool_pose(self, R_base_tool: np.ndarray) -> None:
        """R_base_tool : (3, 3) rotation of the tool frame in the base frame (from the `state` topic)."""
        self.R_base_tool = np.asarray(R_base_tool, dtype=float).reshape(3, 3)
