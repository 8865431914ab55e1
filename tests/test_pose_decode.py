"""Heatmap decoding: argmax, DARK sub-pixel refinement, multiple-peak entropy.

Ground truth here is analytic: heatmaps are sampled Gaussians whose centres
are chosen (known sub-pixel positions), the target form used to train
top-down heatmap models.
"""
import math

import numpy as np
import pytest

from kinemark.core.pose.decode import (
    argmax_decode, dark_decode, multipeak_entropy, opencv_kernel_sigma, quarter_offset_decode)


def gaussian(cx, cy, h=64, w=48, sigma=2.0, amp=1.0):
    yy, xx = np.mgrid[0:h, 0:w]
    return amp * np.exp(-((xx - cx) ** 2 + (yy - cy) ** 2) / (2 * sigma ** 2))


def centres(n, seed, h=64, w=48, pad=8):
    rng = np.random.default_rng(seed)
    return np.column_stack([rng.uniform(pad, w - 1 - pad, n), rng.uniform(pad, h - 1 - pad, n)])


# -- argmax -----------------------------------------------------------------

def test_argmax_finds_integer_peak_as_x_y():
    hm = np.zeros((2, 10, 7))
    hm[0, 6, 2] = 0.8   # row 6, column 2 -> (x, y) = (2, 6)
    hm[1, 1, 5] = 0.3
    coords, maxvals = argmax_decode(hm)
    assert coords.dtype.kind == "i"
    assert coords.tolist() == [[2, 6], [5, 1]]
    np.testing.assert_allclose(maxvals, [0.8, 0.3])


def test_argmax_ignores_nan():
    hm = gaussian(20.0, 30.0)[None].copy()
    hm[0, 5, 5] = np.nan
    hm[0, 6, 6] = np.inf
    coords, maxvals = argmax_decode(hm)
    assert coords.tolist() == [[20, 30]]
    assert maxvals[0] == pytest.approx(1.0)


def test_argmax_error_reaches_half_a_cell():
    # Plain argmax quantises to the grid: the error is up to 0.5 cell per axis.
    c = centres(400, seed=1)
    hm = np.stack([gaussian(x, y) for x, y in c])
    coords, _ = argmax_decode(hm)
    err = np.abs(coords - c)
    assert err.max() <= 0.5 + 1e-9
    assert err.max() > 0.45


# -- DARK -------------------------------------------------------------------
# Method: Zhang, Zhu, Dai, Ye, Zhu, CVPR 2020, "Distribution-Aware Coordinate
# Representation for Human Pose Estimation". For a Gaussian heatmap the log is
# a quadratic, so one Newton step recovers the centre to far below a cell.

def test_dark_recovers_known_subpixel_centre():
    cx, cy = 12.37, 20.81
    hm = gaussian(cx, cy)[None]
    r = dark_decode(hm, sigma=2.0)
    assert r.refined[0] and not r.no_peak[0]
    assert abs(r.coords[0, 0] - cx) <= 0.05
    assert abs(r.coords[0, 1] - cy) <= 0.05
    a, _ = argmax_decode(hm)
    # argmax is off by the sub-cell part of the centre: 0.37 and 0.19 here
    assert abs(a[0, 0] - cx) == pytest.approx(0.37)
    assert abs(a[0, 1] - cy) == pytest.approx(0.19)


def test_dark_beats_argmax_and_quarter_offset_on_many_centres():
    c = centres(300, seed=2)
    hm = np.stack([gaussian(x, y) for x, y in c])
    dark = dark_decode(hm, sigma=2.0).coords
    arg, _ = argmax_decode(hm)
    quarter, _ = quarter_offset_decode(hm)  # common practice in earlier top-down code
    e_dark = np.linalg.norm(dark - c, axis=1)
    e_arg = np.linalg.norm(arg - c, axis=1)
    e_quarter = np.linalg.norm(quarter - c, axis=1)
    assert e_dark.max() <= 0.05
    assert e_arg.max() > 0.4
    assert e_quarter.mean() > 5 * e_dark.mean()
    assert e_quarter.max() > 0.1
    assert e_quarter.mean() < e_arg.mean()  # the heuristic does help over plain argmax


