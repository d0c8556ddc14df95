"""`twistrate check CONFIG`: validate a service configuration and its arm without starting anything (no
socket, no file): the same loading and the same messages as `twistrate serve`. Exit 0 when it would
start, 2 with the problem otherwise.

    twistrate check configs/service/driver.toml
"""

from __future__ import annotations

import argparse
import sys

from twistrate.service.commands.help_text import first_paragraph
from twistrate.service.config import ServiceConfig, load_config
from twistrate.service.recorder import TIME_PLACEHOLDER
from twistrate.service.tunables import tunable_ranges
from twistrate.solver.arm import Arm
from twistrate.solver.errors import TwistrateError


def describe(config: ServiceConfig, arm: Arm) -> list[str]:
    """What serve would run with this configuration, in a few lines."""
    joints = "its built-in simulated arm" if config.simulation.enabled else "joint state from a driver"
    ep = config.endpoints
    rec = config.recorder
    t = config.tunables()  # the speed caps in effect (angular_max from either key)
    recording = "off" if not rec.path else (
        f"{rec.path} (at most {rec.max_mb:g} MB"
        + (", a new file per start)" if TIME_PLACEHOLDER in rec.path else "; refused if it exists)"))
    return [
        f"  arm {arm.name}: {arm.n} joints ({', '.join(arm.joint_names)}), {joints}",
        f"  tick {config.tick.rate_hz:g} Hz, health {config.tick.health_hz:g} Hz; speed caps "
        f"{t.linear_max:g} m/s, {t.angular_max:g} rad/s" + ("; reduced speed" if t.reduced_speed else ""),
        f"  endpoints: intake {ep.intake}, output {ep.output}, control {ep.control}"
        + ("; CURVE" if config.security.curve else ""),
        f"  recording: {recording}",
        f"  run-time tunables (twistrate set): {', '.join(tunable_ranges())}",
    ]


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="twistrate check", description=first_paragraph(__doc__))
    parser.add_argument("config", help="the service TOML file")
    parser.add_argument("--quiet", "-q", action="store_true", help="print nothing when it is valid")
    args = parser.parse_args(argv)
    try:
        config = load_config(args.config)
        arm = config.load_arm()
        config.solver_options(arm)  # the per-joint lists against the arm, as the service does
        config.initial_posture(arm)
    except TwistrateError as exc:
        print(f"twistrate check: {exc}", file=sys.stderr)
        return 2
    if not args.quiet:
        print(f"{args.config}: valid")
        print("\n".join(describe(config, arm)))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
