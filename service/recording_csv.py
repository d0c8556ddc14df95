"""A recording as CSV (`twistrate record --csv OUT --summary PATH`): one row per record, one column per
scalar, per-joint columns named by the joint, the twists split into linear and angular components.
Columns (docs/operation.md, "CSV export"), in this order:

    t_s, tick, mode, health, scale, cap, damping_m, sigma_min_m, manipulability,
    then per joint J (joint order): q_J, qd_J, limits_J,
    then twist_desired_{linear_x, linear_y, linear_z, angular_x, angular_y, angular_z},
    then twist_achieved_{same}

mode and health are names (not the integer codes); limits_J is the bit mask (1 position, 2 velocity,
4 acceleration); NaN (unavailable or not running) is an empty cell. Units: SI, as in the recording.
"""

from __future__ import annotations

import csv
import math
from pathlib import Path
from typing import Any

import numpy as np

from twistrate.solver.errors import InputError, field_error

#: the twist components, linear first (docs/protocol.md: twists are (v, w))
TWIST_PARTS = ("linear_x", "linear_y", "linear_z", "angular_x", "angular_y", "angular_z")
SCALARS = (("t_s", "t"), ("tick", "tick"), ("mode", "mode"), ("health", "health"), ("scale", "scale"),
           ("cap", "cap"), ("damping_m", "damping"), ("sigma_min_m", "sigma_min"),
           ("manipulability", "manipulability"))


def csv_columns(joints: list[str]) -> list[str]:
    """The header row for an arm with these joint names."""
    cols = [name for name, _ in SCALARS]
    for j in joints:
        cols += [f"q_{j}", f"qd_{j}", f"limits_{j}"]
    cols += [f"twist_desired_{p}" for p in TWIST_PARTS]
    cols += [f"twist_achieved_{p}" for p in TWIST_PARTS]
    return cols


def _cell(v: Any) -> Any:
    if isinstance(v, float) and math.isnan(v):
        return ""
    return v


def write_csv(header: dict[str, Any], rec: np.ndarray, out: str | Path) -> Path:
    """Write `rec` (read_recording's records) to `out` as CSV; an existing file is refused, as
    recordings are. Returns the path."""
    out = Path(out)
    modes, states = header["modes"], header["health_states"]
    n = header["n"]
    try:
        f = open(out, "x", newline="", encoding="utf-8")  # noqa: SIM115 (closed below)
    except FileExistsError:
        raise field_error(InputError, "csv path", str(out), "a file that does not exist yet") from None
    except OSError as exc:
        raise field_error(InputError, "csv path", str(out), f"a writable file ({exc.strerror})") from None
    with f:
        w = csv.writer(f)
        w.writerow(csv_columns(list(header["joints"])))
        for r in rec:
            row: list[Any] = [float(r["t"]), int(r["tick"]), modes[r["mode"]], states[r["health"]]]
            row += [_cell(float(r[k])) for k in ("scale", "cap", "damping", "sigma_min", "manipulability")]
            for i in range(n):
                row += [float(r["q"][i]), float(r["qd"][i]), int(r["limits"][i])]
            row += [_cell(float(v)) for v in r["twist_desired"]]
            row += [_cell(float(v)) for v in r["twist_achieved"]]
            w.writerow(row)
    return out
