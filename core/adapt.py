"""Per-project adaptation: a light correction of the model's proposals learnt from accepted labels.

Method: one small regression per joint, from the proposal in crop
coordinates (every joint's x, y and confidence, plus the appearance
embedding when there is one) to that joint's residual (label minus proposal)
in crop coordinates. Crop coordinates are the proposal's own region, rotated
upright and divided by its size, so one correction serves people of any size
anywhere in the frame. Each joint's regression is either linear ridge
regression (Hoerl & Kennard, "Ridge Regression: Biased Estimation for
Nonorthogonal Problems", Technometrics 1970) or kernel ridge regression with a
Gaussian (RBF) kernel (Saunders, Gammerman & Vovk, "Ridge Regression Learning
Algorithm in Dual Variables", ICML 1998) on all features or on the pose
alone, whichever the cross-validation below scores higher: the model's errors
on a new population are often not linear in its own output (a knee that is
placed too high only when the leg is bent, say).

The regularisation is chosen by cross-validation grouped by participant
(leave-one-participant-out when there are enough participants), scored by
the held-out per-keypoint OKS similarity: every figure here is measured on
people the fit did not see. A joint keeps its correction only when it beats
the raw model on those held-out people;
otherwise that joint falls back to the raw model. Human points are never
touched: the correction only changes what pre-fill proposes.

The other adaptation, re-training the model's heatmap layers on the labels, is in
:mod:`.tuning`; while a project uses a tuned model, this correction is still fitted (on the raw
model's proposals) but its points are not pre-filled.
"""
from __future__ import annotations

import json
from dataclasses import dataclass, field

import numpy as np

from .errors import KinemarkError
from .model import ACCEPTED, IN_REVIEW, PREFILLED, Changes

# up to 1e5: with an unpenalised intercept that is nearly a constant per-joint shift
LAMBDAS = (0.3, 1.0, 3.0, 10.0, 30.0, 100.0, 300.0, 1e3, 1e4, 1e5)
MIN_FRAMES = 8
# training trims: residuals over 3x the joint's median, or none; cross-validation picks per joint
TRIMS = (3.0, float("inf"))
MIN_T = 2.0
# kernel ridge candidates: the RBF kernel exp(-gamma |z - z'|^2 / F) on the F standardised
# features (dividing by F makes gamma independent of how many features there are), with these
# gammas and penalties (a project choice, measured on the demo data: see DEVELOPERS.md)
GAMMAS = (0.03, 0.1, 0.3, 1.0)
KERNEL_LAMBDAS = (0.01, 0.1, 1.0, 10.0)
# the kernel's views of the features, each a candidate chosen per joint by cross-validation:
# every feature, or the pose alone (every joint's crop x, y: the first 2K columns, see
# features()). An isotropic kernel weighs every feature alike, so with few labelled frames the
# appearance embedding and the confidences can drown the pose in distance
KERNEL_VIEWS = ("all", "pose")
# the kernel candidates need an n x n eigendecomposition per fold, gamma and view: above this
# many labelled frames only linear ridge is tried (a project choice, to keep a refit within
# seconds: about 6.4 s at 783 frames on the 2-core development machine)
KERNEL_MAX_FRAMES = 800
# a frame is corrected only within this many times the widest nearest-neighbour gap among
# the labelled frames (in standardised feature space): a project choice, see Support
SUPPORT_FACTOR = 1.5
# a keypoint needs a move when its OKS similarity to the truth is below this (the demo's and
# the benchmark's definition of "joints to move")
MOVE_SIMILARITY = 0.5
# the cross-validation scores a candidate per held-out keypoint by STEP_WEIGHT times a
# logistic step of its similarity at MOVE_SIMILARITY, STEP_WIDTH wide (a smooth count of the
# keypoints within the move threshold: what the annotator is spared), plus the rest of the
# weight on the similarity itself (so a correction of points already within the threshold
# still counts). Project choices, measured on two draws of the demo scenario: see DEVELOPERS.md
STEP_WIDTH = 0.05
STEP_WEIGHT = 0.8


# ---- crop coordinates -----------------------------------------------------------------

def to_crop(xy: np.ndarray, region: dict) -> np.ndarray:
    """Frame pixels -> region coordinates: upright, centred, in units of the region's size."""
    c, s = np.cos(region["angle"]), np.sin(region["angle"])
    d = np.asarray(xy, float) - [region["cx"], region["cy"]]
    u = (c * d[..., 0] + s * d[..., 1]) / region["w"]
    v = (-s * d[..., 0] + c * d[..., 1]) / region["h"]
    return np.stack([u, v], axis=-1)


def from_crop(uv: np.ndarray, region: dict) -> np.ndarray:
    c, s = np.cos(region["angle"]), np.sin(region["angle"])
    u = np.asarray(uv, float)[..., 0] * region["w"]
    v = np.asarray(uv, float)[..., 1] * region["h"]
    return np.stack([region["cx"] + c * u - s * v, region["cy"] + s * u + c * v], axis=-1)


