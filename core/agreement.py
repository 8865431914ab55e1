"""Agreement figures for a methods section.

Three comparisons, each per keypoint:

1. **Between annotators.** A share of the frames (default 10 %), chosen
   deterministically from a seed, is labelled a second time by another annotator,
   blind to the first. Second labels live in their own table: the first annotator
   never sees them and no export includes them.
2. **Annotator against reviewer.** The reviewer's own corrections during review,
   from the event log (before / after of each ``correct`` round).
3. **The pretrained model on this population.** Stored proposals against accepted
   labels: keypoint AP from the reference evaluator (pycocotools ``COCOeval``,
   ``iouType='keypoints'``), and per-keypoint error.

Measures. OKS is the COCO keypoint similarity, computed exactly as pycocotools
(core/metrics.py), with the first label as ground truth (s² its box area, k = 2σ):
per keypoint exp(-d² / (2 s² k²)), averaged over the first label's labelled points.
Distances are normalised by the torso size of the first label (mean of the two
torso diagonals, core/qa.py ``torso_size``), and PCK@0.1 is the share of points
within 0.1 torso sizes: torso-normalised PCK is common practice, and its exact torso
definition differs between data sets.
"""
from __future__ import annotations

import contextlib
import io
import json
from dataclasses import dataclass, field
from typing import Iterable

import numpy as np

from . import coco
from .errors import KinemarkError
from .metrics import bbox_from_keypoints, keypoint_similarity, oks
from .model import ACCEPTED, LABELLED_STATES, Changes, Event, SecondLabel
from .qa import torso_size

DEFAULT_SHARE = 0.10
PCK_FRACTION = 0.1
MOVED_PX = 0.5          # a reviewer correction moved a point by more than this (pixels)

BIAS_CAUTION = ("The accepted labels were made starting from this model's proposals, so these figures "
                "favour the model (people tend to keep a proposal that looks close enough). For an "
                "unbiased figure, label a held-out set from blank frames.")


# ---- choosing the frames and storing second labels -------------------------------------------

def _user(project, user):
    from .review import _user as u
    return u(project, user)


def choose_frames(project, *, share: float = DEFAULT_SHARE, seed: int = 0, user=None) -> Changes:
    """Choose ``share`` of the project's frames for double labelling, from ``seed``.

    The choice is the first round(share x N) frames of a seeded permutation of all
    frame ids (numpy ``default_rng(seed)``), so the same seed and frames always give
    the same set, and a larger share with the same seed keeps the frames already chosen.
    Refused if second labels exist on frames the new choice would drop.
    """
    who = _user(project, user)
    if who.role not in ("reviewer", "admin"):
        raise KinemarkError(f"{who.name} is an {who.role}; a reviewer or admin chooses the agreement frames")
    if not (isinstance(share, (int, float)) and 0 < share <= 1):
        raise KinemarkError(f"the agreement share must be in (0, 1], got {share!r}")
    store = project.store
    frames = sorted(f.id for f in store.frames())
    if not frames:
        raise KinemarkError("the project has no frames yet")
    n = max(1, int(round(share * len(frames))))
    perm = np.random.default_rng(int(seed)).permutation(len(frames))
    chosen = [frames[i] for i in perm[:n]]
    keep = set(chosen)
    dropped = {s.frame_id for s in store.second_labels()} - keep
    if dropped:
        raise KinemarkError(f"{len(dropped)} frame(s) with agreement labels would leave the set; keep the "
                            "same seed and a share at least as large")
    store.set_agreement_frames(chosen, seed=int(seed), share=float(share), user_id=who.id)
    return Changes(frames=tuple(chosen), message=f"chose {len(chosen)} of {len(frames)} frames "
                   f"({share:.0%}, seed {seed}) for double labelling")


def agreement_frames(project) -> list[int]:
    return project.store.agreement_frame_ids()


def _primary_events(project, frame_id: int, person: int) -> list[Event]:
    a = project.store.annotation(frame_id, person)
    return [] if a is None else project.store.events(entity="annotation", entity_id=a.id)


def open_tasks(project, user=None) -> list[int]:
    """Agreement frames this user may still label a second time (not labelled by them, and
    not a frame whose first label they edited or submitted)."""
    from .review import authorship_from_events
    who = _user(project, user)
    mine = {s.frame_id for s in project.store.second_labels(user_id=who.id)}
    out = []
    for fid in agreement_frames(project):
        if fid in mine:
            continue
        auth = authorship_from_events(_primary_events(project, fid, 0))
        if who.id in auth.editors or who.id in auth.responsible:
            continue
        out.append(fid)
    return out


