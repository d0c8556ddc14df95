"""`twistrate watch`: the arms in a terminal (rich), a panel per arm, 80 columns, redrawn in place.

    twistrate watch                                      the local service (default endpoints)
    twistrate watch --config cell-a.toml --config cell-b.toml=bench
    twistrate watch --connect far=tcp://cell-b:47311,tcp://cell-b:47312 --screen

Read-only: nothing here can move an arm. Ctrl-C quits. Needs the `watch` extra.

Three ways to name a service, mixed freely and repeated for more arms (the page or screen shows
them in that order):

    --config FILE[=NAME]                       a service configuration: its output and control
                                               endpoints, health thresholds and, when it uses CURVE,
                                               its public key (NAME.key beside its NAME.key_secret)
    --endpoints FILE[=NAME]                    the endpoints file of a running service (`twistrate serve
                                               --endpoints-file FILE`)
    --connect NAME=OUTPUT,CONTROL[,KEYFILE]    endpoints of a service on this machine or another one;
                                               KEYFILE: the service's public key file when it uses CURVE

With CURVE, `--client-key FILE` is this watcher's own NAME.key_secret (from `twistrate keys`; the
service's allow-list must hold its public key). Keys are handed to the client library as it takes them.
"""

from __future__ import annotations

import argparse
import contextlib
import sys
from pathlib import Path
from typing import Any

from twistrate.clients.link import CurveKeys, Endpoints
from twistrate.clients.watch.wire_feed import WireFeed
from twistrate.service.commands.help_text import first_paragraph
from twistrate.service.config import load_config
from twistrate.service.wire.discovery import read_endpoints
from twistrate.solver.errors import InputError, TwistrateError, field_error

#: a bind address that means "every interface": a watcher on this machine connects to loopback
_ANY = ("tcp://0.0.0.0:", "tcp://*:")


def add_target_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--config",
        action="append",
        default=[],
        metavar="FILE[=NAME]",
        help="a service configuration to follow (repeat for more arms)",
    )
    parser.add_argument(
        "--endpoints",
        action="append",
        default=[],
        metavar="FILE[=NAME]",
        help="the endpoints file of a running service (serve --endpoints-file; repeat for more arms)",
    )
    parser.add_argument(
        "--connect",
        action="append",
        default=[],
        metavar="NAME=OUTPUT,CONTROL[,KEYFILE]",
        help="a service's output and control endpoints (repeat for more arms)",
    )
    parser.add_argument(
        "--client-key", metavar="FILE", help="this watcher's NAME.key_secret, for services that use CURVE"
    )
    parser.add_argument(
        "--commands",
        action="store_true",
        help="also subscribe to the command stream (every tick; joint rates without `state`)",
    )


def _connectable(endpoint: str, where: str) -> str:
    """A configured bind endpoint as a watcher on this machine connects to it."""
    if endpoint.endswith(":*"):
        raise field_error(
            InputError,
            where,
            endpoint,
            "a fixed port (this configuration lets the operating "
            "system pick it: give --endpoints FILE, from `twistrate serve --endpoints-file`)",
        )
    for prefix in _ANY:
        if endpoint.startswith(prefix):
            return "tcp://127.0.0.1:" + endpoint[len(prefix) :]
    return endpoint


def _curve(server_key: str | None, client_key: str | None, who: str) -> CurveKeys | None:
    if server_key is None:
        return None
    if client_key is None:
        raise field_error(
            InputError, "--client-key", None, f"this watcher's NAME.key_secret ({who} uses CURVE)"
        )
    public = Path(server_key)
    if public.suffix == ".key_secret" and public.with_suffix(".key").exists():
        public = public.with_suffix(".key")  # read only the public half
    return CurveKeys.from_files(public, client_key)


def _thresholds(config: Any) -> tuple[float, float]:
    h = config.health_thresholds()
    return float(h.narrow_below), float(h.pinched_below)


def feeds_from_args(args: argparse.Namespace) -> list[WireFeed]:
    """One WireFeed per --config, --endpoints and --connect, with unique names.

    Raises InputError / ConfigError naming the option and the value."""
    topics = (b"health", b"event", b"state") + ((b"command",) if args.commands else ())
    feeds: list[WireFeed] = []
    for text in args.config:
        path, _, name = text.partition("=")
        config = load_config(path)
        name = name or Path(path).stem
        ep = config.endpoints
        server_key = config.security.server_secret_key if config.security.curve else None
        feeds.append(
            WireFeed(
                name,
                Endpoints(
                    _connectable(ep.intake, f"{path}: endpoints.intake"),
                    _connectable(ep.output, f"{path}: endpoints.output"),
                    _connectable(ep.control, f"{path}: endpoints.control"),
                ),
                _curve(server_key, args.client_key, path),
                topics,
                _thresholds(config),
            )
        )
    for text in args.endpoints:
        path, _, name = text.partition("=")
        ep = read_endpoints(path)
        feeds.append(
            WireFeed(
                name or Path(path).stem,
                Endpoints(ep["intake"], ep["output"], ep["control"]),
                _curve(None, args.client_key, path),
                topics,
            )
        )
    for text in args.connect:
        name, _, rest = text.partition("=")
        parts = rest.split(",")
        if (
            not name
            or len(parts) not in (2, 3)
            or not all(p.startswith(("tcp://", "ipc://")) for p in parts[:2])
        ):
            raise field_error(
                InputError,
                "--connect",
                text,
                "NAME=OUTPUT,CONTROL[,KEYFILE], e.g. cell-a=tcp://127.0.0.1:47311,tcp://127.0.0.1:47312",
            )
        key = parts[2] if len(parts) == 3 else None
        feeds.append(
            WireFeed(
                name, Endpoints(output=parts[0], control=parts[1]), _curve(key, args.client_key, name), topics
            )
        )
    names = [f.name for f in feeds]
    for n in names:
        if names.count(n) > 1:
            raise field_error(InputError, "arm names", n, "a unique name per service (FILE=NAME or NAME=...)")
    if not feeds:  # the service of the packaged configuration, on its default loopback endpoints
        feeds.append(WireFeed("local", Endpoints(), None, topics, _thresholds(load_config(None))))
    return feeds


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="twistrate watch", description=first_paragraph(__doc__))
    add_target_arguments(parser)
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
        feeds = feeds_from_args(args)
    except TwistrateError as exc:
        print(f"twistrate watch: {exc}", file=sys.stderr)
        return 2
    with contextlib.suppress(KeyboardInterrupt):
        uvloop.run(run_monitor(Fleet(), feeds, args.seconds, args.screen))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
