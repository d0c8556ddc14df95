"""`twistrate teleop`: jog the arm of a running service from a six-axis hand controller or the keyboard.

    twistrate teleop --list                     the six-axis input devices here (and unreadable ones)
    twistrate teleop [--device PATH|NAME]       jog with a hand controller (the `teleop` extra)
    twistrate teleop --keyboard                 jog with held keys in this terminal

The operator enables motion with Enter; motion needs the hold button held (unless the profile says
hold_to_move = false); letting go of the controller stops the arm; space stops and disables; x or
Ctrl-C quits (zeros, disable, release). One live line shows the frame, speed scale, lock, the twist
sent, the service's mode, health state and achieved scale, and why the arm does not move when it does
not. The profile (--profile, default configs/teleop/default.toml) holds the device mapping and the
pipeline's constants.
"""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import os
import sys
from typing import Any

from twistrate.clients.alink import AsyncLink
from twistrate.clients.linkbase import CurveKeys, Endpoints
from twistrate.clients.teleop import evdev_source
from twistrate.clients.teleop.core import TeleopCore, check_buttons
from twistrate.clients.teleop.keyboard import KEY_HELP, TerminalKeys
from twistrate.clients.teleop.line import PlainLine, RichLine
from twistrate.clients.teleop.profile import load_profile
from twistrate.clients.teleop.run import TeleopRun
from twistrate.service import wire
from twistrate.service.commands.help_text import first_paragraph
from twistrate.service.wire.discovery import read_endpoints
from twistrate.solver.errors import ConfigError, TwistrateError

CAUTIONS = (
    "CAUTIONS",
    "  - twistrate is not a safety-rated function; neither is this jogging program.",
    "  - A hardware emergency stop and an enabling device are required, within the operator's reach.",
    "  - Do a risk assessment per the applicable standards (e.g. ISO 10218-1/-2, ISO 12100).",
    "  - Try in simulation and at reduced speed first.",
    "  - Defer to local codes and licensed practice.",
    "  - Letting go of the controller (or the hold button) stops the arm; x or Ctrl-C quits.",
)
#: Lease asked for, ms: short, so a crashed client stops the arm soon (renewed every third).
DEFAULT_LEASE_MS = 1000


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="twistrate teleop", description=first_paragraph(__doc__))
    p.add_argument("--list", action="store_true", help="list six-axis input devices and exit")
    p.add_argument("--device", help="device path (/dev/input/eventN) or part of its name "
                                    "(default: the profile's device.select, else the first six-axis device)")
    p.add_argument("--keyboard", action="store_true", help="jog with held keys instead of a device")
    p.add_argument("--profile", help="teleop profile TOML (default: the packaged default profile)")
    for name, default in (("intake", wire.DEFAULT_INTAKE), ("output", wire.DEFAULT_OUTPUT),
                          ("control", wire.DEFAULT_CONTROL)):
        p.add_argument(f"--{name}", default=default, help=f"the service's {name} endpoint ({default})")
    p.add_argument("--endpoints-file", help="read the endpoints from the file `twistrate serve "
                                            "--endpoints-file` writes (instead of the three above)")
    p.add_argument("--server-key", help="the service's public key file (CURVE; with --client-key)")
    p.add_argument("--client-key", help="this client's secret key file (CURVE; with --server-key)")
    p.add_argument("--client", default="teleop", help="client name sent with the claim (default teleop)")
    p.add_argument("--lease-ms", type=int, default=DEFAULT_LEASE_MS,
                   help=f"lease duration asked for, ms (default {DEFAULT_LEASE_MS})")
    p.add_argument("--seconds", type=float, help="quit after this long, s (default: run until quit)")
    p.add_argument("--plain", action="store_true", help="a plain status line (no colours)")
    return p


def _fail(message: str, code: int = 1) -> int:
    print(f"twistrate teleop: {message}", file=sys.stderr)
    return code