def features(kps_crop: np.ndarray, confidence: np.ndarray, embedding: np.ndarray | None,
             regressed_crop: np.ndarray | None = None) -> np.ndarray:
    """One row per sample: every joint's crop x, y, its confidence, the embedding, and (when
    given) how far the model's regression head put each joint from the reported point, in
    crop units (the heatmap decoding and the regression disagree where one of them is off)."""
    n = len(kps_crop)
    parts = [np.nan_to_num(kps_crop.reshape(n, -1)), np.nan_to_num(confidence.reshape(n, -1))]
    if embedding is not None:
        parts.append(np.nan_to_num(embedding.reshape(n, -1)))
    if regressed_crop is not None:
        parts.append(np.nan_to_num((regressed_crop - kps_crop).reshape(n, -1)))
    return np.hstack(parts)


def regressed_points(signals: dict | None, K: int) -> np.ndarray | None:
    """(K, 2) the regression head's points stored with a proposal (frame pixels), or None
    for a proposal made before they were stored (or by a model that has none)."""
    if not signals or "regressed_x" not in signals or "regressed_y" not in signals:
        return None
    xy = np.column_stack([np.asarray(signals["regressed_x"], float), np.asarray(signals["regressed_y"], float)])
    return xy if xy.shape == (K, 2) else None


# ---- the regression -------------------------------------------------------------------

def ridge_fit(X: np.ndarray, Y: np.ndarray, lam: float):
    """Ridge with an unpenalised intercept, on standardised features. Returns (mean, scale, W, b)."""
    mu = X.mean(axis=0)
    sd = X.std(axis=0)
    sd[sd < 1e-12] = 1.0
    Z = (X - mu) / sd
    ym = Y.mean(axis=0)
    A = Z.T @ Z + lam * np.eye(Z.shape[1])
    W = np.linalg.solve(A, Z.T @ (Y - ym))
    return mu, sd, W, ym


def ridge_predict(model, X):
    mu, sd, W, b = model
    return ((X - mu) / sd) @ W + b


def sq_distances(A: np.ndarray, B: np.ndarray) -> np.ndarray:
    """(len(A), len(B)) squared Euclidean distances between rows."""
    d2 = np.einsum("ij,ij->i", A, A)[:, None] + np.einsum("ij,ij->i", B, B)[None, :] - 2.0 * A @ B.T
    return np.maximum(d2, 0.0)


def rbf_kernel(A: np.ndarray, B: np.ndarray, gamma: float) -> np.ndarray:
    """Gaussian kernel exp(-gamma |a - b|^2 / F) between the rows of A and B (F columns)."""
    return np.exp(-gamma * sq_distances(A, B) / max(A.shape[1], 1))


def _view_columns(view: str, n_features: int, K: int) -> slice:
    """Columns of the feature row a kernel view uses (see :data:`KERNEL_VIEWS`)."""
    return slice(0, min(2 * K, n_features)) if view == "pose" else slice(0, n_features)


def kernel_ridge_fit(Kmat: np.ndarray, Y: np.ndarray, lam: float):
    """Kernel ridge regression in its dual form (Saunders et al. 1998) with an unpenalised
    mean: alpha = (K + lam I)^-1 (Y - ȳ); a new row's prediction is k(row, train) @ alpha + ȳ.
    Returns (alpha, ȳ)."""
    ym = Y.mean(axis=0)
    alpha = np.linalg.solve(Kmat + lam * np.eye(len(Kmat)), Y - ym)
    return alpha, ym


def ridge_path(X: np.ndarray, Y: np.ndarray, lambdas) -> list:
    """:func:`ridge_fit` for several penalties from one eigendecomposition.

    With Z standardised (so centred), the solution for penalty λ is
    V (E + λ)^-1 Vᵀ Zᵀ (Y - ȳ) where Zᵀ Z = V E Vᵀ: one decomposition serves
    every λ. With fewer frames than features the n x n matrix Z Zᵀ = U S Uᵀ is
    decomposed instead: W = Zᵀ U (S + λ)^-1 Uᵀ (Y - ȳ), the same solution.
    Returns one (mean, scale, W, b) per λ, in order.
    """
    mu = X.mean(axis=0)
    sd = X.std(axis=0)
    sd[sd < 1e-12] = 1.0
    Z = (X - mu) / sd
    ym = Y.mean(axis=0)
    Yc = Y - ym
    if len(Z) < Z.shape[1]:
        s_, U = np.linalg.eigh(Z @ Z.T)
        s_ = np.maximum(s_, 0.0)
        P = U.T @ Yc
        return [(mu, sd, Z.T @ (U @ (P / (s_ + lam)[:, None])), ym) for lam in lambdas]
    e, V = np.linalg.eigh(Z.T @ Z)
    e = np.maximum(e, 0.0)
    P = V.T @ (Z.T @ Yc)
    return [(mu, sd, V @ (P / (e + lam)[:, None]), ym) for lam in lambdas]


@dataclass
class Samples:
    """Training data in crop coordinates.

    X: (N, F) features; R: (N, K, 2) residuals (NaN where the label has no
    point or the model does not cover it); groups: (N,) participant codes;
    area: (N,) object area s² in crop units (for OKS); vis: (N, K) truth visibility.
    """

    X: np.ndarray
    R: np.ndarray
    groups: np.ndarray
    area: np.ndarray
    vis: np.ndarray

    def take(self, rows) -> "Samples":
        """The samples of ``rows`` (indices or a boolean mask)."""
        return Samples(self.X[rows], self.R[rows], self.groups[rows], self.area[rows], self.vis[rows])


