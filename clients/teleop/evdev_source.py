"""Linux evdev input: find six-axis devices, explain why one cannot be opened, read one as an event source.

Only this module imports python-evdev (the `teleop` extra), and only inside functions: everything
else, and the tests without a device, run without it. The pure parts (what a device offers,
picking one, the permission message) take plain data and are tested on their own.
"""

from __future__ import annotations

import errno
import glob
import grp
import os
import re
import time
from collections.abc import Iterable, Mapping, Sequence
from typing import Any

from twistrate.clients.teleop.device import DeviceInfo, button_codes, six_axis_kind
from twistrate.clients.teleop.events import (
    EV_ABS,
    EV_KEY,
    EV_SYN,
    SYN_DROPPED,
    SYN_REPORT,
    Back,
    Gone,
    RawEvent,
    SourceItem,
)
from twistrate.solver.errors import ConfigError, field_error

INPUT_GLOB = "/dev/input/event*"
#: How often a lost device is looked for again, s.
RETRY_S = 0.5
#: errno values that mean the device is gone (unplugged: ENODEV; a dead file: EIO, EBADF).
GONE_ERRNOS = (errno.ENODEV, errno.EIO, errno.EBADF, errno.ENXIO)
INSTALL_HINT = "install the teleop extra (pip install -e '.[teleop]'), or use keyboard mode (--keyboard)"


def require_evdev() -> Any:
    """The evdev module, or a ConfigError saying how to get it."""
    try:
        import evdev
    except ImportError:
        raise ConfigError(f"device input needs python-evdev, which is not installed: {INSTALL_HINT}") \
            from None
    return evdev


def info_from_capabilities(path: str, name: str,
                           capabilities: Mapping[int, Iterable[Any]]) -> DeviceInfo | None:
    """A DeviceInfo when the capabilities {type: codes or (code, absinfo)} include six axes, else None.
    An absinfo is anything with `min` and `max` (evdev.AbsInfo) or a (value, min, max, ...) tuple."""
    kind = six_axis_kind(capabilities)
    if kind is None:
        return None
    abs_range = None
    if kind == "absolute":
        abs_range = {}
        for entry in capabilities.get(EV_ABS, ()):
            if isinstance(entry, (tuple, list)) and len(entry) == 2 and 0 <= entry[0] < 6:
                code, absinfo = entry
                lo, hi = (absinfo.min, absinfo.max) if hasattr(absinfo, "min") else (absinfo[1], absinfo[2])
                abs_range[int(code)] = (int(lo), int(hi))
        if len(abs_range) < 6:
            abs_range = None
    return DeviceInfo(path, name, kind, button_codes(capabilities), abs_range)


def explain_permission(path: str) -> str:
    """Why `path` cannot be read and the two usual fixes, in words."""
    try:
        st = os.stat(path)
        group = grp.getgrgid(st.st_gid).gr_name
        mode = f"{st.st_mode & 0o777:o}"
    except (OSError, KeyError):
        group, mode = "its group", "?"
    return (f"{path}: permission denied (owned by group '{group}', mode {mode}). Either add your user to "
            f"that group (sudo usermod -aG {group} $USER, then log out and in again), or give your user "
            "access to this one device with a udev rule (a file in /etc/udev/rules.d/ matching the "
            "device's vendor and product ids, with MODE=\"0660\" and a group you are in, or "
            "TAG+=\"uaccess\"; then `sudo udevadm control --reload` and plug it in again).")


def _natural(path: str) -> tuple[int, str]:
    m = re.search(r"(\d+)$", path)
    return (int(m.group(1)) if m else -1, path)


def scan(paths: Sequence[str] | None = None) -> tuple[list[DeviceInfo], list[str]]:
    """The six-axis devices among `paths` (default: every /dev/input/event*), and the paths that
    could not be opened for lack of permission. Needs evdev."""
    evdev = require_evdev()
    found: list[DeviceInfo] = []
    denied: list[str] = []
    for path in sorted(paths if paths is not None else glob.glob(INPUT_GLOB), key=_natural):
        try:
            dev = evdev.InputDevice(path)
        except PermissionError:
            denied.append(path)
            continue
        except OSError:
            continue
        try:
            info = info_from_capabilities(path, dev.name, dev.capabilities(absinfo=True))
        finally:
            dev.close()
        if info is not None:
            found.append(info)
    return found, denied


