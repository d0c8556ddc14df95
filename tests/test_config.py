"""The service configuration: defaults, packaged configs, error messages naming key and fix, tunables.

External reference: ISO 10218-1:2011 (Robots and robotic devices - Safety requirements for industrial
robots - Part 1: Robots), 5.6 reduced speed: the tool centre point speed shall not exceed 250 mm/s.
"""

from __future__ import annotations

import math
import shutil
from importlib import resources
from pathlib import Path

import pytest

from twistrate.service import config as cfg
from twistrate.service import tunables as tun
from twistrate.service.security import write_keypair
from twistrate.service.state import E_BAD_ARGUMENT
from twistrate.solver.errors import ConfigError, ControlError
from twistrate.solver.options import HealthThresholds, SolverOptions


def _load(tmp_path: Path, text: str) -> cfg.ServiceConfig:
    path = tmp_path / "service.toml"
    path.write_text(text)
    return cfg.load_config(path)


def _error(tmp_path: Path, text: str) -> str:
    with pytest.raises(ConfigError) as info:
        _load(tmp_path, text)
    return str(info.value)


# --- defaults and packaged files -------------------------------------------------------------------


def test_default_config_needs_no_file_and_runs_the_example_arm():
    config = cfg.load_config()
    arm = config.load_arm()
    assert arm.name == "reach7" and arm.n == 7
    assert config.simulation.enabled
    assert config.tick.rate_hz == cfg.DEFAULT_TICK_HZ
    assert config.watchdog.twist_timeout_ms == 100.0
    options = config.solver_options(arm)
    assert isinstance(options, SolverOptions) and options.damping == "singular_value"
    assert config.health_thresholds() == HealthThresholds(0.06, 0.015, 0.2)


def test_empty_file_gives_the_model_defaults(tmp_path):
    config = _load(tmp_path, "")
    assert config == cfg.ServiceConfig()
    assert config.endpoints.intake == "tcp://127.0.0.1:47310"


@pytest.mark.parametrize("name", sorted(p.name for p in resources.files(cfg.CONFIG_PACKAGE).iterdir()
                                        if p.name.endswith(".toml")))
def test_every_packaged_config_loads_with_its_arm(name):
    config = cfg.load_config(Path(str(resources.files(cfg.CONFIG_PACKAGE).joinpath(name))))
    arm = config.load_arm()
    config.solver_options(arm)
    assert config.initial_posture(arm) is None or len(config.initial_posture(arm)) == arm.n


def test_reduced_speed_default_is_the_iso_10218_1_limit(tmp_path):
    # ISO 10218-1:2011, 5.6 reduced speed: TCP speed not above 250 mm/s
    assert cfg.REDUCED_SPEED_MAX == 0.25
    config = _load(tmp_path, "")
    assert config.speed.reduced_linear_max == 0.25
    assert config.tunables().reduced_linear_max == 0.25
    message = _error(tmp_path, "[speed]\nreduced_linear_max = 0.3\n")
    assert "speed.reduced_linear_max" in message and "0.3" in message and "<= 0.25" in message


def test_reduced_speed_mode_caps_the_tool_speed(tmp_path):
    t = _load(tmp_path, "[speed]\nlinear_max = 1.0\nreduced_speed = true\n").tunables()
    assert t.tool_linear_max == 0.25
    assert tun.apply_set(t, {"reduced_speed": False}).tool_linear_max == 1.0


@pytest.mark.parametrize("rate", [500, 1000, 250.0])
def test_tick_rates_accepted(tmp_path, rate):
    config = _load(tmp_path, f"[tick]\nrate_hz = {rate}\n")
    assert config.tick.rate_hz == rate
    assert math.isclose(config.tick_period_s, 1.0 / rate)


def test_realtime_priority_defaults_to_a_modest_fifo_level_and_zero_disables(tmp_path):
    # sched(7): SCHED_FIFO priorities run 1 (low) to 99 (high); the kernel's threaded interrupt handlers
    # default to 50 (common practice), so a modest default stays below them
    default = _load(tmp_path, "").tick.realtime_priority
    assert 1 <= default < 50
    assert _load(tmp_path, "[tick]\nrealtime_priority = 0\n").tick.realtime_priority == 0
    assert _load(tmp_path, "[tick]\nrealtime_priority = 99\n").tick.realtime_priority == 99


def test_degrees_where_the_key_says_so(tmp_path):
    config = _load(tmp_path, "[speed]\nangular_max_deg_s = 90\n"
                             "[solver]\nposture_deg = [0, 30, 0, -90, 0, 60, 0]\n"
                             "[simulation]\ninitial_posture_deg = [10, 0, 0, -45, 0, 45, 0]\n")
    arm = config.load_arm()
    assert math.isclose(config.tunables().angular_max, math.pi / 2)
    assert config.solver_options(arm).posture == pytest.approx(
        tuple(math.radians(x) for x in (0, 30, 0, -90, 0, 60, 0)))
    assert config.initial_posture(arm)[0] == pytest.approx(math.radians(10))


