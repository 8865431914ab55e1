"""Quality checks on labelled keypoints, shown to the annotator before submitting and to the reviewer.

Plain functions over (K, 3) arrays, plus :func:`run_checks`, which runs them over a
project. A flag is a prompt for a person to look, never a verdict: every check here
can fire on a correct label (a foreshortened forearm, a person facing away), and
can miss a wrong one.

Checks (Kinemark's names):

``outside_image``       a labelled point (v > 0) lies outside the frame (error)
``required_missing``    a keypoint the project requires is not labelled (error)
``left_right_swap``     a left/right pair looks exchanged, against the neighbouring
                        labelled frames of the same video or against the body's own
                        geometry in the image (warning)
``bone_length``         a bone's length is an outlier among the participant's
                        labelled frames: modified z-score (Iglewicz & Hoaglin 1993)
                        above 3.5 (warning)
``visible_but_absent``  marked visible (v = 2) where the model is confident the
                        point is absent (warning)
"""
from __future__ import annotations

import json
from dataclasses import dataclass
from typing import Iterable, Sequence

import numpy as np

from .errors import KinemarkError
from .model import LABELLED_STATES

ERROR = "error"
WARNING = "warning"

CHECKS = ("outside_image", "required_missing", "left_right_swap", "bone_length", "visible_but_absent")

#: States whose keypoints a person has touched: the ones checked and used as references.

#: Meta key of the project's required keypoints (a JSON list of names).
REQUIRED_KEY = "qa_required_keypoints"

# Iglewicz & Hoaglin (1993), "How to Detect and Handle Outliers" (ASQC Basic
# References in Quality Control, vol. 16): modified z-score M = 0.6745 (x - median) / MAD,
# and observations with |M| > 3.5 are labelled potential outliers.
MODIFIED_Z_CONSTANT = 0.6745
MODIFIED_Z_THRESHOLD = 3.5


@dataclass(frozen=True)
class Flag:
    """One finding of one check on one person's keypoints on one frame."""

    check: str
    severity: str                  # "error" | "warning"
    message: str
    keypoints: tuple[int, ...] = ()
    frame_id: int | None = None
    annotation_id: int | None = None
    person: int = 0


# ---- plain functions over arrays -------------------------------------------------------

def _k(kps) -> np.ndarray:
    return np.asarray(kps, float).reshape(-1, 3)


def outside_image(kps, width: float, height: float) -> np.ndarray:
    """Indices of labelled points (v > 0) outside [0, width] x [0, height] (COCO pixel coordinates)."""
    k = _k(kps)
    lab = k[:, 2] > 0
    out = (k[:, 0] < 0) | (k[:, 1] < 0) | (k[:, 0] > width) | (k[:, 1] > height)
    return np.flatnonzero(lab & out)


def missing_required(kps, required: Iterable[int]) -> np.ndarray:
    """Indices among ``required`` that are not labelled (v = 0)."""
    k = _k(kps)
    req = np.asarray(sorted(set(int(i) for i in required)), dtype=int)
    if req.size == 0:
        return req
    return req[k[req, 2] <= 0]


def swapped_against_neighbours(kps, neighbours: Sequence, flip_pairs, *, ratio: float = 0.5,
                               min_separation: float = 3.0) -> list[tuple[int, int]]:
    """Flip pairs (l, r) whose points sit nearer each other's place in the neighbouring frames.

    For each neighbour (a (K, 3) array from a nearby frame of the same video) and
    each pair labelled in both, compare the cost of keeping the assignment,
    |l - l'| + |r - r'|, with the cost of exchanging it, |l - r'| + |r - l'|. A pair
    is flagged when exchanging is cheaper by ``ratio`` in every neighbour that can
    judge it (one where l' and r' are at least ``min_separation`` pixels apart).
    This is Kinemark's heuristic (a nearest-assignment test), not a published method.
    """
    k = _k(kps)
    out = []
    for a, b in flip_pairs:
        if k[a, 2] <= 0 or k[b, 2] <= 0:
            continue
        votes = []
        for n in neighbours:
            n = _k(n)
            if n[a, 2] <= 0 or n[b, 2] <= 0:
                continue
            if np.hypot(*(n[a, :2] - n[b, :2])) < min_separation:
                continue
            keep = np.hypot(*(k[a, :2] - n[a, :2])) + np.hypot(*(k[b, :2] - n[b, :2]))
            swap = np.hypot(*(k[a, :2] - n[b, :2])) + np.hypot(*(k[b, :2] - n[a, :2]))
            votes.append(swap < ratio * keep)
        if votes and all(votes):
            out.append((int(a), int(b)))
    return out


