"""Media: probing and sampling videos and images, exact-frame access, a bounded frame cache.

Frames are BGR uint8 arrays as OpenCV decodes them. Every sampled frame's
decoded pixels are checksummed at import (sha256 of the pixel bytes plus the
shape), so that a frame read later is known to be exactly the frame that was
sampled: codec seeking with ``CAP_PROP_POS_FRAMES`` can land some frames off,
so a read is verified against the stored checksum and falls back to a
sequential decode when it does not match.
"""
from __future__ import annotations

import hashlib
import math
import os
import threading
from collections import OrderedDict
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import cv2
import numpy as np

from .errors import KinemarkError

# FFmpeg (inside OpenCV) prints its own complaints on stderr when a file is probed, e.g.
# "moov atom not found" for a truncated mp4, before Kinemark's own one-line error about the
# same file. OpenCV reads this setting once, when it first uses FFmpeg, and has no call to
# change FFmpeg's log level later (cv2.utils.logging does not reach it), so it is set here,
# before any capture is opened. -8 is FFmpeg's "quiet"; a value already in the environment
# wins, so OPENCV_FFMPEG_LOGLEVEL=32 brings FFmpeg's messages back for debugging a codec.
os.environ.setdefault("OPENCV_FFMPEG_LOGLEVEL", "-8")

VIDEO_EXTENSIONS = {".mp4", ".m4v", ".mov", ".avi", ".mkv", ".webm", ".mpg", ".mpeg", ".wmv"}
IMAGE_EXTENSIONS = {".png", ".jpg", ".jpeg", ".bmp", ".tif", ".tiff", ".webp"}

Progress = Callable[[int, int, str], None] | None

MAX_FPS = 10000              # a frame rate above this is a broken header, not a camera
MAX_FRAMES = 1_000_000_000   # more frames than any recording has (a year at 30 fps)


def display_name(path: str | Path) -> str:
    """A path as printable text: bytes of the name that are not UTF-8 shown as ``\\xff`` escapes."""
    return os.fsencode(str(path)).decode("utf-8", "backslashreplace")


def check_name(path: str | Path) -> None:
    """Refuse a file name that is not valid UTF-8, before OpenCV sees it.

    OpenCV's VideoCapture crashes the whole process (a segfault) on such a name,
    and the project database stores paths as UTF-8 text; renaming the file is
    the way out, so it is a user error.
    """
    try:
        str(path).encode("utf-8")
    except UnicodeEncodeError:
        raise KinemarkError("the file name is not valid UTF-8 text, which OpenCV and the project "
                            "database cannot handle; rename the file", where=display_name(path)) from None


def _whole(x) -> bool:
    return isinstance(x, int) and not isinstance(x, bool)


def file_sha256(path: str | Path, chunk: int = 1 << 20) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(chunk), b""):
            h.update(block)
    return h.hexdigest()


def pixel_sha(frame: np.ndarray) -> str:
    """Checksum of decoded pixels (shape and bytes), so a changed decode is detected."""
    h = hashlib.sha256(repr(frame.shape).encode())
    h.update(np.ascontiguousarray(frame).tobytes())
    return h.hexdigest()


# ---- sampling ---------------------------------------------------------------------

@dataclass(frozen=True)
class Sampling:
    """Which frames of a video to keep: every Nth, every T seconds, or K evenly spaced."""

    every: int | None = None
    seconds: float | None = None
    count: int | None = None

    def __post_init__(self):
        """Refuse a rule that cannot sample: not a number, not finite, or below one frame.

        An interval of ``1e-300`` s would loop for ever and ``inf`` overflows, so
        seconds must be finite and at least one frame at the highest frame rate a
        probe accepts; :meth:`indices` checks it against the video's own rate.
        """
        given = [x for x in (self.every, self.seconds, self.count) if x is not None]
        if len(given) > 1:
            raise KinemarkError("choose one sampling rule: every N frames, every T seconds, or K frames")
        if self.every is not None and not (_whole(self.every) and 1 <= self.every <= MAX_FRAMES):
            raise KinemarkError(f"--every must be a whole number of frames from 1 to {MAX_FRAMES:,}")
        if self.seconds is not None:
            try:
                ok = math.isfinite(self.seconds) and self.seconds >= 1 / MAX_FPS
            except TypeError:
                ok = False
            if not ok:
                raise KinemarkError(f"--seconds must be a finite number of seconds, at least {1 / MAX_FPS:g}")
        if self.count is not None and not (_whole(self.count) and 1 <= self.count <= MAX_FRAMES):
            raise KinemarkError(f"--count must be a whole number of frames from 1 to {MAX_FRAMES:,}")

    def indices(self, frame_count: int, fps: float | None) -> list[int]:
        if frame_count <= 0:
            return []
        if self.count is not None:
            k = min(self.count, frame_count)
            if k == 1:
                return [0]
            return sorted({int(round(i * (frame_count - 1) / (k - 1))) for i in range(k)})
        if self.seconds is not None:
            if not fps or fps <= 0:
                raise KinemarkError("this video reports no frame rate, so it cannot be sampled by seconds; "
                                    "use --every or --count")
            if self.seconds * fps < 1 - 1e-9:
                raise KinemarkError(f"a frame every {self.seconds:g} s is less than one frame of this "
                                    f"{fps:g} fps video ({1 / fps:.4g} s); use --every 1 to keep every frame")
            out, t = [], 0.0
            while True:
                idx = int(round(t * fps))
                if idx >= frame_count:
                    break
                if not out or idx != out[-1]:
                    out.append(idx)
                t += self.seconds
            return out
        step = self.every or 1
        return list(range(0, frame_count, step))

    def describe(self) -> str:
        if self.count is not None:
            return f"{self.count} evenly spaced frames"
        if self.seconds is not None:
            return f"a frame every {self.seconds:g} s"
        return f"every {self.every or 1} frame(s)"


