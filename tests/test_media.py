import os
import shutil
import time

import cv2
import numpy as np
import pytest

from conftest import write_image, write_video
from kinemark.core import ops
from kinemark.core.errors import KinemarkError
from kinemark.core.media import FrameCache, FrameSource, Sampling, pixel_sha, probe_video


def _decode_all(path):
    """Reference: OpenCV's plain sequential decode."""
    cap = cv2.VideoCapture(str(path))
    out = []
    while True:
        ok, f = cap.read()
        if not ok:
            break
        out.append(f)
    cap.release()
    return out


@pytest.mark.parametrize("rule,expect", [
    (Sampling(every=10), [0, 10, 20, 30]),
    (Sampling(count=3), [0, 20, 39]),
    (Sampling(count=1), [0]),
    (Sampling(seconds=1.5), [0, 15, 30]),   # 10 fps
    (Sampling(every=1), list(range(40))),
])
def test_sampling_rules(rule, expect):
    assert rule.indices(40, 10.0) == expect


def test_sampling_rules_refuse_nonsense():
    with pytest.raises(KinemarkError):
        Sampling(every=0)
    with pytest.raises(KinemarkError):
        Sampling(every=2, count=3)
    with pytest.raises(KinemarkError, match="frame rate"):
        Sampling(seconds=1).indices(10, None)


def test_add_video_stores_checksums_of_exact_frames(project, video):
    ch, rep = ops.add_media(project, [video], participant="QB-01", sampling=Sampling(every=5))
    assert len(rep.added) == 1
    frames = project.store.frames(ch.media[0])
    assert [f.frame_index for f in frames] == list(range(0, 40, 5))
    ref = _decode_all(video)
    assert len(ref) == 40
    for f in frames:
        assert f.pixel_sha == pixel_sha(ref[f.frame_index])
        assert f.timestamp == pytest.approx(f.frame_index / 10.0)
        np.testing.assert_array_equal(project.read_frame(f.media_id, f.frame_index), ref[f.frame_index])
    m = project.store.media(ch.media[0])
    assert (m.width, m.height, m.frame_count, m.participant_code) == (160, 120, 40, "QB-01")


def test_inexact_seek_falls_back_to_sequential_decode(tmp_path, video, monkeypatch):
    ref = _decode_all(video)
    checks = {i: pixel_sha(ref[i]) for i in range(len(ref))}

    real_cls = cv2.VideoCapture

    class OffByThree:
        """A capture whose seek lands three frames early, as some codecs do."""

        def __init__(self, *a):
            self._cap = real_cls(*a)

        def set(self, prop, value):
            if prop == cv2.CAP_PROP_POS_FRAMES:
                value = max(0, value - 3)
            return self._cap.set(prop, value)

        def __getattr__(self, name):
            return getattr(self._cap, name)
    monkeypatch.setattr(cv2, "VideoCapture", OffByThree)
    src = FrameSource(video, "video", checks)
    for i in (35, 3, 38, 12):
        np.testing.assert_array_equal(src.read(i), ref[i])
    assert src.seek_misses >= 1
    src.close()


def test_closing_a_source_waits_for_a_read_in_progress(video):
    """Releasing an OpenCV capture that another thread is decoding from crashes in FFmpeg
    (a segfault seen once in CI): close() must wait for the read to end."""
    import threading
    src = FrameSource(video, "video", {})
    src.read(0)
    started, order = threading.Event(), []
    real = src._read

    def slow_read(index):
        started.set()
        time.sleep(0.3)                     # long enough for close() to be called meanwhile
        out = real(index)
        order.append("read ended")
        return out
    src._read = slow_read
    t = threading.Thread(target=src.read, args=(1,))
    t.start()
    assert started.wait(5)
    src.close()
    order.append("closed")
    t.join(5)
    assert order == ["read ended", "closed"] and src._cap is None


def test_changed_video_is_refused_until_relinked(project, tmp_path):
    v = write_video(tmp_path / "walk.mp4", seed=1)
    ch, _ = ops.add_media(project, [v], sampling=Sampling(every=10))
    mid = ch.media[0]
    project.read_frame(mid, 10)
    project.close()
    write_video(v, seed=2)    # a different recording under the same name
    from kinemark.core.project import Project
    p = Project.open(project.root)
    with pytest.raises(KinemarkError, match="changed on disk"):
        p.read_frame(mid, 10)
    assert p.store.media(mid).status == "changed"
    with pytest.raises(KinemarkError, match="relink"):
        p.read_frame(mid, 20)
    # same size, length and rate but other pixels: only with an explicit confirmation
    with pytest.raises(KinemarkError, match="accept-changed-pixels"):
        ops.relink(p, mid)
    assert p.store.media(mid).status == "changed"
    msg = ops.relink(p, mid, accept_changed_pixels=True).message
    assert "relinked" in msg and "4 of 4 frames' pixels changed" in msg
    ref = _decode_all(v)
    np.testing.assert_array_equal(p.read_frame(mid, 20), ref[20])
    p.close()


def test_duplicate_media_detected_by_checksum(project, video, tmp_path):
    ops.add_media(project, [video])
    copy = tmp_path / "copy_of_clip.mp4"
    shutil.copy(video, copy)
    ch, rep = ops.add_media(project, [copy])
    assert ch.media == () and len(rep.duplicates) == 1


