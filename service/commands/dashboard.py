"""`twistrate dashboard`: the web page watching one or more services (read-only).

    twistrate dashboard                                   the local service (default endpoints)
    twistrate dashboard --endpoints run/cell-a.json         a service started with --endpoints-file
    twistrate dashboard --config cell-a.toml --config cell-b.toml=bench --port 47380
    twistrate dashboard --connect far=tcp://cell-b:47311,tcp://cell-b:47312,far.key --client-key me.key_secret

The services are named as for `twistrate watch` (see its help). Serves http://HOST:PORT/ (loopback by
default; --host 0.0.0.0 to let other machines look). The page
shows each arm live and its 3-D view; nothing on it can move an arm. Needs the `watch` extra.
"""

from __future__ import annotations

import argparse
import sys

from twistrate.clients.watch.priority import add_nice_argument, lower_priority
from twistrate.service.commands.help_text import first_paragraph
from twistrate.service.commands.watch import add_target_arguments, feeds_from_args
from twistrate.solver.errors import TwistrateError

DEFAULT_PORT = 47380


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="twistrate dashboard", description=first_paragraph(__doc__))
    add_target_arguments(parser)
    parser.add_argument("--host", default="127.0.0.1", help="address to serve the page on (default loopback)")
    parser.add_argument("--port", type=int, default=DEFAULT_PORT, help=f"port (default {DEFAULT_PORT})")
    parser.add_argument("--seconds", type=float, default=None, help="stop after this many seconds")
    add_nice_argument(parser)
    args = parser.parse_args(argv)
    try:
        import aiohttp  # noqa: F401
        import uvloop
    except ImportError:
        print(
            "twistrate dashboard: aiohttp is missing; install the watch extra: pip install -e '.[watch]'",
            file=sys.stderr,
        )
        return 2
    from twistrate.clients.watch.dashboard import Dashboard, serve
    from twistrate.clients.watch.model import Fleet
    from twistrate.clients.watch.terminal import CAUTIONS

    lower_priority(args.nice)  # before any thread starts (the feeds start theirs in serve)
    print("\n".join(CAUTIONS), flush=True)
    try:
        feeds = feeds_from_args(args)
    except TwistrateError as exc:
        print(f"twistrate dashboard: {exc}", file=sys.stderr)
        return 2
    try:
        uvloop.run(serve(Dashboard(Fleet(), feeds), args.host, args.port, args.seconds))
    except OSError as exc:
        print(
            f"twistrate dashboard: cannot serve on {args.host}:{args.port}: {exc.strerror or exc}",
            file=sys.stderr,
        )
        return 2
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
