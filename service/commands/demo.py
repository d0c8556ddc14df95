"""`twistrate demo`: the service with its built-in simulated arm and a scripted twist source; no hardware.

The scenario (invented for this demo): an inspection pass over a curved panel with the 7-joint
example arm (reach7). The camera tool approaches the panel, is pressed on down toward the bench top
below it (a keep-out zone of the demo config: the tool stops short of it, at the security distance),
slides along the bench and lifts off, sweeps along the panel's curve, reaches to its far edge, tilts
to look along it (the wrist passes its aligned, near-singular posture) and rolls the camera until the
wrist joints meet their limits, then backs off. The source is a client like
any other: it claims the lease, enables motion and streams twists over the wire (clients/link.py).

Output: the cautions first (once the arguments are checked, before anything starts), then a live
panel a few times per second (drawn with rich, 80 columns, on a terminal; one short plain line per
refresh otherwise), then a short report and the recording's path. `--seconds S` compresses (or
stretches) every phase of the pass to S seconds.
"""

from __future__ import annotations

import argparse
import math
import sys
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import zmq

from twistrate.clients.link import Endpoints, Link
from twistrate.service import wire
from twistrate.service.bench.saturation import recording_figures
from twistrate.service.commands.demo_panel import PANEL_COLUMNS as PANEL_COLUMNS
from twistrate.service.commands.demo_panel import Display, fit
from twistrate.service.commands.help_text import first_paragraph
from twistrate.service.config import ServiceConfig, config_from_dict, load_config
from twistrate.service.control import ControlThread
from twistrate.service.motion import speed_cap_factor
from twistrate.service.recorder import Recorder, read_recording, summarize
from twistrate.service.runtime import Service
from twistrate.service.tick import ARRIVAL_TARGET_EXTRA_US
from twistrate.solver.errors import TwistrateError

CAUTIONS = (
    "CAUTIONS",
    "  - twistrate is not a safety-rated function.",
    "  - A hardware emergency stop and an enabling device are required.",
    "  - Do a risk assessment per the applicable standards (e.g. ISO 10218-1/-2, ISO 12100).",
    "  - Try in simulation and at reduced speed first.",
    "  - Defer to local codes and licensed practice.",
)
#: Default run time, s (the whole scenario).
DEFAULT_SECONDS = 29.8
#: Twists per second the scripted source sends.
SOURCE_HZ = 100.0
#: Live summary refreshes per second.
DISPLAY_HZ = 4.0
#: The demo's recording: {time} becomes the UTC start time (a recording never overwrites a file).
DEFAULT_RECORDING = "twistrate-demo-{time}.trec"
#: The closing screen's pointer to the camera loop on the same simulated arm (docs/vision.md section 9).
CAMERA_LOOP_COMMAND = "twistrate vservo --synthetic"


@dataclass(frozen=True)
class Phase:
    """One segment of the scripted pass: a twist (base frame, tool point) as a function of the time
    since the phase began, s -> (linear m/s, angular rad/s)."""

    name: str
    seconds: float
    twist: Callable[[float], tuple[tuple[float, float, float], tuple[float, float, float]]]
    #: the pass clock follows the share of the twist carried out (PassClock); False: it runs in real
    #: time, for a segment whose point is that the arm stops short
    paced: bool = True


def _sweep(t: float) -> tuple[tuple[float, float, float], tuple[float, float, float]]:
    # along the panel's curve: out and back sideways while bowing away, turning with the surface
    s = t / 7.0 * 2.0 * math.pi
    return (-0.03 * math.sin(s), 0.11 * math.sin(s), 0.0), (0.0, 0.0, 0.25 * math.sin(s))


#: The inspection phases run at this factor of their first speeds: each phase's duration divided by it,
#: its twist multiplied. 1: 1.2 (to fit the keep-out segment into 24 s) drove the wrist into its limits
#: harder and tripled the pass's scale-0 ticks (`twistrate bench solver`, demo pass).
_PACE = 1.0


def _paced(name: str, seconds: float, linear: tuple[float, float, float],
           angular: tuple[float, float, float]) -> Phase:
    lin = (linear[0] * _PACE, linear[1] * _PACE, linear[2] * _PACE)
    ang = (angular[0] * _PACE, angular[1] * _PACE, angular[2] * _PACE)
    return Phase(name, seconds / _PACE, lambda t: (lin, ang))