# ---- probing ----------------------------------------------------------------------

@dataclass(frozen=True)
class Probe:
    kind: str                # "video" | "image"
    fps: float | None
    frame_count: int         # frames that really decode
    width: int
    height: int
    checksums: dict          # frame_index -> pixel sha, for the sampled frames


def _check_readable(path: Path):
    check_name(path)
    if not path.exists():
        raise KinemarkError("file not found", where=str(path))
    if not path.is_file():
        raise KinemarkError("not a regular file", where=str(path))
    if not os.access(path, os.R_OK):
        raise KinemarkError("permission denied: cannot read the file", where=str(path))
    if path.stat().st_size == 0:
        raise KinemarkError("the file is empty (0 bytes)", where=str(path))


def media_kind(path: Path) -> str | None:
    ext = path.suffix.lower()
    if ext in VIDEO_EXTENSIONS:
        return "video"
    if ext in IMAGE_EXTENSIONS:
        return "image"
    return None


def read_image(path: str | Path) -> np.ndarray:
    path = Path(path)
    _check_readable(path)
    data = np.fromfile(str(path), dtype=np.uint8)
    img = cv2.imdecode(data, cv2.IMREAD_COLOR)
    if img is None:
        raise KinemarkError("not a readable image (unsupported or corrupt)", where=str(path))
    return img


def probe_image(path: Path) -> Probe:
    img = read_image(path)
    return Probe("image", None, 1, img.shape[1], img.shape[0], {0: pixel_sha(img)})


def _open_capture(path: Path) -> cv2.VideoCapture:
    check_name(path)        # OpenCV segfaults on a name that is not UTF-8
    cap = cv2.VideoCapture(str(path))
    if not cap.isOpened():
        cap.release()
        raise KinemarkError("cannot open as a video (unsupported format, or the file is corrupt "
                            "or truncated)", where=str(path))
    return cap


def _sample(sampling: Sampling, frame_count: int, fps: float | None, path: Path) -> list[int]:
    """``sampling.indices``, with a refusal naming the file (a folder add has many)."""
    try:
        return sampling.indices(frame_count, fps)
    except KinemarkError as e:
        if e.where is not None:
            raise
        raise KinemarkError(str(e), where=str(path)) from None


def probe_video(path: Path, sampling: Sampling, progress: Progress = None) -> Probe:
    """Decode the whole video once: true frame count, size, and checksums of the sampled frames.

    A video that decodes noticeably fewer frames than its header promises is
    refused as truncated.
    """
    _check_readable(path)
    cap = _open_capture(path)
    try:
        fps = cap.get(cv2.CAP_PROP_FPS) or None
        if fps is not None and not (0 < fps < MAX_FPS):
            fps = None
        header_count = int(cap.get(cv2.CAP_PROP_FRAME_COUNT) or 0)
        # Which frames to checksum: we only know the true count after decoding, so
        # decode once, keep checksums of every candidate index, then sample.
        wanted = set(_sample(sampling, header_count, fps, path)) if header_count > 0 else None
        shas: dict[int, str] = {}
        width = height = 0
        n = 0
        while True:
            ok = cap.grab()
            if not ok:
                break
            if wanted is None or n in wanted:
                ok, frame = cap.retrieve()
                if not ok or frame is None:
                    break
                height, width = frame.shape[:2]
                shas[n] = pixel_sha(frame)
            n += 1
            if progress and n % 50 == 0:
                progress(n, max(header_count, n), f"reading {path.name}")
    finally:
        cap.release()
    if n == 0 or not shas:
        raise KinemarkError("no frame could be decoded: the video is empty, corrupt or in an "
                            "unsupported codec", where=str(path))
    if header_count > 0 and n < 0.9 * header_count - 1:
        raise KinemarkError(f"the video looks truncated: its header says {header_count} frames "
                            f"but only {n} decode", where=str(path))
    indices = _sample(sampling, n, fps, path)
    missing = [i for i in indices if i not in shas]
    if missing:
        # header count was off: decode again for the frames we did not keep
        cap = _open_capture(path)
        try:
            want = set(missing)
            for i in range(max(missing) + 1):
                if not cap.grab():
                    break
                if i in want:
                    ok, frame = cap.retrieve()
                    if ok:
                        height, width = frame.shape[:2]
                        shas[i] = pixel_sha(frame)
        finally:
            cap.release()
    checks = {i: shas[i] for i in indices if i in shas}
    return Probe("video", fps, n, width, height, checks)