def _list() -> int:
    try:
        devices, denied = evdev_source.scan()
    except ConfigError as exc:
        return _fail(str(exc))
    print("\n".join(evdev_source.describe(devices, denied)))
    return 0


async def _session(args: argparse.Namespace, core: TeleopCore, keys: Any, show: Any) -> int:
    curve = CurveKeys.from_files(args.server_key, args.client_key) if args.server_key else None
    if args.endpoints_file:
        endpoints = Endpoints(**read_endpoints(args.endpoints_file))
    else:
        endpoints = Endpoints(args.intake, args.output, args.control)
    async with AsyncLink(endpoints, curve, client=args.client, renew=False, timeout_s=1.0) as link:
        await link.wait_ready(3.0)
        await link.arm()
        try:
            return await TeleopRun(core, link, keys=keys, show=show, lease_ms=args.lease_ms).run(args.seconds)
        finally:
            if link.lease is not None:  # a claim whose reply came after the quit: give it back
                with contextlib.suppress(TwistrateError):
                    await link.release()


def main(argv: list[str] | None = None) -> int:
    args = _parser().parse_args(argv)
    print("\n".join(CAUTIONS), flush=True)
    print(flush=True)
    if args.list:
        return _list()
    if bool(args.server_key) != bool(args.client_key):
        return _fail("--server-key and --client-key go together (CURVE needs both)", 2)
    if not wire.LEASE_MS_MIN <= args.lease_ms <= wire.LEASE_MS_MAX:
        return _fail(f"--lease-ms: got {args.lease_ms}; accepted: {wire.LEASE_MS_MIN} to {wire.LEASE_MS_MAX} "
                     "(and within the service's [lease] range)", 2)
    if args.seconds is not None and not 0.0 < args.seconds <= 86400.0:
        return _fail(f"--seconds: got {args.seconds:g}; accepted: 0 < seconds <= 86400", 2)
    try:
        profile = load_profile(args.profile)
        if args.keyboard:
            if not os.isatty(sys.stdin.fileno()):
                return _fail("keyboard mode needs a terminal on standard input", 2)
            core = TeleopCore(profile, client=args.client)
        else:
            info = evdev_source.open_device(args.device if args.device is not None else profile.device.select)
            for note in check_buttons(profile, info):
                print(f"note: {note}")
            core = TeleopCore(profile, evdev_source.EvdevSource(info), info, client=args.client)
            print(f"device {info.path} {info.name!r}: {info.kind} axes, {len(info.buttons)} buttons; "
                  f"hands off for {profile.device.settle_ms:g} ms while the rest offset is taken")
    except TwistrateError as exc:
        return _fail(str(exc), 2)
    print(KEY_HELP if args.keyboard else
          "keys: Enter enable, space stop, t frame, +/- speed, m lock, n dominant, x or Ctrl-C quit")
    tty = os.isatty(sys.stdin.fileno())
    if tty:
        print("motion is disabled: press Enter to enable" +
              ("; hold the hold button to move" if profile.motion.hold_to_move and not args.keyboard else ""))
    else:
        print("motion is disabled and stays so: standard input is not a terminal, so nobody can press "
              "Enter to enable (run it in a terminal)")
    line: Any = PlainLine(sys.stdout)
    if not args.plain and sys.stdout.isatty():
        with contextlib.suppress(ImportError):  # rich comes with the teleop extra
            line = RichLine()
    try:
        import uvloop

        runner = uvloop.run
    except ImportError:
        runner = asyncio.run
    try:
        if tty:
            with TerminalKeys() as keys, line:
                sent = runner(_session(args, core, keys, line))
        else:
            with line:
                sent = runner(_session(args, core, None, line))
    except TwistrateError as exc:
        return _fail(str(exc))
    except KeyboardInterrupt:
        return 130
    finally:
        if core.source is not None:
            core.source.close()
    print(f"{sent} twists sent; motion disabled and the lease released")
    return 0
