"""Encode/decode pair of the `health` output message (docs/protocol.md 7.4): manipulability, singular values,
the weakest direction, damping and scale, limit margins, the state, the twist achieved and its error, and
the foresight (how soon the current rates pinch the arm or reach a limit)."""

from __future__ import annotations

import math
from collections.abc import Mapping

import numpy as np

from twistrate.service.wire.checks import (
    HEADER_KEYS,
    dec_int,
    dec_num,
    dec_str,
    dec_vec,
    dec_vec_any,
    enc_floats,
    enc_int,
    enc_num,
    enc_str,
    header,
    input_fail,
    open_map,
    pack,
    submap,
    wire_fail,
)
from twistrate.service.wire.constants import (
    BOUND_KINDS,
    HEALTH_STATES,
    KEEPOUT_OTHER_KINDS,
    KIND_HEALTH,
    LIMITERS,
    MAX_ANGULAR_RADPS,
    MAX_DIRECTION,
    MAX_HEALTH_BYTES,
    MAX_JOINTS,
    MAX_KEEPOUT_DISTANCE_M,
    MAX_MAP_ENTRIES,
    MAX_MARGIN_FRACTION,
    MAX_MEASURE,
    MAX_NAME_CHARS,
    MAX_WEAKEST_ANGULAR,
    MIN_MARGIN_FRACTION,
    MODES,
    SEQ_MAX,
)
from twistrate.service.wire.messages import HealthMessage, KeepoutNearest, Limiting

_HEALTH_KEYS = frozenset((*HEADER_KEYS, "tick", "manipulability", "singular_values", "inverse_condition",
                          "weakest", "damping", "scale", "limit_margin", "state", "mode", "rejected",
                          "overruns", "tracking", "twist", "foresight", "keepout", "limiting"))
_TWIST_KEYS = frozenset(("achieved", "error"))
_FORESIGHT_KEYS = frozenset(("sigma_min_rate_m_s", "time_to_pinched_s", "time_to_limit_s",
                             "first_limit_joint", "time_to_first_limit_s"))
#: field-name prefix of the foresight map
_F = "health.foresight"
_MANIP_KEYS = frozenset(("whole", "linear", "angular"))
_KEEPOUT_KEYS = frozenset(KeepoutNearest._fields)
_LIMITING_KEYS = frozenset(Limiting._fields)
#: the limiting map when nothing limited the scale
NOT_LIMITED = Limiting("none")
_WEAKEST_KEYS = frozenset(("linear", "angular"))


