"""``kinemark bench gui``: how the workspace feels, measured offscreen. Prints figures; asserts nothing.

* Next-frame latency on a 1080p video: from the key's command to the frame view
  repainted (the frame decoded or taken from decode-ahead, the keypoints loaded,
  the view painted). Two paces: "labelling pace" leaves decode-ahead time to work
  between frames, as a person placing points does; "back to back" presses next
  as fast as the machine answers. Goal: median <= 50 ms at labelling pace.
* Redraw rate while dragging a handle: mouse-move events on the view, each
  followed by a synchronous repaint of the view. Goal: >= 60 per second.

The test video is generated here with OpenCV (mp4v). The offscreen platform
paints with Qt's raster engine on the CPU, as a machine without a GPU does.
"""
from __future__ import annotations

import math
import os
import shutil
import statistics
import tempfile
import time
from pathlib import Path


def _video(path: Path, n: int, size=(1920, 1080), fps=30.0):
    import cv2
    import numpy as np
    w, h = size
    vw = cv2.VideoWriter(str(path), cv2.VideoWriter_fourcc(*"mp4v"), fps, (w, h))
    if not vw.isOpened():
        raise RuntimeError("OpenCV cannot write mp4v here")
    yy, xx = np.mgrid[0:h, 0:w].astype(np.float32)
    rng = np.random.default_rng(0)
    grain = rng.integers(0, 40, (h, w, 1), dtype=np.uint8)
    for i in range(n):
        img = np.empty((h, w, 3), np.uint8)
        img[..., 0] = (128 + 100 * np.sin(xx / 97 + i / 9)).astype(np.uint8)
        img[..., 1] = (128 + 100 * np.sin(yy / 71 - i / 7)).astype(np.uint8)
        img[..., 2] = (128 + 100 * np.sin((xx + yy) / 130 + i / 5)).astype(np.uint8)
        img = cv2.add(img, np.repeat(grain, 3, axis=2))
        cv2.circle(img, (300 + 9 * i, 540), 120, (30, 200, 240), -1)
        cv2.putText(img, f"{i}", (60, 120), cv2.FONT_HERSHEY_SIMPLEX, 3, (255, 255, 255), 6)
        vw.write(img)
    vw.release()


def _pct(values, q):
    s = sorted(values)
    if not s:
        return float("nan")
    k = min(len(s) - 1, max(0, int(round(q / 100 * (len(s) - 1)))))
    return s[k]


def run(args=None):
    os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
    from PySide6.QtCore import QPoint, QSettings, Qt
    from PySide6.QtTest import QTest

    from ..core import edit
    from ..core.media import Sampling
    from ..core.ops import add_media
    from ..core.project import Project
    from ..core.skeleton import COCO17
    from .main import MainWindow, make_app, settle

    steps = int(getattr(args, "frames", None) or 30)
    every = 3
    tmp = Path(tempfile.mkdtemp(prefix="kinemark-bench-gui-"))
    try:
        t0 = time.perf_counter()
        video = tmp / "bench_1080p.mp4"
        _video(video, steps * every + every)
        t_video = time.perf_counter() - t0
        p = Project.create(tmp / "proj", COCO17, owner="bench")
        t0 = time.perf_counter()
        add_media(p, [video], sampling=Sampling(every=every))
        t_import = time.perf_counter() - t0
        first = p.store.frames()[0].id
        K = p.skeleton.num_keypoints
        for k in range(K):
            edit.set_point(p, first, k, 700.0 + 30 * k, 300.0 + 25 * k)
        p.close()

        app = make_app()
        QSettings.setPath(QSettings.NativeFormat, QSettings.UserScope, str(tmp / "settings"))
        w = MainWindow(settings=QSettings(str(tmp / "settings.ini"), QSettings.IniFormat))
        w.resize(1600, 1000)
        w.open_project(tmp / "proj", auto_prefill=False)   # measure the workspace, not a model run beside it
        w.show()
        settle(app, w)
        print(f"gui: 1080p test video of {steps * every + every} frames written in {t_video:.1f} s, "
              f"imported (decoded and checksummed) in {t_import:.1f} s; {len(w.order)} sampled frames")

        def step_and_paint():
            t = time.perf_counter()
            w.step_frame(+1)
            w.canvas.viewport().repaint()
            return (time.perf_counter() - t) * 1000

        def measure(pace: bool, n: int):
            times, hits = [], 0
            w.go(w.order[0])
            w.canvas.viewport().repaint()
            for _ in range(n):
                if pace:   # a person works on the frame meanwhile: decode-ahead gets its chance
                    t_wait = time.perf_counter()
                    while not w.frames.idle() and time.perf_counter() - t_wait < 2.0:
                        app.processEvents()
                        time.sleep(0.002)
                    app.processEvents()
                times.append(step_and_paint())
                hits += w.last_from_ahead
                app.processEvents()
            return times, hits

        n = len(w.order) - 1
        for pace, label in ((True, "labelling pace"), (False, "back to back")):
            w.project.cache._items.clear()       # nothing already decoded by the GUI thread's reader
            times, hits = measure(pace, n)
            print(f"gui: next frame, 1080p, {label}: median {statistics.median(times):.1f} ms, "
                  f"p95 {_pct(times, 95):.1f} ms, max {max(times):.1f} ms over {len(times)} frames "
                  f"({hits} from decode-ahead)")

        # dragging a handle
        w.go(first)
        settle(app, w)
        c = w.canvas
        vp = c.viewport()
        for zoom, label in ((None, "fitted"), (4.0, "zoomed 4x")):
            if zoom:
                c.zoom(zoom / c.scale_factor(), c.to_view(c.handle_pos(9)))
            start_f = c.to_view(c.handle_pos(9))
            start = QPoint(round(start_f.x()), round(start_f.y()))
            QTest.mousePress(vp, Qt.LeftButton, Qt.NoModifier, start)
            moves = 300
            t = time.perf_counter()
            for i in range(moves):
                QTest.mouseMove(vp, start + QPoint(int(60 * math.sin(i / 15)), (i % 40) - 20))
                vp.repaint()
            dt = time.perf_counter() - t
            before = w.project.store.annotation(first).keypoints[9, :2].tolist()
            QTest.mouseRelease(vp, Qt.LeftButton, Qt.NoModifier, start + QPoint(5, 5))
            app.processEvents()
            after = w.project.store.annotation(first).keypoints[9, :2].tolist()
            moved = "the point moved and was stored" if after != before else "THE POINT DID NOT MOVE"
            print(f"gui: dragging a handle ({label}, {vp.width()}x{vp.height()} view): "
                  f"{moves / dt:.0f} redraws per second ({1000 * dt / moves:.1f} ms each); {moved}")
            c.fit()
        w.close()
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


if __name__ == "__main__":
    run()
