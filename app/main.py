"""The Kinemark desktop workspace.

Label page: Up next (left), the frame with its keypoints and the clip strip
(centre), the Keypoints panel (right). Overview page: the pose map and the
keypoint charts. Every edit goes through core.edit and is stored the moment it
is made; the last frame shown is remembered per project, so after a crash the
project reopens where it was with nothing lost.
"""
from __future__ import annotations

import hashlib
import os
import sys
import time
from pathlib import Path

from PySide6.QtCore import QSettings, Qt, QTimer
from PySide6.QtGui import QAction, QUndoStack
from PySide6.QtWidgets import (QApplication, QFileDialog, QHBoxLayout, QLabel, QMainWindow, QPushButton,
                               QSizePolicy, QSplitter, QStackedWidget, QTabWidget, QVBoxLayout, QWidget)

from ..core import edit
from ..core.errors import KinemarkError
from ..core.media import media_kind
from ..core.model import ACCEPTED, BLANK, IN_REVIEW
from . import theme
from .background import Background
from .canvas import FrameCanvas
from .commands import SnapshotCommand
from .dialogs import CAUTION, CAUTION_SHORT, NewProjectDialog, SamplingDialog, about
from .frames import FrameWorker, prepare
from .panels.overview import OverviewPage
from .panels.points import KeypointPanel
from .panels.queue import DEFAULT_TARGET, QueuePanel, load_queue
from .panels.strip import ClipStrip
from .shortcuts import COMMANDS, KeySheet, Keys

CARRY_COUNT = 10


def _key(root: Path) -> str:
    return hashlib.sha1(str(Path(root).resolve()).encode()).hexdigest()[:16]


class Welcome(QWidget):
    def __init__(self, window):
        super().__init__()
        self.setObjectName("page")
        lay = QVBoxLayout(self)
        lay.addStretch(2)
        t = QLabel("Kinemark")
        t.setObjectName("heading")
        t.setAlignment(Qt.AlignCenter)
        f = t.font(); f.setPointSizeF(f.pointSizeF() * 1.8); t.setFont(f)
        lay.addWidget(t)
        s = QLabel("Open a project folder, or create a new one. Then drop videos or image folders "
                   "onto this window to add them.")
        s.setObjectName("muted")
        s.setAlignment(Qt.AlignCenter)
        s.setWordWrap(True)
        lay.addWidget(s)
        row = QHBoxLayout()
        row.addStretch(1)
        self.recent = QPushButton("")
        self.recent.setVisible(False)
        row.addWidget(self.recent)
        for text, fn in (("Open a project…", window.ask_open), ("Create a project…", window.ask_create)):
            b = QPushButton(text)
            b.clicked.connect(fn)
            row.addWidget(b)
        row.addStretch(1)
        lay.addLayout(row)
        recent = window.settings.value("recent")
        if recent and Path(str(recent)).is_dir():
            self.recent.setText(f"Reopen {Path(str(recent)).name}")
            self.recent.setToolTip(str(recent))
            self.recent.clicked.connect(lambda: window.open_project(str(recent)))
            self.recent.setVisible(True)
        c = QLabel(CAUTION)
        c.setObjectName("muted")
        c.setWordWrap(True)
        c.setAlignment(Qt.AlignCenter)
        c.setContentsMargins(80, 24, 80, 0)
        lay.addWidget(c)
        lay.addStretch(3)