def encode_health(*, seq: int, stamp_ns: int | None, tick: int, manipulability: float,
                  manipulability_linear: float, manipulability_angular: float,
                  singular_values: np.ndarray, inverse_condition: float, weakest_linear: np.ndarray,
                  weakest_angular: np.ndarray, damping: float, scale: float, limit_margin: np.ndarray,
                  state: str, mode: str, rejected: Mapping[str, int], overruns: int, tracking: bool = False,
                  twist_achieved: np.ndarray | None = None, twist_error: np.ndarray | None = None,
                  sigma_min_rate_m_s: float | None = None, time_to_pinched_s: float | None = None,
                  time_to_limit_s: np.ndarray | None = None, first_limit_joint: int | None = None,
                  time_to_first_limit_s: float | None = None, keepout: tuple | None = None,
                  limiting: tuple = NOT_LIMITED) -> bytes:
    """Encode a health report (fields as HealthMessage). limit_margin and time_to_limit_s entries may be
    +inf (sent as nil); twist_achieved / twist_error None (not running) and the foresight Nones are nil.
    keepout : (nearest_m, link, other, other_kind) as KeepoutNearest, or None (nil: no keep-out);
    limiting : (by, joint, bound, link, other) as Limiting."""
    m = header(KIND_HEALTH, seq, stamp_ns)
    m["tick"] = enc_int(tick, "health.tick", 0, SEQ_MAX)
    m["manipulability"] = {
        "whole": enc_num(manipulability, "health.manipulability.whole", 0.0, MAX_MEASURE),
        "linear": enc_num(manipulability_linear, "health.manipulability.linear", 0.0, MAX_MEASURE),
        "angular": enc_num(manipulability_angular, "health.manipulability.angular", 0.0, MAX_MEASURE),
    }
    sv = enc_floats(singular_values, "health.singular_values", None, MAX_MEASURE)
    if not 1 <= len(sv) <= 6 or min(sv) < 0.0:
        raise input_fail("health.singular_values", sv, "1 to 6 non-negative numbers")
    m["singular_values"] = sv
    m["inverse_condition"] = enc_num(inverse_condition, "health.inverse_condition", 0.0, 1.0)
    m["weakest"] = {"linear": enc_floats(weakest_linear, "health.weakest.linear", 3, MAX_DIRECTION),
                    "angular": enc_floats(weakest_angular, "health.weakest.angular", 3,
                                            MAX_WEAKEST_ANGULAR)}
    m["damping"] = enc_num(damping, "health.damping", 0.0, MAX_MEASURE)
    m["scale"] = enc_num(scale, "health.scale", 0.0, 1.0)
    margins = np.asarray(limit_margin, dtype=float).reshape(-1)
    if not 1 <= margins.size <= MAX_JOINTS:
        raise input_fail("health.limit_margin", f"{margins.size} entries", f"1 to {MAX_JOINTS} entries")
    wire_margins: list[float | None] = []
    for x in margins.tolist():
        if x == math.inf:
            wire_margins.append(None)
        elif MIN_MARGIN_FRACTION <= x <= MAX_MARGIN_FRACTION:
            wire_margins.append(x)
        else:
            raise input_fail("health.limit_margin", margins.tolist(),
                             f"fractions of the joint range in [{MIN_MARGIN_FRACTION:g}, 0.5], or +inf for "
                             "an unlimited joint")
    m["limit_margin"] = wire_margins
    m["state"] = enc_str(state, "health.state", MAX_NAME_CHARS, HEALTH_STATES)
    m["mode"] = enc_str(mode, "health.mode", MAX_NAME_CHARS, MODES)
    if len(rejected) > MAX_MAP_ENTRIES:
        raise input_fail("health.rejected", f"{len(rejected)} entries", f"at most {MAX_MAP_ENTRIES}")
    m["rejected"] = {enc_str(k, "health.rejected key", MAX_NAME_CHARS):
                     enc_int(v, f"health.rejected.{k}", 0, SEQ_MAX) for k, v in rejected.items()}
    m["overruns"] = enc_int(overruns, "health.overruns", 0, SEQ_MAX)
    if type(tracking) is not bool:
        raise input_fail("health.tracking", tracking, "true or false")
    m["tracking"] = tracking
    if (twist_achieved is None) != (twist_error is None):
        raise input_fail("health.twist", (twist_achieved, twist_error),
                         "both the achieved twist and the error, or neither")
    m["twist"] = None if twist_achieved is None else {
        "achieved": _enc_twist(twist_achieved, "health.twist.achieved"),
        "error": _enc_twist(twist_error, "health.twist.error")}
    limit_times = np.full(len(wire_margins), math.inf) if time_to_limit_s is None else \
        np.asarray(time_to_limit_s, dtype=float).reshape(-1)
    if limit_times.size != len(wire_margins) or np.isnan(limit_times).any() or (limit_times < 0).any():
        raise input_fail(f"{_F}.time_to_limit_s", limit_times.tolist(),
                         f"{len(wire_margins)} times >= 0 s, +inf for never")
    m["foresight"] = {
        "sigma_min_rate_m_s": _enc_optional(sigma_min_rate_m_s, f"{_F}.sigma_min_rate_m_s", -MAX_MEASURE),
        "time_to_pinched_s": _enc_optional(time_to_pinched_s, f"{_F}.time_to_pinched_s", 0.0),
        "time_to_limit_s": [None if x > MAX_MEASURE else x for x in limit_times.tolist()],
        "first_limit_joint": None if first_limit_joint is None else
        enc_int(first_limit_joint, f"{_F}.first_limit_joint", 0, len(wire_margins) - 1),
        "time_to_first_limit_s": _enc_optional(time_to_first_limit_s, f"{_F}.time_to_first_limit_s", 0.0),
    }
    m["keepout"] = None if keepout is None else _enc_keepout(keepout)
    m["limiting"] = _enc_limiting(limiting, len(wire_margins))
    return pack(m, MAX_HEALTH_BYTES, KIND_HEALTH)


def _enc_keepout(k: tuple, where: str = "health.keepout") -> dict:
    """A KeepoutNearest as its wire map; where : the field name errors give (the health or status map)."""
    nearest_m, link, other, other_kind = k
    return {"nearest_m": enc_num(nearest_m, f"{where}.nearest_m", -MAX_KEEPOUT_DISTANCE_M,
                                 MAX_KEEPOUT_DISTANCE_M),
            "link": enc_str(link, f"{where}.link", MAX_NAME_CHARS),
            "other": enc_str(other, f"{where}.other", MAX_NAME_CHARS),
            "other_kind": enc_str(other_kind, f"{where}.other_kind", MAX_NAME_CHARS,
                                  KEEPOUT_OTHER_KINDS)}


