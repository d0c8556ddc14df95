"""URDF import: tool-link poses cross-checked against pinocchio's own URDF parser; unsupported
joints on the chain raise; off-chain links are ignored; limits and defaults as documented."""

from __future__ import annotations

import math

import numpy as np
import pytest

from twistrate.solver.errors import ModelError
from twistrate.solver.kinematics import forward
from twistrate.solver.load import load_arm, read_arm_source
from twistrate.solver.urdf import DEFAULT_ACCEL_RAMP_S, parse_urdf

pin = pytest.importorskip("pinocchio")

RNG_SEED = 7321
POSE_TOL = 1e-10
DESK4 = read_arm_source("desk4")[0].decode()


def pinocchio_pose(xml: str, q_by_joint: dict[str, float], base: str, tool: str) -> np.ndarray:
    """T_base_tool from pinocchio (reference library: Carpentier et al. 2019, "The Pinocchio C++
    library", IEEE/SICE SII): its URDF parser, forward kinematics and frame placements. Joints not
    in `q_by_joint` sit at zero; a continuous joint is coded (cos q, sin q) in pinocchio's q."""
    model = pin.buildModelFromXML(xml)
    data = model.createData()
    q = pin.neutral(model)
    for name, value in q_by_joint.items():
        jid = model.getJointId(name)
        idx, nq = model.joints[jid].idx_q, model.joints[jid].nq
        q[idx:idx + nq] = [math.cos(value), math.sin(value)] if nq == 2 else [value]
    pin.framesForwardKinematics(model, data, q)
    oMb = data.oMf[model.getFrameId(base)].homogeneous
    oMt = data.oMf[model.getFrameId(tool)].homogeneous
    return np.linalg.solve(oMb, oMt)


def random_configurations(arm, rng, count):
    lo = np.where(np.isfinite(arm.q_min), arm.q_min, -math.pi)
    hi = np.where(np.isfinite(arm.q_max), arm.q_max, math.pi)
    return rng.uniform(lo, hi, size=(count, arm.n))


@pytest.mark.parametrize("tool, joints", [("flange", 4), ("wrist", 4), ("camera", 1), ("upper_arm", 2)])
def test_desk4_matches_pinocchio(tool, joints):
    arm = parse_urdf(DESK4, tool_link=tool)
    assert arm.n == joints
    rng = np.random.default_rng(RNG_SEED)
    for q in random_configurations(arm, rng, 40):
        expected = pinocchio_pose(DESK4, dict(zip(arm.joint_names, q, strict=True)), "base_link", tool)
        np.testing.assert_allclose(forward(arm, q).T_base_tool, expected, atol=POSE_TOL)


def _text(v: np.ndarray) -> str:
    return " ".join(repr(float(x)) for x in v)


def _random_chain_urdf(rng: np.random.Generator, n_links: int) -> tuple[str, list[str]]:
    """An invented serial URDF with random origins, axes and joint types (fixed ones interleaved),
    plus an off-chain branch on every third link. Returns (xml, chain link names)."""
    types = ["revolute", "continuous", "prismatic", "fixed"]
    parts = ['<robot name="randchain">', '<link name="l0"/>']
    links = ["l0"]
    for i in range(1, n_links):
        jtype = types[rng.integers(len(types))]
        xyz = rng.uniform(-0.3, 0.3, 3)
        rpy = rng.uniform(-math.pi, math.pi, 3)
        axis = rng.normal(size=3)
        axis /= np.linalg.norm(axis)
        parts.append(f'<link name="l{i}"/>')
        body = (f'<parent link="l{i - 1}"/><child link="l{i}"/>'
                f'<origin xyz="{_text(xyz)}" rpy="{_text(rpy)}"/>')
        if jtype != "fixed":
            body += f'<axis xyz="{_text(axis)}"/>'
        if jtype in ("revolute", "prismatic"):
            body += '<limit lower="-2.5" upper="2.5" velocity="1.5" effort="1"/>'
        elif jtype == "continuous":
            body += '<limit velocity="2.5" effort="1"/>'
        parts.append(f'<joint name="j{i}" type="{jtype}">{body}</joint>')
        links.append(f"l{i}")
        if i % 3 == 0:
            parts.append(f'<link name="side{i}"/><joint name="s{i}" type="revolute"><parent link="l{i}"/>'
                         f'<child link="side{i}"/><origin xyz="0.1 0 0"/><axis xyz="0 0 1"/>'
                         '<limit lower="-1" upper="1" velocity="1" effort="1"/></joint>')
    parts.append("</robot>")
    return "\n".join(parts), links