def save_second_label(project, frame_id: int, keypoints, *, user=None, person: int = 0,
                      expected_version: int | None = None) -> SecondLabel:
    """Store a second, blind label on an agreement frame.

    Refused on frames outside the agreement set, and for anyone who edited or submitted
    the first label of that frame. The GUI starts the second labeller on a blank frame
    and must not show them the first label (use :func:`my_second_label`, never the
    frame's annotation).
    """
    from .review import authorship_from_events
    who = _user(project, user)
    if frame_id not in set(agreement_frames(project)):
        raise KinemarkError(f"frame {frame_id} is not one of the agreement frames")
    auth = authorship_from_events(_primary_events(project, frame_id, person))
    if who.id in auth.editors or who.id in auth.responsible:
        raise KinemarkError(f"{who.name} made the first label of frame {frame_id}; the second label must "
                            "come from another annotator")
    return project.store.save_second_label(frame_id, keypoints, user_id=who.id, person=person,
                                           expected_version=expected_version)


def my_second_label(project, frame_id: int, user=None, person: int = 0) -> SecondLabel | None:
    """The user's own second label on a frame (what the agreement view may show them)."""
    who = _user(project, user)
    for s in project.store.second_labels(frame_id=frame_id, user_id=who.id):
        if s.person == person:
            return s
    return None


# ---- measures over arrays --------------------------------------------------------------------

@dataclass
class PairStats:
    """Per-keypoint accumulators over pairs of labels (first = ground truth)."""

    K: int
    sim_sum: np.ndarray = None      # sum of keypoint similarity where the first label has v > 0
    sim_n: np.ndarray = None
    dist_sum: np.ndarray = None     # sum of d / torso where both have v > 0 and torso known
    dist_n: np.ndarray = None
    pck_hits: np.ndarray = None
    both: np.ndarray = None         # labelled in both
    first_only: np.ndarray = None
    second_only: np.ndarray = None
    frame_oks: list = field(default_factory=list)

    def __post_init__(self):
        for name in ("sim_sum", "dist_sum"):
            setattr(self, name, np.zeros(self.K))
        for name in ("sim_n", "dist_n", "pck_hits", "both", "first_only", "second_only"):
            setattr(self, name, np.zeros(self.K, dtype=int))

    def add(self, first, second, area: float, sigmas, torso: float | None,
            pck: float = PCK_FRACTION):
        g = np.asarray(first, float).reshape(-1, 3)
        d = np.asarray(second, float).reshape(-1, 3)
        lab1, lab2 = g[:, 2] > 0, d[:, 2] > 0
        self.both += lab1 & lab2
        self.first_only += lab1 & ~lab2
        self.second_only += ~lab1 & lab2
        if lab1.any():
            self.frame_oks.append(oks(g, d, area, sigmas))
            sim = keypoint_similarity(g, d, area, sigmas)
            self.sim_sum[lab1] += sim[lab1]
            self.sim_n += lab1
        if torso:
            both = lab1 & lab2
            dist = np.hypot(g[:, 0] - d[:, 0], g[:, 1] - d[:, 1]) / torso
            self.dist_sum[both] += dist[both]
            self.dist_n += both
            self.pck_hits += both & (dist < pck)

    def per_keypoint(self) -> dict[str, np.ndarray]:
        with np.errstate(invalid="ignore", divide="ignore"):
            return {
                "oks": np.where(self.sim_n > 0, self.sim_sum / np.maximum(self.sim_n, 1), np.nan),
                "mean_dist_torso": np.where(self.dist_n > 0, self.dist_sum / np.maximum(self.dist_n, 1), np.nan),
                "pck_0.1_torso": np.where(self.dist_n > 0, self.pck_hits / np.maximum(self.dist_n, 1), np.nan),
                "n_first_labelled": self.sim_n.astype(float),
                "n_both_labelled": self.both.astype(float),
                "n_first_only": self.first_only.astype(float),
                "n_second_only": self.second_only.astype(float),
            }


def _area(kps, bbox, image_size) -> float:
    box = bbox or bbox_from_keypoints(kps, image_size=image_size)
    return float(box[2] * box[3]) if box else 0.0


def _kp(d) -> np.ndarray:
    return np.asarray(d, float).reshape(-1, 3)


