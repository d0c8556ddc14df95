"""TOML arm format: every validation path names joint / key / value; DH and frame arms match
independent products of the published link transforms; the example arms load."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from twistrate.solver.arm_toml import parse_arm_toml, rpy_matrix
from twistrate.solver.errors import ModelError
from twistrate.solver.kinematics import forward
from twistrate.solver.load import example_arms, load_arm, read_arm_source

RNG_SEED = 20240611
TOL = 1e-12

# A small valid frame-style arm that the error cases mutate line by line.
BASE = """
name = "probe"
[mount]
xyz_m = [0.0, 0.0, 0.1]
[tool]
xyz_m = [0.0, 0.0, 0.05]
[[joint]]
name = "yaw"
kind = "revolute"
frame = { xyz_m = [0.0, 0.0, 0.2] }
axis = [0.0, 0.0, 1.0]
range_deg = [-170.0, 170.0]
speed_deg_s = 90.0
accel_deg_s2 = 300.0
[[joint]]
name = "lift"
kind = "revolute"
frame = { xyz_m = [0.0, 0.0, 0.1] }
axis = [0.0, 1.0, 0.0]
range_deg = [-90.0, 90.0]
speed_deg_s = 90.0
accel_deg_s2 = 300.0
[[joint]]
name = "slide"
kind = "prismatic"
frame = { xyz_m = [0.3, 0.0, 0.0] }
axis = [1.0, 0.0, 0.0]
range_m = [0.0, 0.2]
speed_m_s = 0.2
accel_m_s2 = 1.0
"""


def edit(old: str, new: str, count: int = 1, text: str = BASE) -> str:
    """Replace the `count`-th occurrence of `old` in `text` by `new` (fails loudly if absent)."""
    pos = -1
    for _ in range(count):
        pos = text.index(old, pos + 1)
    return text[:pos] + new + text[pos + len(old):]


def test_base_probe_is_valid():
    arm = parse_arm_toml(BASE)
    assert arm.joint_names == ("yaw", "lift", "slide")
    assert arm.q_max[0] == pytest.approx(math.radians(170.0))
    assert arm.v_max[2] == 0.2


# (case id, edited text, substrings the message must contain: location, key, value, accepted)
ERROR_CASES = [
    ("unknown top-level key", edit('name = "probe"', 'name = "probe"\nnmae = "x"'),
     ["nmae", "'x'", "known key", "joint"]),
    ("unknown joint key", edit("speed_deg_s = 90.0", "speed_deg_s = 90.0\nspeeed = 3", 2),
     ["joint[1] ('lift')", "speeed", "3", "known key", "speed_deg_s"]),
    ("unknown frame key", edit("frame = { xyz_m = [0.0, 0.0, 0.2] }",
                               "frame = { xyz_m = [0.0, 0.0, 0.2], rpy_grad = [0.0, 0.0, 0.0] }"),
     ["joint[0] ('yaw').frame.rpy_grad", "known key", "rpy_deg"]),
    ("unknown mount key", edit("[mount]", "[mount]\nz_m = 0.1"), ["mount.z_m", "0.1", "xyz_m"]),
    ("string for number", edit("speed_deg_s = 90.0", 'speed_deg_s = "fast"', 2),
     ["joint[1] ('lift').speed_deg_s", "'fast'", "a number"]),
    ("non-positive speed", edit("speed_m_s = 0.2", "speed_m_s = 0.0"),
     ["joint[2] ('slide').speed_m_s", "0.0", "> 0"]),
    ("non-finite range", edit("range_deg = [-90.0, 90.0]", "range_deg = [-90.0, inf]"),
     ["joint[1] ('lift').range_deg[1]", "inf", "finite", "unlimited = true"]),
    ("bad kind", edit('kind = "revolute"', 'kind = "rotary"', 2),
     ["joint[1] ('lift').kind", "'rotary'", "'revolute'", "'prismatic'"]),
    ("missing kind", edit('kind = "prismatic"\n', ""), ["joint[2] ('slide').kind", "missing", "required"]),
    ("missing name", edit('name = "lift"\n', ""), ["joint[1] (None).name", "missing"]),
    ("empty name", edit('name = "lift"', 'name = ""'), ["joint[1] ('').name", "''", "non-empty"]),
    ("short xyz", edit("frame = { xyz_m = [0.0, 0.0, 0.1] }", "frame = { xyz_m = [0.0, 0.1] }"),
     ["joint[1] ('lift').frame.xyz_m", "[0.0, 0.1]", "exactly 3"]),
    ("long range", edit("range_m = [0.0, 0.2]", "range_m = [0.0, 0.1, 0.2]"),
     ["joint[2] ('slide').range_m", "exactly 2"]),
    ("missing range", edit("range_deg = [-90.0, 90.0]\n", ""),
     ["joint[1] ('lift').range: missing", "range_deg or range_rad", "unlimited = true"]),
    ("min not below max", edit("range_deg = [-90.0, 90.0]", "range_deg = [90.0, -90.0]"),
     ["joint[1] ('lift').range_deg", "[90.0, -90.0]", "min < max"]),
    ("degrees on prismatic", edit("range_m = [0.0, 0.2]", "range_deg = [0.0, 20.0]"),
     ["joint[2] ('slide').range_deg", "[0.0, 20.0]", "prismatic", "range_m"]),
    ("metres on revolute", edit("speed_deg_s = 90.0", "speed_m_s = 0.5", 1),
     ["joint[0] ('yaw').speed_m_s", "0.5", "revolute", "speed_deg_s or speed_rad_s"]),
    ("two unit variants", edit("accel_deg_s2 = 300.0", "accel_deg_s2 = 300.0\naccel_rad_s2 = 5.0"),
     ["joint[0] ('yaw').accel_rad_s2", "5.0", "only one of", "also got accel_deg_s2"]),
    ("missing acceleration", edit("accel_m_s2 = 1.0\n", ""),
     ["joint[2] ('slide').accel", "missing", "accel_m_s2", "required"]),
    ("unlimited prismatic", edit("range_m = [0.0, 0.2]", "unlimited = true"),
     ["joint[2] ('slide').unlimited", "True", "only on a revolute joint"]),
    ("unlimited with range",
     edit("range_deg = [-170.0, 170.0]", "range_deg = [-170.0, 170.0]\nunlimited = true"),
     ["joint[0] ('yaw').range_deg", "[-170.0, 170.0]", "unlimited"]),
    ("unlimited not bool", edit("range_deg = [-170.0, 170.0]", "unlimited = 1"),
     ["joint[0] ('yaw').unlimited", "1", "true or false"]),
    ("home out of range", edit("accel_deg_s2 = 300.0", "accel_deg_s2 = 300.0\nhome_deg = 120.0", 2),
     ["joint[1] ('lift').home_deg", "120.0", "[-90, 90]"]),
    ("home in wrong unit", edit("accel_m_s2 = 1.0", "accel_m_s2 = 1.0\nhome_deg = 10.0"),
     ["joint[2] ('slide').home_deg", "10.0", "home_m"]),
    ("missing axis", edit("axis = [0.0, 1.0, 0.0]\n", ""), ["joint[1] ('lift').axis", "missing", "3-vector"]),
    ("zero axis", edit("axis = [0.0, 1.0, 0.0]", "axis = [0.0, 0.0, 0.0]"),
     ["joint[1] ('lift').axis", "[0.0, 0.0, 0.0]", "non-zero"]),
    ("missing frame", edit("frame = { xyz_m = [0.3, 0.0, 0.0] }\n", ""),
     ["joint[2] ('slide').frame", "missing", "xyz_m"]),
    ("two rotations", edit("frame = { xyz_m = [0.0, 0.0, 0.2] }",
                           "frame = { rpy_deg = [0.0, 0.0, 1.0], rpy_rad = [0.0, 0.0, 0.1] }"),
     ["joint[0] ('yaw').frame.rpy_rad", "[0.0, 0.0, 0.1]", "only one of"]),
    ("not a rotation",
     edit("[tool]", "[tool]\nrotation_rows = [[1.0, 0.0, 0.0], [0.0, 2.0, 0.0], [0.0, 0.0, 1.0]]"),
     ["tool.rotation_rows", "proper rotation"]),
    ("duplicate name", edit('name = "slide"', 'name = "yaw"'),
     ["joint[2] ('yaw').name", "'yaw'", "joint[0] has it"]),
    ("dh in one joint only",
     edit("frame = { xyz_m = [0.3, 0.0, 0.0] }", "dh = { a_m = 0.1, d_m = 0.0, alpha_deg = 0.0 }"),
     ["joint[0] ('yaw').dh", "one style per file"]),
    ("convention without dh", edit('name = "probe"', 'name = "probe"\ndh_convention = "standard"'),
     ["dh_convention", "'standard'", "only in files whose joints use `dh`"]),
    ("no joints", BASE[: BASE.index("[[joint]]")], ["joint: missing", "at least one [[joint]]"]),
    ("empty joint list", 'name = "probe"\njoint = []\n', ["joint", "at least one [[joint]] table"]),
    ("unknown format", "format = 2\n" + BASE, ["format", "2", "one of 1"]),
    ("joint not a table", 'name = "probe"\njoint = [3]\n', ["joint[0] (None)", "3", "a table"]),
    ("toml syntax", edit("speed_deg_s = 90.0", "speed_deg_s = = 90.0"), ["TOML syntax error", "line"]),
]


@pytest.mark.parametrize("text, fragments", [c[1:] for c in ERROR_CASES], ids=[c[0] for c in ERROR_CASES])
def test_validation_errors_name_joint_key_value(text, fragments):
    with pytest.raises(ModelError) as info:
        parse_arm_toml(text, source="probe.toml")
    message = str(info.value)
    assert message.startswith("probe.toml: ")
    for fragment in fragments:
        assert fragment in message, f"{fragment!r} not in {message!r}"


DH_TEXT = """
name = "dhprobe"
dh_convention = "{convention}"
[mount]
xyz_m = [0.1, -0.2, 0.3]
rpy_deg = [10.0, -20.0, 30.0]
[tool]
xyz_m = [0.01, 0.02, 0.07]
rpy_rad = [0.3, 0.2, -0.1]
[[joint]]
name = "j1"
kind = "revolute"
dh = {{ a_m = 0.05, alpha_deg = 90.0, d_m = 0.3, theta_deg = 15.0 }}
range_deg = [-170.0, 170.0]
speed_deg_s = 90.0
accel_deg_s2 = 300.0
[[joint]]
name = "j2"
kind = "prismatic"
dh = {{ a_m = 0.2, alpha_rad = -0.7, d_m = 0.1, theta_rad = 0.4 }}
range_m = [-0.3, 0.3]
speed_m_s = 0.3
accel_m_s2 = 1.0
[[joint]]
name = "j3"
kind = "revolute"
dh = {{ a_m = 0.25, alpha_deg = -90.0, d_m = 0.04 }}
range_deg = [-150.0, 150.0]
speed_deg_s = 90.0
accel_deg_s2 = 300.0
[[joint]]
name = "j4"
kind = "revolute"
dh = {{ a_m = 0.0, alpha_deg = 45.0, d_m = 0.12, theta_deg = -30.0 }}
unlimited = true
speed_deg_s = 90.0
accel_deg_s2 = 300.0
"""
# (a, alpha, d, theta, prismatic) of DH_TEXT, SI
DH_ROWS = [(0.05, math.radians(90), 0.3, math.radians(15), False),
           (0.2, -0.7, 0.1, 0.4, True),
           (0.25, math.radians(-90), 0.04, 0.0, False),
           (0.0, math.radians(45), 0.12, math.radians(-30), False)]


def _rx(t):
    c, s = math.cos(t), math.sin(t)
    return np.array([[1, 0, 0, 0], [0, c, -s, 0], [0, s, c, 0], [0, 0, 0, 1.0]])


def _rz(t):
    c, s = math.cos(t), math.sin(t)
    return np.array([[c, -s, 0, 0], [s, c, 0, 0], [0, 0, 1, 0], [0, 0, 0, 1.0]])


def _tr(x, y, z):
    T = np.eye(4)
    T[:3, 3] = (x, y, z)
    return T


def _pose(xyz, R):
    T = np.eye(4)
    T[:3, :3] = R
    T[:3, 3] = xyz
    return T


def _scipy_rpy(rpy):
    # scipy lower-case "xyz" = extrinsic (fixed-axis) rotations about x, then y, then z:
    # R = Rz(yaw) Ry(pitch) Rx(roll) (scipy.spatial.transform.Rotation.from_euler docs).
    return Rotation.from_euler("xyz", rpy).as_matrix()


@pytest.mark.parametrize("convention", ["standard", "modified"])
def test_dh_arm_matches_direct_product_of_link_matrices(convention):
    # Standard convention (Denavit & Hartenberg 1955, "A kinematic notation for lower-pair mechanisms
    # based on matrices", ASME J. Appl. Mech.): A_i = Rz(theta_i) Tz(d_i) Tx(a_i) Rx(alpha_i).
    # Modified convention (Craig 1986/2005, "Introduction to Robotics: Mechanics and Control", ch. 3):
    # A_i = Rx(alpha_{i-1}) Tx(a_{i-1}) Rz(theta_i) Tz(d_i), a row holding (a_{i-1}, alpha_{i-1}).
    arm = parse_arm_toml(DH_TEXT.format(convention=convention))
    mount = _pose([0.1, -0.2, 0.3], _scipy_rpy(np.radians([10.0, -20.0, 30.0])))
    tool = _pose([0.01, 0.02, 0.07], _scipy_rpy([0.3, 0.2, -0.1]))
    rng = np.random.default_rng(RNG_SEED)
    for _ in range(50):
        q = rng.uniform(-2.0, 2.0, size=4)
        q[1] = rng.uniform(-0.3, 0.3)
        T = mount.copy()
        for (a, alpha, d, theta, prismatic), qi in zip(DH_ROWS, q, strict=True):
            th, dd = (theta, d + qi) if prismatic else (theta + qi, d)
            if convention == "standard":
                T = T @ _rz(th) @ _tr(0, 0, dd) @ _tr(a, 0, 0) @ _rx(alpha)
            else:
                T = T @ _rx(alpha) @ _tr(a, 0, 0) @ _rz(th) @ _tr(0, 0, dd)
        T = T @ tool
        np.testing.assert_allclose(forward(arm, q).T_base_tool, T, atol=TOL)


DH_ERROR_CASES = [
    ("dh without convention", ('dh_convention = "standard"\n', ""),
     ["dh_convention: missing", "'standard' or 'modified'"]),
    ("bad convention", ('dh_convention = "standard"', 'dh_convention = "proximal"'),
     ["dh_convention", "'proximal'", "'standard' or 'modified'"]),
    ("axis on a dh joint", ("unlimited = true", "unlimited = true\naxis = [1.0, 0.0, 0.0]"),
     ["joint[3] ('j4').axis", "[1.0, 0.0, 0.0]", "own z axis"]),
    ("dh without alpha", ("alpha_deg = -90.0, ", ""),
     ["joint[2] ('j3').dh.alpha: missing", "alpha_deg or alpha_rad"]),
    ("dh alpha twice", ("alpha_deg = -90.0,", "alpha_deg = -90.0, alpha_rad = 0.1,"),
     ["joint[2] ('j3').dh.alpha_rad", "0.1", "only one of alpha_deg, alpha_rad"]),
    ("dh missing a", ("a_m = 0.25, ", ""), ["joint[2] ('j3').dh.a_m: missing"]),
    ("dh unknown key", ("a_m = 0.25,", "a_m = 0.25, r_m = 0.1,"),
     ["joint[2] ('j3').dh.r_m", "0.1", "a known key (a_m, d_m, alpha_deg"]),
]


@pytest.mark.parametrize("change, fragments", [c[1:] for c in DH_ERROR_CASES],
                         ids=[c[0] for c in DH_ERROR_CASES])
def test_dh_validation_errors(change, fragments):
    text = edit(*change, text=DH_TEXT.format(convention="standard"))
    with pytest.raises(ModelError) as info:
        parse_arm_toml(text)
    for fragment in fragments:
        assert fragment in str(info.value), f"{fragment!r} not in {info.value!s}"


def test_frame_arm_matches_composed_rotations():
    # Independent composition with scipy rotations (Rodrigues about the joint axis via from_rotvec):
    # T = mount * prod(frame_i * Rot(axis_i, q_i)) * tool for the reach7 example arm.
    arm = load_arm("reach7")
    frames = [[0, 0, 0.30], [0, 0, 0], [0, 0, 0], [0, 0, 0.40], [0, 0, 0], [0, 0, 0.38], [0, 0, 0]]
    axes = [[0, 0, 1], [0, 1, 0], [0, 0, 1], [0, 1, 0], [0, 0, 1], [0, 1, 0], [0, 0, 1]]
    mount = _tr(0, 0, 0.05)
    tool = _pose([0, 0, 0.10], _scipy_rpy(np.radians([0.0, 0.0, 30.0])))
    rng = np.random.default_rng(RNG_SEED + 1)
    for _ in range(50):
        q = rng.uniform(arm.q_min, arm.q_max)
        T = mount.copy()
        for xyz, axis, qi in zip(frames, axes, q, strict=True):
            T = T @ _tr(*xyz) @ _pose([0, 0, 0], Rotation.from_rotvec(np.array(axis, float) * qi).as_matrix())
        np.testing.assert_allclose(forward(arm, q).T_base_tool, T @ tool, atol=TOL)


def test_rpy_matrix_is_fixed_axis_roll_pitch_yaw():
    # R = Rz(yaw) Ry(pitch) Rx(roll) (METHODS.md analytical Jacobian section; URDF origin rpy);
    # oracle: scipy's extrinsic "xyz" Euler angles.
    rng = np.random.default_rng(RNG_SEED + 2)
    for rpy in rng.uniform(-math.pi, math.pi, size=(100, 3)):
        np.testing.assert_allclose(rpy_matrix(*rpy), _scipy_rpy(rpy), atol=1e-14)


def test_degree_and_radian_keys_agree():
    lim = math.radians(170)
    rad = BASE.replace("range_deg = [-170.0, 170.0]", f"range_rad = [{-lim!r}, {lim!r}]")
    rad = rad.replace("speed_deg_s = 90.0", f"speed_rad_s = {math.radians(90)!r}", 1)
    rad = rad.replace("accel_deg_s2 = 300.0", f"accel_rad_s2 = {math.radians(300)!r}", 1)
    a, b = parse_arm_toml(BASE), parse_arm_toml(rad)
    for name in ("q_min", "q_max", "v_max", "a_max"):
        np.testing.assert_array_equal(getattr(a, name), getattr(b, name))


def test_home_given_per_joint_and_defaults_elsewhere():
    text = edit("accel_m_s2 = 1.0", "accel_m_s2 = 1.0\nhome_m = 0.15")
    text = edit("accel_deg_s2 = 300.0", "accel_deg_s2 = 300.0\nhome_deg = -45.0", 2, text)
    arm = parse_arm_toml(text)
    np.testing.assert_allclose(arm.q_home, [0.0, math.radians(-45.0), 0.15])
    # Without any home key the model's default applies: 0 where allowed, else mid-range.
    text = edit("range_m = [0.0, 0.2]", "range_m = [0.05, 0.2]")
    np.testing.assert_allclose(parse_arm_toml(text).q_home, [0.0, 0.0, 0.125])


def test_unlimited_revolute_joint():
    arm = load_arm("bench6")
    j = arm.joints[arm.joint_names.index("flange_roll")]
    assert j.position_min == -math.inf and j.position_max == math.inf and not j.limited


@pytest.mark.parametrize("name", ["bench6", "reach7", "planar3", "rail4"])
def test_example_arms_load_and_home_is_within_limits(name):
    arm = load_arm(name)
    assert np.all(arm.q_min <= arm.q_home) and np.all(arm.q_home <= arm.q_max)
    assert np.all(arm.v_max > 0) and np.all(arm.a_max > 0)
    data, label, suffix = read_arm_source(name)
    assert label == f"{name}.toml" and suffix == ".toml"
    text = data.decode()
    assert "Invented for demos" in text  # header required of every example arm


def test_example_arm_catalogue():
    found = example_arms()
    assert {"bench6", "reach7", "planar3", "rail4", "desk4"} <= set(found)
    assert {load_arm(n).n for n in ("bench6", "reach7", "planar3", "rail4")} == {6, 7, 3, 4}
    assert load_arm("bench6.toml").n == 6  # file name of an example works too


def test_bench6_wrist_is_spherical():
    # The last three joint axes meet at one point for every configuration (spherical wrist).
    arm = load_arm("bench6")
    rng = np.random.default_rng(RNG_SEED + 3)
    for _ in range(20):
        f = forward(arm, rng.uniform(-1.5, 1.5, size=6))
        # Joint frames carry a point on each axis: axes 5 and 6 share theirs (the wrist centre),
        # and that point lies on axis 4's line (zero distance: cross(z4, c - p4) = 0).
        centre = f.p_base[4]
        np.testing.assert_allclose(f.p_base[5], centre, atol=1e-12)
        np.testing.assert_allclose(np.cross(f.z_base[3], centre - f.p_base[3]), 0.0, atol=1e-12)
        assert np.linalg.norm(centre - f.p_base[3]) == pytest.approx(0.36)  # forearm length d_4


def test_load_arm_rejects_urdf_only_arguments_and_unknown_files(tmp_path):
    from twistrate.solver.errors import InputError

    with pytest.raises(InputError, match=r"tool_link.*only for \.urdf"):
        load_arm("bench6", tool_link="flange")
    with pytest.raises(InputError, match=r"arm file.*no_such_arm.*bench6"):
        load_arm("no_such_arm")
    bad = tmp_path / "arm.yaml"
    bad.write_text("name: x")
    with pytest.raises(InputError, match=r"\.toml or \.urdf"):
        load_arm(bad)
    good = tmp_path / "probe.toml"
    good.write_text(BASE)
    assert load_arm(good).n == 3
    broken = tmp_path / "broken.toml"
    broken.write_text(edit("speed_m_s = 0.2", "speed_m_s = -1.0"))
    with pytest.raises(ModelError, match=r"broken\.toml: joint\[2\] \('slide'\)\.speed_m_s"):
        load_arm(broken)


def test_documented_example_parses():
    # The complete example in docs/arm-format.md must stay valid.
    from pathlib import Path

    doc = (Path(__file__).resolve().parents[1] / "docs" / "arm-format.md").read_text()
    blocks = [b.split("```", 1)[0] for b in doc.split("```toml\n")[1:]]
    example = next(b for b in blocks if 'name = "example4"' in b)
    arm = parse_arm_toml(example, source="arm-format.md")
    assert arm.joint_names == ("turntable", "shoulder", "elbow", "wrist_roll")
    assert not arm.joints[3].limited
    np.testing.assert_allclose(arm.q_home, [0.0, math.radians(45.0), math.radians(-90.0), 0.0])