def _folds(groups: np.ndarray, max_folds: int = 6):
    uniq = sorted(set(groups.tolist()))
    if len(uniq) >= 2:
        k = min(len(uniq), max_folds)
        return [np.isin(groups, uniq[i::k]) for i in range(k)]
    return []


def _sim(err2: np.ndarray, area: np.ndarray, sigmas: np.ndarray) -> np.ndarray:
    """Per-keypoint OKS similarity from squared errors (pycocotools' form: k = 2σ, s² = area)."""
    return np.exp(-err2 / ((2 * sigmas) ** 2)[None, :] / (area[:, None] + np.spacing(1)) / 2)


@dataclass
class Support:
    """Where a correction may be applied: near the frames it was fitted on.

    A linear correction fitted on one kind of frame (say, only the model's
    failures, or one camera view) extrapolates wildly to frames unlike any of
    them, and cross-validation cannot notice, because every fold holds the same
    kind of frame. So a frame is corrected only if, in the standardised feature
    space, its nearest labelled frame is within ``radius``: ``SUPPORT_FACTOR``
    times the largest distance from a labelled frame to its own nearest other
    labelled frame (a project choice: the labelled set's widest gap, with room).
    Outside, the raw proposal stands.
    """

    mu: np.ndarray
    sd: np.ndarray
    points: np.ndarray        # (N, F) the labelled frames' standardised features
    radius: float

    @classmethod
    def of(cls, X: np.ndarray, factor: float = SUPPORT_FACTOR) -> "Support":
        mu = X.mean(axis=0)
        sd = X.std(axis=0)
        sd[sd < 1e-12] = 1.0
        # rounded as stored (to_json), so a correction covers the same frames before and
        # after it is saved
        Z = np.round((X - mu) / sd, 5).astype(np.float32)
        d = _nearest(Z, Z, exclude_self=True)
        gap = float(np.max(d[np.isfinite(d)])) if np.isfinite(d).any() else 0.0
        return cls(mu, sd, Z, factor * gap)

    def covers(self, X: np.ndarray) -> np.ndarray:
        Z = ((np.asarray(X, float) - self.mu) / self.sd).astype(np.float32)
        return _nearest(Z, self.points) <= self.radius


def _nearest(A: np.ndarray, B: np.ndarray, *, exclude_self: bool = False, chunk: int = 2048) -> np.ndarray:
    """(len(A),) Euclidean distance from each row of A to its nearest row of B."""
    bb = np.einsum("ij,ij->i", B, B)
    out = np.empty(len(A))
    for s in range(0, len(A), chunk):
        a = A[s:s + chunk]
        d2 = np.einsum("ij,ij->i", a, a)[:, None] + bb[None, :] - 2.0 * a @ B.T
        if exclude_self:
            d2[np.arange(len(a)), np.arange(s, s + len(a))] = np.inf
        out[s:s + chunk] = np.sqrt(np.maximum(d2.min(axis=1), 0.0)) if d2.shape[1] else np.inf
    return out