def _sweep_paced(t: float) -> tuple[tuple[float, float, float], tuple[float, float, float]]:
    lin, ang = _sweep(t * _PACE)
    return tuple(v * _PACE for v in lin), tuple(v * _PACE for v in ang)  # type: ignore[return-value]


_STILL = (0.0, 0.0, 0.0)
#: the keep-out segment: pressed 0.48 m down from where the approach ends, with the tool's capsule about
#: 0.34 m above the bench top, so it stops short at d_s (0.31 m down) and rests there for about a second;
#: then 0.12 m along the bench, and back up those 0.31 m and back along
_PRESS = Phase("press toward the bench", 3.4, lambda t: ((0.0, 0.0, -0.14), _STILL), paced=False)
_SLIDE = Phase("slide along the bench", 1.2, lambda t: ((0.0, 0.1, 0.0), _STILL))
_LIFT = Phase("lift off the bench", 1.2, lambda t: ((0.0, -0.1, 0.26), _STILL))

SCENARIO: tuple[Phase, ...] = (
    _paced("approach the panel", 3.0, (0.0, 0.0, -0.05), _STILL),
    _PRESS,
    _SLIDE,
    _LIFT,
    Phase("sweep along its curve", 7.0 / _PACE, _sweep_paced),
    _paced("reach to the far edge", 1.5, (0.12, 0.0, 0.0), _STILL),
    _paced("tilt to look along it", 4.0, _STILL, (0.0, -0.3, 0.0)),
    # rolls until the wrist joints meet their limits (replayed at solver level, `twistrate bench solver`:
    # the wrist pitch 3.4 s in, the forearm roll 3.7 s in, as the back-off turns), then backs off: rolling
    # on against both limits asks for a twist the five other joints cannot make (no scale exists, the
    # solver tracks), so the roll ends there and the pass holds still longer (it keeps its 29.8 s)
    _paced("roll the camera", 3.6, _STILL, (0.0, 0.0, 0.8)),
    _paced("back off", 3.5, (-0.05, 0.0, 0.05), (0.0, 0.35, -0.8)),
    _paced("hold still", 1.4, _STILL, _STILL),
)


def scenario(seconds: float = DEFAULT_SECONDS) -> tuple[Phase, ...]:
    """The pass compressed (or stretched) to `seconds`: every phase's duration times
    seconds / DEFAULT_SECONDS and its twist divided by that factor, so the tool travels the same path
    (through the near-singular wrist and to the wrist limits) in the time given. The speed caps of the
    configuration still apply: a very short pass is capped, and travels less far."""
    k = seconds / DEFAULT_SECONDS

    def compressed(phase: Phase) -> Phase:
        def twist(t: float) -> tuple[tuple[float, float, float], tuple[float, float, float]]:
            linear, angular = phase.twist(t / k)
            return (linear[0] / k, linear[1] / k, linear[2] / k), (angular[0] / k, angular[1] / k,
                                                                   angular[2] / k)
        return Phase(phase.name, phase.seconds * k, twist, phase.paced)

    return tuple(compressed(phase) for phase in SCENARIO)


def phase_paced(t: float, phases: tuple[Phase, ...] = SCENARIO) -> bool:
    """Whether the pass clock follows the service's share at pass time t s (Phase.paced)."""
    start = 0.0
    for phase in phases:
        if t < start + phase.seconds:
            return phase.paced
        start += phase.seconds
    return True


def scripted_twist(t: float, phases: tuple[Phase, ...] = SCENARIO
                   ) -> tuple[str, tuple[float, float, float], tuple[float, float, float]]:
    """(phase name, linear (3,) m/s, angular (3,) rad/s) at time t s into the pass (base frame)."""
    start = 0.0
    for phase in phases:
        if t < start + phase.seconds:
            linear, angular = phase.twist(t - start)
            return phase.name, linear, angular
        start += phase.seconds
    return "done", (0.0, 0.0, 0.0), (0.0, 0.0, 0.0)


