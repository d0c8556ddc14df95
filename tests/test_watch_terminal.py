"""The terminal monitor: rendered at 80 columns from a fake feed every line fits, each arm has its panel,
the state is written in words and marks (not colour alone), a gone arm says GONE; and the real program
in a terminal multiplexer (tmux, capture-pane) draws the same at 80 columns, in place."""

from __future__ import annotations

import shutil
import subprocess
import sys
import time
import uuid

import pytest

pytest.importorskip("rich")

from twistrate.clients.watch.fake import FakeArm
from twistrate.clients.watch.model import Fleet
from twistrate.clients.watch.terminal import WIDTH, render_text, secs

pytestmark = pytest.mark.timeout(60)


def _fleet_at(t_end: float, names=("left", "right"), silent_after: dict | None = None) -> Fleet:
    """A fleet fed by fake arms at 50 Hz on a simulated clock up to t_end s."""
    fleet = Fleet(gone_after_s=1.0)
    arms = {n: FakeArm(n, phase=2.5 * i, period_s=12.0) for i, n in enumerate(names)}
    for n, a in arms.items():
        fleet.arm(n).set_arm(a.description())
        fleet.arm(n).set_thresholds(0.06, 0.02)
    t = 0.0
    while t <= t_end:
        for n, a in arms.items():
            if silent_after and n in silent_after and t > silent_after[n]:
                continue
            for kind, msg in a.messages(t, 1.7e9 + t):
                fleet.feed(n, kind, msg, t)
        fleet.check(t)
        t += 0.02
    return fleet


def test_screen_fits_80_columns_with_a_panel_per_arm():
    fleet = _fleet_at(6.0, names=("left", "right", "bench"))
    text = render_text(fleet, 6.0)
    lines = text.splitlines()
    assert max(len(line) for line in lines) <= WIDTH
    for name in ("left", "right", "bench"):
        assert sum(f" {name} (fake-{name})" in line for line in lines) == 1
    assert text.count("mode RUNNING") == 3 and "lease held by fake-operator" in text
    assert text.count("turn  [") == 3  # joint bars, one row per joint
    # the state is told in words and a mark: at 6 s of a 12 s cycle the arms are at different points
    marks = {"[ok] CLEAR", "[!] NARROW", "[!!] PINCHED"}
    assert sum(text.count(m) for m in marks) == 3


def test_gone_arm_is_marked_gone_and_its_event_listed():
    fleet = _fleet_at(4.0, silent_after={"right": 2.0})
    text = render_text(fleet, 4.0)
    right = text[text.index(" right (") :]
    left = text[text.index(" left (") : text.index(" right (")]
    assert "GONE - nothing for 2s" in right and "GONE" not in left
    assert "gone nothing received for 1.0 s" in right


@pytest.mark.skipif(shutil.which("tmux") is None, reason="tmux not installed (Debian package tmux)")
def test_monitor_in_tmux_at_80_columns(tmp_path):
    session = f"twr-watch-{uuid.uuid4().hex[:8]}"
    cmd = f"{sys.executable} -m twistrate.clients.watch.monitor --fake left,right --seconds 15 --screen"
    subprocess.run(["tmux", "new-session", "-d", "-s", session, "-x", "80", "-y", "45", cmd], check=True)
    try:
        screens = []
        end = time.monotonic() + 10.0
        while time.monotonic() < end and len(screens) < 2:
            time.sleep(1.0)
            out = subprocess.run(
                ["tmux", "capture-pane", "-p", "-t", session], capture_output=True, text=True, check=True
            ).stdout
            if " right (fake-right)" in out and "joint position in range" in out:
                screens.append(out)
        (tmp_path / "tmux-screen.txt").write_text("\n\n".join(screens))
        assert len(screens) == 2, screens
        for out in screens:
            lines = out.splitlines()
            assert max(len(line) for line in lines) <= 80
            assert lines[0].startswith(
                "twistrate watch - 2 arm(s), read-only"
            )  # redrawn in place, at the top
            assert out.count("╭─") == 2 and "lease held by fake-operator" in out
            assert "Not a safety-rated function" in out  # the cautions on every screen
            # the foresight: a line per arm (the second panel may run past the pane's foot)
            assert "at these rates: pinched " in out
        assert screens[0] != screens[1]  # live: the values moved between the two captures
        ahead = [next(line for line in out.splitlines() if "at these rates" in line) for out in screens]
        assert ahead[0] != ahead[1], ahead  # and the foresight of the first arm with them
    finally:
        subprocess.run(["tmux", "kill-session", "-t", session], check=False)