def annotator_version(events: Iterable[Event]) -> np.ndarray | None:
    """The keypoints as last left by labelling, before any review correction: the 'after' of the
    last keypoint-changing event that is not a correction (the model's prefill counts)."""
    from .review import _NOT_EDITS, is_review_correction, keypoints_changed
    out = None
    for ev in events:
        if ev.after is None and ev.action != "state":      # deleted: what follows is a new annotation
            out = None
            continue
        if ev.action in _NOT_EDITS or is_review_correction(ev):
            continue
        if keypoints_changed(ev):
            out = _kp(json.loads(ev.after)["keypoints"])
    return out


@dataclass(frozen=True)
class CorrectionRound:
    annotation_id: int
    reviewer_id: int
    before: np.ndarray
    after: np.ndarray


def correction_rounds(annotation_id: int, events: Iterable[Event]) -> list[CorrectionRound]:
    """The reviewer's corrections of one annotation, one round per stay in review.

    A round runs from the first correction (core/review.py ``is_review_correction``) to the
    next change of state; its
    'before' is the keypoints before the round's first correction, its 'after' those
    after its last.
    """
    from .review import is_review_correction, keypoints_changed
    out, start, end, who = [], None, None, None
    for ev in events:
        if ev.after is None and ev.action != "state":      # deleted: what follows is a new annotation
            out, start, end, who = [], None, None, None
            continue
        if is_review_correction(ev) and keypoints_changed(ev):
            if start is None:
                start, who = _kp(json.loads(ev.before)["keypoints"]), ev.user_id
            end = _kp(json.loads(ev.after)["keypoints"])
        elif ev.action == "state" and start is not None:
            out.append(CorrectionRound(annotation_id, who, start, end))
            start = end = None
    if start is not None:
        out.append(CorrectionRound(annotation_id, who, start, end))
    return out


# ---- the report ------------------------------------------------------------------------------

@dataclass
class ModelSection:
    model_id: str
    model_hash: str
    adapted: bool
    n_images: int
    stats: dict | None               # COCOeval stats by name, or None
    message: str                     # why stats are missing, or ""
    per_keypoint: dict               # name -> (K,) arrays


@dataclass
class AgreementReport:
    keypoints: tuple[str, ...]
    share: float | None
    seed: int | None
    n_agreement_frames: int
    n_pairs: int
    n_excluded_same_person: int
    inter: dict                      # per-keypoint arrays (PairStats.per_keypoint)
    inter_frame_oks: list
    n_reviewed: int
    n_corrected: int
    corrections: dict                # per-keypoint arrays
    by_annotator: list               # (name, reviewed, corrected)
    models: list = field(default_factory=list)
    notes: list = field(default_factory=list)

    def rows(self) -> list[tuple]:
        """Long-form rows (section, group, keypoint, measure, value) for the CSV."""
        out = []

        def put(section, group, arrays):
            for measure, arr in arrays.items():
                for name, v in zip(self.keypoints, arr):
                    out.append((section, group, name, measure, None if not np.isfinite(v) else float(v)))

        if self.inter_frame_oks:
            out.append(("annotators", "", "(all)", "mean_frame_oks", float(np.mean(self.inter_frame_oks))))
        out.append(("annotators", "", "(all)", "pairs", float(self.n_pairs)))
        put("annotators", "", self.inter)
        out.append(("reviewer_corrections", "", "(all)", "reviewed", float(self.n_reviewed)))
        out.append(("reviewer_corrections", "", "(all)", "corrected", float(self.n_corrected)))
        put("reviewer_corrections", "", self.corrections)
        for name, reviewed, corrected in self.by_annotator:
            out.append(("reviewer_corrections", name, "(all)", "reviewed", float(reviewed)))
            out.append(("reviewer_corrections", name, "(all)", "corrected", float(corrected)))
        for m in self.models:
            g = f"{m.model_id} {m.model_hash[:12]}" + (" adapted" if m.adapted else "")
            out.append(("model", g, "(all)", "images", float(m.n_images)))
            for k, v in (m.stats or {}).items():
                out.append(("model", g, "(all)", k, None if v is None or v < 0 else float(v)))
            put("model", g, m.per_keypoint)
        return out


STAT_NAMES = ("AP", "AP50", "AP75", "AP_medium", "AP_large", "AR", "AR50", "AR75", "AR_medium", "AR_large")


def _quiet(fn, *a, **k):
    with contextlib.redirect_stdout(io.StringIO()):
        return fn(*a, **k)


