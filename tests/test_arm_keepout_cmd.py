"""`twistrate arm FILE --at Q --config SERVICE.toml`: the distance of every link capsule to every zone of
the config's [keepout] section and of the link pairs that may collide, nearest first. Half-spaces against
the closed form (signed distance of a capsule to a plane: min over its two end points of n^T p - c, minus
the radius, the plane distance being affine along the segment; common practice), link pairs against the
collision library coal, and bad --config input exits 2 naming the key."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from twistrate.service.commands import arm as arm_cmd
from twistrate.solver.kinematics import forward
from twistrate.solver.load import load_arm

coal = pytest.importorskip("coal")

#: an invented cell: a tilted table plane and a wall, in the base frame
CELL = """
[arm]
file = "reach7"

[keepout]
influence_m = 0.12
security_m = 0.03
self_collision = true

[[keepout.zone]]
name = "tilted_table"
kind = "half_space"
point_m = [0.3, 0.0, 0.12]
normal = [0.2, -0.1, 1.0]

[[keepout.zone]]
name = "back_wall"
kind = "half_space"
point_m = [-0.35, 0.0, 0.0]
normal = [1.0, 0.0, 0.0]
"""
ZONES = {"tilted_table": ([0.3, 0.0, 0.12], [0.2, -0.1, 1.0]),
         "back_wall": ([-0.35, 0.0, 0.0], [1.0, 0.0, 0.0])}
AT_DEG = "20,35,-15,80,30,40,0"


def run(capsys, *argv):
    code = arm_cmd.main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


def capsule_base(arm, frames, c):
    T = arm.T_base_root if c.body == 0 else frames.T_base_joint[c.body - 1]
    return T[:3, :3] @ c.a + T[:3, 3], T[:3, :3] @ c.b + T[:3, 3]


def coal_capsules(a0, a1, ra, b0, b1, rb):
    def placed(a, b, r):
        axis = b - a
        length = float(np.linalg.norm(axis))
        z = axis / length
        x = np.cross(z, [1.0, 0.0, 0.0] if abs(z[0]) < 0.9 else [0.0, 1.0, 0.0])
        x /= np.linalg.norm(x)
        T = coal.Transform3s(np.column_stack([x, np.cross(z, x), z]), 0.5 * (a + b))
        return coal.Capsule(r, length), T
    (g1, T1), (g2, T2) = placed(a0, a1, ra), placed(b0, b1, rb)
    return float(coal.distance(g1, T1, g2, T2, coal.DistanceRequest(), coal.DistanceResult()))


@pytest.fixture
def cell(tmp_path):
    path = tmp_path / "cell.toml"
    path.write_text(CELL)
    return str(path)


def test_json_distances_match_the_closed_form_and_coal_nearest_first(capsys, cell):
    code, out, err = run(capsys, "reach7", "--at", AT_DEG, "--deg", "--config", cell, "--json")
    assert code == 0, err
    k = json.loads(out)["keepout"]
    assert (k["influence_m"], k["security_m"], k["self_collision"], k["config"]) == (0.12, 0.03, True, cell)
    arm = load_arm("reach7")
    q = np.radians([float(v) for v in AT_DEG.split(",")])
    fr = forward(arm, q)
    caps = {c.name: c for c in arm.geometry.capsules}
    distances = [e["distance_m"] for e in k["pairs"]]
    assert distances == sorted(distances)
    seen_zone = seen_link = 0
    for e in k["pairs"]:
        c = caps[e["capsule"]]
        assert e["link"] == arm.body_names[c.body]
        a0, a1 = capsule_base(arm, fr, c)
        if e["other_kind"] == "zone":
            point, normal = ZONES[e["other"]]
            n = np.array(normal) / np.linalg.norm(normal)
            ends = [a0, a1]
            s = [n @ p - n @ np.array(point) for p in ends]
            expected = min(s) - c.radius
            nearest_end = ends[int(np.argmin(s))]
            assert e["distance_m"] == pytest.approx(expected, abs=1e-12)
            # the closest points: the end point pushed out by the radius, and its foot on the plane
            np.testing.assert_allclose(e["point_link_m"], nearest_end - c.radius * n, atol=1e-12)
            np.testing.assert_allclose(e["point_other_m"], nearest_end - min(s) * n, atol=1e-12)
            seen_zone += 1
        else:
            o = caps[e["other_capsule"]]
            assert e["other"] == arm.body_names[o.body]
            b0, b1 = capsule_base(arm, fr, o)
            ref = coal_capsules(a0, a1, c.radius, b0, b1, o.radius)
            assert e["distance_m"] == pytest.approx(ref, abs=1e-9)
            seen_link += 1
        assert e["within_influence"] == (e["distance_m"] < 0.12)
    moving = sum(1 for c in arm.geometry.capsules if c.body > 0)
    assert seen_zone == 2 * moving and seen_link > 0


def test_text_lists_the_pairs_nearest_first(capsys, cell):
    code, out, err = run(capsys, "reach7", "--at", AT_DEG, "--deg", "--config", cell)
    assert code == 0, err
    block = out.split("keep-out (")[1].splitlines()
    rows = [line.split() for line in block[2:] if line.strip()]
    values = [float(r[0]) for r in rows]
    assert values == sorted(values) and len(values) > 10
    assert any("tilted_table" in line for line in block) and any("back_wall" in line for line in block)
    _, js, _ = run(capsys, "reach7", "--at", AT_DEG, "--deg", "--config", cell, "--json")
    first = json.loads(js)["keepout"]["pairs"][0]
    assert math.isclose(values[0], round(first["distance_m"], 4), abs_tol=1e-9)


def test_without_config_no_keepout_key(capsys):
    code, out, _ = run(capsys, "reach7", "--json")
    assert code == 0 and "keepout" not in json.loads(out)


@pytest.mark.parametrize("text, expected", [
    ("[arm]\nfile = \"reach7\"\n", "a service config with a [keepout] section"),
    (CELL.replace("influence_m = 0.12", "influence_m = -1.0"), "keepout.influence_m"),
    (CELL.replace("self_collision = true", "self_collision = true\ntouching = [[\"elbow\", \"nose\"]]"),
     "keepout.touching[0][1]"),
])
def test_bad_config_exits_2_naming_the_key(capsys, tmp_path, text, expected):
    path = tmp_path / "bad.toml"
    path.write_text(text)
    code, out, err = run(capsys, "reach7", "--config", str(path))
    assert code == 2 and out == "" and expected in err, err


def test_missing_config_file_exits_2(capsys, tmp_path):
    code, out, err = run(capsys, "reach7", "--config", str(tmp_path / "none.toml"))
    assert code == 2 and out == "" and "config file" in err
