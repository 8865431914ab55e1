"""A person's box for the model (Shift+drag on the picture, or Shift+M around placed points):
the model looks at that region and the frame's untouched pre-fill follows it. Checked in the
store and in the region the stand-in model was given, not only in messages."""
from __future__ import annotations

import numpy as np
import pytest
from PySide6.QtCore import QPoint, QPointF, Qt
from PySide6.QtTest import QTest

from kinemark.core.model import PREFILLED
from kinemark.core.pose.base import PoseResult

from .conftest import open_window
from .test_assist_audit import StandInModel, _wait
from .test_workspace import _key, _vp


class BoxStandIn(StandInModel):
    """The stand-in model, keeping each region it was given; from a region, its pose sits at
    the region's centre (so the stored points tell a boxed proposal from the first one)."""

    model_hash = "6" * 64

    def __init__(self):
        super().__init__()
        self.regions = []

    def predict(self, img, region=None, *, previous=None):
        res = super().predict(img, region, previous=previous)
        self.regions.append(region)
        if region is None:
            return res
        k = res.keypoints.copy()
        k[:, 0] = region.cx + np.linspace(-10, 10, 17)
        k[:, 1] = region.cy + np.linspace(-30, 30, 17)
        return PoseResult(k, res.confidence, res.signals, region, 0.9, None)


@pytest.fixture
def box_model(monkeypatch):
    import kinemark.core.pose as pose
    m = BoxStandIn()
    monkeypatch.setattr(pose, "load_adapter", lambda project, **kw: m)
    return m


def test_shift_drag_asks_the_model_about_the_boxed_person(qtbot, clip_project, settings, box_model):
    from kinemark.core.prefill import BOX_MARGIN
    w = open_window(qtbot, clip_project.root, settings)
    _wait(qtbot, w)                                   # the first pre-fill, with no box
    fid = w.order[1]
    w.go(fid)
    assert w.working.state == PREFILLED
    before = np.array(w.working.keypoints)
    box_model.regions.clear()
    c, vp = w.canvas, w.canvas.viewport()
    start, end = _vp(c, (200.0, 40.0)), _vp(c, (280.0, 160.0))
    QTest.mousePress(vp, Qt.LeftButton, Qt.ShiftModifier, start)
    for t in (0.3, 0.6, 1.0):
        QTest.mouseMove(vp, start + (end - start) * t)
    QTest.mouseRelease(vp, Qt.LeftButton, Qt.ShiftModifier, end)
    _wait(qtbot, w)
    drawn = [r for r in box_model.regions if r is not None and r.source == "drawn"]
    assert len(drawn) == 1, "the model was asked once, from the box"
    x0, y0 = c.to_scene(QPointF(start)).x(), c.to_scene(QPointF(start)).y()
    x1, y1 = c.to_scene(QPointF(end)).x(), c.to_scene(QPointF(end)).y()
    r = drawn[0]
    assert (r.cx, r.cy) == pytest.approx(((x0 + x1) / 2, (y0 + y1) / 2), abs=1e-6)
    assert r.w == pytest.approx((x1 - x0) * (1 + 2 * BOX_MARGIN), abs=1e-6)
    # the frame's untouched pre-fill now holds the boxed person's pose, and the view shows it
    ann = clip_project.store.annotation(fid)
    assert ann.keypoints[:, 1].mean() == pytest.approx(r.cy) and not np.allclose(ann.keypoints, before)
    assert np.allclose(w.working.keypoints, ann.keypoints)
    # no box item is left on the picture
    from PySide6.QtWidgets import QGraphicsRectItem
    assert not [i for i in c.scene().items() if isinstance(i, QGraphicsRectItem)]
    w.close()


def test_a_plain_drag_still_pans_and_asks_nothing(qtbot, clip_project, settings, box_model):
    w = open_window(qtbot, clip_project.root, settings)
    _wait(qtbot, w)
    w.go(w.order[1])
    box_model.regions.clear()
    c, vp = w.canvas, w.canvas.viewport()
    c.zoom(2.0)
    start = _vp(c, (20.0, 170.0))       # away from the handles
    QTest.mousePress(vp, Qt.LeftButton, Qt.NoModifier, start)
    QTest.mouseMove(vp, start + QPoint(30, 10))
    QTest.mouseRelease(vp, Qt.LeftButton, Qt.NoModifier, start + QPoint(30, 10))
    _wait(qtbot, w)
    assert box_model.regions == []
    w.close()


def test_shift_m_boxes_the_points_a_person_placed(qtbot, clip_project, settings, box_model):
    w = open_window(qtbot, clip_project.root, settings)
    _wait(qtbot, w)
    fid = w.order[2]
    w.go(fid)
    box_model.regions.clear()
    w.set_point_index(0)
    w.put_at(100.0, 30.0)
    _key(w, Qt.Key_M, Qt.ShiftModifier)
    assert box_model.regions == [] and "two or more points" in w.statusBar().currentMessage()
    w.set_point_index(15)
    w.put_at(140.0, 150.0)
    _key(w, Qt.Key_M, Qt.ShiftModifier)
    _wait(qtbot, w)
    drawn = [r for r in box_model.regions if r is not None and r.source == "drawn"]
    assert len(drawn) == 1
    assert (drawn[0].cx, drawn[0].cy) == pytest.approx((120.0, 90.0))     # the points' box, widened
    # the person's two points are kept (a person's points are never written over)
    ann = clip_project.store.annotation(fid)
    assert ann.keypoints[0, :2].tolist() == [100.0, 30.0] and ann.sources[0] == "human"
    assert "kept" in w.statusBar().currentMessage()
    w.close()


def test_shift_f_follows_the_person_through_the_rest_of_the_clip(qtbot, clip_project, settings, box_model):
    w = open_window(qtbot, clip_project.root, settings)
    _wait(qtbot, w)
    first = w.order[0]                       # frames 0, 3, 6, 9 of one clip
    w.go(first)
    start_pose = np.array(w.working.keypoints)
    box_model.regions.clear()
    _key(w, Qt.Key_F, Qt.ShiftModifier)
    _wait(qtbot, w)
    drawn = [r for r in box_model.regions if r is not None and r.source == "drawn"]
    assert len(drawn) == 3, "one boxed look for each later frame"
    vis = start_pose[:, 2] > 0
    lo, hi = start_pose[vis, :2].min(axis=0), start_pose[vis, :2].max(axis=0)
    assert (drawn[0].cx, drawn[0].cy) == pytest.approx(tuple((lo + hi) / 2))
    for fid in w.order[1:]:            # each later pre-fill is the boxed look's pose (20 x 60 px)
        k = clip_project.store.annotation(fid).keypoints
        assert np.ptp(k[:, 0]) == pytest.approx(20.0) and np.ptp(k[:, 1]) == pytest.approx(60.0)
    assert "followed the person through 3 of the 3 later frame(s)" in w.statusBar().currentMessage()
    w.close()