@dataclass
class Correction:
    """A fitted per-project correction (or the decision not to use one)."""

    model_hash: str
    use: np.ndarray                 # (K,) bool: joints whose correction beat the raw model
    # joint -> linear (mu, sd, W, b), or kernel ("rbf", gamma, rows, alpha, b, view): rows index
    # the support's points, the kernel's training frames; view names their columns
    models: dict = field(default_factory=dict)
    lam: dict = field(default_factory=dict)
    trim: dict = field(default_factory=dict)      # joint -> the training trim chosen (inf: none)
    kind: dict = field(default_factory=dict)      # joint -> "linear" or "rbf" (kernel ridge)
    gamma: dict = field(default_factory=dict)     # joint -> the kernel's gamma (kernel joints)
    heldout_raw: dict = field(default_factory=dict)       # joint -> held-out mean OKS similarity, raw
    heldout_adapted: dict = field(default_factory=dict)   # joint -> the same, corrected
    heldout_move_raw: dict = field(default_factory=dict)      # joint -> held-out share needing a move, raw
    heldout_move_adapted: dict = field(default_factory=dict)  # joint -> the same, corrected
    summary: dict = field(default_factory=dict)
    with_embedding: bool = False
    with_regression: bool = False   # features include the regression head's points
    support: "Support | None" = None

    @property
    def active(self) -> bool:
        return bool(np.any(self.use))

    def covers(self, X: np.ndarray) -> np.ndarray:
        """(N,) bool: frames close enough to the labelled ones to be corrected."""
        X = np.atleast_2d(X)
        return self.support.covers(X) if self.support is not None else np.ones(len(X), bool)

    def predict_residual(self, X: np.ndarray, K: int, inside: np.ndarray | None = None) -> np.ndarray:
        """Predicted residuals; zero for frames outside the labelled frames' support.

        ``inside``: :meth:`covers` of ``X`` when the caller already has it.
        """
        out = np.zeros((len(X), K, 2))
        if inside is None:
            inside = self.covers(X)
        d2: dict = {}
        Z = None
        for j, m in self.models.items():
            if not self.use[j] or not inside.any():
                continue
            if _is_kernel(m):
                _, gamma, rows, alpha, b, view = m
                sup = self.support
                if Z is None:
                    Z = (np.asarray(X[inside], float) - sup.mu) / sup.sd
                if view not in d2:   # one distance matrix per view serves every kernel joint
                    c = _view_columns(view, Z.shape[1], K)
                    zc = Z[:, c]
                    d2[view] = sq_distances(zc, sup.points[:, c].astype(np.float64)) / max(zc.shape[1], 1)
                out[inside, j] = np.exp(-gamma * d2[view][:, rows]) @ alpha + b
            else:
                out[inside, j] = ridge_predict(m, X[inside])
        return out

    def to_json(self) -> str:
        sup = self.support
        return json.dumps({
            "support": None if sup is None else {"mu": sup.mu.tolist(), "sd": sup.sd.tolist(),
                                                 "points": np.round(sup.points, 5).tolist(),
                                                 "radius": sup.radius},
            "model_hash": self.model_hash, "use": self.use.astype(int).tolist(),
            "models": {str(j): ({"kind": "rbf", "gamma": m[1], "rows": np.asarray(m[2]).tolist(),
                                 "alpha": m[3].tolist(), "b": m[4].tolist(), "view": m[5]} if _is_kernel(m)
                                else [a.tolist() for a in m]) for j, m in self.models.items()},
            "lam": {str(j): v for j, v in self.lam.items()},
            "trim": {str(j): (v if np.isfinite(v) else None) for j, v in self.trim.items()},
            "kind": {str(j): v for j, v in self.kind.items()},
            "gamma": {str(j): v for j, v in self.gamma.items()},
            "heldout_raw": {str(j): v for j, v in self.heldout_raw.items()},
            "heldout_adapted": {str(j): v for j, v in self.heldout_adapted.items()},
            "heldout_move_raw": {str(j): v for j, v in self.heldout_move_raw.items()},
            "heldout_move_adapted": {str(j): v for j, v in self.heldout_move_adapted.items()},
            "summary": self.summary, "with_embedding": self.with_embedding,
            "with_regression": self.with_regression})

    @classmethod
    def from_json(cls, text: str) -> "Correction":
        d = json.loads(text)
        return cls(model_hash=d["model_hash"], use=np.array(d["use"], bool),
                   models={int(j): _model_from_json(m) for j, m in d["models"].items()},
                   lam={int(j): v for j, v in d["lam"].items()},
                   trim={int(j): (float("inf") if v is None else v) for j, v in d.get("trim", {}).items()},
                   kind={int(j): v for j, v in d.get("kind", {}).items()},
                   gamma={int(j): v for j, v in d.get("gamma", {}).items()},
                   heldout_raw={int(j): v for j, v in d["heldout_raw"].items()},
                   heldout_adapted={int(j): v for j, v in d["heldout_adapted"].items()},
                   heldout_move_raw={int(j): v for j, v in d.get("heldout_move_raw", {}).items()},
                   heldout_move_adapted={int(j): v for j, v in d.get("heldout_move_adapted", {}).items()},
                   summary=d.get("summary", {}), with_embedding=d.get("with_embedding", False),
                   with_regression=d.get("with_regression", False),
                   support=None if not d.get("support") else Support(
                       np.array(d["support"]["mu"]), np.array(d["support"]["sd"]),
                       np.array(d["support"]["points"], dtype=np.float32).reshape(
                           -1, len(d["support"]["mu"])), float(d["support"]["radius"])))


def _is_kernel(m) -> bool:
    return isinstance(m[0], str)


def _model_from_json(m):
    if isinstance(m, dict):
        return ("rbf", float(m["gamma"]), np.array(m["rows"], dtype=int), np.array(m["alpha"], float),
                np.array(m["b"], float), str(m.get("view", "all")))
    return tuple(np.array(a) for a in m)


def _joint_sim(res: np.ndarray, area: np.ndarray, var_j: float) -> np.ndarray:
    """Per-frame OKS similarity of one joint's residuals (var_j = (2 sigma)^2, area = s^2)."""
    return np.exp(-(res ** 2).sum(axis=1) / var_j / (area + np.spacing(1)) / 2)


def _step(sim: np.ndarray) -> np.ndarray:
    """Logistic step of OKS similarity at :data:`MOVE_SIMILARITY`, :data:`STEP_WIDTH` wide."""
    return 0.5 * (1.0 + np.tanh((sim - MOVE_SIMILARITY) / (2.0 * STEP_WIDTH)))


def _objective(sim: np.ndarray) -> np.ndarray:
    """The cross-validation's per-keypoint score of a held-out similarity (see STEP_WEIGHT)."""
    return STEP_WEIGHT * _step(sim) + (1.0 - STEP_WEIGHT) * sim


