"""Batch pre-fill: resumable, one bad frame never stops a batch, a person's points
are never written over, and parallel workers propose exactly what one worker does.

Most checks use a stand-in model whose keypoints are a function of the decoded
pixels (so a frame that was not really read gives the wrong answer); one check
runs the bundled model with two workers, the path `kinemark propose --workers 2`
takes.
"""
from __future__ import annotations

import os
import threading
from pathlib import Path

import numpy as np
import pytest

from kinemark.core import ops
from kinemark.core.errors import KinemarkError
from kinemark.core.media import Sampling
from kinemark.core.model import DRAFTING, PREFILLED
from kinemark.core.pose.base import PoseResult
from kinemark.core.prefill import prefill, split_runs
from kinemark.core.project import Project
from kinemark.core.skeleton import COCO17

from conftest import write_video

BUNDLED = Path(__file__).resolve().parents[1] / "assets" / "models" / "pose_landmark_full.onnx"


class PixelModel:
    """Keypoints derived from the frame's pixels; optionally fails on chosen frames."""

    model_id = "pixel-test"
    model_hash = "0" * 64

    def __init__(self, fail_on_mean=None):
        self.fail_on_mean = fail_on_mean or set()
        self.calls = []

    def predict(self, img, region=None, previous=None):
        m = float(img.mean())
        self.calls.append((round(m, 3), previous is not None))
        if round(m, 3) in self.fail_on_mean:
            raise KinemarkError("planted failure")
        k = np.arange(17, dtype=float)
        kps = np.stack([10 + k + m / 10, 20 + k, np.full(17, 2.0)], axis=1)
        sig = {"flip_disagreement": np.full(17, 0.01)}
        return PoseResult(kps, np.full(17, 0.9), sig, None, 0.9, None)


@pytest.fixture
def two_videos(tmp_path):
    p = Project.create(tmp_path / "proj", COCO17, owner="ra1")
    vids = [write_video(tmp_path / f"v{i}.mp4", n_frames=30, seed=i) for i in range(2)]
    ops.add_media(p, vids, sampling=Sampling(every=3))
    yield p
    p.close()


def _means(p):
    return {f.id: float(p.read_frame(f.media_id, f.frame_index).mean()) for f in p.store.frames()}


def test_every_frame_is_proposed_from_its_own_pixels_and_a_rerun_skips_them(two_videos):
    p = two_videos
    frames = p.store.frames()
    assert len(frames) == 20
    _, rep = prefill(p, adapter=PixelModel())
    assert rep.proposed == 20 and not rep.failed and rep.already_done == 0
    means = _means(p)
    for f in frames:
        a = p.store.annotation(f.id)
        assert a.state == PREFILLED and set(a.sources) == {"model"}
        assert a.keypoints[0, 0] == pytest.approx(10 + means[f.id] / 10, abs=1e-6)
        assert p.store.proposal(f.id).model_hash == PixelModel.model_hash
    again = PixelModel()
    _, rep2 = prefill(p, adapter=again)
    assert rep2.proposed == 0 and rep2.already_done == 20 and again.calls == []


def test_one_bad_frame_is_counted_and_the_rest_are_proposed(two_videos):
    p = two_videos
    means = _means(p)
    bad_id = sorted(means)[7]
    _, rep = prefill(p, adapter=PixelModel(fail_on_mean={round(means[bad_id], 3)}))
    assert rep.proposed == 19
    assert [fid for fid, _ in rep.failed] == [bad_id]
    assert "planted failure" in rep.failed[0][1] and "1 failed" in rep.summary()
    assert p.store.annotation(bad_id) is None
    # resumable: the next run only proposes the frame that failed
    model = PixelModel()
    _, rep2 = prefill(p, adapter=model)
    assert rep2.proposed == 1 and rep2.already_done == 19 and len(model.calls) == 1


