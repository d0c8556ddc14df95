"""`twistrate record`: record a running service from its output stream, or summarise / plot a recording.

    twistrate record --config FILE --out PATH [--seconds S]   record commands (+ health) until Ctrl-C
    twistrate record --summary PATH [--svg OUT]               summary of a recording, optional SVG plot
    twistrate record --summary PATH --csv OUT                 also export it as CSV (docs/operation.md)
    twistrate record --csv OUT PATH                           only export it as CSV

Recording from the wire rebuilds each tick from the `command` message (q = target - rate * T, the
rates, scale, mode, health state) and the newest `health` message (damping, smallest singular value,
manipulability: sampled at the health rate and held). The twists, the speed-cap factor and the
limit bits are not on the wire; the file marks them unavailable (NaN and 0). Recordings the service
writes itself (`serve --record`, `[recorder] path`, the demo) have every field.
"""

from __future__ import annotations

import argparse
import json
import math
import signal
import sys
import time
from pathlib import Path

import numpy as np
import zmq

from twistrate.clients.link import Endpoints, Link
from twistrate.clients.probe import probe
from twistrate.service import wire
from twistrate.service.commands.help_text import first_paragraph
from twistrate.service.config import load_config
from twistrate.service.recorder import Recorder, format_summary, plot_svg, read_recording, summarize
from twistrate.service.recording_csv import write_csv
from twistrate.service.wire.discovery import read_endpoints
from twistrate.solver.errors import TwistrateError

#: Fields a recording made from the output stream cannot fill.
WIRE_UNAVAILABLE = ("twist_desired", "twist_achieved", "cap", "limits")


def record_stream(config_path: str | None, out: str, seconds: float | None, stop: list[bool],
                  endpoints: dict[str, str] | None = None) -> int:
    """Subscribe to a running service's output and record every command; returns the rows written.
    endpoints : where the service listens (default: the config's endpoints)."""
    config = load_config(config_path)
    arm = config.load_arm()
    ep = endpoints or config.endpoints.model_dump()
    period = 1.0 / config.tick.rate_hz
    probe(Endpoints(ep["intake"], ep["output"], ep["control"]))  # no service answers: no file
    recorder = Recorder(out, arm, config.tick.rate_hz, source="output", unavailable=WIRE_UNAVAILABLE)
    damping = sigma_min = manip = math.nan
    zeros6 = np.full(6, math.nan)
    no_limits = np.zeros(arm.n, dtype=np.uint8)
    end = None if seconds is None else time.monotonic() + seconds
    try:
        with Link(Endpoints(ep["intake"], ep["output"], ep["control"]), client="recorder",
                  topics=(wire.TOPIC_COMMAND, wire.TOPIC_HEALTH), n=arm.n) as link:
            while not stop[0] and (end is None or time.monotonic() < end):
                try:
                    msg = link.receive(timeout_s=0.2)
                except TimeoutError:
                    continue
                except TwistrateError:  # a malformed message: skip it
                    continue
                if type(msg) is wire.HealthMessage:
                    damping = msg.damping
                    sigma_min = float(msg.singular_values[-1])
                    manip = msg.manipulability
                    continue
                if type(msg) is not wire.CommandMessage:
                    continue
                q = msg.target - msg.rate * period
                recorder.push(msg.stamp_ns, msg.stamp_ns, msg.tick, msg.mode, msg.health, no_limits, q,
                              msg.rate, zeros6, zeros6, msg.scale, math.nan, damping, sigma_min, manip)
    finally:
        recorder.close()
    return recorder.rows


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="twistrate record", description=first_paragraph(__doc__))
    parser.add_argument("--config", help="the service's TOML file (endpoints and arm)")
    parser.add_argument("--out", metavar="PATH", help="record to this file")
    parser.add_argument("--seconds", type=float, help="stop after this long (default: until SIGINT/SIGTERM)")
    parser.add_argument("--endpoints-file", metavar="FILE",
                        help="connect to the endpoints `twistrate serve --endpoints-file FILE` wrote")
    parser.add_argument("--summary", metavar="PATH", help="summarise this recording")
    parser.add_argument("--svg", metavar="OUT", help="with --summary: also plot it to this SVG file")
    parser.add_argument("--json", action="store_true", help="with --summary: print the summary as JSON")
    parser.add_argument("--csv", metavar="OUT", help="export the recording (--summary PATH, or PATH) as CSV")
    parser.add_argument("recording", nargs="?", metavar="PATH", help="the recording --csv exports")
    args = parser.parse_args(argv)
    if args.csv and not args.summary:
        if not args.recording:
            print("twistrate record: --csv OUT needs the recording: --csv OUT PATH", file=sys.stderr)
            return 2
        try:
            header, rec = read_recording(args.recording)
            print(f"csv: {write_csv(header, rec, args.csv)} ({len(rec)} rows)")
        except TwistrateError as exc:
            print(f"twistrate record: {exc}", file=sys.stderr)
            return 2
        return 0
    if args.summary:
        try:
            header, rec = read_recording(args.summary)
        except TwistrateError as exc:
            print(f"twistrate record: {exc}", file=sys.stderr)
            return 2
        s = summarize(header, rec)
        print(json.dumps(s, indent=2) if args.json else format_summary(s, header["joints"]))
        if args.svg:
            print(f"plot: {plot_svg(header, rec, args.svg)}")
        if args.csv:
            try:  # on stderr: stdout stays the summary (JSON with --json)
                print(f"csv: {write_csv(header, rec, args.csv)} ({len(rec)} rows)", file=sys.stderr)
            except TwistrateError as exc:
                print(f"twistrate record: {exc}", file=sys.stderr)
                return 2
        return 0
    if not args.out:
        parser.print_usage(sys.stderr)
        print("twistrate record: give --out PATH (record) or --summary PATH (summarise)", file=sys.stderr)
        return 2
    stop = [False]

    def on_signal(*_: object) -> None:
        stop[0] = True

    signal.signal(signal.SIGINT, on_signal)
    signal.signal(signal.SIGTERM, on_signal)
    try:
        endpoints = read_endpoints(args.endpoints_file) if args.endpoints_file else None
        rows = record_stream(args.config, args.out, args.seconds, stop, endpoints)
    except (TwistrateError, zmq.ZMQError, OSError) as exc:
        print(f"twistrate record: {exc}", file=sys.stderr)
        return 1
    print(f"twistrate record: {rows} ticks to {Path(args.out)}", file=sys.stderr)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