def _kernel_cv(s: Samples, folds, d2_all: np.ndarray, gammas, lambdas, var) -> dict:
    """Held-out similarity gains of the kernel ridge candidates, per joint.

    Returns joint -> one list per candidate (gamma-major, then lambda) of per-fold arrays
    of (corrected - raw) similarity, on every frame where the joint has a residual
    (untrimmed), folds skipped as :func:`fit_correction` skips them. Joints with the same
    labelled frames share one eigendecomposition of the kernel per fold and gamma, which
    serves every penalty: (K + lam I)^-1 = U (E + lam)^-1 U^T.
    """
    N, K, _ = s.R.shape
    ok_all = np.isfinite(s.R).all(axis=2)
    out = {j: [[] for _ in range(len(gammas) * len(lambdas))] for j in range(K)}
    for test in folds:
        for gi, g in enumerate(gammas):
            k_full = np.exp(-g * d2_all)
            cache: dict = {}
            for j in range(K):
                ok = ok_all[:, j]
                tr, te = ok & ~test, ok & test
                if tr.sum() < 3 or te.sum() == 0:
                    continue
                key = ok.tobytes()
                if key not in cache:
                    e, U = np.linalg.eigh(k_full[np.ix_(tr, tr)])
                    cache[key] = (np.maximum(e, 0.0), U, k_full[np.ix_(te, tr)])
                e, U, k_te = cache[key]
                Y = s.R[tr, j]
                ym = Y.mean(axis=0)
                P = U.T @ (Y - ym)
                r0 = _joint_sim(s.R[te, j], s.area[te], var[j])
                for li, lam in enumerate(lambdas):
                    pred = k_te @ (U @ (P / (e + lam)[:, None])) + ym
                    out[j][gi * len(lambdas) + li].append(_joint_sim(s.R[te, j] - pred, s.area[te], var[j]) - r0)
    return out


def fit_correction(s: Samples, sigmas: np.ndarray, model_hash: str = "", *,
                   lambdas=LAMBDAS, min_frames: int = MIN_FRAMES, trims=TRIMS,
                   gammas=GAMMAS, kernel_lambdas=KERNEL_LAMBDAS, views=KERNEL_VIEWS,
                   kernel_max_frames: int = KERNEL_MAX_FRAMES) -> Correction:
    """Fit per-joint corrections with participant-grouped cross-validation.

    Candidates per joint: linear ridge at each of ``lambdas``, and (with at most
    ``kernel_max_frames`` frames) kernel ridge at each of ``gammas`` x
    ``kernel_lambdas`` on each of ``views`` (:data:`KERNEL_VIEWS`); ``gammas=()``
    leaves only the linear ones. The kernel's
    features are standardised once over every labelled frame, as the final fit
    is (unlabelled feature statistics only; residuals never enter it).

    Scored by what labelling cares about, keypoints the annotator need not
    move: each held-out keypoint's OKS similarity exp(-d² / (2 s² k²)) (k = 2σ,
    s² = area, as pycocotools) through mostly a logistic step at the move
    threshold (:func:`_step`, a smooth count of keypoints within it) and partly
    the similarity itself (:func:`_objective`). A joint's
    correction is kept only if that held-out score beats the raw model's on
    the same held-out frames, by a paired t statistic above ``MIN_T`` (chance
    gains on a small set are not taken). The correction records, per joint,
    the held-out mean similarity and share of frames needing a move, raw and
    corrected.

    Large residuals are either wild misses, which would pull a linear fit
    off (trimming them is common practice in robust regression), or the very
    systematic error the correction is for (say, one camera view where the
    model always puts the knees too high). Which one a joint has is not known
    beforehand, so the trim is a second hyperparameter, chosen with the
    regularisation by the same participant-grouped cross-validation: each of
    ``trims`` (multiples of the joint's median residual; ``inf`` is no trim).
    Kernel candidates are scored on the untrimmed frames only (:func:`_kernel_cv`).
    """
    N, K, _ = s.R.shape
    folds = _folds(s.groups)
    corr = Correction(model_hash=model_hash, use=np.zeros(K, bool))
    if N < min_frames or not folds:
        corr.summary = {"frames": int(N), "participants": int(len(set(s.groups.tolist()))),
                        "reason": (f"needs at least {min_frames} labelled frames with proposals from at "
                                   f"least 2 participants")}
        return corr
    var = (2 * np.asarray(sigmas, float)) ** 2
    support = Support.of(s.X)
    cands = [("linear", lam, None, None) for lam in lambdas]
    kernel_cands: list = []
    kernel_cv: dict = {}
    if gammas and N <= kernel_max_frames:
        # the kernel's distances, per view, on the features standardised over every labelled
        # frame (the final fit's standardisation; features only, no residual enters it)
        zs = support.points.astype(np.float64)
        for view in views:
            c = _view_columns(view, zs.shape[1], K)
            d2 = sq_distances(zs[:, c], zs[:, c]) / max(zs[:, c].shape[1], 1)
            kernel_cands += [("rbf", lam, g, view) for g in gammas for lam in kernel_lambdas]
            for j, lists in _kernel_cv(s, folds, d2, gammas, kernel_lambdas, var).items():
                kernel_cv.setdefault(j, []).extend(lists)
    for j in range(K):
        ok = np.isfinite(s.R[:, j]).all(axis=1)
        if ok.sum() < min_frames:
            continue
        rn = np.linalg.norm(np.where(ok[:, None], s.R[:, j], 0.0), axis=1)
        med = float(np.median(rn[ok]))

        def sim(res, idx):
            return _joint_sim(res, s.area[idx], var[j])
        best = None
        tried = []
        for trim in trims:
            # no trim keeps every frame, even when most labels are the proposal itself (median
            # residual 0, where inf * 0 would be NaN and keep none)
            train_ok = ok & (rn <= max(trim * med, 1e-9)) if np.isfinite(trim) else ok.copy()
            if any(np.array_equal(train_ok, t) for t in tried):
                continue        # this trim keeps the same frames as one already tried
            tried.append(train_ok)
            diffs = [[] for _ in cands]
            raws = []
            for test in folds:
                tr, te = train_ok & ~test, ok & test     # scored on every held-out frame
                if tr.sum() < 3 or te.sum() == 0:
                    continue
                r0 = sim(s.R[te, j], te)
                raws.append(r0)
                for i, m in enumerate(ridge_path(s.X[tr], s.R[tr, j], lambdas)):
                    diffs[i].append(sim(s.R[te, j] - ridge_predict(m, s.X[te]), te) - r0)
            if not raws:
                continue
            r0 = np.concatenate(raws)
            round_cands = list(cands)
            if j in kernel_cv and np.array_equal(train_ok, ok):
                # the kernel candidates were scored on the untrimmed frames, fold by fold as here
                round_cands += kernel_cands
                diffs = diffs + kernel_cv[j]
            r0_score = _objective(r0)
            for cand, dl in zip(round_cands, diffs):
                if not dl:
                    continue
                d = np.concatenate(dl)              # held-out similarity gains, frame by frame
                g = _objective(r0 + d) - r0_score   # the same as gains in the cross-validation's score
                if best is None or g.mean() > best[2].mean():
                    best = (cand, d, g, r0, train_ok, trim)
        if best is None:
            continue
        (kind, lam, gamma, view), d, g, r0, train_ok, trim = best
        corr.lam[j] = lam
        corr.kind[j] = kind
        if gamma is not None:
            corr.gamma[j] = gamma
        corr.trim[j] = trim
        corr.heldout_raw[j] = float(r0.mean())
        corr.heldout_adapted[j] = float(r0.mean() + d.mean())
        corr.heldout_move_raw[j] = float(np.mean(r0 < MOVE_SIMILARITY))
        corr.heldout_move_adapted[j] = float(np.mean(r0 + d < MOVE_SIMILARITY))
        # keep the correction only when the held-out gain is clearly above chance: a paired
        # t statistic over the held-out frames above MIN_T (about a one-sided 2.5 % level)
        t = g.mean() / (g.std(ddof=1) / np.sqrt(len(g))) if len(g) > 2 and g.std() > 0 else 0.0
        if g.mean() > 0 and t > MIN_T:
            corr.use[j] = True
            if kind == "rbf":
                # on the support's own (stored, rounded) points, so the correction predicts the
                # same before and after it is saved
                rows = np.flatnonzero(train_ok)
                zs = support.points[rows][:, _view_columns(view, s.X.shape[1], K)].astype(np.float64)
                alpha, ym = kernel_ridge_fit(rbf_kernel(zs, zs, gamma), s.R[train_ok, j], lam)
                corr.models[j] = ("rbf", float(gamma), rows, alpha, ym, view)
            else:
                corr.models[j] = ridge_fit(s.X[train_ok], s.R[train_ok, j], lam)
    if corr.active:
        corr.support = support
    raw = list(corr.heldout_raw.values())
    corr.summary = {"frames": int(N), "participants": int(len(set(s.groups.tolist()))),
                    "joints_corrected": int(corr.use.sum()),
                    "joints_kernel": int(sum(corr.kind.get(int(j)) == "rbf" for j in np.flatnonzero(corr.use))),
                    "heldout_similarity_raw": float(np.mean(raw)) if raw else float("nan"),
                    "heldout_similarity_adapted": float(np.mean(
                        [corr.heldout_adapted[j] if corr.use[j] else corr.heldout_raw[j]
                         for j in corr.heldout_raw])) if raw else float("nan"),
                    # summed over joints: about the joints per frame needing a move (cross-validated)
                    "heldout_moves_raw": float(sum(corr.heldout_move_raw.values())) if raw else float("nan"),
                    "heldout_moves_adapted": float(sum(
                        corr.heldout_move_adapted[j] if corr.use[j] else corr.heldout_move_raw[j]
                        for j in corr.heldout_move_raw)) if raw else float("nan")}
    return corr


