"""Fixtures for the workspace tests (pytest-qt, offscreen)."""
from __future__ import annotations

import os

import cv2
import numpy as np
import pytest

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")


def write_pattern_video(path, n_frames=12, size=(320, 180), fps=10.0):
    """Large smooth shapes (easy to recognise after scaling), a little different on each frame."""
    w, h = size
    vw = cv2.VideoWriter(str(path), cv2.VideoWriter_fourcc(*"MJPG"), fps, (w, h))
    assert vw.isOpened()
    yy, xx = np.mgrid[0:h, 0:w]
    for i in range(n_frames):
        img = np.zeros((h, w, 3), np.uint8)
        img[..., 0] = (255 * xx / w).astype(np.uint8)                 # blue ramps left to right
        img[..., 2] = (255 * yy / h).astype(np.uint8)                 # red ramps top to bottom
        cv2.circle(img, (40 + 10 * i, h // 2), 25, (40, 230, 240), -1)
        vw.write(img)
    vw.release()
    return path


def write_texture_video(path, n_frames=12, size=(320, 180), step=(2.0, 1.0), fps=10.0):
    """A smooth random texture moved by i * step on frame i (trackable everywhere)."""
    w, h = size
    rng = np.random.default_rng(0)
    base = cv2.GaussianBlur(rng.integers(0, 255, (h, w), dtype=np.uint8), (0, 0), 2.0)
    base = cv2.normalize(base, None, 0, 255, cv2.NORM_MINMAX)
    vw = cv2.VideoWriter(str(path), cv2.VideoWriter_fourcc(*"MJPG"), fps, (w, h))
    assert vw.isOpened()
    for i in range(n_frames):
        m = np.float32([[1, 0, step[0] * i], [0, 1, step[1] * i]])
        g = cv2.warpAffine(base, m, (w, h), flags=cv2.INTER_LINEAR, borderMode=cv2.BORDER_REFLECT)
        vw.write(cv2.cvtColor(g, cv2.COLOR_GRAY2BGR))
    vw.release()
    return path


@pytest.fixture(autouse=True)
def _isolated_settings(tmp_path, monkeypatch):
    """QSettings written by the app go to a temporary folder, never the user's own."""
    from PySide6.QtCore import QSettings
    for fmt in (QSettings.NativeFormat, QSettings.IniFormat):
        QSettings.setPath(fmt, QSettings.UserScope, str(tmp_path / "settings"))
    # no ONNX model load in GUI tests (it is tested in core); the app must cope without one
    import kinemark.core.pose as pose

    def no_model(project, **kw):
        from kinemark.core.errors import KinemarkError
        raise KinemarkError("no pose model in this test")

    monkeypatch.setattr(pose, "load_adapter", no_model)


@pytest.fixture
def settings(tmp_path):
    from PySide6.QtCore import QSettings
    return QSettings(str(tmp_path / "kinemark-test.ini"), QSettings.IniFormat)


@pytest.fixture
def clip_project(project, tmp_path):
    from kinemark.core.media import Sampling
    from kinemark.core.ops import add_media
    v = write_pattern_video(tmp_path / "pattern.avi")
    add_media(project, [v], sampling=Sampling(every=3), participant="QB-01")    # frames 0, 3, 6, 9
    return project


def open_window(qtbot, root, settings, user=None):
    from kinemark.app.main import MainWindow, make_app
    make_app()
    w = MainWindow(settings=settings)
    qtbot.addWidget(w)
    w.resize(1200, 800)
    assert w.open_project(root, user=user)
    w.show()
    qtbot.waitExposed(w)
    qtbot.waitUntil(lambda: not w.background.busy, timeout=20000)
    return w


@pytest.fixture
def window(qtbot, clip_project, settings):
    w = open_window(qtbot, clip_project.root, settings)
    yield w
    w.close()
