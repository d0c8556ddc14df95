"""A fake feed for tests and offline demos: invented arms that sweep towards a singularity and back.

Each FakeArm is a four-joint invented arm (a vertical waist axis, then three parallel pitch axes;
links 0.30, 0.28, 0.22, 0.10 m) whose elbow straightens and bends again on a slow cycle, so its
arm-plane singularity (elbow straight) is approached and left: the health state goes clear, narrow,
pinched and back. The messages it makes are plain dicts with the protocol's field names (health,
command, event, state), so the view model cannot tell them from decoded wire messages. The numbers
are computed from the invented arm's own kinematics (translational Jacobian J_v by central
differences, its SVD for the ellipsoid); they are demo data, not the service's solver.
"""

from __future__ import annotations

import math
import secrets
from typing import Any

import numpy as np

#: invented link lengths, m: base height, upper arm, forearm, hand
LINKS_M = (0.30, 0.28, 0.22, 0.10)
#: invented limits: position (rad), rate (rad/s)
POSITION_LIMIT_RAD = (2.9, 2.0, 2.6, 2.0)
RATE_LIMIT_RADPS = (1.5, 1.5, 2.0, 2.5)
#: health thresholds of the fake, m (on the smallest singular value of J_v)
NARROW_BELOW_M = 0.06
PINCHED_BELOW_M = 0.02
JOINT_NAMES = ("turn", "lift", "bend", "nod")


def _rot_z(a: float) -> np.ndarray:
    c, s = math.cos(a), math.sin(a)
    return np.array([[c, -s, 0.0], [s, c, 0.0], [0.0, 0.0, 1.0]])


def _rot_y(a: float) -> np.ndarray:
    c, s = math.cos(a), math.sin(a)
    return np.array([[c, 0.0, s], [0.0, 1.0, 0.0], [-s, 0.0, c]])


def chain(q: np.ndarray) -> tuple[list[np.ndarray], np.ndarray]:
    """(origins, R_base_tool) of the invented arm at q (4,) rad: origins are n + 2 = 6 points (3,) m,
    base frame: the base origin, each joint's origin in chain order, the tool origin."""
    h, a1, a2, a3 = LINKS_M
    R = _rot_z(q[0])
    p = np.zeros(3)
    pts = [p.copy(), p.copy()]  # base origin, joint 1 (the waist) at the base
    p = p + np.array([0.0, 0.0, h])
    pts.append(p.copy())  # joint 2 (lift) on top of the base column
    R = R @ _rot_y(q[1])
    for length, qi in ((a1, q[2]), (a2, q[3])):
        p = p + R @ np.array([0.0, 0.0, length])
        pts.append(p.copy())  # joints 3, 4
        R = R @ _rot_y(qi)
    p = p + R @ np.array([0.0, 0.0, a3])
    pts.append(p.copy())  # tool
    return pts, R


def jacobian_linear(q: np.ndarray, origins: list[np.ndarray] | None = None) -> np.ndarray:
    """J_v : (3, 4) translational Jacobian of the tool origin, base frame, m per rad: column i is
    z_i x (p_tool - p_i), the waist about the base z axis and the three pitch joints about the turned
    y axis (Orin and Schrader 1984, "Efficient computation of the Jacobian for robot manipulators").
    origins : chain(q)'s points when already at hand."""
    pts = chain(q)[0] if origins is None else origins
    d = (pts[-1] - np.array(pts[1:5])).T  # (3, 4): from each joint's origin to the tool
    c, s = math.cos(q[0]), math.sin(q[0])
    J = np.array([[0.0, 0.0, c], [0.0, 0.0, s], [-c, -s, 0.0]]) @ d  # [y]x d, y = (-s, c, 0)
    J[:, 0] = (-d[1, 0], d[0, 0], 0.0)  # the waist: (0, 0, 1) x d
    return J


