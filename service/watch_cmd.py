"""`twistrate watch`: the arms in a terminal (rich), a panel per arm, 80 columns, redrawn in place.

    twistrate watch                                      the local service (default endpoints)
    twistrate watch --config cell-a.toml --config cell-b.toml=bench
    twistrate watch --connect far=tcp://cell-b:47311,tcp://cell-b:47312 --screen

Read-only: nothing here can move an arm. Ctrl-C quits. Needs the `watch` extra.
"""

from __future__ import annotations

import argparse
import contextlib
import sys

from twistrate.service import watch_targets
from twistrate.solver.errors import TwistrateError


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="twistrate watch", description=__doc__.splitlines()[0])
    watch_targets.add_arguments(parser)
    parser.add_argument("--screen", action="store_true", help="draw on the terminal's alternate screen")
    parser.add_argument("--seconds", type=float, default=None, help="stop after this many seconds")
    args = parser.parse_args(argv)
    try:
        import rich  # noqa: F401
        import uvloop
    except ImportError:
        print(
            "twistrate watch: rich is missing; install the watch extra: pip install -e '.[watch]'",
            file=sys.stderr,
        )
        return 2
    from twistrate.clients.watch.model import Fleet
    from twistrate.clients.watch.monitor import run_monitor

    try:
        feeds = watch_targets.feeds_from_args(args)
    except TwistrateError as exc:
        print(f"twistrate watch: {exc}", file=sys.stderr)
        return 2
    with contextlib.suppress(KeyboardInterrupt):
        uvloop.run(run_monitor(Fleet(), feeds, args.seconds, args.screen))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