def test_a_persons_points_are_never_written_over(two_videos):
    p = two_videos
    f0, f1 = p.store.frames()[:2]
    human = np.zeros((17, 3))
    human[:, :2] = 50.0
    human[:, 2] = 2
    p.store.save_annotation(f0.id, human, ["human"] * 17, state=DRAFTING)
    # a pre-filled frame where a person moved one point is a person's work too
    _, _ = prefill(p, adapter=PixelModel(), frame_ids=[f1.id])
    a1 = p.store.annotation(f1.id)
    moved = a1.keypoints.copy()
    moved[3, :2] += 5
    p.store.save_annotation(f1.id, moved, ["model"] * 3 + ["human"] + ["model"] * 13, state=PREFILLED)
    _, rep = prefill(p, adapter=PixelModel(), frames="all")
    assert rep.human_kept == 1      # f0; f1 was already proposed by this model hash
    assert np.array_equal(p.store.annotation(f0.id).keypoints, human)
    assert np.array_equal(p.store.annotation(f1.id).keypoints, moved)
    assert p.store.proposal(f0.id) is not None     # the proposal is stored beside the person's points
    # 'unlabelled' leaves both frames out entirely
    from kinemark.core.prefill import candidate_frames
    ids = {f.id for f in candidate_frames(p, "unlabelled")}
    assert f0.id not in ids and f1.id not in ids


def test_a_save_between_the_check_and_the_write_is_not_written_over(two_videos, monkeypatch):
    """Team mode: a person may save a frame after pre-fill has read it as untouched and before
    it writes; the write must be refused (named as that frame's failure), not replace the save."""
    p = two_videos
    f0 = p.store.frames()[0]
    human = np.zeros((17, 3))
    human[:, :2] = 50.0
    human[:, 2] = 2
    p.store.save_annotation(f0.id, human, ["human"] * 17, state=DRAFTING)
    real, reads = p.store.annotation, []

    def stale_first_read(fid, *a, **kw):
        # pre-fill's own read, as it was just before the person's save: nothing there yet
        reads.append(fid)
        return None if fid == f0.id and reads.count(fid) == 1 else real(fid, *a, **kw)

    monkeypatch.setattr(p.store, "annotation", stale_first_read)
    _, rep = prefill(p, adapter=PixelModel(), frames="all", frame_ids=[f0.id])
    monkeypatch.undo()
    assert np.array_equal(p.store.annotation(f0.id).keypoints, human)
    assert [fid for fid, _ in rep.failed] == [f0.id] and "changed by" in rep.failed[0][1]


def test_cancel_keeps_the_finished_part_and_a_rerun_finishes(two_videos):
    p = two_videos
    cancel = threading.Event()

    def progress(done, total, _msg):
        if done == 5:
            cancel.set()
    _, rep = prefill(p, adapter=PixelModel(), progress=progress, cancel=cancel)
    assert rep.cancelled and rep.proposed == 5
    _, rep2 = prefill(p, adapter=PixelModel())
    assert rep2.proposed == 15 and rep2.already_done == 5


def test_neighbouring_frames_seed_the_next_crop_only_within_one_video(tmp_path):
    p = Project.create(tmp_path / "proj", COCO17, owner="ra1")
    vids = [write_video(tmp_path / f"v{i}.mp4", n_frames=6, seed=i) for i in range(2)]
    ops.add_media(p, vids, sampling=Sampling(every=1))
    model = PixelModel()
    prefill(p, adapter=model, max_gap=2)
    # the first frame of each video starts from the whole frame; the rest get a hint
    assert [hint for _, hint in model.calls] == [False] + [True] * 5 + [False] + [True] * 5
    p.close()


class _F:
    def __init__(self, media_id, frame_index):
        self.media_id, self.frame_index = media_id, frame_index


def test_split_runs_keeps_videos_in_order_and_cuts_a_lone_long_video():
    frames = [_F(1, i) for i in range(40)]
    shards = split_runs(frames, 2)
    assert len(shards) == 2 and [len(s) for s in shards] == [20, 20]
    assert [f.frame_index for f in shards[0]] == list(range(20))
    assert [f.frame_index for f in shards[1]] == list(range(20, 40))
    # too short to be worth a second whole-frame pass: one worker
    assert len(split_runs([_F(1, i) for i in range(10)], 2)) == 1
    # several videos: whole videos, balanced, each in frame order
    mixed = [_F(m, i) for m, n in ((1, 30), (2, 12), (3, 14)) for i in range(n)]
    shards = split_runs(mixed, 2)
    assert sorted(len(s) for s in shards) == [26, 30]
    for s in shards:
        for a, b in zip(s, s[1:]):
            assert a.media_id != b.media_id or b.frame_index == a.frame_index + 1
    assert sorted((f.media_id, f.frame_index) for s in shards for f in s) == \
        sorted((f.media_id, f.frame_index) for f in mixed)
    assert split_runs([], 2) == [[]]


