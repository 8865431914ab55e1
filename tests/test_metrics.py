"""OKS checked against the reference evaluator, pycocotools' COCOeval.computeOks."""
import numpy as np
import pytest

from kinemark.core.metrics import bbox_from_keypoints, joints_needing_move, keypoint_similarity, oks
from kinemark.core.skeleton import COCO17


def _pycocotools_oks(gt_kps, gt_area, gt_bbox, dt_kps):
    from pycocotools.coco import COCO
    from pycocotools.cocoeval import COCOeval
    gt = COCO()
    gt.dataset = {"images": [{"id": 1, "width": 1000, "height": 1000}],
                  "annotations": [{"id": 1, "image_id": 1, "category_id": 1, "keypoints": list(gt_kps),
                                   "num_keypoints": int(np.sum(np.array(gt_kps[2::3]) > 0)),
                                   "area": gt_area, "bbox": list(gt_bbox), "iscrowd": 0}],
                  "categories": [{"id": 1, "name": "person"}]}
    gt.createIndex()
    dt = gt.loadRes([{"image_id": 1, "category_id": 1, "keypoints": list(dt_kps), "score": 1.0}])
    ev = COCOeval(gt, dt, iouType="keypoints")
    ev._prepare()
    return float(ev.computeOks(1, 1)[0, 0])


def test_oks_agrees_with_pycocotools_on_random_cases():
    rng = np.random.default_rng(42)
    for case in range(60):
        n_vis = 0 if case % 10 == 5 else int(rng.integers(1, 18))   # include ground truth with no labelled point
        g = np.zeros((17, 3))
        idx = rng.choice(17, n_vis, replace=False)
        g[idx, 0] = rng.uniform(10, 900, n_vis)
        g[idx, 1] = rng.uniform(10, 900, n_vis)
        g[idx, 2] = rng.choice([1, 2], n_vis)
        d = np.column_stack([rng.uniform(0, 1000, 17), rng.uniform(0, 1000, 17), np.ones(17)])
        if case % 3 == 0:   # near-correct detections
            d[:, :2] = g[:, :2] + rng.normal(0, 5, (17, 2))
        area = float(rng.choice([4.0, 50.0, 900.0, 40000.0]))   # includes very small boxes
        bbox = [float(rng.uniform(0, 500)), float(rng.uniform(0, 500)),
                float(rng.uniform(1, 60)), float(rng.uniform(1, 60))]
        ours = oks(g, d, area, COCO17.sigmas, gt_bbox=bbox)
        ref = _pycocotools_oks(g.ravel().tolist(), area, bbox, d.ravel().tolist())
        assert ours == pytest.approx(ref, abs=1e-9), case


def test_keypoint_similarity_definition():
    # COCO: ks_i = exp(-d_i^2 / (2 s^2 k_i^2)), k_i = 2 sigma_i, s^2 = area.
    g = np.zeros((17, 3)); g[:, 2] = 2
    d = g.copy(); d[0, 0] = 3.0
    area = 100.0
    k = 2 * COCO17.sigmas[0]
    expect = np.exp(-9.0 / (2 * area * k * k))
    assert keypoint_similarity(g, d, area, COCO17.sigmas)[0] == pytest.approx(expect, rel=1e-12)


def test_joints_needing_move():
    g = np.zeros((17, 3)); g[:, 0] = np.arange(17) * 10; g[:, 2] = 2
    g[16, 2] = 0  # not labelled in the truth: never counts
    area = 10000.0
    p = g.copy()
    assert joints_needing_move(g, p, area, COCO17.sigmas) == 0
    assert joints_needing_move(g, None, area, COCO17.sigmas) == 16
    p[3, 2] = 0            # missing point that should exist
    # similarity 0.5 at d^2 = 2 ln 2 * area * k^2; go just beyond for joint 5
    k5 = 2 * COCO17.sigmas[5]
    p[5, 0] += np.sqrt(2 * np.log(2) * area * k5 * k5) * 1.01
    p[6, 0] += np.sqrt(2 * np.log(2) * area * (2 * COCO17.sigmas[6]) ** 2) * 0.99
    assert joints_needing_move(g, p, area, COCO17.sigmas) == 2


def test_bbox_from_keypoints():
    k = np.array([[10, 20, 2], [30, 60, 1], [500, 500, 0]], float)
    assert bbox_from_keypoints(k, margin=0.0) == (10.0, 20.0, 20.0, 40.0)
    assert bbox_from_keypoints(k, margin=0.1) == pytest.approx((8.0, 16.0, 24.0, 48.0))
    assert bbox_from_keypoints(np.zeros((3, 3))) is None
