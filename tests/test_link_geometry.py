"""Link capsules: TOML `[[capsule]]` frames (checked against DH products computed independently),
URDF `<collision>` fits (placements against pinocchio's geometry model, containment of the shapes),
the self-collision pair rules, and the messages of bad input."""

from __future__ import annotations

import math
import tomllib
import xml.etree.ElementTree as ET

import numpy as np
import pytest

from twistrate.solver.arm_toml import parse_arm_toml
from twistrate.solver.dh import DHRow, dh_link
from twistrate.solver.errors import ModelError
from twistrate.solver.geometry import ArmGeometry, Capsule
from twistrate.solver.kinematics import forward
from twistrate.solver.load import load_arm, read_arm_source
from twistrate.solver.urdf import parse_urdf
from twistrate.solver.urdf_geometry import fit_shape

SEED = 5150
DESK4 = read_arm_source("desk4")[0].decode()


def capsule_base(arm, frames, c):
    """(a, b) of capsule c in the base frame at the frames' configuration."""
    T = arm.T_base_root if c.body == 0 else frames.T_base_joint[c.body - 1]
    return T[:3, :3] @ c.a + T[:3, 3], T[:3, :3] @ c.b + T[:3, 3]


def by_name(arm, name):
    return next(c for c in arm.geometry.capsules if c.name == name)


@pytest.mark.parametrize("name, convention", [("bench6", "standard"), ("planar3", "modified")])
def test_dh_capsules_sit_in_dh_frames(name, convention):
    """A capsule on a DH link is written in that link's DH frame {i}; its base position must be
    mount @ A_1(q_1) ... A_i(q_i) @ a with the DH link transforms (Denavit & Hartenberg 1955;
    Craig's modified form) multiplied out directly, independent of the chain conversion."""
    arm = load_arm(name)
    text = read_arm_source(name)[0].decode()
    spec = tomllib.loads(text)
    rows = []
    for j in spec["joint"]:
        dh = j["dh"]
        rows.append(DHRow(dh["a_m"], math.radians(dh["alpha_deg"]), dh["d_m"],
                          math.radians(dh.get("theta_deg", 0.0))))
    rng = np.random.default_rng(SEED)
    for _ in range(10):
        q = rng.uniform(np.maximum(arm.q_min, -3.0), np.minimum(arm.q_max, 3.0))
        fr = forward(arm, q)
        T = arm.T_base_root.copy()
        links = []
        for row, qi in zip(rows, q, strict=True):
            T = T @ dh_link(row, convention, qi)
            links.append(T)
        for c_spec in spec["capsule"]:
            if c_spec["link"] in ("root", "tool"):
                continue
            i = [j["name"] for j in spec["joint"]].index(c_spec["link"])
            expected = links[i][:3, :3] @ np.array(c_spec["a_m"]) + links[i][:3, 3]
            got, _ = capsule_base(arm, fr, by_name(arm, c_spec["name"]))
            np.testing.assert_allclose(got, expected, atol=1e-12)


def test_tool_and_root_capsules():
    """`link = "tool"` is in the tool frame (T_base_tool @ a); `link = "root"` in the mount's."""
    arm = load_arm("reach7")
    q = arm.q_home + 0.1
    fr = forward(arm, q)
    tool = by_name(arm, "tool")
    got, _ = capsule_base(arm, fr, tool)
    T = fr.T_base_tool
    np.testing.assert_allclose(got, T[:3, :3] @ [0, 0, -0.08] + T[:3, 3], atol=1e-12)
    pedestal = by_name(arm, "pedestal")
    np.testing.assert_allclose(capsule_base(arm, fr, pedestal)[1], [0, 0, 0.05 + 0.10], atol=1e-15)


BASE = """
format = 1
name = "two"
touching = TOUCH
[[joint]]
name = "one"
kind = "revolute"
frame = { xyz_m = [0.0, 0.0, 0.1] }
axis = [0.0, 0.0, 1.0]
range_deg = [-90.0, 90.0]
speed_deg_s = 90.0
accel_deg_s2 = 300.0
[[joint]]
name = "two"
kind = "revolute"
frame = { xyz_m = [0.3, 0.0, 0.0] }
axis = [0.0, 0.0, 1.0]
range_deg = [-90.0, 90.0]
speed_deg_s = 90.0
accel_deg_s2 = 300.0
[[capsule]]
link = "one"
CAPSULE
"""


def toml(capsule="a_m = [0.0, 0.0, 0.0]\nb_m = [0.3, 0.0, 0.0]\nradius_m = 0.04", touch="[]"):
    return BASE.replace("CAPSULE", capsule).replace("TOUCH", touch)