def test_dark_with_kernel_instead_of_sigma():
    # OpenCV's rule gives sigma 2.0 for an 11-cell kernel (getGaussianKernel docs).
    assert opencv_kernel_sigma(11) == pytest.approx(2.0)
    c = centres(50, seed=3)
    hm = np.stack([gaussian(x, y) for x, y in c])
    r = dark_decode(hm, kernel=11)
    assert np.abs(r.coords - c).max() <= 0.05


def test_dark_on_a_wider_training_gaussian_and_scaled_amplitude():
    c = centres(50, seed=4, pad=10)
    hm = np.stack([gaussian(x, y, sigma=3.0, amp=0.37) for x, y in c])
    r = dark_decode(hm, sigma=3.0)
    assert np.abs(r.coords - c).max() <= 0.05
    np.testing.assert_allclose(r.maxvals, hm.reshape(len(c), -1).max(axis=1))


def test_dark_is_robust_to_noise():
    # not exact any more, but still better than argmax on average
    rng = np.random.default_rng(5)
    c = centres(200, seed=6)
    hm = np.stack([gaussian(x, y) for x, y in c]) + rng.normal(0, 0.02, (200, 64, 48))
    e_dark = np.linalg.norm(dark_decode(hm, sigma=2.0).coords - c, axis=1)
    e_arg = np.linalg.norm(argmax_decode(hm)[0] - c, axis=1)
    assert e_dark.mean() < 0.5 * e_arg.mean()


def test_dark_flat_and_zero_heatmaps_return_argmax_flagged():
    hm = np.stack([np.zeros((16, 16)), np.full((16, 16), 0.4), -np.ones((16, 16))])
    r = dark_decode(hm)
    assert r.no_peak.tolist() == [True, True, True]
    assert not r.refined.any()
    assert np.isfinite(r.coords).all()
    np.testing.assert_array_equal(r.coords, argmax_decode(hm)[0])


def test_dark_nan_safe():
    hm = gaussian(20.3, 30.6)[None].copy()
    hm[0, 0:3, 0:3] = np.nan
    hm[0, 30, 40] = -np.inf
    r = dark_decode(hm, sigma=2.0)
    assert np.isfinite(r.coords).all()
    assert np.abs(r.coords[0] - [20.3, 30.6]).max() <= 0.05
    allnan = np.full((1, 8, 8), np.nan)
    r = dark_decode(allnan)
    assert r.no_peak[0] and np.isfinite(r.coords).all() and r.maxvals[0] == 0.0


def test_dark_border_peak_refines_along_the_free_axis_only():
    hm = gaussian(0.0, 20.4)[None]   # peak on the left border column
    r = dark_decode(hm, sigma=2.0)
    assert r.refined[0]
    assert r.coords[0, 0] == 0.0
    assert abs(r.coords[0, 1] - 20.4) <= 0.05
    corner = gaussian(0.0, 0.0)[None]
    r = dark_decode(corner, sigma=2.0)
    assert not r.refined[0]
    assert r.coords[0].tolist() == [0.0, 0.0]


def test_dark_near_border_bias_shrinks_with_distance():
    # Within ~2 sigma of the edge the blur sees the (zero) padding and pulls
    # the estimate inwards; the bias must shrink with distance from the edge
    # and vanish (interior accuracy) from about 2 sigma on.
    xs = (1.2, 1.7, 2.4, 3.1, 4.0, 5.0)
    err = [dark_decode(gaussian(x, 30.0)[None], sigma=2.0).coords[0, 0] - x for x in xs]
    assert all(abs(e) < 0.5 for e in err)
    assert all(abs(a) > abs(b) for a, b in zip(err, err[1:]))
    assert abs(err[-2]) <= 0.05 and abs(err[-1]) <= 0.05


# -- multiple-peak entropy --------------------------------------------------
# Method: Liu & Ferrari, ICCV 2017, "Active Learning for Human Pose Estimation".
# Shannon entropy in nats: a fair two-outcome distribution has ln 2 (handbook value).

def test_entropy_single_peak_is_zero():
    hm = gaussian(20.3, 30.1)[None]
    assert multipeak_entropy(hm)[0] == 0.0


def test_entropy_two_equal_peaks_is_ln2():
    hm = (gaussian(10.0, 12.0) + gaussian(35.0, 50.0))[None]
    assert multipeak_entropy(hm)[0] == pytest.approx(math.log(2), abs=1e-6)


