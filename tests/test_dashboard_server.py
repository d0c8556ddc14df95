"""The dashboard's server without a browser: the page and its assets come from the package with a
Content-Security-Policy that forbids anything from elsewhere (W3C Content Security Policy Level 3) and
reference nothing outside the server; only GET is served (RFC 9110 15.5.6: 405 for other methods);
the WebSocket frames are JSON (RFC 8259: no NaN) of the documented schema, the first one full, then
updates whose history rows join up without gap or repeat; what a page sends is ignored."""

from __future__ import annotations

import asyncio
import json
import math
import re
from importlib import resources
from pathlib import Path

import pytest

aiohttp = pytest.importorskip("aiohttp")

from twistrate.clients.watch import dashboard as D  # noqa: E402, N812
from twistrate.clients.watch.feed import FakeFeed  # noqa: E402
from twistrate.clients.watch.model import Fleet  # noqa: E402

pytestmark = pytest.mark.timeout(60)
DOC = Path(__file__).resolve().parents[1] / "docs" / "dashboard.md"


def _run(coro):
    import uvloop

    return uvloop.run(coro)


def test_assets_are_packaged_and_local_only():
    static = resources.files("twistrate.clients.watch").joinpath("static")
    for name, _ in D.ASSETS.values():
        text = static.joinpath(name).read_text(encoding="utf-8")
        assert not re.search(r"(https?:)?//[a-z0-9.-]+\.[a-z]{2,}/", text, re.I), f"{name} points elsewhere"
        for ref in re.findall(r'(?:src|href)="([^"]+)"|from "([^"]+)"', text):
            ref = ref[0] or ref[1]
            assert ref.startswith(("/static/", "data:")), (name, ref)
            assert ref.startswith("data:") or ref in D.ASSETS, (name, ref)


async def _session_checks():
    feed = FakeFeed(["a", "b"], rate_hz=50.0)
    dash = D.Dashboard(Fleet(), [feed], frame_hz=20.0)
    port = await dash.start("127.0.0.1", 0)
    base = f"http://127.0.0.1:{port}"
    out = {}
    try:
        async with aiohttp.ClientSession() as s:
            async with s.get(base + "/") as r:
                out["index"] = (r.status, r.headers.get("Content-Security-Policy"), await r.text())
            for path in D.ASSETS:
                async with s.get(base + path) as r:
                    assert r.status == 200 and r.headers["Content-Type"] == D.ASSETS[path][1], path
            async with s.post(base + "/") as r:
                out["post"] = r.status
            async with s.get(base + "/nothing-here") as r:
                out["missing"] = r.status
            await asyncio.sleep(0.5)  # some history before the page connects
            async with s.ws_connect(base + "/ws") as ws:
                await ws.send_str('{"op": "enable"}')  # a page trying to act: ignored
                frames = []
                while len(frames) < 12:
                    msg = await asyncio.wait_for(ws.receive(), 5.0)
                    frames.append(msg.data)
            out["frames"] = frames
            out["received_from_pages"] = dash.received_from_pages
    finally:
        await dash.stop()
    return out


def test_page_frames_and_read_only():
    out = _run(_session_checks())
    status, csp, html = out["index"]
    assert status == 200 and "default-src 'none'" in csp and "connect-src 'self'" in csp
    assert "not a safety-rated function" in html and "nothing on this page can move an arm" in html
    assert out["post"] == 405 and out["missing"] == 404
    frames = [
        json.loads(f, parse_constant=lambda c: pytest.fail(f"non-JSON constant {c}")) for f in out["frames"]
    ]
    assert [f["type"] for f in frames] == ["full"] + ["update"] * 11
    assert all(f["schema"] == D.SCHEMA for f in frames)
    # every history row reaches the page exactly once when it skips the indices it already has
    for k in range(2):
        got: dict[int, list] = {}
        for f in frames:
            for row in f["arms"][k]["history"]:
                got.setdefault(row[0], row)
        idx = sorted(got)
        assert len(idx) > 25 and idx == list(range(idx[0], idx[-1] + 1))
        assert frames[0]["arms"][k]["history"][0][0] == 0  # the full frame starts at the first row kept
    assert out["received_from_pages"] == 1  # the page's message was read and ignored (no reply frame)


def test_frame_keys_are_the_documented_ones_and_nan_is_null():
    fleet = Fleet()
    view = fleet.arm("x")
    view.on_health(
        {
            "tick": 1,
            "stamp_ns": 1,
            "manipulability": math.nan,
            "manipulability_linear": 0.1,
            "manipulability_angular": 0.2,
            "singular_values": [0.3, 0.1],
            "inverse_condition": 0.3,
            "weakest_linear": [1, 0, 0],
            "weakest_angular": [0, 0, 0],
            "damping": 0.0,
            "scale": 1.0,
            "limit_margin": [math.inf, 0.2],
            "state": "clear",
            "mode": "running",
            "rejected": {},
            "overruns": 0,
        },
        0.0,
    )
    frame = json.loads(D.encode_frame(fleet, "full", 0.5))
    arm = frame["arms"][0]
    assert arm["latest"]["manipulability"] is None and arm["latest"]["limit_margin"] == [None, 0.2]
    doc = DOC.read_text(encoding="utf-8")
    documented = set(re.findall(r"^\| `([a-z_]+)`(?:, `([a-z_]+)`)? \|", doc, re.M))
    names = {n for pair in documented for n in pair if n}
    assert set(frame) <= names and set(arm) <= names, (set(frame) | set(arm)) - names
    for key in arm["latest"]:
        assert f"`{key}`" in doc
