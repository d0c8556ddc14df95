"""Shared body of the closed-loop vservo tests over real sockets: `twistrate serve` with its simulated
arm in its own process, the synthetic camera as a pipeline, the vservo runner, a watcher of commands."""

from __future__ import annotations

import contextlib
import multiprocessing
import subprocess
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from service_harness import ANY_PORT, reap, serve_process

from twistrate.clients.link import Endpoints, Link
from twistrate.clients.vservo import config as vc
from twistrate.clients.vservo import synthetic
from twistrate.clients.vservo.feed import FeatureInput
from twistrate.clients.vservo.runner import Outcome, Runner
from twistrate.clients.vservo.synthetic_feed import SyntheticPipeline
from twistrate.service import wire
from twistrate.service.commands.vservo import synthetic_service_config
from twistrate.solver.kinematics import tool_pose

#: Starting postures (joint offsets from home, rad) of the closed-loop tests: all see every dot.
STARTS = {
    "home": [0.0] * 7,
    "turned": [0.12, 0.0, 0.0, 0.0, 0.0, 0.0, -0.25],
    "lower-tilted": [0.0, 0.08, 0.05, -0.06, 0.0, 0.1, 0.1],
}


@dataclass
class Closed:
    outcome: Outcome
    #: (service wall clock s, tick, target (n,) or None) of every command / health the watcher received
    commands: list[tuple[float, int, np.ndarray | None]] = field(default_factory=list)
    #: time.time() - time.monotonic() when the run started (maps run times to the wall clock)
    wall_offset: float = 0.0
    arm: Any = None
    tick_s: float = 0.0

    def arm_time(self, times: list[float]) -> np.ndarray:
        """The simulated arm's own time (ticks x period, s) at run times (s since outcome.t0): the arm
        integrates one nominal period per tick, so late ticks slow it down against the wall clock."""
        wall = np.array([c[0] for c in self.commands])
        ticks = np.array([c[1] for c in self.commands], dtype=float)
        at = np.asarray(times) + self.outcome.t0 + self.wall_offset
        return np.interp(at, wall, ticks) * self.tick_s

    def tool_positions(self) -> tuple[np.ndarray, np.ndarray]:
        """(run times (K,) s, tool origins (K, 3) m) of the commanded targets the watcher saw."""
        t = np.array([c[0] for c in self.commands]) - self.outcome.t0 - self.wall_offset
        p = np.array([tool_pose(self.arm, c[2])[:3, 3] for c in self.commands])
        return t, p


def closed_loop(tmp_path: Path, start: str = "home", seconds: float = 20.0, track: bool = False,
                law: dict[str, Any] | None = None, camera: dict[str, Any] | None = None,
                watch_commands: bool = False, goal: dict[str, Any] | None = None,
                mount: dict[str, Any] | None = None) -> Closed:
    """Run vservo on the panel cell against `twistrate serve` until settled (or `seconds`). The watcher
    reads health messages (tick and stamp, 50 per second), or every command with `watch_commands`."""
    probe, _ = synthetic_service_config(None)
    arm = probe.load_arm()
    q0 = (arm.q_home + np.array(STARTS[start])).tolist()
    service_config, text = synthetic_service_config(None, {"simulation": {"initial_posture": q0}})
    (tmp_path / "service.toml").write_text(text)
    result = Closed(Outcome(), arm=arm, tick_s=1.0 / service_config.tick.rate_hz)
    with contextlib.ExitStack() as stack:
        proc, ep = serve_process(tmp_path / "service.toml", tmp_path / "endpoints.json",
                                 stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        stack.callback(reap, proc)
        data = vc.load_config().model_dump()
        data["endpoints"] = {"features": ANY_PORT, "intake": ep.intake, "output": ep.output,
                             "control": ep.control}
        data["law"] = {**data["law"], **(law or {})}
        if goal is not None:
            data["goal"] = goal
        if mount is not None:
            data["mount"] = mount
        topic = wire.TOPIC_COMMAND if watch_commands else wire.TOPIC_HEALTH
        watcher = stack.enter_context(Link(ep, client="watch", topics=(topic,), timeout_s=2.0))
        stop = threading.Event()

        def watch() -> None:
            while not stop.is_set():
                try:
                    message = watcher.receive(0.05)
                except TimeoutError:
                    continue
                target = getattr(message, "target", None)
                result.commands.append((message.stamp_ns / 1e9, message.tick, target))

        thread = threading.Thread(target=watch, daemon=True)
        result.wall_offset = time.time() - time.monotonic()  # one machine: one monotonic clock for both
        thread.start()
        stack.callback(thread.join, 2.0)
        stack.callback(stop.set)
        # vservo and its camera in their own process, as deployed: this one's threads (the watcher) and
        # whatever earlier tests left in it (switch interval, collector state) do not share their GIL
        ctx = multiprocessing.get_context("spawn")
        parent, child = ctx.Pipe()
        worker = ctx.Process(target=_vservo_process, args=(data, camera or {}, seconds, track, child))
        worker.start()
        stack.callback(_end_process, worker)
        assert parent.poll(seconds + 60.0), "the vservo process sent no outcome"
        result.outcome, error = parent.recv()
    assert error is None, error
    return result


def _end_process(worker: Any) -> None:
    worker.join(10.0)
    if worker.is_alive():
        worker.kill()
        worker.join(5.0)


def _vservo_process(data: dict[str, Any], camera: dict[str, Any], seconds: float, track: bool,
                    conn: Any) -> None:
    """The vservo side of a closed loop: feature input, synthetic camera pipeline, runner."""
    feed = FeatureInput(ANY_PORT, "bench-cam")
    data["endpoints"]["features"] = feed.endpoint
    config = vc.config_from_dict(data)
    if config.mount.on == "tool":
        cell = synthetic.panel_cell(vc.intrinsics(config), vc.mount(config).T)
    else:
        cell = synthetic.plate_cell(vc.intrinsics(config), vc.mount(config).T)
    cam = synthetic.SyntheticCamera(cell, pose=config.law.kind == "pose", **camera)
    ep = config.endpoints
    pipeline = SyntheticPipeline(cam, ep.output, feed.endpoint, config.camera.name, config.camera.rate_hz)
    topics = (wire.TOPIC_HEALTH, wire.TOPIC_EVENT)
    if config.mount.on == "cell":
        topics += (wire.TOPIC_STATE,)
    outcome, error = Outcome(reason="failed"), None
    try:
        with Link(Endpoints(ep.intake, ep.output, ep.control), client="vservo", topics=topics,
                  timeout_s=2.0) as link:
            runner = Runner(config, link, feed, track=track, out=None, on_start=pipeline.begin)
            pipeline.start()
            try:
                outcome = runner.run(seconds)
            finally:
                pipeline.stop()
        error = pipeline.error
    except Exception as exc:  # reported to the test, which fails with it
        error = f"{type(exc).__name__}: {exc}"
    finally:
        feed.close()
        conn.send((outcome, error))
        conn.close()

