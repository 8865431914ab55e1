"""Editing operations behind the labelling workspace. No Qt.

Every function that changes the project returns a :class:`Changes` record
whose ``frames`` name the frames touched and whose ``details["before"]``
maps each touched frame id to the :class:`Snapshot` it had before (``None``
when the frame had no annotation). A front end keeps those snapshots to undo:
:func:`restore` puts a frame back to a snapshot, refusing when the frame no
longer looks the way the caller expects (someone else changed it meanwhile).

Sources: a point a person placed, moved, re-judged or confirmed is
``"human"``. Points that came from a machine keep their source
(``"model"``, ``"adapted"``, ``"propagated"``, ``"imported"``) until a person
confirms them with :func:`confirm`; the original proposal stays in the
proposals table and the confirmation is in the event log.

States: the first edit of a frame, or any edit of a prefilled or returned
one, makes it ``drafting``. A reviewer or admin editing a frame that is in
review keeps it in review; anyone else editing it takes it back to drafting.
An accepted frame is only changed by a reviewer or admin, and goes back to
drafting so that it is reviewed again.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Iterable

import numpy as np

from . import propagate as prop
from . import review
from .errors import KinemarkError
from .model import ACCEPTED, BLANK, IN_REVIEW, Changes
from .project import Project

MACHINE_SOURCES = ("model", "adapted", "propagated")


@dataclass(frozen=True, eq=False)
class Snapshot:
    """What one person's annotation on one frame holds, for undo and for comparisons."""

    keypoints: np.ndarray
    sources: tuple[str, ...]
    state: str

    def same(self, other: "Snapshot | None") -> bool:
        return (other is not None and self.state == other.state and self.sources == other.sources
                and np.array_equal(np.asarray(self.keypoints, float), np.asarray(other.keypoints, float)))


def _same(a: Snapshot | None, b: Snapshot | None) -> bool:
    return b is None if a is None else a.same(b)


@dataclass(frozen=True, eq=False)
class Working:
    """The keypoints a person starts from on one frame.

    The stored annotation when there is one; otherwise the model's latest
    proposal (sources ``model``/``adapted``, state ``blank`` because nothing
    is stored yet); otherwise nothing labelled.
    """

    frame_id: int
    keypoints: np.ndarray                 # (K, 3)
    sources: tuple[str, ...]
    state: str                            # one of model.STATES, or BLANK
    version: int                          # 0 when nothing is stored
    annotation_id: int | None
    confidence: np.ndarray | None         # (K,) proposal confidence, if a proposal exists
    proposal: np.ndarray | None           # (K, 3) the proposal's keypoints, if any
    proposal_source: str | None           # "model" or "adapted"

    @property
    def from_proposal(self) -> bool:
        return self.annotation_id is None and self.proposal is not None


def snapshot(project: Project, frame_id: int, person: int = 0) -> Snapshot | None:
    return _snapshot_of(project.store.annotation(frame_id, person))


def _snapshot_of(a) -> Snapshot | None:
    if a is None:
        return None
    return Snapshot(np.asarray(a.keypoints, float).copy(), tuple(a.sources), a.state)


def working(project: Project, frame_id: int, person: int = 0) -> Working:
    store = project.store
    K = project.skeleton.num_keypoints
    p = store.proposal(frame_id, person)
    conf = None if p is None else np.asarray(p.confidence, float)
    pk = None if p is None else np.asarray(p.keypoints, float)
    psrc = None if p is None else ("adapted" if p.adapted else "model")
    a = store.annotation(frame_id, person)
    if a is not None:
        return Working(frame_id, np.asarray(a.keypoints, float).copy(), tuple(a.sources), a.state,
                       a.version, a.id, conf, pk, psrc)
    if p is not None:
        kps = pk.copy()
        kps[kps[:, 2] == 0, :2] = 0.0
        return Working(frame_id, kps, (psrc,) * K, BLANK, 0, None, conf, pk, psrc)
    return Working(frame_id, np.zeros((K, 3)), ("human",) * K, BLANK, 0, None, None, None, None)


def _save(project: Project, frame_id: int, kps: np.ndarray, sources, *, user, person: int,
          expected_version: int | None, action: str, message: str) -> Changes:
    """Save through the review rules (core.review.edit): the one place that decides which
    state an edit leaves a frame in and who may edit it."""
    store = project.store
    who = project.user(user)
    with store.tx():
        before = snapshot(project, frame_id, person)
        ch = review.edit(project, frame_id, kps, sources, user=who.name, person=person,
                         expected_version=expected_version, action=action)
    return Changes(frames=(frame_id,), annotations=ch.annotations, message=message,
                   details={"before": {frame_id: before}, **ch.details})