def test_random_chains_match_pinocchio():
    rng = np.random.default_rng(RNG_SEED + 1)
    checked = 0
    for _ in range(25):
        xml, links = _random_chain_urdf(rng, int(rng.integers(3, 10)))
        base = links[int(rng.integers(0, 2))]  # sometimes start at a link below the root
        tool = links[-1]
        try:
            arm = parse_urdf(xml, base_link=base, tool_link=tool)
        except ModelError as exc:
            assert "at least one revolute" in str(exc)  # an all-fixed chain is the only refusal
            continue
        for q in random_configurations(arm, rng, 10):
            expected = pinocchio_pose(xml, dict(zip(arm.joint_names, q, strict=True)), base, tool)
            np.testing.assert_allclose(forward(arm, q).T_base_tool, expected, atol=POSE_TOL)
        checked += 1
    assert checked >= 20


def test_desk4_limits_continuous_joint_and_default_acceleration():
    arm = load_arm("desk4", tool_link="flange")
    assert arm.joint_names == ("waist", "shoulder", "elbow", "wrist_roll")  # camera, finger ignored
    np.testing.assert_array_equal(arm.q_min[:3], [-2.6, -1.7, -2.2])
    np.testing.assert_array_equal(arm.q_max[:3], [2.6, 1.9, 2.2])
    roll = arm.joints[3]
    assert roll.position_min == -math.inf and roll.position_max == math.inf and not roll.limited
    np.testing.assert_array_equal(arm.v_max, [2.0, 1.8, 2.2, 3.5])
    np.testing.assert_allclose(arm.a_max, arm.v_max / DEFAULT_ACCEL_RAMP_S)
    assert arm.name == "desk4"
    assert np.all(arm.q_min <= arm.q_home) and np.all(arm.q_home <= arm.q_max)
    assert "Invented for demos" in DESK4


def test_acceleration_argument():
    arm = parse_urdf(DESK4, tool_link="flange", acceleration=6.0)
    np.testing.assert_array_equal(arm.a_max, [6.0] * 4)
    arm = parse_urdf(DESK4, tool_link="flange", acceleration={"elbow": 3.0})
    np.testing.assert_allclose(arm.a_max, [8.0, 7.2, 3.0, 14.0])
    with pytest.raises(ModelError, match=r"acceleration: got \['finger_slide'\]"):
        parse_urdf(DESK4, tool_link="flange", acceleration={"finger_slide": 3.0})


def test_fixed_joints_fold_into_neighbours():
    # pedestal_mount (z 0.04, yaw 0.2) + waist origin (z 0.09) -> the waist's T_prev_joint;
    # flange_mount after the last actuated joint -> the tool transform.
    arm = parse_urdf(DESK4, tool_link="flange")
    c, s = math.cos(0.2), math.sin(0.2)
    expected = np.array([[c, -s, 0, 0], [s, c, 0, 0], [0, 0, 1, 0.13], [0, 0, 0, 1]])
    np.testing.assert_allclose(arm.joints[0].T_prev_joint, expected, atol=1e-15)
    np.testing.assert_allclose(arm.T_last_tool[:3, 3], [0.05, 0.0, -0.01])
    np.testing.assert_array_equal(arm.T_base_root, np.eye(4))


MINI = """<robot name="mini">
  <link name="a"/><link name="b"/><link name="c"/>
  <joint name="first" type="revolute"><parent link="a"/><child link="b"/>
    <axis xyz="0 0 1"/><limit lower="-1" upper="1" velocity="1" effort="1"/></joint>
  <joint name="second" type="{type}"><parent link="b"/><child link="c"/>
    <origin xyz="0.1 0 0"/><axis xyz="0 1 0"/>{limit}{extra}</joint>
</robot>"""
LIMIT = '<limit lower="-1" upper="1" velocity="1" effort="1"/>'


def mini(type_="revolute", limit=LIMIT, extra=""):
    return MINI.format(type=type_, limit=limit, extra=extra)


