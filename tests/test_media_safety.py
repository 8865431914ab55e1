"""Media safety: relink only the same recording, names OpenCV would crash on, sampling rules
that cannot sample, and FFmpeg's own log lines kept off the one-line error.

Paths and codes are from the invented Quillon Bay Stroke Rehabilitation Clinic."""
from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path

import cv2
import pytest

from conftest import write_image, write_video
from kinemark.core import ops
from kinemark.core.cli import main
from kinemark.core.errors import KinemarkError
from kinemark.core.media import Sampling, pixel_sha
from kinemark.core.project import Project


def run(*args):
    return main([str(a) for a in args])


def cli(*args, env=None):
    """The installed command in its own process: a segfault there fails the test, not the run."""
    return subprocess.run([sys.executable, "-m", "kinemark.core.cli", *map(str, args)],
                          capture_output=True, text=True, env=env)


def _state(p: Project, mid: int):
    """Everything a relink may change, to show that a refused relink changed nothing."""
    m = p.store.media(mid)
    return (m.path, m.sha256, m.status, m.width, m.height,
            [(f.frame_index, f.pixel_sha) for f in p.store.frames(mid)], len(p.store.events()))


def _reencode(src: Path, dst: Path) -> Path:
    """Decode every frame and encode it again: the same recording, slightly different pixels."""
    cap = cv2.VideoCapture(str(src))
    fps = cap.get(cv2.CAP_PROP_FPS)
    out = None
    while True:
        ok, f = cap.read()
        if not ok:
            break
        if out is None:
            out = cv2.VideoWriter(str(dst), cv2.VideoWriter_fourcc(*"MJPG"), fps, (f.shape[1], f.shape[0]))
        out.write(f)
    cap.release()
    out.release()
    return dst


def _non_utf8(folder: Path, stem: bytes, suffix: str) -> Path:
    """A path in ``folder`` whose name is not valid UTF-8 (skips where the file system refuses it)."""
    path = folder / os.fsdecode(stem + suffix.encode())
    try:
        path.touch()
        path.unlink()
    except (OSError, UnicodeError):
        pytest.skip("this file system does not allow names that are not UTF-8")
    return path


@pytest.fixture
def walk(project, tmp_path):
    """Media 1: a 40-frame 160x120 clip at 10 fps, every 5th frame kept."""
    v = write_video(tmp_path / "QB-03_s1_walk.mp4", seed=3)
    ch, _ = ops.add_media(project, [v], participant="QB-03", sampling=Sampling(every=5))
    return project, ch.media[0], v


# ---- relink: the same recording only ------------------------------------------------------

@pytest.mark.parametrize("other,match", [
    (dict(size=(320, 240)), "320x240, not 160x120"),
    (dict(n_frames=100), "100 frames, not 40"),
    (dict(fps=25.0), "25 fps, not 10"),
])
def test_relink_refuses_a_different_video_and_changes_nothing(walk, tmp_path, other, match):
    p, mid, _ = walk
    before = _state(p, mid)
    o = write_video(tmp_path / "other.mp4", **{"seed": 3, **other})
    with pytest.raises(KinemarkError, match=match):
        ops.relink(p, mid, o)
    with pytest.raises(KinemarkError, match=match):     # not even with the confirmation
        ops.relink(p, mid, o, accept_changed_pixels=True)
    assert _state(p, mid) == before


def test_relink_accepts_a_moved_file(walk, tmp_path):
    p, mid, v = walk
    moved = tmp_path / "archive" / v.name
    moved.parent.mkdir()
    shutil.move(v, moved)
    ch = ops.relink(p, mid, moved)
    assert "0 of 8 frames' pixels changed" in ch.message
    assert p.media_path(p.store.media(mid)) == moved.resolve()


def test_relink_of_a_reencoded_copy_needs_confirmation(walk, tmp_path):
    p, mid, v = walk
    copy = _reencode(v, tmp_path / "QB-03_s1_walk_reencoded.avi")
    before = _state(p, mid)
    with pytest.raises(KinemarkError, match="8 of 8 sampled frames decode to different pixels.*"
                                            "--accept-changed-pixels"):
        ops.relink(p, mid, copy)
    assert _state(p, mid) == before
    ch = ops.relink(p, mid, copy, accept_changed_pixels=True)
    assert "8 of 8 frames' pixels changed" in ch.message
    cap = cv2.VideoCapture(str(copy))
    for _ in range(5):
        cap.grab()
    ok, frame5 = cap.read()
    cap.release()
    assert ok and p.store.frames(mid)[1].pixel_sha == pixel_sha(frame5)
    assert pixel_sha(p.read_frame(mid, 5)) == pixel_sha(frame5)


def test_relink_refuses_the_file_of_another_media(walk, tmp_path):
    p, mid, _ = walk
    twin = write_video(tmp_path / "QB-04_s1_walk.mp4", seed=4)      # same size, length and rate
    other = ops.add_media(p, [twin], sampling=Sampling(every=5))[0].media[0]
    before = _state(p, mid)
    with pytest.raises(KinemarkError, match=f"already in the project as media {other}"):
        ops.relink(p, mid, twin, accept_changed_pixels=True)
    assert _state(p, mid) == before


def test_relink_refuses_an_image_for_a_video(walk, tmp_path):
    p, mid, _ = walk
    with pytest.raises(KinemarkError, match="is an image, but this media is a video"):
        ops.relink(p, mid, write_image(tmp_path / "still.png", size=(160, 120)))


def test_cli_relink_confirmation_flag(walk, tmp_path, capsys):
    p, mid, v = walk
    copy = _reencode(v, tmp_path / "reencoded.avi")
    root = p.root
    p.close()
    assert run("relink", root, mid, copy) == 2
    err = capsys.readouterr().err
    assert "--accept-changed-pixels" in err and len(err.strip().splitlines()) == 1
    assert run("relink", root, mid, copy, "--accept-changed-pixels") == 0
    assert "8 of 8 frames' pixels changed" in capsys.readouterr().out


