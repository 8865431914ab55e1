"""Keypoint similarity measures.

Object Keypoint Similarity (OKS) is the measure of the COCO keypoint challenge
(Lin et al., "Microsoft COCO: Common Objects in Context", ECCV 2014; the
keypoint evaluation defined on cocodataset.org). It is computed here exactly as
the reference evaluator ``pycocotools.cocoeval.COCOeval.computeOks`` does:

    e_i  = d_i² / (2σ_i)² / (area + eps) / 2        (so k_i = 2σ_i and s² = area)
    OKS  = mean over labelled ground-truth points (v > 0) of exp(-e_i)

and, when the ground truth has no labelled point, d is the distance of each
predicted point outside a box three times the size of the ground-truth box.
"""
from __future__ import annotations

import numpy as np

_EPS = np.spacing(1)


def keypoint_similarity(gt: np.ndarray, dt: np.ndarray, area: float, sigmas) -> np.ndarray:
    """Per-keypoint similarity exp(-d² / (2 s² k²)) with k = 2σ, s² = area (pycocotools' form)."""
    gt = np.asarray(gt, float).reshape(-1, 3)
    dt = np.asarray(dt, float).reshape(-1, 3)
    var = (np.asarray(sigmas, float) * 2) ** 2
    d2 = (dt[:, 0] - gt[:, 0]) ** 2 + (dt[:, 1] - gt[:, 1]) ** 2
    return np.exp(-(d2 / var / (area + _EPS) / 2))


def oks(gt: np.ndarray, dt: np.ndarray, area: float, sigmas, gt_bbox=None) -> float:
    """OKS of one detection against one ground truth, exactly as pycocotools computeOks.

    gt, dt: (K, 3) or flattened [x, y, v]*K. ``gt_bbox`` (x, y, w, h) is needed
    only when the ground truth has no labelled keypoint.
    """
    g = np.asarray(gt, float).reshape(-1, 3)
    d = np.asarray(dt, float).reshape(-1, 3)
    var = (np.asarray(sigmas, float) * 2) ** 2
    vg = g[:, 2]
    k1 = np.count_nonzero(vg > 0)
    if k1 > 0:
        dx = d[:, 0] - g[:, 0]
        dy = d[:, 1] - g[:, 1]
    else:
        if gt_bbox is None:
            raise ValueError("ground truth without labelled keypoints needs its bbox")
        bx, by, bw, bh = gt_bbox
        x0, x1 = bx - bw, bx + bw * 2
        y0, y1 = by - bh, by + bh * 2
        z = np.zeros(len(d))
        dx = np.max((z, x0 - d[:, 0]), axis=0) + np.max((z, d[:, 0] - x1), axis=0)
        dy = np.max((z, y0 - d[:, 1]), axis=0) + np.max((z, d[:, 1] - y1), axis=0)
    e = (dx ** 2 + dy ** 2) / var / (area + _EPS) / 2
    if k1 > 0:
        e = e[vg > 0]
    return float(np.sum(np.exp(-e)) / e.shape[0])


def needs_move(truth: np.ndarray, proposal: np.ndarray | None, area: float, sigmas,
               threshold: float = 0.5) -> np.ndarray:
    """(K,) bool: the joints a person must move to turn ``proposal`` into ``truth``.

    A joint needs a move when the truth labels it (v > 0) and either the
    proposal has no point there (v = 0, or no proposal at all) or their
    per-keypoint OKS similarity is below ``threshold`` (0.5). This is
    Kinemark's working definition for measuring labelling effort.
    """
    t = np.asarray(truth, float).reshape(-1, 3)
    need = t[:, 2] > 0
    if proposal is None:
        return need
    p = np.asarray(proposal, float).reshape(-1, 3)
    sim = keypoint_similarity(t, p, area, sigmas)
    missing = p[:, 2] <= 0
    return need & (missing | (sim < threshold))


def joints_needing_move(truth: np.ndarray, proposal: np.ndarray | None, area: float, sigmas,
                        threshold: float = 0.5) -> int:
    """How many joints need a move (:func:`needs_move`)."""
    return int(needs_move(truth, proposal, area, sigmas, threshold).sum())


def bbox_from_keypoints(kps: np.ndarray, margin: float = 0.1, image_size=None):
    """A box (x, y, w, h) around the labelled points, grown by ``margin`` of its size on each side.

    Keypoints lie inside the body, so a box through them is smaller than the
    person; growing it by a margin is common practice, not a standard.
    Returns None when no point is labelled.
    """
    k = np.asarray(kps, float).reshape(-1, 3)
    pts = k[k[:, 2] > 0, :2]
    if len(pts) == 0:
        return None
    x0, y0 = pts.min(axis=0)
    x1, y1 = pts.max(axis=0)
    w, h = x1 - x0, y1 - y0
    x0, y0, x1, y1 = x0 - margin * w, y0 - margin * h, x1 + margin * w, y1 + margin * h
    if image_size is not None:
        W, H = image_size
        x0, y0 = max(0.0, x0), max(0.0, y0)
        x1, y1 = min(float(W), x1), min(float(H), y1)
    return (float(x0), float(y0), float(max(x1 - x0, 1.0)), float(max(y1 - y0, 1.0)))
