"""The convergence criterion and the feature-error log (one CSV file per run, for plotting).

Convergence (our documented threshold): the servo has *settled* once the mean pixel distance between
the current and the desired points, mean_k |p_k - p*_k| (px), stays at or below `threshold_px` for
`hold_frames` consecutive tracked frames; any frame above it, or any frame that is not tracked,
restarts the count. For a pose frame the error is the translation |c*t_c| (m) and the rotation
|theta u| (rad) against `threshold_m` and `threshold_rad`. With independent pixel noise of standard
deviation sigma per coordinate the mean distance of a settled run is about 1.25 sigma (the mean of a
Rayleigh distribution, sigma sqrt(pi / 2)), so the default 1 px suits sigma up to about 0.5 px.

The log is a CSV file (RFC 4180, comma-separated, one header row, "." decimals):

    time_s, state, points, error_px_mean, error_px_max, error_norm, error_m, error_rad,
    linear_x, linear_y, linear_z, angular_x, angular_y, angular_z, gain, settled

time_s: seconds since the run started; state: `features.ServoState` value; points: the number of
matched points (0 for a pose); error_px_mean / error_px_max: mean / largest pixel distance (empty for
a pose or without features); error_norm: |e| of the normalised error vector (empty without
features); error_m / error_rad: pose error (empty for points); linear_* (m/s), angular_* (rad/s):
the camera twist sent, camera frame, zero when not tracking; gain: lambda (1/s) used; settled: 0/1.
"""

from __future__ import annotations

import csv
import math
from dataclasses import dataclass, field
from typing import TextIO

import numpy as np

#: Default convergence thresholds (see the module docstring).
THRESHOLD_PX = 1.0
HOLD_FRAMES = 10
THRESHOLD_M = 0.5e-3
THRESHOLD_RAD = 2e-3

COLUMNS = ("time_s", "state", "points", "error_px_mean", "error_px_max", "error_norm", "error_m",
           "error_rad", "linear_x", "linear_y", "linear_z", "angular_x", "angular_y", "angular_z",
           "gain", "settled")


@dataclass
class Convergence:
    """Counts consecutive frames within the thresholds; `settled` once `hold_frames` of them passed."""

    threshold_px: float = THRESHOLD_PX
    hold_frames: int = HOLD_FRAMES
    threshold_m: float = THRESHOLD_M
    threshold_rad: float = THRESHOLD_RAD
    _count: int = field(default=0, init=False)

    @property
    def settled(self) -> bool:
        return self._count >= self.hold_frames

    def reset(self) -> None:
        self._count = 0

    def update_points(self, error_px_mean: float) -> bool:
        """Account one tracked point frame; returns `settled`."""
        self._count = self._count + 1 if error_px_mean <= self.threshold_px else 0
        return self.settled

    def update_pose(self, error_m: float, error_rad: float) -> bool:
        """Account one tracked pose frame; returns `settled`."""
        ok = error_m <= self.threshold_m and error_rad <= self.threshold_rad
        self._count = self._count + 1 if ok else 0
        return self.settled


def _cell(value: float | None) -> str:
    if value is None or not math.isfinite(value):
        return ""
    return f"{value:.9g}"


class ErrorLog:
    """Writes one row per servo step to an open text file (the caller opens it with newline="")."""

    def __init__(self, out: TextIO) -> None:
        self._writer = csv.writer(out, lineterminator="\n")
        self._writer.writerow(COLUMNS)
        self._out = out

    def row(self, time_s: float, state: str, points: int, error_px_mean: float | None,
            error_px_max: float | None, error_norm: float | None, error_m: float | None,
            error_rad: float | None, twist: np.ndarray, gain: float, settled: bool) -> None:
        """One row; twist (6,) camera twist sent, camera frame, (v, w)."""
        self._writer.writerow([f"{time_s:.6f}", state, points, _cell(error_px_mean), _cell(error_px_max),
                               _cell(error_norm), _cell(error_m), _cell(error_rad),
                               *(f"{float(c):.9g}" for c in twist), f"{gain:.6g}", int(settled)])

    def flush(self) -> None:
        self._out.flush()


def read(path: str) -> dict[str, list[str]]:
    """The log's columns as lists of strings (for plotting and tests)."""
    with open(path, newline="") as f:
        rows = list(csv.reader(f))
    header, body = rows[0], rows[1:]
    return {name: [r[i] for r in body] for i, name in enumerate(header)}