def coco_keypoint_ap(gt: dict, results: list, sigmas) -> tuple[dict | None, str]:
    """Keypoint AP / AR from pycocotools COCOeval (imported here, lazily: it is a test extra).

    Returns (stats by name, "") or (None, why not).
    """
    try:
        from pycocotools.coco import COCO
        from pycocotools.cocoeval import COCOeval
    except ImportError:
        return None, "keypoint AP not computed: pycocotools is not installed (pip install pycocotools)"
    if not gt["annotations"]:
        return None, "keypoint AP not computed: no accepted labels on frames with proposals"
    if not results:
        return None, "keypoint AP not computed: no proposals"
    g = COCO()
    g.dataset = json.loads(json.dumps(gt))
    _quiet(g.createIndex)
    d = _quiet(g.loadRes, json.loads(json.dumps(results)))
    ev = COCOeval(g, d, iouType="keypoints")
    ev.params.kpt_oks_sigmas = np.asarray(sigmas, float)
    _quiet(ev.evaluate)
    _quiet(ev.accumulate)
    _quiet(ev.summarize)
    return {n: float(v) for n, v in zip(STAT_NAMES, ev.stats)}, ""


def build_report(project) -> AgreementReport:
    """Everything the agreement page and CSV show (see the module docstring)."""
    from .review import authorships
    store, skel = project.store, project.skeleton
    K, sig, names = skel.num_keypoints, skel.sigma_array, list(skel.keypoints)
    frames = {f.id: f for f in store.frames()}
    media = {m.id: m for m in store.all_media()}
    users = {u.id: u.name for u in store.users()}

    def size(fid):
        m = media[frames[fid].media_id]
        return (m.width, m.height)

    anns = store.annotations()
    by_key = {(a.frame_id, a.person): a for a in anns}
    evs: dict[int, list[Event]] = {}
    for ev in store.events_for("annotation", None):
        evs.setdefault(ev.entity_id, []).append(ev)
    auth = authorships(project, [a.id for a in anns])
    notes = []

    # 1. between annotators
    inter = PairStats(K)
    n_pairs = n_same = 0
    chosen = agreement_frames(project)
    for s in store.second_labels():
        a = by_key.get((s.frame_id, s.person))
        if a is None or a.state not in LABELLED_STATES:
            continue
        au = auth[a.id]
        if s.labelled_by in au.editors or s.labelled_by in au.responsible:
            n_same += 1
            continue
        first = annotator_version(evs.get(a.id, []))
        if first is None:
            continue
        area = _area(first, a.bbox, size(a.frame_id))
        inter.add(first, s.keypoints, area, sig, torso_size(first, names))
        n_pairs += 1
    if n_same:
        notes.append(f"{n_same} second label(s) left out: made by a person who also edited the first label")
    if not n_pairs:
        notes.append("no pairs of labels yet: choose agreement frames and have a second annotator label them")

    # 2. reviewer corrections
    corr_moved = np.zeros(K, dtype=int)
    corr_vis = np.zeros(K, dtype=int)
    corr_dist = np.zeros(K)
    corr_dist_n = np.zeros(K, dtype=int)
    reviewed: dict[int, int] = {}
    corrected: dict[int, int] = {}
    n_reviewed = n_corrected = 0
    for a in anns:
        ev = evs.get(a.id, [])
        was_reviewed = any(e.action == "state" and (json.loads(e.after or "{}").get("transition")
                                                    in ("accept", "send_back")) for e in ev)
        if not was_reviewed:
            continue
        n_reviewed += 1
        author = auth[a.id].author_id
        reviewed[author] = reviewed.get(author, 0) + 1
        rounds = correction_rounds(a.id, ev)
        if rounds:
            n_corrected += 1
            corrected[author] = corrected.get(author, 0) + 1
        for r in rounds:
            b, f = r.before, r.after
            lab = (b[:, 2] > 0) & (f[:, 2] > 0)
            d = np.hypot(b[:, 0] - f[:, 0], b[:, 1] - f[:, 1])
            moved = lab & (d > MOVED_PX)
            vis = (b[:, 2] > 0) != (f[:, 2] > 0)
            corr_moved += moved
            corr_vis += vis
            t = torso_size(f, names)
            if t:
                corr_dist[moved] += d[moved] / t
                corr_dist_n += moved
    with np.errstate(invalid="ignore", divide="ignore"):
        corrections = {
            "n_moved": corr_moved.astype(float),
            "share_moved": corr_moved / n_reviewed if n_reviewed else np.full(K, np.nan),
            "n_visibility_changed": corr_vis.astype(float),
            "mean_move_torso": np.where(corr_dist_n > 0, corr_dist / np.maximum(corr_dist_n, 1), np.nan),
        }
    by_annotator = sorted(((users.get(u, "(model / unknown)") if u is not None else "(model / unknown)",
                            n, corrected.get(u, 0)) for u, n in reviewed.items()), key=lambda r: r[0])

    # 3. the model on accepted labels
    accepted = [a for a in anns if a.state == ACCEPTED]
    acc_frames = {a.frame_id for a in accepted}
    rows = [r for r in store.export_rows([ACCEPTED])]
    props = [p for p in store.proposals() if p.frame_id in acc_frames]
    groups: dict = {}
    for p in props:
        groups.setdefault((p.model_id, p.model_hash, p.adapted), []).append(p)
    models = []
    for (mid, mhash, adapted), ps in sorted(groups.items(), key=lambda kv: (kv[0][2], kv[0][0], kv[0][1])):
        pf = {p.frame_id for p in ps}
        gt = coco.build_coco([r for r in rows if r[1] in pf], skel, date_created="-")
        results = [coco.results_entry(p.frame_id, p.keypoints, p.score) for p in ps]
        stats, why = coco_keypoint_ap(gt, results, sig)
        st = PairStats(K)
        for p in ps:
            a = by_key.get((p.frame_id, p.person))
            if a is None or a.state != ACCEPTED:
                continue
            area = _area(a.keypoints, a.bbox, size(a.frame_id))
            # as in pycocotools, the detection's own v is not used by OKS; distances and PCK
            # count only points both label (n_first_only: points the model calls absent)
            st.add(a.keypoints, p.keypoints, area, sig, torso_size(a.keypoints, names))
        models.append(ModelSection(mid, mhash, adapted, len(pf), stats, why, st.per_keypoint()))
    if models:
        notes.append(BIAS_CAUTION)
    else:
        notes.append("no model proposals on accepted frames: the model's accuracy is not reported")
    share = store.get_meta("agreement_share")
    seed = store.get_meta("agreement_seed")
    return AgreementReport(
        keypoints=tuple(names), share=float(share) if share else None, seed=int(seed) if seed else None,
        n_agreement_frames=len(chosen), n_pairs=n_pairs, n_excluded_same_person=n_same,
        inter=inter.per_keypoint(), inter_frame_oks=inter.frame_oks, n_reviewed=n_reviewed,
        n_corrected=n_corrected, corrections=corrections, by_annotator=by_annotator, models=models,
        notes=notes)