def test_relative_arm_path_resolves_against_the_config_file(tmp_path, monkeypatch):
    arms = tmp_path / "arms"
    arms.mkdir()
    shutil.copy(Path(str(resources.files("twistrate.configs.arms").joinpath("planar3.toml"))),
                arms / "my_arm.toml")
    monkeypatch.chdir(Path("/"))  # the working directory must not matter
    config = _load(tmp_path, '[arm]\nfile = "arms/my_arm.toml"\n')
    assert config.load_arm().n == 3


# --- errors name the key path, the value and what is accepted ----------------------------------------


def test_unknown_key_names_the_key_and_the_known_ones(tmp_path):
    message = _error(tmp_path, "[tick]\nrate = 500\n")
    assert "tick.rate" in message and "rate_hz" in message and "remove or rename" in message
    message = _error(tmp_path, "[ticks]\nrate_hz = 500\n")
    assert "ticks" in message and "tick" in message and "remove or rename" in message


@pytest.mark.parametrize("text,key,value,accepted", [
    ("[tick]\nrate_hz = 5000\n", "tick.rate_hz", "5000", "<= 2000"),
    ("[tick]\nrate_hz = 5\n", "tick.rate_hz", "5", ">= 10"),
    ("[tick]\nrate_hz = true\n", "tick.rate_hz", "True", "number"),
    ("[tick]\nrate_hz = \"fast\"\n", "tick.rate_hz", "'fast'", "number"),
    ("[watchdog]\ntwist_timeout_ms = nan\n", "watchdog.twist_timeout_ms", "nan", "finite"),
    ("[solver]\ndamping = \"heavy\"\n", "solver.damping", "'heavy'", "singular_value"),
    ("[solver]\njoint_weights = [1.0, -1.0]\n", "solver.joint_weights[1]", "-1", "> 0"),
    ("[sockets]\nsend_hwm = 1.5\n", "sockets.send_hwm", "1.5", "integer"),
    ("[simulation]\nlag_s = -0.1\n", "simulation.lag_s", "-0.1", ">= 0"),
    ("[speed]\nangular_max = 30\n", "speed.angular_max", "30", "<= 20"),
    ("[tick]\nrealtime_priority = 100\n", "tick.realtime_priority", "100", "<= 99"),
    ("[tick]\nrealtime_priority = -1\n", "tick.realtime_priority", "-1", ">= 0"),
    ("[tick]\nrealtime_priority = 10.0\n", "tick.realtime_priority", "10.0", "integer"),
    ("[solver]\ncharacteristic_length = 0.0005\n", "solver.characteristic_length", "0.0005", ">= 0.001"),
])
def test_bad_value_names_key_value_and_accepted(tmp_path, text, key, value, accepted):
    message = _error(tmp_path, text)
    assert str(tmp_path / "service.toml") in message
    assert f"{key}: got {value}" in message
    assert "accepted:" in message and accepted in message


@pytest.mark.parametrize("text,words", [
    ("[tick]\nrate_hz = 100\nhealth_hz = 200\n", ["tick.health_hz", "tick.rate_hz"]),
    ("[health]\nnarrow_below_m = 0.01\npinched_below_m = 0.02\n", ["pinched_below_m", "narrow_below_m"]),
    ("[lease]\ndefault_ms = 10\nmin_ms = 50\n", ["min_ms", "default_ms"]),
    ("[watchdog]\ntwist_timeout_ms = 1\n", ["watchdog.twist_timeout_ms", "two tick periods"]),
    ("[speed]\nangular_max = 1\nangular_max_deg_s = 60\n", ["angular_max", "not both"]),
    ("[security]\nserver_secret_key = \"k\"\n", ["client_public_keys", "server_secret_key"]),
])
def test_cross_checks_name_both_keys(tmp_path, text, words):
    message = _error(tmp_path, text)
    for word in words:
        assert word in message, message


def test_toml_syntax_error_names_the_file(tmp_path):
    message = _error(tmp_path, "[tick\nrate_hz = 5\n")
    assert "service.toml" in message and "TOML" in message


def test_missing_file_and_missing_arm(tmp_path):
    with pytest.raises(ConfigError, match="config file"):
        cfg.load_config(tmp_path / "absent.toml")
    message = _error(tmp_path, '[arm]\nfile = "reach9"\n')
    assert "arm.file" in message and "reach9" in message and "reach7" in message


def test_per_joint_lists_must_match_the_arm(tmp_path):
    config = _load(tmp_path, "[solver]\njoint_weights = [1.0, 2.0]\n")
    with pytest.raises(ConfigError, match=r"solver\.joint_weights.*7 values"):
        config.solver_options(config.load_arm())


