"""The review loop: who may do what to an annotation, and in which order.

States (core/model.py) and the transitions between them, Kinemark's own names::

    (blank) --edit--> drafting                       a person labels a frame
    prefilled --start--> drafting                    a person takes over the model's proposal
    drafting  --submit--> in_review                  the annotator hands it to review
    in_review --recall--> drafting                   the annotator takes it back before review
    in_review --accept--> accepted                   a reviewer accepts it
    in_review --send_back--> returned                a reviewer returns it, with notes
    returned  --resume--> drafting                   the annotator works on the notes
    accepted  --reopen--> returned                   a reviewer reopens accepted work, with notes

Every other move raises :class:`KinemarkError`. Editing keypoints on a prefilled or
returned annotation starts / resumes it in the same transaction.

Roles. Anyone may label (start, edit, submit, resume, recall). Only a reviewer or an
admin may accept, send back, reopen or correct an annotation in review.

Authorship. The *author* of an annotation is the last person who changed its
keypoints while it was being labelled (any keypoint edit that is not a review
correction), and its *submitter* is the person who last submitted it; both are read
from the event log. Nobody accepts, sends back or reopens an annotation of which they
are the author or the submitter. A reviewer's corrections to an annotation in review
(event action ``correct`` from :func:`edit`, or any keypoint edit that leaves the
annotation in review, whichever module wrote it) do not make the reviewer its author:
they are the review's record, and the agreement report measures them. Only the submitter (or an admin)
may recall. In a project with a single person nothing can be accepted: by design,
acceptance needs a second person.

Every change of state is one transaction with its event row (who, when, the
transition's name and the note).
"""
from __future__ import annotations

import json
import time
from dataclasses import dataclass
from datetime import datetime
from typing import Iterable

import numpy as np

from .errors import KinemarkError
from .metrics import bbox_from_keypoints, oks
from .model import (ACCEPTED, DRAFTING, IN_REVIEW, PREFILLED, RETURNED, Annotation, Changes,
                    Event, ReviewNote, User)

LABELLER_ROLES = ("annotator", "reviewer", "admin")
REVIEWER_ROLES = ("reviewer", "admin")


@dataclass(frozen=True)
class Transition:
    name: str
    source: str
    target: str
    roles: tuple[str, ...]
    not_by_author: bool = False     # the author and the submitter may not do it
    needs_note: bool = False
    submitter_only: bool = False    # only the submitter (or an admin)


TRANSITIONS: dict[str, Transition] = {t.name: t for t in (
    Transition("start", PREFILLED, DRAFTING, LABELLER_ROLES),
    Transition("submit", DRAFTING, IN_REVIEW, LABELLER_ROLES),
    Transition("recall", IN_REVIEW, DRAFTING, LABELLER_ROLES, submitter_only=True),
    Transition("accept", IN_REVIEW, ACCEPTED, REVIEWER_ROLES, not_by_author=True),
    Transition("send_back", IN_REVIEW, RETURNED, REVIEWER_ROLES, not_by_author=True, needs_note=True),
    Transition("resume", RETURNED, DRAFTING, LABELLER_ROLES),
    Transition("reopen", ACCEPTED, RETURNED, REVIEWER_ROLES, not_by_author=True, needs_note=True),
)}

#: Keypoint-changing actions that are not labelling (they do not make an author).
REVIEW_EDIT_ACTIONS = ("correct",)
_NOT_EDITS = ("state", "addressed") + REVIEW_EDIT_ACTIONS


def legal_transitions(state: str) -> list[str]:
    return [t.name for t in TRANSITIONS.values() if t.source == state]


# ---- authorship from the event log ---------------------------------------------------------

@dataclass(frozen=True)
class Authorship:
    author_id: int | None          # last person who changed the keypoints while labelling
    submitter_id: int | None       # last person who submitted
    editors: tuple[int, ...] = ()  # everyone who ever changed the keypoints while labelling
    correctors: tuple[int, ...] = ()   # reviewers who corrected it in review

    @property
    def responsible(self) -> set[int]:
        return {u for u in (self.author_id, self.submitter_id) if u is not None}


def _json(text):
    return json.loads(text) if text else None


