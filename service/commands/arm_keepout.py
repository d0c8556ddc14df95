"""The keep-out part of `twistrate arm FILE --at Q --config SERVICE.toml`: the distance from each link
capsule of the arm to each zone of the config's `[keepout]` section, and of the link pairs that may
collide, nearest first (JSON-ready, and as text). docs/keepout.md, "twistrate arm --config"."""

from __future__ import annotations

from typing import Any

from twistrate.service.config import load_config
from twistrate.solver.arm import Arm
from twistrate.solver.errors import ConfigError, field_error
from twistrate.solver.keepout import KeepOut
from twistrate.solver.kinematics import Frames


def load_keepout(arm: Arm, path: str) -> KeepOut:
    """The keep-out pass of the service config at `path` for `arm`; ConfigError names --config when the
    config has no `[keepout]` section (and, from the loaders, any key that is wrong)."""
    config = load_config(path)
    ko_config = config.keepout_config()
    if ko_config is None:
        raise field_error(ConfigError, "--config", path, "a service config with a [keepout] section "
                          "(docs/keepout.md)")
    return KeepOut(arm, ko_config)


def keepout_fields(ko: KeepOut, frames: Frames, path: str) -> dict[str, Any]:
    """The report's `keepout` object at the frames' configuration: every pair's exact distance (one per
    pair; a half-space pair at its nearer end point), nearest first (ties in the pass's pair order)."""
    cfg = ko.config
    c = ko.all_contacts(frames)
    pairs = []
    for k in range(len(c.pair)):
        p = int(c.pair[k])
        capsule, other = ko.pair_names[p]
        link, other_link, zone = ko.pair_links[p]
        pairs.append({"distance_m": float(c.distance[k]), "link": link, "capsule": capsule,
                      "other": other_link, "other_capsule": None if zone else other,
                      "other_kind": "zone" if zone else "link",
                      "point_link_m": c.point_a[k].tolist(), "point_other_m": c.point_b[k].tolist(),
                      "within_influence": bool(c.distance[k] < cfg.influence_m)})
    pairs.sort(key=lambda e: e["distance_m"])  # stable: ties keep the pass's order
    return {"config": path, "influence_m": cfg.influence_m, "security_m": cfg.security_m,
            "self_collision": cfg.self_collision, "pairs": pairs}


def format_keepout(k: dict[str, Any]) -> list[str]:
    """Text lines of the `keepout` object."""
    lines = [f"keep-out (zones and link pairs of {k['config']}; influence {k['influence_m']:g} m, security "
             f"{k['security_m']:g} m; base frame), nearest first:"]
    if not k["pairs"]:
        return [*lines, "  no pair to check (no zone, and no link pair that may collide)"]
    lines.append(f"  {'distance m':>10}  {'link':<16} {'capsule':<16} {'other':<30} kind")
    for e in k["pairs"]:
        mark = "  within influence" if e["within_influence"] else ""
        other = e["other"] if e["other_capsule"] is None else f"{e['other']} ({e['other_capsule']})"
        lines.append(f"  {e['distance_m']:>10.4f}  {e['link']:<16} {e['capsule']:<16} {other:<30} "
                     f"{e['other_kind']}{mark}")
    return lines