def test_toml_capsule_defaults():
    arm = parse_arm_toml(toml())
    (c,) = arm.geometry.capsules
    assert c.name == "one.0" and c.body == 1 and c.radius == 0.04


@pytest.mark.parametrize("capsule, touch, expected", [
    ("link2 = 1\na_m = [0.0, 0.0, 0.0]\nb_m = [0.3, 0.0, 0.0]\nradius_m = 0.04", "[]",
     ["capsule[0].link2", "a known key (link, name, a_m, b_m, radius_m)"]),
    ("a_m = [0.0, 0.0, 0.0]\nb_m = [0.3, 0.0, 0.0]\nradius_m = -0.04", "[]",
     ["capsule[0].radius_m", "-0.04", "a finite number >= 0"]),
    ("a_m = [0.0, 0.0]\nb_m = [0.3, 0.0, 0.0]\nradius_m = 0.04", "[]",
     ["capsule[0].a_m", "exactly 3 items"]),
    ("a_m = [0.0, 0.0, \"1\"]\nb_m = [0.3, 0.0, 0.0]\nradius_m = 0.04", "[]",
     ["capsule[0].a_m[2]", "a number"]),
    ("a_m = [0.0, 0.0, 0.0]\nb_m = [0.3, 0.0, 0.0]\nradius_m = 0.04", '[["one", "three"]]',
     ["touching[0][1]", "'three'", "a link name: 'root' or a joint name (one, two)"]),
    ("a_m = [0.0, 0.0, 0.0]\nb_m = [0.3, 0.0, 0.0]\nradius_m = 0.04", '[["one", "one"]]',
     ["touching[0]", "two different links"]),
    ("a_m = [0.0, 0.0, 0.0]\nb_m = [0.3, 0.0, 0.0]\nradius_m = 0.04", '[["one"]]',
     ["touching[0]", "exactly 2 items"]),
])
def test_toml_capsule_errors_name_key_value_and_accepted(capsule, touch, expected):
    with pytest.raises(ModelError) as err:
        parse_arm_toml(toml(capsule, touch), source="two.toml")
    for part in expected:
        assert part in str(err.value)


def test_toml_unknown_link_and_duplicate_names():
    text = BASE.replace("link = \"one\"", "link = \"elbow\"").replace(
        "CAPSULE", "a_m = [0.0, 0.0, 0.0]\nb_m = [0.3, 0.0, 0.0]\nradius_m = 0.04").replace("TOUCH", "[]")
    with pytest.raises(ModelError,
                       match=r"capsule\[0\]\.link: got 'elbow'; accepted: 'root', 'tool' or a joint"):
        parse_arm_toml(text)
    two = toml("name = \"bar\"\na_m = [0.0, 0.0, 0.0]\nb_m = [0.3, 0.0, 0.0]\nradius_m = 0.04") + (
        "[[capsule]]\nlink = \"two\"\nname = \"bar\"\n"
        "a_m = [0.0, 0.0, 0.0]\nb_m = [0.1, 0.0, 0.0]\nradius_m = 0.02\n")
    with pytest.raises(ModelError, match=r"capsule\[1\] \('bar'\)\.name: got 'bar'"):
        parse_arm_toml(two)


def test_self_pairs_skip_same_adjacent_and_touching_bodies():
    """Adjacent = neighbours among the bodies with capsules (bare bodies between are skipped)."""
    def cap(name, body):
        return Capsule(name, body, np.zeros(3), np.ones(3), 0.01)
    geo = ArmGeometry((cap("r", 0), cap("a", 1), cap("a2", 1), cap("c", 3), cap("d", 4), cap("e", 5)))
    assert geo.adjacent() == {(0, 1), (1, 3), (3, 4), (4, 5)}
    pairs = {(geo.capsules[k].name, geo.capsules[m].name) for k, m in geo.self_pairs()}
    assert pairs == {("r", "c"), ("r", "d"), ("r", "e"), ("a", "d"), ("a", "e"), ("a2", "d"), ("a2", "e"),
                     ("c", "e")}
    pairs = {(geo.capsules[k].name, geo.capsules[m].name) for k, m in geo.self_pairs(frozenset({(1, 4)}))}
    assert ("a", "d") not in pairs and ("a", "e") in pairs


pin = pytest.importorskip("pinocchio")


