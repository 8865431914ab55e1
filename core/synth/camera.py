"""Pinhole camera for the synthetic renderer.

World frame: metres, x to the participant's right, y the way the seated
participant faces, z up; the floor is z = 0.

Camera frame: the OpenCV convention (x right, y down, z forward), so that a
world point X maps to ``X_c = R @ X + t`` and then to pixels
``u = fx * x_c / z_c + cx``, ``v = fy * y_c / z_c + cy`` -- the pinhole model
without lens distortion (Hartley & Zisserman, "Multiple View Geometry in
Computer Vision", Cambridge University Press, 2nd ed. 2004, section 6.1).
Pixel (column j, row i) has its centre at the continuous coordinate (j, i),
as in OpenCV.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

WORLD_UP = np.array([0.0, 0.0, 1.0])


@dataclass(frozen=True)
class Camera:
    name: str
    width: int
    height: int
    fx: float
    fy: float
    cx: float
    cy: float
    R: np.ndarray      # (3, 3) world -> camera rotation
    t: np.ndarray      # (3,) world -> camera translation

    @property
    def K(self) -> np.ndarray:
        return np.array([[self.fx, 0.0, self.cx], [0.0, self.fy, self.cy], [0.0, 0.0, 1.0]])

    @property
    def centre(self) -> np.ndarray:
        """Camera centre in world coordinates (-R^T t)."""
        return -self.R.T @ self.t

    def to_camera(self, pts: np.ndarray) -> np.ndarray:
        pts = np.asarray(pts, dtype=float)
        return pts @ self.R.T + self.t

    def project(self, pts: np.ndarray) -> np.ndarray:
        """World points (N, 3) -> (N, 2) pixel coordinates (pinhole, no distortion)."""
        pc = self.to_camera(pts)
        z = pc[..., 2]
        return np.stack([self.fx * pc[..., 0] / z + self.cx,
                         self.fy * pc[..., 1] / z + self.cy], axis=-1)

    def pixel_rays(self, rows: np.ndarray, cols: np.ndarray):
        """Camera-frame ray directions (dx, dy, 1) through pixel centres.

        With dz = 1 the ray parameter t of a hit equals its camera depth z_c.
        ``rows`` / ``cols`` are 1-D index arrays; the result broadcasts to
        (len(rows), len(cols)).
        """
        dx = (np.asarray(cols, dtype=float) - self.cx) / self.fx
        dy = (np.asarray(rows, dtype=float) - self.cy) / self.fy
        return dx[None, :], dy[:, None]

    def in_frame(self, uv: np.ndarray) -> np.ndarray:
        """True where a pixel coordinate rounds to a pixel inside the image."""
        u = np.rint(uv[..., 0])
        v = np.rint(uv[..., 1])
        return (u >= 0) & (u <= self.width - 1) & (v >= 0) & (v <= self.height - 1)

    def to_dict(self) -> dict:
        return {
            "name": self.name, "width": self.width, "height": self.height,
            "K": self.K.round(6).tolist(), "R": self.R.round(9).tolist(),
            "t": self.t.round(9).tolist(),
            "centre": self.centre.round(6).tolist(),
        }


def look_at(name: str, eye, target, *, width: int, height: int, hfov_deg: float,
            principal_offset=(0.0, 0.0)) -> Camera:
    """A camera at ``eye`` looking at ``target`` with the world z axis up."""
    eye = np.asarray(eye, dtype=float)
    target = np.asarray(target, dtype=float)
    f = target - eye
    f /= np.linalg.norm(f)
    x = np.cross(f, WORLD_UP)
    x /= np.linalg.norm(x)
    y = np.cross(f, x)
    R = np.stack([x, y, f])
    t = -R @ eye
    fx = 0.5 * width / np.tan(np.radians(hfov_deg) / 2.0)
    cx = (width - 1) / 2.0 + principal_offset[0]
    cy = (height - 1) / 2.0 + principal_offset[1]
    return Camera(name=name, width=width, height=height, fx=float(fx), fy=float(fx),
                  cx=float(cx), cy=float(cy), R=R, t=t)
