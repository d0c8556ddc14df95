"""Test helpers for the teleop tests: an operator who presses Enter once the lease is there, and a
replayed stream that starts when motion is enabled (a loaded machine may delay the claim's reply;
the stream must not begin while the session still waits for it)."""

from __future__ import annotations

from dataclasses import replace

from twistrate.clients.teleop.events import ReplaySource, SourceItem


class Operator:
    """A key reader that types Enter whenever the session holds the lease, is not enabled, and the
    controller is at rest; `extra` [(time after the first read s, chars)] types more."""

    def __init__(self, session, extra=()) -> None:
        self.session = session
        self.extra = list(extra)
        self.t0: float | None = None

    def read(self) -> str:
        import time

        now = time.monotonic()
        self.t0 = now if self.t0 is None else self.t0
        out = ""
        while self.extra and self.extra[0][0] <= now - self.t0:
            out += self.extra.pop(0)[1]
        s = self.session
        if s.lease and not s.armed and not s._enabling and s.shaped.rest and not s.closed:
            out += "\r"
        return out


class StartWhenEnabled:
    """A ReplaySource whose item times count from the first read after the session is enabled."""

    def __init__(self, items: list[SourceItem], session) -> None:
        self.items, self.session = items, session
        self.path, self.name = "replay", "replayed stream"
        self._inner: ReplaySource | None = None

    def read(self, now_s: float) -> list[SourceItem]:
        if self._inner is None:
            if not self.session.armed:
                return []
            self._inner = ReplaySource([replace(item, t_s=item.t_s + now_s) for item in self.items])
        return self._inner.read(now_s)

    def fileno(self) -> int | None:
        return None

    def close(self) -> None:
        pass

    @property
    def finished(self) -> bool:
        return self._inner is not None and self._inner.finished