def keypoints_changed(ev: Event) -> bool:
    """Did this annotation event change the keypoints (or create them)?"""
    b, a = _json(ev.before), _json(ev.after)
    if a is None or "keypoints" not in a:
        return False
    if b is None or "keypoints" not in b:
        return True
    return b["keypoints"] != a["keypoints"]


def is_review_correction(ev: Event) -> bool:
    """A keypoint change made while the annotation stays in review: logged as ``correct`` by
    :func:`edit`, or by any other editor as an edit whose state is in_review before and after."""
    if ev.action in REVIEW_EDIT_ACTIONS:
        return True
    if ev.action in _NOT_EDITS:
        return False
    b, a = _json(ev.before) or {}, _json(ev.after) or {}
    return b.get("state") == IN_REVIEW and a.get("state") == IN_REVIEW


def authorship_from_events(events: Iterable[Event]) -> Authorship:
    """Authorship of one annotation, from its events in log order (see the module docstring)."""
    author = submitter = None
    editors, correctors = [], []
    for ev in events:
        if ev.after is None and ev.action != "state":
            # the annotation was deleted (SQLite may give its id to a new one): start afresh
            author = submitter = None
            editors, correctors = [], []
            continue
        if ev.user_id is None:
            continue
        if ev.action == "state":
            a = _json(ev.after) or {}
            if a.get("transition") == "submit" or (a.get("transition") is None and a.get("state") == IN_REVIEW):
                submitter = ev.user_id
        elif is_review_correction(ev):
            if keypoints_changed(ev) and ev.user_id not in correctors:
                correctors.append(ev.user_id)
        elif keypoints_changed(ev):
            author = ev.user_id
            if ev.user_id not in editors:
                editors.append(ev.user_id)
    return Authorship(author, submitter, tuple(editors), tuple(correctors))


def authorship(project, annotation_id: int) -> Authorship:
    return authorship_from_events(project.store.events(entity="annotation", entity_id=annotation_id))


def authorships(project, annotation_ids: Iterable[int]) -> dict[int, Authorship]:
    evs: dict[int, list[Event]] = {}
    for ev in project.store.events_for("annotation", annotation_ids):
        evs.setdefault(ev.entity_id, []).append(ev)
    return {i: authorship_from_events(evs.get(i, [])) for i in annotation_ids}


# ---- the rules ---------------------------------------------------------------------------

def _user(project, user) -> User:
    if isinstance(user, User):
        return user
    if isinstance(user, int):
        return project.store.user(user)
    return project.user(user)


def add_member(project, name: str, role: str, *, by=None) -> User:
    """Add a person to the project with a role (annotator, reviewer, admin). Only an admin may."""
    admin = _user(project, by)
    if admin.role != "admin":
        raise KinemarkError(f"{admin.name} is an {admin.role}; only an admin adds people to the project")
    return project.store.add_user(name, role, by=admin.id)


def check_transition(annotation: Annotation, name: str, who: User, auth: Authorship,
                     note: str | None = None) -> Transition:
    """Raise KinemarkError unless ``who`` may apply transition ``name`` now; return it."""
    t = TRANSITIONS.get(name)
    if t is None:
        raise KinemarkError(f"unknown transition {name!r}; transitions are {', '.join(TRANSITIONS)}")
    if annotation.state != t.source:
        legal = legal_transitions(annotation.state)
        raise KinemarkError(
            f"cannot {name.replace('_', ' ')} annotation {annotation.id}: it is {annotation.state}, and "
            f"{name} applies only to {t.source} annotations"
            + (f" (from {annotation.state}: {', '.join(legal)})" if legal else ""))
    if who.role not in t.roles:
        raise KinemarkError(f"{who.name} is an {who.role}; only a {' or '.join(t.roles)} may "
                            f"{name.replace('_', ' ')} an annotation")
    if t.not_by_author and who.id in auth.responsible:
        what = "labelled" if who.id == auth.author_id else "submitted"
        raise KinemarkError(f"{who.name} {what} annotation {annotation.id} and cannot "
                            f"{name.replace('_', ' ')} their own work; another reviewer must")
    if t.submitter_only and who.role != "admin" and auth.submitter_id not in (None, who.id):
        raise KinemarkError(f"only the person who submitted annotation {annotation.id} (or an admin) "
                            "can recall it")
    if t.needs_note and not (note and note.strip()):
        raise KinemarkError(f"{name.replace('_', ' ')} needs a note saying what to fix")
    return t


