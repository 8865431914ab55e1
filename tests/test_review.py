"""The review loop: the state machine, roles, self-review, notes, the queue and batch accept.

These are Kinemark's own rules (core/review.py), so the checks here are against the
rules as written there; the OKS used for the model-disagreement risk is checked
against pycocotools in tests/test_metrics.py.
"""
import json

import numpy as np
import pytest

from kinemark.core import review, store as store_mod
from kinemark.core.errors import KinemarkError
from kinemark.core.model import ACCEPTED, DRAFTING, IN_REVIEW, PREFILLED, RETURNED, STATES


def _pose(dx=0.0):
    """A plausible upright person facing the camera in a 200 x 200 frame (image y grows down)."""
    pts = {
        "nose": (100, 40), "left_eye": (106, 35), "right_eye": (94, 35), "left_ear": (112, 38),
        "right_ear": (88, 38), "left_shoulder": (125, 70), "right_shoulder": (75, 70),
        "left_elbow": (132, 100), "right_elbow": (68, 100), "left_wrist": (135, 128),
        "right_wrist": (65, 128), "left_hip": (115, 130), "right_hip": (85, 130),
        "left_knee": (117, 160), "right_knee": (83, 160), "left_ankle": (118, 190), "right_ankle": (82, 190),
    }
    from kinemark.core.skeleton import COCO17
    k = np.array([[*pts[n], 2] for n in COCO17.keypoints], float)
    k[:, 0] += dx
    return k


H = ["human"] * 17


@pytest.fixture
def team(project):
    s = project.store
    users = {"admin": project.user()}
    for name, role in (("ann", "annotator"), ("ann2", "annotator"), ("rev", "reviewer"), ("rev2", "reviewer")):
        users[name] = s.add_user(name, role)
    return users


def _frames(project, n=1, size=(200, 200)):
    s = project.store
    n_media = len(s.all_media())
    _, fids = s.add_media(session_id=None, kind="video", path=f"clip{n_media}.mp4", path_base="project",
                          sha256=f"{n_media + 1:064x}", fps=10.0, frame_count=n, width=size[0], height=size[1],
                          frames=[(i, i / 10.0, f"{i:064x}") for i in range(n)])
    return fids


def _to_state(project, fid, state):
    """Bring a frame's annotation (labelled by 'ann') into ``state`` by legal moves."""
    if state == PREFILLED:
        return project.store.save_annotation(fid, _pose(), ["model"] * 17, state=PREFILLED, action="prefill")
    review.edit(project, fid, _pose(), H, user="ann")
    a = project.store.annotation(fid)
    if state == DRAFTING:
        return project.store.annotation(fid)
    review.submit(project, a.id, user="ann")
    if state == IN_REVIEW:
        return project.store.annotation(fid)
    if state == ACCEPTED:
        review.accept(project, a.id, user="rev")
    elif state == RETURNED:
        review.send_back(project, a.id, [("left_wrist", "too high")], user="rev")
    return project.store.annotation(fid)


# who may apply each transition to an annotation labelled and submitted by "ann"
ACTOR = {"start": "ann", "submit": "ann", "recall": "ann", "accept": "rev", "send_back": "rev",
         "resume": "ann", "reopen": "rev"}


@pytest.mark.parametrize("name", list(review.TRANSITIONS))
def test_every_legal_transition_works_and_is_logged(project, team, name):
    t = review.TRANSITIONS[name]
    fid = _frames(project)[0]
    a = _to_state(project, fid, t.source)
    assert a.state == t.source
    n_before = len(project.store.events(entity="annotation", entity_id=a.id))
    ch = review.apply(project, a.id, name, user=ACTOR[name], note="see the wrist")
    after = project.store.annotation_by_id(a.id)
    assert after.state == t.target and ch.details["state"] == t.target
    assert after.version == a.version + 1
    evs = project.store.events(entity="annotation", entity_id=a.id)[n_before:]
    state_evs = [e for e in evs if e.action == "state"]
    assert len(state_evs) == 1
    e = state_evs[0]
    assert e.user_id == team[ACTOR[name]].id and e.at
    assert json.loads(e.before)["state"] == t.source
    assert json.loads(e.after)["state"] == t.target and json.loads(e.after)["transition"] == name


ILLEGAL = [(name, state) for name, t in review.TRANSITIONS.items() for state in STATES if state != t.source]


