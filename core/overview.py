"""Numbers behind the Overview pictures: where the labelled poses sit among all poses, and
how far the model's proposals were from accepted labels, per keypoint. Plain numpy over
what the store returns; the app draws them.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .metrics import bbox_from_keypoints, needs_move
from .model import ACCEPTED, DRAFTING, IN_REVIEW, PREFILLED, RETURNED

LABELLED = (DRAFTING, IN_REVIEW, ACCEPTED, RETURNED)


def pca_2d(features: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Project rows onto their first two principal components (Pearson 1901; via the SVD).

    Missing values are filled with their column's mean first (mean imputation, common practice).
    Returns (N, 2) coordinates and the share of variance of each of the two components.
    """
    X = np.asarray(features, float)
    if X.shape[0] == 0:
        return np.zeros((0, 2)), np.zeros(2)
    with np.errstate(invalid="ignore"):
        col = np.nanmean(np.where(np.isfinite(X), X, np.nan), axis=0)
    col = np.nan_to_num(col)
    X = np.where(np.isfinite(X), X, col)
    X = X - X.mean(axis=0)
    if X.shape[0] < 2:
        return np.zeros((X.shape[0], 2)), np.zeros(2)
    U, S, Vt = np.linalg.svd(X, full_matrices=False)
    k = min(2, Vt.shape[0])
    out = np.zeros((X.shape[0], 2))
    out[:, :k] = X @ Vt[:k].T
    var = S ** 2
    share = np.zeros(2)
    share[:k] = var[:k] / var.sum() if var.sum() > 0 else 0
    return out, share


@dataclass
class Coverage:
    xy: np.ndarray = field(default_factory=lambda: np.zeros((0, 2)))
    group: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype="<U8"))   # labelled|pool|queued
    frame_ids: np.ndarray = field(default_factory=lambda: np.zeros(0, int))
    share: np.ndarray = field(default_factory=lambda: np.zeros(2))
    without_pose: int = 0


def coverage(project, queued_ids=()) -> Coverage:
    """Labelled poses (a person's annotations), the pool (proposals on frames nobody labelled
    yet, of the model the ranking reads) and the queued part of the pool, in one 2-D
    projection of the pose space the ranking measures novelty in
    (:func:`core.ranking.normalise_poses`)."""
    from .ranking import current_model_hash, normalise_poses
    store = project.store
    labelled = {a.frame_id: a.keypoints for a in store.annotations(LABELLED)}
    # the proposal the ranking reads (LiveQueue): the tuned model's in use, else the raw one;
    # failing both, any the frame has
    in_use = current_model_hash(project)
    props, rank = {}, {}
    for p in store.proposals():
        if p.frame_id in labelled:
            continue
        r = 2 if p.adapted and p.model_hash == in_use else 1 if not p.adapted else 0
        if r >= rank.get(p.frame_id, -1):
            props[p.frame_id], rank[p.frame_id] = p.keypoints, r
    for a in store.annotations([PREFILLED]):
        if a.frame_id not in labelled and a.frame_id not in props:
            props[a.frame_id] = a.keypoints
    queued = set(int(q) for q in queued_ids)
    fids = list(labelled) + list(props)
    if not fids:
        return Coverage(without_pose=store.frame_count())
    kps = np.stack([labelled[f] if f in labelled else props[f] for f in fids])
    norm = normalise_poses(kps, project.skeleton)
    ok = np.isfinite(norm).any(axis=(1, 2))
    feats = norm.reshape(len(norm), -1)[ok]
    xy, share = pca_2d(feats)
    fids = np.array(fids)[ok]
    group = np.array(["labelled" if f in labelled else ("queued" if f in queued else "pool") for f in fids])
    return Coverage(xy, group, fids, share, store.frame_count() - len(fids))


@dataclass
class KeypointFigures:
    names: tuple
    compared: np.ndarray          # (K,) accepted labels with a proposal for this point
    needs_move: np.ndarray        # (K,) share of those where the proposal needed a move
    median_px: np.ndarray         # (K,) median distance proposal -> accepted label, pixels
    by_state: dict                # state -> (K,) labelled points (v > 0) per keypoint
    frames_by_state: dict         # state -> frames


def keypoint_figures(project) -> KeypointFigures:
    """Per keypoint: how far the model's proposal was from the accepted label, and how many
    labelled points each state holds. "Needed a move" is Kinemark's working definition
    (core.metrics.needs_move): no proposed point, or a per-keypoint OKS similarity below
    0.5, computed as pycocotools does, with the accepted label's box area as the object area."""
    store, skel = project.store, project.skeleton
    K = skel.num_keypoints
    props = {}
    for p in store.proposals():
        if p.frame_id not in props or not p.adapted:
            props[p.frame_id] = p
    dists = [[] for _ in range(K)]
    moves = np.zeros(K)
    compared = np.zeros(K)
    by_state = {s: np.zeros(K, int) for s in (PREFILLED,) + LABELLED}
    for a in store.annotations():
        by_state.setdefault(a.state, np.zeros(K, int))
        by_state[a.state] += (a.keypoints[:, 2] > 0).astype(int)
        if a.state != ACCEPTED or a.frame_id not in props:
            continue
        gt, dt = a.keypoints, props[a.frame_id].keypoints
        box = a.bbox or bbox_from_keypoints(gt)
        if box is None:
            continue
        move = needs_move(gt, dt, float(box[2] * box[3]), skel.sigma_array)
        for k in np.flatnonzero(gt[:, 2] > 0):
            compared[k] += 1
            moves[k] += move[k]
            if dt[k, 2] > 0:
                dists[k].append(float(np.hypot(*(dt[k, :2] - gt[k, :2]))))
    with np.errstate(invalid="ignore", divide="ignore"):
        share = np.where(compared > 0, moves / compared, np.nan)
    med = np.array([np.median(d) if d else np.nan for d in dists])
    frames = store.state_counts()
    return KeypointFigures(tuple(skel.keypoints), compared, share, med, by_state, frames)
