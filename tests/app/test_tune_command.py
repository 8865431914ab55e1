"""The workspace's "Tune the model on accepted labels" command (core.tuning through the one
background helper): refused without PyTorch, runs the core operation, shows its message and
loads the model then in use for the window's own proposals."""
from __future__ import annotations

import threading

from kinemark.core.model import Changes

from .conftest import open_window
from .test_assist_audit import _wait, model  # noqa: F401 - the stand-in model fixture


def test_tune_is_refused_without_pytorch(qtbot, clip_project, settings, model, monkeypatch):  # noqa: F811
    from kinemark.core import ops, tuning
    calls = []
    monkeypatch.setattr(tuning, "torch_available", lambda: False)
    monkeypatch.setattr(ops, "tune", lambda *a, **k: calls.append(1))
    w = open_window(qtbot, clip_project.root, settings)
    _wait(qtbot, w)
    w.actions["batch.tune"].trigger()
    assert calls == [] and "needs PyTorch" in w.statusBar().currentMessage()
    w.close()


def test_tune_runs_the_core_operation_and_reloads_the_model(qtbot, clip_project, settings, model,  # noqa: F811
                                                           monkeypatch):
    from kinemark.core import ops, tuning
    import kinemark.core.pose as pose
    monkeypatch.setattr(tuning, "torch_available", lambda: True)
    w = open_window(qtbot, clip_project.root, settings)
    _wait(qtbot, w)
    loads = []
    monkeypatch.setattr(pose, "load_adapter", lambda project, **kw: (loads.append(1), model)[1])
    go_on, started, proposed = threading.Event(), threading.Event(), []

    def slow_tune(project, user=None, progress=None, cancel=None):
        started.set()
        go_on.wait(10)
        return Changes(message="tuned the model's heatmap layers (stand-in)"), None

    monkeypatch.setattr(ops, "tune", slow_tune)
    monkeypatch.setattr(ops, "propose", lambda project, **kw: proposed.append(1))
    w.actions["batch.tune"].trigger()
    qtbot.waitUntil(started.is_set, timeout=5000)
    w.prefill_unlabelled()                      # refused while the model is being replaced
    assert proposed == [] and "Pre-fill waits" in w.statusBar().currentMessage()
    go_on.set()
    _wait(qtbot, w)
    assert not w._learning
    texts = [b.text() for b in w.background.boxes]
    assert any("tuned the model's heatmap layers (stand-in)" in t for t in texts)
    assert loads, "the window loads the model again after tuning"
    w.close()


def test_up_next_shows_the_suggestion_to_tune_and_drops_it_after_tuning(qtbot, clip_project, settings,  # noqa: F811
                                                                          model, monkeypatch):
    """The suggestion core gives (core.tuning.suggestion, stood in for here) shows in Up next
    with the command and its key; after a tuning the window asks again and it goes."""
    from kinemark.core import ops, tuning
    import kinemark.core.pose as pose
    monkeypatch.setattr(tuning, "torch_available", lambda: True)
    monkeypatch.setattr(pose, "load_adapter", lambda project, **kw: model)
    say = ["60 labels are ready and the model has not been tuned yet: tuning now lets the queue rank "
           "the frames left on the tuned model's doubts"]
    asked = []
    monkeypatch.setattr(ops, "tuning_suggestion", lambda project: (asked.append(1), say[0])[1])
    w = open_window(qtbot, clip_project.root, settings)
    _wait(qtbot, w)
    qtbot.waitUntil(lambda: w.queue.hint.isVisibleTo(w), timeout=5000)
    text = w.queue.hint.text()
    assert text.startswith("60 labels are ready") and "Tune the model on accepted labels (Ctrl+Shift+U)" in text
    say[0] = ""
    monkeypatch.setattr(ops, "tune", lambda project, **kw: (Changes(message="tuned (stand-in)"), None))
    monkeypatch.setattr(ops, "propose", lambda project, **kw: None)
    n = len(asked)
    w.actions["batch.tune"].trigger()
    _wait(qtbot, w)
    qtbot.waitUntil(lambda: len(asked) > n and not w._hint_busy, timeout=5000)
    assert not w.queue.hint.isVisibleTo(w)
    w.close()