def pick(devices: Sequence[DeviceInfo], select: str) -> DeviceInfo | None:
    """The device matching `select`: a path (starts with '/'), a part of its name (case-insensitive),
    or "" for the first. None when nothing matches."""
    for info in devices:
        if not select or (select.startswith("/") and info.path == select) or \
                (not select.startswith("/") and select.lower() in info.name.lower()):
            return info
    return None


def describe(devices: Sequence[DeviceInfo], denied: Sequence[str]) -> list[str]:
    """Lines for `--list`."""
    lines = [f"{d.path}  {d.name!r}  {d.kind} axes, {len(d.buttons)} buttons" for d in devices]
    if not devices:
        lines.append("no device reporting six axes (REL_X..REL_RZ or ABS_X..ABS_RZ) was found")
    if denied:
        lines.append(f"{len(denied)} input devices could not be opened: {', '.join(denied)}")
        lines.append(explain_permission(denied[0]))
    return lines


def open_device(select: str) -> DeviceInfo:
    """The DeviceInfo of the device `select` names, or a ConfigError that lists what there is and,
    when devices were unreadable, how to get permission."""
    devices, denied = scan()
    info = pick(devices, select)
    if info is not None:
        return info
    what = f"device.select = {select!r}" if select else "a six-axis device"
    seen = "; ".join(f"{d.path} {d.name!r}" for d in devices) or "none"
    hint = f" {explain_permission(denied[0])}" if denied else ""
    raise ConfigError(f"{what}: not found (six-axis devices seen: {seen}).{hint} "
                      "Or use keyboard mode (--keyboard).")


class EvdevSource:
    """One evdev device as an EventSource (events.EventSource). On loss it yields `Gone` and looks for
    the device again every RETRY_S (same path when selected by path, else the same name); on its
    return it yields `Back` and the device's current state (absolute axes, held buttons), so the
    latch starts right. Event times are this process's monotonic clock at the read."""

    def __init__(self, info: DeviceInfo, clock: Any = time.monotonic) -> None:
        self.evdev = require_evdev()
        self.info = info
        self.path, self.name = info.path, info.name
        self._clock = clock
        self._dev: Any = None
        self._next_try = 0.0
        self._open(info.path)

    def _open(self, path: str) -> None:
        try:
            self._dev = self.evdev.InputDevice(path)
        except PermissionError:
            raise ConfigError(explain_permission(path)) from None
        except OSError as exc:
            raise field_error(ConfigError, "device", path, f"a device that can be opened ({exc})") from None
        self.path = path

    def fileno(self) -> int | None:
        return None if self._dev is None else self._dev.fd

    def close(self) -> None:
        if self._dev is not None:
            self._dev.close()
            self._dev = None

    def read(self, now_s: float) -> list[SourceItem]:
        if self._dev is None:
            return self._look_again(now_s)
        try:
            raw = list(self._dev.read())
        except BlockingIOError:
            return []
        except OSError as exc:
            if exc.errno in GONE_ERRNOS:
                self.close()
                self._next_try = now_s + RETRY_S
                return [Gone(now_s, f"{self.path}: {os.strerror(exc.errno)}")]
            raise
        items: list[SourceItem] = []
        for ev in raw:
            items.append(RawEvent(now_s, ev.type, ev.code, ev.value))
            if ev.type == EV_SYN and ev.code == SYN_DROPPED:
                items.extend(self._state(now_s))
        return items

    def _look_again(self, now_s: float) -> list[SourceItem]:
        if now_s < self._next_try:
            return []
        self._next_try = now_s + RETRY_S
        try:
            devices, _ = scan()
        except ConfigError:
            return []
        info = next((d for d in devices if d.name == self.info.name), None) or \
            next((d for d in devices if d.path == self.info.path), None)
        if info is None:
            return []
        try:
            self._open(info.path)
        except ConfigError:
            return []
        return [Back(now_s), *self._state(now_s)]

    def _state(self, now_s: float) -> list[RawEvent]:
        """The device's current absolute axes and held buttons as events, then SYN_REPORT."""
        events = []
        if self.info.kind == "absolute":
            for code in range(6):
                events.append(RawEvent(now_s, EV_ABS, code, int(self._dev.absinfo(code).value)))
        held = set(self._dev.active_keys())
        for code in self.info.buttons:
            events.append(RawEvent(now_s, EV_KEY, code, 1 if code in held else 0))
        events.append(RawEvent(now_s, EV_SYN, SYN_REPORT, 0))
        return events
