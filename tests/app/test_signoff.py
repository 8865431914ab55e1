"""The Sign-off page, notes pinned to keypoints, QA at hand-in, who is working, batch actions and
the sample project on first open, driven through the window. Each check reads the result back from
the project store (or the files written), not from the widgets alone."""
from __future__ import annotations

import json
import threading

import numpy as np
import pytest
from PySide6.QtCore import QPoint, QPointF, Qt
from PySide6.QtTest import QTest

from kinemark.core import review
from kinemark.core.errors import KinemarkError
from kinemark.core.model import ACCEPTED, IN_REVIEW, PREFILLED, RETURNED

from .conftest import open_window, write_pattern_video

# An upright person facing the camera in the 320 x 180 test clip (their left on the image's right),
# so that no QA check fires on it: every point inside the frame, left/right consistent.
POSE = np.column_stack([np.array(
    [(160, 30), (165, 26), (155, 26), (172, 28), (148, 28), (185, 50), (135, 50), (195, 80), (125, 80),
     (200, 105), (120, 105), (175, 105), (145, 105), (177, 135), (143, 135), (178, 165), (142, 165)], float),
    np.full(17, 2.0)])
LEFT_WRIST = 9


@pytest.fixture
def team(tmp_path):
    """A project with an admin, an annotator and a reviewer, and one clip (frames 0, 3, 6, 9)."""
    from kinemark.core.media import Sampling
    from kinemark.core.ops import add_media
    from kinemark.core.project import Project
    from kinemark.core.skeleton import COCO17
    p = Project.create(tmp_path / "team", COCO17, owner="lead")
    p.store.add_user("ra", "annotator", by=p.user().id)
    p.store.add_user("rev", "reviewer", by=p.user().id)
    add_media(p, [write_pattern_video(tmp_path / "pattern.avi")], sampling=Sampling(every=3),
              participant="QB-01", user="lead")
    yield p
    p.close()


def _label(p, fid, kps=POSE, *, by="ra", submit=True):
    ch = review.edit(p, fid, kps, ["human"] * 17, user=by)
    if submit:
        review.submit(p, ch.annotations[0], user=by)
    return ch.annotations[0]


def _signoff(qtbot, w):
    from kinemark.app.main import SIGNOFF_PAGE
    w.tabs.setCurrentIndex(SIGNOFF_PAGE)
    qtbot.waitUntil(lambda: not w.background.busy and not w._signoff_dirty, timeout=20000)


def _frames(p):
    return [f.id for f in p.store.frames()]


class FakeAdapter:
    """A stand-in pose model: the same pose on every frame. ``gate``: frames after the first wait
    for it (to cancel in the middle of a run)."""

    model_id = "fake-test"
    model_hash = "f" * 64

    def __init__(self, gate: threading.Event | None = None):
        self.gate = gate
        self.calls = 0

    def predict(self, img, region=None, *, previous=None):
        from kinemark.core.pose.base import PoseResult
        self.calls += 1
        if self.gate is not None and self.calls > 1:
            self.gate.wait(10)
        return PoseResult(POSE.copy(), np.full(17, 0.9), {}, None, 0.8, None)


# ---- the Sign-off page ------------------------------------------------------------------------

def test_signoff_page_lists_a_handed_in_frame_and_shows_it(qtbot, team, settings):
    fids = _frames(team)
    aid = _label(team, fids[1])
    w = open_window(qtbot, team.root, settings, user="rev")
    _signoff(qtbot, w)
    assert [it.annotation_id for it in w.signoff_list.items] == [aid]
    assert w.signoff_list.list.count() == 1
    row = w.signoff_list.list.item(0)
    assert "risk" in row.toolTip()
    assert w.frame_id == fids[1]                       # the same frame view shows it
    assert w.centre.parent() is w.signoff_holder
    assert w.signoff.accept_button.isEnabled() and w.canvas.editable
    w.tabs.setCurrentIndex(0)
    assert w.centre.parent() is w.label_holder          # and goes back to the Label page
    w.close()


