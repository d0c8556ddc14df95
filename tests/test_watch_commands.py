"""`twistrate dashboard` and `twistrate watch` against running services: named by their configuration
files or by endpoints, with CURVE keys the way the client library takes them (ZeroMQ CURVE, RFC 26
CurveZMQ); the dashboard serves the page and frames of the service's arm; the monitor draws it in a
terminal multiplexer at 80 columns."""

from __future__ import annotations

import argparse
import json
import os
import re
import shutil
import subprocess
import sys
import time
import uuid

import pytest

aiohttp = pytest.importorskip("aiohttp")

from dashboard_harness import served  # noqa: E402
from service_harness import config_dict, make_config, reap, running_service, twistrate, wait_for  # noqa: E402

from twistrate.clients.watch.dashboard import Dashboard  # noqa: E402
from twistrate.clients.watch.model import Fleet  # noqa: E402
from twistrate.clients.watch.priority import DEFAULT_NICE  # noqa: E402
from twistrate.service import security  # noqa: E402
from twistrate.service.commands import watch as watch_cmd  # noqa: E402
from twistrate.service.wire.discovery import write_endpoints  # noqa: E402
from twistrate.solver.errors import InputError  # noqa: E402

pytestmark = pytest.mark.timeout(120)


def _toml(doc: dict) -> str:
    def value(v):
        if isinstance(v, str):
            return json.dumps(v)
        if isinstance(v, bool):
            return "true" if v else "false"
        if isinstance(v, list):
            return "[" + ", ".join(value(x) for x in v) + "]"
        return repr(v)

    return "".join(
        f"[{s}]\n" + "".join(f"{k} = {value(v)}\n" for k, v in vals.items()) for s, vals in doc.items()
    )


def _args(*argv: str) -> argparse.Namespace:
    parser = argparse.ArgumentParser()
    watch_cmd.add_target_arguments(parser)
    return parser.parse_args(list(argv))


def _on(ep, **sections) -> dict:
    """A config document on the endpoints a running service bound (a watcher connects to them)."""
    return config_dict(
        endpoints={"intake": ep.intake, "output": ep.output, "control": ep.control}, **sections
    )


def test_targets_from_configs_endpoint_files_and_endpoints(tmp_path):
    fixed = {
        "intake": "tcp://127.0.0.1:47901",
        "output": "tcp://127.0.0.1:47902",
        "control": "tcp://127.0.0.1:47903",
    }
    path = tmp_path / "cell-a.toml"
    path.write_text(_toml(config_dict(endpoints=fixed)))
    files = write_endpoints(tmp_path / "cell-c.json", {**fixed, "control": "tcp://127.0.0.1:47913"})
    feeds = watch_cmd.feeds_from_args(
        _args(
            "--config",
            str(path),
            "--config",
            f"{path}=again",
            "--endpoints",
            str(files),
            "--connect",
            "far=tcp://cell-b:1,tcp://cell-b:2",
        )
    )
    assert [f.name for f in feeds] == ["cell-a", "again", "cell-c", "far"]
    assert feeds[0].endpoints.output == fixed["output"] and feeds[0].thresholds == (0.06, 0.015)
    assert feeds[2].endpoints.control == "tcp://127.0.0.1:47913" and feeds[2].thresholds is None
    assert feeds[3].endpoints.control == "tcp://cell-b:2" and feeds[3].curve is None
    with pytest.raises(InputError, match="--connect"):
        watch_cmd.feeds_from_args(_args("--connect", "far=cell-b:1"))
    with pytest.raises(InputError, match="unique name"):
        watch_cmd.feeds_from_args(_args("--config", str(path), "--config", str(path)))
    star = tmp_path / "star.toml"
    star.write_text(_toml(config_dict()))  # ports picked by the operating system: not knowable from the file
    with pytest.raises(InputError, match="--endpoints FILE"):
        watch_cmd.feeds_from_args(_args("--config", str(star)))


def test_curve_service_is_watched_with_the_clients_keys(tmp_path):
    _, server_secret = security.write_keypair(tmp_path, "service")
    _, watcher_secret = security.write_keypair(tmp_path / "clients", "watcher")
    sec = {"server_secret_key": str(server_secret), "client_public_keys": [str(tmp_path / "clients")]}
    with running_service(make_config(security=sec)) as run:
        path = tmp_path / "secure.toml"
        path.write_text(_toml(_on(run.endpoints, security=sec)))
        with pytest.raises(InputError, match="--client-key"):
            watch_cmd.feeds_from_args(_args("--config", str(path)))
        (feed,) = watch_cmd.feeds_from_args(_args("--config", str(path), "--client-key", str(watcher_secret)))
        assert feed.curve is not None
        assert feed.curve.server_public == security.load_secret_keypair(server_secret)[0]
        fleet = Fleet()
        with served(Dashboard(fleet, [feed])):
            view = fleet.arm("secure")
            wait_for(lambda: view.received["health"] > 10 and view.arm == "reach7")
        # a watcher without the keys hears nothing
        (plain,) = watch_cmd.feeds_from_args(
            _args("--connect", f"x={run.endpoints.output},{run.endpoints.control}")
        )
        fleet = Fleet()
        with served(Dashboard(fleet, [plain])):
            time.sleep(1.0)
            assert fleet.arm("x").received["health"] == 0 and not fleet.arm("x").connected


