"""vservo's configuration: the packaged panel cell matches the synthetic cell it describes, and bad
documents are refused naming the key, the value and what is accepted."""

from __future__ import annotations

import copy

import numpy as np
import pytest

from twistrate.clients.vservo import config as vc
from twistrate.clients.vservo import synthetic
from twistrate.clients.vservo.interaction import DepthChoice
from twistrate.clients.vservo.rigid import rotation_about
from twistrate.clients.vservo.servo import PoseGoal
from twistrate.solver.errors import ConfigError


def test_packaged_config_describes_the_synthetic_panel_cell() -> None:
    config = vc.load_config()
    assert vc.intrinsics(config) == synthetic.DEMO_INTRINSICS
    np.testing.assert_allclose(vc.mount(config).T, synthetic.T_TOOL_CAM, atol=1e-12)
    cell = synthetic.panel_cell(vc.intrinsics(config), vc.mount(config).T)
    view = cell.goal(synthetic.panel_goal_tool_pose(cell, height_m=0.22, yaw_rad=np.deg2rad(70.0)))
    goal = vc.goal(config)
    np.testing.assert_array_equal(goal.ids, view.ids)
    np.testing.assert_allclose(goal.pixels, view.pixels, atol=1e-3)  # written with 3 decimals
    np.testing.assert_allclose(goal.depths, view.depths, atol=1e-9)
    settings = vc.settings(config)
    assert settings.depth is DepthChoice.MEAN and settings.period_s == pytest.approx(1 / 30)


def test_rpy_is_fixed_axis_roll_pitch_yaw() -> None:
    # R = Rz(yaw) Ry(pitch) Rx(roll) (docs/arm-format.md; URDF's rpy convention, common practice).
    R = vc.rpy([90.0, 0.0, 0.0])
    np.testing.assert_allclose(R @ [0, 1, 0], [0, 0, 1], atol=1e-12)
    R = vc.rpy([10.0, 20.0, 30.0])
    expected = (rotation_about([0, 0, 1], np.radians(30)) @ rotation_about([0, 1, 0], np.radians(20))
                @ rotation_about([1, 0, 0], np.radians(10)))
    np.testing.assert_allclose(R, expected, atol=1e-12)


def _doc() -> dict:
    return vc.load_config().model_dump()


@pytest.mark.parametrize(("change", "names"), [
    (lambda d: d["camera"].update(fx=0.0), "camera.fx"),
    (lambda d: d["camera"].update(colour="red"), "camera.colour"),
    (lambda d: d["law"].update(depth="closest"), "law.depth"),
    (lambda d: d["law"].update(gain_near=40.0), "law"),  # 40 / 30 Hz > 1
    (lambda d: d["goal"].update(ids=[21, 22, 23]), "goal"),
    (lambda d: d["goal"].update(ids=[21, 21, 23, 24, 25]), "goal.ids"),
    (lambda d: d["mount"].update(on="wrist"), "mount.on"),
    (lambda d: d.pop("camera"), "camera"),
])
def test_bad_documents_name_the_key(change, names: str) -> None:
    doc = copy.deepcopy(_doc())
    change(doc)
    with pytest.raises(ConfigError, match=names.replace(".", r"\.")):
        vc.config_from_dict(doc, "test.toml")


def test_a_pose_goal() -> None:
    doc = _doc()
    doc["law"]["kind"] = "pose"
    doc["goal"] = {"pose_xyz_m": [0.0, 0.0, 0.22], "pose_rpy_deg": [180.0, 0.0, 0.0]}
    goal = vc.goal(vc.config_from_dict(doc))
    assert isinstance(goal, PoseGoal)
    np.testing.assert_allclose(goal.T_camstar_target[:3, :3], np.diag([1.0, -1.0, -1.0]), atol=1e-12)
    doc["goal"] = {}
    with pytest.raises(ConfigError, match="pose_xyz_m"):
        vc.config_from_dict(doc)


def test_unreadable_file_is_a_config_error(tmp_path) -> None:
    with pytest.raises(ConfigError, match="cannot read"):
        vc.load_config(tmp_path / "missing.toml")
    bad = tmp_path / "bad.toml"
    bad.write_text("[camera\n")
    with pytest.raises(ConfigError, match="not TOML"):
        vc.load_config(bad)


def test_a_camera_in_the_cell_takes_the_tool_origin_from_state_messages() -> None:
    # Eye-to-hand twists need the tool origin (servo.wire_twist): by default the newest `state` message.
    from types import SimpleNamespace

    from twistrate.clients.vservo.runner import Runner

    doc = _doc()
    doc["mount"]["on"] = "cell"
    runner = Runner(vc.config_from_dict(doc), link=None, feed=None)  # type: ignore[arg-type]
    assert runner.tool_origin() is None
    runner.poses.update_message(SimpleNamespace(tool_position=np.array([0.5, 0.1, 0.3]),
                                                tool_rotation=np.eye(3)))
    np.testing.assert_array_equal(runner.tool_origin(), [0.5, 0.1, 0.3])


