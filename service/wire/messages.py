"""The decoded wire messages of protocol version 1: immutable named tuples, cheap to build on the hot path.

Field names and units follow docs/protocol.md section 7 (stream messages) and 8 (control).
"""

from __future__ import annotations

from typing import Any, NamedTuple

import numpy as np


class TwistMessage(NamedTuple):
    """A decoded twist: the desired velocity of a reference point on the tool.

    linear : (3,) m/s, velocity of the reference point; angular : (3,) rad/s; both in `frame`
    ("base" or "tool"). point : (3,) m, offset of the reference point from the tool origin, in
    `frame` (zeros when the message has none: the tool origin). lease : the sender's lease token.
    """

    seq: int
    stamp_ns: int
    lease: str
    linear: np.ndarray
    angular: np.ndarray
    frame: str
    point: np.ndarray


class JointsMessage(NamedTuple):
    """A decoded joint state. position : (n,) rad or m; velocity : (n,) rad/s or m/s, or None;
    source : the driver's name, or None when it gave none."""

    seq: int
    stamp_ns: int
    position: np.ndarray
    velocity: np.ndarray | None
    source: str | None = None


class CommandMessage(NamedTuple):
    """A decoded command (one per tick).

    rate : (n,) commanded joint rates, rad/s or m/s, joint order.
    target : (n,) q + rate * T, the position the joint should reach at the next tick, rad or m.
    answers : seq of the twist this command answers, -1 when none (at rest, stale or not leased).
    scale : task scaling in [0, 1] applied by the hard limits.
    """

    seq: int
    stamp_ns: int
    tick: int
    rate: np.ndarray
    target: np.ndarray
    answers: int
    scale: float
    mode: str
    health: str


class HealthMessage(NamedTuple):
    """A decoded health report.

    manipulability, manipulability_linear, manipulability_angular : Yoshikawa measures (whole,
        translational rows, rotational rows) of the task-weighted Jacobian.
    singular_values : (k,) k = min(6, n), descending, m (task-weighted).
    inverse_condition : smallest / largest singular value, in [0, 1].
    weakest_linear : (3,) m/s and weakest_angular : (3,) rad/s: the weakest task direction, base frame,
        as twistrate.solver.health gives it: the left singular vector u (6,) of the smallest singular
        value of the task-weighted Jacobian, as a twist (linear = u[:3], angular = u[3:] / L, L the
        characteristic length), so |linear|^2 + L^2 |angular|^2 = 1; sign: the largest-magnitude
        component of u is positive.
    damping : lambda applied, m. scale : task scaling in [0, 1].
    limit_margin : (n,) margin of each joint to its nearer position limit as a fraction of its range,
        min(q - q_min, q_max - q) / (q_max - q_min): 0.5 mid-range, 0 on a limit, negative beyond it;
        +inf for a joint without position limits (nil on the wire).
    rejected : {reason: count} of refused intake messages since start.
    overruns : ticks that missed their deadline since start.
    tracking : True when no scale of the asked twist fit the bounds and the rates are the bounded
        least-squares ones nearest it (scale 0).
    twist_achieved, twist_error : (6,) (v, w) base frame at the tool point, m/s and rad/s: the twist the
        rates make and achieved - asked (scaling, damping and tracking together); None when not running.
    sigma_min_rate_m_s : rate of the smallest task-weighted singular value along the commanded rates,
        m/s, or None where it is not defined (repeated or zero value; not running).
    time_to_pinched_s : first-order time until that value reaches the pinched threshold, s; 0 when
        already there; None when moving away, steady or undefined.
    time_to_limit_s : (n,) per joint, time until its commanded rate reaches the position limit it moves
        toward, s; +inf never (nil on the wire). first_limit_joint / time_to_first_limit_s : the joint
        (0-based) that gets there first and when, or None.
    keepout : the nearest keep-out pair (KeepoutNearest), or None when the service has no keep-out.
    limiting : the constraint that limited the scale (Limiting); None only for a message built without it.
    """

    seq: int
    stamp_ns: int
    tick: int
    manipulability: float
    manipulability_linear: float
    manipulability_angular: float
    singular_values: np.ndarray
    inverse_condition: float
    weakest_linear: np.ndarray
    weakest_angular: np.ndarray
    damping: float
    scale: float
    limit_margin: np.ndarray
    state: str
    mode: str
    rejected: dict[str, int]
    overruns: int
    tracking: bool
    twist_achieved: np.ndarray | None
    twist_error: np.ndarray | None
    sigma_min_rate_m_s: float | None
    time_to_pinched_s: float | None
    time_to_limit_s: np.ndarray
    first_limit_joint: int | None
    time_to_first_limit_s: float | None
    keepout: KeepoutNearest | None = None
    limiting: Limiting | None = None