def _pt(k, names, name):
    if name not in names:
        return None
    i = names.index(name)
    return k[i, :2] if k[i, 2] > 0 else None


def torso_size(kps, names: Sequence[str]) -> float | None:
    """Torso size: mean length of the two torso diagonals (left shoulder to right hip and
    right shoulder to left hip), or the one that is labelled.

    Torso-normalised PCK is common practice in the pose literature, but conventions for
    the torso length differ between data sets; this diagonal form is Kinemark's choice.
    """
    k = _k(kps)
    names = list(names)
    d = []
    for s, h in (("left_shoulder", "right_hip"), ("right_shoulder", "left_hip")):
        ps, ph = _pt(k, names, s), _pt(k, names, h)
        if ps is not None and ph is not None:
            d.append(float(np.hypot(*(ps - ph))))
    d = [x for x in d if x > 0]
    return float(np.mean(d)) if d else None


def mirrored_in_image(kps, names: Sequence[str], flip_pairs, *, margin: float = 0.15,
                      limb_pairs: Sequence[tuple[str, str]] = (("left_knee", "right_knee"),
                                                               ("left_ankle", "right_ankle"))
                      ) -> list[tuple[int, int]]:
    """Flip pairs that contradict the body's own left/right geometry in the image.

    Three tests, each Kinemark's heuristic (not a published method), with ``margin``
    a fraction of the torso size below which nothing is judged:

    * facing the camera (nose and both eyes marked visible, v = 2), a person's left
      side is on the image's right (the camera is assumed not to mirror the picture):
      a labelled pair whose left point lies clearly to the image-left of its right
      point is flagged;
    * the shoulder line and the hip line pointing opposite ways (a twist of more than
      90 degrees in the picture) flags both pairs;
    * a leg pair (``limb_pairs``) pointing opposite to the hip line. Arms are left out
      by default: reaching across the body's midline is part of the exercises.
    """
    k = _k(kps)
    names = list(names)
    ts = torso_size(k, names)
    if ts is None:
        return []
    tol = margin * ts
    pair_of = {}
    for a, b in flip_pairs:
        pair_of[names[a]] = (a, b)
        pair_of[names[b]] = (a, b)
    flagged: set[tuple[int, int]] = set()

    def vec(l_name, r_name):
        pl, pr = _pt(k, names, l_name), _pt(k, names, r_name)
        return None if pl is None or pr is None else pl - pr

    # facing the camera
    vis = {n: (names.index(n) if n in names else None) for n in ("nose", "left_eye", "right_eye")}
    if all(i is not None and k[i, 2] == 2 for i in vis.values()):
        for a, b in flip_pairs:
            if k[a, 2] > 0 and k[b, 2] > 0 and (k[a, 0] - k[b, 0]) < -tol:
                flagged.add((int(a), int(b)))
    # shoulders against hips
    vs, vh = vec("left_shoulder", "right_shoulder"), vec("left_hip", "right_hip")
    if vs is not None and vh is not None:
        ls, lh = np.hypot(*vs), np.hypot(*vh)
        if ls > 2 * tol and lh > 2 * tol and float(np.dot(vs, vh)) / (ls * lh) < -0.5:
            for n in ("left_shoulder", "left_hip"):
                if n in pair_of:
                    flagged.add(pair_of[n])
    # legs against hips
    if vh is not None and np.hypot(*vh) > 2 * tol:
        u = vh / np.hypot(*vh)
        for l_name, r_name in limb_pairs:
            v = vec(l_name, r_name)
            if v is not None and float(np.dot(v, u)) < -tol and l_name in pair_of:
                flagged.add(pair_of[l_name])
    return sorted(flagged)