def test_entropy_three_equal_peaks_is_ln3():
    hm = (gaussian(10.0, 12.0) + gaussian(35.0, 50.0) + gaussian(35.0, 12.0))[None]
    assert multipeak_entropy(hm)[0] == pytest.approx(math.log(3), abs=1e-6)


def test_entropy_matches_shannon_of_peak_values_and_orders_dominance():
    a, b = 1.0, 0.4
    hm = np.stack([
        gaussian(10.0, 12.0, amp=a),
        gaussian(10.0, 12.0, amp=a) + gaussian(35.0, 50.0, amp=b),
        gaussian(10.0, 12.0, amp=a) + gaussian(35.0, 50.0, amp=a),
    ])
    e = multipeak_entropy(hm)
    p = np.array([a, b]) / (a + b)
    assert e[1] == pytest.approx(-(p * np.log(p)).sum(), abs=1e-6)
    assert e[0] < e[1] < e[2]


def test_entropy_threshold_drops_small_peaks():
    hm = (gaussian(10.0, 12.0) + gaussian(35.0, 50.0, amp=0.05))[None]
    assert multipeak_entropy(hm, threshold_ratio=0.1)[0] == 0.0
    assert multipeak_entropy(hm, threshold_ratio=0.01)[0] > 0.0


def test_entropy_plateau_counts_once_and_flat_is_nan():
    hm = np.zeros((2, 16, 16))
    hm[0, 5, 5] = hm[0, 5, 6] = 1.0     # two adjacent equal cells: one peak
    hm[1, :, :] = 0.5                    # flat: no peak distribution
    e = multipeak_entropy(hm)
    assert e[0] == 0.0
    assert np.isnan(e[1])


def test_entropy_window_separates_close_peaks():
    # two peaks 2 cells apart on a noiseless map: a 3x3 window sees both,
    # a 7x7 window keeps only the larger
    hm = np.zeros((1, 16, 16))
    hm[0, 8, 6] = 1.0
    hm[0, 8, 8] = 0.9
    p = np.array([1.0, 0.9]) / 1.9
    assert multipeak_entropy(hm, window=3)[0] == pytest.approx(-(p * np.log(p)).sum())
    assert multipeak_entropy(hm, window=7)[0] == 0.0


def test_entropy_zero_heatmap_is_nan_and_nan_values_are_ignored():
    hm = np.zeros((2, 16, 16))
    hm[1] = gaussian(7.0, 7.0, 16, 16)
    hm[1, 0, 0] = np.nan
    e = multipeak_entropy(hm)
    assert np.isnan(e[0])
    assert e[1] == 0.0


def _entropy_per_channel_opencv(hm, threshold_ratio=0.1, window=3):
    """The same definition computed channel by channel with OpenCV's own operators
    (cv2.dilate for the local maxima, cv2.connectedComponents for plateaus), as the
    reference for the vectorised version."""
    import cv2
    out = np.full(hm.shape[0], np.nan)
    kern = np.ones((window, window), np.uint8)
    for i, ch in enumerate(hm.astype(np.float32)):
        top = float(ch.max())
        if top <= 0 or top - float(ch.min()) <= 1e-12 * max(1.0, abs(top)):
            continue
        mask = (ch >= cv2.dilate(ch, kern)) & (ch > threshold_ratio * top)
        nlab, labels = cv2.connectedComponents(mask.astype(np.uint8), connectivity=8)
        if nlab <= 1:
            continue
        vals = np.zeros(nlab)
        np.maximum.at(vals, labels[mask], ch[mask].astype(np.float64))
        p = vals[1:] / vals[1:].sum()
        p = p[p > 0]
        out[i] = -(p * np.log(p)).sum()
    return out


@pytest.mark.parametrize("window", [1, 3, 5])
def test_entropy_matches_opencv_channel_by_channel(window):
    rng = np.random.default_rng(window)
    hm = rng.uniform(-0.2, 1.0, size=(24, 20, 17))
    hm[3] = 0.0                                   # no peak
    hm[4] = np.round(hm[4], 1)                    # many ties: plateaus
    hm[5, :, :] = 0.0
    hm[5, 2:4, 2:4] = 1.0                         # a 2x2 plateau
    hm[6, 0, :] = 1.0                             # a plateau along the edge
    hm[7] = np.clip(hm[7], None, 0.0)             # nothing positive
    got = multipeak_entropy(hm, window=window)
    want = _entropy_per_channel_opencv(hm, window=window)
    np.testing.assert_array_equal(np.isnan(got), np.isnan(want))
    ok = ~np.isnan(want)
    np.testing.assert_allclose(got[ok], want[ok], rtol=1e-9, atol=1e-12)


