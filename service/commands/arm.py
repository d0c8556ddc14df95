"""`twistrate arm`: load an arm file and report its joints, limits, tool pose, Jacobian and health.

    twistrate arm FILE [--base LINK] [--tool LINK] [--at Q1,Q2,...] [--deg] [--length M]
                       [--config SERVICE.toml] [--json]

FILE is a .toml or .urdf path, or the short name of a packaged example arm (e.g. bench6). The
configuration is the arm's home posture unless --at gives one value per joint (rad or m; with
--deg, revolute values are degrees). --json prints one JSON object whose schema is documented in
docs/arm-format.md ("twistrate arm --json"). Bad input exits with code 2 and a message naming the
option; nothing is printed to stdout then. With --config, the distances from the arm's link capsules to
the zones of that service config's [keepout] section and between its link pairs (docs/keepout.md).
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from typing import Any

import numpy as np

from twistrate.service.commands.arm_keepout import format_keepout, keepout_fields, load_keepout
from twistrate.solver.arm import Arm
from twistrate.solver.errors import InputError, ModelError, TwistrateError, field_error
from twistrate.solver.foresight import foresight, task_joint_weight
from twistrate.solver.health import assess
from twistrate.solver.kinematics import forward, geometric_jacobian
from twistrate.solver.load import parse_arm_source, read_arm_source
from twistrate.solver.options import HealthThresholds, SolverOptions
from twistrate.solver.svd import svd_full
from twistrate.solver.urdf import DEFAULT_ACCEL_RAMP_S

#: Version of the JSON report; bumped on any incompatible change of its keys or meaning.
REPORT_VERSION = 1
#: Exit code for bad input (options, values, arm file content).
EXIT_BAD_INPUT = 2


class _Parser(argparse.ArgumentParser):
    """argparse that raises instead of exiting, so main() returns its code."""

    def error(self, message: str) -> None:  # type: ignore[override]
        raise InputError(message)


def _parser() -> argparse.ArgumentParser:
    p = _Parser(
        prog="twistrate arm",
        description="Load an arm description and report joints, limits, tool pose, Jacobian and health.",
    )
    p.add_argument("file", metavar="FILE",
                   help="arm file (.toml or .urdf) or an example arm name (bench6, reach7, planar3, ...)")
    p.add_argument("--base", metavar="LINK", help="URDF only: the chain's base link (default: the root link)")
    p.add_argument("--tool", metavar="LINK",
                   help="URDF only: the chain's tool link (default: the single leaf)")
    p.add_argument("--at", metavar="Q1,Q2,...",
                   help="joint positions, comma-separated, one per joint (rad or m; default: home)")
    p.add_argument("--rate", metavar="QD1,QD2,...",
                   help="joint rates, rad/s or m/s (deg/s with --deg): add the foresight along them (time "
                        "to the pinched threshold, time to each position limit)")
    p.add_argument("--deg", action="store_true",
                   help="--at (and --rate) values of revolute joints are in degrees (per second)")
    p.add_argument("--length", metavar="M", type=str, default=None,
                   help="characteristic length (m) weighting angular against linear rows in the health "
                        f"measures (default {SolverOptions().characteristic_length})")
    p.add_argument("--config", metavar="SERVICE.toml",
                   help="a service config: report the distances to the zones of its [keepout] section and "
                        "between the link pairs that may collide, nearest first")
    p.add_argument("--json", action="store_true", help="print the report as one JSON object")
    return p


def _join_at(argv: list[str]) -> list[str]:
    """Turn `--at -10,20` into `--at=-10,20` so argparse does not read the value as an option."""
    out, i = [], 0
    while i < len(argv):
        if argv[i] in ("--at", "--rate") and i + 1 < len(argv):
            out.append(f"{argv[i]}={argv[i + 1]}")
            i += 2
        else:
            out.append(argv[i])
            i += 1
    return out


def _per_joint(arm: Arm, text: str, option: str, degrees: bool) -> np.ndarray:
    """(n,) finite values from a comma-separated option text, revolute ones converted from degrees when
    `degrees`; InputError names the option, the joint (numbered from 1) and the value."""
    items = [s.strip() for s in text.split(",")]
    if len(items) != arm.n:
        raise field_error(InputError, option, text, f"{arm.n} comma-separated values, one per joint "
                          f"({', '.join(arm.joint_names)})")
    out = np.empty(arm.n)
    for i, (item, joint) in enumerate(zip(items, arm.joints, strict=True)):
        try:
            value = float(item)
        except ValueError:
            value = math.nan
        if not math.isfinite(value):
            raise field_error(InputError, f"{option} value {i + 1} (joint {joint.name!r})", item,
                              "a finite number")
        out[i] = math.radians(value) if degrees and arm.revolute[i] else value
    return out


def parse_configuration(arm: Arm, text: str, degrees: bool) -> np.ndarray:
    """q : (n,) rad / m from the --at text; raises InputError naming --at, the joint and the value."""
    q = _per_joint(arm, text, "--at", degrees)
    for i, (item, joint) in enumerate(zip(text.split(","), arm.joints, strict=True)):
        if not joint.position_min <= q[i] <= joint.position_max:
            lo, hi = joint.position_min, joint.position_max
            unit = "m"
            if arm.revolute[i] and degrees:
                lo, hi, unit = math.degrees(lo), math.degrees(hi), "deg"
            elif arm.revolute[i]:
                unit = "rad"
            raise field_error(InputError, f"--at value {i + 1} (joint {joint.name!r})", item.strip(),
                              f"within the joint's limits [{lo:.6g}, {hi:.6g}] {unit}")
    return q


def parse_rates(arm: Arm, text: str, degrees: bool) -> np.ndarray:
    """qd : (n,) rad/s / m/s from the --rate text; InputError names --rate, the joint and the value."""
    return _per_joint(arm, text, "--rate", degrees)


def _finite_or_none(x: float) -> float | None:
    return float(x) if math.isfinite(x) else None


def parse_length(text: str) -> float:
    """The --length value in m (finite, > 0), or InputError naming the option."""
    try:
        value = float(text)
    except ValueError:
        value = math.nan
    if not (math.isfinite(value) and value > 0.0):
        raise field_error(InputError, "--length", text, "a finite length in metres > 0")
    return value


def build_report(arm: Arm, q: np.ndarray, q_source: str, source: str, notes: list[str],
                 options: SolverOptions | None = None, rate: np.ndarray | None = None,
                 keepout: tuple[Any, str] | None = None) -> dict[str, Any]:
    """The report as a JSON-ready dict (SI units; layout documented in docs/arm-format.md).

    q : (n,) joint positions, rad / m. q_source : "home" or "--at".
    options : solver options whose characteristic length and joint weights the health measures
        use (defaults when None). rate : (n,) joint rates, rad/s / m/s, for the foresight, or None.
    keepout : (KeepOut pass, the config's path) for the `keepout` object, or None.
    """
    options = SolverOptions() if options is None else options
    frames = forward(arm, q)
    J = geometric_jacobian(arm, frames)
    report: dict[str, Any] = {
        "report": "twistrate-arm",
        "version": REPORT_VERSION,
        "arm": {"name": arm.name, "source": source, "joint_count": arm.n},
        "joints": [
            {
                "name": j.name,
                "kind": j.kind,
                "position_min": _finite_or_none(j.position_min),
                "position_max": _finite_or_none(j.position_max),
                "velocity_max": j.velocity_max,
                "acceleration_max": j.acceleration_max,
                "home": float(arm.q_home[i]),
            }
            for i, j in enumerate(arm.joints)
        ],
        "configuration": {"source": q_source, "q": q.tolist()},
        "mount": arm.T_base_root.tolist(),
        "tool_pose": frames.T_base_tool.tolist(),
        "jacobian": J.tolist(),
    }
    report.update(_health_fields(arm, q, J, options))
    if rate is not None:
        report["foresight"] = _foresight_fields(arm, q, rate, J, options)
    if keepout is not None:
        report["keepout"] = keepout_fields(keepout[0], frames, keepout[1])
    report["notes"] = notes
    return report


def _health_fields(arm: Arm, q: np.ndarray, J: np.ndarray, options: SolverOptions) -> dict[str, Any]:
    """Health measures of twistrate.solver.health at q, from the Jacobian alone (no history)."""
    thresholds = HealthThresholds()
    h = assess(arm, q, J, options=options, previous=None, thresholds=thresholds)
    return {
        "task_weighting": {"characteristic_length": options.characteristic_length},
        "singular_values": h.singular_values.tolist(),
        "manipulability": {
            "whole": h.manipulability,
            "linear": h.manipulability_translational,
            "angular": h.manipulability_rotational,
        },
        "inverse_condition": h.inverse_condition,
        "weakest_direction": {"linear": h.weakest_linear.tolist(), "angular": h.weakest_angular.tolist()},
        "limit_margins": [_finite_or_none(m) for m in h.limit_margin],
        "state": h.state,
        "state_thresholds": {"narrow_below_m": thresholds.narrow_below,
                             "pinched_below_m": thresholds.pinched_below},
    }


def _foresight_fields(arm: Arm, q: np.ndarray, rate: np.ndarray, J: np.ndarray,
                      options: SolverOptions) -> dict[str, Any]:
    """twistrate.solver.foresight along `rate` (the health message's `foresight`, plus the rate itself)."""
    weight = task_joint_weight(arm.n, options.characteristic_length, options.joint_weights)
    U, s, _ = svd_full(J * weight)
    s = s[:min(6, arm.n)]
    f = foresight(arm, q, rate, J, U, s, weight, HealthThresholds().pinched_below)
    return {"rate": rate.tolist(), "sigma_min_rate_m_s": f.sigma_min_rate_m_s,
            "time_to_pinched_s": f.time_to_pinched_s,
            "time_to_limit_s": [_finite_or_none(t) for t in f.time_to_limit_s],
            "first_limit_joint": f.first_limit_joint, "time_to_first_limit_s": f.time_to_first_limit_s}


def _num(v: float) -> str:
    """Fixed-width number without a negative zero."""
    return f"{round(v, 5) + 0.0:9.5f}"


def _fmt_limit(value: float | None, revolute: bool) -> str:
    if value is None:
        return "none"
    return f"{math.degrees(value):.1f}" if revolute else f"{value:.3f}"


def format_text(report: dict[str, Any]) -> str:
    """Human-readable form of the report: revolute joints in degrees, prismatic in metres; joints numbered
    from 1, as the --at errors number its values."""
    arm = report["arm"]
    q = report["configuration"]["q"]
    lines = [f"arm {arm['name']} from {arm['source']}: {arm['joint_count']} joints", ""]
    lines.append(f"  {'#':>2}  {'name':<16} {'kind':<9} {'min':>9} {'max':>9} {'speed':>9} {'accel':>9}"
                 f" {'home':>9} {'at':>9}   (deg, deg/s, deg/s^2 | m, m/s, m/s^2)")
    for i, j in enumerate(report["joints"]):
        rev = j["kind"] == "revolute"
        conv = math.degrees if rev else float
        lines.append(
            f"  {i + 1:>2}  {j['name']:<16} {j['kind']:<9} {_fmt_limit(j['position_min'], rev):>9} "
            f"{_fmt_limit(j['position_max'], rev):>9} {conv(j['velocity_max']):>9.1f} "
            f"{conv(j['acceleration_max']):>9.1f} {conv(j['home']):>9.3f} {conv(q[i]):>9.3f}"
        )
    lines += ["", f"configuration: {report['configuration']['source']}", "",
              "tool pose T_base_tool (base frame; rotation | position m):"]
    for row in report["tool_pose"][:3]:
        lines.append("  " + " ".join(_num(v) for v in row[:3]) + "  | " + _num(row[3]))
    lines += ["", "geometric Jacobian (base frame, tool point; rows vx vy vz in m/s, wx wy wz in rad/s;",
              "columns per unit joint rate, rad/s or m/s):"]
    for label, row in zip(("vx", "vy", "vz", "wx", "wy", "wz"), report["jacobian"], strict=True):
        lines.append(f"  {label}  " + " ".join(_num(v) for v in row))
    lines.append("")
    lines += _format_health(report)
    if "keepout" in report:
        lines += ["", *format_keepout(report["keepout"])]
    if report["notes"]:
        lines += ["", "notes:"] + [f"  {note}" for note in report["notes"]]
    return "\n".join(lines)


def _format_health(report: dict[str, Any]) -> list[str]:
    L = report["task_weighting"]["characteristic_length"]
    k = len(report["singular_values"])
    m = report["manipulability"]
    th = report["state_thresholds"]
    w = report["weakest_direction"]
    margins = ", ".join(
        f"{j['name']} {'-' if v is None else f'{100 * v:.0f}%'}"
        for j, v in zip(report["joints"], report["limit_margins"], strict=True)
    )
    return [
        f"health (task-weighted Jacobian: angular rows times L = {L:g} m):",
        "  singular values (m)   " + " ".join(f"{v:.5f}" for v in report["singular_values"]),
        f"  manipulability        whole {m['whole']:.4g} m^{k}, linear {m['linear']:.4g} m^3, "
        f"angular {m['angular']:.4g}",
        f"  inverse condition     {report['inverse_condition']:.4f}",
        "  weakest direction     linear [" + ", ".join(f"{round(v, 3) + 0.0:.3f}" for v in w["linear"])
        + "] m/s, angular [" + ", ".join(f"{round(v, 3) + 0.0:.3f}" for v in w["angular"]) + "] rad/s",
        "  limit margins         (share of the range to the nearer limit)",
        f"                        {margins}",
        f"  state                 {report['state']}   (narrow below {th['narrow_below_m']:g} m, "
        f"pinched below {th['pinched_below_m']:g} m of the smallest singular value)",
    ]


def main(argv: list[str] | None = None) -> int:
    args_in = _join_at(sys.argv[1:] if argv is None else list(argv))
    parser = _parser()
    try:
        args = parser.parse_args(args_in)
    except SystemExit as exc:  # --help
        return int(exc.code or 0)
    except InputError as exc:
        print(f"twistrate arm: {exc}\n{parser.format_usage().rstrip()}", file=sys.stderr)
        return EXIT_BAD_INPUT
    try:
        data, label, suffix = read_arm_source(args.file)
        if suffix != ".urdf":
            for option, value in (("--base", args.base), ("--tool", args.tool)):
                if value is not None:
                    raise field_error(InputError, option, value, "only with a .urdf file")
        arm = parse_arm_source(data, label, suffix, args.base, args.tool)
        notes = []
        if suffix == ".urdf":
            notes.append(f"acceleration limits are not part of URDF: each joint got velocity_max / "
                         f"{DEFAULT_ACCEL_RAMP_S} s (full speed from rest in {DEFAULT_ACCEL_RAMP_S} s)")
        options = SolverOptions()
        if args.length is not None:
            options = SolverOptions(characteristic_length=parse_length(args.length))
        if args.at is None:
            if args.deg and args.rate is None:
                raise field_error(InputError, "--deg", True, "only together with --at or --rate")
            q, q_source = np.array(arm.q_home, dtype=float), "home"
        else:
            q, q_source = parse_configuration(arm, args.at, args.deg), "--at"
        rate = None if args.rate is None else parse_rates(arm, args.rate, args.deg)
        keepout = None if args.config is None else (load_keepout(arm, args.config), args.config)
    except TwistrateError as exc:  # InputError, ModelError, or any other error of ours
        hint = ""
        if isinstance(exc, ModelError) and ("tool_link" in str(exc) or "base_link" in str(exc)):
            hint = "\n(choose the URDF chain with --base LINK and --tool LINK)"
        print(f"twistrate arm: {exc}{hint}", file=sys.stderr)
        return EXIT_BAD_INPUT
    report = build_report(arm, q, q_source, label, notes, options, rate, keepout)
    text = json.dumps(report, indent=1, allow_nan=False) if args.json else format_text(report)
    try:
        print(text)
    except BrokenPipeError:  # output piped into a reader that stopped early (e.g. head)
        sys.stderr.close()
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