def modified_z_scores(values) -> np.ndarray:
    """Modified z-scores M_i = 0.6745 (x_i - median) / MAD, MAD = median |x_i - median|.

    Iglewicz & Hoaglin (1993), "How to Detect and Handle Outliers". Returns NaN for
    every value when MAD is 0 (the score is undefined; the book's rule cannot judge).
    """
    x = np.asarray(values, float)
    med = np.median(x)
    mad = np.median(np.abs(x - med))
    if not np.isfinite(mad) or mad == 0:
        return np.full(x.shape, np.nan)
    return MODIFIED_Z_CONSTANT * (x - med) / mad


def bone_lengths(kps, edges) -> np.ndarray:
    """(E,) lengths in pixels, NaN where an end is not labelled."""
    k = _k(kps)
    out = np.full(len(edges), np.nan)
    for e, (a, b) in enumerate(edges):
        if k[a, 2] > 0 and k[b, 2] > 0:
            out[e] = float(np.hypot(*(k[a, :2] - k[b, :2])))
    return out


def bone_length_outliers(lengths, *, threshold: float = MODIFIED_Z_THRESHOLD, min_samples: int = 5,
                         min_relative: float = 0.1) -> tuple[np.ndarray, np.ndarray]:
    """Outliers per bone over one participant's frames.

    ``lengths``: (N, E) array (N frames, E bones; NaN where not labelled).
    Returns (z, flags), both (N, E): modified z-scores per bone over that bone's
    labelled frames, and the flags |z| > ``threshold`` (3.5, Iglewicz & Hoaglin 1993).
    A bone with fewer than ``min_samples`` labelled frames is not judged (z = NaN).
    Kinemark adds one condition of its own: the length must also differ from the
    median by more than ``min_relative`` of the median, so that a tight spread of a few
    pixels' labelling jitter (a tiny MAD) does not turn ordinary jitter into flags.
    """
    L = np.asarray(lengths, float)
    if L.ndim != 2:
        raise ValueError("lengths must be (frames, bones)")
    z = np.full(L.shape, np.nan)
    flags = np.zeros(L.shape, dtype=bool)
    for e in range(L.shape[1]):
        col = L[:, e]
        ok = np.isfinite(col)
        if ok.sum() >= min_samples:
            z[ok, e] = modified_z_scores(col[ok])
            med = np.median(col[ok])
            far = np.abs(col - med) > min_relative * med
            flags[:, e] = ok & far & (np.nan_to_num(np.abs(z[:, e]), nan=0.0) > threshold)
    return z, flags


def visible_but_absent(kps, confidence, presence=None, *, presence_max: float = 0.1,
                       confidence_max: float = 0.05) -> np.ndarray:
    """Indices marked visible (v = 2) where the model is confident the point is absent.

    With a presence probability from the model (signal ``presence``), "confident
    absent" means presence < ``presence_max``; without one, the joint's confidence
    (e.g. a heatmap maximum) < ``confidence_max``, i.e. the model found nothing like
    the joint. Both thresholds are Kinemark's choice, not a published value.
    """
    k = _k(kps)
    conf = np.asarray(confidence, float)
    if presence is not None:
        pres = np.asarray(presence, float)
        absent = np.where(np.isfinite(pres), pres < presence_max,
                          np.nan_to_num(conf, nan=1.0) < confidence_max)
    else:
        absent = np.nan_to_num(conf, nan=1.0) < confidence_max
    return np.flatnonzero((k[:, 2] == 2) & absent)


