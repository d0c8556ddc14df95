"""The live status line of `twistrate teleop`: what is selected, what was sent, what the service says,
and why the arm does not move when it does not.

    base x0.25  lock none  v [+0.012 +0.000 +0.000] m/s  w [+0.000 +0.000 +0.000] rad/s
        | running clear 1.00 | moving          (one line on screen)

`text(view)` is the plain form (logs, tests, terminals without rich); `RichLine` draws it in place with
rich (the `teleop` extra) and colours the parts that need attention.
"""

from __future__ import annotations

from typing import Any

from twistrate.clients.teleop.session import View


def _vec(values: tuple[float, ...]) -> str:
    return "[" + " ".join(f"{v:+.3f}" for v in values) + "]"


def parts(view: View) -> list[tuple[str, str]]:
    """(text, style) pieces of the line; style is a rich style name or ""."""
    achieved = "-" if view.achieved is None else f"{view.achieved:.2f}"
    motion = "moving" if not view.why and any(view.linear + view.angular) else \
        ("ready" if not view.why else "stopped: " + "; ".join(view.why))
    service_style = "red" if view.mode == "fault" else \
        ("yellow" if view.health not in (None, "clear", "normal") else "")
    out = [
        (f"{view.frame:<4}", "bold cyan"),
        (f" x{view.scale:g}", "bold"),
        (f"  lock {view.lock}" + ("  dominant" if view.dominant else ""), ""),
        (f"  v {_vec(view.linear)} m/s  w {_vec(view.angular)} rad/s", ""),
        (f" | {view.mode or '-'} {view.health or '-'} {achieved}", service_style),
        (f" | {motion}", "green" if motion == "moving" else ("" if motion == "ready" else "bold yellow")),
    ]
    if view.notice:
        out.append((f" | {view.notice}", "dim"))
    return out


def text(view: View) -> str:
    return "".join(piece for piece, _ in parts(view))


class RichLine:
    """Draws the line in place with rich.live. Use as a context manager; call it with each View."""

    def __init__(self, console: Any = None) -> None:
        from rich.console import Console
        from rich.live import Live

        self.console = console or Console()
        self._live = Live(console=self.console, auto_refresh=False, transient=False)

    def __enter__(self) -> RichLine:
        self._live.__enter__()
        return self

    def __exit__(self, *exc: object) -> None:
        self._live.__exit__(None, None, None)

    def __call__(self, view: View) -> None:
        from rich.text import Text

        line = Text()
        for piece, style in parts(view):
            line.append(piece, style=style or None)
        self._live.update(line, refresh=True)


class PlainLine:
    """The line for terminals without rich: redrawn in place with a carriage return."""

    def __init__(self, stream: Any) -> None:
        self.stream = stream

    def __enter__(self) -> PlainLine:
        return self

    def __exit__(self, *exc: object) -> None:
        self.stream.write("\n")
        self.stream.flush()

    def __call__(self, view: View) -> None:
        self.stream.write("\r\x1b[K" + text(view))
        self.stream.flush()
