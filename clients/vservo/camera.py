"""Pinhole camera: intrinsics, pixels <-> normalised image coordinates, projection of base-frame points.

The model of Chaumette & Hutchinson (2006), "Visual servo control, Part I: basic approaches", IEEE
Robotics & Automation Magazine 13(4), section "Image-based visual servo": a point (X, Y, Z) in the
camera frame projects to normalised coordinates x = X / Z, y = Y / Z, and to pixels
u = c_u + f_x x, v = c_v + f_y y (no skew, no lens distortion: undistort upstream).

Camera frame: origin at the optical centre, +z along the optical axis (forward), +x along image
columns (u grows), +y along image rows (v grows, downwards).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from twistrate.solver.errors import ConfigError, field_error

#: Points nearer the camera plane than this (m, along the optical axis) are not visible.
MIN_DEPTH_M = 1e-3


@dataclass(frozen=True)
class Intrinsics:
    """Pinhole intrinsics in pixels: focal lengths f_x, f_y > 0, principal point (c_x, c_y), image size.

    `width`, `height` (pixels) bound what the camera sees; a point projecting outside is not seen.
    """

    fx: float
    fy: float
    cx: float
    cy: float
    width: int
    height: int

    def __post_init__(self) -> None:
        for name in ("fx", "fy"):
            value = getattr(self, name)
            if not (np.isfinite(value) and value > 0.0):
                raise field_error(ConfigError, f"intrinsics.{name}", value, "a finite focal length > 0 px")
        for name in ("cx", "cy"):
            value = getattr(self, name)
            if not np.isfinite(value):
                raise field_error(ConfigError, f"intrinsics.{name}", value, "a finite principal point, px")
        for name in ("width", "height"):
            value = getattr(self, name)
            if not (isinstance(value, int) and value > 0):
                raise field_error(ConfigError, f"intrinsics.{name}", value, "an image size > 0 px (int)")

    def normalised(self, pixels: np.ndarray) -> np.ndarray:
        """(N, 2) normalised coordinates (x, y), unitless, of (N, 2) pixel coordinates (u, v)."""
        pixels = np.asarray(pixels, dtype=float)
        return np.column_stack([(pixels[:, 0] - self.cx) / self.fx, (pixels[:, 1] - self.cy) / self.fy])

    def pixels(self, normalised: np.ndarray) -> np.ndarray:
        """(N, 2) pixel coordinates (u, v) of (N, 2) normalised coordinates (x, y)."""
        normalised = np.asarray(normalised, dtype=float)
        return np.column_stack([self.cx + self.fx * normalised[:, 0], self.cy + self.fy * normalised[:, 1]])

    def inside(self, pixels: np.ndarray) -> np.ndarray:
        """(N,) bool: pixel coordinates (N, 2) within the image [0, width) x [0, height)."""
        return ((pixels[:, 0] >= 0.0) & (pixels[:, 0] < self.width)
                & (pixels[:, 1] >= 0.0) & (pixels[:, 1] < self.height))


def camera_points(T_base_cam: np.ndarray, P_base: np.ndarray) -> np.ndarray:
    """(N, 3) points in the camera frame, m, of (N, 3) base-frame points; T_base_cam (4, 4)."""
    R, p = T_base_cam[:3, :3], T_base_cam[:3, 3]
    return (np.asarray(P_base, dtype=float) - p) @ R


def project(T_base_cam: np.ndarray, P_base: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Pinhole projection: ((N, 2) normalised (x, y), (N,) depths Z in m) of (N, 3) base-frame points.

    Points with Z < MIN_DEPTH_M (behind or on the camera plane) get NaN coordinates: the caller
    treats them as not seen (`visible`).
    """
    P_cam = camera_points(T_base_cam, P_base)
    Z = P_cam[:, 2]
    ok = Z >= MIN_DEPTH_M
    xy = np.full((len(Z), 2), np.nan)
    xy[ok] = P_cam[ok, :2] / Z[ok, None]
    return xy, Z


def visible(intrinsics: Intrinsics, xy: np.ndarray, Z: np.ndarray) -> np.ndarray:
    """(N,) bool: in front of the camera and inside the image."""
    ok = Z >= MIN_DEPTH_M
    out = np.zeros(len(Z), dtype=bool)
    out[ok] = intrinsics.inside(intrinsics.pixels(xy[ok]))
    return out
