"""The scenario runs of the saturated tick (twistrate.service.bench.saturation): figures computed right on
hand-made records, and short runs of the scripted wrist push and the demo pass meeting issue 12's
criteria where they apply (bounds every tick; no chatter; scale 0 below 0.5 % on the jogged push).
"""

from __future__ import annotations

import numpy as np

from twistrate.service.bench.saturation import (
    DEMO_OPTIONS,
    SIGN_DEADBAND,
    chatter,
    demo_replay,
    motion_figures,
    push_through_wrist,
    tick_cost,
)
from twistrate.service.commands.demo import scripted_twist
from twistrate.solver.load import load_arm


def test_figures_of_a_hand_made_record() -> None:
    arm = load_arm("planar3")
    N = 8
    band = SIGN_DEADBAND * arm.v_max[0]
    qd = np.zeros((N, 3))
    qd[:, 0] = [0.1, 0.2, 0.5 * band, -0.1, -0.2, 0.0, 0.3, 0.3]  # two changes; the dead band keeps the sign
    asked = np.zeros((N, 6))
    asked[:4, 0] = 0.1
    asked[4:7, 0] = -0.1  # one reversal, then a stop (not a turn)
    run = {"asked": asked, "achieved": asked * 0.5, "qd": qd, "scale": np.array([1, 1, 0, 0, 1, 1, 1, 1.0]),
           "tracking": np.array([0, 0, 1, 0, 0, 0, 0, 0], dtype=bool)}
    f = motion_figures(arm, run, 0.3)
    assert f["sign_changes"] == [2, 0, 0]
    assert f["asked_direction_changes"] == 1
    assert f["running_ticks"] == 7
    assert f["scale_zero_fraction"] == 2 / 7 and f["tracking_fraction"] == 1 / 7
    assert f["braking_fraction"] == 1 / 7
    np.testing.assert_allclose(f["peak_acceleration_ratio"], 0.3 / (arm.a_max[0] * 0.002))
    np.testing.assert_allclose(f["twist_error_max_m_s"], 0.05)


def test_jogged_push_through_the_bench6_wrist_singularity() -> None:
    f = push_through_wrist("bench6", seconds=3.0)
    assert f["sigma_min_lowest_m"] < 1e-3  # really through the aligned wrist
    assert f["scale_zero_fraction"] < 0.005
    assert max(f["sign_changes"]) <= f["asked_direction_changes"] == 1
    assert f["peak_acceleration_ratio"] <= 1.0 + 1e-9 and f["peak_velocity_ratio"] <= 1.0 + 1e-9


def test_stepped_push_tracks_after_the_steps_only() -> None:
    f = push_through_wrist("reach7", seconds=3.0, ramp_s=0.0)
    assert f["asked_steps"] == 2
    assert f["scale_zero_fraction"] == f["scale_zero_after_step_fraction"]  # none elsewhere
    assert f["braking_fraction"] == 0.0 and f["stalled_fraction"] == 0.0
    assert f["peak_acceleration_ratio"] <= 1.0 + 1e-9


def test_demo_pass_start_and_timing_function_run() -> None:
    f = demo_replay(scripted_twist, seconds=3.5, reference=False)
    assert f["running_ticks"] > 1500 and f["peak_acceleration_ratio"] <= 1.0 + 1e-9
    assert f["stalled_fraction"] < 0.01
    cost = tick_cost(ticks=100, repeats=1)
    assert cost["states"] > 0 and cost["free_median_us"] > 0.0 and cost["saturated_median_us"] > 0.0


def test_sign_changes_of_a_sampled_sine_and_the_chatter_criterion() -> None:
    # Closed form: sin(w t) has its zeros at k pi / w, so on [t0, t1] (no zero at either end) it changes
    # sign floor(w t1 / pi) - floor(w t0 / pi) times; sampled at 500 Hz half a tick off the zeros, no sample
    # falls inside the bench's dead band (1e-3 of v_max) at a zero for these amplitudes and frequencies.
    arm = load_arm("planar3")
    t = np.arange(0.0, 3.0, 0.002) + 0.001
    w = (3.0 * np.pi, np.pi)  # zeros every 1/3 s and every 1 s
    qd = np.zeros((t.size, 3))
    qd[:, 0] = 0.5 * np.sin(w[0] * t)
    qd[:, 1] = 0.5 * np.sin(w[1] * t)
    qd[:, 2] = 0.5 * np.cos(np.pi * t / 3.0)  # its one zero at t = 1.5 s
    expected = [int(np.floor(wi * t[-1] / np.pi) - np.floor(wi * t[0] / np.pi)) for wi in w] + [1]
    asked = np.zeros((t.size, 6))
    asked[:, 0] = 0.1
    run = {"asked": asked, "achieved": asked, "qd": qd, "scale": np.ones(t.size),
           "tracking": np.zeros(t.size, dtype=bool)}
    f = motion_figures(arm, run, 0.3)
    assert f["sign_changes"] == expected == [8, 2, 1]
    assert chatter(f["sign_changes"], expected) == {"extra": [0, 0, 0], "joints_over": [], "met": True}
    # fewer changes than the free run are never "extra"; more are, per joint (not against the max)
    assert chatter(f["sign_changes"], [6, 5, 1]) == {"extra": [2, 0, 0], "joints_over": [0], "met": False}


def test_the_bench_runs_with_the_demo_configs_solver_options() -> None:
    # The saturation runs replay the demo at solver level with the options the demo service reads from
    # its config (configs/service/demo.toml), so a change of the config is measured, not a copy of it.
    from twistrate.service.config import load_config

    assert load_config(None).solver_options(load_arm("reach7")) == DEMO_OPTIONS


def test_the_jogged_push_reports_the_chatter_criterion_against_its_free_run() -> None:
    f = push_through_wrist("reach7", seconds=2.0, reference=True)
    assert len(f["free_sign_changes"]) == len(f["sign_changes"]) == 7
    assert f["extra_sign_changes"] == chatter(f["sign_changes"], f["free_sign_changes"])["extra"]
    assert f["chatter_met"] == (sum(f["extra_sign_changes"]) == 0)