def test_status_line_shows_error_twist_and_service() -> None:
    from twistrate.clients.vservo.features import ServoState
    from twistrate.clients.vservo.runner import status_line
    from twistrate.clients.vservo.servo import Step

    step = Step(ServoState.TRACKING, np.zeros(6), points=5, error_px_mean=12.5, error_px_max=20.0,
                error_norm=0.05, gain=1.0)
    twist = {"linear": [0.01, 0.0, -0.02], "angular": [0.0, 0.1, 0.0], "frame": "tool", "point": [0, 0, 0]}
    line = status_line(1.5, step, twist, "running", "clear", 42, 3)
    for part in ("tracking", "5 pts", "12.50 px", "(0.0500)", "+0.010", "-0.020", "(tool)", "running/clear",
                 "frames 42", "refused 3"):
        assert part in line, part


class _QuietLink:
    """A stand-in for the runner's Link (the calls it makes): no service, nothing ever received; each
    twist calls `on_twist()`, whose result is the twist's seq."""

    def __init__(self, on_twist) -> None:
        self.on_twist = on_twist

    def wait_ready(self, timeout_s: float) -> None: ...
    def claim(self, client: str, lease_ms: int) -> str: return "token"
    def enable(self) -> str: return "running"
    def disable(self) -> str: return "idle"
    def release(self) -> None: ...

    def receive(self, timeout_s: float) -> None:
        from twistrate.clients.link import LinkTimeoutError

        raise LinkTimeoutError("none")

    def send_twist(self, linear, angular, frame="base", point=None) -> int:
        return self.on_twist()


def test_the_loop_collects_garbage_only_after_a_twist_and_restores_the_collector() -> None:
    # The runner turns automatic collection off for its loop and collects right after a twist went out
    # (runner.GC_YOUNG_EVERY); the process's collector is as it was once the run ends (common practice
    # for a latency-bound Python loop, as the service's tick does).
    import gc

    from twistrate.clients.vservo.runner import GC_YOUNG_EVERY, Runner

    automatic: list[bool] = []  # the collector's state at each twist

    def on_twist() -> int:
        automatic.append(gc.isenabled())
        return len(automatic)

    class Feed:
        received, refused = 0, {}

        def newest(self, timeout_s: float) -> None:
            return None  # no frame: the runner sends `waiting` zero twists at its own rate

    doc = _doc()
    doc["run"]["rate_hz"] = 1000.0
    link = _QuietLink(on_twist)
    collections = sum(g["collections"] for g in gc.get_stats())  # explicit collections count too
    assert gc.isenabled()
    outcome = Runner(vc.config_from_dict(doc), link, Feed(), out=None).run(0.2)  # type: ignore[arg-type]
    assert outcome.reason == "time" and outcome.twists > 2 * GC_YOUNG_EVERY
    assert not any(automatic[:outcome.twists])  # automatic collection off in the loop
    assert sum(g["collections"] for g in gc.get_stats()) >= collections + outcome.twists // GC_YOUNG_EVERY
    assert gc.isenabled() and gc.get_freeze_count() == 0


#: The goal posture of configs/vservo/post.toml: joint offsets from the example arm's home, rad.
POST_GOAL_OFFSETS = [0.1, 0.05, 0.0, -0.1, 0.0, 0.1, 0.3]


def test_packaged_post_config_describes_the_plate_cell() -> None:
    # Eye-to-hand: the camera's pose in the base frame from xyz_m and fixed-axis rpy_deg, against scipy
    # (extrinsic "xyz" Euler angles are fixed-axis roll, pitch, yaw: R = Rz(yaw) Ry(pitch) Rx(roll));
    # its optical axis 24 degrees below the horizontal, as the file says; the goal is the view of the
    # plate cell's dots from the stated posture (projected here, written with 3 and 4 decimals).
    from scipy.spatial.transform import Rotation

    from twistrate.solver.kinematics import tool_pose
    from twistrate.solver.load import load_arm

    config = vc.load_config("post")
    assert vc.packaged_names() == ["panel", "post"] and config.mount.on == "cell"
    T_base_cam = vc.mount(config).T
    R = Rotation.from_euler("xyz", config.mount.rpy_deg, degrees=True).as_matrix()
    np.testing.assert_allclose(T_base_cam[:3, :3], R, atol=1e-12)
    assert np.degrees(np.arcsin(-T_base_cam[2, 2])) == pytest.approx(24.0, abs=1e-9)
    arm = load_arm("reach7")
    cell = synthetic.plate_cell(vc.intrinsics(config), T_base_cam)
    view = cell.goal(tool_pose(arm, arm.q_home + np.array(POST_GOAL_OFFSETS)))
    goal = vc.goal(config)
    np.testing.assert_array_equal(goal.ids, view.ids)
    np.testing.assert_allclose(goal.pixels, view.pixels, atol=1e-3)
    np.testing.assert_allclose(goal.depths, view.depths, atol=1e-4)
    ids, _, _ = cell.view(tool_pose(arm, arm.q_home))  # the synthetic run starts at home: all dots seen
    assert len(ids) == 5


