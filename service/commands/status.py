"""`twistrate status`: one look at a running service, or one line saying that none answers (exit 1).

It shows the mode, the lease holder, the health state, the counters, the tick timing, the nearest
keep-out pair and what limits the scale.

    twistrate status [--config FILE | --endpoints-file FILE] [--json]
"""

from __future__ import annotations

import argparse
import json
import sys
from typing import Any

from twistrate.clients.link import Link
from twistrate.clients.probe import PROBE_TIMEOUT_S, probe
from twistrate.service.commands.connect import add_endpoint_args, endpoints_from
from twistrate.service.commands.help_text import first_paragraph
from twistrate.solver.errors import TwistrateError


def _us(ns: int | None) -> str:
    return "n/a" if ns is None else f"{ns / 1000:.0f} us"


def keepout_text(status: dict[str, Any]) -> str:
    """The status reply's nearest keep-out pair and limiting constraint, in words."""
    ko, lim = status.get("keepout"), status.get("limiting") or {}
    if ko is None:
        near = "keep-out none configured"
    else:
        kind = "itself" if ko.get("other_kind") == "link" else "zone"
        near = f"keep-out nearest {ko['nearest_m']:.4f} m: {ko['link']} to {ko['other']} ({kind})"
    by = lim.get("by")
    if by == "joint":
        what = f"joint {lim.get('joint')} ({lim.get('bound')} bound)"
    elif by == "keepout":
        what = f"keep-out {lim.get('link')} to {lim.get('other')}"
    else:
        what = by or "n/a"
    return f"{near}; scale limited by {what}"


def format_status(status: dict[str, Any], counters: dict[str, int]) -> list[str]:
    """The readable lines of a status and counters reply."""
    holder = status.get("holder")
    lease = "free" if holder is None else f"held by {holder!r} ({status.get('lease_remaining_ms')} ms left)"
    mode = status["mode"] + (f" ({status['fault']})" if status.get("fault") else "")
    ticks = counters.get("ticks", status.get("tick", 0))
    overruns = counters.get("overruns", 0)
    share = f"{100.0 * overruns / ticks:.2f} %" if ticks else "n/a"
    age, twist_age = status.get("joints_age_ms"), status.get("twist_age_ms")
    joints = "simulated" if status["simulated"] else "from a driver"
    lines = [
        f"service: {status['arm']} ({status['n']} joints, {joints}),"
        f" tick {status['tick_hz']:g} Hz, {'real-time' if status.get('realtime') else 'normal'} scheduling",
        f"  mode {mode}; lease {lease}; health {status['health']}"
        f"{'; reduced speed' if status.get('reduced_speed') else ''}",
        f"  ticks {ticks}, overruns {overruns} ({share}); lateness median "
        f"{_us(counters.get('lateness_median_ns'))}, p99 {_us(counters.get('lateness_p99_ns'))}, max "
        f"{_us(counters.get('lateness_max_ns'))}; tick work p99 {_us(counters.get('tick_work_p99_ns'))}",
        f"  twists accepted {counters.get('accepted_twist', 0)}, joint states accepted "
        f"{counters.get('accepted_joints', 0)}, refused {counters.get('rejected_total', 0)}; faults "
        f"{counters.get('faults', 0)}, limit events {counters.get('limit_events', 0)}",
        f"  newest joint state {'n/a' if age is None else f'{age:.1f} ms'} old, newest twist "
        f"{'n/a' if twist_age is None else f'{twist_age:.1f} ms'} old",
        f"  {keepout_text(status)}",
    ]
    refused = {k[len("rejected_"):]: v for k, v in counters.items()
               if k.startswith("rejected_") and k != "rejected_total" and v}
    if refused:
        lines.append("  refused: " + ", ".join(f"{k} {v}" for k, v in sorted(refused.items())))
    return lines


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="twistrate status", description=first_paragraph(__doc__))
    add_endpoint_args(parser)
    parser.add_argument("--timeout", type=float, default=PROBE_TIMEOUT_S,
                        help=f"how long to wait for the reply, s (default {PROBE_TIMEOUT_S:g})")
    parser.add_argument("--json", action="store_true", help="print {status, counters} as JSON")
    args = parser.parse_args(argv)
    try:
        endpoints = endpoints_from(args)
        status = probe(endpoints, args.timeout)
        with Link(endpoints, topics=(), timeout_s=args.timeout) as link:
            counters = link.counters()
    except TwistrateError as exc:
        print(f"twistrate status: {exc}", file=sys.stderr)
        return 1
    if args.json:
        print(json.dumps({"status": status, "counters": counters}, indent=2))
    else:
        print("\n".join(format_status(status, counters)))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