def test_accept_through_the_gui_is_stored(qtbot, team, settings):
    fids = _frames(team)
    aid = _label(team, fids[0])
    w = open_window(qtbot, team.root, settings, user="rev")
    _signoff(qtbot, w)
    QTest.mouseClick(w.signoff.accept_button, Qt.LeftButton)
    a = team.store.annotation_by_id(aid)
    assert a.state == ACCEPTED
    ev = team.store.events(entity="annotation", entity_id=aid)[-1]
    assert ev.user_id == team.store.user("rev").id and json.loads(ev.after)["transition"] == "accept"
    assert w.signoff_list.items == [] and w.states[fids[0]] == ACCEPTED
    assert not w.background.boxes
    w.close()


def test_accept_key_works_only_on_the_signoff_page(qtbot, team, settings):
    fids = _frames(team)
    aid = _label(team, fids[0])
    w = open_window(qtbot, team.root, settings, user="rev")
    w.go(fids[0])
    QTest.keyClick(w.canvas, Qt.Key_A)                   # on the Label page: only a hint
    assert team.store.annotation_by_id(aid).state == IN_REVIEW
    assert "Sign-off page" in w.statusBar().currentMessage()
    _signoff(qtbot, w)
    QTest.keyClick(w.canvas, Qt.Key_A)
    assert team.store.annotation_by_id(aid).state == ACCEPTED
    w.close()


def test_send_back_pins_notes_to_keypoints_and_the_label_page_shows_them(qtbot, team, settings,
                                                                        monkeypatch):
    import kinemark.app.main as main
    fids = _frames(team)
    aid = _label(team, fids[2])
    wrist_note = "the left wrist sits on the sleeve edge"

    class Answer(main.NotesDialog):
        def exec(self):
            self._pick(LEFT_WRIST)                       # as a click on the skeleton does
            self.text.setText(wrist_note)
            self.add_note()
            self.about.setCurrentIndex(0)                # whole pose
            self.text.setText("check the legs")          # typed, not added: Send back takes it too
            self._finish()
            return self.result()

    monkeypatch.setattr(main, "NotesDialog", Answer)
    w = open_window(qtbot, team.root, settings, user="rev")
    _signoff(qtbot, w)
    QTest.mouseClick(w.signoff.back_button, Qt.LeftButton)
    assert team.store.annotation_by_id(aid).state == RETURNED
    notes = team.store.review_notes([aid])
    assert [(n.keypoint, n.text) for n in notes] == [(LEFT_WRIST, wrist_note), (None, "check the legs")]
    assert all(n.author_id == team.store.user("rev").id for n in notes)
    # the annotator, on the Label page
    assert w.switch_user("ra")
    w.tabs.setCurrentIndex(0)
    w.go(fids[2])
    assert wrist_note in w.canvas.note_of(LEFT_WRIST)
    assert w.canvas.note_of(LEFT_WRIST + 1) == ""
    # the noted handle is drawn above the others, so a neighbour cannot hide its badge
    zs = [h.zValue() for h in w.canvas._handles]
    assert zs[LEFT_WRIST] > max(z for i, z in enumerate(zs) if i != LEFT_WRIST)
    text = w.points.notes_text()
    assert "left wrist" in text and wrist_note in text and "whole pose" in text
    assert wrist_note in w.points.table.item(LEFT_WRIST, 0).toolTip()
    # working on it and handing it in again addresses the notes: they leave the frame
    w.set_point_index(LEFT_WRIST)
    w.put_at(198.0, 104.0)
    w.go(fids[2])
    w.hand_in()
    assert team.store.annotation_by_id(aid).state == IN_REVIEW
    assert w.canvas.note_of(LEFT_WRIST) == "" and w.points.notes_text() == ""
    w.close()


def test_pose_picker_click_picks_the_keypoint(qtbot):
    from kinemark.app.forms import NotesDialog
    from kinemark.app.main import make_app
    from kinemark.core.skeleton import COCO17
    make_app()
    d = NotesDialog(COCO17.keypoints, COCO17.edges, POSE, current=None)
    qtbot.addWidget(d)
    d.show()
    qtbot.waitExposed(d)
    at = d.picker.point_of(LEFT_WRIST)
    QTest.mouseClick(d.picker, Qt.LeftButton, Qt.NoModifier, QPoint(round(at.x()), round(at.y())))
    assert d.about.currentData() == LEFT_WRIST
    d.text.setText("here")
    QTest.keyClick(d.text, Qt.Key_Return)
    assert d.notes() == [(LEFT_WRIST, "here")]