def format_text(rep: AgreementReport) -> str:
    """A plain-text summary for the terminal."""
    L = []
    L.append(f"agreement frames {rep.n_agreement_frames}"
             + (f" (share {rep.share:.0%}, seed {rep.seed})" if rep.share else "")
             + f"; label pairs {rep.n_pairs}")
    if rep.inter_frame_oks:
        L.append(f"mean OKS between annotators: {np.mean(rep.inter_frame_oks):.3f} over {len(rep.inter_frame_oks)} pair(s)")
    L.append(f"reviewed {rep.n_reviewed}, corrected by the reviewer {rep.n_corrected}")
    for m in rep.models:
        tag = " (adapted)" if m.adapted else ""
        if m.stats:
            L.append(f"model {m.model_id}{tag} on {m.n_images} accepted frame(s): keypoint AP {m.stats['AP']:.3f}, "
                     f"AP50 {m.stats['AP50']:.3f}, AP75 {m.stats['AP75']:.3f} (pycocotools COCOeval)")
        else:
            L.append(f"model {m.model_id}{tag}: {m.message}")
    L.append("")
    L.append(f"{'keypoint':<16} {'OKS':>6} {'d/torso':>8} {'PCK@.1':>7} {'pairs':>6} | {'rev.moved':>9}"
             + "".join(f" | {'model PCK':>9}" for _ in rep.models[:1]))
    fmt = lambda v, p=3: "   -  " if not np.isfinite(v) else f"{v:.{p}f}"
    for j, name in enumerate(rep.keypoints):
        line = (f"{name:<16} {fmt(rep.inter['oks'][j]):>6} {fmt(rep.inter['mean_dist_torso'][j]):>8} "
                f"{fmt(rep.inter['pck_0.1_torso'][j], 2):>7} {int(rep.inter['n_both_labelled'][j]):>6} | "
                f"{int(rep.corrections['n_moved'][j]):>9}")
        if rep.models:
            line += f" | {fmt(rep.models[0].per_keypoint['pck_0.1_torso'][j], 2):>9}"
        L.append(line)
    for n in rep.notes:
        L.append("note: " + n)
    return "\n".join(L)


__all__ = ["DEFAULT_SHARE", "choose_frames", "agreement_frames", "open_tasks", "save_second_label",
           "my_second_label", "PairStats", "annotator_version", "correction_rounds", "AgreementReport",
           "build_report", "coco_keypoint_ap", "format_text", "BIAS_CAUTION"]