# ---- exact frame access -------------------------------------------------------------

class FrameSource:
    """Reads exact frames of one media file, verified against the stored pixel checksums."""

    def __init__(self, path: Path, kind: str, checksums: dict[int, str] | None = None):
        self.path = Path(path)
        self.kind = kind
        self.checksums = checksums or {}
        self._cap: cv2.VideoCapture | None = None
        self._next = 0   # index of the frame the open capture will decode next
        self.seek_misses = 0
        self._lock = threading.Lock()

    def close(self):
        # under the read lock: releasing a capture that another thread is decoding from
        # crashes inside FFmpeg
        with self._lock:
            if self._cap is not None:
                self._cap.release()
                self._cap = None

    def _verify(self, index: int, frame: np.ndarray) -> bool:
        want = self.checksums.get(index)
        return want is None or pixel_sha(frame) == want

    def read(self, index: int) -> np.ndarray:
        with self._lock:
            return self._read(index)

    def _read(self, index: int) -> np.ndarray:
        if self.kind == "image":
            img = read_image(self.path)
            if not self._verify(0, img):
                raise KinemarkError("the image's pixels no longer match what was imported; "
                                    "relink the media", where=str(self.path))
            return img
        if self._cap is None:
            _check_readable(self.path)
            self._cap = _open_capture(self.path)
            self._next = 0
        cap = self._cap
        if index != self._next:
            if 0 < index - self._next <= 30:
                while self._next < index and cap.grab():   # short hop forward: decode through
                    self._next += 1
            else:
                cap.set(cv2.CAP_PROP_POS_FRAMES, index)
                self._next = index
        ok, frame = cap.read()
        self._next += 1
        if ok and frame is not None and self._verify(index, frame):
            return frame
        # The seek landed elsewhere (or the decoder disagrees): sequential decode from the start.
        self.seek_misses += 1
        cap.release()
        self._cap = cap = _open_capture(self.path)
        for _ in range(index):
            if not cap.grab():
                break
        ok, frame = cap.read()
        self._next = index + 1
        if not ok or frame is None:
            raise KinemarkError(f"frame {index} cannot be decoded", where=str(self.path))
        if not self._verify(index, frame):
            raise KinemarkError(f"frame {index} decodes to different pixels than at import: the file "
                                f"or the video decoder changed; relink the media", where=str(self.path))
        return frame


class FrameCache:
    """A bounded least-recently-used cache of decoded frames, by bytes."""

    def __init__(self, max_bytes: int = 512 * 1024 * 1024):
        self.max_bytes = max_bytes
        self._items: OrderedDict = OrderedDict()
        self._bytes = 0
        self._lock = threading.Lock()
        self.hits = self.misses = 0

    def get(self, key):
        with self._lock:
            img = self._items.get(key)
            if img is not None:
                self._items.move_to_end(key)
                self.hits += 1
            else:
                self.misses += 1
            return img

    def put(self, key, img: np.ndarray):
        with self._lock:
            if key in self._items:
                self._bytes -= self._items.pop(key).nbytes
            if img.nbytes > self.max_bytes:
                return
            self._items[key] = img
            self._bytes += img.nbytes
            while self._bytes > self.max_bytes:
                _, old = self._items.popitem(last=False)
                self._bytes -= old.nbytes

    @property
    def nbytes(self) -> int:
        return self._bytes

    def __len__(self):
        return len(self._items)


def list_image_folder(folder: Path) -> tuple[list[Path], list[Path]]:
    """Image files in a folder (sorted by name) and the other files that were skipped."""
    images, skipped = [], []
    for p in sorted(folder.iterdir()):
        if p.is_file() and media_kind(p) == "image":
            images.append(p)
        elif p.is_file():
            skipped.append(p)
    return images, skipped
