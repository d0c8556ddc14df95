"""The interaction matrix of image points, stacked for N >= 4 points, and the depth choice.

Chaumette & Hutchinson (2006), "Visual servo control, Part I: basic approaches", IEEE Robotics &
Automation Magazine 13(4), eq. (11): for a normalised point (x, y) at depth Z (m), with the camera
twist v_c = (v, w) expressed in the camera frame (the point fixed in the world), s_dot = L_x v_c with

    L_x = [[-1/Z,    0, x/Z,     x y, -(1 + x^2),  y],
           [   0, -1/Z, y/Z, 1 + y^2,      -x y,  -x]].

Depth choices for the estimate L_hat used by the law (same paper, section "Approximating the
interaction matrix"): the current depths (`current`), the desired depths at the desired features
(`desired`), or the mean of the two interaction matrices (`mean`, L_hat = (L_e + L_e*) / 2).
"""

from __future__ import annotations

from enum import StrEnum

import numpy as np

#: The fewest points the image-based law accepts: 3 give a square L with singular configurations
#: (Chaumette & Hutchinson 2006, section "Image-based visual servo"); 4 is the paper's advice.
MIN_POINTS = 4


class DepthChoice(StrEnum):
    """Which interaction matrix estimate the image-based law inverts."""

    CURRENT = "current"
    DESIRED = "desired"
    MEAN = "mean"


def point_matrix(xy: np.ndarray, Z: np.ndarray) -> np.ndarray:
    """(2N, 6) stacked interaction matrix, rows (x_1, y_1, x_2, y_2, ...), columns (v, w) of the camera
    twist in the camera frame; xy (N, 2) normalised coordinates, Z (N,) depths (m, > 0)."""
    x, y = xy[:, 0], xy[:, 1]
    inv_z = 1.0 / np.asarray(Z, dtype=float)
    L = np.zeros((2 * len(x), 6))
    Lx, Ly = L[0::2], L[1::2]
    Lx[:, 0] = -inv_z
    Lx[:, 2] = x * inv_z
    xy_ = x * y
    Lx[:, 3] = xy_
    Lx[:, 4] = -1.0 - x * x
    Lx[:, 5] = y
    Ly[:, 1] = -inv_z
    Ly[:, 2] = y * inv_z
    Ly[:, 3] = 1.0 + y * y
    Ly[:, 4] = -xy_
    Ly[:, 5] = -x
    return L


def estimate(choice: DepthChoice, xy: np.ndarray, Z: np.ndarray | None,
             xy_star: np.ndarray, Z_star: np.ndarray, L_star: np.ndarray | None = None) -> np.ndarray:
    """(2N, 6) interaction matrix estimate L_hat for the chosen depth.

    xy (N, 2) current and xy_star (N, 2) desired normalised coordinates, in the same point order;
    Z (N,) current depth estimates (m) or None when none is known; Z_star (N,) desired depths (m).
    `current` uses (xy, Z); `desired` uses (xy_star, Z_star); `mean` averages both matrices.
    Without current depths, `current` uses the desired depths at the current points (a common
    practice fallback: the paper's L_e with Z approximated by Z*), and `mean` likewise. L_star: the
    desired matrix point_matrix(xy_star, Z_star) when the caller has it already (it is constant).
    """
    Z_now = Z_star if Z is None else Z
    if choice is DepthChoice.CURRENT:
        return point_matrix(xy, Z_now)
    if L_star is None:
        L_star = point_matrix(xy_star, Z_star)
    if choice is DepthChoice.DESIRED:
        return L_star
    return 0.5 * (point_matrix(xy, Z_now) + L_star)
