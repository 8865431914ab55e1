"""The Assist menu's model flows driven through the window (Ask the model, Pre-fill unlabelled
frames, Learn from accepted labels, Up next): what the person is told, and that the views show
what the store holds afterwards, also when a job fails, is cancelled or cannot store anything.
Each check reads the result back from the project store, not from the widgets alone."""
from __future__ import annotations

import threading
import time

import numpy as np
import pytest
from PySide6.QtWidgets import QProgressDialog, QPushButton

from kinemark.core.model import PREFILLED, Changes
from kinemark.core.pose.base import PoseResult, Region

from .conftest import open_window
from .test_signoff import POSE


class StandInModel:
    """A stand-in pose model: the test pose with a little per-frame noise, in a fixed region;
    ``fail``: every prediction raises, as a broken model file would."""

    model_id = "stand-in"
    model_hash = "5" * 64

    def __init__(self, fail: bool = False):
        self.fail = fail
        self.calls = 0

    def predict(self, img, region=None, *, previous=None):
        self.calls += 1
        if self.fail:
            raise RuntimeError("boom in model")
        rng = np.random.default_rng(int(float(img.mean()) * 1000))
        k = POSE.copy()
        k[:, :2] += rng.normal(0, 3, (17, 2))
        return PoseResult(k, np.full(17, 0.9), {"flip_disagreement": rng.uniform(0, 0.2, 17)},
                          Region(160, 95, 120, 170, 0.0, "frame"), 0.8, None)


@pytest.fixture
def model(monkeypatch):
    import kinemark.core.pose as pose
    m = StandInModel()
    monkeypatch.setattr(pose, "load_adapter", lambda project, **kw: m)
    return m


def _wait(qtbot, w, ms=30000):
    qtbot.waitUntil(lambda: not w.background.busy, timeout=ms)


def test_learn_cannot_be_cancelled_halfway_and_the_views_show_its_result(qtbot, clip_project, settings,
                                                                         model, monkeypatch):
    """The fit stores its correction and re-proposes frames at its end and cannot stop part-way:
    closing its progress dialog (which emits canceled, as a Cancel button would) must not report
    "nothing was changed" while the frames were re-proposed and the views kept the old points."""
    from kinemark.core import ops
    w = open_window(qtbot, clip_project.root, settings)
    _wait(qtbot, w)                                     # the pre-fill that starts by itself
    fid = w.order[1]
    w.go(fid)
    assert w.working.state == PREFILLED and set(w.working.sources) == {"model"}
    started = threading.Event()

    def slow_adapt(project, user=None):                 # stands in for core.adapt's refit
        started.set()
        time.sleep(0.8)
        ids = []
        for a in project.store.annotations([PREFILLED]):
            ids.append(project.store.save_annotation(a.frame_id, a.keypoints, ["adapted"] * 17,
                                                     state=PREFILLED, action="adapt").id)
        return Changes(annotations=tuple(ids), message=f"re-proposed {len(ids)} untouched frame(s)"), None

    monkeypatch.setattr(ops, "adapt", slow_adapt)
    w.actions["batch.learn"].trigger()
    qtbot.waitUntil(started.is_set, timeout=5000)
    dialogs = [d for d in w.findChildren(QProgressDialog) if "Learning" in d.labelText()]
    assert dialogs
    assert not dialogs[0].findChildren(QPushButton)      # no Cancel button offered
    dialogs[0].canceled.emit()
    _wait(qtbot, w)
    assert set(clip_project.store.annotation(fid).sources) == {"adapted"}
    assert set(w.working.sources) == {"adapted"}                    # the view shows what was stored
    assert w.points.row_text(9)[3] == "adapted"
    assert "nothing was changed" not in w.statusBar().currentMessage()
    assert "re-proposed 4 untouched frame(s)" in w.background.boxes[-1].text()
    w.close()


