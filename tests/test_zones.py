"""The `[keepout]` loader (solver/zones.py): zones into base-frame arrays, strict validation with
messages naming the key (zone index and name), the value and what is accepted."""

from __future__ import annotations

import math

import numpy as np
import pytest

from twistrate.solver.errors import ConfigError
from twistrate.solver.keepout import KeepOut
from twistrate.solver.load import load_arm
from twistrate.solver.zones import parse_keepout

GOOD = {
    "influence_m": 0.1, "security_m": 0.02, "gain_m_s": 0.25, "self_collision": False,
    "touching": [["elbow", "wrist_pitch"]],
    "zone": [
        {"name": "table", "kind": "half_space", "point_m": [0.0, 0.0, 0.1], "normal": [0.0, 0.0, 2.0]},
        {"name": "crate", "kind": "box", "center_m": [0.5, 0.0, 0.2], "size_m": [0.2, 0.4, 0.6],
         "rpy_deg": [0.0, 0.0, 90.0]},
        {"name": "ball", "kind": "sphere", "center_m": [0.0, 0.6, 0.5], "radius_m": 0.1},
        {"name": "pipe", "kind": "capsule", "a_m": [-1.0, 0.5, 1.0], "b_m": [1.0, 0.5, 1.0],
         "radius_m": 0.05},
    ],
}


def test_good_section_loads_into_base_frame_arrays():
    cfg = parse_keepout(GOOD)
    z = cfg.zones
    assert (cfg.influence_m, cfg.security_m, cfg.gain_m_s, cfg.self_collision) == (0.1, 0.02, 0.25, False)
    np.testing.assert_allclose(z.half_space_normal, [[0, 0, 1]])  # normalised
    np.testing.assert_allclose(z.half_space_offset, [0.1])  # n^T point
    np.testing.assert_allclose(z.box_half, [[0.1, 0.2, 0.3]])
    # rpy (0, 0, 90 deg): the box x axis is base y (R = Rz(yaw) Ry(pitch) Rx(roll)).
    np.testing.assert_allclose(z.box_rotation[0][:, 0], [0, 1, 0], atol=1e-15)
    assert z.segment_names == ("pipe", "ball")  # capsule zones, then spheres (zero length)
    np.testing.assert_allclose(z.segment_a[1], z.segment_b[1])
    assert cfg.touching == (("elbow", "wrist_pitch"),)


def test_defaults_and_empty_section():
    cfg = parse_keepout({})
    assert cfg.zones.half_space_normal.shape == (0, 3) and cfg.zones.box_rotation.shape == (0, 3, 3)
    assert cfg.self_collision and 0 <= cfg.security_m < cfg.influence_m


def with_zone(**changes):
    data = {"zone": [dict(GOOD["zone"][1])]}
    data["zone"][0].update(changes)
    return {k: v for k, v in data["zone"][0].items() if v is not None}


@pytest.mark.parametrize("data, expected", [
    ({"influnce_m": 0.1}, ["keepout.influnce_m", "a known key (influence_m, security_m, gain_m_s"]),
    ({"influence_m": "0.1"}, ["keepout.influence_m", "'0.1'", "a number"]),
    ({"influence_m": 0.0}, ["keepout.influence_m", "a number > 0"]),
    ({"influence_m": math.inf}, ["keepout.influence_m", "a finite number"]),
    ({"security_m": -0.01}, ["keepout.security_m", "a number >= 0"]),
    ({"security_m": 0.2, "influence_m": 0.1}, ["keepout.security_m", "0.2", "below influence_m (0.1)"]),
    ({"self_collision": "yes"}, ["keepout.self_collision", "true or false"]),
    ({"touching": [["a"]]}, ["keepout.touching[0]", "exactly 2 items"]),
    ({"zone": [{"name": "x", "kind": "cone"}]}, ["keepout.zone[0] ('x').kind", "'cone'",
                                                  "one of half_space, box, sphere, capsule"]),
    ({"zone": [{"name": "x"}]}, ["keepout.zone[0] ('x').kind", "one of half_space"]),
    ({"zone": [with_zone(size_m=[0.1, 0.0, 0.1])]}, ["keepout.zone[0] ('crate').size_m[1]", "a number > 0"]),
    ({"zone": [with_zone(colour="red")]}, ["keepout.zone[0] ('crate').colour",
                                            "a known key (kind, name, center_m, size_m, rpy_deg, rpy_rad)"]),
    ({"zone": [with_zone(center_m=[0.0, 0.0])]}, ["keepout.zone[0] ('crate').center_m", "exactly 3 items"]),
    ({"zone": [with_zone(rpy_rad=[0.0, 0.0, 1.0])]}, ["keepout.zone[0] ('crate').rpy_rad",
                                                       "only one of rpy_deg, rpy_rad"]),
    ({"zone": [with_zone(), with_zone()]}, ["keepout.zone[1] ('crate').name", "zone[0] has it"]),
    ({"zone": [{"name": "t", "kind": "half_space", "point_m": [0, 0, 0], "normal": [0, 0, 0]}]},
     ["keepout.zone[0] ('t').normal", "a non-zero 3-vector"]),
    ({"zone": [{"name": "s", "kind": "sphere", "center_m": [0, 0, 0]}]},
     ["keepout.zone[0] ('s').radius_m", "a value (this key is required)"]),
])
def test_bad_sections_name_key_value_and_accepted(data, expected):
    with pytest.raises(ConfigError) as err:
        parse_keepout(data)
    for part in expected:
        assert part in str(err.value), str(err.value)


def test_touching_names_are_checked_against_the_arm():
    arm = load_arm("reach7")
    with pytest.raises(ConfigError, match=r"keepout\.touching\[0\]\[1\]: got 'wrist'; accepted: a link name"):
        KeepOut(arm, parse_keepout({"touching": [["elbow", "wrist"]]}))
    def pairs(section):
        return {frozenset(p) for p in KeepOut(arm, parse_keepout(section)).pair_names}

    assert frozenset(("shoulder", "forearm")) in pairs({})
    assert frozenset(("shoulder", "forearm")) not in pairs({"touching": [["shoulder_pitch", "forearm_roll"]]})
    assert not any("pedestal" in p for p in pairs({"self_collision": False}))


def test_docs_example_section_is_valid():
    """The `[keepout]` example in docs/keepout.md must stay valid."""
    import pathlib
    import re
    import tomllib

    text = (pathlib.Path(__file__).parent.parent / "docs" / "keepout.md").read_text()
    block = re.search(r"```toml\n(\[keepout\].*?)```", text, re.S).group(1)
    cfg = parse_keepout(tomllib.loads(block)["keepout"])
    assert cfg.zones.half_space_names == ("table", "wall") and cfg.zones.box_names == ("feeder",)
    KeepOut(load_arm("reach7"), cfg)  # its touching names are reach7's links