# ---- project settings ------------------------------------------------------------------

_DEFAULT_REQUIRED = ("left_shoulder", "right_shoulder", "left_hip", "right_hip")


def required_keypoints(project) -> tuple[int, ...]:
    """The keypoints every labelled person must have: the project's setting, else the torso
    (both shoulders and hips, where the skeleton has them: a person in view has a torso, and
    the torso size normalises the agreement figures)."""
    skel = project.skeleton
    raw = project.store.get_meta(REQUIRED_KEY)
    names = json.loads(raw) if raw else [n for n in _DEFAULT_REQUIRED if n in skel.keypoints]
    return tuple(skel.index(n) for n in names)


def set_required_keypoints(project, names: Iterable[str], *, user: str | None = None):
    names = [n.strip() for n in names if n.strip()]
    for n in names:
        project.skeleton.index(n)   # raises with the skeleton's name for an unknown keypoint
    project.store.set_meta(REQUIRED_KEY, json.dumps(names), user_id=project.user(user).id)


# ---- the project-level runner ----------------------------------------------------------

def _neighbours(ann, frame_by_id, media_by_id, by_media_person, max_gap_seconds: float):
    f = frame_by_id[ann.frame_id]
    m = media_by_id[f.media_id]
    others = by_media_person.get((f.media_id, ann.person), [])
    max_gap = max_gap_seconds * m.fps if m.fps else 10
    before = [o for o in others if o[0] < f.frame_index and f.frame_index - o[0] <= max_gap]
    after = [o for o in others if o[0] > f.frame_index and o[0] - f.frame_index <= max_gap]
    out = []
    if before:
        out.append(max(before, key=lambda o: o[0]))
    if after:
        out.append(min(after, key=lambda o: o[0]))
    return out


