"""Frames for the screen: conversion to QImage, decode-ahead, and queue thumbnails.

One quiet worker thread decodes the frames the person is likely to want
next (the following and previous sampled frames, the next queued frame) and
the thumbnails of the queue, each with its *own* :class:`FrameSource` (its
own decoder), verified against the stored pixel checksums like every read.
Frames are converted to 32-bit QImages there, so that showing one on the
GUI thread is only a pixmap upload.
"""
from __future__ import annotations

import threading
from collections import OrderedDict
from dataclasses import dataclass
from pathlib import Path

import cv2
import numpy as np
from PySide6.QtCore import QObject, Signal
from PySide6.QtGui import QImage

from ..core.media import FrameSource


def to_qimage(img: np.ndarray) -> QImage:
    """A BGR (or grey) uint8 frame as an owned QImage in Format_RGB32 (the fastest to draw)."""
    code = cv2.COLOR_GRAY2BGRA if img.ndim == 2 else cv2.COLOR_BGR2BGRA
    bgra = cv2.cvtColor(img, code)      # little-endian RGB32 is B, G, R, A in memory
    h, w = bgra.shape[:2]
    return QImage(bgra.data, w, h, 4 * w, QImage.Format_RGB32).copy()


@dataclass(frozen=True, eq=False)
class ShownFrame:
    """A frame ready for the view: full resolution, and a copy already scaled to fit the view
    (area-averaged by OpenCV), so that the usual fitted view is drawn without scaling."""

    full: QImage
    fitted: QImage | None = None


def prepare(img: np.ndarray, view_size: tuple[int, int] | None) -> ShownFrame:
    full = to_qimage(img)
    if not view_size or view_size[0] < 8 or view_size[1] < 8:
        return ShownFrame(full)
    h, w = img.shape[:2]
    s = min(view_size[0] / w, view_size[1] / h)
    if s >= 0.95:
        return ShownFrame(full)
    small = cv2.resize(img, (max(1, round(w * s)), max(1, round(h * s))), interpolation=cv2.INTER_AREA)
    return ShownFrame(full, to_qimage(small))