def _edit(project: Project, frame_id: int, change: Callable[[np.ndarray, list], str], *, user,
          person: int, expected_version: int | None, action: str) -> Changes:
    w = working(project, frame_id, person)
    kps = w.keypoints.copy()
    sources = list(w.sources)
    message = change(kps, sources)
    return _save(project, frame_id, kps, sources, user=user, person=person,
                 expected_version=expected_version, action=action, message=message)


def _check_index(project: Project, index: int):
    K = project.skeleton.num_keypoints
    if not 0 <= int(index) < K:
        raise KinemarkError(f"keypoint index {index} out of range 0..{K - 1}")


def _check_xy(project: Project, frame_id: int, x: float, y: float):
    if not (np.isfinite(x) and np.isfinite(y)):
        raise KinemarkError("keypoint coordinates must be finite numbers")
    f = project.store.frame(frame_id)
    m = project.store.media(f.media_id)
    if not (-0.5 <= x <= m.width - 0.5 and -0.5 <= y <= m.height - 0.5):
        raise KinemarkError(f"({x:.1f}, {y:.1f}) is outside the {m.width}x{m.height} frame; "
                            "a point outside the picture is 'not in frame' (visibility 0)")


def set_point(project: Project, frame_id: int, index: int, x: float, y: float, v: int | None = None, *,
              user: str | None = None, person: int = 0, expected_version: int | None = None) -> Changes:
    """Place keypoint ``index`` at (x, y) frame pixels (floats are kept).

    ``v`` defaults to the point's visibility, or 2 (visible) if it had none.
    """
    _check_index(project, index)
    x, y = float(x), float(y)
    _check_xy(project, frame_id, x, y)
    name = project.skeleton.keypoints[index]

    def change(kps, sources):
        vis = int(v) if v is not None else (int(kps[index, 2]) or 2)
        if vis not in (1, 2):
            raise KinemarkError("a placed point is visible (2) or occluded (1)")
        kps[index] = (x, y, vis)
        sources[index] = "human"
        return f"placed {name} at ({x:.1f}, {y:.1f})"

    return _edit(project, frame_id, change, user=user, person=person,
                 expected_version=expected_version, action="edit")


def next_visibility(v: int) -> int:
    """The visibility cycle: visible (2) -> occluded (1) -> not in frame (0) -> visible (2)."""
    return {2: 1, 1: 0, 0: 2}[int(v)]


VISIBILITY_WORDS = {2: "visible", 1: "occluded", 0: "not in frame"}


def set_visibility(project: Project, frame_id: int, index: int, v: int, *, at=None,
                   user: str | None = None, person: int = 0,
                   expected_version: int | None = None) -> Changes:
    """Set keypoint ``index``'s visibility (COCO 2 visible / 1 occluded / 0 not in frame).

    Going from 0 to a labelled value needs a position: ``at`` = (x, y).
    """
    _check_index(project, index)
    v = int(v)
    if v not in (0, 1, 2):
        raise KinemarkError("visibility must be 0, 1 or 2 (COCO)")
    if at is not None:
        _check_xy(project, frame_id, float(at[0]), float(at[1]))
    name = project.skeleton.keypoints[index]

    def change(kps, sources):
        if v > 0 and kps[index, 2] == 0:
            if at is None:
                raise KinemarkError(f"{name} has no position yet: place it first")
            kps[index, :2] = (float(at[0]), float(at[1]))
        kps[index, 2] = v
        if v == 0:
            kps[index, :2] = 0.0
        sources[index] = "human"
        return f"{name}: {VISIBILITY_WORDS[v]}"

    return _edit(project, frame_id, change, user=user, person=person,
                 expected_version=expected_version, action="edit")


def confirm(project: Project, frame_id: int, indices: Iterable[int] | None = None, *,
            user: str | None = None, person: int = 0, expected_version: int | None = None) -> Changes:
    """A person vouches for machine points: their source becomes ``human``.

    On a frame with nothing stored yet, the model's proposal is the starting
    point, so this takes the proposal for those keypoints. ``indices`` None
    means every keypoint that came from a machine.
    """
    w = working(project, frame_id, person)
    K = project.skeleton.num_keypoints
    idx = list(range(K)) if indices is None else [int(i) for i in indices]
    for i in idx:
        _check_index(project, i)
    todo = [i for i in idx if w.sources[i] in MACHINE_SOURCES]
    if not todo:
        if w.proposal is None and w.annotation_id is None:
            raise KinemarkError("there is no proposal on this frame to take")
        raise KinemarkError("nothing to confirm: these points are already a person's")

    def change(kps, sources):
        for i in todo:
            sources[i] = "human"
        if len(todo) == 1:
            return f"confirmed {project.skeleton.keypoints[todo[0]]}"
        return f"confirmed {len(todo)} points"

    return _edit(project, frame_id, change, user=user, person=person,
                 expected_version=expected_version, action="confirm")


