"""Keep-out zones in the base frame and the damper settings, loaded from a plain dict (the service
config's `[keepout]` section) with strict pydantic validation.

Pure: takes the already-parsed dict, does no I/O. The section's shape (keys, units; docs/keepout.md):

    influence_m = 0.12         # d_i: pairs closer than this get a damper row, m (> security_m)
    security_m = 0.03          # d_s: the distance the arm stops at, m (>= 0)
    gain_m_s = 0.3             # xi: approach speed allowed at d_i, m/s (> 0)
    self_collision = true      # check non-adjacent links against each other
    touching = [["elbow", "wrist_pitch"]]   # more link pairs that may touch (names as the arm's)
    [[keepout.zone]]           # any number, each one of the kinds below
    name = "table"
    kind = "half_space"        # forbidden side: normal^T (x - point_m) < 0
    point_m = [0.0, 0.0, 0.0]  # a point on the boundary plane, base frame, m
    normal = [0.0, 0.0, 1.0]   # pointing out of the forbidden side; normalised on load
    # kind = "box":     center_m, size_m (full edge lengths, > 0), rpy_deg or rpy_rad (optional)
    # kind = "sphere":  center_m, radius_m (> 0)
    # kind = "capsule": a_m, b_m (segment end points), radius_m (> 0)

Every error is a ConfigError naming the key (with the zone's index and name), the value and what is
accepted; unknown keys and numbers written as strings are refused.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Annotated, Any, Literal

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, ValidationError

from twistrate.solver.arm_toml import rpy_matrix
from twistrate.solver.errors import ConfigError, field_error

#: A half-space normal shorter than this is refused (it has no direction).
NORMAL_MIN = 1e-9

Vec3 = Annotated[list[float], Field(min_length=3, max_length=3)]
Positive = Annotated[float, Field(gt=0)]


class _Table(BaseModel):
    model_config = ConfigDict(strict=True, extra="forbid", allow_inf_nan=False)


class HalfSpaceSpec(_Table):
    kind: Literal["half_space"]
    name: Annotated[str, Field(min_length=1)]
    point_m: Vec3
    normal: Vec3


class BoxSpec(_Table):
    kind: Literal["box"]
    name: Annotated[str, Field(min_length=1)]
    center_m: Vec3
    size_m: Annotated[list[Positive], Field(min_length=3, max_length=3)]
    rpy_deg: Vec3 | None = None
    rpy_rad: Vec3 | None = None


class SphereSpec(_Table):
    kind: Literal["sphere"]
    name: Annotated[str, Field(min_length=1)]
    center_m: Vec3
    radius_m: Positive


class CapsuleZoneSpec(_Table):
    kind: Literal["capsule"]
    name: Annotated[str, Field(min_length=1)]
    a_m: Vec3
    b_m: Vec3
    radius_m: Positive


ZoneSpec = Annotated[HalfSpaceSpec | BoxSpec | SphereSpec | CapsuleZoneSpec, Field(discriminator="kind")]
_ZONE_MODELS: dict[str, type[BaseModel]] = {
    "half_space": HalfSpaceSpec, "box": BoxSpec, "sphere": SphereSpec, "capsule": CapsuleZoneSpec}


class KeepOutSpec(_Table):
    influence_m: Positive = 0.12
    security_m: Annotated[float, Field(ge=0)] = 0.03
    gain_m_s: Positive = 0.3
    self_collision: bool = True
    touching: list[Annotated[list[str], Field(min_length=2, max_length=2)]] = Field(default_factory=list)
    zone: list[ZoneSpec] = Field(default_factory=list)


@dataclass(frozen=True, eq=False)
class Zones:
    """Keep-out zones, base frame, stacked by kind (each array (count, ...) with count >= 0).

    half_space_normal : (h, 3) unit normals out of the forbidden sides; half_space_offset : (h,)
        plane offsets c, m (forbidden: normal^T x < c).
    box_center : (nb, 3) m; box_rotation : (nb, 3, 3) R_base_box (columns: box axes, base frame);
        box_half : (nb, 3) half edge lengths, m.
    segment_a, segment_b : (ns, 3) m and segment_radius : (ns,) m: capsule zones, then spheres
        (a sphere is a segment of zero length).
    *_names : the zone names in the same order.
    """

    half_space_normal: np.ndarray
    half_space_offset: np.ndarray
    half_space_names: tuple[str, ...]
    box_center: np.ndarray
    box_rotation: np.ndarray
    box_half: np.ndarray
    box_names: tuple[str, ...]
    segment_a: np.ndarray
    segment_b: np.ndarray
    segment_radius: np.ndarray
    segment_names: tuple[str, ...]


@dataclass(frozen=True, eq=False)
class KeepOutConfig:
    """The validated `[keepout]` section: zones plus damper settings.

    influence_m : d_i, m; security_m : d_s, m (0 <= d_s < d_i); gain_m_s : xi, m/s.
    self_collision : whether non-adjacent link pairs are checked.
    touching : extra link-name pairs that may touch (resolved against the arm by `KeepOut`).
    """

    zones: Zones
    influence_m: float
    security_m: float
    gain_m_s: float
    self_collision: bool
    touching: tuple[tuple[str, str], ...]


def parse_keepout(data: dict[str, Any], section: str = "keepout") -> KeepOutConfig:
    """Validate a `[keepout]` dict and return the config; ConfigError names `section.key`."""
    try:
        spec = KeepOutSpec.model_validate(data)
    except ValidationError as exc:
        raise ConfigError("\n  ".join(_describe(err, data, section) for err in exc.errors())) from None
    if not spec.security_m < spec.influence_m:
        raise field_error(ConfigError, f"{section}.security_m", spec.security_m,
                          f"a number below influence_m ({spec.influence_m})")
    seen: dict[str, int] = {}
    hs_n, hs_c, hs_names, bc, br, bh, b_names = [], [], [], [], [], [], []
    caps: list[tuple[list[float], list[float], float, str]] = []
    spheres: list[tuple[list[float], list[float], float, str]] = []
    for k, z in enumerate(spec.zone):
        where = f"{section}.zone[{k}] ({z.name!r})"
        if z.name in seen:
            raise field_error(ConfigError, f"{where}.name", z.name,
                              f"a name not used before (zone[{seen[z.name]}] has it)")
        seen[z.name] = k
        if isinstance(z, HalfSpaceSpec):
            n = np.array(z.normal)
            norm = float(np.linalg.norm(n))
            if norm < NORMAL_MIN:
                raise field_error(ConfigError, f"{where}.normal", z.normal, "a non-zero 3-vector")
            hs_n.append(n / norm)
            hs_c.append(float(n @ np.array(z.point_m)) / norm)
            hs_names.append(z.name)
        elif isinstance(z, BoxSpec):
            if z.rpy_deg is not None and z.rpy_rad is not None:
                raise field_error(ConfigError, f"{where}.rpy_rad", z.rpy_rad, "only one of rpy_deg, rpy_rad")
            rpy = np.radians(z.rpy_deg) if z.rpy_deg is not None else np.array(z.rpy_rad or [0.0] * 3)
            bc.append(z.center_m)
            br.append(rpy_matrix(*rpy))
            bh.append(0.5 * np.array(z.size_m))
            b_names.append(z.name)
        elif isinstance(z, SphereSpec):
            spheres.append((z.center_m, z.center_m, z.radius_m, z.name))
        else:
            caps.append((z.a_m, z.b_m, z.radius_m, z.name))
    segs = caps + spheres
    zones = Zones(
        np.array(hs_n, float).reshape(-1, 3), np.array(hs_c, float), tuple(hs_names),
        np.array(bc, float).reshape(-1, 3), np.array(br, float).reshape(-1, 3, 3),
        np.array(bh, float).reshape(-1, 3), tuple(b_names),
        np.array([s[0] for s in segs], float).reshape(-1, 3),
        np.array([s[1] for s in segs], float).reshape(-1, 3),
        np.array([s[2] for s in segs], float), tuple(s[3] for s in segs),
    )
    return KeepOutConfig(zones, spec.influence_m, spec.security_m, spec.gain_m_s, spec.self_collision,
                         tuple((a, b) for a, b in spec.touching))


_ACCEPTED = {
    "float_type": "a number", "finite_number": "a finite number", "string_type": "a string in quotes",
    "bool_type": "true or false", "list_type": "a list [..]", "model_type": "a table",
    "dict_type": "a table", "missing": "a value (this key is required)",
}


def _describe(err: Any, data: Any, section: str) -> str:
    """One pydantic error as 'section.key: got value; accepted: ...', zones named by index and name."""
    loc = list(err["loc"])
    parts = [section]
    model: type[BaseModel] = KeepOutSpec
    k = 0
    while k < len(loc):
        item = loc[k]
        if item == "zone" and k + 1 < len(loc) and isinstance(loc[k + 1], int):
            idx = loc[k + 1]
            zones = data.get("zone") if isinstance(data, dict) else None
            entry = zones[idx] if isinstance(zones, list) and idx < len(zones) else None
            name = entry.get("name") if isinstance(entry, dict) else None
            parts.append(f"zone[{idx}] ({name!r})")
            k += 2
            if k < len(loc) and loc[k] in _ZONE_MODELS:  # the discriminator's own path step
                model = _ZONE_MODELS[str(loc[k])]
                k += 1
            continue
        if isinstance(item, int):
            parts[-1] += f"[{item}]"
        else:
            parts.append(str(item))
        k += 1
    field = ".".join(parts)
    etype, value = err["type"], err.get("input")
    if etype == "extra_forbidden":
        return str(field_error(ConfigError, field, value, f"a known key ({', '.join(model.model_fields)})"))
    if etype in ("union_tag_invalid", "union_tag_not_found"):
        value = value.get("kind") if isinstance(value, dict) else value
        return str(field_error(ConfigError, f"{field}.kind", value, f"one of {', '.join(_ZONE_MODELS)}"))
    if etype in ("too_short", "too_long"):
        n = 2 if parts[-1].startswith("touching") else 3
        return str(field_error(ConfigError, field, value, f"a list of exactly {n} items"))
    if etype == "greater_than":
        return str(field_error(ConfigError, field, value, f"a number > {err['ctx']['gt']}"))
    if etype == "greater_than_equal":
        return str(field_error(ConfigError, field, value, f"a number >= {err['ctx']['ge']}"))
    if etype == "literal_error":
        return str(field_error(ConfigError, field, value, f"one of {err['ctx']['expected']}"))
    if etype == "string_too_short":
        return str(field_error(ConfigError, field, value, "a non-empty string"))
    return str(field_error(ConfigError, field, value, _ACCEPTED.get(etype, err["msg"])))


def empty_zones() -> Zones:
    """No zones at all (self-collision only)."""
    return parse_keepout({}).zones

