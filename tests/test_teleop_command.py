"""`twistrate teleop` as an operator runs it: cautions first, --list, refusals, and keyboard mode in a
pseudo-terminal against a real service (held keys move the simulated tool along +x of the base)."""

from __future__ import annotations

import os
import pty
import select
import subprocess
import sys
import time

import numpy as np
import pytest
from service_harness import make_config, reap, running_service

from twistrate.clients.teleop import evdev_source
from twistrate.service.commands import teleop
from twistrate.solver.kinematics import tool_pose


def test_list_prints_the_cautions_then_the_devices(capsys, monkeypatch) -> None:
    monkeypatch.setattr(evdev_source.glob, "glob", lambda pattern: [])
    if not _has_evdev():
        assert teleop.main(["--list"]) == 1
        assert "teleop extra" in capsys.readouterr().err
        return
    assert teleop.main(["--list"]) == 0
    out = capsys.readouterr().out
    assert out.index("not a safety-rated function") < out.index("no device reporting six axes")


def _has_evdev() -> bool:
    try:
        import evdev  # noqa: F401
    except ImportError:
        return False
    return True


def test_refusals_name_the_problem(capsys, tmp_path) -> None:
    assert teleop.main(["--keyboard", "--seconds", "0"]) == 2
    assert "--seconds: got 0" in capsys.readouterr().err
    bad = tmp_path / "p.toml"
    bad.write_text("[motion]\nrate = 3\n")
    assert teleop.main(["--keyboard", "--profile", str(bad)]) == 2
    err = capsys.readouterr().err
    assert "motion.rate: got an unknown key; accepted: frame, point" in err
    assert teleop.main(["--server-key", "x"]) == 2


def _read(fd: int, until: str, limit_s: float) -> str:
    out = ""
    end = time.monotonic() + limit_s
    while until not in out and time.monotonic() < end:
        ready, _, _ = select.select([fd], [], [], 0.1)
        if ready:
            try:
                out += os.read(fd, 4096).decode(errors="replace")
            except OSError:
                break
    return out


@pytest.mark.timeout(120)
def test_keyboard_mode_in_a_terminal_moves_the_tool_along_the_held_axis() -> None:
    config = make_config(tick={"rate_hz": 250.0})
    arm = config.load_arm()
    with running_service(config) as run:
        link = run.link()
        q0 = np.array(link.status()["position"])
        ep = run.endpoints
        main_fd, child_fd = pty.openpty()
        proc = subprocess.Popen(
            [sys.executable, "-m", "twistrate.service.commands.cli", "teleop", "--keyboard", "--plain",
             "--intake", ep.intake,
             "--output", ep.output, "--control", ep.control, "--seconds", "20"],
            stdin=child_fd, stdout=child_fd, stderr=child_fd, close_fds=True)
        os.close(child_fd)
        try:
            out = _read(main_fd, "press Enter to enable", 20.0)
            assert "CAUTIONS" in out and out.index("CAUTIONS") < out.index("press Enter")
            held = ""
            for _ in range(100):  # Enter until the line says enabled (the claim may take a moment)
                os.write(main_fd, b"\r")
                held = _read(main_fd, "| enabled", 0.1)
                if "| enabled" in held:
                    break
            assert "| enabled" in held
            os.write(main_fd, b"d")  # +x held: the first character, then auto-repeat every 33 ms
            time.sleep(0.4)
            for _ in range(15):
                os.write(main_fd, b"d")
                time.sleep(0.033)
            moving = _read(main_fd, "moving", 2.0)
            assert "moving" in moving and "v [+0.025 +0.000 +0.000] m/s" in moving
            time.sleep(0.6)  # let go: the hold lapses within repeat_gap, zeros go out
            os.write(main_fd, b"x")
            tail = _read(main_fd, "lease released", 10.0)
            assert "twists sent; motion disabled and the lease released" in tail
            assert proc.wait(10.0) == 0
        finally:
            reap(proc)
            os.close(main_fd)
        time.sleep(0.3)
        q1 = np.array(link.status()["position"])
    moved = tool_pose(arm, q1)[:3, 3] - tool_pose(arm, q0)[:3, 3]
    assert moved[0] > 0.005 and abs(moved[1]) < 0.1 * moved[0] and abs(moved[2]) < 0.1 * moved[0], moved