def _enc_limiting(k: tuple, n: int, where: str = "health.limiting") -> dict:
    """A Limiting as its wire map (n joints); where : as for _enc_keepout."""
    by, joint, bound, link, other = k
    by = enc_str(by, f"{where}.by", MAX_NAME_CHARS, LIMITERS)
    out = {"by": by, "joint": None, "bound": None, "link": None, "other": None}
    if by == "joint":
        out["joint"] = enc_int(joint, f"{where}.joint", 0, n - 1)
        out["bound"] = enc_str(bound, f"{where}.bound", MAX_NAME_CHARS, BOUND_KINDS)
    elif by == "keepout":
        out["link"] = enc_str(link, f"{where}.link", MAX_NAME_CHARS)
        out["other"] = enc_str(other, f"{where}.other", MAX_NAME_CHARS)
    if (by != "joint" and (joint is not None or bound is not None)) or \
            (by != "keepout" and (link is not None or other is not None)):
        raise input_fail(where, tuple(k), "joint and bound only with by 'joint', link and other "
                         "only with by 'keepout'")
    return out


def _dec_keepout(v: object, where: str = "health.keepout") -> KeepoutNearest | None:
    if v is None:
        return None
    k = submap(v, where, _KEEPOUT_KEYS)
    return KeepoutNearest(
        dec_num(k["nearest_m"], f"{where}.nearest_m", -MAX_KEEPOUT_DISTANCE_M, MAX_KEEPOUT_DISTANCE_M),
        dec_str(k["link"], f"{where}.link", MAX_NAME_CHARS),
        dec_str(k["other"], f"{where}.other", MAX_NAME_CHARS),
        dec_str(k["other_kind"], f"{where}.other_kind", MAX_NAME_CHARS, KEEPOUT_OTHER_KINDS))


def _dec_limiting(v: object, n: int, where: str = "health.limiting") -> Limiting:
    k = submap(v, where, _LIMITING_KEYS)
    by = dec_str(k["by"], f"{where}.by", MAX_NAME_CHARS, LIMITERS)
    joint = bound = link = other = None
    if by == "joint":
        joint = dec_int(k["joint"], f"{where}.joint", 0, n - 1)
        bound = dec_str(k["bound"], f"{where}.bound", MAX_NAME_CHARS, BOUND_KINDS)
    elif by == "keepout":
        link = dec_str(k["link"], f"{where}.link", MAX_NAME_CHARS)
        other = dec_str(k["other"], f"{where}.other", MAX_NAME_CHARS)
    for name in ("joint", "bound") if by != "joint" else ():
        if k[name] is not None:
            raise wire_fail("bad_value", f"{where}.{name}", k[name], f"nil when by is {by!r}")
    for name in ("link", "other") if by != "keepout" else ():
        if k[name] is not None:
            raise wire_fail("bad_value", f"{where}.{name}", k[name], f"nil when by is {by!r}")
    return Limiting(by, joint, bound, link, other)


def _enc_twist(x: np.ndarray, name: str) -> dict[str, list[float]]:
    """A (6,) twist (v, w) as {linear, angular} within the protocol's twist bounds (x 10: an error may be
    up to the asked twist's size again)."""
    v = enc_floats(x, name, 6, 10 * MAX_ANGULAR_RADPS)
    return {"linear": v[:3], "angular": v[3:]}


def _enc_optional(v: float | None, name: str, lo: float) -> float | None:
    """nil, or a finite number in [lo, MAX_MEASURE] (a time beyond MAX_MEASURE s is sent as nil: never)."""
    if v is None or (lo >= 0.0 and v > MAX_MEASURE):
        return None
    return enc_num(v, name, lo, MAX_MEASURE)


def _dec_optional(v: object, name: str, lo: float) -> float | None:
    return None if v is None else dec_num(v, name, lo, MAX_MEASURE)


def _dec_twist(v: object, name: str) -> np.ndarray:
    t = submap(v, name, _WEAKEST_KEYS)
    return np.concatenate((dec_vec(t["linear"], f"{name}.linear", 3, 10 * MAX_ANGULAR_RADPS),
                           dec_vec(t["angular"], f"{name}.angular", 3, 10 * MAX_ANGULAR_RADPS)))



