"""Editing operations behind the workspace: each change is stored at once, undo restores it."""
import cv2
import numpy as np
import pytest

from kinemark.core import edit
from kinemark.core.errors import KinemarkError
from kinemark.core.media import Sampling
from kinemark.core.model import ACCEPTED, BLANK, DRAFTING, IN_REVIEW, PREFILLED
from kinemark.core.ops import add_media

K = 17


def _texture(h, w, seed=0):
    rng = np.random.default_rng(seed)
    img = cv2.GaussianBlur(rng.integers(0, 255, (h, w), dtype=np.uint8), (0, 0), 2.0)
    return cv2.normalize(img, None, 0, 255, cv2.NORM_MINMAX)


def write_moving_video(path, n=12, size=(320, 240), step=(2.0, 1.0), fps=10.0):
    """Frame i is a fixed texture moved by i * step with cv2.warpAffine (the known shift)."""
    w, h = size
    base = _texture(h, w)
    vw = cv2.VideoWriter(str(path), cv2.VideoWriter_fourcc(*"MJPG"), fps, (w, h))
    assert vw.isOpened()
    for i in range(n):
        m = np.float32([[1, 0, step[0] * i], [0, 1, step[1] * i]])
        g = cv2.warpAffine(base, m, (w, h), flags=cv2.INTER_LINEAR, borderMode=cv2.BORDER_REFLECT)
        vw.write(cv2.cvtColor(g, cv2.COLOR_GRAY2BGR))
    vw.release()
    return path


@pytest.fixture
def clip(project, tmp_path):
    from conftest import write_video
    v = write_video(tmp_path / "c.mp4", n_frames=12)
    ch, _ = add_media(project, [v], sampling=Sampling(every=3))
    return project, [f.id for f in project.store.frames()]


def _proposal(project, fid, kps, conf=None, adapted=False):
    project.store.save_proposal(fid, model_id="test", model_hash="h" * 64, keypoints=kps,
                                confidence=conf if conf is not None else np.full(K, 0.8),
                                signals={}, score=0.9, adapted=adapted)


def test_set_point_stores_subpixel_floats_and_marks_human(clip):
    p, fids = clip
    ch = edit.set_point(p, fids[0], 3, 12.375, 40.625)
    a = p.store.annotation(fids[0])
    assert a.keypoints[3].tolist() == [12.375, 40.625, 2.0]
    assert a.sources[3] == "human" and a.state == DRAFTING
    assert ch.frames == (fids[0],) and ch.details["before"] == {fids[0]: None}
    assert p.store.events(entity="annotation")[-1].action == "edit"


def test_set_point_refuses_outside_the_frame(clip):
    p, fids = clip
    with pytest.raises(KinemarkError, match="outside"):
        edit.set_point(p, fids[0], 0, 500.0, 10.0)
    assert p.store.annotation(fids[0]) is None


def test_visibility_cycle_follows_coco_values(clip):
    p, fids = clip
    assert [edit.next_visibility(v) for v in (2, 1, 0)] == [1, 0, 2]
    edit.set_point(p, fids[0], 5, 30.0, 31.0)
    edit.set_visibility(p, fids[0], 5, 1)
    assert p.store.annotation(fids[0]).keypoints[5].tolist() == [30.0, 31.0, 1.0]
    edit.set_visibility(p, fids[0], 5, 0)
    assert p.store.annotation(fids[0]).keypoints[5].tolist() == [0.0, 0.0, 0.0]   # COCO (0, 0, 0)
    with pytest.raises(KinemarkError, match="place it first"):
        edit.set_visibility(p, fids[0], 5, 2)
    edit.set_visibility(p, fids[0], 5, 2, at=(7.5, 8.5))
    assert p.store.annotation(fids[0]).keypoints[5].tolist() == [7.5, 8.5, 2.0]


def test_working_starts_from_the_proposal_and_confirm_takes_it(clip):
    p, fids = clip
    kps = np.zeros((K, 3))
    kps[:, 0] = np.arange(K) + 10.0
    kps[:, 1] = 20.0
    kps[:, 2] = 2
    kps[4, 2] = 0
    _proposal(p, fids[1], kps, conf=np.linspace(0.1, 0.9, K))
    w = edit.working(p, fids[1])
    assert w.from_proposal and w.state == BLANK and set(w.sources) == {"model"}
    np.testing.assert_allclose(w.confidence, np.linspace(0.1, 0.9, K))
    edit.confirm(p, fids[1], [2])
    a = p.store.annotation(fids[1])
    assert a.sources[2] == "human" and a.sources[3] == "model"
    assert a.keypoints[2].tolist() == [12.0, 20.0, 2.0]
    edit.confirm(p, fids[1])
    assert set(p.store.annotation(fids[1]).sources) == {"human"}
    with pytest.raises(KinemarkError, match="nothing to confirm"):
        edit.confirm(p, fids[1])


