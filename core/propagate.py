"""Video assist: carry keypoints from one frame to the next, and fill between keyframes.

Plain functions over numpy arrays; no project, no store, no Qt. Keypoints are
(K, 3) float arrays (x, y in frame pixels with OpenCV's pixel-centre
convention, v in COCO's 0/1/2 sense).

Tracking is pyramidal Lucas-Kanade optical flow: the iterative image
registration of Lucas & Kanade ("An Iterative Image Registration Technique
with an Application to Stereo Vision", IJCAI 1981), run coarse to fine over an
image pyramid as in Bouguet's implementation ("Pyramidal Implementation of the
Lucas Kanade Feature Tracker: Description of the Algorithm", Intel
Corporation technical report, 2000), which is what OpenCV's
``cv2.calcOpticalFlowPyrLK`` implements. A track is kept only when it passes
a forward-backward check: the point tracked forward and then back again must
land within ``fb_max`` pixels of where it started (the forward-backward error
of Kalal, Mikolajczyk & Matas, "Forward-Backward Error: Automatic Detection
of Tracking Failures", ICPR 2010).
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Iterable, Iterator

import cv2
import numpy as np

#: Defaults: a 21x21 window and 3 pyramid levels above the base image are
#: OpenCV's documented defaults for calcOpticalFlowPyrLK; the forward-backward
#: limit of 1 pixel is a project choice (common practice is 0.5-2 px).
WINDOW = 21
LEVELS = 3
FB_MAX = 1.0
_CRITERIA = (cv2.TERM_CRITERIA_COUNT | cv2.TERM_CRITERIA_EPS, 30, 0.01)


def to_gray(img: np.ndarray) -> np.ndarray:
    """8-bit single-channel image for the tracker (BGR input as OpenCV decodes it)."""
    if img.ndim == 2:
        return img if img.dtype == np.uint8 else np.clip(img, 0, 255).astype(np.uint8)
    return cv2.cvtColor(img, cv2.COLOR_BGR2GRAY)


@dataclass(frozen=True)
class TrackResult:
    points: np.ndarray      # (N, 2) new positions (NaN where lost)
    ok: np.ndarray          # (N,) bool: tracked and passed the forward-backward check
    fb_error: np.ndarray    # (N,) forward-backward distance in pixels (inf where not tracked)


def track_points(prev: np.ndarray, nxt: np.ndarray, points: np.ndarray, *, window: int = WINDOW,
                 levels: int = LEVELS, fb_max: float = FB_MAX) -> TrackResult:
    """Track ``points`` (N, 2) from image ``prev`` to image ``nxt``.

    Pyramidal Lucas-Kanade (Lucas & Kanade, IJCAI 1981; Bouguet, Intel
    technical report 2000) forward, then backward from the result; a point is
    kept when both passes converge, it stays inside the image and the
    round trip ends within ``fb_max`` pixels of the start.
    """
    pts = np.asarray(points, dtype=np.float32).reshape(-1, 1, 2)
    n = pts.shape[0]
    if n == 0:
        return TrackResult(np.zeros((0, 2)), np.zeros(0, bool), np.zeros(0))
    g0, g1 = to_gray(prev), to_gray(nxt)
    if g0.shape != g1.shape:
        raise ValueError("both images must have the same size")
    win = (int(window), int(window))
    fwd, st1, _ = cv2.calcOpticalFlowPyrLK(g0, g1, pts, None, winSize=win, maxLevel=int(levels),
                                           criteria=_CRITERIA)
    back, st2, _ = cv2.calcOpticalFlowPyrLK(g1, g0, fwd, None, winSize=win, maxLevel=int(levels),
                                            criteria=_CRITERIA)
    fwd = fwd.reshape(-1, 2).astype(float)
    fb = np.linalg.norm(back.reshape(-1, 2).astype(float) - pts.reshape(-1, 2), axis=1)
    h, w = g0.shape
    inside = ((fwd[:, 0] >= -0.5) & (fwd[:, 0] <= w - 0.5)
              & (fwd[:, 1] >= -0.5) & (fwd[:, 1] <= h - 0.5))
    ok = (st1.reshape(-1) == 1) & (st2.reshape(-1) == 1) & np.isfinite(fb) & (fb <= fb_max) & inside
    fb = np.where((st1.reshape(-1) == 1) & (st2.reshape(-1) == 1), fb, np.inf)
    out = fwd.copy()
    out[~ok] = np.nan
    return TrackResult(out, ok, fb)


def propagate_keypoints(start: np.ndarray, images: Iterable[np.ndarray], *,
                        keep: Callable[[int], bool] | None = None, window: int = WINDOW,
                        levels: int = LEVELS, fb_max: float = FB_MAX) -> Iterator[np.ndarray]:
    """Carry keypoints through a sequence of images with pyramidal Lucas-Kanade.

    ``start``: (K, 3) keypoints on the first image of ``images``. Yields, for
    every following image, the (K, 3) keypoints there: labelled points (v > 0)
    that track keep their visibility; a point whose track fails the
    forward-backward check is dropped (v = 0, position 0, 0) for that image and
    all later ones. ``keep(i)`` says whether image i (1-based, after the
    start) is wanted; unwanted images are still tracked through (so a
    sampled video can be carried across the frames between its samples) but
    yield nothing. Stops early once every point is lost.
    """
    kps = np.asarray(start, dtype=float).reshape(-1, 3).copy()
    alive = kps[:, 2] > 0
    it = iter(images)
    try:
        prev = to_gray(next(it))
    except StopIteration:
        return
    i = 0
    for img in it:
        i += 1
        cur = to_gray(img)
        if alive.any():
            idx = np.flatnonzero(alive)
            res = track_points(prev, cur, kps[idx, :2], window=window, levels=levels, fb_max=fb_max)
            kps[idx[res.ok], :2] = res.points[res.ok]
            lost = idx[~res.ok]
            alive[lost] = False
            kps[lost] = 0.0
        prev = cur
        if keep is None or keep(i):
            yield kps.copy()
        if not alive.any():
            return


def interpolate_keypoints(a: np.ndarray, b: np.ndarray, t: float) -> np.ndarray:
    """Linear interpolation between two labelled keyframes, at fraction ``t`` in [0, 1].

    A point is interpolated only where both keyframes label it (v > 0);
    elsewhere it is not labelled (0, 0, 0). Its visibility is that of the
    nearer keyframe. Linear in-betweening of keyframes is common practice,
    not a published method.
    """
    a = np.asarray(a, dtype=float).reshape(-1, 3)
    b = np.asarray(b, dtype=float).reshape(-1, 3)
    if a.shape != b.shape:
        raise ValueError("both keyframes need the same number of keypoints")
    t = float(t)
    if not 0.0 <= t <= 1.0:
        raise ValueError("t must be in [0, 1]")
    both = (a[:, 2] > 0) & (b[:, 2] > 0)
    out = np.zeros_like(a)
    out[both, :2] = (1.0 - t) * a[both, :2] + t * b[both, :2]
    out[both, 2] = a[both, 2] if t < 0.5 else b[both, 2]
    return out