def _niceness_of_threads(pid: int) -> dict[str, int]:
    """Thread name -> niceness of every thread of a process (Linux proc(5): /proc/PID/task/TID/stat,
    field 19 is the nice value; field 2 the name)."""
    out = {}
    for task in os.listdir(f"/proc/{pid}/task"):
        with open(f"/proc/{pid}/task/{task}/stat") as f:
            head, rest = f.read().rsplit(")", 1)
        out[f"{head.split('(', 1)[1]}/{task}"] = int(rest.split()[16])
    return out


def test_dashboard_command_serves_a_running_service(tmp_path):
    with running_service(make_config()) as run:
        path = tmp_path / "cell-a.toml"
        path.write_text(_toml(_on(run.endpoints)))
        proc = twistrate("dashboard", "--config", str(path), "--port", "0", "--seconds", "30")
        try:
            port = None
            for line in proc.stdout:  # the cautions, then where it serves
                m = re.search(r"dashboard on http://127\.0\.0\.1:(\d+)/", line)
                if m:
                    port = int(m.group(1))
                    break
            assert port is not None, proc.communicate()

            async def fetch():
                async with aiohttp.ClientSession() as s:
                    async with s.get(f"http://127.0.0.1:{port}/") as r:
                        page = await r.text()
                    async with s.ws_connect(f"http://127.0.0.1:{port}/ws") as ws:
                        for _ in range(40):
                            f = json.loads((await ws.receive()).data)
                            if f["arms"] and f["arms"][0]["arm"] and f["arms"][0]["history"]:
                                return page, f
                return page, f

            import uvloop

            page, frame = uvloop.run(fetch())
            threads = _niceness_of_threads(proc.pid)
        finally:
            proc.terminate()
            reap(proc)
    # it lowered its own priority before starting a thread: every thread (the feed's receive and control
    # threads, ZeroMQ's I/O threads, the event loop's) runs at the default niceness above ours
    assert len(threads) >= 4 and set(threads.values()) == {min(19, os.nice(0) + DEFAULT_NICE)}, threads
    assert "Arms on watch" in page
    arm = frame["arms"][0]
    assert arm["name"] == "cell-a" and arm["arm"] == "reach7" and arm["mode"] == "disabled"
    assert arm["thresholds"] == {
        "narrow_below_m": pytest.approx(0.06),
        "pinched_below_m": pytest.approx(0.015),
    }


@pytest.mark.skipif(shutil.which("tmux") is None, reason="tmux not installed (Debian package tmux)")
def test_watch_command_in_tmux_against_a_running_service(tmp_path):
    session = f"twr-watch-{uuid.uuid4().hex[:8]}"
    with running_service(make_config()) as run:
        path = tmp_path / "bench-cell.toml"
        path.write_text(_toml(_on(run.endpoints)))
        cmd = (
            f"{sys.executable} -m twistrate.service.commands.cli watch --config {path} --seconds 20 --screen"
        )
        subprocess.run(["tmux", "new-session", "-d", "-s", session, "-x", "80", "-y", "40", cmd], check=True)
        try:
            out = ""
            end = time.monotonic() + 15
            while time.monotonic() < end and "flange_rol" not in out:
                time.sleep(0.5)
                out = subprocess.run(
                    ["tmux", "capture-pane", "-p", "-t", session], capture_output=True, text=True, check=True
                ).stdout
            (tmp_path / "tmux-screen.txt").write_text(out)
        finally:
            subprocess.run(["tmux", "kill-session", "-t", session], check=False)
    lines = out.splitlines()
    assert "bench-cell (reach7)" in out and "mode DISABLED" in out and "[ok] CLEAR" in out, out
    assert max(len(line) for line in lines) <= 80
    assert sum(bool(re.match(r"│ \S+ +\[[.|<>]+\]", line)) for line in lines) == 7  # a row per joint
    assert lines[1].startswith("Not a safety-rated function")  # the cautions, unwrapped


def test_nice_option_takes_0_to_19_and_lowers_the_priority_of_the_calling_process(capsys):
    from twistrate.clients.watch.priority import add_nice_argument

    parser = argparse.ArgumentParser(prog="dash")
    add_nice_argument(parser)
    assert parser.parse_args([]).nice == DEFAULT_NICE and parser.parse_args(["--nice", "0"]).nice == 0
    for bad in ("20", "-1", "x"):
        with pytest.raises(SystemExit):
            parser.parse_args(["--nice", bad])
        assert "--nice" in capsys.readouterr().err
    # in a child process (the niceness of this one stays): --nice 3 raises it by 3 (nice(2))
    code = (
        "import os; from twistrate.clients.watch.priority import lower_priority as f; "
        "a = os.nice(0); b = f(3); c = f(0); print(a, b, c)"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    a, b, c = map(int, out.split())
    assert b == min(19, a + 3) and c == b