def evaluate(corr: Correction | None, s: Samples, sigmas: np.ndarray, *, pred: np.ndarray | None = None) -> dict:
    """Mean OKS-style similarity and joints needing a move, raw vs corrected, on samples ``s``.
    ``pred``: the predicted residuals (N, K, 2) when they come from elsewhere than ``corr``
    (say, each fold's own correction)."""
    N, K, _ = s.R.shape
    if pred is None:
        pred = corr.predict_residual(s.X, K) if corr is not None else np.zeros((N, K, 2))
    lab = s.vis > 0
    err_raw = np.nansum(s.R ** 2, axis=2)
    err_fit = np.nansum((s.R - pred) ** 2, axis=2)
    missing = ~np.isfinite(s.R).all(axis=2) & lab
    sim_raw, sim_fit = _sim(err_raw, s.area, sigmas), _sim(err_fit, s.area, sigmas)
    move_raw = ((sim_raw < MOVE_SIMILARITY) & lab) | missing
    move_fit = ((sim_fit < MOVE_SIMILARITY) & lab) | missing
    n_lab = np.maximum(lab.sum(axis=1), 1)
    return {"frames": int(N),
            "oks_raw": float(np.mean(np.where(lab & ~missing, sim_raw, 0).sum(1) / n_lab)),
            "oks_adapted": float(np.mean(np.where(lab & ~missing, sim_fit, 0).sum(1) / n_lab)),
            "moves_raw": float(move_raw.sum(1).mean()), "moves_adapted": float(move_fit.sum(1).mean())}


