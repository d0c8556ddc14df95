"""One camera frame's features, and the gate that decides whether the law may use them.

A frame carries either image points with ids (pixels, optional depths) or a target pose, plus the
capture time. The gate turns the newest frame, its arrival time and the present time into a state:
only `tracking` lets a twist through; every other state means a zero twist and no motion until
good features return. Times are seconds on one monotonic clock the caller owns (no clock here).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from enum import StrEnum

import numpy as np

from twistrate.clients.vservo.interaction import MIN_POINTS


class ServoState(StrEnum):
    """What the servo is doing. Shown on the terminal line and written to the error log."""

    WAITING = "waiting"     # no frame since start
    TRACKING = "tracking"   # fresh, usable features: the law's twist goes out
    SETTLED = "settled"     # tracking and within the convergence criterion (errorlog.Convergence)
    STALE = "stale"         # the newest frame is older than the staleness bound: zero twist
    MISSING = "missing"     # the newest frame holds no known feature (target not found): zero twist
    TOO_FEW = "too_few"     # fewer than MIN_POINTS known points, or an unusable pose: zero twist


@dataclass(frozen=True, eq=False)
class PointFrame:
    """Image points of one frame. ids (N,) int; pixels (N, 2) (u, v) px; depths (N,) m or None; either
    numpy arrays or, as feed.decode_features gives them, tuples (ids a tuple of int, pixels a tuple of
    (u, v) float pairs, depths a tuple of float); capture_s: capture time, s, on the receiver's clock
    (the sender's capture_ns mapped by the caller)."""

    ids: np.ndarray | tuple[int, ...]
    pixels: np.ndarray | tuple[tuple[float, float], ...]
    depths: np.ndarray | tuple[float, ...] | None
    capture_s: float


@dataclass(frozen=True, eq=False)
class PoseFrame:
    """A target pose estimate of one frame: T_cam_target (4, 4) or None when the target was not found."""

    T_cam_target: np.ndarray | None
    capture_s: float


Frame = PointFrame | PoseFrame


@dataclass(frozen=True)
class Gate:
    """Freshness bounds. A frame is stale once `stale_after_s` has passed since it arrived, or once its
    capture is older than `max_age_s` (capture to now; set it to inf when the camera's clock is not
    synchronised with ours)."""

    stale_after_s: float = 0.2
    max_age_s: float = float("inf")


@dataclass(frozen=True, eq=False)
class Matched:
    """Points of a frame matched to the desired ones by id, in the desired set's order.

    index (M,) int: rows of the desired set; pixels (M, 2) px; depths (M,) m or None; numpy arrays
    (from `match`) or sequences of the same shapes (the servo's own form, plain floats)."""

    index: np.ndarray | Sequence[int]
    pixels: np.ndarray | Sequence[Sequence[float]]
    depths: np.ndarray | Sequence[float] | None


def match(frame: PointFrame, desired_ids: np.ndarray | dict[int, int]) -> Matched:
    """The frame's points whose id is one of the desired ids, in desired order, finite ones only.

    desired_ids: (K,) ids, or a prepared {id: row} map of them (faster on a hot path). A duplicated id
    in a frame is ambiguous: all its copies are dropped (common practice: never guess which detection
    is the right one). Small N: a plain loop beats array set operations here."""
    rows_of = desired_ids if isinstance(desired_ids, dict) else {int(i): k for k, i in enumerate(desired_ids)}
    pixels = np.asarray(frame.pixels, dtype=float).reshape(-1, 2)
    depths = None if frame.depths is None else np.asarray(frame.depths, dtype=float)
    ok = np.isfinite(pixels).all(axis=1)
    if depths is not None:
        ok &= np.isfinite(depths) & (depths > 0.0)
    seen: dict[int, int] = {}
    dup: set[int] = set()
    for j, (i, good) in enumerate(zip(np.asarray(frame.ids).tolist(), ok.tolist(), strict=True)):
        if i in seen or i in dup:
            dup.add(i)
            seen.pop(i, None)
        elif good and i in rows_of:
            seen[i] = j
    pairs = sorted((rows_of[i], j) for i, j in seen.items() if i not in dup)
    index = np.array([k for k, _ in pairs], dtype=int)
    rows = np.array([j for _, j in pairs], dtype=int)
    return Matched(index, pixels[rows], None if depths is None else depths[rows])


def gate_state(frame: Frame | None, arrived_s: float, now_s: float, gate: Gate,
               matched: Matched | None = None) -> ServoState:
    """The state the newest frame allows (never SETTLED: convergence is judged elsewhere).

    frame: the newest frame or None; arrived_s: when it arrived; now_s: the present; matched: its
    points matched to the desired set (point frames only)."""
    if frame is None:
        return ServoState.WAITING
    if now_s - arrived_s > gate.stale_after_s or now_s - frame.capture_s > gate.max_age_s:
        return ServoState.STALE
    if isinstance(frame, PoseFrame):
        if frame.T_cam_target is None:
            return ServoState.MISSING
        if not np.isfinite(frame.T_cam_target).all():
            return ServoState.TOO_FEW
        return ServoState.TRACKING
    if matched is None or len(matched.index) == 0:
        return ServoState.MISSING
    if len(matched.index) < MIN_POINTS:
        return ServoState.TOO_FEW
    return ServoState.TRACKING
