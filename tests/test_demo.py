"""The demo's pieces: a compressed pass travels the same path as the full one (the integral of every
twist component is unchanged), the live panel fits 80 columns, its first refresh never shows a tick
rate of 0, its labels say what the numbers are, the pass clock follows the share of the twist the
service carries out, the service's limit-event counter equals the recording summary's for the same run,
and the cautions come only after the arguments are checked."""

from __future__ import annotations

import io
import re

import numpy as np
import pytest
from service_harness import make_config, running_service, stream_until, twistrate

from twistrate.service.commands import demo
from twistrate.service.recorder import Recorder, read_recording, summarize


def _integral(phases, dt=0.001):
    total = sum(p.seconds for p in phases)
    ts = np.arange(0.0, total, dt)
    v = np.array([np.r_[demo.scripted_twist(t, phases)[1], demo.scripted_twist(t, phases)[2]] for t in ts])
    return v.sum(axis=0) * dt, total


def test_a_compressed_pass_travels_the_same_path():
    full, t_full = _integral(demo.scenario(demo.DEFAULT_SECONDS), dt=5e-4)
    short, t_short = _integral(demo.scenario(8.0), dt=5e-4)
    assert t_full == pytest.approx(demo.DEFAULT_SECONDS) and t_short == pytest.approx(8.0)
    np.testing.assert_allclose(short, full, atol=2e-3)  # rectangle rule, 0.5 ms steps (10 phase ends)
    assert [p.name for p in demo.scenario(8.0)] == [p.name for p in demo.SCENARIO]


def test_the_pass_clock_runs_at_the_share_the_service_carries_out():
    tun = make_config().tunables()
    clock = demo.PassClock(tun)
    clock.sent((0.0, 0.0, 0.0), (0.0, 0.0, 2 * tun.angular_max))  # twice the angular cap: factor 1/2
    assert clock.advance(1.0, None) == pytest.approx(0.5)
    assert clock.advance(2.0, 0.5) == pytest.approx(0.75)  # and half of that scaled by the limits
    clock.sent((0.0, 0.0, 0.0), (0.0, 0.0, 0.0))  # a zero twist holds nothing back
    assert clock.advance(3.0, 0.0) == pytest.approx(1.75)
    clock.sent((1.0, 0.0, 0.0), (0.0, 0.0, 0.0))
    assert clock.advance(4.0, 0.0) == pytest.approx(1.75 + demo.PASS_RATE_MIN)  # never stalls


class _Source:
    phase = "hold still"


class _Tty(io.StringIO):
    def isatty(self):
        return True


def test_the_panel_fits_80_columns_and_says_what_the_numbers_are():
    with running_service(make_config()) as run:
        out = _Tty()
        display = demo.Display(run.service, _Source(), out=out)
        first = display.fields()["tick"]
        assert not re.match(r"0(\.0)? Hz", first), first  # "measuring" or a measured rate
        display.start()
        display.show()
        display.stop()
        fields = display.fields()
        plain = demo.Display(run.service, _Source(), out=io.StringIO())
        plain.show()
    visible = re.sub(r"\x1b\[[0-9;?]*[A-Za-z]", "", out.getvalue())
    lines = [line for line in visible.splitlines() if line.strip()]
    assert lines and max(len(line) for line in lines) <= 80
    assert "twistrate demo" in visible
    assert fields["scale"] == "- (no twist to scale)"  # at rest: no twist, not a collapse to 0
    assert "(lambda)" in fields["damping"] and fields["damping"].endswith("m (lambda)")
    assert len(plain.out.getvalue().splitlines()[0]) <= 80


def test_the_speed_cap_label_says_factor(monkeypatch):
    with running_service(make_config()) as run:
        link = run.link()
        link.claim("t")
        link.enable()
        stream_until(link, [0.0, 0.0, 0.0], [0.0, 0.0, 3.0], lambda cs: sum(c.answers >= 0 for c in cs) > 30)
        fields = demo.Display(run.service, _Source(), out=io.StringIO()).fields()
    assert fields["speed cap"].startswith("x") and "factor" in fields["speed cap"]
    assert "share of the twist" in fields["scale"]


def test_the_limit_event_counter_equals_the_recording_summary(tmp_path):
    cfg = make_config()
    arm = cfg.load_arm()
    rec = Recorder(tmp_path / "r.trec", arm, cfg.tick.rate_hz)
    with running_service(cfg, recorder=rec) as run:
        link = run.link()
        link.claim("t")
        link.enable()
        # roll the flange into its limits, then the other way
        stream_until(link, [0.0, 0.0, 0.0], [0.0, 0.0, 1.0],
                     lambda cs: run.service.counters()["limit_events"] >= 2, limit_s=20.0)
        stream_until(link, [0.0, 0.0, 0.0], [0.0, 0.0, -1.0],
                     lambda cs: run.service.counters()["limit_events"] >= 4, limit_s=20.0)
        link.disable()
    counted = run.service.counters()["limit_events"]
    header, data = read_recording(tmp_path / "r.trec")
    assert counted >= 4 and summarize(header, data)["limit_events"] == counted


def test_the_cautions_come_after_the_arguments_are_checked(tmp_path):
    for args in (["--seconds", "0"], ["--config", str(tmp_path / "missing.toml")]):
        proc = twistrate("demo", *args)
        out, err = proc.communicate(timeout=60)
        assert proc.returncode == 2 and "CAUTIONS" not in out and err, (args, out, err)
