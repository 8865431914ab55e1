"""The Overview's numbers (core.overview): the pose map's projection and the per-keypoint
proposal figures."""
from __future__ import annotations

import numpy as np
import pytest

from conftest import write_video
from kinemark.core import ops
from kinemark.core.media import Sampling
from kinemark.core.metrics import joints_needing_move, keypoint_similarity, needs_move
from kinemark.core.model import ACCEPTED, DRAFTING, PREFILLED
from kinemark.core.overview import coverage, keypoint_figures, pca_2d
from kinemark.core.skeleton import COCO17


def test_pca_matches_the_covariance_eigenvectors():
    """Principal components as defined by Pearson (1901): the covariance matrix's leading
    eigenvectors; the variance shares are its eigenvalues over their sum."""
    rng = np.random.default_rng(3)
    X = rng.normal(size=(60, 5)) @ rng.normal(size=(5, 5)) + 7.0
    xy, share = pca_2d(X)
    C = np.cov(X, rowvar=False)
    vals, vecs = np.linalg.eigh(C)
    order = np.argsort(vals)[::-1]
    ref = (X - X.mean(0)) @ vecs[:, order[:2]]
    for k in range(2):   # an eigenvector's sign is arbitrary
        assert np.allclose(np.abs(xy[:, k]), np.abs(ref[:, k]), atol=1e-8)
    assert np.allclose(share, vals[order[:2]] / vals.sum())
    # missing values: filled with the column mean first
    Xm = X.copy()
    Xm[4, 2] = np.nan
    filled = X.copy()
    filled[4, 2] = np.nanmean(Xm[:, 2])
    assert np.allclose(np.abs(pca_2d(Xm)[0]), np.abs(pca_2d(filled)[0]))
    assert pca_2d(np.zeros((0, 3)))[0].shape == (0, 2)


def test_needs_move_is_the_per_joint_form_of_the_count():
    rng = np.random.default_rng(5)
    truth = np.column_stack([rng.uniform(50, 150, 17), rng.uniform(20, 220, 17), np.full(17, 2.0)])
    truth[3, 2] = 0
    prop = truth.copy()
    prop[:, :2] += rng.normal(0, 6, (17, 2))
    prop[8, 2] = 0
    area = 100.0 * 200.0
    mask = needs_move(truth, prop, area, COCO17.sigma_array)
    sim = keypoint_similarity(truth, prop, area, COCO17.sigma_array)
    expected = (truth[:, 2] > 0) & ((prop[:, 2] <= 0) | (sim < 0.5))
    assert np.array_equal(mask, expected) and mask[8] and not mask[3]
    assert mask.sum() == joints_needing_move(truth, prop, area, COCO17.sigma_array)
    assert np.array_equal(needs_move(truth, None, area, COCO17.sigma_array), truth[:, 2] > 0)


@pytest.fixture
def small(project, tmp_path):
    v = write_video(tmp_path / "v.mp4", n_frames=12)
    ops.add_media(project, [v], sampling=Sampling(count=4))
    return project, [f.id for f in project.store.frames()]


def _pose(dx=0.0, seed=0):
    rng = np.random.default_rng(seed)
    k = np.zeros((17, 3))
    k[:, 0] = np.linspace(40, 120, 17) + dx
    k[:, 1] = np.linspace(10, 110, 17) + rng.normal(0, 3, 17)
    k[:, 2] = 2
    return k


def test_keypoint_figures_count_moves_and_distances(small):
    project, fids = small
    s = project.store
    label = _pose()
    prop = label.copy()
    prop[5, 0] += 30.0          # far off: needs a move
    prop[6, 0] += 0.5           # close: kept
    prop[7, 2] = 0              # not proposed: needs a move, no distance
    s.save_proposal(fids[0], model_id="m", model_hash="h", keypoints=prop, confidence=np.ones(17),
                    signals={}, score=0.9)
    s.save_annotation(fids[0], label, ["human"] * 17, state=ACCEPTED)
    s.save_annotation(fids[1], _pose(5), ["human"] * 17, state=DRAFTING)   # not accepted: not compared
    fig = keypoint_figures(project)
    assert fig.compared.tolist() == [1] * 17
    assert fig.needs_move[5] == 1 and fig.needs_move[6] == 0 and fig.needs_move[7] == 1
    assert fig.median_px[5] == pytest.approx(30.0) and fig.median_px[6] == pytest.approx(0.5)
    assert np.isnan(fig.median_px[7])
    assert fig.by_state[ACCEPTED].sum() == 17 and fig.by_state[DRAFTING].sum() == 17


def test_coverage_places_labelled_pool_and_queued_poses(small):
    project, fids = small
    s = project.store
    s.save_annotation(fids[0], _pose(), ["human"] * 17, state=ACCEPTED)
    for i, fid in enumerate(fids[1:], 1):
        s.save_proposal(fid, model_id="m", model_hash="h", keypoints=_pose(seed=i), confidence=np.ones(17),
                        signals={}, score=0.9)
    s.save_annotation(fids[3], _pose(seed=3), ["model"] * 17, state=PREFILLED)
    cov = coverage(project, queued_ids=[fids[2]])
    got = dict(zip(cov.frame_ids.tolist(), cov.group.tolist()))
    assert got == {fids[0]: "labelled", fids[1]: "pool", fids[2]: "queued", fids[3]: "pool"}
    assert cov.xy.shape == (4, 2) and np.isfinite(cov.xy).all() and cov.without_pose == 0


def test_coverage_reads_the_proposals_the_ranking_reads(small, monkeypatch):
    """The pose map shows the pool in the pose space the queue measures novelty in, so with a
    network tuning in use a frame's pose is the tuned model's proposal (core.ranking.LiveQueue),
    and the raw one's again when the tuning is no longer in use."""
    from kinemark.core import ranking
    from kinemark.core.tuning import META_KEY, Tuning
    project, fids = small
    s = project.store
    for i, fid in enumerate(fids):
        s.save_proposal(fid, model_id="m", model_hash="h", keypoints=_pose(seed=i), confidence=np.ones(17),
                        signals={}, score=0.9)
    t = Tuning("h", {"w": np.ones(2, np.float32)}, {}, active=True)
    tuned = _pose(dx=7.0, seed=40)
    s.save_proposal(fids[1], model_id="m", model_hash=t.model_hash(), keypoints=tuned, confidence=np.ones(17),
                    signals={}, score=0.9, adapted=True)
    seen = {}
    real = ranking.normalise_poses

    def spy(kps, skel, **kw):
        seen["kps"] = np.array(kps)
        return real(kps, skel, **kw)

    monkeypatch.setattr(ranking, "normalise_poses", spy)

    def pose_of(fid):
        cov = coverage(project)
        return seen["kps"][cov.frame_ids.tolist().index(fid)]

    assert np.array_equal(pose_of(fids[1]), _pose(seed=1))        # no tuning stored
    s.set_meta(META_KEY, t.to_json())
    assert np.array_equal(pose_of(fids[1]), tuned)
    assert np.array_equal(pose_of(fids[2]), _pose(seed=2))        # the tuned model did not propose it
    s.set_meta(META_KEY, Tuning("h", {}, {}, active=False).to_json())
    assert np.array_equal(pose_of(fids[1]), _pose(seed=1))
