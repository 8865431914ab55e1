"""Video assist: pyramidal Lucas-Kanade tracking and keyframe interpolation.

The reference for tracking is a known shift: a textured picture is moved by a
sub-pixel translation with OpenCV's own cv2.warpAffine (bilinear), and the
tracked points must move by that shift within half a pixel.
"""
import cv2
import numpy as np
import pytest

from kinemark.core import propagate as prop


def texture(h=240, w=320, seed=0):
    """Smooth random texture: Lucas-Kanade needs gradients in every direction."""
    rng = np.random.default_rng(seed)
    img = rng.integers(0, 255, (h, w), dtype=np.uint8)
    img = cv2.GaussianBlur(img, (0, 0), 2.0)
    return cv2.normalize(img, None, 0, 255, cv2.NORM_MINMAX)


def shifted(img, dx, dy):
    m = np.float32([[1, 0, dx], [0, 1, dy]])
    return cv2.warpAffine(img, m, (img.shape[1], img.shape[0]), flags=cv2.INTER_LINEAR,
                          borderMode=cv2.BORDER_REFLECT)


POINTS = np.array([[80.0, 60.0], [160.0, 120.0], [240.5, 170.25], [100.0, 180.0], [200.0, 80.0]])


def test_track_points_recovers_a_known_subpixel_shift():
    a = texture()
    dx, dy = 3.4, -2.7
    b = shifted(a, dx, dy)
    res = prop.track_points(a, b, POINTS)
    assert res.ok.all()
    np.testing.assert_allclose(res.points - POINTS, np.tile([dx, dy], (len(POINTS), 1)), atol=0.5)
    assert np.all(res.fb_error < 0.5)


def test_propagate_keypoints_follows_a_translating_pattern_over_frames():
    a = texture(seed=1)
    step = (2.25, 1.5)
    frames = [shifted(a, step[0] * i, step[1] * i) for i in range(6)]
    start = np.zeros((len(POINTS) + 1, 3))
    start[:-1, :2] = POINTS
    start[:-1, 2] = [2, 1, 2, 2, 1]           # one extra point is not labelled (v=0)
    out = list(prop.propagate_keypoints(start, frames))
    assert len(out) == 5
    for i, kps in enumerate(out, start=1):
        np.testing.assert_allclose(kps[:-1, :2] - POINTS, np.tile([step[0] * i, step[1] * i], (5, 1)),
                                   atol=0.5)
        np.testing.assert_array_equal(kps[:, 2], start[:, 2])    # visibility carried, v=0 stays 0
        np.testing.assert_array_equal(kps[-1], [0, 0, 0])


def test_keep_skips_unsampled_frames_but_tracks_through_them():
    a = texture(seed=2)
    frames = [shifted(a, 1.5 * i, 0.0) for i in range(9)]
    start = np.column_stack([POINTS, np.full(len(POINTS), 2.0)])
    out = list(prop.propagate_keypoints(start, frames, keep=lambda i: i % 4 == 0))
    assert len(out) == 2                     # images 4 and 8
    np.testing.assert_allclose(out[0][:, 0] - POINTS[:, 0], 6.0, atol=0.5)
    np.testing.assert_allclose(out[1][:, 0] - POINTS[:, 0], 12.0, atol=0.5)


def test_forward_backward_check_drops_a_point_whose_patch_changes():
    a = texture(seed=3)
    b = shifted(a, 2.0, 1.0)
    # the patch around the second point is replaced by unrelated texture in the next image
    other = texture(seed=99)
    b[90:150, 130:190] = other[90:150, 130:190]
    res = prop.track_points(a, b, POINTS)
    assert not res.ok[1]
    assert np.isnan(res.points[1]).all()
    keep = [0, 2, 3, 4]
    assert res.ok[keep].all()
    np.testing.assert_allclose(res.points[keep] - POINTS[keep], np.tile([2.0, 1.0], (4, 1)), atol=0.5)


def test_lost_points_stay_lost_and_tracking_stops_when_all_are_lost():
    a = texture(seed=4)
    blank = np.zeros_like(a)                  # no texture at all: nothing can be tracked
    start = np.column_stack([POINTS, np.full(len(POINTS), 2.0)])
    out = list(prop.propagate_keypoints(start, [a, blank, a, a]))
    assert len(out) == 1
    assert (out[0][:, 2] == 0).all() and (out[0][:, :2] == 0).all()


def test_points_leaving_the_image_are_dropped():
    a = texture(seed=5)
    b = shifted(a, 20.0, 0.0)
    pts = np.array([[310.0, 100.0], [100.0, 100.0]])    # the first is pushed past the right edge
    res = prop.track_points(a, b, pts)
    assert not res.ok[0]
    assert res.ok[1]


def test_interpolation_is_linear_where_both_keyframes_label_the_point():
    a = np.array([[10.0, 20.0, 2], [0, 0, 0], [5.0, 5.0, 1]])
    b = np.array([[30.0, 60.0, 1], [7.0, 7.0, 2], [15.0, 25.0, 2]])
    mid = prop.interpolate_keypoints(a, b, 0.25)
    np.testing.assert_allclose(mid[0], [15.0, 30.0, 2])
    np.testing.assert_array_equal(mid[1], [0, 0, 0])          # missing at one end: not labelled
    np.testing.assert_allclose(mid[2], [7.5, 10.0, 1])
    np.testing.assert_allclose(prop.interpolate_keypoints(a, b, 0.75)[0], [25.0, 50.0, 1])
    np.testing.assert_allclose(prop.interpolate_keypoints(a, b, 0.0)[:, :2][[0, 2]], a[[0, 2], :2])
    with pytest.raises(ValueError):
        prop.interpolate_keypoints(a, b, 1.5)
