"""The teleop profile (validation and messages, the shipped default) and keyboard hold detection."""

from __future__ import annotations

from importlib import resources

import numpy as np
import pytest

from twistrate.clients.teleop.keyboard import KeyHold, strip_escapes
from twistrate.clients.teleop.profile import load_profile, profile_from_dict
from twistrate.solver.errors import ConfigError


def test_default_profile_ships_and_loads() -> None:
    entry = resources.files("twistrate.configs.teleop").joinpath("default.toml")
    assert entry.is_file()
    profile = load_profile()
    assert profile.motion.hold_to_move is True and profile.motion.rate_hz == 125.0
    assert profile == profile_from_dict({}), "the shipped file states the built-in defaults"


def test_hold_to_move_is_on_unless_the_profile_says_otherwise() -> None:
    with pytest.raises(ConfigError, match=r"buttons.hold is unset.*hold_to_move = false"):
        profile_from_dict({"buttons": {"hold": None}})  # only possible from code: TOML has no null
    profile = profile_from_dict({"motion": {"hold_to_move": False}})
    assert profile.motion.hold_to_move is False


@pytest.mark.parametrize(("doc", "pattern"), [
    ({"motion": {"speed": 1}}, r"motion.speed: got an unknown key; accepted: frame, point"),
    ({"speeds": {}}, r"speeds: got an unknown key; accepted: device, axes"),
    ({"axes": {"deadband": 0.95}}, r"axes.deadband.*0.95"),
    ({"axes": {"source": [0, 0, 1, 2, 3, 4]}}, r"each device axis 0..5 exactly once"),
    ({"axes": {"sign": [1, 1, 1, 1, 1]}}, r"one entry per axis"),
    ({"axes": {"sign": [1, 1, 1, 1, 1, 2]}}, r"axes.sign.5: got 2"),
    ({"speed": {"linear_max": 3.0}}, r"speed.linear_max: got 3.0; accepted: .*less than or equal to 1"),
    ({"speed": {"scales": [0.5, 0.25], "start": 0.5}}, r"strictly ascending"),
    ({"speed": {"start": 0.3}}, r"start \(0.3\) must be one of scales"),
    ({"motion": {"frame": "world"}}, r"motion.frame: got 'world'"),
    ({"buttons": {"hold": 1, "frame": 1}}, r"one action"),
])
def test_bad_profiles_are_refused_with_the_key_and_value(doc, pattern) -> None:
    with pytest.raises(ConfigError, match=pattern):
        profile_from_dict(doc, "p.toml")


def test_profile_file_errors(tmp_path) -> None:
    with pytest.raises(ConfigError, match=r"profile file.*readable TOML"):
        load_profile(tmp_path / "missing.toml")
    bad = tmp_path / "bad.toml"
    bad.write_text("[motion\n")
    with pytest.raises(ConfigError, match="not valid TOML"):
        load_profile(bad)
    good = tmp_path / "good.toml"
    good.write_text("[motion]\nframe = 'tool'\nrate_hz = 100\n[speed]\nlinear_max = 0.05\n")
    profile = load_profile(good)
    assert profile.motion.frame == "tool" and profile.motion.rate_hz == 100
    assert profile.speed.linear_max == 0.05


def _repeat_stream(key: str, t0: float, held_s: float, delay_s: float = 0.5, period_s: float = 0.033) -> list:
    """What a terminal sends while a key is held: one character, then auto-repeat after the delay."""
    times = [t0]
    t = t0 + delay_s
    while t <= t0 + held_s:
        times.append(t)
        t += period_s
    return [(key, tt) for tt in times]


def test_key_hold_spans_the_auto_repeat_delay_and_ends_soon_after_release() -> None:
    hold = KeyHold(first_gap_s=0.7, repeat_gap_s=0.15)
    stream = _repeat_stream("w", 1.0, held_s=2.0)
    last = stream[-1][1]
    i = 0
    for now in np.arange(1.0, 4.0, 0.004):
        while i < len(stream) and stream[i][1] <= now:
            hold.press(stream[i][0], stream[i][1])
            i += 1
        u = hold.deflection(now)
        if now <= last:
            np.testing.assert_array_equal(u, [0, 1, 0, 0, 0, 0])  # held throughout, the delay included
        elif now > last + 0.15:
            assert not u.any()  # released within repeat_gap after the last character


def test_a_tap_moves_for_the_first_gap_and_another_key_ends_the_hold() -> None:
    hold = KeyHold(0.7, 0.15)
    assert hold.press("a", 0.0) is None
    assert hold.deflection(0.69)[0] == -1.0 and not hold.deflection(0.71).any()
    hold.press("o", 1.0)
    assert hold.deflection(1.1)[5] == 1.0
    assert hold.press("t", 1.2) == "frame"
    assert not hold.deflection(1.2).any()
    assert hold.press("\r", 1.3) == "arm" and hold.press("x", 1.4) == "quit"
    hold.press("I", 2.0)  # capitals too (caps lock)
    assert hold.deflection(2.0)[3] == 1.0


def test_escape_sequences_are_dropped() -> None:
    assert strip_escapes("a\x1b[A\x1b[1;5Cw\x1bOPx\x1b[3~") == "awx"