def test_degrees_refused_for_an_arm_with_prismatic_joints(tmp_path):
    config = _load(tmp_path, '[arm]\nfile = "rail4"\n[solver]\nposture_deg = [0, 0, 0, 0]\n')
    arm = config.load_arm()
    assert not all(arm.revolute)
    with pytest.raises(ConfigError, match="posture_deg"):
        config.solver_options(arm)


# --- endpoints and security -----------------------------------------------------------------------------


def test_non_loopback_endpoint_needs_curve(tmp_path):
    message = _error(tmp_path, '[endpoints]\nintake = "tcp://0.0.0.0:47310"\n')
    assert "endpoints.intake" in message and "twistrate keys" in message
    write_keypair(tmp_path / "keys", "service")
    write_keypair(tmp_path / "keys" / "clients", "pad")
    config = _load(tmp_path, '[endpoints]\nintake = "tcp://0.0.0.0:47310"\n'
                             '[security]\nserver_secret_key = "keys/service.key_secret"\n'
                             'client_public_keys = ["keys/clients"]\n')
    public, secret = config.security.server_keys()
    assert len(public) == len(secret) == 40
    assert len(config.security.allowed_clients()) == 1


def test_security_key_errors_name_the_key(tmp_path):
    write_keypair(tmp_path, "service")
    message = _error(tmp_path, '[security]\nserver_secret_key = "service.key"\nclient_public_keys = ["."]\n')
    assert "security.server_secret_key" in message and "key_secret" in message
    message = _error(tmp_path, '[security]\nserver_secret_key = "service.key_secret"\n'
                               'client_public_keys = ["nowhere.key"]\n')
    assert "security.client_public_keys[0]" in message


def test_malformed_endpoint(tmp_path):
    message = _error(tmp_path, '[endpoints]\ncontrol = "udp://127.0.0.1:5"\n')
    assert "endpoints.control" in message and "tcp://HOST:PORT" in message


# --- run-time tunables -------------------------------------------------------------------------------------


def test_set_changes_only_what_is_named(tmp_path):
    before = cfg.load_config().tunables()
    after = tun.apply_set(before, {"damping_max": 0.08, "reduced_speed": True, "damping": "constant"})
    assert (after.damping_max, after.reduced_speed, after.damping) == (0.08, True, "constant")
    assert after.model_dump(exclude={"damping_max", "reduced_speed", "damping"}) == \
        before.model_dump(exclude={"damping_max", "reduced_speed", "damping"})
    options = after.solver_options(SolverOptions())
    assert (options.damping, options.damping_max) == ("constant", 0.08)
    assert after.health_thresholds() == HealthThresholds(0.06, 0.015, 0.2)


@pytest.mark.parametrize("params,name,accepted", [
    ({"damping_max": 5.0}, "damping_max", "<= 1"),
    ({"damping_max": True}, "damping_max", "a number"),          # a bool is not a number
    ({"damping_max": "0.1"}, "damping_max", "a number"),
    ({"reduced_speed": 1}, "reduced_speed", "true or false"),
    ({"reduced_linear_max": 0.3}, "reduced_linear_max", "<= 0.25"),
    ({"linear_max": 0.0}, "linear_max", "> 0"),
    ({"damping": "heavy"}, "damping", "singular_value"),
    ({"tick_hz": 100}, "tick_hz", "a tunable name"),
    ({"characteristic_length": 0.5}, "characteristic_length", "a tunable name"),
])
def test_set_refusals_name_parameter_value_and_range(params, name, accepted):
    before = cfg.load_config().tunables()
    with pytest.raises(ControlError) as info:
        tun.apply_set(before, params)
    assert info.value.code == E_BAD_ARGUMENT
    message = str(info.value)
    assert f"params.{name}: got {params[name]!r}" in message and accepted in message, message


def test_set_is_all_or_nothing_and_checks_cross_constraints():
    before = cfg.load_config().tunables()
    with pytest.raises(ControlError, match="pinched_below_m"):
        tun.apply_set(before, {"pinched_below_m": 0.1})
    with pytest.raises(ControlError, match="linear_max"):
        tun.apply_set(before, {"damping_max": 0.02, "linear_max": 100.0})
    assert before.damping_max == 0.04  # unchanged (immutable; nothing applied)
    with pytest.raises(ControlError):
        tun.apply_set(before, {})


def test_tunable_ranges_are_documented():
    doc = (Path(__file__).resolve().parents[1] / "docs" / "protocol.md").read_text()
    ranges = tun.tunable_ranges()
    assert set(ranges) == set(tun.Tunables.model_fields)
    for name in ranges:
        assert f"| `{name}` |" in doc, name
