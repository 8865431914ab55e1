"""The ranking queue: which frames a person should label next, and why.

Three ingredients, per candidate frame:

* **uncertainty** of the proposal of the model in use (the tuned model's once
  a network tuning is in use, else the raw model's), from the per-joint
  signals stored with it (flip disagreement, multi-peak heatmap entropy, first/second pass
  disagreement, and one minus the model's own confidence). Each signal is
  turned into its percentile rank over the candidate pool (so signals with
  different units combine without hand-set scales) and averaged per joint;
  a frame's uncertainty is the mean of its three most uncertain joints.
* **novelty**: distance in pose space to the nearest labelled or already
  queued pose, as in the k-center greedy selection of Sener & Savarese,
  "Active Learning for Convolutional Neural Networks: A Core-Set Approach",
  ICLR 2018.
* **temporal de-duplication**: frames of the same video within
  ``dedup_window`` frames of a queued one are near-duplicates unless their
  pose differs by more than ``dedup_distance``.

Batch selection is greedy with diminishing returns, each ingredient its own:
after each pick the novelty of every candidate is updated against the picked
pose (the k-center step), and the uncertainty of candidates from the same
video is discounted (``same_clip_decay``), so a batch of 50 is not 50 uncertain
frames from one clip. Novelty is not discounted again by clip: a pose unlike
anything picked is worth as much in a clip already visited. Score per
candidate: ``uncertainty * u * clip_discount + novelty * nov``. Cost:
O(frames x batch).
"""
from __future__ import annotations

import json
import math
import warnings
from dataclasses import asdict, dataclass, field

import numpy as np

from .errors import KinemarkError
from .model import LABELLED_STATES
from .skeleton import Skeleton

SIGNALS = ("flip_disagreement", "heatmap_entropy", "pass_disagreement", "low_confidence")

# the smallest typical pool distance novelty is measured in (normalised pose units, torso
# lengths): below it, distances are rounding, not pose (a project choice)
MIN_NOVELTY_SCALE = 1e-3

# a queued frame's pose is called "unlike" the labelled ones when its nearest labelled or
# already-queued pose is at least this many typical pool distances away (the median distance
# between two of the project's poses; see RankingQueue.select). A project choice: the reason
# then depends on the frame and what came before it in the queue, never on the batch size
UNLIKE_DISTANCE = 0.5


@dataclass(frozen=True)
class RankWeights:
    """Per-project weights (stored as JSON in the project's ``ranking_weights`` setting)."""

    uncertainty: float = 1.0
    novelty: float = 1.0
    same_clip_decay: float = 0.35     # after a clip's k-th pick its uncertainty weighs 1 / (1 + decay * k)
    dedup_window: int = 15            # frames of one video this close are near-duplicates ...
    dedup_distance: float = 0.35      # ... unless their normalised poses differ by more than this
    embedding_weight: float = 0.0     # weight of the appearance embedding in pose space
    novelty_cap: float = 4.0          # novelty saturates at this many typical pool distances
    seed: int = 0                     # seeds the sample that sets the novelty scale

    def caveats(self) -> list[str]:
        """Plain-words warnings about weights that are valid but known to work against the job."""
        out = []
        if self.novelty == 0 and self.uncertainty > 0:
            # measured in session 6 (DEVELOPERS.md): seed 7 at 50 and 100 frames, not seed 23
            out.append("with novelty 0 the queue picks only frames the model is unsure of; on the sample "
                       "project's invented data ('kinemark bench queue'), a correction ('adapt') fitted on "
                       "50-100 such frames made other participants' proposals worse than the raw model's, "
                       "while its own cross-validated figures said better")
        return out

    @classmethod
    def from_json(cls, text: str | None) -> "RankWeights":
        if not text:
            return cls()
        data = json.loads(text)
        known = {k: v for k, v in data.items() if k in cls.__dataclass_fields__}
        from .errors import KinemarkError
        try:      # the same checks as a person's weights: stored ones may predate them
            return cls.parse_user(json.dumps(known))
        except KinemarkError as e:
            raise KinemarkError(f"the project's stored ranking weights cannot be used ({e}); set them again "
                                "with kinemark rank DIR --set-weights JSON") from None

    @classmethod
    def parse_user(cls, text: str, base: "RankWeights | None" = None) -> "RankWeights":
        """Weights from a person's JSON (e.g. '{"uncertainty": 2}'), checked field by field."""
        from .errors import KinemarkError
        try:
            data = json.loads(text)
        except json.JSONDecodeError as e:
            raise KinemarkError(f"ranking weights are not valid JSON: {e.msg}") from None
        if not isinstance(data, dict):
            raise KinemarkError("ranking weights must be a JSON object, e.g. {\"uncertainty\": 2}")
        fields = cls.__dataclass_fields__
        out = asdict(base or cls())
        for k, v in data.items():
            if k not in fields:
                raise KinemarkError(f"unknown ranking weight {k!r}; known: {', '.join(fields)}")
            kind = int if fields[k].type in ("int", int) else float
            # JSON as Python reads it also allows NaN, Infinity and 1e400 (= inf)
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) \
                    or (kind is int and v != int(v)):
                raise KinemarkError(f"ranking weight {k!r} must be a finite "
                                    f"{'whole ' if kind is int else ''}number")
            if k != "dedup_window" and v < 0:
                raise KinemarkError(f"ranking weight {k!r} must not be negative")
            if k == "novelty_cap" and v <= 0:
                raise KinemarkError("ranking weight 'novelty_cap' must be above 0 (novelty is measured in "
                                    "units of it)")
            out[k] = kind(v)
        return cls(**out)

    def to_json(self) -> str:
        return json.dumps(asdict(self), sort_keys=True)