def test_adapted_proposal_keeps_its_source(clip):
    p, fids = clip
    kps = np.column_stack([np.full(K, 5.0), np.full(K, 6.0), np.full(K, 2.0)])
    _proposal(p, fids[2], kps, adapted=True)
    assert set(edit.working(p, fids[2]).sources) == {"adapted"}


def test_restore_undoes_and_redoes_in_the_store(clip):
    p, fids = clip
    c1 = edit.set_point(p, fids[0], 0, 10.0, 11.0)
    after1 = edit.snapshot(p, fids[0])
    c2 = edit.set_point(p, fids[0], 0, 50.5, 60.5)
    after2 = edit.snapshot(p, fids[0])
    edit.restore(p, c2.details["before"], expect={fids[0]: after2})
    assert p.store.annotation(fids[0]).keypoints[0].tolist() == [10.0, 11.0, 2.0]
    edit.restore(p, c1.details["before"], expect={fids[0]: after1})
    assert p.store.annotation(fids[0]) is None            # back to blank
    assert p.store.events(entity="annotation")[-1].action == "undo"
    edit.restore(p, {fids[0]: after1}, expect={fids[0]: None}, action="redo")
    assert p.store.annotation(fids[0]).keypoints[0].tolist() == [10.0, 11.0, 2.0]


def test_restore_refuses_when_someone_changed_the_frame(clip):
    p, fids = clip
    c1 = edit.set_point(p, fids[0], 0, 10.0, 11.0)
    after1 = edit.snapshot(p, fids[0])
    edit.set_point(p, fids[0], 1, 20.0, 21.0)             # a later change not known to the caller
    with pytest.raises(KinemarkError, match="changed since"):
        edit.restore(p, c1.details["before"], expect={fids[0]: after1})
    assert p.store.annotation(fids[0]).keypoints[1].tolist() == [20.0, 21.0, 2.0]


def _save_right_after_the_check(p, monkeypatch, fid):
    """Team mode on PostgreSQL (read committed): another person's save can land after restore has
    compared the frame with what the caller expects and before it writes. Simulated by saving
    from inside that comparison, once it has passed."""
    real = edit._same

    def same_then_someone_saves(a, b):
        ok = real(a, b)
        if ok:
            w = edit.working(p, fid)
            kps = w.keypoints.copy()
            kps[2] = [33.0, 34.0, 2.0]
            p.store.save_annotation(fid, kps, ["human"] * K, state="drafting", expected_version=w.version)
        return ok
    monkeypatch.setattr(edit, "_same", same_then_someone_saves)


@pytest.mark.parametrize("first_edit", [True, False], ids=["undo-removes", "undo-rewrites"])
def test_restore_refuses_a_save_made_between_its_check_and_its_write(clip, monkeypatch, first_edit):
    p, fids = clip
    c1 = edit.set_point(p, fids[0], 0, 10.0, 11.0)
    c = c1
    if not first_edit:
        c = edit.set_point(p, fids[0], 0, 50.5, 60.5)
    after = edit.snapshot(p, fids[0])
    _save_right_after_the_check(p, monkeypatch, fids[0])
    # before the fix the undo went through and replaced (or removed) that save
    with pytest.raises(KinemarkError, match="changed by"):
        edit.restore(p, c.details["before"], expect={fids[0]: after})
    monkeypatch.undo()
    # the refused undo wrote nothing (here the simulated save shared its transaction, so it is
    # rolled back with it; on a real server it would stay)
    assert edit.snapshot(p, fids[0]).same(after)


def test_hand_in_needs_every_point_confirmed(clip):
    p, fids = clip
    kps = np.column_stack([np.full(K, 5.0), np.full(K, 6.0), np.full(K, 2.0)])
    _proposal(p, fids[0], kps)
    edit.set_point(p, fids[0], 0, 9.0, 9.0)
    with pytest.raises(KinemarkError, match="still come straight"):
        edit.hand_in(p, fids[0])
    edit.confirm(p, fids[0])
    edit.hand_in(p, fids[0])
    assert p.store.annotation(fids[0]).state == IN_REVIEW