UNSUPPORTED = [
    ("floating on chain", mini("floating", ""), ["joint 'second'.type", "'floating'"]),
    ("planar on chain", mini("planar", ""), ["joint 'second'.type", "'planar'"]),
    ("unknown type", mini("spherical", ""), ["joint 'second'.type", "'spherical'", "revolute"]),
    ("mimic on chain", mini(extra='<mimic joint="first" multiplier="2"/>'),
     ["joint 'second'.mimic", "multiplier"]),
    ("missing limit", mini(limit=""), ["joint 'second'.limit: missing", "lower, upper, velocity"]),
    ("missing upper", mini(limit='<limit lower="-1" velocity="1" effort="1"/>'),
     ["joint 'second'.limit.upper", "None", "finite number"]),
    ("bad velocity", mini(limit='<limit lower="-1" upper="1" velocity="fast" effort="1"/>'),
     ["joint 'second'.limit.velocity", "'fast'"]),
    ("prismatic without limit", mini("prismatic", ""), ["joint 'second'.limit", "prismatic"]),
    ("continuous without velocity", mini("continuous", '<limit effort="1"/>'),
     ["joint 'second'.limit.velocity", "continuous"]),
    ("lower above upper", mini(limit='<limit lower="1" upper="-1" velocity="1" effort="1"/>'),
     ["('second')", "position limits", "min < max"]),
    ("bad origin", mini(extra="").replace('xyz="0.1 0 0"', 'xyz="0.1 0"'),
     ["joint 'second'.origin.xyz", "'0.1 0'", "3 finite numbers"]),
    ("nan axis", mini().replace('xyz="0 1 0"', 'xyz="0 nan 0"'), ["joint 'second'.axis.xyz", "'0 nan 0'"]),
    ("missing child", mini().replace('<child link="c"/>', ""), ["joint 'second'.child", "missing"]),
    ("two parents", mini().replace("</robot>", '<joint name="again" type="fixed"><parent link="a"/>'
                                   '<child link="c"/></joint></robot>'),
     ["joint 'again'.child", "'c'", "not a tree"]),
    ("not xml", "<robot><link></robot>", ["not well-formed XML"]),
    ("not a robot", "<model/>", ["root element", "'model'", "<robot>"]),
]


@pytest.mark.parametrize("xml, fragments", [c[1:] for c in UNSUPPORTED], ids=[c[0] for c in UNSUPPORTED])
def test_unsupported_on_chain_raises_naming_the_joint(xml, fragments):
    with pytest.raises(ModelError) as info:
        parse_urdf(xml, source="mini.urdf")
    message = str(info.value)
    assert message.startswith("mini.urdf: ")
    for fragment in fragments:
        assert fragment in message, f"{fragment!r} not in {message!r}"


def test_chain_selection_errors():
    with pytest.raises(ModelError, match=r"tool_link: got None.*\['camera', 'finger'\]"):
        parse_urdf(DESK4)
    with pytest.raises(ModelError, match=r"tool_link: got 'nowhere'; accepted: a link of the document"):
        parse_urdf(DESK4, tool_link="nowhere")
    with pytest.raises(ModelError, match=r"base_link: got 'nowhere'"):
        parse_urdf(DESK4, base_link="nowhere", tool_link="flange")
    # camera is not below the forearm: walking up from it never meets the base
    with pytest.raises(ModelError, match=r"tool_link: got 'camera'.*not below the base"):
        parse_urdf(DESK4, base_link="forearm", tool_link="camera")
    with pytest.raises(ModelError, match=r"chain: got 'wrist -> flange'.*at least one revolute"):
        parse_urdf(DESK4, base_link="wrist", tool_link="flange")
    # the mimic joint is reported only when it is on the chain
    with pytest.raises(ModelError, match=r"joint 'finger_slide'\.mimic"):
        parse_urdf(DESK4, tool_link="finger")
    two_roots = mini().replace("</robot>", '<link name="loose"/></robot>')
    with pytest.raises(ModelError, match=r"base_link: got None.*\['a', 'loose'\]"):
        parse_urdf(two_roots)
    assert parse_urdf(two_roots, base_link="a").n == 2


def test_off_chain_unsupported_joints_are_ignored():
    # A floating joint and a mimic joint off the chain do not matter.
    xml = mini().replace("</robot>", '<link name="free"/><joint name="drift" type="floating">'
                         '<parent link="b"/><child link="free"/></joint></robot>')
    arm = parse_urdf(xml, tool_link="c")
    assert arm.joint_names == ("first", "second")
    assert parse_urdf(mini()).n == 2  # single leaf: the tool defaults to it
    assert parse_urdf(DESK4, tool_link="flange").n == 4  # the finger's mimic is off this chain


def test_default_axis_is_x():
    # URDF specification (common practice): <axis> absent means 1 0 0.
    xml = mini().replace('<axis xyz="0 1 0"/>', "")
    np.testing.assert_array_equal(parse_urdf(xml).joints[1].axis, [1.0, 0.0, 0.0])