@dataclass(frozen=True)
class QueueEntry:
    frame_id: int
    media_id: int
    frame_index: int
    score: float
    uncertainty: float
    novelty: float
    reasons: tuple[str, ...] = field(default=())


# ---- pose space ---------------------------------------------------------------------

def _pair(skeleton: Skeleton, a: str, b: str):
    try:
        return skeleton.index(a), skeleton.index(b)
    except Exception:
        return None


def normalise_poses(kps: np.ndarray, skeleton: Skeleton, *, canonical_sides: bool = True) -> np.ndarray:
    """Poses in a canonical frame: centred on the mid-hip, scaled by torso length, upright.

    kps: (N, K, 3). Returns (N, K, 2) with NaN where a point is missing
    (v = 0). Torso length is the mid-hip to mid-shoulder distance; the
    rotation puts the mid-shoulder straight above the mid-hip. With
    ``canonical_sides`` a pose and its mirror image (x mirrored, left and
    right keypoints swapped with the skeleton's flip pairs) share one
    representation: a reach with the left arm and the same reach with the
    right arm count as one pose for novelty.
    """
    with warnings.catch_warnings():   # all-missing poses give NaN rows, on purpose
        warnings.simplefilter("ignore", RuntimeWarning)
        return _normalise(np.asarray(kps, float), skeleton, canonical_sides)