def hand_in(project: Project, frame_id: int, *, user: str | None = None, person: int = 0) -> Changes:
    """Hand a frame in for review (state ``in_review``)."""
    who = project.user(user)
    store = project.store
    a = store.annotation(frame_id, person)
    if a is None:
        raise KinemarkError("nothing is labelled on this frame yet")
    if a.state in (IN_REVIEW, ACCEPTED):
        raise KinemarkError(f"this frame is already {a.state.replace('_', ' ')}")
    if any(s in MACHINE_SOURCES for s, v in zip(a.sources, a.keypoints[:, 2]) if v > 0):
        n = sum(1 for s, v in zip(a.sources, a.keypoints[:, 2]) if v > 0 and s in MACHINE_SOURCES)
        raise KinemarkError(f"{n} point(s) still come straight from the model or the tracker; "
                            "confirm or move them before handing the frame in")
    with store.tx():
        before = snapshot(project, frame_id, person)
        ch = review.submit(project, a.id, user=who.name)
    return Changes(frames=(frame_id,), annotations=ch.annotations, message="handed in for review",
                   details={"before": {frame_id: before}, **ch.details})


def restore(project: Project, frames: dict, *, expect: dict, user: str | None = None, person: int = 0,
            action: str = "undo") -> Changes:
    """Put frames back to snapshots (``{frame_id: Snapshot | None}``), in one transaction.

    ``expect`` gives, per frame, the snapshot the caller believes is stored
    now; if any frame differs (someone changed it since), nothing is written.
    A ``None`` target removes the frame's annotation (an event-log row keeps it).
    """
    store = project.store
    who = project.user(user)
    ann_ids = []
    with store.tx():
        before, stored = {}, {}
        for fid in frames:
            stored[fid] = store.annotation(fid, person)
            now = _snapshot_of(stored[fid])
            if not _same(expect.get(fid), now):
                raise KinemarkError(f"frame {fid} changed since (now {now.state if now else 'blank'}); "
                                    f"it cannot be put back")
            before[fid] = now
        # every write carries the version compared above: on PostgreSQL (read committed) another
        # person's save can land between that read and these writes; it is refused, not lost
        for fid, target in frames.items():
            a = stored[fid]
            if target is None:
                if a is not None:
                    store.delete_annotation(a.id, user_id=who.id, action=action, expected_version=a.version)
            else:
                a = store.save_annotation(fid, target.keypoints, target.sources, state=target.state,
                                          person=person, user_id=who.id, action=action,
                                          expected_version=a.version if a is not None else 0)
                ann_ids.append(a.id)
    return Changes(frames=tuple(frames), annotations=tuple(ann_ids), message=action,
                   details={"before": before})


# ---- video assist -------------------------------------------------------------------

def _protected(project: Project, frame_id: int, person: int = 0) -> bool:
    """A frame holding a person's work, which video assist must not overwrite."""
    a = project.store.annotation(frame_id, person)
    if a is None:
        return False
    if a.state in (IN_REVIEW, ACCEPTED):
        return True
    return any(s in ("human", "imported") and v > 0 for s, v in zip(a.sources, a.keypoints[:, 2]))


def _tick(progress, done, total, message):
    if progress is not None:
        progress(done, total, message)


