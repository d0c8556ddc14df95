"""`twistrate vservo`: close a camera loop; `--synthetic` closes it on the invented panel cell, no hardware.

Without `--synthetic`: reads the vservo configuration (camera, hand-eye calibration, law, goal,
endpoints), binds the features socket a camera pipeline feeds (docs/vision.md) and streams the law's
twists to a running service (twistrate.clients.vservo.runner).

With `--synthetic`: starts `twistrate serve` with its built-in simulated arm (the packaged demo
configuration, on ports the operating system picks) as its own process, and a synthetic camera here
(twistrate.clients.vservo.synthetic_feed) that reads the service's `state` output (the tool pose each
tick used), projects the panel's dots and sends them as features messages. The loop closes over the
real sockets: vservo -> service -> simulated arm -> synthetic camera -> vservo. Pixel noise, latency,
dropped frames and blackouts (the target hidden) are options.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import math
import os
import signal
import subprocess
import sys
import tempfile
import time
import tomllib
from importlib import resources
from pathlib import Path

import numpy as np
import zmq

from twistrate.clients.link import Endpoints, Link
from twistrate.clients.vservo import config as vc
from twistrate.clients.vservo import synthetic
from twistrate.clients.vservo.errorlog import ErrorLog
from twistrate.clients.vservo.feed import FeatureInput
from twistrate.clients.vservo.runner import Outcome, Runner, Timings
from twistrate.clients.vservo.synthetic_feed import SyntheticPipeline
from twistrate.service import wire
from twistrate.service.commands.demo import CAUTIONS as DEMO_CAUTIONS
from twistrate.service.commands.help_text import first_paragraph
from twistrate.service.config import ServiceConfig, config_from_dict
from twistrate.service.wire.discovery import read_endpoints
from twistrate.solver.errors import ConfigError, TwistrateError

#: The project's cautions (the demo's list) and this program's own.
CAUTIONS = (*DEMO_CAUTIONS,
            "  - A camera loop moves the arm towards whatever the camera reports: keep the cell clear.")
#: Default run time limit, s.
DEFAULT_SECONDS = 30.0


#: Loopback with a port the operating system picks at bind time (read back, never guessed).
ANY_PORT = "tcp://127.0.0.1:*"
#: How long vservo waits for a started service to write its endpoints file, s.
SERVE_START_S = 20.0


def write_features_file(path: str | Path, endpoint: str) -> None:
    """Write {"features": endpoint, "pid": ...} to `path` atomically (the bound features socket, for a
    pipeline started after vservo)."""
    path = Path(path)
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    tmp.write_text(json.dumps({"features": endpoint, "pid": os.getpid()}) + "\n", encoding="utf-8")
    os.replace(tmp, path)


def read_features_file(path: str | Path, wait_s: float) -> str:
    """The features endpoint in `path` (written by `twistrate vservo --features-file`), waiting up to
    wait_s s for it. Raises ConfigError naming the file."""
    deadline = time.monotonic() + wait_s
    while True:
        try:
            doc = json.loads(Path(path).read_text(encoding="utf-8"))
            break
        except FileNotFoundError:
            if time.monotonic() >= deadline:
                raise ConfigError(f"features file {path}: none after {wait_s:g} s; accepted: a file written "
                                  "by `twistrate vservo --features-file`") from None
            time.sleep(0.02)
        except (OSError, ValueError) as exc:
            raise ConfigError(f"features file {path}: {exc}; accepted: a JSON file") from None
    if not isinstance(doc, dict) or not isinstance(doc.get("features"), str):
        raise ConfigError(f"features file {path}: {doc!r}; accepted: a JSON object with a string `features`")
    return doc["features"]


def synthetic_service_config(path: str | None, sections: dict | None = None) -> tuple[ServiceConfig, str]:
    """The service configuration of a synthetic run (the packaged demo one, or `path`) on loopback ports
    the operating system picks, quieter logging, `sections` merged over its sections; returns it and
    its TOML text (start it with `serve --endpoints-file` to learn the ports)."""
    if path is None:
        text = resources.files("twistrate.configs.service").joinpath("demo.toml").read_text()
        base = "."
    else:
        text, base = Path(path).read_text(), str(Path(path).parent)
    data = tomllib.loads(text)
    data["endpoints"] = {"intake": ANY_PORT, "output": ANY_PORT, "control": ANY_PORT}
    data.setdefault("logging", {})["level"] = "warning"
    data["recorder"] = {}
    for name, values in (sections or {}).items():
        data[name] = {**data.get(name, {}), **values}
    config = config_from_dict(data, base, source=path or "packaged demo.toml")
    if not config.simulation.enabled:
        raise ConfigError("service config: [simulation] enabled must be true for --synthetic; accepted: true")
    data["arm"] = {**data.get("arm", {}), "file": config.arm.file}  # resolved against `path`
    lines = []
    for section, values in data.items():
        if not isinstance(values, dict):
            raise ConfigError(f"service config: {section} = {values!r}; accepted: tables only at the top")
        lines.append(f"[{section}]")
        lines += [f"{key} = {_toml(value)}" for key, value in values.items()]
    return config, "\n".join(lines) + "\n"


def _toml(value: object) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return '"' + value.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(value, list):
        return "[" + ", ".join(_toml(v) for v in value) + "]"
    if isinstance(value, (int, float)):
        return repr(value)
    if isinstance(value, dict):  # an inline table, e.g. each zone of [keepout] (an array of tables)
        return "{" + ", ".join(f"{k} = {_toml(v)}" for k, v in value.items()) + "}"
    raise ConfigError(f"service config: {value!r}; accepted: numbers, strings, booleans, arrays, tables")


def _blackout(text: str) -> tuple[float, float]:
    try:
        start, end = (float(x) for x in text.split(":"))
    except ValueError:
        raise argparse.ArgumentTypeError(f"--blackout: got {text!r}; accepted: START:END seconds") from None
    if not 0.0 <= start < end:
        raise argparse.ArgumentTypeError(f"--blackout: got {text!r}; accepted: 0 <= START < END")
    return start, end


def decay_rate(times: list[float], norms: list[float | None], high: float = 1e-1,
               low: float = 1e-3) -> float | None:
    """Least-squares rate (1/s) of |e| over the tracked samples with low <= |e| / |e|_max <= high, or None."""
    pts = [(t, e) for t, e in zip(times, norms, strict=True) if e is not None and e > 0.0]
    if len(pts) < 5:
        return None
    top = max(e for _, e in pts)
    window = [(t, math.log(e)) for t, e in pts if low * top <= e <= high * top]
    if len(window) < 5:
        return None
    t, y = np.array(window).T
    return float(-np.polyfit(t, y, 1)[0])


def parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="twistrate vservo", description=first_paragraph(__doc__))
    p.add_argument("--config", help="vservo TOML file (default: the packaged panel cell, "
                                    "configs/vservo/panel.toml)")
    p.add_argument("--synthetic", action="store_true",
                   help="start a simulated service and a synthetic camera of the panel cell")
    p.add_argument("--track", action="store_true", help="keep tracking after convergence")
    p.add_argument("--seconds", type=float, default=DEFAULT_SECONDS,
                   help=f"stop after this long, s (default {DEFAULT_SECONDS:g})")
    p.add_argument("--log", metavar="FILE",
                   help="write the feature error per servo step (CSV, docs/vision.md)")
    p.add_argument("--endpoints-file", metavar="FILE",
                   help="the service's endpoints from the file `twistrate serve --endpoints-file FILE` wrote")
    p.add_argument("--features-file", metavar="FILE",
                   help="write where the features socket is bound (JSON), for a pipeline started later")
    p.add_argument("--timings", metavar="FILE",
                   help="after the run, write when each frame was received and when its twist went out "
                        "(CSV, wall clock ns; `twistrate bench vservo` reads it)")
    p.add_argument("--service-config", help="--synthetic: the service's TOML (default: the packaged demo)")
    p.add_argument("--noise-px", type=float, default=0.0, help="--synthetic: pixel noise sigma, px")
    p.add_argument("--latency-ms", type=float, default=0.0, help="--synthetic: capture to delivery, ms")
    p.add_argument("--drop", type=float, default=0.0, help="--synthetic: fraction of frames dropped")
    p.add_argument("--blackout", type=_blackout, action="append", default=[], metavar="START:END",
                   help="--synthetic: hide the target between these run times, s (repeatable)")
    p.add_argument("--seed", type=int, default=0, help="--synthetic: seed of noise and drops")
    return p


def main(argv: list[str] | None = None) -> int:
    args = parser().parse_args(argv)
    print("\n".join(CAUTIONS) + "\n", flush=True)
    if not 0.0 < args.seconds <= 3600.0:
        print(f"twistrate vservo: --seconds: got {args.seconds:g}; accepted: 0 < seconds <= 3600",
              file=sys.stderr)
        return 2
    try:
        config = vc.load_config(args.config)
        return run_synthetic(args, config) if args.synthetic else run_live(args, config)
    except (TwistrateError, zmq.ZMQError, OSError) as exc:
        print(f"\ntwistrate vservo: {exc}", file=sys.stderr)
        return 1


def _open_log(path: str | None) -> tuple[ErrorLog | None, object]:
    if path is None:
        return None, contextlib.nullcontext()
    out = open(path, "w", newline="")  # noqa: SIM115 (closed by the caller's ExitStack)
    return ErrorLog(out), out


def run_live(args: argparse.Namespace, config: vc.VservoConfig) -> int:
    ep = config.endpoints
    service = Endpoints(ep.intake, ep.output, ep.control)
    if args.endpoints_file:
        service = Endpoints(**read_endpoints(args.endpoints_file, SERVE_START_S))
    with contextlib.ExitStack() as stack:
        log, out = _open_log(args.log)
        stack.enter_context(out)  # type: ignore[arg-type]
        feed = FeatureInput(ep.features, config.camera.name)
        stack.callback(feed.close)
        if args.features_file:
            write_features_file(args.features_file, feed.endpoint)
        topics = (wire.TOPIC_HEALTH, wire.TOPIC_EVENT)
        if config.mount.on == "cell":
            topics += (wire.TOPIC_STATE,)  # the tool origin for a camera in the cell
        link = stack.enter_context(Link(service, client="vservo", topics=topics, timeout_s=2.0))
        print(f"vservo: features from {feed.endpoint} (camera {config.camera.name!r}), service at "
              f"{service.control}; {config.law.kind} law, goal of {_goal_text(config)}", flush=True)
        timings = Timings() if args.timings else None
        runner = Runner(config, link, feed, track=args.track, log=log, on_sent=timings,
                        on_wait=None if timings is None else timings.waiting)
        _on_signals(runner)
        outcome = runner.run(args.seconds)
    if timings is not None:
        timings.write(args.timings)
    _report(outcome, config, args.log)
    return 0 if outcome.reason in ("settled", "time", "stopped") else 1


def _on_signals(runner: Runner) -> None:
    """SIGINT and SIGTERM end the run cleanly: zero twists, disable, release."""
    for sig in (signal.SIGINT, signal.SIGTERM):
        signal.signal(sig, lambda *_: runner.stop())


def _goal_text(config: vc.VservoConfig) -> str:
    if config.law.kind == "points":
        return f"{len(config.goal.ids or [])} points"
    return "a target pose"


def run_synthetic(args: argparse.Namespace, config: vc.VservoConfig) -> int:
    if not 0.0 <= args.drop < 1.0 or args.noise_px < 0.0 or args.latency_ms < 0.0:
        raise ConfigError("--noise-px, --latency-ms, --drop: accepted: noise >= 0, latency >= 0, "
                          "0 <= drop < 1")
    service_config, text = synthetic_service_config(args.service_config)
    arm = service_config.load_arm()
    if config.mount.on == "tool":  # the panel cell (configs/vservo/panel.toml)
        cell = synthetic.panel_cell(vc.intrinsics(config), vc.mount(config).T)
    else:  # a camera in the cell: the plate cell's dots on the tool, seen from the configured pose
        cell = synthetic.plate_cell(vc.intrinsics(config), vc.mount(config).T)
    camera = synthetic.SyntheticCamera(cell, noise_px=args.noise_px, latency_s=args.latency_ms / 1000.0,
                                       drop_rate=args.drop, seed=args.seed, blackouts=tuple(args.blackout),
                                       pose=config.law.kind == "pose")
    with contextlib.ExitStack() as stack:
        tmp = stack.enter_context(tempfile.TemporaryDirectory(prefix="twistrate-vservo-"))
        cfg_path = Path(tmp) / "service.toml"
        cfg_path.write_text(text)
        err_path = Path(tmp) / "service.err"
        ep_path = Path(tmp) / "endpoints.json"
        err = stack.enter_context(open(err_path, "w"))
        service = subprocess.Popen([sys.executable, "-m", "twistrate.service.commands.cli", "serve",
                                    "--config", str(cfg_path), "--endpoints-file", str(ep_path)],
                                   stdout=subprocess.DEVNULL, stderr=err)
        stack.callback(_reap, service)
        try:
            ep = Endpoints(**read_endpoints(ep_path, SERVE_START_S))
        except ConfigError as exc:
            raise ConfigError(f"{exc}\n  the service said: {err_path.read_text()[-500:]}") from None
        log, out = _open_log(args.log)
        stack.enter_context(out)  # type: ignore[arg-type]
        feed = FeatureInput(ANY_PORT, config.camera.name)
        stack.callback(feed.close)
        pipeline = SyntheticPipeline(camera, ep.output, feed.endpoint, config.camera.name,
                                     config.camera.rate_hz)
        topics = (wire.TOPIC_HEALTH, wire.TOPIC_EVENT)
        if config.mount.on == "cell":
            topics += (wire.TOPIC_STATE,)  # the tool origin for a camera in the cell
        link = stack.enter_context(Link(ep, client="vservo", topics=topics, timeout_s=2.0))
        print(f"synthetic: service {arm.name} ({arm.n} joints, simulated) at {ep.control}; camera "
              f"{config.camera.name!r} {config.camera.rate_hz:g} Hz, noise {args.noise_px:g} px, latency "
              f"{args.latency_ms:g} ms, drop {args.drop:g}, blackouts {args.blackout or 'none'}", flush=True)
        timings = Timings() if args.timings else None
        runner = Runner(config, link, feed, track=args.track, log=log, on_start=pipeline.begin,
                        on_sent=timings, on_wait=None if timings is None else timings.waiting)
        _on_signals(runner)
        pipeline.start()
        stack.callback(pipeline.stop)
        outcome = runner.run(args.seconds)
        if service.poll() is not None:
            print(f"the service exited: {err_path.read_text()[-500:]}", file=sys.stderr)
    if timings is not None:
        timings.write(args.timings)
    _report(outcome, config, args.log)
    if pipeline.error:
        print(f"  the synthetic camera failed: {pipeline.error}")
    return 0 if outcome.reason in ("settled", "time", "stopped") and pipeline.error is None else 1


def _reap(proc: subprocess.Popen) -> None:
    if proc.poll() is None:
        os.kill(proc.pid, signal.SIGTERM)
        try:
            proc.wait(10.0)
        except subprocess.TimeoutExpired:
            os.kill(proc.pid, signal.SIGKILL)
            proc.wait(5.0)


def _report(outcome: Outcome, config: vc.VservoConfig, log_path: str | None) -> None:
    last = outcome.last
    lines = ["", "REPORT", f"  ended: {outcome.reason}" + (f" ({outcome.detail})" if outcome.detail else ""),
             f"  frames {outcome.frames}, twists sent {outcome.twists}; steps per state: "
             + ", ".join(f"{k} {v}" for k, v in sorted(outcome.states.items())),
             f"  scheduling: {outcome.scheduling}"]
    if outcome.settled_at_s is not None:
        lines.append(f"  settled after {outcome.settled_at_s:.2f} s (mean error <= "
                     f"{config.settle.threshold_px:g} px for {config.settle.hold_frames} frames)")
    if last is not None and last.error_px_mean is not None:
        lines.append(f"  last error: mean {last.error_px_mean:.3f} px, max {last.error_px_max:.3f} px, "
                     f"normalised {last.error_norm:.5f}")
    rate = decay_rate(outcome.times, outcome.errors)
    if rate is not None:
        law = config.law
        lines.append(f"  feature error decay rate {rate:.3f} 1/s over the tail (|e| from 1e-1 to 1e-3 of its "
                     f"largest); gain near the goal {law.gain_near:g} 1/s, far {law.gain_far:g} 1/s")
    if log_path is not None:
        lines.append(f"  error log: {log_path} (CSV; plot error_norm against time_s on a log scale)")
    print("\n".join(lines))


if __name__ == "__main__":
    raise SystemExit(main())
