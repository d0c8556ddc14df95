"""`twistrate arm`: the JSON report parses, its Jacobian matches finite differences of its own tool
pose, and bad input exits with code 2 and a message naming the option."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from twistrate.service.commands import arm as arm_cmd
from twistrate.solver.kinematics import tool_pose
from twistrate.solver.load import load_arm

FD_STEP = 1e-6  # rad or m
FD_TOL = 1e-7  # central differences: error O(h^2) plus rounding O(eps / h) ~ 1e-10


def run(capsys, *argv: str) -> tuple[int, str, str]:
    code = arm_cmd.main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


def report(capsys, *argv: str) -> dict:
    code, out, err = run(capsys, *argv, "--json")
    assert code == 0, err
    return json.loads(out)


def fd_jacobian(arm, q: np.ndarray) -> np.ndarray:
    """(6, n) Jacobian by central finite differences of the tool pose (common practice): linear
    rows from the tool position, angular rows from the rotation vector of R(q + h) R(q - h)^T / 2h
    (scipy Rotation.as_rotvec), base frame."""
    J = np.empty((6, arm.n))
    for i in range(arm.n):
        dq = np.zeros(arm.n)
        dq[i] = FD_STEP
        Tp, Tm = tool_pose(arm, q + dq), tool_pose(arm, q - dq)
        J[:3, i] = (Tp[:3, 3] - Tm[:3, 3]) / (2 * FD_STEP)
        J[3:, i] = Rotation.from_matrix(Tp[:3, :3] @ Tm[:3, :3].T).as_rotvec() / (2 * FD_STEP)
    return J


@pytest.mark.parametrize("argv", [
    ["bench6"],
    ["reach7", "--at", "10,-20,30,40,-50,60,-70", "--deg"],
    ["planar3"],
    ["rail4", "--at", "0.3,0.5,1.0,-0.5"],
    ["desk4", "--tool", "flange", "--at", "-0.4,0.3,0.8,2.5"],
    ["desk4", "--base", "turret", "--tool", "wrist"],
])
def test_json_report_jacobian_matches_finite_differences(capsys, argv):
    rep = report(capsys, *argv)
    link_args = {"base_link": None, "tool_link": None}
    if "--tool" in argv:
        link_args["tool_link"] = argv[argv.index("--tool") + 1]
    if "--base" in argv:
        link_args["base_link"] = argv[argv.index("--base") + 1]
    arm = load_arm(argv[0], **link_args)
    q = np.array(rep["configuration"]["q"])
    assert q.shape == (arm.n,)
    T = np.array(rep["tool_pose"])
    J = np.array(rep["jacobian"])
    assert T.shape == (4, 4) and J.shape == (6, arm.n)
    np.testing.assert_allclose(T, tool_pose(arm, q), atol=1e-14)
    np.testing.assert_allclose(J, fd_jacobian(arm, q), atol=FD_TOL)
    assert rep["report"] == "twistrate-arm" and rep["version"] == arm_cmd.REPORT_VERSION
    assert [j["name"] for j in rep["joints"]] == list(arm.joint_names)
    assert rep["arm"]["joint_count"] == arm.n


def test_configuration_home_and_degrees(capsys):
    home = report(capsys, "bench6")
    assert home["configuration"]["source"] == "home"
    np.testing.assert_allclose(home["configuration"]["q"], load_arm("bench6").q_home)
    deg = report(capsys, "rail4", "--at", "0.3,-45,90,10", "--deg")
    # prismatic value stays in metres; revolute values are degrees
    np.testing.assert_allclose(deg["configuration"]["q"], [0.3, -math.pi / 4, math.pi / 2, math.radians(10)])
    assert deg["configuration"]["source"] == "--at"


def test_json_limits_and_unlimited_joint(capsys):
    rep = report(capsys, "bench6")
    roll = rep["joints"][5]
    assert roll["name"] == "flange_roll" and roll["position_min"] is None and roll["position_max"] is None
    waist = rep["joints"][0]
    assert waist["position_min"] == pytest.approx(math.radians(-170))
    assert waist["velocity_max"] == pytest.approx(math.radians(150))
    assert waist["acceleration_max"] == pytest.approx(math.radians(450))
    assert waist["kind"] == "revolute"


def test_urdf_note_on_acceleration_default(capsys):
    rep = report(capsys, "desk4", "--tool", "flange")
    assert any("acceleration limits are not part of URDF" in n for n in rep["notes"])
    assert report(capsys, "bench6")["notes"] == []


def test_text_report(capsys):
    code, out, err = run(capsys, "reach7")
    assert code == 0 and err == ""
    for fragment in ("arm reach7", "shoulder_pitch", "tool pose", "geometric Jacobian",
                     "configuration: home"):
        assert fragment in out
    assert "linear" in out and "angular" in out and "translational" not in out  # as in JSON and the wire


def test_the_table_numbers_joints_as_the_at_errors_do(capsys):
    _, table, _ = run(capsys, "bench6")
    row = next(line for line in table.splitlines() if " elbow " in line)
    code, _, err = run(capsys, "bench6", "--at", "0,0,x,0,0,0")  # the third value is the elbow's
    assert code == 2 and "--at value 3 (joint 'elbow')" in err
    assert row.split()[0] == "3"


BAD = [
    (["bench6", "--at", "1,2,3"], "--at", "6 comma-separated values"),
    (["bench6", "--at", "0,0,x,0,0,0"], "--at value 3 (joint 'elbow')", "a finite number"),
    (["bench6", "--at", "0,0,nan,0,0,0"], "--at value 3 (joint 'elbow')", "a finite number"),
    (["bench6", "--at", "0,0,0,0,0,inf"], "--at value 6 (joint 'flange_roll')", "a finite number"),
    (["bench6", "--at", "0,-120,0,0,0,0", "--deg"], "--at value 2 (joint 'shoulder')", "[-110, 110] deg"),
    (["bench6", "--at", "0,2.5,0,0,0,0"], "--at value 2 (joint 'shoulder')", "rad"),
    (["rail4", "--at", "1.5,0,0,0"], "--at value 1 (joint 'carriage')", "[0, 1.2] m"),
    (["bench6", "--deg"], "--deg", "only together with --at"),
    (["bench6", "--tool", "flange"], "--tool", "only with a .urdf file"),
    (["desk4"], "tool_link", "--tool LINK"),
    (["desk4", "--tool", "nowhere"], "tool_link: got 'nowhere'", "a link of the document"),
    (["no_such_arm"], "arm file", "bench6"),
    ([], "FILE", "required"),
    (["bench6", "--speed", "3"], "unrecognized arguments", "--speed"),
]


@pytest.mark.parametrize("argv, option, accepted", BAD, ids=[" ".join(b[0]) or "(none)" for b in BAD])
def test_bad_input_exits_2_naming_the_option(capsys, argv, option, accepted):
    code, out, err = run(capsys, *argv)
    assert code == 2
    assert out == ""
    assert "Traceback" not in err
    assert option in err and accepted in err, err


def test_negative_values_after_at(capsys):
    # "--at -10,20,..." must not be mistaken for an option
    rep = report(capsys, "planar3", "--at", "-10,20,-30", "--deg")
    np.testing.assert_allclose(rep["configuration"]["q"], np.radians([-10, 20, -30]))


def test_bad_arm_file_exits_2(capsys, tmp_path):
    path = tmp_path / "broken.toml"
    path.write_text('name = "b"\n[[joint]]\nname = "j"\nkind = "revolute"\n')
    code, out, err = run(capsys, str(path))
    assert code == 2 and out == "" and "Traceback" not in err
    assert "broken.toml" in err and "joint[0] ('j')" in err


def test_help_exits_0(capsys):
    code, out, _ = run(capsys, "--help")
    assert code == 0 and "--at" in out


def _weighted(J: np.ndarray, L: float) -> np.ndarray:
    A = np.array(J, dtype=float)
    A[3:] *= L
    return A


@pytest.mark.parametrize("argv", [["bench6"], ["reach7", "--at", "10,-20,30,40,-50,60,-70", "--deg"],
                                  ["bench6", "--at", "0.3,-0.2,0.5,1.0,-0.7,2.0", "--length", "0.5"]])
def test_health_measures_follow_yoshikawa(capsys, argv):
    # Yoshikawa 1985 (IJRR 4(2), "Manipulability of robotic mechanisms"): w = sqrt(det(J J^T)),
    # here of the task-weighted Jacobian (angular rows times L) and of its row blocks J_v, J_w
    # (METHODS.md: report translational and rotational separately). Inverse condition number
    # s_min / s_max (Salisbury & Craig 1982). Singular values cross-checked with numpy's LAPACK SVD.
    rep = report(capsys, *argv)
    L = rep["task_weighting"]["characteristic_length"]
    assert (float(argv[argv.index("--length") + 1]) if "--length" in argv else 0.3) == L
    J = np.array(rep["jacobian"])
    A = _weighted(J, L)
    s = np.linalg.svd(A, compute_uv=False)
    np.testing.assert_allclose(rep["singular_values"], s, rtol=1e-10)
    m = rep["manipulability"]
    assert m["whole"] == pytest.approx(math.sqrt(np.linalg.det(A @ A.T)), rel=1e-8)
    assert m["linear"] == pytest.approx(math.sqrt(np.linalg.det(J[:3] @ J[:3].T)), rel=1e-8)
    assert m["angular"] == pytest.approx(math.sqrt(np.linalg.det(J[3:] @ J[3:].T)), rel=1e-8)
    assert rep["inverse_condition"] == pytest.approx(s[-1] / s[0], rel=1e-10)
    # the weakest direction is a unit weighted twist along which A reaches only s_min
    weakest = rep["weakest_direction"]
    u = np.concatenate([weakest["linear"], L * np.array(weakest["angular"])])
    assert np.linalg.norm(u) == pytest.approx(1.0, rel=1e-12)
    assert np.linalg.norm(A.T @ u) == pytest.approx(s[-1], rel=1e-8, abs=1e-12)
    assert rep["state"] == "clear"


def test_planar3_manipulability_matches_closed_form(capsys):
    # Planar 3R: det [x; y; phi]-Jacobian = l1 l2 sin q2 (subtract column 2 from 1 and 3 from 2; the
    # two-link result w = l1 l2 |sin q2| of Yoshikawa 1985). The weighted 6 x 3 Jacobian has the
    # nonzero rows vx, vy, L wz, so w_whole = L l1 l2 |sin q2|; its J_v (3 x 3) has a zero vz row: 0.
    rng = np.random.default_rng(11)
    for q in rng.uniform(-2.5, 2.5, size=(10, 3)):
        rep = report(capsys, "planar3", "--at", ",".join(repr(float(v)) for v in q))
        expected = 0.3 * 0.30 * 0.25 * abs(math.sin(q[1]))
        assert rep["manipulability"]["whole"] == pytest.approx(expected, rel=1e-9)
        assert rep["manipulability"]["linear"] == pytest.approx(0.0, abs=1e-12)


def test_singular_configuration_is_pinched(capsys):
    # bench6 with the wrist straight (wrist_bend = 0): joints 4 and 6 are collinear, a wrist
    # singularity (common practice for spherical wrists): the smallest singular value vanishes.
    rep = report(capsys, "bench6", "--at", "0,-10,-20,0,0,0", "--deg")
    assert rep["singular_values"][-1] < 1e-12
    assert rep["state"] == "pinched"
    assert rep["manipulability"]["whole"] < 1e-12
    # Bending the wrist away from it: the state follows the documented entry thresholds on s_min.
    seen = set()
    for bend in (0.5, 1, 2, 4, 8, 16, 32):
        rep = report(capsys, "bench6", "--at", f"0,-10,-20,0,{bend},0", "--deg")
        s_min, th = rep["singular_values"][-1], rep["state_thresholds"]
        expected = ("pinched" if s_min < th["pinched_below_m"] else
                    "narrow" if s_min < th["narrow_below_m"] else "clear")
        assert rep["state"] == expected
        seen.add(expected)
    assert seen == {"pinched", "narrow", "clear"}


def test_limit_margins(capsys):
    # margin = min(q - q_min, q_max - q) / (q_max - q_min) as documented; unlimited joints: null
    rep = report(capsys, "rail4", "--at", "0.3,0,0,0")
    assert rep["limit_margins"][0] == pytest.approx(0.25)
    assert rep["limit_margins"][1] == pytest.approx(0.5)
    assert report(capsys, "bench6")["limit_margins"][5] is None


def test_bad_length_exits_2(capsys):
    for bad in ("0", "-1", "x", "inf"):
        code, out, err = run(capsys, "bench6", "--length", bad)
        assert code == 2 and out == "" and "--length" in err and "> 0" in err


def test_documented_json_example_matches_the_command(capsys):
    # docs/arm-format.md shows `twistrate arm planar3 --json` rounded to 6 decimals: same keys, same numbers.
    from pathlib import Path

    doc = (Path(__file__).resolve().parents[1] / "docs" / "arm-format.md").read_text()
    documented = json.loads(doc.split("```json\n", 1)[1].split("```", 1)[0])
    live = report(capsys, "planar3")
    assert documented.keys() == live.keys()

    def compare(a, b):
        if isinstance(a, dict):
            assert a.keys() == b.keys()
            for k in a:
                compare(a[k], b[k])
        elif isinstance(a, list):
            assert len(a) == len(b)
            for x, y in zip(a, b, strict=True):
                compare(x, y)
        elif isinstance(a, float):
            assert a == pytest.approx(b, abs=1e-6)
        else:
            assert a == b

    compare(documented, live)


def test_rate_adds_the_foresight_along_it(capsys):
    # The planar arm straightening its elbow: the smallest singular value falls (the elbow singularity
    # at q2 = 0; common practice), so a time to the pinched threshold exists; the elbow's own position
    # limit is reached at (q_limit - q) / qd (by hand from the arm's limits) if nothing else is first.
    rep = report(capsys, "planar3", "--at", "0,30,0", "--deg", "--rate", "0,-10,0")
    f = rep["foresight"]
    arm = load_arm("planar3")
    q2, qd2 = np.radians(30.0), np.radians(-10.0)
    assert f["rate"] == pytest.approx([0.0, qd2, 0.0])
    assert f["sigma_min_rate_m_s"] < 0 and f["time_to_pinched_s"] > 0
    assert f["time_to_limit_s"][0] is None and f["time_to_limit_s"][2] is None  # at rest: never
    assert f["time_to_limit_s"][1] == pytest.approx((arm.q_min[1] - q2) / qd2)
    assert f["first_limit_joint"] == 1
    moving_away = report(capsys, "planar3", "--at", "0,30,0", "--deg", "--rate", "0,10,0")["foresight"]
    assert moving_away["time_to_pinched_s"] is None  # moving away from the singularity