class FrameWorker(QObject):
    """Decode-ahead and thumbnails on one background thread."""

    thumbnail = Signal(int, int, QImage)   # generation, frame id, small image

    def __init__(self, keep: int = 8, max_open: int = 4):
        super().__init__()
        self._cv = threading.Condition()
        self._media: dict[int, tuple[Path, str, dict]] = {}
        self._open: OrderedDict[int, FrameSource] = OrderedDict()
        self._max_open = max_open
        self._ahead: list[tuple[int, int, int]] = []
        self._thumbs: list[tuple[int, int, int, int]] = []
        self._ready: OrderedDict[int, ShownFrame] = OrderedDict()
        self._view_size: tuple[int, int] | None = None
        self._keep = keep
        self._busy = False
        self._stop = False
        self._reset_sources = False
        self._doing = None
        self._failed = None
        self.generation = 0
        self.decoded = 0
        self._thread = threading.Thread(target=self._loop, name="kinemark-decode-ahead", daemon=True)
        self._thread.start()

    # ---- called from the GUI thread -----------------------------------------------------

    def reset(self):
        """Forget every media, wish and decoded frame (another project is being opened).

        Frame and media ids are only unique within a project, so nothing may carry over.
        """
        with self._cv:
            self.generation += 1
            self._media.clear()
            self._ahead.clear()
            self._thumbs.clear()
            self._ready.clear()
            self._reset_sources = True
            self._cv.notify_all()

    def register(self, media_id: int, path: Path, kind: str, checksums: dict):
        with self._cv:
            self._media[media_id] = (Path(path), kind, dict(checksums))

    def known(self, media_id: int) -> bool:
        with self._cv:
            return media_id in self._media

    def ahead(self, items: list[tuple[int, int, int]]):
        """Decode these (frame id, media id, frame index) next, replacing any earlier wish."""
        with self._cv:
            self._ahead = [it for it in items if it[0] not in self._ready]
            self._cv.notify()

    def thumbnails(self, items: list[tuple[int, int, int]], height: int = 64):
        with self._cv:
            self._thumbs = sorted(((f, m, i, height) for f, m, i in items), key=lambda t: (t[1], t[2]))
            self._cv.notify()

    def set_view_size(self, w: int, h: int):
        """The frame view's size, so that frames come pre-scaled to fit it."""
        with self._cv:
            if self._view_size != (w, h):
                self._view_size = (w, h)
                self._ready.clear()

    def take(self, frame_id: int) -> ShownFrame | None:
        with self._cv:
            img = self._ready.get(frame_id)
            if img is not None:
                self._ready.move_to_end(frame_id)
            return img

    def get(self, frame_id: int, media_id: int, index: int, timeout: float = 1.0) -> ShownFrame | None:
        """The frame, decoded by the worker first of all; waits up to ``timeout`` seconds.

        Waiting for the worker beats decoding a second time on the GUI thread: its
        decoder is usually just before the frame wanted (decode-ahead moves forward).
        None when it did not arrive in time (the caller then reads it itself).
        """
        import time
        end = time.monotonic() + timeout
        with self._cv:
            if media_id not in self._media:
                return None
            img = self._ready.get(frame_id)
            if img is not None:
                return img
            job = (frame_id, media_id, index)
            if self._doing != job:
                self._ahead = [job] + [j for j in self._ahead if j[0] != frame_id]
                self._cv.notify_all()
            while True:
                img = self._ready.get(frame_id)
                if img is not None or self._failed == frame_id:
                    return img
                left = end - time.monotonic()
                if left <= 0:
                    return None
                self._cv.wait(left)

    def idle(self) -> bool:
        with self._cv:
            return not (self._busy or self._ahead or self._thumbs)

    def close(self, timeout: float = 5.0):
        """Stop the worker. Its decoders are its own: it closes them as it stops. If it is
        still inside a read after ``timeout`` seconds, it closes them when that read ends;
        they are never closed from here under a read in progress."""
        with self._cv:
            self._stop = True
            self._cv.notify()
        self._thread.join(timeout=timeout)

    def _close_sources(self):
        for s in self._open.values():
            s.close()
        self._open.clear()

    # ---- the worker thread ----------------------------------------------------------------

    def _source(self, media_id: int) -> FrameSource | None:
        src = self._open.get(media_id)
        if src is None:
            info = self._media.get(media_id)
            if info is None:
                return None
            src = FrameSource(*info)
            self._open[media_id] = src
            while len(self._open) > self._max_open:
                _, old = self._open.popitem(last=False)
                old.close()
        else:
            self._open.move_to_end(media_id)
        return src

    def _loop(self):
        while True:
            with self._cv:
                while not self._stop and not self._ahead and not self._thumbs:
                    self._busy = False
                    self._cv.wait()
                if self._stop:
                    self._close_sources()
                    return
                self._busy = True
                if self._reset_sources:           # only this thread touches its decoders
                    self._close_sources()
                    self._reset_sources = False
                gen = self.generation
                if self._ahead:
                    job, thumb = self._ahead.pop(0), None
                else:
                    job, thumb = None, self._thumbs.pop(0)
                self._doing = job
                src = self._source((job or thumb)[1])
            try:
                if src is None:
                    continue
                if job is not None:
                    fid, mid, idx = job
                    if self.take(fid) is not None:
                        continue
                    q = prepare(src.read(idx), self._view_size)
                    with self._cv:
                        if gen == self.generation:
                            self._ready[fid] = q
                            while len(self._ready) > self._keep:
                                self._ready.popitem(last=False)
                            self.decoded += 1
                else:
                    fid, mid, idx, h = thumb
                    img = src.read(idx)
                    scale = h / img.shape[0]
                    small = cv2.resize(img, (max(1, int(round(img.shape[1] * scale))), h),
                                       interpolation=cv2.INTER_AREA)
                    self.thumbnail.emit(gen, fid, to_qimage(small))
            except Exception:   # noqa: BLE001 - the GUI thread reads the frame itself and reports
                with self._cv:
                    if job is not None:
                        self._failed = job[0]
            finally:
                with self._cv:
                    self._doing = None
                    self._cv.notify_all()


__all__ = ["to_qimage", "prepare", "ShownFrame", "FrameWorker"]
