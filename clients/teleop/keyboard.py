"""Keyboard mode: press-and-hold keys in a terminal for the six axes, and keys for the operator's commands.

A terminal sends a character when a key goes down and then, while it stays down, the keyboard's
auto-repeat sends the same character again: first after the repeat delay (typically 250 to 600 ms),
then once per repeat period (typically 25 to 40 ms) (common practice; both are the desktop's
keyboard settings). It never sends a key release. So a key counts as held:

* from its first character until `first_gap` later (longer than the repeat delay: the first repeat
  must arrive before the hold lapses), then
* until `repeat_gap` after each repeated character (longer than the repeat period).

Consequences the operator should know (the README's teleop section says them too): letting go stops
the motion within `repeat_gap` (150 ms by default); a single short tap moves for up to `first_gap`
(700 ms by default; shorten it together with the desktop's repeat delay); and terminals repeat only
the key pressed last, so keyboard mode moves one axis at a time and any other key ends the hold at
once. The axis keys give full deflection (u = +-1); the same shaping and speed caps as a device follow.
"""

from __future__ import annotations

import os
import sys
import termios
import tty
from types import TracebackType

import numpy as np

#: Axis keys: character -> (twist axis 0..5 = vx, vy, vz, wx, wy, wz, sign).
AXIS_KEYS: dict[str, tuple[int, int]] = {
    "d": (0, 1), "a": (0, -1),
    "w": (1, 1), "s": (1, -1),
    "r": (2, 1), "f": (2, -1),
    "i": (3, 1), "k": (3, -1),
    "l": (4, 1), "j": (4, -1),
    "o": (5, 1), "u": (5, -1),
}
#: Command keys: character -> operator command (see twistrate.clients.teleop.session.COMMANDS).
COMMAND_KEYS: dict[str, str] = {
    "\r": "arm", "\n": "arm",
    " ": "stop",
    "t": "frame",
    "+": "faster", "=": "faster",
    "-": "slower",
    "m": "lock",
    "n": "dominant",
    "x": "quit",
}
#: One line for the screen.
KEY_HELP = ("keys: d/a w/s r/f = +-x +-y +-z, i/k l/j o/u = turn about +-x +-y +-z (hold); "
            "Enter enable, space stop, t frame, +/- speed, m lock, n dominant, x or Ctrl-C quit")


class KeyHold:
    """Which axis key is held, from the characters a terminal sends (module docstring).

    first_gap_s, repeat_gap_s : s, first_gap_s >= repeat_gap_s > 0."""

    def __init__(self, first_gap_s: float = 0.7, repeat_gap_s: float = 0.15) -> None:
        self.first_gap_s = float(first_gap_s)
        self.repeat_gap_s = float(repeat_gap_s)
        self.key: str | None = None
        self._until = 0.0

    def press(self, char: str, t_s: float) -> str | None:
        """A character arrived at t_s (s, monotonic). Returns the operator command it stands for, if
        any. Any character other than the held key ends that key's hold."""
        char = char.lower() if char.isalpha() else char
        if char in AXIS_KEYS:
            if char == self.key and t_s <= self._until:
                self._until = t_s + self.repeat_gap_s
            else:
                self.key, self._until = char, t_s + self.first_gap_s
            return None
        self.key = None
        return COMMAND_KEYS.get(char)

    def release_all(self) -> None:
        """Forget the held key (e.g. when the operator stops)."""
        self.key = None

    def deflection(self, now_s: float) -> np.ndarray:
        """u (6,) in twist order (vx, vy, vz, wx, wy, wz): +-1 on the held key's axis, 0 elsewhere."""
        u = np.zeros(6)
        if self.key is not None and now_s > self._until:
            self.key = None
        if self.key is not None:
            axis, sign = AXIS_KEYS[self.key]
            u[axis] = float(sign)
        return u


class TerminalKeys:
    """The terminal in character-at-a-time mode (no echo, no line buffering; Ctrl-C still interrupts).
    Restores the terminal on exit. `read()` returns the characters typed so far, without blocking;
    escape sequences (arrow and function keys) are dropped."""

    def __init__(self, fd: int | None = None) -> None:
        self.fd = sys.stdin.fileno() if fd is None else fd
        self._saved: list | None = None

    def __enter__(self) -> TerminalKeys:
        if os.isatty(self.fd):
            self._saved = termios.tcgetattr(self.fd)
            tty.setcbreak(self.fd)
        os.set_blocking(self.fd, False)
        return self

    def __exit__(self, exc_type: type[BaseException] | None, exc: BaseException | None,
                 tb: TracebackType | None) -> None:
        os.set_blocking(self.fd, True)
        if self._saved is not None:
            termios.tcsetattr(self.fd, termios.TCSADRAIN, self._saved)

    def fileno(self) -> int:
        return self.fd

    def read(self) -> str:
        try:
            data = os.read(self.fd, 1024)
        except (BlockingIOError, InterruptedError):
            return ""
        return strip_escapes(data.decode("utf-8", errors="ignore"))


def strip_escapes(text: str) -> str:
    """text without terminal escape sequences (ESC, optional '[' or 'O', parameters, final letter)."""
    out = []
    i = 0
    while i < len(text):
        if text[i] == "\x1b":
            i += 1
            if i < len(text) and text[i] in "[O":
                i += 1
            while i < len(text) and not text[i].isalpha() and text[i] != "~":
                i += 1
            i += 1
            continue
        out.append(text[i])
        i += 1
    return "".join(out)
