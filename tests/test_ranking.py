import itertools

import numpy as np
import pytest

from kinemark.core.ranking import (RankingQueue, RankWeights, _percentile_rank, joint_uncertainty,
                                   normalise_poses, pose_features)
from kinemark.core.skeleton import COCO17

NOVELTY_ONLY = RankWeights(uncertainty=0.0, novelty=1.0, same_clip_decay=0.0, dedup_window=-1,
                           novelty_cap=1e9)


def _kcenter_bruteforce(X, k, labelled=()):
    """Reference k-center greedy (Gonzalez 1985; the core-set step of Sener & Savarese, ICLR 2018),
    written from the definition with a full distance matrix."""
    D = np.sqrt(((X[:, None, :] - X[None, :, :]) ** 2).sum(-1))
    chosen = list(labelled)
    out = []
    for _ in range(k):
        if chosen:
            mind = D[:, chosen].min(axis=1)
        else:
            mind = np.full(len(X), np.inf)
        mind[chosen] = -1
        if not chosen:
            # with nothing labelled every point is infinitely novel: any first pick is valid;
            # follow the queue's own tie-breaking by returning None
            return None
        i = int(np.argmax(mind))
        out.append(i)
        chosen.append(i)
    return out


def test_k_center_greedy_matches_bruteforce():
    rng = np.random.default_rng(3)
    for trial in range(20):
        X = rng.normal(size=(30, 4))
        lab = [0, 1]
        q = RankingQueue(X, np.zeros(30), np.arange(30), np.zeros(30), NOVELTY_ONLY, labelled_feats=X[lab])
        q.excluded[lab] = True
        picks = [p[0] for p in q.select(6)]
        assert picks == _kcenter_bruteforce(X, 6, lab), trial


def test_nearest_labelled_distances_match_the_definition_in_every_block():
    rng = np.random.default_rng(4)
    X, L = rng.normal(size=(300, 34)), rng.normal(size=(23, 34))
    q = RankingQueue(X, np.zeros(300), np.zeros(300, int), np.arange(300), NOVELTY_ONLY)
    q.add_labelled_features(L[:20], chunk=64)       # blocks of 64 candidates, the last one short
    q.add_labelled_features(L[20:], chunk=7)        # folded in later, as labels arrive
    want = ((X[:, None, :] - L[None, :, :]) ** 2).sum(-1).min(axis=1)
    np.testing.assert_allclose(q.min_d, want, rtol=1e-9, atol=1e-9)


def test_k_center_greedy_is_within_twice_the_optimal_radius():
    """Gonzalez (1985): greedy farthest-point k-center is a 2-approximation. Optimum by brute force."""
    rng = np.random.default_rng(5)
    for trial in range(10):
        X = rng.uniform(size=(11, 2))
        k = 3
        q = RankingQueue(X, np.zeros(11), np.arange(11), np.zeros(11), NOVELTY_ONLY)
        picks = [p[0] for p in q.select(k)]
        D = np.sqrt(((X[:, None] - X[None]) ** 2).sum(-1))
        greedy_r = D[:, picks].min(axis=1).max()
        opt_r = min(D[:, list(c)].min(axis=1).max() for c in itertools.combinations(range(11), k))
        assert greedy_r <= 2 * opt_r + 1e-12


def test_ranking_is_deterministic_for_a_seed():
    rng = np.random.default_rng(0)
    X, u = rng.normal(size=(200, 6)), rng.uniform(size=200)
    media, index = rng.integers(0, 5, 200), rng.integers(0, 300, 200)
    a = RankingQueue(X, u, media, index, RankWeights(seed=4)).select(40)
    b = RankingQueue(X, u, media, index, RankWeights(seed=4)).select(40)
    assert a == b