class MainWindow(QMainWindow):
    def __init__(self, settings: QSettings | None = None):
        super().__init__()
        self.setWindowTitle("Kinemark")
        self.settings = settings or QSettings("Kinemark", "Kinemark")
        self.keys = Keys(self.settings)
        self.project = None
        self.undo = QUndoStack(self)
        self.background = Background(self)
        self.frames = FrameWorker()
        self.frames.thumbnail.connect(self._on_thumbnail, Qt.QueuedConnection)
        self.frame_id: int | None = None
        self.point = 0
        self.working: edit.Working | None = None
        self.order: list[int] = []
        self.frame_by_id: dict = {}
        self.media_by_id: dict = {}
        self.by_media: dict[int, list[int]] = {}
        self.states: dict[int, str] = {}
        self.model_problem: str | None = None
        self.model_name: str | None = None
        self._adapter = None
        self._overview_dirty = True
        self._strip_media = None
        self.key_sheet = None
        self.last_latency_ms = 0.0
        self.last_from_ahead = False
        self._sync_timer = QTimer(self)
        self._sync_timer.setSingleShot(True)
        self._sync_timer.setInterval(250)
        self._sync_timer.timeout.connect(self.settings.sync)
        self._build()
        self._build_actions()
        self.setAcceptDrops(True)
        self.resize(1440, 900)

    # ---- layout ----------------------------------------------------------------------------

    def _build(self):
        self.pages = QStackedWidget()
        self.welcome = Welcome(self)
        self.pages.addWidget(self.welcome)
        self.tabs = QTabWidget()
        self.tabs.setDocumentMode(True)
        self.tabs.setFocusPolicy(Qt.NoFocus)
        self.pages.addWidget(self.tabs)
        self.setCentralWidget(self.pages)

        label_page = QWidget()
        label_page.setObjectName("page")
        split = QSplitter(Qt.Horizontal)
        split.setHandleWidth(1)
        self.queue = QueuePanel()
        self.queue.setMinimumWidth(280)
        self.queue.chosen.connect(self.go)
        self.queue.rerank.connect(self.refresh_queue)
        centre = QWidget()
        cl = QVBoxLayout(centre)
        cl.setContentsMargins(0, 0, 0, 0)
        cl.setSpacing(0)
        self.frameline = QLabel("")
        self.frameline.setObjectName("frameline")
        # a fixed line: its text changes with every key press and must never move the picture
        self.frameline.setFixedHeight(28)
        self.frameline.setMinimumWidth(1)
        self.frameline.setSizePolicy(QSizePolicy.Ignored, QSizePolicy.Fixed)
        cl.addWidget(self.frameline)
        self.canvas = FrameCanvas()
        self.canvas.pointMoved.connect(self._on_dragged)
        self.canvas.keypointPicked.connect(self.set_point_index)
        self.canvas.placeRequested.connect(lambda x, y: self.put_at(x, y))
        self.canvas.zoomChanged.connect(lambda s: self._update_frameline())
        self.canvas.resized.connect(self.frames.set_view_size)
        cl.addWidget(self.canvas, 1)
        self.strip = ClipStrip()
        self.strip.chosen.connect(self.go)
        cl.addWidget(self.strip)
        self.points = KeypointPanel()
        self.points.setMinimumWidth(330)
        self.points.picked.connect(self.set_point_index)
        split.addWidget(self.queue)
        split.addWidget(centre)
        split.addWidget(self.points)
        split.setStretchFactor(0, 0)
        split.setStretchFactor(1, 1)
        split.setStretchFactor(2, 0)
        split.setSizes([300, 800, 340])
        lay = QVBoxLayout(label_page)
        lay.setContentsMargins(0, 0, 0, 0)
        lay.addWidget(split)
        self.tabs.addTab(label_page, "Label")
        self.overview = OverviewPage()
        self.tabs.addTab(self.overview, "Overview")
        self.tabs.currentChanged.connect(self._on_tab)

        sb = self.statusBar()
        sb.setSizeGripEnabled(False)
        self.user_label = QLabel("")
        self.model_label = QLabel("")
        self.caution_label = QLabel(CAUTION_SHORT)
        self.caution_label.setToolTip(CAUTION)
        sb.addPermanentWidget(self.user_label)
        sb.addPermanentWidget(self.model_label)
        sb.addPermanentWidget(self.caution_label)

    def _build_actions(self):
        handlers = {
            "frame.next": lambda: self.step_frame(+1),
            "frame.prev": lambda: self.step_frame(-1),
            "queue.next": self.next_in_line,
            "frame.hand_in": self.hand_in,
            "point.next": lambda: self.step_point(+1),
            "point.prev": lambda: self.step_point(-1),
            "point.put": self.put_here,
            "point.visibility": self.cycle_visibility,
            "point.confirm": lambda: self.confirm(current_only=True),
            "point.confirm_all": lambda: self.confirm(current_only=False),
            "edit.undo": self.undo.undo,
            "edit.redo": self.undo.redo,
            "assist.carry": self.carry_forward,
            "assist.fill": self.fill_from_keyframe,
            "assist.model": self.ask_model,
            "view.fit": self.canvas.fit,
            "view.zoom_in": lambda: self.canvas.zoom(1.25, self._zoom_anchor()),
            "view.zoom_out": lambda: self.canvas.zoom(0.8, self._zoom_anchor()),
            "view.label": lambda: self.tabs.setCurrentIndex(0),
            "view.overview": lambda: self.tabs.setCurrentIndex(1),
            "help.keys": self.show_keys,
        }
        self.actions: dict[str, QAction] = {}
        for c in COMMANDS:
            a = QAction(c.name, self)
            a.triggered.connect(handlers[c.id])
            self.addAction(a)
            self.keys.bind(c.id, a)
            self.actions[c.id] = a
        mb = self.menuBar()
        m = mb.addMenu("&Project")
        for text, fn, key in (("Open…", self.ask_open, "Ctrl+O"), ("Create…", self.ask_create, "Ctrl+N"),
                              ("Add videos or images…", self.ask_add, "Ctrl+Shift+A")):
            a = m.addAction(text)
            a.triggered.connect(fn)
            a.setShortcut(key)
        m.addSeparator()
        m.addAction("Quit").triggered.connect(self.close)
        for title, group in (("&Frame", "Frames"), ("&Keypoint", "Keypoints"), ("&Edit", "Edit"),
                             ("&Assist", "Assist"), ("&View", "View"), ("&Help", "Help")):
            m = mb.addMenu(title)
            for c in COMMANDS:
                if c.group == group:
                    m.addAction(self.actions[c.id])
            if group == "Help":
                m.addAction("About Kinemark").triggered.connect(lambda: about(self))
        self._enable(False)

    def _enable(self, on: bool):
        for cid, a in self.actions.items():
            if not cid.startswith("help."):
                a.setEnabled(on)

    # ---- project ---------------------------------------------------------------------------

    def ask_open(self):
        d = QFileDialog.getExistingDirectory(self, "Open a Kinemark project")
        if d:
            self.open_project(d)

    def ask_create(self):
        dlg = NewProjectDialog(self)
        if dlg.exec() and dlg.folder.text().strip():
            self.create_project(dlg.folder.text().strip(), dlg.skeleton_spec())

    def create_project(self, root, skeleton: str = "coco17") -> bool:
        from ..core import ops
        from ..core.skeleton import load_skeleton
        try:
            p = ops.new_project(root, load_skeleton(skeleton))
        except KinemarkError as e:
            self.background.show_error(e)
            return False
        p.close()
        return self.open_project(root)

    def open_project(self, root) -> bool:
        from ..core.project import Project
        try:
            project = Project.open(root)
            user = project.user()
        except KinemarkError as e:
            self.background.show_error(e)
            return False
        self.close_project()
        self.project = project
        self.undo.clear()
        self.setWindowTitle(f"Kinemark — {project.root.name}")
        self.user_label.setText(f"{user.name} ({user.role})")
        skel = project.skeleton
        self.canvas.set_skeleton(skel.keypoints, skel.edges)
        self.points.set_skeleton(skel.keypoints)
        self.pages.setCurrentIndex(1)
        self._enable(True)
        self.reload_media()
        self.settings.setValue("recent", str(project.root))
        last = self.settings.value(f"last_frame/{_key(project.root)}")
        start = None
        try:
            start = int(last) if last is not None else None
        except (TypeError, ValueError):
            start = None
        if start not in self.frame_by_id:
            start = self.order[0] if self.order else None
        if start is not None:
            self.go(start)
        else:
            self.canvas.set_image(None, "No frames yet: drop videos or image folders here to add them.")
            self._update_frameline()
        self.refresh_queue()
        self.check_model()
        return True

    def close_project(self):
        if self.project is None:
            return
        self.background.cancel_all()
        self.background.wait(10000)
        self._sync_timer.stop()
        self.settings.sync()
        self.frames.reset()
        self.project.close()
        self.project = None
        self.frame_id = None
        self.working = None
        self.undo.clear()
        self.queue.clear()
        self._strip_media = None

    def reload_media(self):
        s = self.project.store
        self.media_by_id = {m.id: m for m in s.all_media()}
        frames = s.frames()
        self.frame_by_id = {f.id: f for f in frames}
        self.order = [f.id for f in frames]
        self.by_media = {}
        for f in frames:
            self.by_media.setdefault(f.media_id, []).append(f.id)
        self.states = {fid: BLANK for fid in self.order}
        self.states.update(s.annotation_states())
        for m in self.media_by_id.values():
            if m.status == "ok" and not self.frames.known(m.id):
                try:
                    path = self.project.media_path(m)
                except KinemarkError:
                    continue
                self.frames.register(m.id, path, m.kind,
                                     {self.frame_by_id[fid].frame_index: self.frame_by_id[fid].pixel_sha
                                      for fid in self.by_media.get(m.id, [])})
        self._strip_media = None
        self._update_progress()
        self._overview_dirty = True

    def describe_frame(self, f) -> str:
        m = self.media_by_id[f.media_id]
        who = f"{m.participant_code} s{m.session_number} · " if m.participant_code else ""
        if m.kind == "image":
            return f"{who}{m.display_name}"
        return f"{who}{m.display_name} · frame {f.frame_index}"

    def describe_short(self, f) -> str:
        """For lists: the frame number before the file name, so eliding keeps it."""
        m = self.media_by_id[f.media_id]
        who = f"{m.participant_code} s{m.session_number} · " if m.participant_code else ""
        if m.kind == "image":
            return f"{who}{m.display_name}"
        return f"{who}#{f.frame_index} · {Path(m.display_name).stem}"

    # ---- navigation --------------------------------------------------------------------------

    def go(self, frame_id: int):
        if self.project is None or frame_id not in self.frame_by_id:
            return
        t0 = time.perf_counter()
        self.canvas.cancel_drag()
        f = self.frame_by_id[frame_id]
        self.frame_id = frame_id
        image = self.frames.take(frame_id)
        self.last_from_ahead = image is not None
        if image is None:                        # not decoded ahead: the worker decodes it first
            image = self.frames.get(frame_id, f.media_id, f.frame_index, timeout=0.5)
        if image is not None and image.fitted is not None and not self._fits(image):
            image = None                         # prepared for another view size
        if image is None:
            try:
                image = prepare(self.project.read_frame(f.media_id, f.frame_index), self.canvas.fitted_size())
            except KinemarkError as e:
                image = None
                self.canvas.set_image(None, f"This frame cannot be shown: {e}")
                self.statusBar().showMessage(str(e), 10000)
        if image is not None:
            self.canvas.set_image(image)
        self.load_points()
        if self._strip_media != f.media_id:
            m = self.media_by_id[f.media_id]
            fr = [self.frame_by_id[i] for i in self.by_media[f.media_id]]
            self.strip.set_media(m.frame_count, m.fps, fr, {i: self.states.get(i, BLANK) for i in self.by_media[f.media_id]},
                                 self.describe_frame(f).split(" · frame")[0])
            self._strip_media = f.media_id
        self.strip.set_current(frame_id)
        self.queue.set_current(frame_id)
        self.settings.setValue(f"last_frame/{_key(self.project.root)}", frame_id)
        self._sync_timer.start()      # written to disk a moment later (a sync costs ~20 ms)
        self._prefetch()
        self.last_latency_ms = (time.perf_counter() - t0) * 1000

    def _fits(self, shown) -> bool:
        vw, vh = self.canvas.fitted_size()
        w, h = shown.full.width(), shown.full.height()
        s = min(vw / w, vh / h)
        return abs(shown.fitted.width() - round(w * s)) <= 1 and abs(shown.fitted.height() - round(h * s)) <= 1

    def _prefetch(self):
        i = self.order.index(self.frame_id)
        want = [self.order[j] for j in (i + 1, i + 2, i - 1) if 0 <= j < len(self.order)]
        nxt = self.queue.next_after(self.frame_id)
        if nxt is not None:
            want.insert(1, nxt)
        self.frames.ahead([(fid, self.frame_by_id[fid].media_id, self.frame_by_id[fid].frame_index)
                           for fid in dict.fromkeys(want)])

    def step_frame(self, d: int):
        if not self.order:
            return
        if self.frame_id is None:
            return self.go(self.order[0])
        i = self.order.index(self.frame_id) + d
        if 0 <= i < len(self.order):
            self.go(self.order[i])
        else:
            self.statusBar().showMessage("that was the last frame" if d > 0 else "this is the first frame", 3000)

    def next_in_line(self):
        fid = self.queue.next_after(self.frame_id)
        if fid is None:
            self.statusBar().showMessage("nothing else is waiting in Up next", 4000)
            return
        self.go(fid)

    def step_point(self, d: int):
        if self.working is None:
            return
        K = len(self.working.sources)
        self.set_point_index(min(max(self.point + d, 0), K - 1))

    def set_point_index(self, i: int):
        self.point = int(i)
        self.canvas.set_current(self.point)
        self.points.set_current(self.point)
        self._update_frameline()

    # ---- showing ---------------------------------------------------------------------------------

    def load_points(self):
        if self.project is None or self.frame_id is None:
            return
        w = edit.working(self.project, self.frame_id)
        self.working = w
        self.canvas.set_points(w.keypoints, w.sources, self.point)
        self.points.set_points(w.keypoints, w.sources, w.confidence, self.point)
        self.states[self.frame_id] = w.state
        self._update_frameline()

    def _update_frameline(self):
        if self.project is None or self.frame_id is None or self.working is None:
            self.frameline.setText("")
            return
        f = self.frame_by_id[self.frame_id]
        m = self.media_by_id[f.media_id]
        w = self.working
        t = f" · {f.timestamp:.2f} s" if f.timestamp is not None else ""
        n = self.order.index(self.frame_id) + 1
        state = theme.STATE_WORDS.get(w.state, w.state)
        if w.from_proposal:
            state = "blank: showing the model's proposal"
        colour = theme.STATE_COLOURS.get(w.state, theme.FAINT)
        name = self.project.skeleton.keypoints[self.point].replace("_", " ")
        zoom = f"{100 * self.canvas.scale_factor():.0f}%"
        self.frameline.setText(
            f"<span style='color:{theme.TEXT}'>{self.describe_frame(f)}{t}</span>"
            f"<span style='color:{theme.FAINT}'>  ({n} of {len(self.order)})   </span>"
            f"<span style='color:{colour}'>■</span> <span style='color:{theme.MUTED}'>{state}</span>"
            f"<span style='color:{theme.FAINT}'>   ▸ </span>"
            f"<span style='color:{theme.TEXT}'>{name}</span>"
            f"<span style='color:{theme.FAINT}'>   {zoom}</span>")
        self.frameline.setToolTip(f"frame {n} of {len(self.order)} · state: {state} · "
                                  f"current keypoint: {name} · zoom {zoom}")
        self.points.summary.setText(f"{int((w.keypoints[:, 2] > 0).sum())} of {len(w.sources)} placed"
                                    + (f" · version {w.version}" if w.version else ""))
        self.points.hint.setText(" · ".join(f"{self.keys.text(c)} {name_}" for c, name_ in (
            ("point.put", "put here"), ("point.visibility", "visibility"), ("point.confirm", "confirm"),
            ("queue.next", "next in line"), ("help.keys", "all keys"))))

    def _update_progress(self):
        if self.project is None:
            return
        s = self.project.store
        counts = s.state_counts()
        try:
            target = int(s.get_meta("target_frames", str(DEFAULT_TARGET)))
        except ValueError:
            target = DEFAULT_TARGET
        self.queue.set_progress(counts.get(ACCEPTED, 0), counts.get(IN_REVIEW, 0), target)

    # ---- editing ---------------------------------------------------------------------------------

    def _apply(self, text: str, fn):
        if self.project is None or self.frame_id is None:
            return None
        try:
            ch = fn()
        except KinemarkError as e:
            self.background.show_error(e)
            self.load_points()
            return None
        self.push_changes(text, ch)
        return ch

    def push_changes(self, text: str, ch):
        """After an edit was stored: make it undoable and refresh what it touched."""
        before = (ch.details or {}).get("before") or {}
        if before:
            after = {fid: edit.snapshot(self.project, fid) for fid in before}
            self.undo.push(SnapshotCommand(self, text, before, after))
        self.after_change(ch)

    def after_change(self, ch):
        if ch.media:
            self.reload_media()
        touched = set(ch.frames)
        if not touched and (ch.annotations or ch.proposals):   # e.g. a model pre-fill run
            touched = set(self.order)
        if self.frame_id is not None and (self.frame_id in touched or ch.annotations or ch.proposals):
            self.load_points()
        if touched:
            st = self.project.store.annotation_states(touched)
            for fid in touched:
                self.states[fid] = st.get(fid, BLANK)
            self.strip.set_states({fid: self.states[fid] for fid in touched})
        self.queue.mark(self.states)
        self._update_progress()
        self._overview_dirty = True
        if ch.message:
            self.statusBar().showMessage(ch.message, 5000)

    def restore_frames(self, target: dict, *, expect: dict, action: str) -> bool:
        if self.project is None:
            return False
        try:
            ch = edit.restore(self.project, target, expect=expect, action=action)
        except KinemarkError as e:
            self.background.show_error(KinemarkError(f"cannot {action}: {e}"))
            return False
        if self.frame_id not in target and target:
            self.go(next(iter(target)))
        self.after_change(ch)
        self.statusBar().showMessage(f"{action} done ({len(target)} frame(s))", 3000)
        return True

    def _name(self, i=None) -> str:
        return self.project.skeleton.keypoints[self.point if i is None else i]

    def _on_dragged(self, index: int, x: float, y: float):
        fid = self.frame_id
        self._apply(f"Move {self._name(index)}",
                    lambda: edit.set_point(self.project, fid, index, x, y))

    def put_here(self):
        pos = self.canvas.cursor_position()
        if pos is None:
            self.statusBar().showMessage("point at the frame first: Put here places the keypoint under the pointer", 4000)
            return
        self.put_at(*pos)

    def put_at(self, x: float, y: float):
        fid, i = self.frame_id, self.point
        if self._apply(f"Put {self._name(i)}", lambda: edit.set_point(self.project, fid, i, x, y)) is not None:
            self.step_point(+1)

    def cycle_visibility(self):
        w = self.working
        if w is None:
            return
        i, fid = self.point, self.frame_id
        v = int(w.keypoints[i, 2])
        nv = edit.next_visibility(v)
        at = None
        if v == 0:
            at = self.canvas.cursor_position()
            if at is None and w.proposal is not None and w.proposal[i, 2] > 0:
                at = (float(w.proposal[i, 0]), float(w.proposal[i, 1]))
            if at is None:
                self.statusBar().showMessage(f"{self._name(i)} has no position yet: point at the frame, or use Put here", 4000)
                return
        self._apply(f"{self._name(i)}: {edit.VISIBILITY_WORDS[nv]}",
                    lambda: edit.set_visibility(self.project, fid, i, nv, at=at))

    def confirm(self, current_only: bool):
        fid, i = self.frame_id, self.point
        idx = [i] if current_only else None
        self._apply("Confirm " + (self._name(i) if current_only else "all points"),
                    lambda: edit.confirm(self.project, fid, idx))

    def hand_in(self):
        fid = self.frame_id
        if self._apply("Hand in", lambda: edit.hand_in(self.project, fid)) is not None:
            self.queue.mark(self.states)

    def fill_from_keyframe(self):
        if self.project is None or self.frame_id is None:
            return
        fid = self.frame_id
        prev = edit.keyframe_before(self.project, fid)
        if prev is None:
            self.statusBar().showMessage("no earlier frame of this video holds a person's points", 4000)
            return
        self._apply("Fill from keyframe", lambda: edit.fill_between(self.project, prev, fid))

    def carry_forward(self):
        if self.project is None or self.frame_id is None:
            return
        fid = self.frame_id
        count = int(self.settings.value("carry_count", CARRY_COUNT))

        def work(project, progress, cancel):
            return edit.carry_forward(project, fid, count=count, progress=progress)

        self.background.run("Carrying points forward", work, root=self.project.root,
                            on_done=lambda ch: self.push_changes("Carry forward", ch))

    # ---- the model -----------------------------------------------------------------------------

    def check_model(self):
        """Find out once, quietly, whether the pose model loads; say so in the status bar."""
        self.model_label.setText("model: checking…")

        def work(project, progress, cancel):
            from ..core.pose import load_adapter
            return load_adapter(project)

        def ok(adapter):
            self._adapter = adapter
            self.model_problem = None
            self.model_name = getattr(adapter, "model_id", "model")
            self.model_label.setText(f"model: {self.model_name}")

        def bad(exc):
            self._adapter = None
            self.model_problem = str(exc) if isinstance(exc, KinemarkError) else f"{type(exc).__name__}: {exc}"
            self.model_label.setText("model: not available")
            self.model_label.setToolTip(self.model_problem)
            self.statusBar().showMessage(f"The pose model is not available ({self.model_problem}); "
                                         "manual labelling works as usual.", 15000)

        self.background.run("Loading the pose model", work, root=self.project.root, on_done=ok,
                            on_error=bad, quiet=True)

    def ask_model(self):
        if self.project is None or self.frame_id is None:
            return
        from ..core import ops
        if self.model_problem is not None or not hasattr(ops, "propose"):
            why = self.model_problem or "this build has no model pre-fill"
            self.statusBar().showMessage(f"The pose model is not available ({why}); label by hand.", 8000)
            return
        fid, adapter = self.frame_id, self._adapter

        def work(project, progress, cancel):
            return ops.propose(project, frames="all", frame_ids=[fid], progress=progress, cancel=cancel,
                               adapter=adapter)

        def done(result):
            ch, rep = result if isinstance(result, tuple) else (result, None)
            self.after_change(ch)
            if rep is not None and hasattr(rep, "summary"):
                self.statusBar().showMessage(rep.summary(), 8000)

        self.background.run("Asking the model", work, root=self.project.root, on_done=done)

    # ---- queue and overview ----------------------------------------------------------------------

    def refresh_queue(self):
        if self.project is None:
            return
        self.queue.button.setEnabled(False)

        def work(project, progress, cancel):
            return load_queue(project, 50)

        def done(result):
            entries, note = result
            self.queue.button.setEnabled(True)
            self.queue.set_entries(entries, lambda e: self.describe_short(self.frame_by_id[e.frame_id])
                                   if e.frame_id in self.frame_by_id else f"frame {e.frame_id}",
                                   note, self.states)
            self.queue.set_current(self.frame_id)
            self.frames.thumbnails([(e.frame_id, e.media_id, e.frame_index) for e in entries
                                    if e.media_id in self.media_by_id])
            if self.frame_id is not None:
                self._prefetch()

        def bad(exc):
            self.queue.button.setEnabled(True)
            self.statusBar().showMessage(f"Up next could not be loaded: {exc}", 10000)

        self.background.run("Ranking frames", work, root=self.project.root, on_done=done, on_error=bad,
                            quiet=True)

    def _on_thumbnail(self, generation, frame_id, image):
        if generation == self.frames.generation:      # not a late one from the previous project
            self.queue.set_thumbnail(frame_id, image)

    def _on_tab(self, i):
        if i == 1 and self._overview_dirty and self.project is not None:
            self.refresh_overview()

    def refresh_overview(self):
        from . import figures
        queued = [e.frame_id for e in self.queue.entries]

        def work(project, progress, cancel):
            return figures.coverage(project, queued), figures.keypoint_figures(project)

        def done(result):
            self._overview_dirty = False
            self.overview.set_data(*result)

        self.background.run("Drawing the overview", work, root=self.project.root, on_done=done, quiet=True)

    # ---- adding media ----------------------------------------------------------------------------

    def ask_add(self):
        if self.project is None:
            return
        files, _ = QFileDialog.getOpenFileNames(self, "Add videos or images")
        if files:
            self._ask_and_add([Path(f) for f in files])

    def dragEnterEvent(self, e):
        if e.mimeData().hasUrls() and any(u.isLocalFile() for u in e.mimeData().urls()):
            e.acceptProposedAction()

    def dropEvent(self, e):
        paths = [Path(u.toLocalFile()) for u in e.mimeData().urls() if u.isLocalFile()]
        if not paths:
            return
        e.acceptProposedAction()
        if self.project is None:
            self.statusBar().showMessage("open or create a project first, then drop the videos again", 6000)
            return
        QTimer.singleShot(0, lambda: self._ask_and_add(paths))

    def _ask_and_add(self, paths):
        has_video = any(media_kind(p) == "video" or (p.is_dir() and any(media_kind(q) == "video"
                                                                      for q in p.iterdir()))
                        for p in paths)
        dlg = SamplingDialog([p.name for p in paths], has_video, self)
        if not dlg.exec():
            return
        participant, session = dlg.who()
        self.add_paths(paths, dlg.sampling(), participant=participant, session=session)

    def add_paths(self, paths, sampling, *, participant=None, session=None):
        """Import media in the background (videos are decoded once to checksum every sampled frame)."""
        from ..core import ops
        first_new = not self.order

        def work(project, progress, cancel):
            return ops.add_media(project, [Path(p) for p in paths], sampling=sampling,
                                 participant=participant, session=session, progress=progress,
                                 strict=False)

        def done(result):
            ch, rep = result
            self.reload_media()
            self.after_change(ch)
            problems = [f"{Path(p).name}: {m}" for p, m in rep.failed]
            if problems:
                self.background.show_error(KinemarkError("some files could not be added: " + "; ".join(problems)))
            if first_new and self.order:
                self.go(self.order[0])
            self.refresh_queue()

        self.background.run("Adding media", work, root=self.project.root, on_done=done)

    # ---- misc ------------------------------------------------------------------------------------

    def _zoom_anchor(self):
        return self.canvas._cursor

    def show_keys(self):
        if self.key_sheet is None:
            self.key_sheet = KeySheet(self.keys, self)
            self.key_sheet.changed.connect(self._update_frameline)
        self.key_sheet.fill()
        self.key_sheet.show()
        self.key_sheet.raise_()

    def closeEvent(self, e):
        self._sync_timer.stop()
        self.settings.sync()
        self.background.cancel_all()
        self.background.wait(10000)
        self.frames.close()
        if self.project is not None:
            self.project.close()
            self.project = None
        super().closeEvent(e)


