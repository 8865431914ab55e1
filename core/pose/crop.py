"""Crops: the affine map between a rotated frame region and a model's input image."""
from __future__ import annotations

import cv2
import numpy as np

from .base import Region


def crop_to_frame_matrix(region: Region, out_w: int, out_h: int) -> np.ndarray:
    """2x3 affine matrix taking model-input pixels (u, v) to frame pixels (x, y).

    Pixel centres follow OpenCV's convention (``cv2.warpAffine``): input pixel
    (u, v) has its centre at integer coordinates, and the region's rectangle
    spans u in [-0.5, out_w - 0.5].
    """
    c, s = np.cos(region.angle), np.sin(region.angle)
    sx, sy = region.w / out_w, region.h / out_h
    # frame = centre + R @ (((u + 0.5) / out_w - 0.5) * w, ((v + 0.5) / out_h - 0.5) * h)
    a = np.array([[c * sx, -s * sy], [s * sx, c * sy]])
    offset = np.array([region.cx, region.cy]) + a @ np.array([0.5 - out_w / 2, 0.5 - out_h / 2])
    return np.hstack([a, offset[:, None]])


def frame_to_crop_matrix(region: Region, out_w: int, out_h: int) -> np.ndarray:
    """Inverse of :func:`crop_to_frame_matrix` (frame pixels to model-input pixels)."""
    return cv2.invertAffineTransform(crop_to_frame_matrix(region, out_w, out_h))


def apply_affine(m: np.ndarray, xy: np.ndarray) -> np.ndarray:
    """Apply a 2x3 affine matrix to an (N, 2) array of points."""
    xy = np.asarray(xy, dtype=float)
    return xy @ m[:, :2].T + m[:, 2]


def extract_crop(frame: np.ndarray, region: Region, out_w: int, out_h: int) -> np.ndarray:
    """Warp the region out of the frame into an out_w x out_h image (black outside the frame)."""
    m = frame_to_crop_matrix(region, out_w, out_h)
    return cv2.warpAffine(frame, m, (out_w, out_h), flags=cv2.INTER_LINEAR,
                          borderMode=cv2.BORDER_CONSTANT, borderValue=0)


def whole_frame_region(width: int, height: int) -> Region:
    """A square region covering the whole frame, letterboxed (the first pass)."""
    side = float(max(width, height))
    return Region((width - 1) / 2.0, (height - 1) / 2.0, side, side, 0.0, "frame")
