"""Shared fixtures. Test media are written here with OpenCV's own encoder."""
from __future__ import annotations

import contextlib
import io
import os
from pathlib import Path

import cv2
import numpy as np
import pytest

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")


def quiet(fn, *a, **k):
    """``fn(*a, **k)`` with its printing to stdout swallowed (pycocotools prints as it works)."""
    with contextlib.redirect_stdout(io.StringIO()):
        return fn(*a, **k)


def write_video(path: Path, n_frames: int = 40, size=(160, 120), fps: float = 10.0,
                fourcc: str = "mp4v", seed: int = 0) -> Path:
    """A small video whose every frame is different (seeded noise plus a moving bar)."""
    w, h = size
    vw = cv2.VideoWriter(str(path), cv2.VideoWriter_fourcc(*fourcc), fps, (w, h))
    assert vw.isOpened(), f"OpenCV cannot write {fourcc} here"
    rng = np.random.default_rng(seed)
    base = rng.integers(0, 255, (h, w, 3), dtype=np.uint8)
    for i in range(n_frames):
        img = (base // 2).copy()
        x = (i * 7) % (w - 10)
        img[:, x:x + 10] = (255, 255 - 5 * (i % 50), 40)
        cv2.putText(img, str(i), (5, h - 10), cv2.FONT_HERSHEY_SIMPLEX, 0.8, (255, 255, 255), 2)
        vw.write(img)
    vw.release()
    return path


def write_image(path: Path, size=(64, 48), seed: int = 0) -> Path:
    rng = np.random.default_rng(seed)
    img = rng.integers(0, 255, (size[1], size[0], 3), dtype=np.uint8)
    assert cv2.imwrite(str(path), img)
    return path


@pytest.fixture
def video(tmp_path) -> Path:
    return write_video(tmp_path / "clip.mp4")


@pytest.fixture
def project(tmp_path):
    from kinemark.core.project import Project
    from kinemark.core.skeleton import COCO17
    p = Project.create(tmp_path / "proj", COCO17, owner="ra1")
    yield p
    p.close()