TWO_CORES = pytest.mark.skipif((os.cpu_count() or 1) < 2, reason="two workers need two cores")


@TWO_CORES
def test_two_workers_propose_what_one_worker_proposes(two_videos, tmp_path):
    p = two_videos
    made = []

    def make():
        m = PixelModel()
        made.append(m)
        return m
    _, rep = prefill(p, make_adapter=make, workers=2)
    assert rep.proposed == 20 and not rep.failed and len(made) == 2
    assert all(m.calls for m in made)           # both workers did some of the work
    means = _means(p)
    for f in p.store.frames():
        assert p.store.annotation(f.id).keypoints[0, 0] == pytest.approx(10 + means[f.id] / 10, abs=1e-6)


@TWO_CORES
@pytest.mark.skipif(not BUNDLED.is_file(), reason="bundled model not present")
def test_two_workers_with_the_bundled_model(tmp_path):
    """The default-model path of ``kinemark propose --workers 2`` (each worker loads its own session)."""
    results = {}
    for workers in (1, 2):
        p = Project.create(tmp_path / f"w{workers}", COCO17, owner="ra1")
        vids = [write_video(tmp_path / f"w{workers}v{i}.mp4", n_frames=12, seed=i) for i in range(2)]
        ops.add_media(p, vids, sampling=Sampling(every=4))   # gaps > max_gap: every frame starts afresh
        _, rep = ops.propose(p, workers=workers)
        assert rep.proposed == 6 and not rep.failed, rep.summary()
        results[workers] = [p.store.proposal(f.id).keypoints for f in p.store.frames()]
        p.close()
    for a, b in zip(results[1], results[2]):
        assert np.allclose(a, b, atol=0.05)   # one or two ONNX Runtime threads: same sums up to rounding


@TWO_CORES
def test_a_run_too_short_to_share_gets_both_threads(project, tmp_path, monkeypatch):
    """``--workers 2`` on a few frames of one video: nothing to share, so the one worker
    runs a 2-thread session instead of the 1-thread session each of two would have had."""
    import kinemark.core.pose as pose
    loaded = []

    def fake_load(project, *, threads=2, **kw):
        loaded.append(threads)
        return PixelModel()
    monkeypatch.setattr(pose, "load_adapter", fake_load)
    ops.add_media(project, [write_video(tmp_path / "short.mp4", n_frames=8)], sampling=Sampling(every=2))
    _, rep = prefill(project, workers=2)
    assert rep.proposed == 4 and not rep.failed
    assert loaded == [1, 2]           # loaded for two workers first, then again for one


@pytest.mark.parametrize("workers", [0, -1, 10_000])
def test_worker_count_outside_the_machine_is_refused(two_videos, workers):
    with pytest.raises(KinemarkError, match="--workers must be between 1 and"):
        prefill(two_videos, adapter=PixelModel(), workers=workers)
    assert two_videos.store.proposal_count() == 0


# ---- a person's box around the one person the model should look at ------------------------

class BoxModel(PixelModel):
    """The stand-in model, also keeping the region it was given; its pose is placed inside a
    given region, so a proposal from a box can be told from one without."""

    def __init__(self, score=0.9, unsure_from=None):
        super().__init__()
        self.regions, self.score, self.unsure_from = [], score, unsure_from

    def predict(self, img, region=None, previous=None):
        res = super().predict(img, region, previous)
        self.regions.append(region)
        kps = res.keypoints.copy()
        score = self.score
        if region is not None:
            # a pose 20 x 40 px, 3 px right of the region's centre (so a chain of boxes drifts
            # by 3 px a frame, which the test can follow)
            kps[:, 0] = region.cx + 3 + np.linspace(-10, 10, 17)
            kps[:, 1] = region.cy + np.linspace(-20, 20, 17)
            boxed = sum(r is not None for r in self.regions)
            if self.unsure_from is not None and boxed >= self.unsure_from:
                score = 0.3
        elif previous is not None:      # a crop from a neighbouring pose: the pose stays there
            kps[:, :2] = np.asarray(previous)[:, :2]
        return PoseResult(kps, res.confidence, res.signals, region, score, None)