# ---- file names that are not UTF-8 ------------------------------------------------------------

def test_add_refuses_a_video_name_that_is_not_utf8(tmp_path):
    bad = _non_utf8(tmp_path, b"QB-01_s1_reach\xff", ".mp4")
    write_video(tmp_path / "ok.mp4")
    shutil.copy(tmp_path / "ok.mp4", bad)
    assert cli("new", tmp_path / "p").returncode == 0
    r = cli("add", tmp_path / "p", bad)
    assert r.returncode == 2, r                      # 139 (segfault in OpenCV) without the check
    assert "not valid UTF-8" in r.stderr and "\\xff" in r.stderr
    assert len(r.stderr.strip().splitlines()) == 1
    with Project.open(tmp_path / "p") as p:
        assert p.store.all_media() == []


def test_folder_add_skips_a_name_that_is_not_utf8_with_its_reason(tmp_path):
    d = tmp_path / "QB-02"
    d.mkdir()
    write_video(d / "QB-02_s1_sts.mp4", n_frames=10)
    shutil.copy(d / "QB-02_s1_sts.mp4", _non_utf8(d, b"QB-02_s2_sts\xff", ".mp4"))
    write_video(d / "QB-02_s2_reach.mp4", n_frames=10, seed=5)
    (d / "notes.txt").write_text("camera 2 was moved")
    assert cli("new", tmp_path / "p").returncode == 0
    r = cli("add", tmp_path / "p", d)
    assert r.returncode == 0, r
    assert "QB-02_s2_sts\\xff.mp4: its name is not valid UTF-8" in r.stdout
    assert "skipped 1 file(s) that are neither images nor videos" in r.stdout
    assert "added 2 media" in r.stdout and "skipped 1 media file(s) whose names are not valid UTF-8" in r.stdout


def test_add_image_with_a_name_that_is_not_utf8_is_a_user_error(project, tmp_path):
    ok = write_image(tmp_path / "ok.png")
    bad = _non_utf8(tmp_path, b"still\xff", ".png")
    os.rename(ok, bad)
    with pytest.raises(KinemarkError, match="not valid UTF-8"):    # not a database UnicodeEncodeError
        ops.add_media(project, [bad])
    ch, rep = ops.add_media(project, [bad], strict=False)
    assert ch.media == () and "not valid UTF-8" in rep.failed[0][1]
    assert project.store.frame_count() == 0


def test_relink_to_a_name_that_is_not_utf8(tmp_path):
    v = write_video(tmp_path / "v.mp4")
    assert cli("new", tmp_path / "p").returncode == 0
    assert cli("add", tmp_path / "p", v).returncode == 0
    bad = _non_utf8(tmp_path, b"v\xff", ".mp4")
    shutil.copy(v, bad)
    r = cli("relink", tmp_path / "p", 1, bad)
    assert r.returncode == 2 and "not valid UTF-8" in r.stderr, r


# ---- sampling rules ----------------------------------------------------------------------------

@pytest.mark.parametrize("rule,match", [
    (dict(seconds=1e-300), "--seconds"),            # looped for ever
    (dict(seconds=float("inf")), "--seconds"),      # OverflowError
    (dict(seconds=float("nan")), "--seconds"),
    (dict(seconds=-1.0), "--seconds"),
    (dict(seconds=0.0), "--seconds"),
    (dict(every=10 ** 30), "--every"),
    (dict(every=2.5), "--every"),
    (dict(every=True), "--every"),
    (dict(count=10 ** 30), "--count"),
    (dict(count=0), "--count"),
])
def test_sampling_refuses_rules_that_cannot_sample(rule, match):
    with pytest.raises(KinemarkError, match=match):
        Sampling(**rule)


def test_seconds_shorter_than_one_frame_of_the_video_is_refused():
    with pytest.raises(KinemarkError, match="less than one frame of this 10 fps video"):
        Sampling(seconds=0.05).indices(40, 10.0)
    assert Sampling(seconds=0.1).indices(40, 10.0) == list(range(40))       # exactly one frame is fine
    assert Sampling(seconds=1e6).indices(40, 10.0) == [0]


def test_add_with_too_short_seconds_names_the_file(project, video):
    with pytest.raises(KinemarkError, match=f"{video.name}: a frame every 0.01 s"):
        ops.add_media(project, [video], sampling=Sampling(seconds=0.01))
    assert project.store.frame_count() == 0


@pytest.mark.parametrize("session", [-5, 0, 10 ** 20])
def test_session_must_be_a_positive_whole_number(project, video, session):
    with pytest.raises(KinemarkError, match="--session must be a whole number from 1"):
        ops.add_media(project, [video], participant="QB-05", session=session)
    assert project.store.frame_count() == 0 and project.store.participants() == []


# ---- FFmpeg's own log ----------------------------------------------------------------------------

def test_truncated_mp4_gives_one_line_without_ffmpeg_noise(tmp_path):
    data = write_video(tmp_path / "full.mp4").read_bytes()
    cut = tmp_path / "cut.mp4"
    cut.write_bytes(data[: len(data) // 2])
    env = {k: v for k, v in os.environ.items() if k != "OPENCV_FFMPEG_LOGLEVEL"}
    assert cli("new", tmp_path / "p", env=env).returncode == 0
    r = cli("add", tmp_path / "p", cut, env=env)
    assert r.returncode == 2
    lines = r.stderr.strip().splitlines()
    assert lines and lines[0].startswith("kinemark: error:") and len(lines) == 1, r.stderr