# ---- entry points ------------------------------------------------------------------------------

def make_app(argv=None) -> QApplication:
    app = QApplication.instance() or QApplication(list(argv or sys.argv[:1]))
    app.setApplicationName("Kinemark")
    app.setOrganizationName("Kinemark")
    theme.apply(app)
    return app


def settle(app, window: MainWindow, timeout_s: float = 30.0):
    """Let background jobs, decode-ahead and thumbnails finish (screenshots, benchmarks)."""
    t0 = time.perf_counter()
    while time.perf_counter() - t0 < timeout_s:
        app.processEvents()
        if not window.background.busy and window.frames.idle():
            app.processEvents()
            return True
        time.sleep(0.01)
    return False


def run(root=None, *, screenshot: str | None = None, size=(1440, 900)) -> int:
    """Start the workspace on a project (or the welcome page). With ``screenshot``, render the
    main window offscreen, save it as PNG and exit."""
    if screenshot:
        os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
    if root is not None:
        from ..core.project import Project
        Project.open(root).close()          # a clear one-line error before any window appears
    app = make_app()
    w = MainWindow()
    w.resize(*size)
    if root is not None:
        w.open_project(root)
    w.show()
    if screenshot:
        save_screenshot(app, w, screenshot)
        w.close()
        return 0
    return app.exec()


def save_screenshot(app, window: MainWindow, path) -> None:
    """Render the whole window (after background work settles) into a PNG file."""
    settle(app, window)
    window.repaint()
    app.processEvents()
    if not window.grab().save(str(path), "PNG"):
        raise KinemarkError("cannot write the screenshot", where=str(path))


def main(argv=None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    root = argv[0] if argv else None
    return run(root)


if __name__ == "__main__":
    sys.exit(main())