def test_box_region_clips_orders_and_grows_the_box():
    from kinemark.core.prefill import BOX_MARGIN, box_region
    r = box_region((150, 90, 50, 10), 160, 120)        # corners in either order
    assert (r.cx, r.cy, r.source, r.angle) == (100.0, 50.0, "drawn", 0.0)
    assert r.w == pytest.approx(100 * (1 + 2 * BOX_MARGIN)) and r.h == pytest.approx(80 * (1 + 2 * BOX_MARGIN))
    r = box_region((-40, -40, 60, 60), 160, 120)       # clipped to the frame (pixel centres -0.5 ..)
    assert r.cx == pytest.approx((-0.5 + 60) / 2)
    for bad, match in (((10, 10, 14, 80), "too small"), ((500, 500, 600, 600), "too small"),
                       ((0, 0, float("nan"), 50), "finite"), ((1, 2, 3), "four numbers"),
                       (("a", 0, 1, 1), "four numbers")):
        with pytest.raises(KinemarkError, match=match):
            box_region(bad, 160, 120)


def test_a_box_re_proposes_a_frame_from_that_region(two_videos):
    p = two_videos
    f0, f1 = p.store.frames()[:2]
    prefill(p, adapter=BoxModel())                    # every frame proposed without a box
    assert p.store.annotation(f0.id).keypoints[0, 1] == 20.0
    model = BoxModel()
    _, rep = prefill(p, adapter=model, frames="all", frame_ids=[f0.id], boxes={f0.id: (60, 30, 100, 90)})
    # proposed again although this model had proposed it, from the box (grown by the margin)
    assert rep.proposed == 1 and rep.already_done == 0
    assert model.regions[0] is not None and model.regions[0].source == "drawn"
    assert (model.regions[0].cx, model.regions[0].cy) == (80.0, 60.0)
    # the box's pose replaced the proposal and the untouched pre-fill; the other frame is as it was
    assert p.store.proposal(f0.id).keypoints[:, 1].mean() == pytest.approx(60.0)
    assert p.store.annotation(f0.id).keypoints[:, 1].mean() == pytest.approx(60.0)
    assert p.store.annotation(f1.id).keypoints[0, 1] == 20.0


def test_a_box_never_writes_over_a_persons_points(two_videos):
    p = two_videos
    f0 = p.store.frames()[0]
    human = np.zeros((17, 3))
    human[:, :2], human[:, 2] = 50.0, 2
    p.store.save_annotation(f0.id, human, ["human"] * 17, state=DRAFTING)
    _, rep = prefill(p, adapter=BoxModel(), frames="all", frame_ids=[f0.id], boxes={f0.id: (60, 30, 100, 90)})
    assert rep.proposed == 1 and rep.human_kept == 1
    assert np.array_equal(p.store.annotation(f0.id).keypoints, human)


def test_a_box_for_a_frame_not_asked_for_is_refused_before_any_work(two_videos):
    p = two_videos
    f0, f1 = p.store.frames()[:2]
    model = BoxModel()
    with pytest.raises(KinemarkError, match="not among the frames"):
        prefill(p, adapter=model, frames="all", frame_ids=[f1.id], boxes={f0.id: (60, 30, 100, 90)})
    with pytest.raises(KinemarkError, match="too small"):
        prefill(p, adapter=model, frames="all", frame_ids=[f0.id], boxes={f0.id: (60, 30, 62, 90)})
    assert model.calls == [] and p.store.proposals() == []


@pytest.mark.parametrize("second_score,kept", [(0.95, "second"), (0.6, "first"), (0.3, "first")])
def test_a_box_takes_a_second_look_only_when_it_scores_no_lower(second_score, kept):
    from kinemark.core.prefill import predict_in_box
    from kinemark.core.pose.base import Region

    class TwoLooks:
        def __init__(self):
            self.n = 0

        def predict(self, img, region=None, previous=None):
            self.n += 1
            kps = np.column_stack([np.full(17, float(self.n)), np.zeros(17), np.full(17, 2.0)])
            return PoseResult(kps, np.ones(17), {}, region, 0.9 if self.n == 1 else second_score, None)
    res = predict_in_box(TwoLooks(), np.zeros((8, 8, 3), np.uint8), Region(4, 4, 8, 8, 0.0, "drawn"))
    assert res.keypoints[0, 0] == (2.0 if kept == "second" else 1.0)