def test_an_annotator_cannot_accept_and_sees_the_core_message(qtbot, team, settings):
    fids = _frames(team)
    aid = _label(team, fids[0])
    before = len(team.store.events())
    w = open_window(qtbot, team.root, settings, user="ra")
    _signoff(qtbot, w)
    assert not w.canvas.editable                         # read-only for the annotator
    # the buttons are off, and the key, which still works, is refused by core with its reason
    assert not w.signoff.accept_button.isEnabled() and not w.signoff.back_button.isEnabled()
    w.actions["signoff.accept"].trigger()
    assert team.store.annotation_by_id(aid).state == IN_REVIEW
    assert len(team.store.events()) == before            # nothing stored
    with pytest.raises(KinemarkError) as refused:
        review.check_transition(team.store.annotation_by_id(aid), "accept", team.store.user("ra"),
                                review.authorship(team, aid))
    assert w.background.boxes[-1].text() == str(refused.value)
    assert "annotator" in str(refused.value)
    w.close()


def test_a_reviewer_cannot_sign_off_their_own_work(qtbot, team, settings):
    fids = _frames(team)
    aid = _label(team, fids[1], by="rev")
    w = open_window(qtbot, team.root, settings, user="rev")
    _signoff(qtbot, w)
    assert "their own work" in w.signoff.may.text()
    assert not w.signoff.accept_button.isEnabled()
    w.actions["signoff.accept"].trigger()
    assert team.store.annotation_by_id(aid).state == IN_REVIEW
    assert "their own work" in w.background.boxes[-1].text()
    w.close()


def test_a_reviewers_drag_is_a_correction_and_an_annotators_drag_moves_nothing(qtbot, team, settings):
    fids = _frames(team)
    aid = _label(team, fids[0])

    def drag(w, k, by=QPoint(30, 20)):
        c = w.canvas
        q = c.to_view(QPointF(*POSE[k, :2]))
        start = QPoint(round(q.x()), round(q.y()))
        QTest.mousePress(c.viewport(), Qt.LeftButton, Qt.NoModifier, start)
        QTest.mouseMove(c.viewport(), start + by / 2)
        QTest.mouseMove(c.viewport(), start + by)
        QTest.mouseRelease(c.viewport(), Qt.LeftButton, Qt.NoModifier, start + by)

    w = open_window(qtbot, team.root, settings, user="ra")
    _signoff(qtbot, w)
    drag(w, 0)
    assert team.store.annotation_by_id(aid).keypoints[0].tolist() == POSE[0].tolist()
    w.close()
    w = open_window(qtbot, team.root, settings, user="rev")
    _signoff(qtbot, w)
    drag(w, 0)
    a = team.store.annotation_by_id(aid)
    assert a.state == IN_REVIEW and a.keypoints[0, 0] > POSE[0, 0] + 5
    assert team.store.events(entity="annotation", entity_id=aid)[-1].action == "correct"
    assert review.authorship(team, aid).author_id == team.store.user("ra").id
    w.close()


def test_accept_all_without_qa_flags_leaves_the_flagged_ones(qtbot, team, settings):
    fids = _frames(team)
    clean = _label(team, fids[0])
    bad = POSE.copy()
    bad[LEFT_WRIST, 0] = 325.0                           # outside the 320-wide frame
    flagged = _label(team, fids[1], bad)
    w = open_window(qtbot, team.root, settings, user="rev")
    _signoff(qtbot, w)
    asked = []
    w.ask_yes_no = lambda text: asked.append(text) or True
    QTest.mouseClick(w.signoff_list.clean, Qt.LeftButton)
    qtbot.waitUntil(lambda: not w.background.busy and not w._signoff_dirty, timeout=20000)
    assert asked and "1 frame" in asked[0]
    assert team.store.annotation_by_id(clean).state == ACCEPTED
    assert team.store.annotation_by_id(flagged).state == IN_REVIEW
    assert [it.annotation_id for it in w.signoff_list.items] == [flagged]
    w.close()


def test_signoff_panel_shows_no_empty_headings_without_a_frame(qtbot, team, settings):
    fids = _frames(team)
    _label(team, fids[0])
    w = open_window(qtbot, team.root, settings, user="rev")
    w.signoff.show_item(None)
    assert all(h.isHidden() for h in w.signoff.sections)
    _signoff(qtbot, w)                                   # the handed-in frame is shown
    assert w._signoff_item() is not None and not any(h.isHidden() for h in w.signoff.sections)
    w.close()