def _normalise(kps, skeleton, canonical_sides):
    xy = kps[..., :2].copy()
    xy[kps[..., 2] <= 0] = np.nan
    hips, shoulders = _pair(skeleton, "left_hip", "right_hip"), _pair(skeleton, "left_shoulder", "right_shoulder")
    with np.errstate(invalid="ignore"):
        if hips and shoulders:
            mid_hip = np.nanmean(xy[:, list(hips)], axis=1)
            mid_sh = np.nanmean(xy[:, list(shoulders)], axis=1)
        else:   # a custom skeleton without a torso: centre on the mean, upright as drawn
            mid_hip = np.nanmean(xy, axis=1)
            mid_sh = mid_hip + np.array([0.0, -1.0])
        up = mid_sh - mid_hip
        torso = np.hypot(up[:, 0], up[:, 1])
        bad = ~np.isfinite(torso) | (torso < 1e-6)
        # fall back to the spread of the points when the torso is missing
        spread = np.sqrt(np.nanvar(xy[..., 0], axis=1) + np.nanvar(xy[..., 1], axis=1))
        torso = np.where(bad, spread, torso)
        centre = np.where(np.isfinite(mid_hip), mid_hip, np.nanmean(xy, axis=1))
        ang = np.where(bad, 0.0, np.arctan2(up[:, 0], -up[:, 1]))   # angle of "up" from image -y
    c, s = np.cos(ang), np.sin(ang)
    d = xy - centre[:, None, :]
    # rotate by -ang so that "up" becomes (0, -1)
    out = np.stack([c[:, None] * d[..., 0] + s[:, None] * d[..., 1],
                    -s[:, None] * d[..., 0] + c[:, None] * d[..., 1]], axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        out = out / torso[:, None, None]
    if canonical_sides and skeleton.flip_pairs:
        # A pose and its mirror image (x -> -x with left and right swapped) are one pose here:
        # keep the one whose points lean to image-right on balance. The balance (sum of x about
        # the mid-hip) changes sign under the mirror, so exactly one of the two is kept.
        perm = skeleton.flip_permutation()
        lean = np.nansum(out[..., 0], axis=1)
        flip = lean < 0
        if flip.any():
            m = out[flip][:, perm].copy()
            m[..., 0] *= -1
            out[flip] = m
    return out


def pose_features(kps: np.ndarray, skeleton: Skeleton, embeddings: np.ndarray | None = None,
                  embedding_weight: float = 0.0) -> np.ndarray:
    """Feature vectors for pose-space distances: normalised x, y (missing points at 0), plus embedding."""
    norm = normalise_poses(kps, skeleton)
    feats = np.nan_to_num(norm.reshape(len(norm), -1), nan=0.0, posinf=0.0, neginf=0.0)
    feats = np.clip(feats, -4.0, 4.0)
    if embeddings is not None and embedding_weight > 0:
        feats = np.hstack([feats, embedding_weight * np.nan_to_num(embeddings)])
    return feats.astype(np.float64)


# ---- uncertainty ----------------------------------------------------------------------

def _percentile_rank(a: np.ndarray) -> np.ndarray:
    """Rank of each finite value among the finite values, in [0, 1]; NaN stays NaN."""
    out = np.full(a.shape, np.nan)
    ok = np.isfinite(a)
    if ok.sum() == 0:
        return out
    vals = a[ok]
    order = np.argsort(vals, kind="mergesort")
    ranks = np.empty(len(vals))
    ranks[order] = np.arange(len(vals))
    # ties share their mean rank
    sv = vals[order]
    _, start, counts = np.unique(sv, return_index=True, return_counts=True)
    for st, cnt in zip(start, counts):
        if cnt > 1:
            ranks[order[st:st + cnt]] = st + (cnt - 1) / 2.0
    out[ok] = ranks / max(len(vals) - 1, 1)
    return out


def joint_uncertainty(signals: dict[str, np.ndarray], confidence: np.ndarray,
                      covered: np.ndarray | None = None) -> np.ndarray:
    """(N, K) per-joint uncertainty in [0, 1] from the stored signals, by pooled percentile rank."""
    conf = np.asarray(confidence, float)
    layers = []
    for name in SIGNALS:
        raw = 1.0 - conf if name == "low_confidence" else signals.get(name)
        if raw is None:
            continue
        raw = np.asarray(raw, float)
        if not np.isfinite(raw).any():
            continue
        r = _percentile_rank(raw.ravel()).reshape(raw.shape)
        layers.append(r)
    if not layers:
        return np.zeros(conf.shape)
    stack = np.stack(layers)
    with np.errstate(invalid="ignore"):
        u = np.nanmean(stack, axis=0) if np.isfinite(stack).any() else np.zeros(conf.shape)
    u = np.nan_to_num(u, nan=0.0)
    if covered is not None:
        u[:, ~np.asarray(covered, bool)] = 0.0
    return u


def frame_uncertainty(ju: np.ndarray, top: int = 3) -> np.ndarray:
    top = min(top, ju.shape[1])
    return np.sort(ju, axis=1)[:, -top:].mean(axis=1)


# ---- selection ------------------------------------------------------------------------

def _sq_dists(feats: np.ndarray, x: np.ndarray, sq_norms: np.ndarray) -> np.ndarray:
    return np.maximum(sq_norms - 2.0 * feats @ x + x @ x, 0.0)


class RankingQueue:
    """Pool state for batch selection; labels can be added incrementally.

    feats: (N, D) pose features of the candidate pool; uncertainty: (N,);
    media, index: (N,) int arrays (video and frame index of each candidate).
    """

    def __init__(self, feats, uncertainty, media, index, weights: RankWeights = RankWeights(),
                 labelled_feats: np.ndarray | None = None):
        self.feats = np.ascontiguousarray(feats, dtype=np.float64)
        self.sq = np.einsum("ij,ij->i", self.feats, self.feats)
        self.unc = np.asarray(uncertainty, float)
        self.media = np.asarray(media)
        self.index = np.asarray(index)
        self.w = weights
        n = len(self.feats)
        self.min_d = np.full(n, np.inf)          # squared distance to the nearest labelled pose
        self.excluded = np.zeros(n, bool)        # labelled pool members
        if labelled_feats is not None and len(labelled_feats):
            self.add_labelled_features(labelled_feats)

    def add_labelled_features(self, lf: np.ndarray, chunk: int = 8192):
        """Fold new labelled poses into the nearest-labelled distances: O(N x new), as one
        matrix product per block of candidates rather than one pass over the pool per pose."""
        lf = np.atleast_2d(np.asarray(lf, float))
        if not lf.size:
            return
        lsq = np.einsum("ij,ij->i", lf, lf)
        for s in range(0, len(self.feats), chunk):
            d = self.sq[s:s + chunk, None] - 2.0 * (self.feats[s:s + chunk] @ lf.T) + lsq[None, :]
            np.minimum(self.min_d[s:s + chunk], np.maximum(d, 0.0).min(axis=1), out=self.min_d[s:s + chunk])

    def mark_labelled(self, positions):
        """Pool members that just got labels: remove them and fold their poses in."""
        positions = np.asarray(list(positions), int)
        if len(positions) == 0:
            return
        self.excluded[positions] = True
        self.add_labelled_features(self.feats[positions])

    def select(self, batch: int) -> list[tuple[int, float, float, float]]:
        """Greedy batch: returns (position, score, uncertainty, novelty) in queue order."""
        n = len(self.feats)
        avail = ~self.excluded
        if batch <= 0 or not avail.any():
            return []
        min_d = self.min_d.copy()
        # the novelty scale: typical distance between pool poses (robust, from a sample)
        rng = np.random.default_rng(self.w.seed)
        sample = rng.choice(np.flatnonzero(avail), size=min(256, int(avail.sum())), replace=False)
        if len(sample) > 1:
            sf = self.feats[sample]
            d = np.sqrt(np.maximum(np.einsum("ij,ij->i", sf, sf)[:, None] - 2 * sf @ sf.T
                                   + np.einsum("ij,ij->i", sf, sf)[None, :], 0))
            scale = float(np.median(d[np.triu_indices(len(sf), 1)]))
            # a pool of (nearly) identical poses: rounding must not pass for a typical distance
            scale = max(scale, MIN_NOVELTY_SCALE)
        else:
            scale = 1.0
        clip_count: dict = {}
        decay = np.ones(n)
        picks = []
        win, dd2 = self.w.dedup_window, self.w.dedup_distance ** 2
        cap = self.w.novelty_cap
        for _ in range(min(batch, int(avail.sum()))):
            nov = np.sqrt(np.minimum(min_d, (cap * scale) ** 2)) / scale / cap   # in [0, 1]
            nov = np.where(np.isfinite(min_d), nov, 1.0)
            score = self.w.uncertainty * self.unc * decay + self.w.novelty * nov   # exact ties: the lowest position wins
            score = np.where(avail, score, -np.inf)
            i = int(np.argmax(score))
            if not np.isfinite(score[i]):
                break
            picks.append((i, float(score[i]), float(self.unc[i]), float(nov[i])))
            avail[i] = False
            d_new = _sq_dists(self.feats, self.feats[i], self.sq)
            np.minimum(min_d, d_new, out=min_d)
            same = self.media == self.media[i]
            near = same & (np.abs(self.index - self.index[i]) <= win) & (d_new <= dd2)
            avail[near] = False            # near-duplicates of the pick leave this batch
            clip_count[self.media[i]] = clip_count.get(self.media[i], 0) + 1
            decay[same] = 1.0 / (1.0 + self.w.same_clip_decay * clip_count[self.media[i]])
        return picks


# ---- project-level ----------------------------------------------------------------------

def _joint_phrase(names: list[str]) -> str:
    names = [n.replace("_", " ") for n in names]
    if len(names) == 1:
        return names[0]
    return ", ".join(names[:-1]) + " and " + names[-1]


def explain(joint_u: np.ndarray, names, uncertainty_pct: float, unlike: bool,
            has_labels: bool, clip_rank: int, *, weights: RankWeights | None = None) -> tuple[str, ...]:
    """Plain-words reasons for one queued frame. ``unlike``: its pose is far from every
    labelled or already-queued pose (:data:`UNLIKE_DISTANCE`). ``weights``: a signal the
    ranking gave no weight is not given as a reason (it did not put the frame there)."""
    reasons = []
    order = np.argsort(-joint_u)
    use_u = weights is None or weights.uncertainty > 0
    unsure = [names[j] for j in order[:3] if joint_u[j] >= 0.75] if use_u else []
    if unsure:
        reasons.append(f"model unsure about {_joint_phrase(unsure)}")
    elif use_u and uncertainty_pct >= 0.75:
        reasons.append("model less sure than usual across the body")
    if unlike and (weights is None or weights.novelty > 0):
        reasons.append("pose unlike any labelled frame" if has_labels else "pose unlike the others queued so far")
    if not reasons:
        reasons.append("adds coverage of this clip" if clip_rank == 0 else "fills a gap among queued frames")
    return tuple(reasons)


def current_model_hash(project) -> str | None:
    """The model hash of the project's network tuning in use, or None (the raw model's
    proposals then rank). A damaged stored tuning counts as none here: the queue is advice,
    and pre-fill reports the damage when it loads the model."""
    from .tuning import stored_tuning
    try:
        t = stored_tuning(project)
    except KinemarkError:
        return None
    return t.model_hash() if t is not None else None


class LiveQueue:
    """The project's queue, kept up to date as labels arrive.

    Built once from the stored proposals; :meth:`update` folds newly labelled
    frames in (O(pool x new labels)) instead of recomputing everything. New
    proposals (another pre-fill run) need :meth:`rebuild`.

    Each frame is ranked on the proposal of the model now in use: the tuned model's when the
    project has a network tuning in use (:mod:`.tuning`) and that model has proposed the
    frame, else the raw model's. Once a tuning is in use, the model's doubt that matters is
    the tuned model's: a frame the raw model got wrong and the tuned one gets right is no
    longer worth a person's time for that reason.
    """

    def __init__(self, project, weights: RankWeights | None = None):
        self.project = project
        self.weights = weights or RankWeights.from_json(project.store.get_meta("ranking_weights"))
        self.rebuild()

    def rebuild(self):
        store, skel, w = self.project.store, self.project.skeleton, self.weights
        self.frames = {f.id: f for f in store.frames()}
        labelled = {a.frame_id: a for a in store.annotations(LABELLED_STATES)}
        in_use = current_model_hash(self.project)
        props, tuned = {}, {}
        for p in store.proposals():
            if not p.adapted:
                props[p.frame_id] = p     # the newest raw proposal per frame
            elif p.model_hash == in_use:
                tuned[p.frame_id] = p     # the tuned model in use proposed it
        props.update(tuned)
        self.props = props
        self.labelled = set(labelled)
        self.pool = sorted(fid for fid in props if fid not in labelled and fid in self.frames)
        self.pos = {fid: i for i, fid in enumerate(self.pool)}
        K = skel.num_keypoints
        self.queue = None
        if not self.pool:
            return
        P = [props[f] for f in self.pool]
        kps = np.stack([p.keypoints for p in P])
        conf = np.stack([np.nan_to_num(p.confidence) for p in P])
        sig = {}
        for name in SIGNALS[:-1]:
            rows = [p.signals.get(name) for p in P]
            if any(r is not None for r in rows):
                sig[name] = np.stack([r if r is not None else np.full(K, np.nan) for r in rows])
        self.emb_dim = None
        if w.embedding_weight > 0 and all(p.embedding is not None for p in P):
            self.emb_dim = len(P[0].embedding)
        emb = np.stack([p.embedding for p in P]) if self.emb_dim else None
        self.ju = joint_uncertainty(sig, conf)
        self.unc = frame_uncertainty(self.ju)
        self.unc_pct = _percentile_rank(self.unc)
        feats = pose_features(kps, skel, emb, w.embedding_weight)
        self.media = np.array([self.frames[f].media_id for f in self.pool])
        self.index = np.array([self.frames[f].frame_index for f in self.pool])
        self.queue = RankingQueue(feats, self.unc, self.media, self.index, w,
                                  self._features_of(list(labelled.values())))

    def _features_of(self, annotations):
        if not annotations:
            return None
        kps = np.stack([a.keypoints for a in annotations])
        emb = None
        if self.emb_dim:
            emb = np.stack([self.props[a.frame_id].embedding
                            if a.frame_id in self.props and self.props[a.frame_id].embedding is not None
                            else np.zeros(self.emb_dim, np.float32) for a in annotations])
        return pose_features(kps, self.project.skeleton, emb, self.weights.embedding_weight)

    def update(self, frame_ids=None) -> int:
        """Fold in frames labelled since the last build or update. Returns how many.

        ``frame_ids``: the frames that may have changed (a front end knows them); only
        those are read. Without it every labelled annotation is read.
        """
        if frame_ids is None:
            now = {a.frame_id: a for a in self.project.store.annotations(LABELLED_STATES)}
        else:
            now = {}
            for fid in frame_ids:
                a = self.project.store.annotation(fid)
                if a is not None and a.state in LABELLED_STATES:
                    now[fid] = a
        new = [a for fid, a in now.items() if fid not in self.labelled]
        self.labelled |= set(now)
        if new and self.queue is not None:
            in_pool = [self.pos[a.frame_id] for a in new if a.frame_id in self.pos]
            self.queue.excluded[in_pool] = True
            self.queue.add_labelled_features(self._features_of(new))
        return len(new)

    def next(self, batch: int = 50) -> list[QueueEntry]:
        if int(batch) < 1:
            from .errors import KinemarkError
            raise KinemarkError(f"a batch needs at least one frame, not {batch}")
        skel = self.project.skeleton
        entries: list[QueueEntry] = []
        if self.queue is not None:
            picks = self.queue.select(batch)
            # novelty is in units of novelty_cap typical pool distances (RankingQueue.select)
            unlike_at = UNLIKE_DISTANCE / self.weights.novelty_cap
            seen_clip: dict = {}
            for i, score, u, nv in picks:
                cr = seen_clip.get(self.media[i], 0)
                seen_clip[self.media[i]] = cr + 1
                reasons = explain(self.ju[i], skel.keypoints, self.unc_pct[i],
                                  nv >= unlike_at, bool(self.labelled), cr, weights=self.weights)
                entries.append(QueueEntry(self.pool[i], int(self.media[i]), int(self.index[i]),
                                          score, u, nv, reasons))
        if len(entries) < batch:
            rest = [f for fid, f in sorted(self.frames.items())
                    if fid not in self.labelled and fid not in self.props]
            for f in rest[: batch - len(entries)]:
                entries.append(QueueEntry(f.id, f.media_id, f.frame_index, 0.0, float("nan"),
                                          float("nan"), ("no model proposal yet",)))
        return entries


def rank_queue(project, batch: int = 50, *, weights: RankWeights | None = None) -> list[QueueEntry]:
    """The next ``batch`` frames worth labelling, with reasons.

    Candidates are frames with a stored proposal and no person's labels yet;
    labelled frames (drafting, in review, accepted, returned) are the poses
    novelty is measured against. Frames without a proposal come after, in
    media order, with the reason "no model proposal yet".
    """
    return LiveQueue(project, weights).next(batch)