def _centre(kps):
    vis = kps[:, 2] > 0
    lo, hi = kps[vis, :2].min(axis=0), kps[vis, :2].max(axis=0)
    return (lo + hi) / 2


def test_following_proposes_each_later_frame_from_the_pose_before_it(two_videos):
    from kinemark.core.prefill import follow_person
    p = two_videos
    prefill(p, adapter=BoxModel())
    media = p.store.all_media()[0].id
    frames = p.store.frames(media)                 # 10 sampled frames of the first video
    other = p.store.frames(p.store.all_media()[1].id)
    other_before = [p.store.proposal(f.id).keypoints.copy() for f in other]
    model = BoxModel()
    ch, rep = follow_person(p, frames[0].id, box=(40, 40, 80, 110), adapter=model)
    assert rep.proposed == 9 and "through 9 of the 9 later frame(s)" in ch.message and "lost" not in ch.message
    boxed = [r for r in model.regions if r is not None]
    assert len(boxed) == 9
    # the first later frame from the given box; each next one from the pose before it
    assert (boxed[0].cx, boxed[0].cy) == (60.0, 75.0)
    for n, f in enumerate(frames[1:]):
        assert (boxed[n].cx, boxed[n].cy) == pytest.approx((60.0 + 3 * n, 75.0))
        assert _centre(p.store.annotation(f.id).keypoints) == pytest.approx((63.0 + 3 * n, 75.0))
    # the start frame and the other video are left as they were
    assert p.store.annotation(frames[0].id).keypoints[0, 1] == 20.0
    assert all(np.array_equal(p.store.proposal(f.id).keypoints, k) for f, k in zip(other, other_before))


def test_following_stops_where_the_model_loses_the_person(two_videos):
    from kinemark.core.prefill import follow_person
    p = two_videos
    prefill(p, adapter=BoxModel())
    frames = p.store.frames(p.store.all_media()[0].id)
    ch, rep = follow_person(p, frames[0].id, box=(40, 40, 80, 110), adapter=BoxModel(unsure_from=4))
    # the 4th boxed frame scores 0.3: it is proposed (and says so), nothing after it
    assert rep.proposed == 4
    assert f"lost them at video frame {frames[4].frame_index}" in ch.message
    assert p.store.annotation(frames[5].id).keypoints[0, 1] == 20.0      # as the first pre-fill left it


def test_following_keeps_a_persons_points_and_follows_them(two_videos):
    from kinemark.core.prefill import follow_person
    p = two_videos
    prefill(p, adapter=BoxModel())
    frames = p.store.frames(p.store.all_media()[0].id)
    human = np.zeros((17, 3))
    human[:, 0] = np.linspace(100, 140, 17)
    human[:, 1] = np.linspace(40, 100, 17)
    human[:, 2] = 2
    p.store.save_annotation(frames[2].id, human, ["human"] * 17, state=DRAFTING)
    model = BoxModel()
    _, rep = follow_person(p, frames[0].id, box=(40, 40, 80, 110), adapter=model)
    assert rep.human_kept == 1 and np.array_equal(p.store.annotation(frames[2].id).keypoints, human)
    boxed = [r for r in model.regions if r is not None]
    assert (boxed[2].cx, boxed[2].cy) == (120.0, 70.0)     # the frame after it: from the person's points


def test_following_needs_a_pose_or_a_box(two_videos):
    from kinemark.core.prefill import follow_person
    p = two_videos
    f0 = p.store.frames()[0]
    with pytest.raises(KinemarkError, match="no pose to follow"):
        follow_person(p, f0.id, adapter=BoxModel())
    prefill(p, adapter=BoxModel(), frame_ids=[f0.id])
    _, rep = follow_person(p, f0.id, adapter=BoxModel())    # from the frame's own pre-fill
    assert rep.proposed == 9