def run_checks(project, *, annotation_ids: Iterable[int] | None = None,
               states: Iterable[str] | None = None, required: Iterable[int] | None = None,
               max_gap_seconds: float = 1.0, checks: Iterable[str] = CHECKS) -> list[Flag]:
    """Run the checks over a project's annotations.

    ``annotation_ids`` or ``states`` choose what is checked (default: every annotation a
    person has touched). References, whatever is checked: neighbouring frames are the
    labelled annotations of the same person index in the same video within
    ``max_gap_seconds``; bone-length statistics use all of the participant's labelled
    frames (media without a participant are taken one by one).
    """
    checks = set(checks)
    unknown = checks - set(CHECKS)
    if unknown:
        raise KinemarkError(f"unknown check(s) {', '.join(sorted(unknown))}; checks are {', '.join(CHECKS)}")
    store, skel = project.store, project.skeleton
    names = list(skel.keypoints)
    req = tuple(required) if required is not None else required_keypoints(project)
    everything = store.annotations()
    if annotation_ids is not None:
        wanted = {int(i) for i in annotation_ids}
        targets = [a for a in everything if a.id in wanted]
        missing = wanted - {a.id for a in targets}
        if missing:
            raise KinemarkError(f"no annotation {sorted(missing)[0]}")
    else:
        st = set(states) if states is not None else set(LABELLED_STATES)
        targets = [a for a in everything if a.state in st]
    if not targets:
        return []
    frame_by_id = {f.id: f for f in store.frames()}
    media_by_id = {m.id: m for m in store.all_media()}
    labelled = [a for a in everything if a.state in LABELLED_STATES]

    by_media_person: dict = {}
    for a in labelled:
        f = frame_by_id[a.frame_id]
        by_media_person.setdefault((f.media_id, a.person), []).append((f.frame_index, a))

    # bone-length statistics per participant (or per media without one)
    z_of: dict[int, tuple] = {}
    if "bone_length" in checks and skel.edges:
        groups: dict = {}
        for a in labelled:
            m = media_by_id[frame_by_id[a.frame_id].media_id]
            key = ("p", m.participant_code) if m.participant_code else ("m", m.id)
            groups.setdefault(key, []).append(a)
        for anns in groups.values():
            L = np.array([bone_lengths(a.keypoints, skel.edges) for a in anns])
            z, fl = bone_length_outliers(L)
            for a, zrow, frow in zip(anns, z, fl):
                z_of[a.id] = (zrow, frow)

    flags: list[Flag] = []
    for a in targets:
        f = frame_by_id[a.frame_id]
        m = media_by_id[f.media_id]
        k = a.keypoints

        def add(check, severity, message, kp=()):
            flags.append(Flag(check, severity, message, tuple(int(i) for i in kp), a.frame_id, a.id, a.person))

        if "outside_image" in checks:
            for j in outside_image(k, m.width, m.height):
                add("outside_image", ERROR, f"{names[j]} at ({k[j, 0]:.1f}, {k[j, 1]:.1f}) lies outside "
                    f"the {m.width}x{m.height} frame", (j,))
        if "required_missing" in checks:
            miss = missing_required(k, req)
            if len(miss):
                add("required_missing", ERROR, "required keypoint(s) not labelled: "
                    + ", ".join(names[j] for j in miss), miss)
        if "left_right_swap" in checks and skel.flip_pairs:
            nb = _neighbours(a, frame_by_id, media_by_id, by_media_person, max_gap_seconds)
            seen = set()
            if nb:
                for l, r in swapped_against_neighbours(k, [o[1].keypoints for o in nb], skel.flip_pairs):
                    seen.add((l, r))
                    where = " and ".join(f"#{o[0]}" for o in nb)
                    add("left_right_swap", WARNING, f"{names[l]} and {names[r]} look exchanged: each sits "
                        f"nearer the other's place in the neighbouring frame(s) {where}", (l, r))
            for l, r in mirrored_in_image(k, names, skel.flip_pairs):
                if (l, r) not in seen:
                    add("left_right_swap", WARNING, f"{names[l]} and {names[r]} contradict the body's "
                        "left/right geometry in the picture (possible exchange)", (l, r))
        if "bone_length" in checks and a.id in z_of:
            z, fl = z_of[a.id]
            for e in np.flatnonzero(fl):
                i, j = skel.edges[e]
                word = "long" if z[e] > 0 else "short"
                add("bone_length", WARNING, f"{names[i]}-{names[j]} is unusually {word} for this participant "
                    f"(modified z = {z[e]:+.1f}, limit 3.5; foreshortening can cause this)", (i, j))
        if "visible_but_absent" in checks:
            prop = store.proposal(a.frame_id, a.person)
            if prop is not None:
                for j in visible_but_absent(k, prop.confidence, prop.signals.get("presence")):
                    add("visible_but_absent", WARNING, f"{names[j]} is marked visible but the model "
                        f"{prop.model_id} is confident it is absent", (j,))
    flags.sort(key=lambda fl: (fl.frame_id, fl.person, fl.severity != ERROR, fl.check, fl.keypoints))
    return flags


def check_annotation(project, annotation_id: int) -> list[Flag]:
    """The flags of one annotation (what the annotator sees before submitting)."""
    return run_checks(project, annotation_ids=[annotation_id])


def flags_by_annotation(flags: Iterable[Flag]) -> dict[int, list[Flag]]:
    out: dict[int, list[Flag]] = {}
    for fl in flags:
        out.setdefault(fl.annotation_id, []).append(fl)
    return out


__all__ = ["Flag", "CHECKS", "run_checks", "check_annotation", "outside_image", "missing_required",
           "swapped_against_neighbours", "mirrored_in_image", "modified_z_scores", "bone_lengths",
           "bone_length_outliers", "visible_but_absent", "torso_size", "required_keypoints",
           "set_required_keypoints", "flags_by_annotation"]