def test_accepted_labels_are_frozen_until_a_reviewer_reopens_them(clip):
    from kinemark.core import review
    p, fids = clip
    p.store.add_user("ra2", "annotator")
    p.store.add_user("lead", "reviewer")
    edit.set_point(p, fids[0], 0, 9.0, 9.0)
    a = p.store.annotation(fids[0])
    p.store.set_state(a.id, ACCEPTED)
    for who in ("ra2", "ra1", "lead"):     # nobody edits an accepted label in place, not even an admin
        with pytest.raises(KinemarkError, match="accepted"):
            edit.set_point(p, fids[0], 0, 10.0, 9.0, user=who)
    review.reopen(p, a.id, [("nose", "nose is on the cheek")], user="lead")
    edit.set_point(p, fids[0], 0, 10.0, 9.0, user="ra2")
    assert p.store.annotation(fids[0]).state == DRAFTING


def test_prefilled_annotation_becomes_drafting_when_edited(clip):
    p, fids = clip
    kps = np.column_stack([np.full(K, 5.0), np.full(K, 6.0), np.full(K, 2.0)])
    p.store.save_annotation(fids[0], kps, ["model"] * K, state=PREFILLED)
    edit.set_point(p, fids[0], 0, 9.0, 9.0)
    a = p.store.annotation(fids[0])
    assert a.state == DRAFTING and a.sources[0] == "human" and a.sources[1] == "model"


def test_carry_forward_tracks_a_known_shift_through_a_sampled_video(project, tmp_path):
    step = (2.0, 1.0)
    v = write_moving_video(tmp_path / "move.avi", n=12, step=step)
    add_media(project, [v], sampling=Sampling(every=3))           # frames 0, 3, 6, 9
    fids = [f.id for f in project.store.frames()]
    pts = [(80.0, 60.0), (160.0, 120.0), (240.0, 170.0), (100.0, 180.0)]
    for i, (x, y) in enumerate(pts):
        edit.set_point(project, fids[0], i, x, y)
    ch = edit.carry_forward(project, fids[0], count=3)
    assert ch.frames == tuple(fids[1:])
    for n, fid in enumerate(fids[1:], start=1):
        a = project.store.annotation(fid)
        assert a.state == DRAFTING
        assert set(a.sources) == {"propagated"}
        shift = np.array(step) * 3 * n          # video frame index 3n
        np.testing.assert_allclose(a.keypoints[:4, :2] - np.array(pts), np.tile(shift, (4, 1)), atol=0.5)
        assert (a.keypoints[4:, 2] == 0).all()
    # a frame holding a person's work stops the carry, and is never written over
    edit.set_point(project, fids[2], 0, 5.0, 5.0)
    ch = edit.carry_forward(project, fids[0], count=3)
    assert ch.frames == (fids[1],)
    assert project.store.annotation(fids[2]).keypoints[0].tolist()[:2] == [5.0, 5.0]


def test_fill_between_interpolates_by_frame_index(project, tmp_path):
    from conftest import write_video
    v = write_video(tmp_path / "c.mp4", n_frames=12)
    add_media(project, [v], sampling=Sampling(every=3))           # frames 0, 3, 6, 9
    fids = [f.id for f in project.store.frames()]
    edit.set_point(project, fids[0], 0, 10.0, 20.0)
    edit.set_point(project, fids[3], 0, 40.0, 50.0)
    edit.set_point(project, fids[3], 1, 1.0, 1.0)                 # only on one keyframe
    assert edit.keyframe_before(project, fids[3]) == fids[0]
    ch = edit.fill_between(project, fids[0], fids[3])
    assert ch.frames == (fids[1], fids[2])
    a1, a2 = project.store.annotation(fids[1]), project.store.annotation(fids[2])
    np.testing.assert_allclose(a1.keypoints[0], [20.0, 30.0, 2])
    np.testing.assert_allclose(a2.keypoints[0], [30.0, 40.0, 2])
    assert a1.keypoints[1].tolist() == [0, 0, 0]
    assert a1.sources[0] == "propagated"
    # undo through the snapshots puts both frames back to blank
    after = {fid: edit.snapshot(project, fid) for fid in ch.frames}
    edit.restore(project, ch.details["before"], expect=after)
    assert project.store.annotation(fids[1]) is None and project.store.annotation(fids[2]) is None


def test_frame_states(clip):
    p, fids = clip
    edit.set_point(p, fids[1], 0, 9.0, 9.0)
    st = edit.frame_states(p, p.store.frames()[0].media_id)
    assert st[fids[1]] == DRAFTING and st[fids[0]] == BLANK