def allowed_transitions(project, annotation_id: int, user=None) -> list[str]:
    """The transitions ``user`` may apply to the annotation now (for the GUI's buttons).

    Transitions that need a note are listed; the note is asked for when applied.
    """
    who = _user(project, user)
    a = project.store.annotation_by_id(annotation_id)
    auth = authorship(project, annotation_id)
    out = []
    for name in legal_transitions(a.state):
        try:
            check_transition(a, name, who, auth, note="x")
        except KinemarkError:
            continue
        out.append(name)
    return out


NoteSpec = tuple  # (keypoint name | index | None, text)


def _note_specs(project, notes) -> list[tuple[int | None, str]]:
    skel = project.skeleton
    out = []
    for kp, text in notes or ():
        if not text or not str(text).strip():
            raise KinemarkError("a note needs some text")
        if kp is None:
            idx = None
        elif isinstance(kp, (int, np.integer)) and not isinstance(kp, bool):
            if not 0 <= int(kp) < skel.num_keypoints:
                raise KinemarkError(f"keypoint index {kp} out of range 0..{skel.num_keypoints - 1}")
            idx = int(kp)
        else:
            idx = skel.index(str(kp))
        out.append((idx, str(text).strip()))
    return out


def apply(project, annotation_id: int, name: str, *, user=None, note: str | None = None,
          notes: Iterable[NoteSpec] = ()) -> Changes:
    """Apply one transition, checked against the rules, as one transaction.

    ``notes``: (keypoint, text) pairs pinned to keypoints (name, index or None for the
    whole pose); with ``send_back`` and ``reopen`` a note or at least one pinned note is needed.
    """
    who = _user(project, user)
    store = project.store
    specs = _note_specs(project, notes)
    summary = note.strip() if note and note.strip() else None
    if summary is None and specs:
        summary = "; ".join(t for _, t in specs)
    with store.tx():
        a = store.annotation_by_id(annotation_id)
        auth = authorship(project, annotation_id)
        t = check_transition(a, name, who, auth, note=summary)
        after = store.transition_state(a.id, t.target, from_state=t.source, transition=t.name,
                                       user_id=who.id, note=summary)
        for idx, text in specs:
            store.add_review_note(a.id, idx, text, user_id=who.id)
        if t.name == "send_back" or t.name == "reopen":
            if not specs:
                store.add_review_note(a.id, None, summary, user_id=who.id)
        if t.name == "submit":
            store.address_review_notes(a.id, user_id=who.id)
    details = {"state": after.state, "version": after.version, "transition": t.name}
    if t.name == "submit":
        from . import qa
        details["flags"] = qa.check_annotation(project, a.id)
    return Changes(annotations=(a.id,), message=f"{t.name.replace('_', ' ')}: annotation {a.id} is now "
                   f"{after.state}", details=details)


def start(project, annotation_id, *, user=None) -> Changes:
    return apply(project, annotation_id, "start", user=user)


def submit(project, annotation_id, *, user=None) -> Changes:
    """Hand the annotation to review. ``details['flags']`` holds its QA flags (not blocking)."""
    return apply(project, annotation_id, "submit", user=user)


def recall(project, annotation_id, *, user=None) -> Changes:
    return apply(project, annotation_id, "recall", user=user)


def accept(project, annotation_id, *, user=None, note: str | None = None) -> Changes:
    return apply(project, annotation_id, "accept", user=user, note=note)


def send_back(project, annotation_id, notes: Iterable[NoteSpec] = (), *, user=None,
              note: str | None = None) -> Changes:
    return apply(project, annotation_id, "send_back", user=user, note=note, notes=notes)


def resume(project, annotation_id, *, user=None) -> Changes:
    return apply(project, annotation_id, "resume", user=user)


def reopen(project, annotation_id, notes: Iterable[NoteSpec] = (), *, user=None,
           note: str | None = None) -> Changes:
    return apply(project, annotation_id, "reopen", user=user, note=note, notes=notes)


