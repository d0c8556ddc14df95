"""`twistrate serve`: run the streaming service for one arm until SIGINT/SIGTERM.

The tick runs on its own thread (service/runtime.py), with SCHED_FIFO when the operating system
permits it ([tick] realtime_priority, or --rt-priority); the control plane runs here, on the main
thread's uvloop loop, which also receives the signals. On SIGINT/SIGTERM the tick ramps the rates
to zero within the acceleration limits, publishes a final zero command and stops; then the control
socket closes and the process exits 0.
"""

from __future__ import annotations

import argparse
import asyncio
import logging
import logging.handlers
import queue
import signal
import sys

import uvloop
import zmq
import zmq.asyncio

from twistrate.service.commands.help_text import first_paragraph
from twistrate.service.config import RT_PRIORITY_MAX, ServiceConfig, load_config
from twistrate.service.control import ControlServer
from twistrate.service.recorder import Recorder
from twistrate.service.runtime import Service
from twistrate.service.wire.discovery import write_endpoints
from twistrate.solver.arm import Arm
from twistrate.solver.errors import TwistrateError

log = logging.getLogger("twistrate.service")


def setup_logging(level: str) -> logging.handlers.QueueListener:
    """Log to stderr through a queue: the tick thread only enqueues, a listener thread writes."""
    q: queue.SimpleQueue = queue.SimpleQueue()
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(name)s: %(message)s"))
    listener = logging.handlers.QueueListener(q, handler)
    root = logging.getLogger("twistrate")
    root.handlers[:] = [logging.handlers.QueueHandler(q)]
    root.setLevel(level.upper())
    root.propagate = False
    listener.start()
    return listener


def make_recorder(config: ServiceConfig, arm: Arm, path: str | None) -> Recorder | None:
    """A Recorder for `path` (or the configured [recorder] path), or None. Its file is created only once
    the service's sockets are bound (Service.start), exclusively: a service that cannot start, or a
    second one on the same config, touches no file."""
    path = path or config.recorder.path
    if not path:
        return None
    return Recorder(path, arm, config.tick.rate_hz, open_now=False, max_bytes=config.recorder.max_bytes)


async def run_control(service: Service, endpoints_file: str | None = None) -> None:
    """Serve control requests until the tick thread has stopped; signals ask it to stop."""
    loop = asyncio.get_running_loop()
    stop = asyncio.Event()
    for sig in (signal.SIGINT, signal.SIGTERM):
        loop.add_signal_handler(sig, service.shutdown, f"signal {signal.Signals(sig).name}")
    service.add_done_callback(lambda: loop.call_soon_threadsafe(stop.set))
    server = ControlServer(service)
    ctx = zmq.asyncio.Context.shadow(service.context)
    server.open(ctx)
    log.info("control on %s", service.endpoints["control"])
    if endpoints_file:
        write_endpoints(endpoints_file, service.endpoints)
        log.info("endpoints written to %s", endpoints_file)
    try:
        await server.serve(stop)
    finally:
        server.close()


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="twistrate serve", description=first_paragraph(__doc__))
    parser.add_argument("--config", help="service TOML file (default: the packaged demo configuration)")
    parser.add_argument("--record", metavar="PATH",
                        help="record every tick to PATH (overrides [recorder] path; an existing file is "
                             "refused; {time} in PATH becomes the UTC start time)")
    parser.add_argument("--endpoints-file", metavar="FILE",
                        help="once bound, write the endpoints (JSON) to FILE for drivers and clients; with a "
                             "configured port * it names the port the operating system picked")
    parser.add_argument("--rt-priority", type=int, default=None, metavar="N",
                        help="SCHED_FIFO priority 1-99 of the tick thread, used when the operating system "
                             "permits it; 0: normal scheduling (default: [tick] realtime_priority, 10)")
    args = parser.parse_args(argv)
    if args.rt_priority is not None and not 0 <= args.rt_priority <= RT_PRIORITY_MAX:
        print(f"twistrate serve: --rt-priority: got {args.rt_priority}; accepted: 0 (off) to "
              f"{RT_PRIORITY_MAX}", file=sys.stderr)
        return 2
    try:
        config = load_config(args.config)
    except TwistrateError as exc:
        print(f"twistrate serve: {exc}", file=sys.stderr)
        return 2
    listener = setup_logging(config.logging.level)
    try:
        return _serve(config, args)
    finally:
        listener.stop()


def _serve(config: ServiceConfig, args: argparse.Namespace) -> int:
    try:
        arm = config.load_arm()
        recorder = make_recorder(config, arm, args.record)
        service = Service(config, arm, realtime_priority=args.rt_priority, recorder=recorder)
        service.start()
    except (TwistrateError, zmq.ZMQError, OSError) as exc:
        log.error("cannot start: %s", exc)
        return 1
    if recorder is not None:
        log.info("recording every tick to %s (stops at %d MB)", recorder.path.resolve(),
                 recorder.max_bytes // 1_000_000)
    try:
        uvloop.run(run_control(service, args.endpoints_file))
    except (zmq.ZMQError, OSError) as exc:
        log.error("control plane failed: %s", exc)
        service.shutdown("control plane failed")
        service.join(10.0)
        return 1
    finally:
        service.close()
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
