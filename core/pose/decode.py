"""Heatmap decoding: peak coordinates, sub-pixel refinement, multiple-peak entropy.

All functions take heatmaps shaped (K, H, W), one channel per keypoint, and
return coordinates in *heatmap cell* units as (x, y) = (column, row), with
cell centres at integer coordinates. Converting cells to model-input pixels
(stride, pixel-centre convention) is the caller's job.

Non-finite values (NaN, +-inf) in a channel are treated as the lowest finite
value of that channel (0 if the channel has none), so a NaN never becomes a
peak and never propagates into coordinates.
"""
from __future__ import annotations

import functools
from typing import NamedTuple

import cv2
import numpy as np

_LOG_EPS = 1e-10  # floor before taking the log (DARK step 2)


def _check_shape(hm: np.ndarray) -> np.ndarray:
    if hm.ndim != 3:
        raise ValueError(f"heatmaps must be shaped (K, H, W), got {hm.shape}")
    if hm.shape[1] < 1 or hm.shape[2] < 1:
        raise ValueError(f"heatmaps have an empty spatial size {hm.shape[1:]}")
    return hm


def _as_heatmaps(heatmaps) -> np.ndarray:
    """(K, H, W) float32 or float64 as given (no copy); other types as float64."""
    hm = _check_shape(np.asarray(heatmaps))
    return hm if hm.dtype in (np.float32, np.float64) else hm.astype(np.float64)


def _finite(hm: np.ndarray) -> np.ndarray:
    """Replace non-finite values by the channel's lowest finite value (0 if none)."""
    ok = np.isfinite(hm)
    if ok.all():
        return hm
    k = hm.shape[0]
    lows = np.zeros(k)
    for i in range(k):
        vals = hm[i][ok[i]]
        lows[i] = vals.min() if vals.size else 0.0
    return np.where(ok, hm, lows[:, None, None])