def edit(project, frame_id: int, keypoints, sources, *, user=None, person: int = 0, bbox=None,
         expected_version: int | None = None, action: str = "edit") -> Changes:
    """Save a person's keypoints on a frame, under the review rules, as one transaction.

    blank / prefilled / drafting / returned: saved as drafting (prefilled is started and
    returned resumed first). in_review: a correction by a reviewer who is not its author
    or submitter (logged as ``correct``; the state stays in_review). accepted: refused.
    """
    who = _user(project, user)
    store = project.store
    with store.tx():
        holder = store.claim_holder(frame_id)
        if holder is not None and holder[0] != who.id:
            other = store.user(holder[0]).name
            raise KinemarkError(f"frame {frame_id} is claimed by {other} until "
                                f"{time.strftime('%H:%M', time.localtime(holder[1]))}; take another frame")
        a = store.annotation(frame_id, person)
        if expected_version is not None:
            have = a.version if a else 0
            if have != expected_version:
                by = store.user(a.updated_by).name if a and a.updated_by else "someone"
                raise KinemarkError(f"this frame was changed by {by} (version {have}, you had "
                                    f"{expected_version}); reload it before saving")
        state = DRAFTING
        if action in _NOT_EDITS:
            raise ValueError(f"{action!r} is not an editing action")
        if a is not None:
            if a.state == ACCEPTED:
                raise KinemarkError(f"annotation {a.id} is accepted and frozen; a reviewer can reopen it")
            if a.state == IN_REVIEW:
                auth = authorship(project, a.id)
                if who.role not in REVIEWER_ROLES:
                    raise KinemarkError(f"annotation {a.id} is in review; only a reviewer can correct it "
                                        "now (its submitter can recall it first)")
                if who.id in auth.responsible:
                    raise KinemarkError(f"{who.name} labelled or submitted annotation {a.id}; recall it "
                                        "to change it, rather than correcting your own work in review")
                state, action = IN_REVIEW, "correct"
            elif a.state in (PREFILLED, RETURNED):
                name = "start" if a.state == PREFILLED else "resume"
                check_transition(a, name, who, authorship(project, a.id))
                store.transition_state(a.id, DRAFTING, from_state=a.state, transition=name, user_id=who.id)
        saved = store.save_annotation(frame_id, keypoints, sources, state=state, person=person, bbox=bbox,
                                      user_id=who.id, action=action)
    return Changes(annotations=(saved.id,), frames=(frame_id,),
                   message=f"{'corrected' if action == 'correct' else 'saved'} annotation {saved.id}",
                   details={"state": saved.state, "version": saved.version, "action": action})


# ---- notes for the annotator ----------------------------------------------------------------

@dataclass(frozen=True)
class FrameNote:
    """A reviewer's note as the GUI shows it on a frame."""

    note: ReviewNote
    person: int
    keypoint_name: str | None      # None: about the whole pose
    author_name: str | None

    @property
    def open(self) -> bool:
        return self.note.addressed_at is None


def notes_for_frame(project, frame_id: int, *, include_addressed: bool = False) -> list[FrameNote]:
    """The reviewer notes on a frame's annotations, pinned to their keypoints.

    By default only the open ones (not yet addressed by a resubmission).
    """
    anns = {a.id: a for a in project.store.annotations_on_frame(frame_id)}
    names = project.skeleton.keypoints
    users = {u.id: u.name for u in project.store.users()}
    out = []
    for n in project.store.review_notes(anns, open_only=not include_addressed):
        out.append(FrameNote(n, anns[n.annotation_id].person,
                             None if n.keypoint is None else names[n.keypoint], users.get(n.author_id)))
    return out


def sent_back_to(project, user=None) -> list[tuple[int, int]]:
    """Frames a reviewer sent back that ``user`` labelled or handed in, in frame order, each
    with its number of open notes: (frame id, open notes). A sent-back frame with no recorded
    author or submitter (say, imported) is everyone's to pick up."""
    who = _user(project, user)
    anns = project.store.annotations(states=[RETURNED])
    if not anns:
        return []
    auth = authorships(project, [a.id for a in anns])
    open_notes: dict[int, int] = {}
    for n in project.store.review_notes([a.id for a in anns], open_only=True):
        open_notes[n.annotation_id] = open_notes.get(n.annotation_id, 0) + 1
    out = {}
    for a in anns:
        responsible = auth[a.id].responsible
        if responsible and who.id not in responsible:
            continue
        out[a.frame_id] = out.get(a.frame_id, 0) + open_notes.get(a.id, 0)
    return sorted(out.items())