@pytest.mark.parametrize("name,state", ILLEGAL)
def test_every_illegal_transition_raises(project, team, name, state):
    fid = _frames(project)[0]
    a = _to_state(project, fid, state)
    n_events = len(project.store.events())
    with pytest.raises(KinemarkError, match=f"cannot .*it is {state}"):
        review.apply(project, a.id, name, user=team["admin"], note="x")
    assert project.store.annotation_by_id(a.id).state == state
    assert len(project.store.events()) == n_events


def test_the_machine_covers_every_state():
    sources = {t.source for t in review.TRANSITIONS.values()}
    targets = {t.target for t in review.TRANSITIONS.values()}
    assert sources == set(STATES)            # no dead end
    assert targets == set(STATES) - {PREFILLED}   # only the model makes prefilled
    with pytest.raises(KinemarkError, match="unknown transition"):
        review.check_transition(None, "approve", None, None)


def test_only_an_admin_adds_people(project, team):
    with pytest.raises(KinemarkError, match="only an admin adds people"):
        review.add_member(project, "newcomer", "annotator", by="rev")
    u = review.add_member(project, "newcomer", "reviewer", by=team["admin"])
    assert project.store.user("newcomer").role == "reviewer" == u.role
    with pytest.raises(KinemarkError, match="unknown role"):
        review.add_member(project, "x", "boss", by=team["admin"])


def test_annotator_cannot_accept_or_send_back(project, team):
    fid = _frames(project)[0]
    a = _to_state(project, fid, IN_REVIEW)
    with pytest.raises(KinemarkError, match="annotator; only a reviewer or admin"):
        review.accept(project, a.id, user="ann2")
    with pytest.raises(KinemarkError, match="annotator; only a reviewer or admin"):
        review.send_back(project, a.id, [(None, "redo")], user="ann2")
    assert project.store.annotation_by_id(a.id).state == IN_REVIEW


def test_nobody_accepts_or_sends_back_their_own_work(project, team):
    fid = _frames(project)[0]
    review.edit(project, fid, _pose(), H, user="rev")       # a reviewer labels a frame herself
    a = project.store.annotation(fid)
    review.submit(project, a.id, user="rev")
    for fn in (lambda u: review.accept(project, a.id, user=u),
               lambda u: review.send_back(project, a.id, [(None, "x")], user=u)):
        with pytest.raises(KinemarkError, match="own work"):
            fn("rev")
    review.accept(project, a.id, user="rev2")
    assert project.store.annotation_by_id(a.id).state == ACCEPTED
    with pytest.raises(KinemarkError, match="own work"):
        review.reopen(project, a.id, [(None, "x")], user="rev")


def test_the_submitter_is_responsible_too(project, team):
    fid = _frames(project)[0]
    review.edit(project, fid, _pose(), H, user="ann")
    a = project.store.annotation(fid)
    review.submit(project, a.id, user="rev")                 # the reviewer submitted ann's draft
    with pytest.raises(KinemarkError, match="submitted .* own work"):
        review.accept(project, a.id, user="rev")
    auth = review.authorship(project, a.id)
    assert auth.author_id == team["ann"].id and auth.submitter_id == team["rev"].id


def test_the_author_is_the_last_person_who_edited_the_keypoints(project, team):
    fid = _frames(project)[0]
    review.edit(project, fid, _pose(), H, user="ann")
    review.edit(project, fid, _pose(3), H, user="ann2")
    review.edit(project, fid, _pose(3), H, user="ann")        # no change to the points: not authorship
    a = project.store.annotation(fid)
    assert review.authorship(project, a.id).author_id == team["ann2"].id


def test_reviewer_correction_is_logged_and_does_not_make_an_author(project, team):
    fid = _frames(project)[0]
    a = _to_state(project, fid, IN_REVIEW)
    k = _pose(); k[9, 1] += 8
    ch = review.edit(project, fid, k, H, user="rev")
    assert ch.details["action"] == "correct" and ch.details["state"] == IN_REVIEW
    auth = review.authorship(project, a.id)
    assert auth.author_id == team["ann"].id and auth.correctors == (team["rev"].id,)
    review.accept(project, a.id, user="rev")
    assert project.store.annotation_by_id(a.id).state == ACCEPTED