def test_image_folder_skips_and_counts_other_files(project, tmp_path):
    d = tmp_path / "imgs"
    d.mkdir()
    for i in range(3):
        write_image(d / f"im{i}.png", seed=i)
    (d / "notes.txt").write_text("hello")
    (d / "Thumbs.db").write_bytes(b"\x00\x01")
    ch, rep = ops.add_media(project, [d])
    assert len(rep.added) == 3 and len(rep.skipped) == 2
    assert "skipped 2 non-media" in ch.message


def _image_folder(tmp_path, n=8):
    d = tmp_path / "frames"
    d.mkdir()
    for i in range(n):
        write_image(d / f"f{i:02d}.png", seed=i)
    return d


@pytest.mark.parametrize("rule,kept", [
    (Sampling(every=3), ["f00", "f03", "f06"]),
    (Sampling(count=3), ["f00", "f04", "f07"]),     # evenly spaced over 8, as for video frames
    (Sampling(every=1), [f"f{i:02d}" for i in range(8)]),
])
def test_a_sampling_rule_thins_an_image_folder_in_name_order(project, tmp_path, rule, kept):
    """The rule used to be ignored for image folders while the command line said it applied."""
    d = _image_folder(tmp_path)
    ch, rep = ops.add_media(project, [d], sampling=rule)
    assert [p.stem for p, _, _ in rep.added] == kept
    if len(kept) < 8:
        assert rep.thinned == [(d, len(kept), 8)] and f"kept {len(kept)} of the 8 images" in ch.message
    else:
        assert rep.thinned == [] and "kept" not in ch.message


def test_an_image_folder_cannot_be_sampled_by_seconds(project, tmp_path):
    d = _image_folder(tmp_path, 3)
    with pytest.raises(KinemarkError, match="no frame times"):
        ops.add_media(project, [d], sampling=Sampling(seconds=1.0))
    assert project.store.frame_count() == 0


def test_a_missing_folder_is_named_as_missing(project, tmp_path):
    with pytest.raises(KinemarkError, match="not found"):
        ops.add_media(project, [tmp_path / "no_such_folder"])


@pytest.mark.parametrize("kind", ["zero", "truncated_mp4", "truncated_avi", "unsupported", "not_video",
                                  "missing", "directory_image", "bad_image"])
def test_bad_media_is_refused_and_project_unchanged(project, tmp_path, kind):
    good = write_video(tmp_path / "good.mp4")
    if kind == "zero":
        bad = tmp_path / "empty.mp4"; bad.write_bytes(b"")
        match = "empty"
    elif kind in ("truncated_mp4", "truncated_avi"):
        ext, fourcc = ("mp4", "mp4v") if kind == "truncated_mp4" else ("avi", "MJPG")
        src = write_video(tmp_path / f"full.{ext}", fourcc=fourcc)
        data = src.read_bytes()
        bad = tmp_path / f"cut.{ext}"; bad.write_bytes(data[: len(data) // 2])
        match = "truncated|cannot open"
    elif kind == "unsupported":
        bad = tmp_path / "clip.xyz"; bad.write_bytes(b"1234")
        match = "unsupported file type"
    elif kind == "not_video":
        bad = tmp_path / "fake.mp4"; bad.write_bytes(os.urandom(5000))
        match = "cannot open|no frame"
    elif kind == "missing":
        bad = tmp_path / "nope.mp4"
        match = "not found"
    elif kind == "directory_image":
        bad = tmp_path / "dir.png"; bad.mkdir()
        match = "holds no images or videos"
    else:
        bad = tmp_path / "bad.png"; bad.write_bytes(b"\x89PNG\r\n\x1a\n" + os.urandom(100))
        match = "not a readable image"
    before = (project.store.frame_count(), len(project.store.events()))
    with pytest.raises(KinemarkError, match=match):
        ops.add_media(project, [good, bad])     # the good file must not be half-added either
    assert (project.store.frame_count(), len(project.store.events())) == before
    assert project.store.participants() == []


def test_keep_going_reports_failures_and_adds_the_rest(project, tmp_path):
    good = write_video(tmp_path / "good.mp4")
    bad = tmp_path / "empty.mp4"; bad.write_bytes(b"")
    ch, rep = ops.add_media(project, [bad, good], strict=False)
    assert len(rep.added) == 1 and len(rep.failed) == 1 and "empty" in rep.failed[0][1]


@pytest.mark.skipif(os.geteuid() == 0, reason="root can read any file, so permissions cannot be tested")
def test_unreadable_file(project, video):
    video.chmod(0)
    with pytest.raises(KinemarkError, match="permission"):
        ops.add_media(project, [video])


def test_probe_reports_true_frame_count(tmp_path):
    v = write_video(tmp_path / "v.avi", n_frames=23, fourcc="MJPG")
    p = probe_video(v, Sampling(count=5))
    assert p.frame_count == 23 and sorted(p.checksums) == Sampling(count=5).indices(23, p.fps)


def test_frame_cache_is_bounded():
    c = FrameCache(max_bytes=3 * 100)
    for i in range(10):
        c.put(i, np.zeros(100, np.uint8))
    assert len(c) == 3 and c.nbytes == 300
    assert c.get(0) is None and c.get(9) is not None
    c.get(7); c.put(10, np.zeros(100, np.uint8))
    assert c.get(7) is not None and c.get(8) is None   # least recently used goes first
