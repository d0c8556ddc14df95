"""The services a watcher (`twistrate dashboard`, `twistrate watch`) follows, from the command line.

Two ways to name a service, mixed freely and repeated for more arms:

    --config FILE[=NAME]                       a service configuration: its output and control
                                               endpoints, health thresholds and, when it uses CURVE,
                                               its public key (NAME.key beside its NAME.key_secret)
    --connect NAME=OUTPUT,CONTROL[,KEYFILE]    endpoints of a service on this machine or another one;
                                               KEYFILE: the service's public key file when it uses CURVE

With CURVE, `--client-key FILE` is this watcher's own NAME.key_secret (from `twistrate keys`; the
service's allow-list must hold its public key). Keys are handed to the client library as it takes them.
"""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import Any

from twistrate.clients.link import CurveKeys, Endpoints
from twistrate.clients.watch.wire_feed import WireFeed
from twistrate.solver.errors import InputError, field_error

#: a bind address that means "every interface": a watcher on this machine connects to loopback
_ANY = ("tcp://0.0.0.0:", "tcp://*:")


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--config",
        action="append",
        default=[],
        metavar="FILE[=NAME]",
        help="a service configuration to follow (repeat for more arms)",
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


def _connectable(endpoint: str) -> str:
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
    narrow = getattr(h, "narrow_below_m", None)
    pinched = getattr(h, "pinched_below_m", None)
    if narrow is None:  # the names before the health states were renamed
        narrow, pinched = h.approaching_below, h.holding_below
    return float(narrow), float(pinched)


def feeds_from_args(args: argparse.Namespace) -> list[WireFeed]:
    """One WireFeed per --config and --connect, with unique names. Raises InputError / ConfigError."""
    from twistrate.service.config import load_config

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
                Endpoints(_connectable(ep.intake), _connectable(ep.output), _connectable(ep.control)),
                _curve(server_key, args.client_key, path),
                topics,
                _thresholds(config),
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