def carry_forward(project: Project, frame_id: int, *, count: int = 10, user: str | None = None,
                  person: int = 0, progress=None, fb_max: float = prop.FB_MAX) -> Changes:
    """Carry this frame's keypoints to the next ``count`` sampled frames of its video.

    Tracks with pyramidal Lucas-Kanade through every decoded frame in between
    (see :mod:`.propagate`), dropping points that fail the forward-backward
    check. The results are stored with source ``propagated`` (state
    drafting) until a person confirms them. Stops before the first following
    frame that already holds a person's work.
    """
    store = project.store
    f = store.frame(frame_id)
    media = store.media(f.media_id)
    if media.kind != "video":
        raise KinemarkError("carrying keypoints forward needs a video, not a single image")
    w = working(project, frame_id, person)
    if not (w.keypoints[:, 2] > 0).any():
        raise KinemarkError("nothing is labelled on this frame to carry forward")
    later = [g for g in store.frames(f.media_id) if g.frame_index > f.frame_index]
    targets = []
    for g in later:
        if len(targets) >= max(int(count), 0) or _protected(project, g.id, person):
            break
        targets.append(g)
    if not targets:
        raise KinemarkError("no following frame to carry to (the next one already holds a person's work)")
    wanted = {g.frame_index: g for g in targets}
    last = targets[-1].frame_index
    src = project.frame_source(f.media_id)
    total = last - f.frame_index

    def frames():
        for n, i in enumerate(range(f.frame_index, last + 1)):
            _tick(progress, n, total, "tracking")
            yield src.read(i)

    results = {}
    it = prop.propagate_keypoints(w.keypoints, frames(),
                                  keep=lambda i: (f.frame_index + i) in wanted, fb_max=fb_max)
    order = [g for g in targets]
    for g, kps in zip(order, it):
        results[g.id] = kps
    _tick(progress, total, total, "saving")
    if not results:
        raise KinemarkError("every point was lost on the first following frame; nothing carried")
    K = project.skeleton.num_keypoints
    who = project.user(user)
    before, ann_ids = {}, []
    with store.tx():
        for fid, kps in results.items():
            if _protected(project, fid, person):   # changed meanwhile
                continue
            before[fid] = snapshot(project, fid, person)
            ch = review.edit(project, fid, kps, ["propagated"] * K, user=who.name, person=person,
                             action="propagate")
            ann_ids.extend(ch.annotations)
    kept = [int((k[:, 2] > 0).sum()) for k in results.values()]
    msg = (f"carried {int((w.keypoints[:, 2] > 0).sum())} point(s) to {len(before)} frame(s); "
           f"{kept[-1]} still tracked on the last")
    return Changes(frames=tuple(before), annotations=tuple(ann_ids), message=msg,
                   details={"before": before})


def keyframe_before(project: Project, frame_id: int, person: int = 0) -> int | None:
    """The nearest earlier sampled frame of the same video that holds a person's work."""
    store = project.store
    f = store.frame(frame_id)
    for g in reversed([g for g in store.frames(f.media_id) if g.frame_index < f.frame_index]):
        if _protected(project, g.id, person):
            return g.id
    return None


def fill_between(project: Project, frame_a: int, frame_b: int, *, user: str | None = None,
                 person: int = 0) -> Changes:
    """Fill the sampled frames between two labelled keyframes by linear interpolation.

    Position is interpolated by frame index (time) where both keyframes label
    the point; filled points are stored with source ``propagated`` (state
    drafting) until a person confirms them. Frames in between that already
    hold a person's work are left alone.
    """
    store = project.store
    fa, fb = store.frame(frame_a), store.frame(frame_b)
    if fa.media_id != fb.media_id:
        raise KinemarkError("both keyframes must be in the same video")
    if fa.frame_index > fb.frame_index:
        fa, fb = fb, fa
    ka, kb = working(project, fa.id, person), working(project, fb.id, person)
    if ka.annotation_id is None or kb.annotation_id is None:
        raise KinemarkError("both keyframes need stored keypoints")
    between = [g for g in store.frames(fa.media_id) if fa.frame_index < g.frame_index < fb.frame_index]
    if not between:
        raise KinemarkError("there is no sampled frame between these two keyframes")
    K = project.skeleton.num_keypoints
    who = project.user(user)
    span = fb.frame_index - fa.frame_index
    before, ann_ids = {}, []
    with store.tx():
        for g in between:
            if _protected(project, g.id, person):
                continue
            kps = prop.interpolate_keypoints(ka.keypoints, kb.keypoints, (g.frame_index - fa.frame_index) / span)
            before[g.id] = snapshot(project, g.id, person)
            ch = review.edit(project, g.id, kps, ["propagated"] * K, user=who.name, person=person,
                             action="interpolate")
            ann_ids.extend(ch.annotations)
    if not before:
        raise KinemarkError("every frame in between already holds a person's work")
    return Changes(frames=tuple(before), annotations=tuple(ann_ids),
                   message=f"filled {len(before)} frame(s) between frames {fa.frame_index} and {fb.frame_index}",
                   details={"before": before})


# ---- reading helpers for the workspace ------------------------------------------------

def frame_states(project: Project, media_id: int, person: int = 0) -> dict[int, str]:
    """frame id -> state (or ``blank``) for every sampled frame of one media."""
    ids = project.store.frame_ids(media_id)
    states = project.store.annotation_states(list(ids.values()), person)
    return {fid: states.get(fid, BLANK) for fid in ids.values()}


__all__ = ["Snapshot", "Working", "working", "snapshot", "set_point", "set_visibility",
           "next_visibility", "confirm", "hand_in", "restore", "carry_forward", "fill_between",
           "keyframe_before", "frame_states", "VISIBILITY_WORDS", "MACHINE_SOURCES"]