def test_accept_all_key_works_only_on_the_signoff_page(qtbot, team, settings):
    """Shift+A on the Label page must not accept frames nobody has looked at."""
    fids = _frames(team)
    clean = _label(team, fids[0])
    w = open_window(qtbot, team.root, settings, user="rev")
    asked = []
    w.ask_yes_no = lambda text: asked.append(text) or True
    w.actions["signoff.accept_clean"].trigger()
    qtbot.waitUntil(lambda: not w.background.busy, timeout=20000)
    assert not asked and team.store.annotation_by_id(clean).state == IN_REVIEW
    assert "Sign-off page" in w.statusBar().currentMessage()
    w.close()


def test_enter_in_the_notes_dialog_adds_a_note_and_ctrl_enter_sends(qtbot):
    from kinemark.app.forms import NotesDialog
    from kinemark.app.main import make_app
    from kinemark.core.skeleton import COCO17
    make_app()
    d = NotesDialog(COCO17.keypoints, COCO17.edges, POSE, current=LEFT_WRIST)
    qtbot.addWidget(d)
    d.show()
    qtbot.waitExposed(d)
    d.activateWindow()
    d.text.setFocus()
    for note in ("wrist on the sleeve edge", "check the elbow too"):
        QTest.keyClicks(d.text, note)
        QTest.keyClick(d.text, Qt.Key_Return)
        assert d.isVisible() and d.result() == 0          # Enter added the note, sent nothing
    assert [t for _, t in d.notes()] == ["wrist on the sleeve edge", "check the elbow too"]
    QTest.keyClick(d.text, Qt.Key_Return, Qt.ControlModifier)
    assert d.result() == d.DialogCode.Accepted


def test_a_frame_sent_back_heads_its_annotators_up_next(qtbot, team, settings):
    fids = _frames(team)
    aid = _label(team, fids[2])
    review.send_back(team, aid, [(LEFT_WRIST, "wrist on the sleeve edge")], user="rev")
    w = open_window(qtbot, team.root, settings, user="ra")
    qtbot.waitUntil(lambda: w.queue.list.count() > 0, timeout=10000)
    top = w.queue.entries[0]
    assert top.frame_id == fids[2] and top.reasons[0].startswith("sent back with 1 open note")
    assert w.frame_id == fids[2]                         # a first visit starts on it
    assert [e.frame_id for e in w.queue.entries].count(fids[2]) == 1
    # for another annotator it is not theirs to fix
    team.store.add_user("ra2", "annotator", by=team.user("lead").id)
    assert w.switch_user("ra2")
    w.refresh_queue()
    qtbot.waitUntil(lambda: not w.background.busy, timeout=10000)
    assert fids[2] not in [e.frame_id for e in w.queue.entries]
    w.close()


# ---- QA at hand-in -------------------------------------------------------------------------------

def test_qa_flags_are_shown_after_hand_in(qtbot, team, settings):
    fids = _frames(team)
    bad = POSE.copy()
    bad[LEFT_WRIST, 0] = 326.0                           # outside the 320 x 180 frame (COCO pixels)
    _label(team, fids[3], bad, submit=False)
    w = open_window(qtbot, team.root, settings, user="ra")
    w.go(fids[3])
    assert w.points.checks_text() == ""
    QTest.keyClick(w.canvas, Qt.Key_Return, Qt.ControlModifier)      # hand in
    assert team.store.annotation(fids[3]).state == IN_REVIEW
    text = w.points.checks_text()
    assert "left wrist" in text and "outside" in text and "error" in text
    assert "error" in w.statusBar().currentMessage()
    assert not w.background.boxes                        # not in the way: no message box
    # a clean frame says so
    _label(team, fids[2], submit=False)
    w.go(fids[2])
    w.hand_in()
    assert "nothing to look at" in w.points.checks_text()
    # taken back from review: drafting again, the findings stay in view while fixing
    w.go(fids[3])
    QTest.keyClick(w.canvas, Qt.Key_Backspace, Qt.ControlModifier)
    assert team.store.annotation(fids[3]).state == "drafting"
    assert "left wrist" in w.points.checks_text()
    w.close()


# ---- who is working ------------------------------------------------------------------------------