def test_an_edit_that_stays_in_review_counts_as_a_correction_whoever_wrote_it(project, team):
    fid = _frames(project)[0]
    a = _to_state(project, fid, IN_REVIEW)
    k = _pose(); k[0, 0] += 5
    project.store.save_annotation(fid, k, H, state=IN_REVIEW, user_id=team["rev"].id, action="edit")
    auth = review.authorship(project, a.id)
    assert auth.author_id == team["ann"].id and auth.correctors == (team["rev"].id,)
    review.accept(project, a.id, user="rev")


def test_edit_rules_by_state(project, team):
    f1, f2, f3 = _frames(project, 3)
    a = _to_state(project, f1, IN_REVIEW)
    with pytest.raises(KinemarkError, match="only a reviewer can correct"):
        review.edit(project, f1, _pose(1), H, user="ann2")
    with pytest.raises(KinemarkError, match="only a reviewer can correct"):
        review.edit(project, f1, _pose(1), H, user="ann")
    assert project.store.annotation(f1).version == a.version
    b = _to_state(project, f2, ACCEPTED)
    with pytest.raises(KinemarkError, match="accepted and frozen"):
        review.edit(project, f2, _pose(1), H, user="rev2")
    # a prefilled proposal is started, a returned one resumed, by the edit itself
    p = _to_state(project, f3, PREFILLED)
    ch = review.edit(project, f3, _pose(2), H, user="ann2")
    assert ch.details["state"] == DRAFTING
    trans = [json.loads(e.after).get("transition") for e in project.store.events(entity="annotation", entity_id=p.id)
             if e.action == "state"]
    assert trans == ["start"]
    assert b.state == ACCEPTED


def test_own_submitted_work_cannot_be_corrected_in_review(project, team):
    fid = _frames(project)[0]
    review.edit(project, fid, _pose(), H, user="rev")
    a = project.store.annotation(fid)
    review.submit(project, a.id, user="rev")
    with pytest.raises(KinemarkError, match="recall it"):
        review.edit(project, fid, _pose(1), H, user="rev")
    review.recall(project, a.id, user="rev")
    assert project.store.annotation_by_id(a.id).state == DRAFTING


def test_only_the_submitter_or_an_admin_recalls(project, team):
    fid = _frames(project)[0]
    a = _to_state(project, fid, IN_REVIEW)
    with pytest.raises(KinemarkError, match="only the person who submitted"):
        review.recall(project, a.id, user="ann2")
    review.recall(project, a.id, user=team["admin"])
    assert project.store.annotation_by_id(a.id).state == DRAFTING


def test_send_back_pins_notes_to_keypoints_and_the_annotator_sees_them(project, team):
    fid = _frames(project)[0]
    a = _to_state(project, fid, IN_REVIEW)
    with pytest.raises(KinemarkError, match="needs a note"):
        review.send_back(project, a.id, [], user="rev")
    with pytest.raises(KinemarkError, match="no keypoint 'left_thumb'"):
        review.send_back(project, a.id, [("left_thumb", "where?")], user="rev")
    assert project.store.annotation_by_id(a.id).state == IN_REVIEW     # nothing half-done
    review.send_back(project, a.id, [("left_wrist", "on the styloid, not the hand"), (16, "hidden: v=1"),
                                     (None, "check the whole left arm")], user="rev")
    notes = review.notes_for_frame(project, fid)
    assert [(n.keypoint_name, n.note.text) for n in notes] == [
        ("left_wrist", "on the styloid, not the hand"), ("right_ankle", "hidden: v=1"),
        (None, "check the whole left arm")]
    assert all(n.author_name == "rev" and n.open and n.person == 0 for n in notes)
    # the annotator works on it and resubmits: the notes are addressed, still on record
    review.edit(project, fid, _pose(1), H, user="ann")
    review.submit(project, a.id, user="ann")
    assert review.notes_for_frame(project, fid) == []
    old = review.notes_for_frame(project, fid, include_addressed=True)
    assert len(old) == 3 and all(n.note.addressed_by == team["ann"].id for n in old)