def test_urdf_capsules_follow_pinocchio_collision_placements():
    """Each fitted capsule's centre and axis in the base frame against the placement pinocchio's
    geometry model gives the same <collision> shape (Carpentier et al. 2019, the Pinocchio
    library: buildGeomFromUrdfString, updateGeometryPlacements) at random configurations."""
    arm = parse_urdf(DESK4, tool_link="flange")
    model = pin.buildModelFromXML(DESK4)
    geom = pin.buildGeomFromUrdfString(model, DESK4, pin.GeometryType.COLLISION)
    data, gdata = model.createData(), pin.GeometryData(geom)
    names = {c.name: c for c in arm.geometry.capsules}
    assert set(names) == {"base_link/0", "pedestal/0", "turret/housing", "camera/0", "upper_arm/0",
                          "forearm/0", "wrist/0", "flange/0"}  # the finger rides a moving joint: off
    assert names["camera/0"].body == names["turret/housing"].body == 1
    rng = np.random.default_rng(SEED + 1)
    for _ in range(10):
        q = rng.uniform(np.maximum(arm.q_min, -3), np.minimum(arm.q_max, 3))
        qp = pin.neutral(model)
        for name, value in zip(arm.joint_names, q, strict=True):
            jid = model.getJointId(name)
            idx, nq = model.joints[jid].idx_q, model.joints[jid].nq
            qp[idx:idx + nq] = [math.cos(value), math.sin(value)] if nq == 2 else [value]
        pin.updateGeometryPlacements(model, data, geom, gdata, qp)
        fr = forward(arm, q)
        for k, obj in enumerate(geom.geometryObjects):
            label = obj.name.rsplit("_", 1)[0]
            match = [c for n, c in names.items() if n.split("/")[0] == label]
            if not match:
                continue
            a, b = capsule_base(arm, fr, match[0])
            M = gdata.oMg[k].homogeneous
            np.testing.assert_allclose(0.5 * (a + b), M[:3, 3], atol=1e-12)
            if np.linalg.norm(b - a) > 0:
                u = (b - a) / np.linalg.norm(b - a)
                assert np.max(np.abs(M[:3, :3].T @ u)) == pytest.approx(1.0, abs=1e-12)  # a shape axis


@pytest.mark.parametrize("xml, kind", [
    ('<sphere radius="0.07"/>', "sphere"),
    ('<cylinder radius="0.03" length="0.2"/>', "cylinder"),
    ('<box size="0.1 0.3 0.05"/>', "box"),
])
def test_urdf_fit_contains_the_shape_and_touches_it(xml, kind):
    """Conservative fit: every point of the shape lies within the capsule (sampled surface points
    and every corner / rim point), and the fit is tight (some shape point lies on the capsule)."""
    a, b, r = fit_shape(ET.fromstring(xml), "test")
    rng = np.random.default_rng(SEED + 2)
    if kind == "sphere":
        pts = rng.normal(size=(2000, 3))
        pts = 0.07 * pts / np.linalg.norm(pts, axis=1, keepdims=True)
    elif kind == "cylinder":
        phi = rng.uniform(0, 2 * math.pi, 2000)
        z = np.concatenate([rng.uniform(-0.1, 0.1, 1000), np.full(500, -0.1), np.full(500, 0.1)])
        pts = np.column_stack([0.03 * np.cos(phi), 0.03 * np.sin(phi), z])
    else:
        h = np.array([0.05, 0.15, 0.025])
        corners = np.array([[x, y, z] for x in (-1, 1) for y in (-1, 1) for z in (-1, 1)]) * h
        pts = np.concatenate([corners, rng.uniform(-1, 1, (2000, 3)) * h])
    d = b - a
    t = np.clip(((pts - a) @ d) / max(d @ d, 1e-300), 0, 1) if d @ d > 0 else np.zeros(len(pts))
    dist = np.linalg.norm(pts - (a + t[:, None] * d), axis=1)
    assert dist.max() <= r + 1e-12
    assert dist.max() == pytest.approx(r, abs=1e-6)


def test_urdf_meshes_are_listed_not_fitted_and_bad_shapes_refused():
    mesh = DESK4.replace('<sphere radius="0.03"/>', '<mesh filename="wrist.stl"/>')
    arm = parse_urdf(mesh, tool_link="flange")
    assert arm.geometry.unfitted == ("wrist/0 (mesh)",)
    bad = DESK4.replace('<sphere radius="0.03"/>', '<sphere radius="-1"/>')
    with pytest.raises(ModelError, match=r"link 'wrist'\.collision\[0\]\.geometry\.sphere\.radius: got '-1'"):
        parse_urdf(bad, tool_link="flange")
    empty = DESK4.replace('<geometry><sphere radius="0.03"/></geometry>', '')
    with pytest.raises(ModelError, match=r"link 'wrist'\.collision\[0\]\.geometry: missing"):
        parse_urdf(empty, tool_link="flange")