def _ahead(text: str, name: str) -> tuple[str, list[str]]:
    """The foresight line and the joint rows' last column ("lim in") of arm `name`'s panel."""
    panel = text[text.index(f" {name} (") :].split("╰")[0]
    lines = panel.splitlines()
    line = next(x for x in lines if "at these rates:" in x)
    rows = [x.strip(" │").split()[-1] for x in lines if x.strip(" │").split()[:1] and
            x.strip(" │").split()[0] in ("turn", "lift", "bend", "nod")]
    return line, rows


def test_foresight_is_shown_as_the_health_message_gives_it_and_follows_it():
    """The line says what the newest health message's foresight says (time to pinched, the first joint
    to reach a limit and when), each joint row its time to the limit; both change as the arm moves."""
    seen = []
    for t_end in (1.5, 3.0, 4.4, 6.0):
        fleet = _fleet_at(t_end, names=("left",))
        view = fleet.arms["left"]
        lt = view.latest
        line, rows = _ahead(render_text(fleet, t_end), "left")
        to_pinched = lt["time_to_pinched_s"]
        if to_pinched is None:
            assert "pinched not ahead" in line
        elif to_pinched == 0.0:
            assert "pinched now" in line
        else:
            assert f"pinched in {secs(to_pinched)}" in line
        first = lt["first_limit_joint"]
        assert first is not None  # the scripted arm always moves some joint toward a limit
        assert f"first limit {view.joints[first]['name']} in {secs(lt['time_to_first_limit_s'])}" in line
        assert rows == [secs(x) for x in lt["time_to_limit_s"]]
        # the first joint is the one with the smallest time (the message's own claim, shown unchanged)
        assert min(x for x in lt["time_to_limit_s"] if x is not None) == lt["time_to_first_limit_s"]
        seen.append((line, rows))
    assert len({line for line, _ in seen}) == len(seen), seen  # it follows the arm
    states = {line.split("pinched ")[1].split()[0] for line, _ in seen}
    assert {"in", "now"} <= states, seen  # approaching the threshold, then there


def test_foresight_words_for_never_and_unknown():
    assert secs(None) == "-" and secs(float("inf")) == "-"
    assert (secs(3.21), secs(42.4), secs(1234.0)) == ("3.2s", "42s", ">999s")


def test_foresight_before_any_health_message_says_so():
    fleet = Fleet()
    fleet.arm("quiet").set_status({"mode": "disabled", "holder": None}, 0.0)
    assert "at these rates: n/a (no health message yet)" in render_text(fleet, 0.5)


def test_keepout_line_names_the_pair_and_the_limiting_constraint_within_80_columns():
    """The keep-out row reads what the newest health message's `keepout` and `limiting` say
    (docs/protocol.md 7.4): none configured; a zone pair and a joint bound; a keep-out damper on the
    nearest pair; a self pair with a different limiting pair."""
    fleet = _fleet_at(1.0, names=("left",))
    view = fleet.arms["left"]
    msg = FakeArm("left", phase=0.0, period_s=12.0)
    health = next(m for kind, m in msg.messages(1.02, 1.7e9) if kind == "health")
    cases = [
        (None, {"by": "none"}, "keep-out none configured   limit none"),
        ({"nearest_m": 0.0412, "link": "bend", "other": "table", "other_kind": "zone"},
         {"by": "joint", "joint": 1, "bound": "velocity"},
         "keep-out 0.041 m bend to table   limit lift velocity"),
        ({"nearest_m": 0.03, "link": "nod", "other": "table", "other_kind": "zone"},
         {"by": "keepout", "link": "nod", "other": "table"},
         "keep-out 0.030 m nod to table   limit keep-out, this pair"),
        ({"nearest_m": -0.002, "link": "nod", "other": "turn", "other_kind": "link"},
         {"by": "keepout", "link": "bend", "other": "wall"},
         "keep-out -0.002 m nod to turn (self)   limit keep-out bend to wall"),
    ]
    for keepout, limiting, expected in cases:
        fleet.feed("left", "health", {**health, "keepout": keepout, "limiting": limiting}, 1.02)
        lines = render_text(fleet, 1.02).splitlines()
        row = [line for line in lines if "keep-out" in line]
        assert len(row) == 1 and expected in row[0], (expected, row)
        assert max(len(line) for line in lines) <= WIDTH
    assert view.latest["keepout"]["other_kind"] == "link" and view.latest["limiting"]["by"] == "keepout"