def test_batch_has_no_near_duplicates():
    rng = np.random.default_rng(1)
    n = 400
    # two clips, slowly varying poses: neighbours in time are near-duplicates
    media = np.repeat([0, 1], n // 2)
    index = np.tile(np.arange(n // 2), 2)
    X = np.cumsum(rng.normal(scale=0.02, size=(n, 8)), axis=0)
    w = RankWeights(dedup_window=10, dedup_distance=0.3)
    picks = [p[0] for p in RankingQueue(X, rng.uniform(size=n), media, index, w).select(60)]
    for i, j in itertools.combinations(picks, 2):
        if media[i] == media[j] and abs(index[i] - index[j]) <= w.dedup_window:
            assert np.linalg.norm(X[i] - X[j]) > w.dedup_distance


def test_diminishing_returns_spread_a_batch_over_clips():
    rng = np.random.default_rng(2)
    n = 300
    media = np.repeat(np.arange(6), n // 6)
    index = np.tile(np.arange(n // 6) * 20, 6)
    u = rng.uniform(size=n) * 0.2
    u[media == 0] += 0.8            # one clip is much more uncertain than the rest
    X = rng.normal(size=(n, 4))
    picks = [p[0] for p in RankingQueue(X, u, media, index, RankWeights(novelty=0.0)).select(30)]
    counts = np.bincount(media[picks], minlength=6)
    assert counts[0] < 30 and (counts > 0).sum() >= 4
    flat = [p[0] for p in RankingQueue(X, u, media, index,
                                       RankWeights(novelty=0.0, same_clip_decay=0.0)).select(30)]
    assert np.bincount(media[flat], minlength=6)[0] == 30   # without the decay: all from one clip


def test_incremental_update_equals_rebuild():
    rng = np.random.default_rng(8)
    X, u = rng.normal(size=(150, 5)), rng.uniform(size=150)
    media, index = rng.integers(0, 4, 150), rng.integers(0, 1000, 150)
    lab0 = rng.normal(size=(5, 5))
    q = RankingQueue(X, u, media, index, RankWeights(), lab0)
    q.mark_labelled([3, 40, 77])
    fresh = RankingQueue(X, u, media, index, RankWeights(), np.vstack([lab0, X[[3, 40, 77]]]))
    fresh.excluded[[3, 40, 77]] = True
    assert q.select(20) == fresh.select(20)
    assert not {3, 40, 77} & {p[0] for p in q.select(20)}


def test_normalised_pose_is_invariant_to_shift_scale_rotation_and_mirror():
    rng = np.random.default_rng(0)
    k = np.column_stack([rng.uniform(100, 300, 17), rng.uniform(100, 400, 17), np.full(17, 2)])
    base = normalise_poses(k[None], COCO17)[0]
    a = np.deg2rad(25)
    R = np.array([[np.cos(a), -np.sin(a)], [np.sin(a), np.cos(a)]])
    k2 = k.copy()
    k2[:, :2] = (k[:, :2] @ R.T) * 1.7 + [40, -13]
    np.testing.assert_allclose(normalise_poses(k2[None], COCO17)[0], base, atol=1e-9)
    # the mirrored image of the same person (x -> -x, left/right names swapped) maps to the same pose
    m = k.copy()
    m[:, 0] = 1000 - m[:, 0]
    m = m[COCO17.flip_permutation()]
    np.testing.assert_allclose(normalise_poses(m[None], COCO17)[0], base, atol=1e-9)
    # torso: mid-hip at the origin, mid-shoulder one unit straight up
    hips, sh = base[[11, 12]].mean(0), base[[5, 6]].mean(0)
    np.testing.assert_allclose(hips, [0, 0], atol=1e-12)
    np.testing.assert_allclose(sh, [0, -1], atol=1e-12)


def test_missing_points_do_not_break_features():
    k = np.zeros((2, 17, 3))
    k[1, :, :2] = 50; k[1, :, 2] = 2
    f = pose_features(k, COCO17)
    assert np.isfinite(f).all()


def test_uncertainty_by_percentile():
    assert list(_percentile_rank(np.array([3.0, 1.0, 2.0, np.nan]))[:3]) == [1.0, 0.0, 0.5]
    sig = {"flip_disagreement": np.array([[0.0, 1.0], [0.5, 0.2]])}
    conf = np.array([[1.0, 0.1], [0.9, 0.8]])
    u = joint_uncertainty(sig, conf)
    assert u[0, 1] == pytest.approx(1.0) and u[0, 0] == pytest.approx(0.0)


def test_project_weights_are_checked_field_by_field():
    from kinemark.core.errors import KinemarkError
    w = RankWeights.parse_user('{"uncertainty": 2, "dedup_window": 9}')
    assert w.uncertainty == 2.0 and w.dedup_window == 9 and w.novelty == RankWeights().novelty
    assert RankWeights.from_json(w.to_json()) == w
    for bad, msg in [('{"bogus": 1}', "unknown ranking weight"), ('{"novelty": -1}', "negative"),
                     ('{"dedup_window": 2.5}', "whole number"), ('[1]', "JSON object"), ('{', "not valid JSON"),
                     ('{"novelty": true}', "number"), ('{"uncertainty": NaN}', "finite"),
                     ('{"novelty": 1e400}', "finite"), ('{"novelty_cap": 0}', "above 0")]:
        with pytest.raises(KinemarkError, match=msg):
            RankWeights.parse_user(bad)
    # weights stored before these checks existed are refused with a way out, not a crash
    with pytest.raises(KinemarkError, match="--set-weights"):
        RankWeights.from_json('{"novelty_cap": 0}')


def test_a_batch_needs_a_frame(project, tmp_path):
    from kinemark.core.errors import KinemarkError
    from kinemark.core.ranking import rank_queue
    _reason_project(project, tmp_path)
    for n in (0, -5):
        with pytest.raises(KinemarkError, match="at least one frame"):
            rank_queue(project, n)


def test_clip_decay_discounts_uncertainty_not_novelty():
    # Novelty has its own diminishing returns (the k-center update, Sener & Savarese 2018);
    # the per-clip decay is for uncertainty, which has none. So with uncertainty weighted 0
    # the decay changes nothing, and with novelty weighted 0 it does.
    rng = np.random.default_rng(5)
    n = 240
    media = np.repeat(np.arange(4), n // 4)
    index = np.tile(np.arange(n // 4) * 20, 4)
    X = rng.normal(size=(n, 6))
    X[media == 0] *= 3.0            # one clip holds most of the spread-out poses
    u = rng.uniform(size=n)

    def picks(**w):
        return [p[0] for p in RankingQueue(X, u, media, index, RankWeights(**w)).select(40)]
    assert picks(uncertainty=0.0, same_clip_decay=0.35) == picks(uncertainty=0.0, same_clip_decay=0.0)
    assert picks(novelty=0.0, same_clip_decay=0.35) != picks(novelty=0.0, same_clip_decay=0.0)


# ---- the queue's plain-words reasons, on a project -------------------------------------

def _pose(rng, arms_up: bool, shift=0.0):
    """A rough standing COCO-17 pose in a 160 x 120 frame (x, y, v); ``arms_up`` raises
    both wrists and elbows above the head. Invented test geometry."""
    xy = np.array([[80, 20], [77, 17], [83, 17], [74, 19], [86, 19], [70, 32], [90, 32],
                   [66, 48], [94, 48], [64, 62], [96, 62], [74, 64], [86, 64], [73, 86],
                   [87, 86], [73, 108], [87, 108]], float)
    if arms_up:
        xy[[7, 8, 9, 10]] = [[66, 18], [94, 18], [64, 4], [96, 4]]
    xy[:, 0] += shift
    return np.column_stack([xy + rng.normal(0, 0.3, xy.shape), np.full(17, 2.0)])


def _reason_project(project, tmp_path):
    """Ten frames of one video with proposals: frame 0 labelled (arms down), frames 1-8
    arms down with a little jitter (frame 3 exactly the labelled pose), frame 9 arms up. The
    model is unsure about the left wrist on frame 5 only."""
    from conftest import write_video
    from kinemark.core.media import Sampling
    from kinemark.core.model import DRAFTING
    from kinemark.core.ops import add_media
    ch, _ = add_media(project, [write_video(tmp_path / "reach.mp4", n_frames=50)], sampling=Sampling(every=5))
    fids = sorted(ch.frames)
    assert len(fids) == 10
    rng = np.random.default_rng(3)
    base = _pose(rng, False)
    for n, fid in enumerate(fids):
        k = _pose(rng, True) if n == 9 else base.copy() if n == 3 else _pose(rng, False)
        flip = np.full(17, 0.01)
        conf = np.full(17, 0.95)
        if n == 5:
            flip[9], conf[9] = 0.6, 0.1          # left wrist (COCO index 9)
        project.store.save_proposal(fid, model_id="m", model_hash="h", keypoints=k, confidence=conf,
                                    signals={"flip_disagreement": flip}, score=0.9)
    project.store.save_annotation(fids[0], base, ["human"] * 17, state=DRAFTING, action="save")
    return fids


def test_queue_reasons_name_the_unsure_joint_and_the_unlike_pose(project, tmp_path):
    from kinemark.core.ranking import rank_queue
    fids = _reason_project(project, tmp_path)
    # de-duplication off: it would drop the copies of the labelled pose from the batch
    by = {e.frame_id: e.reasons for e in rank_queue(project, 9, weights=RankWeights(dedup_window=-1))}
    assert len(by) == 9
    assert fids[0] not in by                                         # labelled: not queued
    assert any(r.startswith("model unsure about left wrist") for r in by[fids[5]])
    assert "pose unlike any labelled frame" in by[fids[9]]
    # exactly the labelled pose: not called unlike, and nobody unsure about it
    assert not any("unlike" in r for r in by[fids[3]])
    assert not any("unsure" in r for r in by[fids[3]])


def test_queue_reasons_name_only_signals_the_ranking_weighs(project, tmp_path):
    """With a weight set to 0 the queue does not use that signal, so it must not give it as
    the reason a frame is queued (the same frames as above: unsure left wrist, unlike pose)."""
    from kinemark.core.ranking import rank_queue
    fids = _reason_project(project, tmp_path)
    no_nov = {e.frame_id: e.reasons for e in rank_queue(project, 9, weights=RankWeights(
        dedup_window=-1, novelty=0.0))}
    assert not any("unlike" in r for rs in no_nov.values() for r in rs)
    assert any(r.startswith("model unsure about left wrist") for r in no_nov[fids[5]])
    no_unc = {e.frame_id: e.reasons for e in rank_queue(project, 9, weights=RankWeights(
        dedup_window=-1, uncertainty=0.0))}
    assert not any("unsure" in r for rs in no_unc.values() for r in rs)
    assert "pose unlike any labelled frame" in no_unc[fids[9]]


def test_queue_reasons_do_not_depend_on_the_batch_size(project, tmp_path):
    from kinemark.core.ranking import rank_queue
    _reason_project(project, tmp_path)
    w = RankWeights(dedup_window=-1)       # every frame queued, so the batch sizes differ
    long = rank_queue(project, 9, weights=w)
    assert len(long) == 9
    for n in (1, 2, 4):
        short = rank_queue(project, n, weights=w)
        assert [(e.frame_id, e.reasons) for e in short] == [(e.frame_id, e.reasons) for e in long[:n]]


def test_identical_poses_are_not_novel_from_rounding():
    """A pool of one repeated pose (a still patient, a paused video): the typical distance
    between pool poses is then about 0, and differences far below a visible change (here a
    ten-millionth of a torso length) must not count as novelty."""
    rng = np.random.default_rng(1)
    pose = rng.normal(size=8)
    X = np.tile(pose, (12, 1)) + rng.normal(0, 1e-7, (12, 8))
    q = RankingQueue(X, np.full(12, 0.5), np.zeros(12, int), np.arange(12) * 100,
                     RankWeights(dedup_window=-1), pose[None])
    nov = [p[3] for p in q.select(5)]
    assert max(nov) < 0.01


def test_queue_ranks_on_the_tuned_models_proposals_once_a_tuning_is_in_use(project, tmp_path):
    """With a network tuning in use, the doubt that matters is the tuned model's: its
    proposals (stored under the tuning's model hash, marked adapted) are what the queue ranks
    on, and the raw ones again once the tuning is no longer in use. The tuned proposals here
    are sure of frame 5's left wrist and unsure of frame 7's right wrist."""
    from kinemark.core.ranking import rank_queue
    from kinemark.core.tuning import META_KEY, Tuning
    fids = _reason_project(project, tmp_path)
    t = Tuning("h", {"w": np.ones(3, np.float32)}, {}, active=True)
    rng = np.random.default_rng(5)
    for n, fid in enumerate(fids):
        flip, conf = np.full(17, 0.01), np.full(17, 0.95)
        if n == 7:
            flip[10], conf[10] = 0.6, 0.1        # right wrist (COCO index 10)
        project.store.save_proposal(fid, model_id="m", model_hash=t.model_hash(), keypoints=_pose(rng, n == 9),
                                    confidence=conf, signals={"flip_disagreement": flip}, score=0.9,
                                    adapted=True)
    w = RankWeights(dedup_window=-1)

    def unsure():
        return {e.frame_id: [r for r in e.reasons if "unsure" in r] for e in rank_queue(project, 9, weights=w)}

    before = unsure()             # no tuning stored: the raw proposals
    assert any("left wrist" in r for r in before[fids[5]]) and not before[fids[7]]
    project.store.set_meta(META_KEY, t.to_json())
    tuned = unsure()
    assert any("right wrist" in r for r in tuned[fids[7]]) and not tuned[fids[5]]
    project.store.set_meta(META_KEY, Tuning("h", {}, {}, active=False).to_json())
    assert unsure() == before     # tuning no longer in use: back to the raw proposals
