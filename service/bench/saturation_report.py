"""The saturated tick's section of `twistrate bench solver`: the scripted pushes through the wrist
singularity (jogged and stepped), the demo's pass replayed at solver level, and the cost of the
saturated 7-joint tick against the free one in the same process (service/bench/saturation.py)."""

from __future__ import annotations

from typing import Any

from twistrate.service.bench.saturation import DEMO_RAMP, demo_replay, push_through_wrist, tick_cost
from twistrate.service.commands.demo import DEFAULT_SECONDS, scripted_twist
from twistrate.service.config import load_config
from twistrate.solver.load import load_arm

#: Targets of the saturated tick (the 7-joint arm; ratios and shares, measured in one run).
TARGETS = {"scale_zero_fraction": 0.005, "saturated_to_free": 2.0, "saturated_p99_us": 200.0,
           "peak_acceleration_ratio": 1.0 + 1e-9}


def saturation_section(arms: tuple[str, ...] = ("bench6", "reach7"), push_s: float = 4.0,
                       demo_s: float = DEFAULT_SECONDS, cost_ticks: int = 2000) -> dict[str, Any]:
    """Every figure of the section (plain numbers; printed by format_saturation). The durations and
    the timed tick count are for smoke tests only; the figures come from the defaults."""
    runs: dict[str, Any] = {}
    for name in arms:
        runs[f"{name} jog"] = push_through_wrist(name, seconds=push_s, ramp_s=0.25, reference=True)
        runs[f"{name} steps"] = push_through_wrist(name, seconds=push_s, ramp_s=0.0, reference=True)
        runs[f"{name} steps, ramp"] = push_through_wrist(name, seconds=push_s, ramp_s=0.0, ramp=DEMO_RAMP,
                                                         reference=True)
    # the demo config's keep-out pass (its bench top and wall), as the demo service runs it
    keepout = load_config().keepout_pass(load_arm("reach7"))
    runs["demo pass, no ramp"] = demo_replay(scripted_twist, seconds=demo_s, ramp=None, keepout=keepout)
    runs["demo pass"] = demo_replay(scripted_twist, seconds=demo_s, keepout=keepout)
    return {"runs": runs, "cost": tick_cost("reach7", ticks=cost_ticks), "targets": TARGETS,
            "ramp": (DEMO_RAMP.linear_accel_max, DEMO_RAMP.angular_accel_max)}


def _pct(x: float | None) -> str:
    return "n/a" if x is None else f"{100 * x:5.2f} %"


#: Why the chatter criterion compares with the same run without hard limits (printed under the table).
CHATTER_REASON = ("the rates of a redundant arm following a curved path cross zero on their own, more "
                  "often than the asked twist turns (see the runs without hard limits below), so 'no more "
                  "sign changes than asked turns' cannot hold even without limits; the limits must not add "
                  "sign changes of their own")


def _extra(r: dict[str, Any]) -> str:
    extra = r.get("extra_sign_changes")
    if extra is None:
        return "n/a"
    over = sum(extra)
    return "0 (met)" if over == 0 else f"{over} in {sum(1 for e in extra if e)} joints"


def format_saturation(section: dict[str, Any]) -> str:
    ramp = section.get("ramp")
    ramp_text = "" if ramp is None else f", {ramp[0]:g} m/s^2 and {ramp[1]:g} rad/s^2"
    lines = ["saturated tick (closed loop at 500 Hz; shares of the running ticks; 'ramp': the demo config's "
             f"ramp of the asked twist{ramp_text}):",
             "  run                  scale 0  after a step  below half   stalled  peak accel / limit  "
             "asked turns  sign changes beyond the run without limits",
             "  (targets: scale 0 < 0.5 %; peak accel / limit <= 1; per joint, no more sign changes than the "
             "same run without hard limits)",
             f"  (why not 'no more sign changes than asked turns': {CHATTER_REASON})"]
    for name, r in section["runs"].items():
        lines.append(f"  {name:<19} {_pct(r['scale_zero_fraction'])} "
                     f"{_pct(r['scale_zero_after_step_fraction'])}     {_pct(r['below_half_fraction'])}  "
                     f"{_pct(r['stalled_fraction'])}  "
                     f"{r['peak_acceleration_ratio']:8.3f}           "
                     f"{r['asked_direction_changes']:4d}         {_extra(r)}")
    for name, r in section["runs"].items():
        if "free_sign_changes" in r:
            lines.append(f"  {name}: sign changes per joint {r['sign_changes']}, the same run without hard "
                         f"limits {r['free_sign_changes']} (the kinematics' own zero crossings), beyond them "
                         f"{r['extra_sign_changes']}")
        if name.startswith("demo pass"):
            lines.append(f"  {name}: the ramp's lag behind the asked twist: mean "
                         f"{r['ramp_error_mean_m_s']:.4f} m/s (weighted); held at scale 0 by the keep-out "
                         f"zones (the press, not counted above): {_pct(r['scale_zero_keepout_fraction'])}")
    c = section["cost"]
    lines.append(f"  cost ({c['arm']}): free tick median {c['free_median_us']:.1f} us, saturated median "
                 f"{c['saturated_median_us']:.1f} us = {c['saturated_to_free']:.2f}x the free tick "
                 f"(target <= 2x), saturated p99 {c['saturated_p99_us']:.1f} us (target <= 200); "
                 f"{100 * c['tracking_share']:.0f} % of the saturated states track")
    return "\n".join(lines)