def decode_health(data: bytes, n: int | None = None) -> HealthMessage:
    """Decode and check a health report; n : expected joint count, or None to accept 1..MAX_JOINTS."""
    m, seq, stamp = open_map(data, MAX_HEALTH_BYTES, KIND_HEALTH, _HEALTH_KEYS, False)
    tick = dec_int(m["tick"], "health.tick", 0, SEQ_MAX)
    man = submap(m["manipulability"], "health.manipulability", _MANIP_KEYS)
    whole = dec_num(man["whole"], "health.manipulability.whole", 0.0, MAX_MEASURE)
    lin = dec_num(man["linear"], "health.manipulability.linear", 0.0, MAX_MEASURE)
    ang = dec_num(man["angular"], "health.manipulability.angular", 0.0, MAX_MEASURE)
    sv = dec_vec_any(m["singular_values"], "health.singular_values", MAX_MEASURE, 1, 6)
    if sv.min() < 0.0:
        raise wire_fail("bad_value", "health.singular_values", sv.tolist(), "non-negative numbers")
    inv = dec_num(m["inverse_condition"], "health.inverse_condition", 0.0, 1.0)
    weak = submap(m["weakest"], "health.weakest", _WEAKEST_KEYS)
    wl = dec_vec(weak["linear"], "health.weakest.linear", 3, MAX_DIRECTION)
    wa = dec_vec(weak["angular"], "health.weakest.angular", 3, MAX_WEAKEST_ANGULAR)
    damping = dec_num(m["damping"], "health.damping", 0.0, MAX_MEASURE)
    scale = dec_num(m["scale"], "health.scale", 0.0, 1.0)
    raw_margin = m["limit_margin"]
    if type(raw_margin) is not list:
        raise wire_fail("bad_type", "health.limit_margin", raw_margin, "an array of numbers or nil")
    if n is not None and len(raw_margin) != n:
        raise wire_fail("bad_length", "health.limit_margin", f"{len(raw_margin)} entries",
                        f"exactly {n} entries")
    if not 1 <= len(raw_margin) <= MAX_JOINTS:
        raise wire_fail("bad_length", "health.limit_margin", f"{len(raw_margin)} entries",
                    f"1 to {MAX_JOINTS} entries")
    margin = np.array([math.inf if x is None else
                       dec_num(x, f"health.limit_margin[{i}]", MIN_MARGIN_FRACTION, MAX_MARGIN_FRACTION)
                       for i, x in enumerate(raw_margin)], dtype=float)
    state = dec_str(m["state"], "health.state", MAX_NAME_CHARS, HEALTH_STATES)
    mode = dec_str(m["mode"], "health.mode", MAX_NAME_CHARS, MODES)
    raw_rej = m["rejected"]
    if type(raw_rej) is not dict:
        raise wire_fail("bad_type", "health.rejected", raw_rej, "a map of reason -> count")
    rejected = {dec_str(k, "health.rejected key", MAX_NAME_CHARS):
                dec_int(v, f"health.rejected.{k}", 0, SEQ_MAX) for k, v in raw_rej.items()}
    overruns = dec_int(m["overruns"], "health.overruns", 0, SEQ_MAX)
    tracking = m["tracking"]
    if type(tracking) is not bool:
        raise wire_fail("bad_type", "health.tracking", tracking, "true or false")
    achieved = error = None
    if m["twist"] is not None:
        tw = submap(m["twist"], "health.twist", _TWIST_KEYS)
        achieved = _dec_twist(tw["achieved"], "health.twist.achieved")
        error = _dec_twist(tw["error"], "health.twist.error")
    fs = submap(m["foresight"], _F, _FORESIGHT_KEYS)
    raw_times = fs["time_to_limit_s"]
    if type(raw_times) is not list or len(raw_times) != len(margin):
        raise wire_fail("bad_length" if type(raw_times) is list else "bad_type", f"{_F}.time_to_limit_s",
                        raw_times, f"{len(margin)} times (s) or nil, one per joint")
    limit_times = np.array([math.inf if x is None else
                            dec_num(x, f"{_F}.time_to_limit_s[{i}]", 0.0, MAX_MEASURE)
                            for i, x in enumerate(raw_times)])
    first = fs["first_limit_joint"]
    first = None if first is None else dec_int(first, f"{_F}.first_limit_joint", 0, len(margin) - 1)
    rate = _dec_optional(fs["sigma_min_rate_m_s"], f"{_F}.sigma_min_rate_m_s", -MAX_MEASURE)
    to_pinched = _dec_optional(fs["time_to_pinched_s"], f"{_F}.time_to_pinched_s", 0.0)
    to_first = _dec_optional(fs["time_to_first_limit_s"], f"{_F}.time_to_first_limit_s", 0.0)
    return HealthMessage(seq, stamp, tick, whole, lin, ang, sv, inv, wl, wa, damping, scale, margin, state,
                         mode, rejected, overruns, tracking, achieved, error, rate, to_pinched, limit_times,
                         first, to_first, _dec_keepout(m["keepout"]),
                         _dec_limiting(m["limiting"], len(margin)))