# ---- from a project ---------------------------------------------------------------------

def samples_from(pairs, K: int, *, with_embedding: bool, with_regression: bool = False):
    """Build Samples from (proposal, truth keypoints (K,3), truth area in pixels, group) tuples.

    Proposals need a stored region (the crop they were predicted in).
    """
    X, R, G, A, V = [], [], [], [], []
    for prop, truth, area_px, group in pairs:
        if not prop.region:
            continue
        reg = prop.region
        pc = to_crop(prop.keypoints[:, :2], reg)
        tc = to_crop(np.asarray(truth)[:, :2], reg)
        r = tc - pc
        bad = (np.asarray(truth)[:, 2] <= 0) | (prop.confidence <= 0) | ~np.isfinite(r).all(axis=1)
        r[bad] = np.nan
        emb = prop.embedding if with_embedding else None
        rg = to_crop(regressed_points(prop.signals, K), reg)[None] if with_regression else None
        X.append(features(pc[None], np.asarray(prop.confidence)[None], None if emb is None else emb[None],
                          rg)[0])
        R.append(r)
        G.append(group)
        A.append(area_px / (reg["w"] * reg["h"]))
        V.append(np.asarray(truth)[:, 2])
    if not X:
        return Samples(np.zeros((0, 3 * K)), np.zeros((0, K, 2)), np.array([]), np.array([]), np.zeros((0, K)))
    return Samples(np.array(X), np.array(R), np.array(G), np.array(A), np.array(V))


def samples_for_fit(pairs, K: int, *, with_embedding: bool = True) -> tuple[Samples, bool, bool]:
    """(samples, with the embedding, with the regression head's points) as :func:`fit_project`
    fits a project's correction: each feature only when every proposal has it."""
    use_emb = with_embedding and all(p.embedding is not None for p, *_ in pairs)
    use_reg = all(regressed_points(p.signals, K) is not None for p, *_ in pairs)
    return samples_from(pairs, K, with_embedding=use_emb, with_regression=use_reg), use_emb, use_reg


class Corrector:
    """Applies a Correction to fresh proposals at pre-fill time."""

    def __init__(self, corr: Correction):
        self.corr = corr

    def apply(self, res, kps, sources):
        reg = res.region
        if reg is None or not self.corr.active:
            return kps, sources
        rd = {"cx": reg.cx, "cy": reg.cy, "w": reg.w, "h": reg.h, "angle": reg.angle} if not isinstance(reg, dict) else reg
        return apply_to(self.corr, kps, res.confidence, res.embedding, rd, sources, res.signals)


def _frame_features(corr: Correction, kps, confidence, embedding, region: dict, signals):
    """(crop coordinates (K, 2), feature row (1, F) or None) of one proposal, as the correction
    sees it; None when the correction needs the regression head's points and they are missing."""
    K = len(kps)
    pc = to_crop(np.asarray(kps)[:, :2], region)
    rg = None
    if corr.with_regression:
        xy = regressed_points(signals, K)
        if xy is None:
            return pc, None
        rg = to_crop(xy, region)[None]
    X = features(pc[None], np.asarray(confidence)[None],
                 None if (embedding is None or not corr.with_embedding) else np.asarray(embedding)[None], rg)
    return pc, X


def apply_to(corr: Correction, kps, confidence, embedding, region: dict, sources, signals):
    """Corrected keypoints and sources of one proposal. ``signals``: the proposal's (it holds the
    regression head's points, which a correction fitted with them needs; None when there are none)."""
    out, src, _ = _apply(corr, kps, confidence, embedding, region, sources, signals)
    return out, src


def _apply(corr: Correction, kps, confidence, embedding, region: dict, sources, signals):
    """:func:`apply_to`, also saying whether the frame lies inside the correction's support."""
    K = len(kps)
    pc, X = _frame_features(corr, kps, confidence, embedding, region, signals)
    out = np.array(kps, float)
    src = list(sources)
    if X is None:          # the correction cannot see this proposal as it was fitted: raw stands
        return out, src, False
    inside = corr.covers(X)
    if not inside[0]:      # unlike every labelled frame: the raw proposal stands
        return out, src, False
    delta = corr.predict_residual(X, K, inside)[0]
    for j in range(K):
        if corr.use[j] and out[j, 2] > 0:
            out[j, :2] = from_crop(pc[j] + delta[j], region)
            src[j] = "adapted"
    return out, src, True


def _pairs_from_project(project):
    from .metrics import bbox_from_keypoints
    store = project.store
    media = {m.id: m for m in store.all_media()}
    frames = {f.id: f for f in store.frames()}
    pairs = []
    for a in store.annotations([ACCEPTED, IN_REVIEW]):
        if not any(src == "human" or src == "imported" for src in a.sources):
            continue
        prop = store.proposal(a.frame_id, raw=True)   # not a tuned model's (core.tuning)
        if prop is None:
            continue
        bbox = a.bbox or bbox_from_keypoints(a.keypoints)
        if bbox is None:
            continue
        m = media[frames[a.frame_id].media_id]
        pairs.append((prop, a.keypoints, bbox[2] * bbox[3], m.participant_code or f"media-{m.id}"))
    return pairs