class ScriptedSource:
    """The demo's twist source, on its own thread, talking to the service over the wire."""

    def __init__(self, endpoints: Endpoints, seconds: float, tunables: Any) -> None:
        self.endpoints = endpoints
        self.tunables = tunables
        self.seconds = seconds
        self.phases = scenario(seconds)
        self.phase = "connecting"
        self.sent = 0
        self.error: str | None = None
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="demo-source", daemon=True)

    def start(self) -> None:
        self._thread.start()

    def stop(self) -> None:
        self._stop.set()
        self._thread.join(5.0)

    @property
    def finished(self) -> bool:
        return not self._thread.is_alive()

    def _run(self) -> None:
        try:
            with Link(self.endpoints, client="demo-source", topics=(wire.TOPIC_COMMAND,),
                      timeout_s=2.0) as link:
                link.wait_ready(timeout_s=5.0)
                link.claim(lease_ms=3000)  # a busy machine may stall the source for a while
                link.enable()
                clock = PassClock(self.tunables)
                def twist_at(t: float) -> tuple[np.ndarray, np.ndarray] | None:
                    if self._stop.is_set():
                        return None
                    scale = None
                    while True:  # the newest command answering a twist: the share the limits allowed
                        try:
                            msg = link.receive(timeout_s=0.0)
                        except TwistrateError:
                            break
                        if type(msg) is wire.CommandMessage and msg.answers >= 0:
                            scale = msg.scale
                    s = clock.advance(t, scale, phase_paced(clock.s, self.phases))
                    if s >= self.seconds:
                        return None
                    self.phase, linear, angular = scripted_twist(s, self.phases)
                    clock.sent(linear, angular)
                    self.sent += 1
                    return linear, angular

                link.stream_twists(twist_at, SOURCE_HZ, self.seconds * PASS_STRETCH_MAX + 5.0,
                                   wait=self._stop.wait)
                self.phase = "stopping"
                link.disable()
                link.release()
                self.phase = "done"
        except (TwistrateError, zmq.ZMQError, TimeoutError) as exc:
            self.error = str(exc)
            self.phase = "failed"


#: A pass held back by the speed caps and the limits may take at most this many times its length.
PASS_STRETCH_MAX = 3.0
#: The pass clock never runs slower than this share of real time (a pass stuck at a limit goes on).
PASS_RATE_MIN = 0.1


class PassClock:
    """The scripted pass's own clock, s: it runs at the share of the twist the service carries out (the
    speed-cap factor, computed here with the service's own function and tunables, times the scale of
    the newest command), so a pass compressed by --seconds travels the whole path (into the
    near-singular wrist, to the wrist limits) even where the caps and limits slow it down."""

    def __init__(self, tunables: Any) -> None:
        self.tunables = tunables
        self.t = 0.0
        self.s = 0.0
        self._share = 1.0
        self._moving = False

    def sent(self, linear: tuple[float, ...], angular: tuple[float, ...]) -> None:
        """The twist just sent (its speed-cap factor is the share of it the service will use)."""
        lin, ang = np.asarray(linear, float), np.asarray(angular, float)
        self._moving = bool(lin.any() or ang.any())
        if self._moving:
            t = self.tunables
            self._share = speed_cap_factor(lin, ang, np.zeros(3), t.tool_linear_max, t.angular_max)
        else:
            self._share = 1.0  # nothing to hold back (and a zero twist's scale says nothing)

    def advance(self, t: float, scale: float | None, paced: bool = True) -> float:
        """The pass time at wall time t s (since the start); scale : the newest command's, or None;
        paced False: real time (a segment meant to be stopped short, Phase.paced)."""
        share = self._share * (1.0 if scale is None or not self._moving or not paced else scale)
        self.s += (t - self.t) * max(PASS_RATE_MIN, min(1.0, share))
        self.t = t
        return self.s


#: Endpoints the demo falls back to when the configured ports are taken: loopback, ports picked at bind.
ANY_LOOPBACK_PORTS = {name: "tcp://127.0.0.1:*" for name in ("intake", "output", "control")}


def _with_endpoints(config: ServiceConfig, endpoints: dict[str, str]) -> ServiceConfig:
    data = config.model_dump()
    data["endpoints"] = endpoints
    return config_from_dict(data)