def test_frames_sent_back_are_listed_for_the_person_who_labelled_them(project, team):
    f1, f2 = _frames(project, 2)
    a1 = _to_state(project, f1, IN_REVIEW)                 # labelled and handed in by "ann"
    a2 = _to_state(project, f2, IN_REVIEW)
    assert review.sent_back_to(project, "ann") == []
    review.send_back(project, a1.id, [("left_wrist", "on the styloid"), (None, "whole arm")], user="rev")
    review.send_back(project, a2.id, [(None, "recheck")], user="rev")
    assert review.sent_back_to(project, "ann") == [(f1, 2), (f2, 1)]
    assert review.sent_back_to(project, "ann2") == []     # not theirs to fix
    # worked on and handed in again: no longer waiting
    review.edit(project, f1, _pose(1), H, user="ann")
    review.submit(project, a1.id, user="ann")
    assert review.sent_back_to(project, "ann") == [(f2, 1)]


def test_allowed_transitions_for_the_gui(project, team):
    fid = _frames(project)[0]
    a = _to_state(project, fid, IN_REVIEW)
    assert review.allowed_transitions(project, a.id, "ann") == ["recall"]
    assert review.allowed_transitions(project, a.id, "ann2") == []
    assert review.allowed_transitions(project, a.id, "rev") == ["accept", "send_back"]


def test_concurrent_state_change_is_refused(project, team):
    fid = _frames(project)[0]
    a = _to_state(project, fid, IN_REVIEW)
    review.accept(project, a.id, user="rev")
    with pytest.raises(KinemarkError, match="now accepted, not in_review"):
        project.store.transition_state(a.id, RETURNED, from_state=IN_REVIEW, transition="send_back",
                                       user_id=team["rev2"].id)


def test_single_person_project_cannot_accept(project):
    """By design: acceptance needs a second person (documented in core/review.py)."""
    _, (fid,) = project.store.add_media(session_id=None, kind="image", path="a.png", path_base="project",
                                        sha256="ee" * 32, fps=None, frame_count=1, width=200, height=200,
                                        frames=[(0, None, "x")])
    review.edit(project, fid, _pose(), H)
    a = project.store.annotation(fid)
    review.submit(project, a.id)
    with pytest.raises(KinemarkError, match="own work"):
        review.accept(project, a.id)


# ---- the queue ---------------------------------------------------------------------------

def test_queue_puts_risky_frames_first(project, team):
    f_clean, f_outside, f_far = _frames(project, 3)
    for fid in (f_clean, f_outside, f_far):
        project.store.save_proposal(fid, model_id="m", model_hash="h", keypoints=_pose(),
                                    confidence=np.ones(17), signals={}, score=0.9)
    review.edit(project, f_clean, _pose(0.5), H, user="ann")
    k = _pose(); k[10] = (230.0, 128.0, 2)          # right wrist outside the 200 px wide frame
    review.edit(project, f_outside, k, H, user="ann")
    review.edit(project, f_far, _pose(40), H, user="ann")     # 40 px away from the model
    for fid in (f_clean, f_outside, f_far):
        review.submit(project, project.store.annotation(fid).id, user="ann")
    q = review.review_queue(project)
    order = [it.frame_id for it in q]
    assert order[-1] == f_clean
    assert set(order[:2]) == {f_outside, f_far}
    by = {it.frame_id: it for it in q}
    assert any(fl.check == "outside_image" for fl in by[f_outside].flags)
    assert by[f_far].model_disagreement > 0.8 and by[f_clean].model_disagreement < 0.05
    assert any("far from the model" in r for r in by[f_far].reasons)


def test_labelling_time_from_the_event_log_and_fast_flag(project, team, monkeypatch):
    clock = {"t": 0.0}

    def fake_now():
        from datetime import datetime, timezone
        return datetime.fromtimestamp(1.7e9 + clock["t"], timezone.utc).isoformat(timespec="milliseconds")
    monkeypatch.setattr(store_mod, "now_iso", fake_now)
    fids = _frames(project, 7)
    for n, fid in enumerate(fids):
        clock["t"] += 100
        review.edit(project, fid, _pose(n), H, user="ann")
        clock["t"] += 2 if n == 0 else 60            # the first one is submitted after 2 s
        review.submit(project, project.store.annotation(fid).id, user="ann")
    q = {it.frame_id: it for it in review.review_queue(project)}
    assert q[fids[0]].seconds == pytest.approx(2.0) and q[fids[0]].fast
    assert q[fids[1]].seconds == pytest.approx(60.0) and not q[fids[1]].fast
    assert review.review_queue(project)[0].frame_id == fids[0]


