"""The steps of the axis pipeline, each a small pure function on six-axis arrays.

Axis order everywhere after `remap`: twist order (vx, vy, vz, wx, wy, wz), linear first. Before it:
the device's own axis order (its codes 0..5, X, Y, Z, RX, RY, RZ). Deflections are unitless: raw
counts until `normalize`, then u in [-1, 1] (1 = full deflection). Nothing here allocates state or
reads a clock; `pipeline.AxisPipeline` strings the steps together.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

#: The six axes of a twist, linear first.
AXIS_NAMES = ("vx", "vy", "vz", "wx", "wy", "wz")
#: Lock choices: none, translation only (angular zeroed), rotation only (linear zeroed).
LOCKS = ("none", "translation", "rotation")
#: Below this a speed or a norm counts as zero (a divide guard, not a tuning value).
ZERO_NORM = 1e-12


def rest_offset(samples: np.ndarray) -> np.ndarray:
    """The rest offset: the mean of the raw deflections captured at start with the controller let go.

    samples : (m, 6) raw counts, device axis order, m >= 1. Returns (6,) counts.
    """
    return np.asarray(samples, dtype=float).reshape(-1, 6).mean(axis=0)


def subtract_rest(raw: np.ndarray, rest: np.ndarray) -> np.ndarray:
    """raw, rest : (6,) counts, device axis order. Returns (6,) counts relative to rest."""
    return np.asarray(raw, dtype=float) - rest


def normalize(counts: np.ndarray, full_scale: np.ndarray | float) -> np.ndarray:
    """counts : (6,) counts relative to rest; full_scale : (6,) or scalar counts at full deflection (> 0).
    Returns (6,) u in [-1, 1], clipped (a device may overshoot its nominal range)."""
    return np.clip(np.asarray(counts, dtype=float) / full_scale, -1.0, 1.0)


def remap(u: np.ndarray, source: Sequence[int], sign: Sequence[float]) -> np.ndarray:
    """Twist axis i takes device axis source[i] times sign[i] (+1 or -1).

    u : (6,) device axis order. source : 6 indices 0..5 (a permutation, checked by the profile).
    Returns (6,) twist order (vx, vy, vz, wx, wy, wz)."""
    return np.asarray(u, dtype=float)[list(source)] * np.asarray(sign, dtype=float)


def deadband(u: np.ndarray, d: np.ndarray | float) -> np.ndarray:
    """Per-axis deadband rescaled so the output is continuous at the band's edge and still reaches 1:
    u' = sign(u) (|u| - d) / (1 - d) for |u| > d, else 0 (common practice).

    u : (6,) in [-1, 1]; d : (6,) or scalar in [0, 1). Returns (6,) in [-1, 1]."""
    u = np.asarray(u, dtype=float)
    d = np.broadcast_to(np.asarray(d, dtype=float), u.shape)
    excess = np.maximum(np.abs(u) - d, 0.0)
    return np.sign(u) * excess / (1.0 - d)


def curve(u: np.ndarray, k: np.ndarray | float) -> np.ndarray:
    """Response curve, a cubic blend y = (1 - k) u + k u^3 (common practice): fine control near rest,
    full speed at full deflection (y(1) = 1, y(-1) = -1, monotonic for k in [0, 1]).

    u : (6,) in [-1, 1]; k : (6,) or scalar in [0, 1]. Returns (6,) in [-1, 1]."""
    u = np.asarray(u, dtype=float)
    return (1.0 - k) * u + k * u**3


def dominant(u: np.ndarray) -> np.ndarray:
    """Keep only the axis of the largest magnitude (the first such on ties); the others become 0.

    u : (6,) twist order, unitless. Returns (6,)."""
    u = np.asarray(u, dtype=float)
    out = np.zeros_like(u)
    i = int(np.argmax(np.abs(u)))
    out[i] = u[i]
    return out


def lock(u: np.ndarray, mode: str) -> np.ndarray:
    """mode "translation": translation only (angular axes 3..5 zeroed); "rotation": rotation only
    (linear axes 0..2 zeroed); "none": unchanged. u : (6,) twist order. Returns (6,)."""
    out = np.array(u, dtype=float)
    if mode == "translation":
        out[3:] = 0.0
    elif mode == "rotation":
        out[:3] = 0.0
    return out


def to_twist(u: np.ndarray, linear_max: float, angular_max: float,
             scale: float) -> tuple[np.ndarray, np.ndarray]:
    """Scale unitless deflections to a twist with separate caps.

    u : (6,) in [-1, 1], twist order. linear_max : m/s, angular_max : rad/s, both > 0; scale : the
    operator's speed scale in (0, 1]. Returns linear (3,) m/s and angular (3,) rad/s, in the frame
    the operator chose, each with norm at most its cap times scale (a diagonal push on two axes at
    full deflection is not faster than a push along one)."""
    u = np.asarray(u, dtype=float)
    linear = u[:3] * (linear_max * scale)
    angular = u[3:] * (angular_max * scale)
    return _cap(linear, linear_max * scale), _cap(angular, angular_max * scale)


def _cap(v: np.ndarray, limit: float) -> np.ndarray:
    norm = float(np.linalg.norm(v))
    if norm <= limit or norm < ZERO_NORM:
        return v
    return v * (limit / norm)


def step_scale(index: int, delta: int, steps: Sequence[float]) -> int:
    """The speed-scale index after `delta` button steps (+1 faster, -1 slower), held within 0..len-1.
    steps : ascending scales in (0, 1]."""
    return min(max(index + delta, 0), len(steps) - 1)


def at_rest(u: np.ndarray) -> bool:
    """True when every axis is exactly zero (after the deadband, rest is exact). u : (6,)."""
    return not np.any(np.asarray(u) != 0.0)
