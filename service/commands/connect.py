"""Where a command finds a running service: `--config FILE` (its endpoints) or `--endpoints-file FILE`
(what `twistrate serve --endpoints-file` wrote); neither: the packaged demo configuration's endpoints.
Shared by the commands that talk to a running service (status, set)."""

from __future__ import annotations

import argparse

from twistrate.clients.link import Endpoints
from twistrate.service.config import load_config
from twistrate.service.wire.discovery import read_endpoints


def add_endpoint_args(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--config", help="the service's TOML file (its endpoints)")
    parser.add_argument("--endpoints-file", metavar="FILE",
                        help="the endpoints `twistrate serve --endpoints-file FILE` wrote (instead of "
                             "--config)")


def endpoints_from(args: argparse.Namespace) -> Endpoints:
    """The endpoints the arguments name. Raises ConfigError (a bad config or endpoints file)."""
    ep = read_endpoints(args.endpoints_file) if args.endpoints_file else \
        load_config(args.config).endpoints.model_dump()
    return Endpoints(ep["intake"], ep["output"], ep["control"])