def start_service(config: ServiceConfig, recorder: Recorder | None) -> tuple[Service, ControlThread, str]:
    """Start the service and its control thread; when the configured ports are taken, use free ones."""
    note = ""
    for attempt in range(2):
        service = Service(config, recorder=recorder)
        try:
            service.start()
            control = ControlThread(service)
            control.start()
            return service, control, note
        except zmq.ZMQError as exc:
            service.close()
            if attempt or exc.errno != zmq.EADDRINUSE:
                raise
            config = _with_endpoints(config, ANY_LOOPBACK_PORTS)
            note = "(configured ports busy: using free ones)"
    raise AssertionError("unreachable")


def report(service: Service, source: ScriptedSource, recording: Path | None,
           counters: dict[str, int]) -> list[str]:
    """The closing report's lines."""
    lat = service.ticker.lateness.summary()
    arrival = service.pipeline.telemetry.hist["arrival_to_publish"].summary()
    rejected = {k[len("rejected_"):]: v for k, v in counters.items()
                if k.startswith("rejected_") and k != "rejected_total"}
    sched = service.scheduling
    lines = [
        "",
        "REPORT",
        f"  scheduling: {'real-time, ' if sched.realtime else ''}{sched.text}",
        f"  ticks {service.ticker.ticks} at {service.rate_hz:g} Hz, overruns {service.ticker.overruns}, "
        f"lateness median {lat['median_us']:.0f} us, p99 {lat['p99_us']:.0f} us, max {lat['max_us']:.0f} us",
        f"  twist arrival -> command publish (upper bound, service clock): median "
        f"{arrival['median_us']:.0f} us, p99 {arrival['p99_us']:.0f} us, max {arrival['max_us']:.0f} us over "
        f"{arrival['count']} twists (target p99 <= one period + {ARRIVAL_TARGET_EXTRA_US:g} us = "
        f"{1e6 / service.rate_hz + ARRIVAL_TARGET_EXTRA_US:.0f} us)",
        f"  twists sent {source.sent}, accepted {counters.get('accepted_twist', 0)}, "
        f"rejected {counters.get('rejected_total', 0)}"
        + (" (" + ", ".join(f"{k} {v}" for k, v in sorted(rejected.items())) + ")" if rejected else ""),
    ]
    s: dict[str, Any] = {}
    if recording is not None and recording.exists():
        header, rec = read_recording(recording)
        s = summarize(header, rec)
    # one figure: the recording's count when there is one (every tick to the end), else the service's
    # counter; both count limit_events() of the same bits (service/recorder.py)
    events = s.get("limit_events", counters.get("limit_events", 0))
    lines.append(f"  faults {counters.get('faults', 0)}, limit events {events} (a joint meeting a limit)")
    if s:

        def num(v: float | None) -> str:
            return "n/a" if v is None else f"{v:.4g}"

        lines.append(f"  min manipulability {num(s.get('manipulability_min'))}, min sigma_min "
                     f"{num(s.get('sigma_min_min'))} m, min scale {num(s.get('scale_min'))}")
        lines.append(f"  max damping {num(s.get('damping_max'))} m (lambda)")
        m = recording_figures(service.pipeline.arm, header, rec,  # the bench solver's own counts
                              service.pipeline.options.characteristic_length)
        lines.append(f"  running ticks at scale 0 {100 * m['scale_zero_fraction']:.2f} % (a keep-out hold "
                     f"included), below half {100 * m['below_half_fraction']:.2f} %; peak joint acceleration "
                     f"/ limit {m['peak_acceleration_ratio']:.3f}; rate sign changes per joint "
                     f"{m['sign_changes']} (twistrate bench solver compares them with a pass without limits)")
        lines.append("  time in health states: " + ", ".join(f"{k} {v:.2f} s"
                                                        for k, v in s.get("time_in_health_s", {}).items()))
        lines.append(f"  recording: {recording}  (summary: twistrate record --summary {recording})")
    watch = service.pipeline.keepout_watch
    if service.pipeline.keepout is not None:
        closest = watch.closest
        near = "n/a" if closest is None else f"{closest[0]:.4f} m ({closest[1]} to {closest[2]})"
        d_s = service.pipeline.keepout.config.security_m
        lines.append(f"  keep-out: a damper limited the scale {watch.engagements} time(s); closest approach "
                     f"{near} in the health reports; security distance {d_s:g} m")
    if source.error:
        lines.append(f"  the scripted source failed: {source.error}")
    return fit(lines)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="twistrate demo", description=first_paragraph(__doc__))
    parser.add_argument("--seconds", type=float, default=DEFAULT_SECONDS,
                        help=f"how long the scripted pass runs, s (default {DEFAULT_SECONDS:g}: all of it)")
    parser.add_argument("--config", help="service TOML file (default: the packaged demo configuration)")
    parser.add_argument("--record", default=DEFAULT_RECORDING, metavar="PATH",
                        help=f"recording file (default ./{DEFAULT_RECORDING})")
    parser.add_argument("--no-record", action="store_true", help="do not record")
    args = parser.parse_args(argv)
    if not 0.0 < args.seconds <= 600.0:
        print(f"twistrate demo: --seconds: got {args.seconds:g}; accepted: 0 < seconds <= 600",
              file=sys.stderr)
        return 2
    try:
        config = load_config(args.config)
        if not config.simulation.enabled:
            print("twistrate demo: the configuration must have [simulation] enabled = true", file=sys.stderr)
            return 2
        arm = config.load_arm()
    except TwistrateError as exc:
        print(f"twistrate demo: {exc}", file=sys.stderr)
        return 2
    # the arguments are good: the cautions, before anything starts
    print("\n".join(CAUTIONS), flush=True)
    print(flush=True)
    try:
        recording = None if args.no_record else Path(args.record)
        recorder = None if recording is None else Recorder(recording, arm, config.tick.rate_hz)
        recording = None if recorder is None else recorder.path  # {time} filled in
        service, control, note = start_service(config, recorder)
    except (TwistrateError, zmq.ZMQError, OSError) as exc:
        print(f"twistrate demo: {exc}", file=sys.stderr)
        return 1
    cfg = service.config
    ep = service.endpoints
    print(f"arm {arm.name} ({arm.n} joints), simulated; tick {cfg.tick.rate_hz:g} Hz; control "
          f"{ep['control']} {note}".rstrip(), flush=True)
    print("\n".join(fit([f"scripted inspection pass: {', '.join(p.name for p in SCENARIO)}; "
                         f"{args.seconds:g} s"])), flush=True)
    endpoints = Endpoints(ep["intake"], ep["output"], ep["control"])
    source = ScriptedSource(endpoints, args.seconds, cfg.tunables())
    display = Display(service, source)
    source.start()
    display.start()
    try:
        deadline = time.monotonic() + args.seconds * PASS_STRETCH_MAX + 10.0
        while not source.finished and time.monotonic() < deadline:
            time.sleep(1.0 / DISPLAY_HZ)
            display.show()
        # let the arm come to rest after the source let go, then stop
        rest_deadline = time.monotonic() + 3.0
        while time.monotonic() < rest_deadline and (service.snapshot.qd.any()
                                                    or service.snapshot.mode == "running"):
            time.sleep(0.05)
        display.show()
    except KeyboardInterrupt:
        print("\ninterrupted: stopping", flush=True)
        source.stop()
    finally:
        display.stop()
        source.stop()
        counters = service.counters()
        service.shutdown("demo over")
        service.join(10.0)
        control.stop()
        service.close()
    for line in report(service, source, recording, counters):
        print(line)
    if recording is not None and recording.exists():
        print(f"  plot: {plot_recording(recording, args.config)}", flush=True)
    print(f"  next, a camera loop on the simulated arm: {CAMERA_LOOP_COMMAND}", flush=True)
    return 0 if source.error is None else 1


def plot_recording(recording: Path, config_path: str | None) -> str:
    """Draw the recording beside it (RECORDING.png) when the plot extra is installed; what to say."""
    try:
        import matplotlib  # noqa: F401
    except ImportError:
        return f"install the plot extra (pip install -e '.[plot]'), then: twistrate plot {recording}"
    from twistrate.service.commands.plot import figure_of

    out = recording.with_suffix(".png")
    try:
        figure_of(recording, out, config_path=config_path)
    except (TwistrateError, OSError) as exc:
        return f"not drawn ({exc}); try: twistrate plot {recording}"
    return f"{out}  (twistrate plot {recording} --svg for an SVG too)"


if __name__ == "__main__":
    raise SystemExit(main())
