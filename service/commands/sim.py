"""`twistrate sim`: the simulated arm as its own process, playing a robot driver over the wire protocol
(twistrate.service.sim_driver). The service must run with `[simulation] enabled = false` to use it."""

from __future__ import annotations

import argparse
import signal
import sys

from twistrate.clients.link import Endpoints
from twistrate.clients.probe import PROBE_TIMEOUT_S, probe
from twistrate.service.commands.help_text import first_paragraph
from twistrate.service.config import load_config
from twistrate.service.sim_driver import SimDriver
from twistrate.service.wire.discovery import read_endpoints
from twistrate.solver.errors import TwistrateError

#: How long `--endpoints-file` waits for the service to write the file, s.
ENDPOINTS_WAIT_S = 20.0


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="twistrate sim", description=first_paragraph(__doc__))
    parser.add_argument("--config", help="the service's TOML file (endpoints, arm, simulation settings)")
    parser.add_argument("--rate", type=float, help="joint-state publish rate, Hz (default: the tick rate)")
    parser.add_argument("--seconds", type=float, help="stop after this long (default: until SIGINT/SIGTERM)")
    parser.add_argument("--endpoints-file", metavar="FILE",
                        help="connect to the endpoints `twistrate serve --endpoints-file FILE` wrote (waits "
                             f"up to {ENDPOINTS_WAIT_S:g} s for it) instead of the configured ones")
    args = parser.parse_args(argv)
    try:
        config = load_config(args.config)
        endpoints = read_endpoints(args.endpoints_file, ENDPOINTS_WAIT_S) if args.endpoints_file else None
    except TwistrateError as exc:
        print(f"twistrate sim: {exc}", file=sys.stderr)
        return 2
    ep = endpoints or config.endpoints.model_dump()
    try:  # a driver with nobody to drive, or a second arm for a service simulating its own, is a mistake
        status = probe(Endpoints(ep["intake"], ep["output"], ep["control"]), PROBE_TIMEOUT_S)
    except TwistrateError as exc:
        print(f"twistrate sim: {exc}", file=sys.stderr)
        return 1
    if status.get("simulated"):
        print(f"twistrate sim: the service on {ep['control']} simulates its arm itself and refuses outside "
              "joint state; run it with [simulation] enabled = false to drive it from here", file=sys.stderr)
        return 1
    try:
        driver = SimDriver(config, rate_hz=args.rate, endpoints=endpoints)
    except TwistrateError as exc:
        print(f"twistrate sim: {exc}", file=sys.stderr)
        return 2
    signal.signal(signal.SIGINT, driver.stop)
    signal.signal(signal.SIGTERM, driver.stop)
    print(f"twistrate sim: {driver.arm.name} ({driver.arm.n} joints) at {driver.rate_hz:g} Hz; commands from "
          f"{driver.endpoints['output']}, joint state to {driver.endpoints['intake']}", file=sys.stderr,
          flush=True)
    try:
        driver.run(args.seconds)
    finally:
        driver.close()
    print(f"twistrate sim: stopped after {driver.seq} joint states, {driver.received} commands",
          file=sys.stderr)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
