"""`twistrate set NAME=VALUE ...`: change run-time tunables of a running service (control op `set`, all
or nothing, the same errors), then print every tunable's value.

    twistrate set [--config FILE | --endpoints-file FILE] damping_max=0.05 reduced_speed=true

`set` needs the lease. This command claims it, sets, and releases it (releasing disables motion), so it
works while no client holds the lease; while one does (a twist source driving the arm), that client
sends `set` itself (`Link.set`) and this command says who holds it. VALUE is a TOML value (a number,
true / false); anything else is taken as a string (a damping policy name).
"""

from __future__ import annotations

import argparse
import json
import sys
import tomllib
from typing import Any

from twistrate.clients.link import Link
from twistrate.clients.probe import PROBE_TIMEOUT_S, probe
from twistrate.service.commands.connect import add_endpoint_args, endpoints_from
from twistrate.service.commands.help_text import first_paragraph
from twistrate.solver.errors import ControlError, InputError, TwistrateError, field_error

#: the name this command claims the lease under
CLIENT = "twistrate-set"


def parse_assignments(items: list[str]) -> dict[str, Any]:
    """{name: value} of NAME=VALUE arguments (VALUE a TOML value, else a string). Raises InputError."""
    out: dict[str, Any] = {}
    for item in items:
        name, sep, text = item.partition("=")
        name = name.strip()
        if not sep or not name or not text.strip():
            raise field_error(InputError, "argument", item, "NAME=VALUE, e.g. damping_max=0.05")
        try:
            value = tomllib.loads(f"v = {text.strip()}")["v"]
        except tomllib.TOMLDecodeError:
            value = text.strip()
        out[name] = value
    return out


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="twistrate set", description=first_paragraph(__doc__))
    add_endpoint_args(parser)
    parser.add_argument("assignments", nargs="+", metavar="NAME=VALUE", help="tunables to change")
    parser.add_argument("--json", action="store_true", help="print the tunables after the change as JSON")
    args = parser.parse_args(argv)
    try:
        params = parse_assignments(args.assignments)
        endpoints = endpoints_from(args)
        probe(endpoints, PROBE_TIMEOUT_S)
    except TwistrateError as exc:
        print(f"twistrate set: {exc}", file=sys.stderr)
        return 2 if isinstance(exc, InputError) else 1
    try:
        with Link(endpoints, topics=(), timeout_s=PROBE_TIMEOUT_S, client=CLIENT) as link:
            link.claim()
            try:
                result = link.set(params)
            finally:
                link.release()
    except ControlError as exc:
        print(f"twistrate set: {exc}", file=sys.stderr)
        return 2 if exc.code == "bad_argument" else 1
    except TwistrateError as exc:
        print(f"twistrate set: {exc}", file=sys.stderr)
        return 1
    if args.json:
        print(json.dumps(result, indent=2))
    else:
        width = max(len(k) for k in result)
        for key, value in result.items():
            mark = "  (changed)" if key in params else ""
            print(f"{key:<{width}} = {json.dumps(value)}{mark}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