def test_who_is_working_is_asked_once_remembered_and_used(qtbot, team, settings, monkeypatch):
    import kinemark.app.main as main
    asked = []

    class Pick(main.WhoDialog):
        def exec(self):
            asked.append([self.list.item(i).data(Qt.UserRole) for i in range(self.list.count())])
            for i in range(self.list.count()):
                if self.list.item(i).data(Qt.UserRole) == "rev":
                    self.list.setCurrentRow(i)
            return 1

    monkeypatch.setattr(main, "WhoDialog", Pick)
    w = open_window(qtbot, team.root, settings)
    assert asked == [["lead", "ra", "rev"]]
    assert w.user_name == "rev" and "rev (reviewer)" in w.user_label.text()
    fid = w.order[0]
    w.go(fid)
    w.put_at(20.0, 30.0)
    assert team.store.events(entity="annotation")[-1].user_id == team.store.user("rev").id
    w.close()
    w2 = open_window(qtbot, team.root, settings)         # remembered: not asked again
    assert len(asked) == 1 and w2.user_name == "rev"
    w2.close()


def test_a_single_person_project_asks_nobody(qtbot, clip_project, settings, monkeypatch):
    import kinemark.app.main as main

    class Never(main.WhoDialog):
        def exec(self):
            raise AssertionError("asked")

    monkeypatch.setattr(main, "WhoDialog", Never)
    w = open_window(qtbot, clip_project.root, settings)
    assert w.user_name == "ra1"
    w.close()


# ---- batch actions -----------------------------------------------------------------------------

def test_prefill_unlabelled_runs_in_the_background_with_progress(qtbot, team, settings):
    fids = _frames(team)
    _label(team, fids[0], submit=False)                 # a person's work: left alone
    w = open_window(qtbot, team.root, settings, user="ra")
    fake = FakeAdapter()
    w._adapter, w.model_problem = fake, None
    titles = []
    run = w.background.run
    w.background.run = lambda title, *a, **k: titles.append(title) or run(title, *a, **k)
    w.actions["batch.prefill"].trigger()
    assert titles == ["Pre-filling unlabelled frames"] and w.task.isVisibleTo(w)
    qtbot.waitUntil(lambda: not w.background.busy, timeout=20000)
    assert not w.task.isVisibleTo(w)
    assert team.store.proposed_frame_ids(fake.model_hash) == set(fids[1:])
    assert [team.store.annotation(f).state for f in fids[1:]] == [PREFILLED] * 3
    assert team.store.annotation(fids[0]).sources == ("human",) * 17
    assert w.states[fids[1]] == PREFILLED
    assert "fake-test: proposed 3 frame(s)" in w.statusBar().currentMessage()
    w.close()


def test_prefill_cancel_from_the_status_bar_keeps_the_finished_part(qtbot, team, settings):
    fids = _frames(team)
    w = open_window(qtbot, team.root, settings, user="ra")
    gate = threading.Event()
    fake = FakeAdapter(gate)
    w._adapter, w.model_problem = fake, None
    w.prefill_unlabelled()
    qtbot.waitUntil(lambda: w.task.bar.value() >= 1, timeout=20000)     # the first frame is stored
    QTest.mouseClick(w.task.cancel, Qt.LeftButton)
    gate.set()
    qtbot.waitUntil(lambda: not w.background.busy, timeout=20000)
    done = team.store.proposed_frame_ids(fake.model_hash)
    assert 1 <= len(done) < len(fids)
    assert "cancelled" in w.statusBar().currentMessage()
    assert not w.task.isVisibleTo(w)
    w.close()


def test_prefill_starts_by_itself_when_nothing_was_ever_proposed(qtbot, team, settings, monkeypatch):
    import kinemark.core.pose as pose
    fake = FakeAdapter()
    monkeypatch.setattr(pose, "load_adapter", lambda project, **kw: fake)
    w = open_window(qtbot, team.root, settings, user="ra")
    qtbot.waitUntil(lambda: not w.background.busy, timeout=20000)
    assert team.store.proposed_frame_ids(fake.model_hash) == set(_frames(team))
    w.close()
    calls = fake.calls
    w = open_window(qtbot, team.root, settings, user="ra")    # proposals exist: not again
    qtbot.waitUntil(lambda: not w.background.busy, timeout=20000)
    assert fake.calls == calls
    w.close()