class KeepoutNearest(NamedTuple):
    """health.keepout: the nearest keep-out pair at the tick's joint state.

    nearest_m : signed distance between the two surfaces, m (negative: they overlap).
    link : the arm's link of the pair (a joint name, or "root"); other : the zone's name or the other link's
    name; other_kind : "zone" or "link".
    """

    nearest_m: float
    link: str
    other: str
    other_kind: str


class Limiting(NamedTuple):
    """health.limiting: the constraint that limited this tick's scale.

    by : "none", "joint" or "keepout". joint (0-based index) and bound ("position", "velocity" or
    "acceleration") when by is "joint", else None. link and other (as in KeepoutNearest) when by is
    "keepout", else None.
    """

    by: str
    joint: int | None = None
    bound: str | None = None
    link: str | None = None
    other: str | None = None


class EventMessage(NamedTuple):
    """A decoded event: a state change or fault. event : name; detail : human-readable text;
    instance : the id of the service instance that sent it (random at each start; a new id means the
    service restarted)."""

    seq: int
    stamp_ns: int
    tick: int
    event: str
    detail: str
    mode: str
    instance: int


class StateMessage(NamedTuple):
    """A decoded state report: where the arm is, for drawing and for pose-based clients.

    position : (n,) joint positions the tick used, rad or m. rate : (n,) rates commanded that tick.
    tool_position : (3,) m and tool_rotation : (3, 3) of T_base_tool, base frame.
    origins : (n + 2, 3) m, base frame: the base origin, each joint's origin in chain order, the tool
        origin (a polyline of the arm).
    ellipsoid_radii : (3,) and ellipsoid_axes : (3, 3) (columns the principal axes, base frame): the
        translational manipulability ellipsoid of J_v, {J_v qd : |qd| <= 1}; radii are the singular
        values of J_v, m/s per rad/s (per unit joint-rate norm), descending.
    """

    seq: int
    stamp_ns: int
    tick: int
    position: np.ndarray
    rate: np.ndarray
    tool_position: np.ndarray
    tool_rotation: np.ndarray
    origins: np.ndarray
    ellipsoid_radii: np.ndarray
    ellipsoid_axes: np.ndarray


class RequestMessage(NamedTuple):
    """A decoded control request. args : the op's own fields (see REQUEST_ARGS)."""

    seq: int
    stamp_ns: int
    op: str
    args: dict[str, Any]


class ReplyMessage(NamedTuple):
    """A decoded control reply. result : the op's result map when ok; error_code/message when not."""

    seq: int
    stamp_ns: int
    op: str
    ok: bool
    result: dict[str, Any]
    error_code: str | None
    error_message: str | None


class FeaturesMessage(NamedTuple):
    """A decoded features message.

    camera : the camera's name. capture_ns : capture time, ns since 1970 UTC, the pipeline's clock.
    ids : (N,) int; pixels : (N, 2) (u, v) px of the undistorted image; depths : (N,) m when every point
    carries one, else None (vservo then uses the desired depths). T_cam_target : (4, 4) the target's
    pose in the camera frame, or None.
    """

    seq: int
    stamp_ns: int
    camera: str
    capture_ns: int
    ids: np.ndarray
    pixels: np.ndarray
    depths: np.ndarray | None
    T_cam_target: np.ndarray | None


OutputMessage = CommandMessage | HealthMessage | EventMessage | StateMessage
IntakeMessage = TwistMessage | JointsMessage