class FakeArm:
    """One invented arm on a scripted cycle. name : label; phase : s offset of its cycle; period_s : cycle."""

    def __init__(self, name: str, phase: float = 0.0, period_s: float = 12.0, tick_hz: float = 500.0) -> None:
        self.name = name
        self.phase = phase
        self.period_s = period_s
        self.tick_hz = tick_hz
        self.seq = 0
        self.health = "clear"
        self.mode = "disabled"
        self.started: float | None = None
        self.rejected = {"not_leased": 0, "bad_type": 0}
        #: the instance id of this "service process" (docs/protocol.md section 6): new per FakeArm
        self.instance = 1 + secrets.randbelow(2**64 - 1)
        self._sigma_before: tuple[float, float] | None = None  # (t, smallest singular value)

    def description(self) -> dict[str, Any]:
        """What the control op `arm` answers for it."""
        return {
            "name": f"fake-{self.name}",
            "n": 4,
            "joints": [
                {
                    "name": JOINT_NAMES[i],
                    "kind": "revolute",
                    "position_min": -POSITION_LIMIT_RAD[i],
                    "position_max": POSITION_LIMIT_RAD[i],
                    "velocity_max": RATE_LIMIT_RADPS[i],
                    "acceleration_max": 5.0,
                }
                for i in range(4)
            ],
            "home": [0.0, 0.3, 1.2, 0.4],
        }

    def q_at(self, t: float) -> tuple[np.ndarray, np.ndarray]:
        """(q, qd) of the script at t s: the elbow goes from bent (1.2 rad) to straight (0) and back."""
        w = 2 * math.pi / self.period_s
        s = 0.5 * (1 + math.cos(w * (t + self.phase)))  # 1 bent .. 0 straight
        q = np.array([0.6 * math.sin(0.5 * w * (t + self.phase)), 0.3, 1.2 * s, 0.4 * s])
        qd = np.array(
            [
                0.3 * w * math.cos(0.5 * w * (t + self.phase)),
                0.0,
                -0.6 * w * math.sin(w * (t + self.phase)),
                -0.2 * w * math.sin(w * (t + self.phase)),
            ]
        )
        return q, qd

    def _header(self, kind: str, tick: int) -> dict[str, Any]:
        self.seq += 1
        head = {"proto": 1, "kind": kind, "seq": self.seq, "stamp_ns": int(self._wall * 1e9), "tick": tick}
        if kind == "event":
            head["instance"] = self.instance
        return head

    def foresight(self, t: float, q: np.ndarray, rate: np.ndarray, sigma_min: float) -> dict[str, Any]:
        """The health message's foresight fields at t s (docs/protocol.md 7.4), from the script: the rate
        of the smallest singular value by a backward difference over the previous message, the time to
        the pinched threshold at that rate (first order), and per joint the time until `rate` (4,) rad/s
        reaches the position limit it moves toward (inf: never)."""
        before, self._sigma_before = self._sigma_before, (t, sigma_min)
        d_sigma = None if before is None or t <= before[0] else (sigma_min - before[1]) / (t - before[0])
        if sigma_min <= PINCHED_BELOW_M:
            to_pinched: float | None = 0.0
        elif d_sigma is not None and d_sigma < 0.0:
            to_pinched = (sigma_min - PINCHED_BELOW_M) / -d_sigma
        else:
            to_pinched = None
        lim = np.asarray(POSITION_LIMIT_RAD)
        with np.errstate(divide="ignore", invalid="ignore"):
            times = np.where(rate > 0, (lim - q) / rate, np.where(rate < 0, (q + lim) / -rate, np.inf))
        times = np.where(np.isfinite(times), np.maximum(times, 0.0), np.inf)
        first = int(np.argmin(times)) if np.isfinite(times).any() else None
        return {"sigma_min_rate_m_s": d_sigma, "time_to_pinched_s": to_pinched, "time_to_limit_s": times,
                "first_limit_joint": first,
                "time_to_first_limit_s": None if first is None else float(times[first])}

    def messages(self, t: float, wall: float) -> list[tuple[str, dict[str, Any]]]:
        """The (kind, message) pairs one health period at t s would bring (wall : wall clock, s)."""
        if self.started is None:
            self.started = t
            self._wall0 = wall
        self._wall = self._wall0 + (t - self.started)  # stamps on the same clock as the ticks
        tick = int((t - self.started) * self.tick_hz)
        out: list[tuple[str, dict[str, Any]]] = []
        if self.mode == "disabled" and t - self.started > 0.2:
            out.append(
                (
                    "event",
                    {
                        **self._header("event", tick),
                        "event": "lease_claimed",
                        "detail": "by 'fake-operator' for 2000 ms",
                        "mode": "disabled",
                    },
                )
            )
            out.append(
                (
                    "event",
                    {**self._header("event", tick), "event": "enabled", "detail": "", "mode": "running"},
                )
            )
            self.mode = "running"
        q, qd = self.q_at(t)
        pts, R = chain(q)
        Jv = jacobian_linear(q, pts)
        U, sv, _ = np.linalg.svd(Jv)
        sigma_min = float(sv[-1])
        state = (
            "pinched" if sigma_min < PINCHED_BELOW_M else "narrow" if sigma_min < NARROW_BELOW_M else "clear"
        )
        if state != self.health:
            out.append(
                (
                    "event",
                    {
                        **self._header("event", tick),
                        "event": "health",
                        "detail": f"{self.health} -> {state} (smallest singular value {sigma_min:.3g} m)",
                        "mode": self.mode,
                    },
                )
            )
            self.health = state
        damping = 0.0 if sigma_min >= NARROW_BELOW_M else 0.05 * (1 - (sigma_min / NARROW_BELOW_M) ** 2)
        scale = 1.0 if sigma_min >= PINCHED_BELOW_M else max(0.3, sigma_min / PINCHED_BELOW_M)
        margin = [min(qi + lim, lim - qi) / (2 * lim) for qi, lim in zip(q, POSITION_LIMIT_RAD, strict=True)]
        u = U[:, -1] if abs(U[:, -1]).max() == U[:, -1].max() else -U[:, -1]
        if int(t * 10) % 50 == 0:
            self.rejected["not_leased"] += 1
        manip_lin = float(np.prod(sv))
        out.append(
            (
                "health",
                {
                    **self._header("health", tick),
                    "manipulability": manip_lin * 0.8,
                    "manipulability_linear": manip_lin,
                    "manipulability_angular": 0.8,
                    "singular_values": np.r_[1.0, sv],
                    "inverse_condition": float(sv[-1] / max(sv[0], 1.0)),
                    "weakest_linear": u,
                    "weakest_angular": np.zeros(3),
                    "damping": damping,
                    "scale": scale,
                    "limit_margin": np.array(margin),
                    "state": state,
                    "mode": self.mode,
                    "rejected": dict(self.rejected),
                    "overruns": int(t // 7),
                    **self.foresight(t, q, qd * scale, sigma_min),
                },
            )
        )
        out.append(
            (
                "state",
                {
                    **self._header("state", tick),
                    "position": q,
                    "rate": qd * scale,
                    "tool": {"position": pts[-1].tolist(), "rotation": R.reshape(-1).tolist()},
                    "origins": [p.tolist() for p in pts],
                    "ellipsoid": {"radii": sv.tolist(), "axes": U.reshape(-1).tolist()},
                },
            )
        )
        out.append(
            (
                "command",
                {
                    **self._header("command", tick),
                    "rate": qd * scale,
                    "target": q + qd / self.tick_hz,
                    "answers": self.seq,
                    "scale": scale,
                    "mode": self.mode,
                    "health": state,
                },
            )
        )
        return out