def test_learn_from_accepted_shows_core_message(qtbot, team, settings, monkeypatch):
    from kinemark.core import ops
    from kinemark.core.model import Changes
    w = open_window(qtbot, team.root, settings, user="rev")
    w.actions["batch.learn"].trigger()                  # nothing accepted with a proposal yet
    qtbot.waitUntil(lambda: not w.background.busy, timeout=20000)
    assert "no accepted or submitted labels with a model proposal" in w.background.boxes[-1].text()
    monkeypatch.setattr(ops, "adapt", lambda project, user=None: (Changes(message="adapted 2 of 17 joints"), None))
    w.learn_from_accepted()
    qtbot.waitUntil(lambda: not w.background.busy, timeout=20000)
    assert w.background.boxes[-1].text() == "adapted 2 of 17 joints"
    w.close()


def test_export_accepted_labels_as_a_bundle_or_one_coco_file(qtbot, team, settings, tmp_path):
    fids = _frames(team)
    aid = _label(team, fids[0])
    _label(team, fids[1])                                # in review: not exported
    review.accept(team, aid, user="rev")
    w = open_window(qtbot, team.root, settings, user="rev")
    w.export_accepted(str(tmp_path / "bundle"), bundle=True, ratios=(1.0, 0.0, 0.0), seed=3, deidentify=True)
    qtbot.waitUntil(lambda: not w.background.busy, timeout=30000)
    manifest = json.loads((tmp_path / "bundle" / "manifest.json").read_text())
    assert manifest["counts"]["splits"]["train"]["images"] == 1 and manifest["counts"]["annotations"] == 1
    train = json.loads((tmp_path / "bundle" / "train" / "coco_train.json").read_text())
    assert len(train["annotations"]) == 1
    box = w.background.boxes[-1].text()
    assert "not a diagnosis" in box and "help, not a guarantee" in box
    w.export_accepted(str(tmp_path / "single"), bundle=False)
    qtbot.waitUntil(lambda: not w.background.busy, timeout=30000)
    data = json.loads((tmp_path / "single" / "accepted.coco.json").read_text())
    assert len(data["annotations"]) == 1
    assert data["annotations"][0]["keypoints"][3 * LEFT_WRIST:3 * LEFT_WRIST + 3] == [200, 105, 2]
    w.export_accepted(str(tmp_path / "single"), bundle=False)      # never overwritten
    qtbot.waitUntil(lambda: not w.background.busy, timeout=30000)
    assert "nothing is overwritten" in w.background.boxes[-1].text()
    w.close()


# ---- the sample project on first open ---------------------------------------------------------

@pytest.fixture
def clips_only(tmp_path):
    from kinemark.core.synth import render_scenario
    root = tmp_path / "sample"
    render_scenario(root / "clips", size="tiny")
    return root


def test_opening_a_folder_of_demo_clips_builds_the_project(qtbot, clips_only, settings):
    from kinemark.app.main import MainWindow, make_app
    from kinemark.core.store import DB_NAME
    make_app()
    w = MainWindow(settings=settings)
    qtbot.addWidget(w)
    assert not w.open_project(clips_only, user="ra-demo")     # not yet: it is being built
    qtbot.waitUntil(lambda: w.project is not None, timeout=60000)
    qtbot.waitUntil(lambda: not w.background.busy, timeout=20000)
    assert (clips_only / DB_NAME).exists()
    scenario = json.loads((clips_only / "clips" / "scenario.json").read_text())
    assert len(w.media_by_id) == len(scenario["clips"]) and w.order
    assert {m.participant_code for m in w.media_by_id.values()} == {c["participant"] for c in scenario["clips"]}
    assert w.user_name == "ra-demo"
    w.close()


def test_cli_open_builds_the_sample_and_a_screenshot_starts_no_prefill(clips_only, tmp_path, qapp,
                                                                       monkeypatch):
    import cv2

    import kinemark.core.pose as pose
    from kinemark.core.cli import main
    from kinemark.core.project import Project
    fake = FakeAdapter()
    monkeypatch.setattr(pose, "load_adapter", lambda project, **kw: fake)
    shot = tmp_path / "sample.png"
    assert main(["open", str(clips_only), "--screenshot", str(shot)]) == 0
    assert cv2.imread(str(shot)) is not None
    with Project.open(clips_only) as p:
        assert p.store.frame_count() > 0
        assert p.store.proposals() == []                    # --screenshot waits for nothing heavy
    assert fake.calls == 0