def test_prefill_that_fails_midway_shows_what_it_stored(qtbot, clip_project, settings, monkeypatch):
    """Proposals are stored as they come; when the run then fails, the views must show them."""
    from kinemark.core import ops
    w = open_window(qtbot, clip_project.root, settings)     # no model loads here: no auto pre-fill
    _wait(qtbot, w)
    stand_in = StandInModel()
    w._adapter, w.model_problem = stand_in, None
    first = w.order[:2]
    real = ops.propose

    def fails_after_two(project, **kw):
        real(project, frames="unlabelled", frame_ids=first, adapter=stand_in)
        raise RuntimeError("the disk went away")

    monkeypatch.setattr(ops, "propose", fails_after_two)
    w.go(first[0])
    assert w.working.state == "blank" and w.working.proposal is None
    w.prefill_unlabelled()
    _wait(qtbot, w)
    assert "Internal error" in w.background.boxes[-1].text()
    stored = clip_project.store.annotation(first[0])
    assert stored is not None and stored.state == PREFILLED          # the run stored a pre-fill there
    assert w.working.state == PREFILLED and w.states[first[1]] == PREFILLED   # and the views show it
    np.testing.assert_array_equal(w.working.keypoints, stored.keypoints)
    assert w.strip.states[first[1]] == PREFILLED
    assert not w.task.isVisibleTo(w)
    w.close()


def test_read_only_project_runs_no_model_and_says_why(qtbot, clip_project, settings, model, monkeypatch):
    """A project in a folder nobody may write to (core.store opens it read-only): no pre-fill
    starts by itself, and Ask the model, Pre-fill and Learn say at once why nothing can be
    stored, instead of running the model over every frame to fail on each."""
    import kinemark.core.store as store
    root = clip_project.root
    clip_project.close()                                  # closed cleanly: no journal left over
    monkeypatch.setattr(store, "_folder_writable", lambda folder: False)
    w = open_window(qtbot, root, settings)
    _wait(qtbot, w)
    assert w.project.store.read_only
    assert model.calls == 0                               # no pre-fill started by itself
    assert "read-only" in w.windowTitle()
    w.go(w.order[0])
    for command in ("assist.model", "batch.prefill", "batch.learn"):
        w.statusBar().clearMessage()
        w.actions[command].trigger()
        _wait(qtbot, w)
        assert "read-only" in w.statusBar().currentMessage(), command
        assert model.calls == 0, command
    assert not w.background.boxes
    w.close()


def test_model_failures_are_said_in_full_not_cut_off(qtbot, clip_project, settings, model):
    """The status bar shows only the start of a line beside its permanent widgets (in a
    screenshot of this 1200-pixel window, about 40 characters), and a run's summary puts its
    failures last: a repeated Ask the model says so first, and a failed one or a pre-fill run
    with failed frames says why in a box."""
    w = open_window(qtbot, clip_project.root, settings)
    _wait(qtbot, w)
    fid = w.order[0]
    w.go(fid)
    w.actions["assist.model"].trigger()                  # the auto pre-fill already proposed it
    _wait(qtbot, w)
    assert w.statusBar().currentMessage().startswith("already has this model's proposal")
    assert not w.background.boxes
    broken = StandInModel(fail=True)
    broken.model_hash = "7" * 64
    w._adapter = broken
    w.actions["assist.model"].trigger()
    _wait(qtbot, w)
    assert w.statusBar().currentMessage().startswith("no proposal, the model failed")
    assert w.background.boxes[-1].text() == ("the model could not propose this frame: "
                                             "RuntimeError: boom in model")
    w.actions["batch.prefill"].trigger()
    _wait(qtbot, w)
    text = w.background.boxes[-1].text()
    assert text.startswith("4 of 4 frame(s) could not be proposed. First failure: frame ")
    assert "boom in model" in text
    w.close()


def test_up_next_on_a_project_without_frames_says_so(qtbot, tmp_path, settings):
    from kinemark.core.project import Project
    from kinemark.core.skeleton import COCO17
    Project.create(tmp_path / "empty", COCO17, owner="ra1").close()
    w = open_window(qtbot, tmp_path / "empty", settings)
    _wait(qtbot, w)
    assert w.queue.note.isVisibleTo(w)
    assert "No frames yet" in w.queue.note.text()
    assert "every frame is labelled" not in w.queue.note.text()
    w.close()