# ---- the reviewer's queue ------------------------------------------------------------------

#: Weights of the risk score (Kinemark's choice, not a published scheme).
RISK_WEIGHTS = {"error": 1.0, "warning": 0.5, "disagreement": 1.0, "fast": 1.0, "untouched": 0.5}
FAST_FRACTION = 0.25     # "unusually fast": under this share of the project's median labelling time
MIN_DURATIONS = 5        # durations needed before "fast" is judged


@dataclass(frozen=True)
class QueueItem:
    annotation_id: int
    frame_id: int
    person: int
    risk: float
    reasons: tuple[str, ...]
    flags: tuple = ()                       # qa.Flag
    model_disagreement: float | None = None  # 1 - OKS(label, model proposal)
    seconds: float | None = None            # labelling time of the last round (event log)
    fast: bool = False
    untouched: bool = False                 # submitted with the model's points unchanged
    author_id: int | None = None


def _ts(at: str) -> float:
    return datetime.fromisoformat(at).timestamp()


def labelling_seconds(events: Iterable[Event]) -> float | None:
    """Time from the start of the last labelling round to its submission, from the event log.

    A round starts with the first person's event (an edit or a start / resume) after the
    previous submission. This is a lower bound on the time spent (looking before the first
    edit leaves no trace).
    """
    start = last = None
    for ev in events:
        if ev.user_id is None:
            continue
        a = _json(ev.after) or {}
        is_submit = ev.action == "state" and (a.get("transition") == "submit"
                                              or (a.get("transition") is None and a.get("state") == IN_REVIEW))
        if is_submit:
            if start is not None:
                last = _ts(ev.at) - start
            start = None
        elif ev.action != "addressed" and not is_review_correction(ev) and start is None:
            if ev.action != "state" or a.get("state") == DRAFTING:
                start = _ts(ev.at)
    return last


def _untouched(events: Iterable[Event]) -> bool:
    """True when no person ever changed the keypoints (a model proposal submitted as is)."""
    return not any(ev.user_id is not None and ev.action not in _NOT_EDITS and not is_review_correction(ev)
                   and keypoints_changed(ev) for ev in events)


def model_disagreement(annotation: Annotation, proposal, sigmas, image_size) -> float | None:
    """1 - OKS between the label (as ground truth) and the model's proposal (as detection)."""
    if proposal is None or not np.any(annotation.keypoints[:, 2] > 0):
        return None
    box = annotation.bbox or bbox_from_keypoints(annotation.keypoints, image_size=image_size)
    area = box[2] * box[3]
    return 1.0 - oks(annotation.keypoints, proposal.keypoints, area, sigmas)