def argmax_decode(heatmaps: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Integer peak of each channel (plain argmax decoding).

    The baseline decoding of heatmap regression as in Tompson, Jain, LeCun,
    Bregler, NIPS 2014, "Joint Training of a Convolutional Network and a
    Graphical Model for Human Pose Estimation": the keypoint is the cell of
    the maximum response. Ties go to the first cell in row-major order.

    Returns ``(coords, maxvals)``: coords (K, 2) int64 as (x, y) cell indices,
    maxvals (K,) float64, the heatmap value at that cell (NaN-safe, see the
    module docstring).
    """
    return _argmax(_finite(_as_heatmaps(heatmaps)))


def _argmax(hm: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    k, h, w = hm.shape
    flat = hm.reshape(k, h * w)
    idx = np.argmax(flat, axis=1)
    maxvals = flat[np.arange(k), idx].astype(np.float64)
    coords = np.stack([idx % w, idx // w], axis=1).astype(np.int64)
    return coords, maxvals


def quarter_offset_decode(heatmaps: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Argmax plus a quarter-cell shift towards the higher neighbour.

    Common practice in earlier top-down pose code, not a published method of
    its own (from memory: the released code of stacked-hourglass and
    simple-baseline style models shifts the argmax by 0.25 cell towards the
    larger of the two neighbours along each axis). Kept here only as a
    baseline to compare :func:`dark_decode` against in tests and benchmarks.

    Returns ``(coords, maxvals)`` with coords (K, 2) float64 (x, y).
    """
    hm = _finite(_as_heatmaps(heatmaps))
    k, h, w = hm.shape
    ci, maxvals = _argmax(hm)
    coords = ci.astype(np.float64)
    ks = np.arange(k)
    x, y = ci[:, 0], ci[:, 1]
    inx = (x > 0) & (x < w - 1)
    iny = (y > 0) & (y < h - 1)
    xl, xr = np.clip(x - 1, 0, w - 1), np.clip(x + 1, 0, w - 1)
    yu, yd = np.clip(y - 1, 0, h - 1), np.clip(y + 1, 0, h - 1)
    dx = np.sign(hm[ks, y, xr] - hm[ks, y, xl])
    dy = np.sign(hm[ks, yd, x] - hm[ks, yu, x])
    coords[:, 0] += np.where(inx, 0.25 * dx, 0.0)
    coords[:, 1] += np.where(iny, 0.25 * dy, 0.0)
    return coords, maxvals


class DarkResult(NamedTuple):
    """Result of :func:`dark_decode` (unpacks like a tuple)."""

    coords: np.ndarray    # (K, 2) float64 (x, y) in heatmap cells
    maxvals: np.ndarray   # (K,) float64 maximum of the *input* heatmap
    refined: np.ndarray   # (K,) bool: a Newton step was applied on at least one axis
    no_peak: np.ndarray   # (K,) bool: flat, all-zero or all-negative channel (low confidence)


def opencv_kernel_sigma(kernel: int) -> float:
    """The Gaussian sigma OpenCV derives from a kernel size when sigma is 0.

    Source: OpenCV documentation of ``getGaussianKernel``:
    sigma = 0.3 * ((ksize - 1) * 0.5 - 1) + 0.8. For ksize 11 this is 2.0.
    """
    return 0.3 * ((kernel - 1) * 0.5 - 1) + 0.8


def kernel_for_sigma(sigma: float) -> int:
    """Odd kernel size covering +-3 sigma (a project choice)."""
    return int(2 * np.ceil(3.0 * sigma) + 1)


def dark_decode(heatmaps: np.ndarray, kernel: int = 11, *,
                sigma: float | None = None, transform=None) -> DarkResult:
    """Sub-pixel keypoints by distribution-aware refinement (DARK).

    Method: Zhang, Zhu, Dai, Ye, Zhu, CVPR 2020, "Distribution-Aware
    Coordinate Representation for Human Pose Estimation":

    1. Distribution modulation: blur each channel with a Gaussian of the same
       width as the training target's, then rescale it so its maximum equals
       the original maximum.
    2. Take the log (values floored at a tiny positive number), which turns a
       Gaussian peak into a quadratic.
    3. One Newton step from the integer argmax m: mu = m - H^-1 D, where the
       gradient D and Hessian H come from central finite differences of the
       log-heatmap at m.

    ``kernel`` is the blur kernel size (odd); ``sigma`` the training
    Gaussian's standard deviation in heatmap cells. If ``sigma`` is given the
    kernel covers +-3 sigma; if not, sigma follows from ``kernel`` by
    OpenCV's rule (:func:`opencv_kernel_sigma`; 11 -> 2.0).

    Safeguards (project choices, not in the paper): the blur pads the
    heatmap with zeros (no response outside the map), which biases a peak
    near the border far less than a mirrored border does (measured on
    sigma-2 Gaussians: a centre 1.2 cells from the edge comes out ~0.47 cell
    too far inside, 3 cells from the edge ~0.04); a peak on the heatmap's
    border is refined only along the axis where both neighbours exist (1-D
    Newton step); if the Hessian is not negative definite, or the step is
    longer than one cell or not finite, the argmax is kept. A channel that is
    flat, all zero or has no positive value returns its argmax with
    ``no_peak`` set, which callers should treat as no confidence.

    ``transform``: an elementwise, strictly increasing function (say a
    sigmoid, for a model that outputs logits) that makes the heatmap. The
    result is that of decoding ``transform(heatmaps)``, but only the values
    the decoding reads are transformed (the argmax is the same either way);
    ``maxvals`` are then transformed values.
    """
    hm = _finite(_as_heatmaps(heatmaps))
    k, h, w = hm.shape
    ci, maxvals = _argmax(hm)
    coords = ci.astype(np.float64)
    refined = np.zeros(k, dtype=bool)
    mins = hm.reshape(k, -1).min(axis=1).astype(np.float64)
    if transform is not None:
        maxvals, mins = np.asarray(transform(maxvals), np.float64), np.asarray(transform(mins), np.float64)
    no_peak = (maxvals <= 0) | (maxvals - mins <= 1e-12 * np.maximum(1.0, np.abs(maxvals)))
    todo = np.flatnonzero(~no_peak)
    if todo.size == 0:
        return DarkResult(coords, maxvals, refined, no_peak)

    if sigma is None:
        if kernel < 1 or kernel % 2 == 0:
            raise ValueError(f"kernel must be a positive odd integer, got {kernel}")
        sig = opencv_kernel_sigma(kernel)
        ksize = kernel
    else:
        if not (np.isfinite(sigma) and sigma > 0):
            raise ValueError(f"sigma must be positive, got {sigma}")
        sig = float(sigma)
        ksize = kernel_for_sigma(sig)

    # Steps 1-3 need the modulated log-heatmap only at the 3 x 3 cells around each argmax.
    # The modulation's rescaling adds the same log(scale) to all of them, which the finite
    # differences cancel, so those 9 blurred values are computed directly (the same kernel
    # as cv2.GaussianBlur, zero border). Only a channel where one of them falls under the
    # log's floor needs the whole blurred map and its maximum (scale >= 1, so the floor on
    # the rescaled map is then reached exactly as on the whole-map computation).
    x, y = ci[todo, 0], ci[todo, 1]
    b9 = _blur_around(hm, x, y, sig, ksize, transform, channels=todo)
    low = (b9 < _LOG_EPS).any(axis=(1, 2))
    if low.any():
        whole = hm[todo[low]].astype(np.float64)
        if transform is not None:
            whole = np.asarray(transform(whole), np.float64)
        full = _unstacked(cv2.GaussianBlur(_stacked(whole, ksize // 2 + 1, 0.0), (ksize, ksize), sig,
                                           sigmaY=sig, borderType=cv2.BORDER_CONSTANT), whole.shape)
        bmax = full.reshape(full.shape[0], -1).max(axis=1)
        scale = np.where(bmax > 0, maxvals[todo][low] / np.where(bmax > 0, bmax, 1.0), 0.0)
        b9[low] = _gather_3x3(full, x[low], y[low]) * scale[:, None, None]
    lg = np.log(np.maximum(b9, _LOG_EPS))     # lg[:, 1 + dy, 1 + dx]
    inx = (x > 0) & (x < w - 1)
    iny = (y > 0) & (y < h - 1)
    c0 = lg[:, 1, 1]
    l_r, l_l, l_d, l_u = lg[:, 1, 2], lg[:, 1, 0], lg[:, 2, 1], lg[:, 0, 1]
    dx = 0.5 * (l_r - l_l)
    dy = 0.5 * (l_d - l_u)
    dxx = l_r - 2 * c0 + l_l
    dyy = l_d - 2 * c0 + l_u
    dxy = 0.25 * (lg[:, 2, 2] - lg[:, 0, 2] - lg[:, 2, 0] + lg[:, 0, 0])

    off = np.zeros((todo.size, 2))
    ok = np.zeros(todo.size, dtype=bool)
    with np.errstate(divide="ignore", invalid="ignore"):
        # both axes interior: full 2-D step, H negative definite
        both = inx & iny
        det = dxx * dyy - dxy * dxy
        nd = both & (dxx < 0) & (det > 0)
        ox = -(dyy * dx - dxy * dy) / det
        oy = -(-dxy * dx + dxx * dy) / det
        off[nd, 0], off[nd, 1] = ox[nd], oy[nd]
        ok |= nd
        # only one axis interior: 1-D step along it
        onlyx = inx & ~iny & (dxx < 0)
        off[onlyx, 0] = -dx[onlyx] / dxx[onlyx]
        ok |= onlyx
        onlyy = iny & ~inx & (dyy < 0)
        off[onlyy, 1] = -dy[onlyy] / dyy[onlyy]
        ok |= onlyy
    ok &= np.isfinite(off).all(axis=1) & (np.abs(off) <= 1.0).all(axis=1)
    off[~ok] = 0.0
    coords[todo] += off
    refined[todo] = ok
    return DarkResult(coords, maxvals, refined, no_peak)


def _blur_around(hm: np.ndarray, x: np.ndarray, y: np.ndarray, sigma: float, ksize: int,
                 transform=None, channels=None) -> np.ndarray:
    """(C, 3, 3): channels ``channels`` of ``hm`` (default all; ``transform``-ed, if given)
    Gaussian-blurred (``ksize``, ``sigma``; zero outside the map, as cv2.GaussianBlur with
    BORDER_CONSTANT) at the 3 x 3 cells around (x, y); cells outside the map included."""
    _, h, w = hm.shape
    chans = np.arange(hm.shape[0]) if channels is None else np.asarray(channels)
    half = ksize // 2
    band = _blur_band(ksize, float(sigma))
    offs = np.arange(-1 - half, 2 + half)
    rows, cols = y[:, None] + offs, x[:, None] + offs            # (K, 3 + 2h) each
    inside = (((rows >= 0) & (rows < h))[:, :, None]) & (((cols >= 0) & (cols < w))[:, None, :])
    patch = hm[chans[:, None, None], np.clip(rows, 0, h - 1)[:, :, None],
               np.clip(cols, 0, w - 1)[:, None, :]]
    patch = patch.astype(np.float64)
    if transform is not None:
        patch = np.asarray(transform(patch), np.float64)
    patch = np.where(inside, patch, 0.0)                                  # (K, 3 + 2h, 3 + 2h)
    # the separable blur at the 3 centre cells as two small matrix products
    return band.T @ (patch @ band)                                        # (K, 3, 3)


@functools.lru_cache(maxsize=8)
def _blur_band(ksize: int, sigma: float) -> np.ndarray:
    """(ksize + 2, 3) banded matrix of GaussianBlur's own 1-D kernel g: band[i, j] = g[i - j],
    so (patch @ band)[..., j] = sum_t patch[..., j + t] g[t], the blur at centre cell j."""
    g = cv2.getGaussianKernel(ksize, sigma, cv2.CV_64F).ravel()
    i, j = np.mgrid[0:ksize + 2, 0:3]
    band = np.where((i - j >= 0) & (i - j < ksize), g[np.clip(i - j, 0, ksize - 1)], 0.0)
    band.flags.writeable = False
    return band


def _gather_3x3(maps: np.ndarray, x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """(K, 3, 3) values of ``maps`` around (x, y), positions outside the map clipped to it."""
    k, h, w = maps.shape
    rows = np.clip(y[:, None] + np.arange(-1, 2), 0, h - 1)[:, :, None]
    cols = np.clip(x[:, None] + np.arange(-1, 2), 0, w - 1)[:, None, :]
    return maps[np.arange(k)[:, None, None], rows, cols]


def multipeak_entropy(heatmaps: np.ndarray, *, threshold_ratio: float = 0.1,
                      window: int = 3) -> np.ndarray:
    """(K,) Shannon entropy (nats) of each channel's multiple-peak distribution.

    Method: Liu & Ferrari, ICCV 2017, "Active Learning for Human Pose
    Estimation" (multiple peak entropy): find the local maxima of the
    heatmap, normalise their values into a probability distribution and take
    its Shannon entropy. One clean peak gives 0; n equal peaks give ln n.

    Local maxima: cells equal to the maximum over a ``window`` x ``window``
    neighbourhood (a grey-scale dilation, ``cv2.dilate``) and strictly above
    ``threshold_ratio`` times the channel's maximum. A plateau of equal
    neighbouring maxima counts as one peak (8-connected cells merged; a
    project choice so that ties between adjacent cells do not fake a second
    peak). A channel that has no positive value or is flat has no peak
    distribution and gets NaN.
    """
    if window < 1 or window % 2 == 0:
        raise ValueError(f"window must be a positive odd integer, got {window}")
    if not 0 <= threshold_ratio < 1:
        raise ValueError(f"threshold_ratio must be in [0, 1), got {threshold_ratio}")
    hm = _check_shape(np.asarray(heatmaps))
    if hm.dtype != np.float32 or not np.isfinite(hm).all():
        hm = _finite(_as_heatmaps(hm)).astype(np.float32)
    k = hm.shape[0]
    out = np.full(k, np.nan)
    if k == 0:
        return out
    top = hm.max(axis=(1, 2))
    low = hm.min(axis=(1, 2))
    has_peaks = (top > 0) & (top - low > 1e-12 * np.maximum(1.0, np.abs(top)))
    if not has_peaks.any():
        return out
    # all channels at once: a window x window maximum filter, cells outside the map ignored
    # (the same neighbourhood maximum as cv2.dilate with its default border)
    dil = _max_filter(hm, window)
    mask = (hm >= dil) & (hm > (threshold_ratio * top)[:, None, None]) & has_peaks[:, None, None]
    # a peak cell with another peak cell beside it is part of a plateau; only those
    # channels need the (slower) connected-component merge
    plateau = (mask & _has_marked_neighbour(mask)).any(axis=(1, 2))
    simple = has_peaks & ~plateau
    if simple.any():
        cells = np.flatnonzero(mask & simple[:, None, None])
        chan = cells // (hm.shape[1] * hm.shape[2])   # channel of each peak cell
        vals = hm.reshape(-1)[cells].astype(np.float64)   # every peak is > 0 here
        p = vals / np.bincount(chan, weights=vals, minlength=k)[chan]
        ent = -np.bincount(chan, weights=p * np.log(p), minlength=k)
        out[simple] = ent[simple] + 0.0           # + 0.0 turns -0.0 into 0.0
    for i in np.flatnonzero(plateau):
        ch = hm[i]
        nlab, labels = cv2.connectedComponents(mask[i].astype(np.uint8), connectivity=8)
        if nlab <= 1:
            continue
        vals = np.zeros(nlab)
        np.maximum.at(vals, labels[mask[i]], ch[mask[i]].astype(np.float64))
        p = vals[1:]
        p = p / p.sum()
        p = p[p > 0]
        out[i] = float(-(p * np.log(p)).sum()) + 0.0
    return out


def _stacked(a: np.ndarray, gap: int, fill):
    """The K channels one above the other in one 2-D image, ``gap`` rows of ``fill`` between
    them, so one OpenCV call filters them all without one channel reaching into the next."""
    k, h, w = a.shape
    buf = np.full((k, h + gap, w), fill, dtype=a.dtype)
    buf[:, :h] = a
    return buf.reshape(k * (h + gap), w)


def _unstacked(img: np.ndarray, shape) -> np.ndarray:
    k, h, w = shape
    return img.reshape(k, -1, w)[:, :h]


def _max_filter(a: np.ndarray, window: int) -> np.ndarray:
    """(K, H, W) float32: maximum over each cell's window x window neighbourhood inside its
    own channel (cv2.dilate, whose default border ignores cells outside the image)."""
    half = window // 2
    if half == 0:
        return a.copy()
    img = _stacked(a, half, -np.inf)
    return _unstacked(cv2.dilate(img, np.ones((window, window), np.uint8)), a.shape)


_NEIGHBOURS = np.array([[1, 1, 1], [1, 0, 1], [1, 1, 1]], np.float32)


def _has_marked_neighbour(mask: np.ndarray) -> np.ndarray:
    """(K, H, W) bool: the cell has a True cell among its 8 neighbours (not itself)."""
    img = _stacked(mask.view(np.uint8), 1, 0)
    count = cv2.filter2D(img, -1, _NEIGHBOURS, borderType=cv2.BORDER_CONSTANT)
    return _unstacked(count, mask.shape) > 0