def _dark_whole_map(hm, kernel=11):
    """DARK as the paper describes it, step by step on whole maps (one channel at a time):
    blur, rescale to the original maximum, floor and log, then one Newton step at the
    argmax. The reference for the faster dark_decode, which only evaluates the cells the
    Newton step reads."""
    import cv2
    from kinemark.core.pose.decode import opencv_kernel_sigma
    hm = np.asarray(hm, np.float64)
    sig = opencv_kernel_sigma(kernel)
    out = []
    for ch in hm:
        h, w = ch.shape
        y, x = np.unravel_index(np.argmax(ch), ch.shape)
        if ch.max() <= 0 or ch.max() - ch.min() <= 1e-12 * max(1.0, abs(ch.max())):
            out.append((x, y)); continue
        b = cv2.GaussianBlur(ch, (kernel, kernel), sig, sigmaY=sig, borderType=cv2.BORDER_CONSTANT)
        b = b * (ch.max() / b.max()) if b.max() > 0 else b * 0
        lg = np.log(np.maximum(b, 1e-10))
        at = lambda yy, xx: lg[min(max(yy, 0), h - 1), min(max(xx, 0), w - 1)]  # noqa: E731
        dx, dy = 0.5 * (at(y, x + 1) - at(y, x - 1)), 0.5 * (at(y + 1, x) - at(y - 1, x))
        dxx = at(y, x + 1) - 2 * at(y, x) + at(y, x - 1)
        dyy = at(y + 1, x) - 2 * at(y, x) + at(y - 1, x)
        dxy = 0.25 * (at(y + 1, x + 1) - at(y - 1, x + 1) - at(y + 1, x - 1) + at(y - 1, x - 1))
        ix, iy = 0 < x < w - 1, 0 < y < h - 1
        off = np.zeros(2)
        if ix and iy and dxx < 0 and dxx * dyy - dxy * dxy > 0:
            det = dxx * dyy - dxy * dxy
            off = np.array([-(dyy * dx - dxy * dy) / det, -(-dxy * dx + dxx * dy) / det])
        elif ix and not iy and dxx < 0:
            off[0] = -dx / dxx
        elif iy and not ix and dyy < 0:
            off[1] = -dy / dyy
        if not (np.isfinite(off).all() and (np.abs(off) <= 1).all()):
            off = np.zeros(2)
        out.append((x + off[0], y + off[1]))
    return np.array(out, float)


def test_dark_matches_the_whole_map_computation():
    rng = np.random.default_rng(11)
    yy, xx = np.mgrid[0:64, 0:48]
    maps = [rng.random((64, 48)), rng.random((64, 48)).astype(np.float32)]
    for cx, cy in [(10.3, 20.7), (0.4, 30.2), (47.0, 63.0), (23.5, 0.0), (5.2, 5.9)]:
        g = np.exp(-((xx - cx) ** 2 + (yy - cy) ** 2) / (2 * 2.0 ** 2))
        maps.append(g)
        maps.append(g * 0.3 + 0.05 * rng.random(g.shape))
    sparse = np.zeros((64, 48))
    sparse[30, 20], sparse[31, 21] = 1.0, 1e-14
    maps.append(sparse)
    faint = np.zeros((64, 48))
    faint[12, 9], faint[13, 9] = 1e-11, 4e-12           # blurred values under the log's floor
    maps.append(faint)
    maps.append(np.zeros((64, 48)))                   # flat: argmax, flagged
    hm = np.stack(maps)
    got = dark_decode(hm).coords
    ref = _dark_whole_map(hm)
    assert np.allclose(got, ref, atol=1e-9)
    # float32 input decodes like its exact float64 copy
    assert np.allclose(dark_decode(hm.astype(np.float32)).coords,
                       dark_decode(hm.astype(np.float32).astype(np.float64)).coords, atol=1e-9)