def test_the_demos_closing_pointer_is_a_command_vservo_takes() -> None:
    # The demo's closing screen names the camera loop's command; it must parse as `twistrate vservo`
    # arguments (a renamed option would break the pointer, not the demo).
    from twistrate.service.commands import demo
    from twistrate.service.commands import vservo as command

    words = demo.CAMERA_LOOP_COMMAND.split()
    assert words[:2] == ["twistrate", "vservo"]
    assert command.parser().parse_args(words[2:]).synthetic
    assert len(f"  next, a camera loop on the simulated arm: {demo.CAMERA_LOOP_COMMAND}") <= 80


def test_timings_take_the_run_queue_wait_of_the_kernels_schedstat(tmp_path) -> None:
    # /proc/<pid>/task/<tid>/schedstat holds "time on the CPU, time waiting on a run queue, timeslices"
    # in ns (the kernel's Documentation/scheduler/sched-stats.rst); Timings takes the second field of
    # the reporting thread and of every thread, over the window from `waiting` to the report.
    from twistrate.clients.vservo.runner import Timings, read_timings

    own = tmp_path / "thread-self" / "schedstat"
    tasks = [tmp_path / "self" / "task" / tid / "schedstat" for tid in ("11", "12")]
    for path in (own, *tasks):
        path.parent.mkdir(parents=True)
    own.write_text("500 1000 7\n")
    tasks[0].write_text("500 1000 7\n")
    tasks[1].write_text("90 40 2\n")
    timings = Timings(proc=str(tmp_path))
    timings.waiting()
    own.write_text("900 1600 9\n")  # the loop's thread waited 600 ns more, the other thread 25 ns
    tasks[0].write_text("900 1600 9\n")
    tasks[1].write_text("95 65 3\n")
    timings(7, 3, 1_000, 2_500)
    timings.write(str(tmp_path / "t.csv"))
    got = read_timings(str(tmp_path / "t.csv"))
    assert got == {"features_seq": [7], "twist_seq": [3], "received_ns": [1_000], "sent_ns": [2_500],
                   "cpu_wait_ns": [600], "cpu_wait_all_ns": [625]}
    missing = Timings(proc=str(tmp_path / "none"))  # no procfs: -1, never an error
    missing.waiting()
    missing(1, 1, 0, 0)
    assert missing.rows[4].tolist() == [-1] and missing.rows[5].tolist() == [-1]


def test_the_runner_reports_each_answered_frame_after_its_twist() -> None:
    # on_wait before every wait, on_sent(features seq, twist seq, taken, sent) after each twist that
    # answers a new frame (wall clock: taken <= sent); the keep-alive twists are not reported.
    import time

    from twistrate.clients.vservo.feed import PointsMessage
    from twistrate.clients.vservo.runner import Runner

    sent: list[int] = []
    events: list[str] = []

    def on_twist() -> int:
        sent.append(len(sent) + 1)
        events.append("twist")
        return sent[-1]

    class Feed:
        received, refused, arrived_ns, calls = 0, {}, 0, 0

        def newest(self, timeout_s: float):
            self.calls += 1
            if self.calls % 3:
                time.sleep(min(timeout_s, 0.002))
                return None
            self.received += 1
            self.arrived_ns = time.time_ns()
            goal = doc["goal"]
            return (PointsMessage(self.received, 0, "bench-cam", time.time_ns(), tuple(goal["ids"]),
                                  tuple(tuple(p) for p in goal["pixels"]), None), time.monotonic())

    reports: list[tuple[int, int, int, int]] = []
    doc = _doc()
    doc["run"]["rate_hz"] = 200.0
    runner = Runner(vc.config_from_dict(doc), _QuietLink(on_twist), Feed(), out=None, track=True,  # type: ignore[arg-type]
                    on_sent=lambda *r: (reports.append(r), events.append("report")),
                    on_wait=lambda: events.append("wait"))
    outcome = runner.run(0.2)
    assert outcome.frames >= 5 and len(reports) == outcome.frames
    assert [r[0] for r in reports] == list(range(1, len(reports) + 1))
    assert all(r[2] <= r[3] for r in reports) and len(set(r[1] for r in reports)) == len(reports)
    assert outcome.twists > len(reports)  # keep-alive twists too, not reported
    for k, e in enumerate(events):  # every report follows its twist at once; a wait precedes each frame
        if e == "report":
            assert events[k - 1] == "twist" and "wait" in events[max(0, k - 3):k - 1]