def review_queue(project, *, states: Iterable[str] = (IN_REVIEW,)) -> list[QueueItem]:
    """Submitted annotations, riskiest first.

    Risk = 1 per QA error + 0.5 per QA warning + (1 - OKS against the model's proposal)
    + 1 if labelled unusually fast (under a quarter of the project's median labelling
    time, once five durations are known) + 0.5 if the model's points were submitted
    unchanged. The weights are Kinemark's choice.
    """
    from . import qa
    store, skel = project.store, project.skeleton
    anns = store.annotations(states=list(states))
    if not anns:
        return []
    flags = qa.flags_by_annotation(qa.run_checks(project, annotation_ids=[a.id for a in anns]))
    evs: dict[int, list[Event]] = {}
    for ev in store.events_for("annotation", None):
        evs.setdefault(ev.entity_id, []).append(ev)
    durations = {i: labelling_seconds(e) for i, e in evs.items()}
    known = [d for d in durations.values() if d is not None]
    median = float(np.median(known)) if len(known) >= MIN_DURATIONS else None
    frames = {f.id: f for f in store.frames()}
    media = {m.id: m for m in store.all_media()}
    items = []
    for a in anns:
        m = media[frames[a.frame_id].media_id]
        ev = evs.get(a.id, [])
        fl = tuple(flags.get(a.id, ()))
        n_err = sum(f.severity == qa.ERROR for f in fl)
        n_warn = len(fl) - n_err
        dis = model_disagreement(a, store.proposal(a.frame_id, a.person), skel.sigma_array, (m.width, m.height))
        secs = durations.get(a.id)
        fast = median is not None and secs is not None and secs < FAST_FRACTION * median
        untouched = _untouched(ev)
        w = RISK_WEIGHTS
        risk = (w["error"] * n_err + w["warning"] * n_warn + w["disagreement"] * (dis or 0.0)
                + w["fast"] * fast + w["untouched"] * untouched)
        reasons = []
        if n_err:
            reasons.append(f"{n_err} QA error(s)")
        if n_warn:
            reasons.append(f"{n_warn} QA warning(s)")
        if dis is not None and dis > 0.5:
            reasons.append(f"far from the model's proposal (OKS {1 - dis:.2f})")
        if fast:
            reasons.append(f"labelled in {secs:.0f} s (project median {median:.0f} s)")
        if untouched:
            reasons.append("model's points submitted unchanged")
        items.append(QueueItem(a.id, a.frame_id, a.person, round(float(risk), 6), tuple(reasons), fl, dis,
                               secs, bool(fast), untouched, authorship_from_events(ev).author_id))
    items.sort(key=lambda it: (-it.risk, it.frame_id, it.person))
    return items


def accept_batch(project, *, user=None, annotation_ids: Iterable[int] | None = None,
                 without_flags: bool = True, max_risk: float | None = None) -> Changes:
    """Accept many in-review annotations at once, as one transaction.

    Candidates: ``annotation_ids`` (default: everything in review), kept only if they
    have no QA flag (``without_flags``) and a risk at or under ``max_risk`` (if given).
    Annotations the reviewer labelled or submitted are skipped, with the reason, as are
    those that break any other rule. ``details['accepted']`` and ``details['skipped']``
    say which.
    """
    who = _user(project, user)
    if who.role not in REVIEWER_ROLES:
        raise KinemarkError(f"{who.name} is an {who.role}; only a reviewer or admin may accept annotations")
    queue = {it.annotation_id: it for it in review_queue(project)}
    ids = list(queue) if annotation_ids is None else [int(i) for i in annotation_ids]
    accepted, skipped = [], []
    store = project.store
    with store.tx():
        for i in ids:
            it = queue.get(i)
            if it is None:
                skipped.append((i, "not in review"))
                continue
            if without_flags and it.flags:
                skipped.append((i, f"{len(it.flags)} QA flag(s)"))
                continue
            if max_risk is not None and it.risk > max_risk:
                skipped.append((i, f"risk {it.risk:.2f} over {max_risk:g}"))
                continue
            a = store.annotation_by_id(i)
            try:
                check_transition(a, "accept", who, authorship(project, i))
            except KinemarkError as e:
                skipped.append((i, str(e)))
                continue
            store.transition_state(i, ACCEPTED, from_state=IN_REVIEW, transition="accept", user_id=who.id,
                                   note="batch accept")
            accepted.append(i)
    return Changes(annotations=tuple(accepted),
                   message=f"accepted {len(accepted)} annotation(s); skipped {len(skipped)}",
                   details={"accepted": accepted, "skipped": skipped})


def reviewer_of(events: Iterable[Event]) -> int | None:
    """Who accepted the annotation, if it is accepted now (from its events in log order)."""
    who = None
    for ev in events:
        if ev.action == "state":
            a = _json(ev.after) or {}
            who = ev.user_id if a.get("state") == ACCEPTED else None
    return who


__all__ = ["TRANSITIONS", "Transition", "legal_transitions", "Authorship", "authorship", "is_review_correction",
           "authorship_from_events", "authorships", "add_member", "check_transition",
           "allowed_transitions", "apply",
           "start", "submit", "recall", "accept", "send_back", "resume", "reopen", "edit", "FrameNote",
           "notes_for_frame", "QueueItem", "review_queue", "accept_batch", "labelling_seconds",
           "model_disagreement", "reviewer_of"]