def fit_project(project, *, with_embedding: bool = True, user: str | None = None) -> tuple[Changes, Correction]:
    """Refit the project's correction from its accepted and submitted labels, store it,
    and re-apply it to frames still holding an untouched model proposal."""
    pairs = _pairs_from_project(project)
    if not pairs:
        raise KinemarkError("no accepted or submitted labels with a model proposal yet: label some frames "
                            "that the model pre-filled, then adapt")
    hashes = {p.model_hash for p, *_ in pairs}
    model_hash = max(hashes, key=lambda h: sum(p.model_hash == h for p, *_ in pairs))
    pairs = [x for x in pairs if x[0].model_hash == model_hash]
    K = project.skeleton.num_keypoints
    s, use_emb, use_reg = samples_for_fit(pairs, K, with_embedding=with_embedding)
    corr = fit_correction(s, project.skeleton.sigma_array, model_hash)
    corr.with_embedding = use_emb
    corr.with_regression = use_reg
    who = project.user(user)
    project.store.set_meta("adaptation", corr.to_json(), user_id=who.id)
    # also when the raw model is kept: frames still pre-filled with an earlier correction's
    # points go back to the raw proposal, as the new fit says they should; but while the project
    # uses a tuned model (core.tuning), its proposals stay: the correction is of the raw model's
    from .tuning import stored_tuning
    tuned = stored_tuning(project, model_hash) is not None
    changed, outside, skipped = ([], 0, 0) if tuned else reapply(project, corr, user_id=who.id)
    names = [project.skeleton.keypoints[j] for j in np.flatnonzero(corr.use)]
    if corr.active:
        n_kernel = sum(corr.kind.get(int(j)) == "rbf" for j in np.flatnonzero(corr.use))
        msg = (f"adapted {len(names)} of {K} joints ({n_kernel} by kernel ridge, {len(names) - n_kernel} linear) "
               f"from {s.R.shape[0]} labelled frames "
               f"({corr.summary['participants']} participants); mean keypoint similarity on held-out "
               f"participants {corr.summary['heldout_similarity_raw']:.3f} raw -> "
               f"{corr.summary['heldout_similarity_adapted']:.3f} adapted, joints needing a move per frame "
               f"about {corr.summary['heldout_moves_raw']:.2f} -> {corr.summary['heldout_moves_adapted']:.2f} "
               f"(each labelled participant scored by a fit on the others, so it holds for frames like the "
               f"labelled ones); re-proposed {len(changed)} "
               f"untouched frame(s)")
        if outside:
            msg += (f"; {outside} frame(s) unlike every labelled one keep the raw proposal "
                    f"(label some of them to extend the correction)")
    else:
        msg = ("kept the raw model: " + corr.summary.get("reason", "no joint's correction beat the raw model "
                                                         "on held-out participants"))
        if changed:
            msg += (f"; {len(changed)} untouched frame(s) pre-filled with the earlier correction went back "
                    f"to the raw proposal")
    if skipped:
        msg += f"; {skipped} frame(s) saved by someone during the fit were left as they saved them"
    if tuned:
        msg += ("; the project pre-fills from its tuned model, so its proposals were left as they are "
                "(kinemark adapt DIR --untune goes back to the raw model and this correction)")
    return Changes(annotations=tuple(changed), message=msg, details={"summary": corr.summary,
                                                                     "joints": names}), corr


def load_correction(project, model_hash: str) -> Correction | None:
    text = project.store.get_meta("adaptation")
    if not text:
        return None
    corr = Correction.from_json(text)
    return corr if corr.model_hash == model_hash and corr.active else None


def reapply(project, corr: Correction, *, user_id: int | None = None) -> tuple[list[int], int, int]:
    """Re-pre-fill frames whose annotation is still the untouched model proposal.

    Returns (changed annotation ids, how many of those frames lie outside the
    correction's support and so keep the raw proposal, how many were saved by
    someone else while this ran and so were left as that person saved them).
    Each write is checked against the version read, as a person's save is: in
    team mode an annotator may be working on these frames meanwhile.
    """
    store = project.store
    changed = []
    outside = skipped = 0
    for a in store.annotations([PREFILLED]):
        if not set(a.sources) <= {"model", "adapted"}:
            continue
        prop = store.proposal(a.frame_id, model_hash=corr.model_hash)
        if prop is None or not prop.region:
            continue
        kps, src, inside = _apply(corr, prop.keypoints, prop.confidence, prop.embedding, prop.region,
                                  ["model"] * len(prop.keypoints), prop.signals)
        outside += not inside
        same = np.where(kps[:, 2:3] > 0, kps, 0.0)     # as stored: unlabelled points at (0, 0, 0)
        if tuple(src) == tuple(a.sources) and np.allclose(same, a.keypoints, rtol=0, atol=1e-9):
            continue            # nothing to change (e.g. outside the correction's support)
        try:
            changed.append(store.save_annotation(a.frame_id, kps, src, state=PREFILLED, action="adapt",
                                                 user_id=user_id, expected_version=a.version).id)
        except KinemarkError:
            now = store.annotation(a.frame_id)
            if now is not None and now.version == a.version:
                raise                       # not a concurrent save: a real error
            skipped += 1                    # someone saved it meanwhile: theirs stays
    return changed, outside, skipped
