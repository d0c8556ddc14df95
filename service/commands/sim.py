"""`twistrate sim`: the simulated arm as its own process, playing a robot driver over the wire protocol
(twistrate.service.sim_driver). The service must run with `[simulation] enabled = false` to use it."""

from __future__ import annotations

import argparse
import signal
import sys

from twistrate.service.config import load_config
from twistrate.service.sim_driver import SimDriver
from twistrate.solver.errors import TwistrateError


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="twistrate sim", description=__doc__.splitlines()[0])
    parser.add_argument("--config", help="the service's TOML file (endpoints, arm, simulation settings)")
    parser.add_argument("--rate", type=float, help="joint-state publish rate, Hz (default: the tick rate)")
    parser.add_argument("--seconds", type=float, help="stop after this long (default: until SIGINT/SIGTERM)")
    args = parser.parse_args(argv)
    try:
        config = load_config(args.config)
        driver = SimDriver(config, rate_hz=args.rate)
    except TwistrateError as exc:
        print(f"twistrate sim: {exc}", file=sys.stderr)
        return 2
    signal.signal(signal.SIGINT, driver.stop)
    signal.signal(signal.SIGTERM, driver.stop)
    print(f"twistrate sim: {driver.arm.name} ({driver.arm.n} joints) at {driver.rate_hz:g} Hz; commands from "
          f"{config.endpoints.output}, joint state to {config.endpoints.intake}", file=sys.stderr, flush=True)
    try:
        driver.run(args.seconds)
    finally:
        driver.close()
    print(f"twistrate sim: stopped after {driver.seq} joint states, {driver.received} commands",
          file=sys.stderr)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