def test_untouched_model_proposal_is_a_risk(project, team):
    f1, f2 = _frames(project, 2)
    for fid in (f1, f2):
        project.store.save_annotation(fid, _pose(), ["model"] * 17, state=PREFILLED, action="prefill")
    a1 = project.store.annotation(f1)
    review.start(project, a1.id, user="ann")
    review.submit(project, a1.id, user="ann")
    review.edit(project, f2, _pose(1), H, user="ann")
    review.submit(project, project.store.annotation(f2).id, user="ann")
    q = {it.frame_id: it for it in review.review_queue(project)}
    assert q[f1].untouched and not q[f2].untouched
    # nobody edited the points: the submitter answers for them
    assert review.authorship(project, a1.id).responsible == {team["ann"].id}
    assert review.authorship(project, a1.id).author_id is None      # the model is no person


def test_batch_accept_takes_only_unflagged_and_never_own_work(project, team):
    f_ok, f_flag, f_own, f_draft = _frames(project, 4)
    review.edit(project, f_ok, _pose(), H, user="ann")
    k = _pose(); k[11, 2] = 0                         # a required hip missing: an error flag
    review.edit(project, f_flag, k, H, user="ann")
    review.edit(project, f_own, _pose(), H, user="rev")
    review.edit(project, f_draft, _pose(), H, user="ann")
    for fid in (f_ok, f_flag, f_own):
        review.submit(project, project.store.annotation(fid).id, user="rev" if fid == f_own else "ann")
    with pytest.raises(KinemarkError, match="only a reviewer or admin"):
        review.accept_batch(project, user="ann")
    ch = review.accept_batch(project, user="rev")
    ids = {fid: project.store.annotation(fid).id for fid in (f_ok, f_flag, f_own, f_draft)}
    assert ch.details["accepted"] == [ids[f_ok]]
    skipped = dict(ch.details["skipped"])
    assert "QA flag" in skipped[ids[f_flag]] and "own work" in skipped[ids[f_own]]
    assert project.store.annotation(f_draft).state == DRAFTING
    # without the flag filter, the flagged one goes too; the own one never
    ch = review.accept_batch(project, user="rev", without_flags=False)
    assert ch.details["accepted"] == [ids[f_flag]]
    assert project.store.annotation(f_own).state == IN_REVIEW


def test_labelling_seconds_over_plain_events():
    from kinemark.core.model import Event

    def ev(i, t, action, after, user=1):
        return Event(i, f"2026-01-01T00:00:{t:02d}.000+00:00", user, action, "annotation", 1, None,
                     json.dumps(after))
    evs = [ev(1, 0, "prefill", {"keypoints": []}, user=None),
           ev(2, 5, "edit", {"keypoints": [[1, 1, 2]]}),
           ev(3, 20, "state", {"state": IN_REVIEW, "transition": "submit"}),
           ev(4, 30, "state", {"state": RETURNED, "transition": "send_back"}, user=2),
           ev(5, 40, "state", {"state": DRAFTING, "transition": "resume"}),
           ev(6, 49, "state", {"state": IN_REVIEW, "transition": "submit"})]
    assert review.labelling_seconds(evs) == pytest.approx(9.0)
    assert review.labelling_seconds(evs[:3]) == pytest.approx(15.0)
    assert review.labelling_seconds(evs[:2]) is None


def test_the_study_target_is_set_by_a_reviewer_and_audited(project, team):
    from kinemark.core import ops
    assert ops.target(project) == ops.DEFAULT_TARGET
    with pytest.raises(KinemarkError, match="only a reviewer or admin"):
        ops.set_target(project, 300, user="ann")
    ch = ops.set_target(project, 300, user="rev")
    assert ops.target(project) == 300 and "was 200" in ch.message
    ev = [e for e in project.store.events(entity="meta") if "target_frames" in json.loads(e.after)][-1]
    assert json.loads(ev.before) == {"target_frames": None} and json.loads(ev.after) == {"target_frames": "300"}
    assert ev.user_id == project.store.user("rev").id
    for bad in (0, -5, 2.5, "many", ops.MAX_TARGET + 1):
        with pytest.raises(KinemarkError, match="target must be"):
            ops.set_target(project, bad, user="rev")
    assert ops.target(project) == 300
