"""The Kinemark desktop workspace.

Label page: Up next (left), the frame with its keypoints and the clip strip
(centre), the Keypoints panel (right). Overview page: the pose map and the
keypoint charts. Sign-off page: the frames handed in, riskiest first (left),
the same frame view (centre, moved there while the page is shown), and the
reviewer's decisions (right). Every edit goes through core.edit and every
decision through core.review, which enforce the roles and that nobody signs off
their own work; each is stored the moment it is made. The last frame shown and
who is working are remembered per project, so after a crash the project reopens
where it was with nothing lost.
"""
from __future__ import annotations

import hashlib
import os
import sys
import time
from pathlib import Path

from PySide6.QtCore import QSettings, Qt, QTimer, Signal
from PySide6.QtGui import QAction, QUndoStack
from PySide6.QtWidgets import (QApplication, QFileDialog, QHBoxLayout, QInputDialog, QLabel, QMainWindow, QMessageBox,
                               QProgressBar, QPushButton, QSizePolicy, QSplitter, QStackedWidget, QTabWidget,
                               QVBoxLayout, QWidget)

from ..core import edit, review
from ..core.errors import KinemarkError
from ..core.media import media_kind
from ..core.model import ACCEPTED, BLANK, DRAFTING, IN_REVIEW, PREFILLED, RETURNED, Changes
from . import theme
from .background import Background
from .canvas import FrameCanvas
from .commands import NudgeCommand, SnapshotCommand
from .dialogs import CAUTION, CAUTION_SHORT, NewProjectDialog, SamplingDialog, about
from .forms import ExportDialog, NotesDialog, WhoDialog
from .frames import FrameWorker, prepare
from .panels.overview import OverviewPage
from .panels.points import KeypointPanel
from .panels.queue import Entry as QueueEntryView, QueuePanel, load_live_queue, load_queue

QUEUE_BATCH = 50
from .panels.signoff import SignoffList, SignoffPanel, flag_text
from .panels.strip import ClipStrip
from .shortcuts import BY_ID, COMMANDS, KeySheet, Keys

CARRY_COUNT = 10
MAX_CARRY = 500
LABEL_PAGE, OVERVIEW_PAGE, SIGNOFF_PAGE = 0, 1, 2
#: Edit commands that change keypoints: on the Sign-off page they are corrections, allowed only
#: where the person may sign the frame off.
NUDGE_COMMANDS = tuple(f"point.nudge_{d}{far}" for far in ("", "_far") for d in ("left", "right", "up", "down"))
EDIT_COMMANDS = ("point.put", "point.visibility", "point.confirm", "point.confirm_all", "assist.carry",
                 "assist.fill", "assist.model", "assist.model_points", "assist.follow",
                 "frame.hand_in") + NUDGE_COMMANDS
NAVIGATION_COMMANDS = ("frame.next", "frame.prev", "queue.next", "point.next", "point.prev")


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


class TaskLine(QWidget):
    """A long job the person can follow and cancel from the status bar while they go on working."""

    finished = Signal()

    def __init__(self):
        super().__init__()
        lay = QHBoxLayout(self)
        lay.setContentsMargins(0, 0, 0, 0)
        lay.setSpacing(6)
        self.text = QLabel("")
        self.bar = QProgressBar()
        self.bar.setFixedWidth(140)
        self.bar.setFixedHeight(8)
        self.bar.setTextVisible(False)
        self.bar.setStyleSheet(f"QProgressBar {{ background: {theme.LINE}; }}")   # seen on the status bar
        self.cancel = QPushButton("Cancel")
        self.cancel.setFocusPolicy(Qt.NoFocus)
        self.cancel.setStyleSheet("QPushButton { padding: 1px 8px; }")
        lay.addWidget(self.text)
        lay.addWidget(self.bar)
        lay.addWidget(self.cancel)
        self._event = None
        self.cancel.clicked.connect(self._cancel)
        self.setVisible(False)

    def start(self, title: str, event, short: str | None = None):
        self._title = short or title
        self.setToolTip(title)
        self._event = event
        self.text.setText(f"{self._title}…")
        self.bar.setMaximum(0)
        self.cancel.setEnabled(True)
        self.setVisible(True)

    def progress(self, done: int, total: int, message: str = ""):
        self.bar.setMaximum(max(total, 1))
        self.bar.setValue(min(done, max(total, 1)))
        self.text.setText(f"{self._title}: {done} of {total}")
        self.setToolTip(message)

    def _cancel(self):
        if self._event is not None:
            self._event.set()
            self.text.setText(f"{self._title}: stopping…")
            self.cancel.setEnabled(False)

    def finish(self):
        self._event = None
        self.setVisible(False)
        self.finished.emit()

    @property
    def running(self) -> bool:
        return self._event is not None


class MainWindow(QMainWindow):
    def __init__(self, settings: QSettings | None = None):
        super().__init__()
        self.setWindowTitle("Kinemark")
        self.settings = settings or QSettings("Kinemark", "Kinemark")
        self.keys = Keys(self.settings)
        self.project = None
        self.user_name: str | None = None
        self._live = None          # core.ranking.LiveQueue behind Up next, once ranked
        # the suggestion to tune (core.tuning.suggestion): the label count last checked at, and
        # whether a check is running / another is due when it ends
        self._hint_at: int | None = None
        self._hint_busy = self._hint_again = False
        self.user_role: str | None = None
        self.undo = QUndoStack(self)
        self._goes = 0                 # frame changes so far (see _start_at_queue_top)
        self._to_queue_top = None
        self._auto_went = None         # _goes after the window's own move to the top of Up next
        self._learning = False         # a Learn fit is running (pre-fill waits for it, and back)
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
        self._signoff_dirty = True
        self._signoff_current: int | None = None      # annotation id shown on the Sign-off page
        self._hand_in_flags: dict[int, list] = {}     # frame id -> QA flags at its last hand-in
        self._auto_prefill = False
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
        split = self.label_split = QSplitter(Qt.Horizontal)
        split.setHandleWidth(1)
        self.queue = QueuePanel()
        self.queue.setMinimumWidth(280)
        self.queue.chosen.connect(self.go)
        self.queue.rerank.connect(lambda: self.refresh_queue(say=True))
        centre = self.centre = QWidget()
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
        self.canvas.personBoxed.connect(
            lambda x0, y0, x1, y1: self._guarded(lambda: self.ask_model(box=(x0, y0, x1, y1)))())
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
        self.label_holder = self._holder()
        self.label_holder.layout().addWidget(centre)
        split.addWidget(self.label_holder)
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

        signoff_page = QWidget()
        signoff_page.setObjectName("page")
        self.signoff_split = QSplitter(Qt.Horizontal)
        self.signoff_split.setHandleWidth(1)
        self.signoff_list = SignoffList()
        self.signoff_list.setMinimumWidth(280)
        self.signoff_list.chosen.connect(self.show_for_signoff)
        self.signoff_list.refresh.connect(self.refresh_signoff)
        self.signoff_list.accept_clean.connect(self.signoff_accept_clean)
        self.signoff = SignoffPanel()
        self.signoff.setMinimumWidth(330)
        self.signoff.accept.connect(self.signoff_accept)
        self.signoff.send_back.connect(self.signoff_send_back)
        self.signoff_holder = self._holder()      # the frame view moves in while the page is shown
        self.signoff_split.addWidget(self.signoff_list)
        self.signoff_split.addWidget(self.signoff_holder)
        self.signoff_split.addWidget(self.signoff)
        self.signoff_split.setStretchFactor(0, 0)
        self.signoff_split.setStretchFactor(1, 1)
        self.signoff_split.setStretchFactor(2, 0)
        self.signoff_split.setSizes([300, 800, 340])
        sl = QVBoxLayout(signoff_page)
        sl.setContentsMargins(0, 0, 0, 0)
        sl.addWidget(self.signoff_split)
        self.tabs.addTab(signoff_page, "Sign-off")
        self.tabs.currentChanged.connect(self._on_tab)

        sb = self.statusBar()
        sb.setSizeGripEnabled(False)
        self.task = TaskLine()
        self.task.finished.connect(lambda: self.caution_label.setText(CAUTION_SHORT))
        self.user_label = QLabel("")
        self.user_label.setToolTip("who is working, and their role: Project ▸ Who is working… to change")
        self.model_label = QLabel("")
        self.caution_label = QLabel(CAUTION_SHORT)
        self.caution_label.setToolTip(CAUTION)
        sb.addPermanentWidget(self.task)
        sb.addPermanentWidget(self.user_label)
        sb.addPermanentWidget(self.model_label)
        sb.addPermanentWidget(self.caution_label)

    @staticmethod
    def _holder() -> QWidget:
        w = QWidget()
        w.setObjectName("page")
        lay = QVBoxLayout(w)
        lay.setContentsMargins(0, 0, 0, 0)
        lay.setSpacing(0)
        return w

    def _place_frame_view(self, page: int):
        """The one frame view (with its frame line and clip strip) goes to the page shown."""
        holder = self.signoff_holder if page == SIGNOFF_PAGE else self.label_holder
        if self.centre.parent() is not holder:
            holder.layout().addWidget(self.centre)     # reparenting takes it out of the other page
            self.centre.show()

    def _build_actions(self):
        handlers = {
            "frame.next": lambda: self.step_frame(+1),
            "frame.prev": lambda: self.step_frame(-1),
            "queue.next": self.next_in_line,
            "frame.hand_in": self.hand_in,
            "frame.take_back": self.take_back,
            "point.next": lambda: self.step_point(+1),
            "point.prev": lambda: self.step_point(-1),
            "point.put": self.put_here,
            "point.visibility": self.cycle_visibility,
            "point.nudge_left": lambda: self.nudge(-1, 0),
            "point.nudge_right": lambda: self.nudge(+1, 0),
            "point.nudge_up": lambda: self.nudge(0, -1),
            "point.nudge_down": lambda: self.nudge(0, +1),
            "point.nudge_left_far": lambda: self.nudge(-10, 0),
            "point.nudge_right_far": lambda: self.nudge(+10, 0),
            "point.nudge_up_far": lambda: self.nudge(0, -10),
            "point.nudge_down_far": lambda: self.nudge(0, +10),
            "point.confirm": lambda: self.confirm(current_only=True),
            "point.confirm_all": lambda: self.confirm(current_only=False),
            "edit.undo": self.undo.undo,
            "edit.redo": self.undo.redo,
            "assist.carry": self.carry_forward,
            "assist.carry_reach": self.ask_carry_reach,
            "assist.fill": self.fill_from_keyframe,
            "assist.model": self.ask_model,
            "assist.model_points": self.ask_model_around_points,
            "assist.follow": self.follow_person,
            "view.fit": self.canvas.fit,
            "view.zoom_in": lambda: self.canvas.zoom(1.25, self._zoom_anchor()),
            "view.zoom_out": lambda: self.canvas.zoom(0.8, self._zoom_anchor()),
            "view.label": lambda: self.tabs.setCurrentIndex(LABEL_PAGE),
            "view.overview": lambda: self.tabs.setCurrentIndex(OVERVIEW_PAGE),
            "view.signoff": lambda: self.tabs.setCurrentIndex(SIGNOFF_PAGE),
            "signoff.accept": self.signoff_accept,
            "signoff.send_back": self.signoff_send_back,
            "signoff.accept_clean": self.signoff_accept_clean,
            "batch.prefill": lambda: self.prefill_unlabelled(),
            "batch.learn": self.learn_from_accepted,
            "batch.tune": self.tune_model,
            "batch.export": self.ask_export,
            "project.target": self.ask_target,
            "help.keys": self.show_keys,
        }
        self.actions: dict[str, QAction] = {}
        for c in COMMANDS:
            a = QAction(c.name, self)
            fn = handlers[c.id]
            if c.id in EDIT_COMMANDS:
                fn = self._guarded(fn)
            elif c.id == "frame.take_back":      # one's own frame, from any page that shows it
                fn = self._guarded(fn, signoff_read_only=False)
            elif c.id in NAVIGATION_COMMANDS:
                fn = self._shows_frame(fn)
            a.triggered.connect(fn)
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
        self.who_action = m.addAction("Who is working…")
        self.who_action.triggered.connect(self.ask_who)
        self.who_action.setEnabled(False)
        m.addSeparator()
        for c in COMMANDS:
            if c.group == "Project":
                m.addAction(self.actions[c.id])
        m.addSeparator()
        m.addAction("Quit").triggered.connect(self.close)
        for title, group in (("&Frame", "Frames"), ("&Keypoint", "Keypoints"), ("&Edit", "Edit"),
                             ("&Assist", "Assist"), ("&Sign-off", "Sign-off"), ("&View", "View"),
                             ("&Help", "Help")):
            m = mb.addMenu(title)
            prev = None
            for c in COMMANDS:
                if c.id in NUDGE_COMMANDS:
                    continue                      # in their own submenu, below
                if c.group == group:
                    if prev is not None and prev.split(".")[0] != c.id.split(".")[0]:
                        m.addSeparator()          # e.g. whole-project model runs after this frame's
                    m.addAction(self.actions[c.id])
                    prev = c.id
            if group == "Keypoints":
                sub = m.addMenu("Nudge")
                for cid in NUDGE_COMMANDS:
                    sub.addAction(self.actions[cid])
            if group == "Help":
                m.addAction("About Kinemark").triggered.connect(lambda: about(self))
        self._enable(False)

    def _enable(self, on: bool):
        for cid, a in self.actions.items():
            if not cid.startswith("help."):
                a.setEnabled(on)
        if hasattr(self, "who_action"):
            self.who_action.setEnabled(on)

    def _guarded(self, fn, *, signoff_read_only: bool = True):
        """Edits act on the frame on screen: never from the Overview page (which shows none), and
        (``signoff_read_only``) on the Sign-off page only when this person may correct the frame."""
        def run():
            if self.tabs.currentIndex() == OVERVIEW_PAGE:
                self.statusBar().showMessage("the Overview shows no frame to change: go to the Label page "
                                             f"({self.keys.text('view.label')}) first", 5000)
                return
            if signoff_read_only and self.tabs.currentIndex() == SIGNOFF_PAGE and not self.canvas.editable:
                self.statusBar().showMessage(self.signoff.may.text() or
                                             "read-only here: choose a frame that you may sign off", 5000)
                return
            fn()
        return run

    def _shows_frame(self, fn):
        """Frame navigation pressed on the Overview page (which shows no frame) opens the Label
        page first, so the frame it goes to is on screen."""
        def run():
            if self.tabs.currentIndex() == OVERVIEW_PAGE:
                self.tabs.setCurrentIndex(LABEL_PAGE)
            fn()
        return run

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

    def open_project(self, root, *, user: str | None = None, ask_user: bool = True,
                     auto_prefill: bool = True) -> bool:
        """Open a project folder. ``user``: who is working (else $KINEMARK_USER, else the choice
        remembered for this project, else asked when the project has several people, else the
        project's default user). ``auto_prefill``: pre-fill in the background when the project
        has frames but no model proposal at all."""
        from ..core.demo import sample_needs_building
        from ..core.project import Project
        if sample_needs_building(root):
            self.build_sample(root, user=user, auto_prefill=auto_prefill)
            return False
        try:
            project = Project.open(root)
        except KinemarkError as e:
            self.background.show_error(e)
            return False
        try:
            who = self.choose_user(project, user, ask=ask_user)
        except KinemarkError as e:
            project.close()
            self.background.show_error(e)
            return False
        self.close_project()
        self.project = project
        self.undo.clear()
        self.setWindowTitle(f"Kinemark — {project.root.name}"
                            + (" (read-only)" if project.store.read_only else ""))
        self._set_user(who)
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
        first_visit = start not in self.frame_by_id
        if first_visit:
            start = self.order[0] if self.order else None
        self._to_queue_top = None
        if start is not None:
            self.go(start)
            if first_visit:
                # nothing remembered for this project: once Up next is ranked, start at its top
                # (unless the person has moved on or edited by then)
                self._to_queue_top = self._goes
        else:
            self.canvas.set_image(None, "No frames yet: drop videos or image folders here to add them.")
            self._update_frameline()
        self.refresh_queue()
        self._signoff_dirty = True
        if self.tabs.currentIndex() == SIGNOFF_PAGE:
            self.refresh_signoff()
        self._auto_prefill = auto_prefill
        self.check_model()
        return True

    def build_sample(self, root, *, user=None, auto_prefill=True):
        """A folder with the demo clips (clips/scenario.json) but no project yet: build it in the
        background from the clips, then open it."""
        from ..core.demo import build_sample_project
        root = Path(root)

        def work(project, progress, cancel):
            return build_sample_project(root, progress=progress)

        self.background.run(f"Building the sample project in {root.name} from its clips", work, root=None,
                            on_done=lambda _: self.open_project(root, user=user, auto_prefill=auto_prefill))

    # ---- who is working --------------------------------------------------------------------

    def _user_key(self, root) -> str:
        return f"user/{_key(root)}"

    def choose_user(self, project, wanted: str | None = None, *, ask: bool = True):
        """Who is working on ``project`` (see :meth:`open_project`). Raises KinemarkError for a
        name the project does not have."""
        if wanted:
            return project.user(wanted)
        if os.environ.get("KINEMARK_USER"):
            return project.user()
        users = project.store.users()
        by_name = {u.name: u for u in users}
        remembered = self.settings.value(self._user_key(project.root))
        if remembered in by_name:
            return by_name[remembered]
        default = project.user()
        if len(users) > 1 and ask:
            dlg = WhoDialog(users, default.name, project.root.name, self)
            if dlg.exec() and dlg.chosen() in by_name:
                self.settings.setValue(self._user_key(project.root), dlg.chosen())
                self.settings.sync()
                return by_name[dlg.chosen()]
        return default

    def _set_user(self, who):
        self.user_name, self.user_role = who.name, who.role
        self.user_label.setText(f"{who.name} ({who.role})")

    def ask_who(self):
        """Change who is working (the undo history is cleared: it was the other person's)."""
        if self.project is None:
            return
        users = self.project.store.users()
        dlg = WhoDialog(users, self.user_name, self.project.root.name, self)
        if not dlg.exec() or not dlg.chosen():
            return
        self.switch_user(dlg.chosen())

    def switch_user(self, name: str) -> bool:
        try:
            who = self.project.user(name)
        except KinemarkError as e:
            self.background.show_error(e)
            return False
        if who.name != self.user_name:
            self.undo.clear()
        self.settings.setValue(self._user_key(self.project.root), who.name)
        self.settings.sync()
        self._set_user(who)
        if self.tabs.currentIndex() == SIGNOFF_PAGE:
            self.show_for_signoff(self._signoff_current)
        self.statusBar().showMessage(f"now working as {who.name} ({who.role})", 5000)
        return True

    def close_project(self):
        if self.project is None:
            return
        self.background.cancel_all()
        self.background.wait(10000)
        self._sync_timer.stop()
        self.settings.sync()
        self.frames.reset()
        self._live = None
        self._hint_at, self._hint_again = None, False
        self.project.close()
        self.project = None
        self.frame_id = None
        self.working = None
        self.undo.clear()
        self.queue.clear()
        self.signoff_list.clear()
        self.signoff.show_item(None)
        self._signoff_current = None
        self._hand_in_flags = {}
        self.task.finish()
        self._strip_media = None
        self.user_name = self.user_role = None

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
        self._goes += 1
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
        if self.tabs.currentIndex() == SIGNOFF_PAGE:
            it = self.signoff_list.after(self._signoff_current)
            if it is None:
                self.statusBar().showMessage("nothing else is waiting for sign-off", 4000)
                return
            self.show_for_signoff(it.annotation_id)
            return
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
        self._show_notes(w)
        self._show_checks()
        self._update_frameline()
        if self.tabs.currentIndex() == SIGNOFF_PAGE:
            self._update_signoff_panel()

    def _show_notes(self, w):
        """A reviewer's open notes, on their keypoints' handles and in the Keypoints panel. Notes are
        open only between sending back and the next hand-in, so other states are not looked up."""
        notes = []
        if w.annotation_id is not None and w.state in (RETURNED, DRAFTING):
            notes = [n for n in review.notes_for_frame(self.project, self.frame_id) if n.person == 0]
        self.current_notes = notes
        self.points.set_notes([(n.note.keypoint, n.note.text, n.author_name) for n in notes])
        pinned: dict[int, list[str]] = {}
        for n in notes:
            if n.note.keypoint is not None:
                pinned.setdefault(n.note.keypoint, []).append(
                    f"{n.note.text} ({n.author_name})" if n.author_name else n.note.text)
        self.canvas.set_notes({i: "Reviewer's note: " + " · ".join(t) for i, t in pinned.items()})

    def _show_checks(self):
        flags = self._hand_in_flags.get(self.frame_id)
        if flags is None or self.states.get(self.frame_id) == ACCEPTED:
            self.points.set_checks(None)
            return
        if not flags:
            self.points.set_checks([("ok", "nothing to look at")])
            return
        self.points.set_checks([(f.severity, self._flag_text(f)) for f in flags])

    def _flag_text(self, f) -> str:
        return flag_text(f, self.project.skeleton.keypoints)

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
        nudge = self.keys.text("point.nudge_left")
        nudge = nudge[:-len("Left")] + "arrows" if nudge.endswith("+Left") else nudge
        self.points.hint.setText(" · ".join(f"{k} {name_}" for k, name_ in (
            (self.keys.text("point.put"), "put here"), (nudge, "nudge"),
            (self.keys.text("point.visibility"), "visibility"), (self.keys.text("point.confirm"), "confirm"),
            (self.keys.text("queue.next"), "next in line"), (self.keys.text("help.keys"), "all keys"))))

    def _update_progress(self):
        if self.project is None:
            return
        from ..core import ops
        counts = self.project.store.state_counts()
        self.queue.set_progress(counts.get(ACCEPTED, 0), counts.get(IN_REVIEW, 0), ops.target(self.project))
        self._check_tuning_hint(counts.get(ACCEPTED, 0) + counts.get(IN_REVIEW, 0))

    def _check_tuning_hint(self, labels: int | None = None):
        """Ask core, in the background, whether to suggest tuning the model now (Up next shows
        it); again only when the number of accepted and in-review frames has changed, or after
        a re-rank (``labels`` None), e.g. once a tuning has finished."""
        if self.project is None or (labels is not None and labels == self._hint_at):
            return
        if self._hint_busy:
            self._hint_again = True
            return
        self._hint_at, self._hint_busy = labels, True
        root = self.project.root

        def work(project, progress, cancel):
            from ..core import ops
            return ops.tuning_suggestion(project)

        def ended(text):
            self._hint_busy = False
            if self.project is not None and self.project.root == root and text is not None:
                c = BY_ID["batch.tune"]
                how = f"{c.group} ▸ {c.name} ({self.keys.text(c.id)})"
                self.queue.set_hint(f"{text[0].upper()}{text[1:]}. {how}." if text else "")
            if self._hint_again and self.project is not None:
                self._hint_again = False
                self._hint_at = None
                self._update_progress()

        self.background.run("Checking whether to suggest tuning", work, root=root, on_done=ended,
                            on_error=lambda exc: ended(None), quiet=True)

    # ---- editing ---------------------------------------------------------------------------------

    def _apply(self, text: str, fn, *, merge_key=None):
        """Run the edit ``fn`` on the frame on screen and make it undoable as ``text``; edits
        with the same ``merge_key`` in a row undo as one step (:class:`NudgeCommand`)."""
        if self.project is None or self.frame_id is None:
            return None
        try:
            ch = fn()
        except KinemarkError as e:
            # a refused edit of the frame on screen: said in the status bar, not in a box that
            # takes the keyboard away until it is closed
            QApplication.beep()
            self.statusBar().showMessage(f"{text}: {e}", 10000)
            self.load_points()
            return None
        self.push_changes(text, ch, merge_key=merge_key)
        return ch

    def push_changes(self, text: str, ch, *, merge_key=None):
        """After an edit was stored: make it undoable and refresh what it touched."""
        before = (ch.details or {}).get("before") or {}
        if before:
            after = {fid: edit.snapshot(self.project, fid) for fid in before}
            self.undo.push(SnapshotCommand(self, text, before, after) if merge_key is None else
                           NudgeCommand(self, text, before, after, merge_key))
        self.after_change(ch)

    def after_change(self, ch):
        if ch.media:
            self.reload_media()
        touched = set(ch.frames)
        if not touched and (ch.annotations or ch.proposals):   # e.g. a model pre-fill run
            touched = set(self.order)
        was = {fid: self.states.get(fid, BLANK) for fid in touched}   # before load_points refreshes them
        if self.frame_id is not None and (self.frame_id in touched or ch.annotations or ch.proposals):
            self.load_points()
        if touched:
            st = self.project.store.annotation_states(touched)
            newly = [fid for fid in touched if was[fid] in (BLANK, PREFILLED)
                     and st.get(fid, BLANK) not in (BLANK, PREFILLED)]
            for fid in touched:
                self.states[fid] = st.get(fid, BLANK)
            self._fold_into_queue(newly)
            self.strip.set_states({fid: self.states[fid] for fid in touched})
        self.queue.mark(self.states)
        self._update_progress()
        self._overview_dirty = True
        if ch.message:
            self.statusBar().showMessage(ch.message, 5000)

    def restore_frames(self, target: dict, *, expect: dict, action: str, what: str = "") -> bool:
        if self.project is None:
            return False
        try:
            ch = edit.restore(self.project, target, expect=expect, action=action, user=self.user_name)
        except KinemarkError as e:
            self.background.show_error(KinemarkError(f"cannot {action}: {e}"))
            return False
        if self.frame_id not in target and target:
            self.go(next(iter(target)))
        self.after_change(ch)
        n = len(target)
        done = {"undo": "undone", "redo": "redone"}.get(action, action + " done")
        self.statusBar().showMessage(f"{done}: {what or 'the last change'}"
                                     + (f" ({n} frames)" if n != 1 else ""), 4000)
        return True

    def _name(self, i=None) -> str:
        """The keypoint's name in words (left_wrist -> left wrist), for messages and undo."""
        return self.project.skeleton.keypoints[self.point if i is None else i].replace("_", " ")

    def _on_dragged(self, index: int, x: float, y: float):
        fid = self.frame_id
        self._apply(f"Move {self._name(index)}",
                    lambda: edit.set_point(self.project, fid, index, x, y, user=self.user_name))

    def put_here(self):
        pos = self.canvas.cursor_position()
        if pos is None:
            self.statusBar().showMessage("point at the frame first: Put here places the keypoint under the pointer", 4000)
            return
        self.put_at(*pos)

    def put_at(self, x: float, y: float):
        fid, i = self.frame_id, self.point
        if self._apply(f"Put {self._name(i)}", lambda: edit.set_point(self.project, fid, i, x, y, user=self.user_name)) is not None:
            self.step_point(+1)

    def nudge(self, dx: float, dy: float):
        """Move the current keypoint by (dx, dy) screen pixels (at the present zoom), for
        keyboard-only placement after Put here or on a model's point."""
        w = self.working
        if w is None or self.frame_id is None:
            return
        i, fid = self.point, self.frame_id
        if w.keypoints[i, 2] <= 0:
            self.statusBar().showMessage(f"{self._name(i)} is not placed yet: {self.keys.text('point.put')} "
                                         "puts it under the pointer first", 4000)
            return
        step = 1.0 / max(self.canvas.scale_factor(), 1e-9)     # one screen pixel, in frame pixels
        x, y = float(w.keypoints[i, 0]) + dx * step, float(w.keypoints[i, 1]) + dy * step
        self._apply(f"Nudge {self._name(i)}",
                    lambda: edit.set_point(self.project, fid, i, x, y, user=self.user_name), merge_key=(fid, i))

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
                    lambda: edit.set_visibility(self.project, fid, i, nv, at=at, user=self.user_name))

    def confirm(self, current_only: bool):
        fid, i = self.frame_id, self.point
        idx = [i] if current_only else None
        self._apply("Confirm " + (self._name(i) if current_only else "all points"),
                    lambda: edit.confirm(self.project, fid, idx, user=self.user_name))

    def hand_in(self):
        fid = self.frame_id
        ch = self._apply("Hand in", lambda: edit.hand_in(self.project, fid, user=self.user_name))
        if ch is None:
            return
        self.queue.mark(self.states)
        self._signoff_dirty = True
        flags = list((ch.details or {}).get("flags") or ())
        self._hand_in_flags[fid] = flags
        if fid == self.frame_id:
            self._show_checks()
        if flags:
            n_err = sum(f.severity == "error" for f in flags)
            n_warn = len(flags) - n_err
            self.statusBar().showMessage(
                f"handed in · QA: {n_err} error{'s' if n_err != 1 else ''}, {n_warn} warning"
                f"{'s' if n_warn != 1 else ''} (see Checks) · {self.keys.text('frame.take_back')} takes it back",
                10000)
        else:
            self.statusBar().showMessage("handed in for review · QA found nothing to look at", 5000)

    def take_back(self):
        """Recall a frame one handed in (core refuses once it is signed off, or for someone else's)."""
        if self.project is None or self.frame_id is None:
            return
        fid = self.frame_id
        a = self.project.store.annotation(fid)
        if a is None or a.state != IN_REVIEW:
            self.statusBar().showMessage("this frame is not in review: there is nothing to take back", 4000)
            return
        try:
            ch = review.recall(self.project, a.id, user=self.user_name)
        except KinemarkError as e:
            self.background.show_error(e)
            return
        self._signoff_dirty = True
        self.after_change(Changes(frames=(fid,), annotations=ch.annotations,
                                  message="taken back from review: drafting again"))

    def fill_from_keyframe(self):
        if self.project is None or self.frame_id is None:
            return
        fid = self.frame_id
        prev = edit.keyframe_before(self.project, fid)
        if prev is None:
            self.statusBar().showMessage("no earlier frame of this video holds a person's points", 4000)
            return
        self._apply("Fill from keyframe", lambda: edit.fill_between(self.project, prev, fid, user=self.user_name))

    def carry_forward(self):
        if self.project is None or self.frame_id is None:
            return
        fid = self.frame_id
        count = self.carry_reach()
        user = self.user_name

        def work(project, progress, cancel):
            return edit.carry_forward(project, fid, count=count, progress=progress, user=user)

        self.background.run("Carrying points forward", work, root=self.project.root,
                            on_done=lambda ch: self.push_changes("Carry forward", ch))

    def carry_reach(self) -> int:
        """How many following sampled frames Carry forward fills (a setting of this computer)."""
        try:
            n = int(self.settings.value("carry_count", CARRY_COUNT))
        except (TypeError, ValueError):
            return CARRY_COUNT
        return n if 1 <= n <= MAX_CARRY else CARRY_COUNT

    def ask_carry_reach(self):
        n, ok = QInputDialog.getInt(self, "Carry-forward reach",
                                    "Following sampled frames that Carry forward fills:",
                                    self.carry_reach(), 1, MAX_CARRY, 1)
        if ok:
            self.settings.setValue("carry_count", int(n))
            self.settings.sync()
            self.statusBar().showMessage(f"Carry forward now fills the next {n} sampled frame(s)", 5000)

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
            if self._auto_prefill:
                self._auto_prefill = False
                self._prefill_if_never_proposed()

        def bad(exc):
            self._adapter = None
            self.model_problem = str(exc) if isinstance(exc, KinemarkError) else f"{type(exc).__name__}: {exc}"
            self.model_label.setText("model: not available")
            self.model_label.setToolTip(self.model_problem)
            self.statusBar().showMessage(f"The pose model is not available ({self.model_problem}); "
                                         "manual labelling works as usual.", 15000)

        self.background.run("Loading the pose model", work, root=self.project.root, on_done=ok,
                            on_error=bad, quiet=True)

    def ask_model_around_points(self):
        """The model on the person around the points placed on this frame (two will do, say
        the head and a foot): the keyboard's way to what Shift+drag does with the mouse."""
        if self.project is None or self.frame_id is None:
            return
        w = edit.working(self.project, self.frame_id)
        kps = w.keypoints
        placed = [i for i, (src, v) in enumerate(zip(w.sources, kps[:, 2])) if v > 0 and src == "human"]
        if len(placed) < 2:
            self.statusBar().showMessage(
                "place two or more points on the person first (the head and a foot will do), or "
                "Shift+drag a box around them", 8000)
            return
        xy = kps[placed, :2]
        x0, y0 = (float(v) for v in xy.min(axis=0))
        x1, y1 = (float(v) for v in xy.max(axis=0))
        # the points' own box, a little wider than their spread (a head and a foot make a line)
        pad = 0.15 * max(x1 - x0, y1 - y0)
        self.ask_model(box=(x0 - pad, y0 - pad, x1 + pad, y1 + pad))

    def follow_person(self):
        """Propose the rest of this video again, following the person on this frame."""
        if self.project is None or self.frame_id is None or not self._model_ready("Follow this person"):
            return
        from ..core import ops
        fid, adapter = self.frame_id, self._adapter

        def work(project, progress, cancel):
            return ops.follow_person(project, fid, adapter=adapter, progress=progress, cancel=cancel)

        def done(result):
            ch, _ = result
            self.after_change(ch)
            self.statusBar().showMessage(ch.message, 15000)

        self.background.run("Following the person", work, root=self.project.root, on_done=done)

    def _model_ready(self, what: str) -> bool:
        """The model can run and the project can store: else said in the status bar."""
        from ..core import ops
        if self.model_problem is not None or not hasattr(ops, "propose"):
            why = self.model_problem or "this build has no model pre-fill"
            self.statusBar().showMessage(f"The pose model is not available ({why}); label by hand.", 8000)
            return False
        return not self._read_only(what)

    def ask_model(self, box=None):
        """Pre-fill this frame with the model; with ``box`` (x0, y0, x1, y1, frame pixels), from
        that box around one person, even when the model proposed the frame before."""
        if self.project is None or self.frame_id is None:
            return
        from ..core import ops
        if not self._model_ready("Ask the model"):
            return
        fid, adapter = self.frame_id, self._adapter

        boxes = None if box is None else {fid: tuple(float(v) for v in box)}

        def work(project, progress, cancel):
            return ops.propose(project, frames="all", frame_ids=[fid], progress=progress, cancel=cancel,
                               adapter=adapter, boxes=boxes)

        def done(result):
            ch, rep = result if isinstance(result, tuple) else (result, None)
            self.after_change(ch)
            if rep is not None and hasattr(rep, "summary"):
                self.statusBar().showMessage(self._one_frame_words(rep), 10000)
                if rep.failed:      # the person asked for points and got none: say why, in full
                    self.background.show_error(KinemarkError(
                        f"the model could not propose this frame: {rep.failed[0][1]}"))

        self.background.run("Asking the model" if box is None else "Asking the model about the boxed person",
                            work, root=self.project.root, on_done=done)

    @staticmethod
    def _one_frame_words(rep) -> str:
        """What Ask the model did on one frame, the outcome first (the status bar shows only the
        start of a long line); the run's figures follow."""
        if rep.failed:
            head = f"no proposal, the model failed: {rep.failed[0][1]}"
        elif rep.already_done and not rep.proposed:
            head = "already has this model's proposal; nothing new to ask"
        elif rep.human_kept:
            head = "proposal stored; the points a person placed here were kept"
        else:
            head = "pre-filled by the model"
        return f"{head} ({rep.summary()})"

    def _read_only(self, what: str) -> bool:
        """True (and said in the status bar) when the open project cannot store anything."""
        if self.project is None or not self.project.store.read_only:
            return False
        self.statusBar().showMessage(
            f"{what}: this project is open read-only (its folder cannot be written to), so nothing it "
            "makes could be stored; copy the project to a folder you may write to", 10000)
        return True

    # ---- batch actions -------------------------------------------------------------------------

    def _prefill_if_never_proposed(self):
        """A project with frames but no model proposal at all (a new one, or the sample on first
        open) is pre-filled in the background; the person can label meanwhile, or cancel."""
        if not self.order or self.project.store.read_only:
            return          # nothing to pre-fill, or nowhere to store it (said by the title)

        def work(project, progress, cancel):
            # any proposal at all? (stops at the first frame that has one; the store has no count)
            return project.store.proposal_count() == 0

        def done(never):
            if never:
                self.prefill_unlabelled(auto=True)

        self.background.run("Looking for proposals", work, root=self.project.root, on_done=done, quiet=True)

    def prefill_unlabelled(self, auto: bool = False):
        """Pre-fill every frame nobody has labelled with the pose model, in the background: progress
        and Cancel in the status bar, labelling goes on meanwhile. Proposals are stored as they come,
        so a cancelled run keeps what it finished (and a later run skips it)."""
        if self.project is None:
            return
        from ..core import ops
        if self.task.running:
            self.statusBar().showMessage("a pre-fill is already running (see the status bar)", 4000)
            return
        if self.model_problem is not None:
            self.statusBar().showMessage(f"The pose model is not available ({self.model_problem}); "
                                         "nothing to pre-fill with.", 8000)
            return
        if self._read_only("Pre-fill unlabelled frames"):
            return
        if self._learning:
            # frames pre-filled now would miss the correction the fit is about to store
            self.statusBar().showMessage("Pre-fill waits for Learn from accepted labels (or Tune the "
                                         "model) to finish; start it again then", 8000)
            return
        adapter = self._adapter          # None while it is still loading: the job loads its own
        unmoved = {self._goes, self._auto_went}   # where the window itself put the person
        title = "Pre-filling unlabelled frames"

        def work(project, progress, cancel):
            def quiet_when_cancelled(done, total, message=""):
                if not cancel.is_set():      # let the pre-fill wind down by itself and report
                    progress(done, total, message)
            return ops.propose(project, frames="unlabelled", progress=quiet_when_cancelled, cancel=cancel,
                               adapter=adapter)

        def finished():
            self.task.finish()
            self.reload_states()
            self.refresh_queue()

        def done(result):
            ch, rep = result
            if auto and self._goes in unmoved:
                # the first ranking ran before any proposal; go to the top of the new one, as a
                # first visit does, unless the person has moved (or edits: _start_at_queue_top)
                self._to_queue_top = self._goes
            finished()
            self.after_change(ch)
            self.statusBar().showMessage(rep.summary(), 10000)
            if rep.failed and not auto:
                # the status bar shows only the start of the summary, where failures come last
                n = len(rep.failed)
                rest = f"; the other {rep.proposed} were" if rep.proposed else ""
                self.background.show_error(KinemarkError(
                    f"{n} of {n + rep.proposed} frame(s) could not be proposed{rest}. First failure: "
                    f"frame {rep.failed[0][0]}: {rep.failed[0][1]}\n\n{rep.summary()}"))

        def bad(exc):
            finished()          # proposals stored before the failure stay: show them
            if not auto:
                self.background.show_error(exc)
            else:
                self.statusBar().showMessage(f"{title} stopped: {exc}", 10000)

        def cancelled():
            finished()
            self.statusBar().showMessage(f"{title}: cancelled; the frames finished so far keep their "
                                         "proposals, and the next run goes on from there", 10000)

        ev = self.background.run(title, work, root=self.project.root, on_done=done, on_error=bad,
                                 quiet=True, on_progress=self.task.progress, on_cancelled=cancelled)
        self.task.start(title, ev, short="Pre-filling")
        self.caution_label.setText(CAUTION_SHORT.split(" · ")[0])   # room for the task; tooltip has it all

    def reload_states(self):
        """Read every frame's state again (after work done elsewhere, e.g. a cancelled batch)."""
        if self.project is None:
            return
        self.states = {fid: BLANK for fid in self.order}
        self.states.update(self.project.store.annotation_states())
        self.strip.set_states({fid: self.states[fid] for fid in self.by_media.get(
            self.frame_by_id[self.frame_id].media_id, [])} if self.frame_id is not None else {})
        self.queue.mark(self.states)
        self._update_progress()
        self._overview_dirty = True
        if self.frame_id is not None:
            self.load_points()

    def learn_from_accepted(self):
        """Refit the project's correction of the model (core.adapt) and say what it found."""
        if self.project is None:
            return
        from ..core import ops
        if self._read_only("Learn from accepted labels"):
            return
        if self.task.running:
            # the pre-fill would go on proposing frames without the correction the fit stores
            self.statusBar().showMessage("Learn waits for the pre-fill to finish (or cancel it in "
                                         "the status bar); start it again then", 8000)
            return
        if self._learning:
            return
        user = self.user_name

        def work(project, progress, cancel):
            progress(0, 0, "fitting on the accepted and handed-in labels")
            return ops.adapt(project, user=user)

        def done(result):
            self._learning = False
            ch, corr = result
            self.after_change(ch)
            self.inform("Learn from accepted labels", ch.message)
            self.refresh_queue()

        def bad(exc):
            self._learning = False
            self.reload_states()
            self.refresh_queue()

        # not cancellable: the fit stores the correction and re-proposes frames at its end, and
        # cannot stop part-way; an error there may leave some frames re-proposed, so read them again
        self._learning = True
        self.background.run("Learning from accepted labels", work, root=self.project.root, on_done=done,
                            on_error=bad, cancellable=False)

    def tune_model(self):
        """Tune the model's heatmap layers on the labels (core.tuning), pre-fill untouched frames
        again from the model then in use, and load that model for the window's own proposals."""
        if self.project is None:
            return
        from ..core import ops
        from ..core.tuning import torch_available
        title = "Tune the model on accepted labels"
        if self._read_only(title):
            return
        if not torch_available():
            self.statusBar().showMessage("Tuning the model needs PyTorch, which is not installed "
                                         "(pip install 'kinemark[tuning]'); Learn from accepted labels "
                                         "works without it", 10000)
            return
        if self.task.running or self._learning:
            self.statusBar().showMessage("Tuning waits for the pre-fill or Learn to finish; start it "
                                         "again then", 8000)
            return
        user = self.user_name

        def work(project, progress, cancel):
            return ops.tune(project, user=user, progress=progress, cancel=cancel)

        def finished():
            self._learning = False
            self.reload_states()
            self.refresh_queue()
            self.check_model()          # the window's own proposals come from the model now in use

        def done(result):
            ch, _ = result
            finished()
            self.after_change(ch)
            self.inform(title, ch.message)

        def bad(exc):
            finished()

        # pre-fill waits while this runs (its frames would come from the model being replaced)
        self._learning = True
        self.background.run("Tuning the model on accepted labels", work, root=self.project.root,
                            on_done=done, on_error=bad, on_cancelled=finished)

    def ask_target(self):
        """Ask for the study's target number of accepted frames and store it (core.ops.set_target)."""
        if self.project is None:
            return
        from ..core import ops
        n, ok = QInputDialog.getInt(
            self, "Study target", "Accepted frames the study needs (from its protocol):",
            ops.target(self.project), 1, ops.MAX_TARGET, 10)
        if ok:
            self.set_target(n)

    def set_target(self, n: int):
        from ..core import ops
        user = self.user_name

        def work(project, progress, cancel):
            return ops.set_target(project, n, user=user)

        def done(ch):
            self.after_change(ch)
            self._update_progress()
            self.statusBar().showMessage(ch.message, 5000)

        self.background.run("Setting the study's target", work, root=self.project.root, on_done=done,
                            cancellable=False)

    def inform(self, title: str, text: str):
        """A result the person asked for, in a box that does not stop the window."""
        box = QMessageBox(QMessageBox.Information, title, text, QMessageBox.Ok, self)
        box.setAttribute(Qt.WA_DeleteOnClose)
        box.finished.connect(lambda *_: self.background.boxes.remove(box) if box in self.background.boxes else None)
        self.background.boxes.append(box)
        box.open()
        return box

    def ask_export(self):
        if self.project is None:
            return
        from ..core.export import DEID_CAUTION
        default = str(self.project.root / "exports" / time.strftime("accepted-%Y%m%d-%H%M"))
        dlg = ExportDialog(default, DEID_CAUTION, self)
        if not dlg.exec():
            return
        self.export_accepted(**dlg.settings())

    def export_accepted(self, folder: str, bundle: bool, ratios=(1.0, 0.0, 0.0), seed: int = 0,
                        deidentify: bool = False):
        """Accepted labels only: a bundle split by participant (core.export) or one COCO file."""
        if self.project is None:
            return
        from ..core import ops
        from ..core.export import export_bundle
        out, user = Path(folder), self.user_name

        def work(project, progress, cancel):
            target = out / "accepted.coco.json"
            if not bundle and target.exists():
                raise KinemarkError("a COCO file is already there; choose a new folder so that nothing is "
                                    "overwritten", where=str(target))
            if bundle:
                return export_bundle(project, out, ratios=ratios, seed=seed, deidentify=deidentify, user=user,
                                     progress=progress)
            return ops.export_coco(project, target, progress=progress)

        def done(ch):
            self.last_export = ch
            self.inform("Export accepted labels", f"{ch.message}\n\n{CAUTION}")

        self.background.run("Exporting accepted labels", work, root=self.project.root, on_done=done)

    # ---- queue and overview ----------------------------------------------------------------------

    def refresh_queue(self, say: bool = False):
        """Rank Up next again in the background; ``say``: tell the status bar what came of it
        (the Re-rank button asks for that)."""
        if self.project is None:
            return
        self.queue.button.setEnabled(False)

        def work(project, progress, cancel):
            return load_live_queue(project, QUEUE_BATCH)

        def done(result):
            live, entries, note = result
            if live is not None and self.project is not None and live.project.root == self.project.root:
                live.project = self.project       # from now on it reads through this thread's store
            else:
                live = None
            self._live = live
            self._show_queue(entries, note)
            self._hint_at = None             # e.g. a tuning has just finished
            self._update_progress()
            if say:
                shown = self.queue.entries
                top = (f"; first: {self.describe_short(self.frame_by_id[shown[0].frame_id])}"
                       if shown and shown[0].frame_id in self.frame_by_id else "")
                self.statusBar().showMessage(
                    f"Up next ranked again with everything labelled so far: {len(shown)} frame(s){top}"
                    if shown else "Up next ranked again: nothing waits" + (f" ({note})" if note else ""),
                    8000)
            self._start_at_queue_top(self.queue.entries)    # as shown: sent-back frames first

        def bad(exc):
            self.queue.button.setEnabled(True)
            self.statusBar().showMessage(f"Up next could not be loaded: {exc}", 10000)

        self.background.run("Ranking frames", work, root=self.project.root, on_done=done, on_error=bad,
                            quiet=True)

    def _start_at_queue_top(self, entries):
        """On a first visit, go to the top of Up next, if the person is still where the window
        opened: not moved, nothing edited, no point being dragged."""
        mark, self._to_queue_top = self._to_queue_top, None
        if (mark is None or mark != self._goes or self.undo.count() or self.canvas.dragging
                or not entries or entries[0].frame_id not in self.frame_by_id):
            return
        self.go(entries[0].frame_id)
        self._auto_went = self._goes

    def _fold_into_queue(self, frames):
        """New labels arrived: update Up next incrementally (core.ranking.LiveQueue)."""
        if getattr(self, "_live", None) is None or not frames:
            return
        try:
            if self._live.update(frames):
                self._show_queue(self._live.next(QUEUE_BATCH), "")
        except Exception as e:   # noqa: BLE001 - a ranking failure must not stop labelling
            self._live = None
            self.statusBar().showMessage(f"Up next could not be updated ({e}); use Re-rank", 8000)

    def _sent_back_entries(self) -> list:
        """Frames sent back to the person working, for the top of Up next."""
        try:
            back = review.sent_back_to(self.project, self.user_name)
        except KinemarkError:
            return []
        out = []
        for fid, n in back:
            f = self.frame_by_id.get(fid)
            if f is None:
                continue
            why = (f"sent back with {n} open note{'s' if n != 1 else ''}" if n else "sent back by the reviewer")
            out.append(QueueEntryView(fid, f.media_id, f.frame_index, float("inf"),
                                      (why + ": fix, then hand in again",)))
        return out

    def _show_queue(self, entries, note):
        back = self._sent_back_entries() if self.project is not None else []
        if back:
            ids = {e.frame_id for e in back}
            entries = back + [e for e in entries if e.frame_id not in ids]
        self.queue.button.setEnabled(True)
        self.queue.set_entries(entries, lambda e: self.describe_short(self.frame_by_id[e.frame_id])
                               if e.frame_id in self.frame_by_id else f"frame {e.frame_id}",
                               note, self.states,
                               **({} if self.order else {"empty": "No frames yet: add videos or images "
                                                          "(Project ▸ Add videos or images…) or drop them here."}))
        self.queue.set_current(self.frame_id)
        self.frames.thumbnails([(e.frame_id, e.media_id, e.frame_index) for e in entries
                                if e.media_id in self.media_by_id])
        if self.frame_id is not None:
            self._prefetch()

    def _on_thumbnail(self, generation, frame_id, image):
        if generation == self.frames.generation:      # not a late one from the previous project
            self.queue.set_thumbnail(frame_id, image)
            self.signoff_list.set_thumbnail(frame_id, image)

    def _on_tab(self, i):
        self._place_frame_view(i)
        if i == OVERVIEW_PAGE and self._overview_dirty and self.project is not None:
            self.refresh_overview()
        if i == SIGNOFF_PAGE and self.project is not None:
            if self._signoff_dirty:
                self.refresh_signoff()
            else:
                self._update_signoff_panel()
        else:
            self.canvas.set_editable(True)

    # ---- sign-off ---------------------------------------------------------------------------------

    def refresh_signoff(self):
        """Read the frames in review, riskiest first (core.review.review_queue), in the background."""
        if self.project is None:
            return
        self.signoff_list.reload.setEnabled(False)

        def work(project, progress, cancel):
            return review.review_queue(project), {u.id: u.name for u in project.store.users()}

        def done(result):
            items, users = result
            self._signoff_dirty = False
            self._users_by_id = users
            self.signoff_list.reload.setEnabled(True)
            self.signoff_list.set_items(items, self._describe_item)
            self.frames.thumbnails([(it.frame_id, self.frame_by_id[it.frame_id].media_id,
                                     self.frame_by_id[it.frame_id].frame_index)
                                    for it in items if it.frame_id in self.frame_by_id])
            if self.tabs.currentIndex() != SIGNOFF_PAGE:
                return
            keep = self.signoff_list.item(self._signoff_current) if self._signoff_current else None
            if keep is None and self.frame_id is not None:
                keep = self.signoff_list.item_for_frame(self.frame_id)
            if keep is None and items:
                keep = items[0]
            self.show_for_signoff(keep.annotation_id if keep else None)

        def bad(exc):
            self.signoff_list.reload.setEnabled(True)
            self.statusBar().showMessage(f"the frames waiting for sign-off could not be read: {exc}", 10000)

        self.background.run("Reading the frames handed in", work, root=self.project.root, on_done=done,
                            on_error=bad, quiet=True)

    def _describe_item(self, it) -> str:
        f = self.frame_by_id.get(it.frame_id)
        if f is None:
            return f"frame {it.frame_id}"
        return self.describe_short(f) + (f" · person {it.person}" if it.person else "")

    def show_for_signoff(self, annotation_id: int | None):
        """Show a listed frame on the Sign-off page."""
        self._signoff_current = annotation_id
        it = self.signoff_list.item(annotation_id) if annotation_id is not None else None
        self.signoff_list.set_current(annotation_id)
        if it is not None and it.frame_id != self.frame_id:
            self.go(it.frame_id)          # load_points updates the panel
        else:
            self._update_signoff_panel()

    def _signoff_item(self):
        """The listed item for the frame on show (None when that frame is not waiting)."""
        if self.frame_id is None:
            return None
        it = self.signoff_list.item(self._signoff_current) if self._signoff_current else None
        if it is None or it.frame_id != self.frame_id:
            it = self.signoff_list.item_for_frame(self.frame_id)
            self._signoff_current = it.annotation_id if it else None
            self.signoff_list.set_current(self._signoff_current)
        return it

    def _may_text(self, annotation_id: int) -> tuple[str, bool]:
        """What the person working may do with this annotation, in core's words; and whether they
        may correct it (the same people who may accept it)."""
        allowed = review.allowed_transitions(self.project, annotation_id, self.user_name)
        if "accept" in allowed:
            return (f"{self.user_name} may accept this frame, send it back, or correct a point by "
                    "dragging it (a correction stays in review and is recorded as one)."), True
        a = self.project.store.annotation_by_id(annotation_id)
        try:
            review.check_transition(a, "accept", self.project.user(self.user_name),
                                    review.authorship(self.project, annotation_id))
            why = ""
        except KinemarkError as e:
            why = str(e)
        return f"Read-only for {self.user_name}: {why}", False

    def _update_signoff_panel(self):
        if self.project is None:
            return
        it = self._signoff_item()
        if it is None:
            state = self.states.get(self.frame_id) if self.frame_id is not None else None
            self.signoff.show_item(None, state=state)
            self.canvas.set_editable(False)
            return
        may, can = self._may_text(it.annotation_id)
        notes = [n for n in review.notes_for_frame(self.project, it.frame_id, include_addressed=True)
                 if n.person == it.person]
        self.signoff.show_item(it, names=self.project.skeleton.keypoints,
                               users=getattr(self, "_users_by_id", {}), notes=notes, may=may, can_decide=can)
        self.signoff.keys.setText(" · ".join(f"{self.keys.text(c)} {w}" for c, w in (
            ("signoff.accept", "accept"), ("signoff.send_back", "send back"), ("queue.next", "next"),
            ("signoff.accept_clean", "accept all without flags"))))
        self.canvas.set_editable(can)

    def _on_signoff_page(self, what: str) -> bool:
        if self.tabs.currentIndex() != SIGNOFF_PAGE:
            self.statusBar().showMessage(f"{what} works on the Sign-off page "
                                         f"({self.keys.text('view.signoff')})", 5000)
            return False
        return True

    def _signed_off(self, it, ch, done: str):
        """After a decision on ``it`` (``done``: what happened, in words): refresh what it touched,
        then show the next frame waiting."""
        nxt = self.signoff_list.after(it.annotation_id)
        self.signoff_list.remove(it.annotation_id)
        self._hand_in_flags.pop(it.frame_id, None)
        f = self.frame_by_id.get(it.frame_id)
        msg = f"{done}: {self.describe_frame(f)}" if f is not None else ch.message
        self.after_change(Changes(frames=(it.frame_id,), annotations=ch.annotations, message=msg))
        if nxt is not None:
            self.show_for_signoff(nxt.annotation_id)
        else:
            self._signoff_current = None
            self._update_signoff_panel()

    def signoff_accept(self):
        if self.project is None or not self._on_signoff_page("Accept"):
            return
        it = self._signoff_item()
        if it is None:
            self.statusBar().showMessage("this frame is not waiting for sign-off", 4000)
            return
        try:
            ch = review.accept(self.project, it.annotation_id, user=self.user_name)
        except KinemarkError as e:
            self.background.show_error(e)
            return
        self._signed_off(it, ch, "accepted")

    def signoff_send_back(self):
        if self.project is None or not self._on_signoff_page("Send back"):
            return
        it = self._signoff_item()
        if it is None:
            self.statusBar().showMessage("this frame is not waiting for sign-off", 4000)
            return
        try:          # ask core first, so nobody writes notes for a decision they may not make
            review.check_transition(self.project.store.annotation_by_id(it.annotation_id), "send_back",
                                    self.project.user(self.user_name),
                                    review.authorship(self.project, it.annotation_id), note="-")
        except KinemarkError as e:
            self.background.show_error(e)
            return
        skel = self.project.skeleton
        kps = self.working.keypoints if self.working is not None else None
        dlg = NotesDialog(skel.keypoints, skel.edges, kps if kps is not None else [[0, 0, 0]] * len(skel.keypoints),
                          current=self.point, frame_text=self.describe_frame(self.frame_by_id[it.frame_id]),
                          parent=self)
        if not dlg.exec():
            return
        notes = dlg.notes()
        try:
            ch = review.send_back(self.project, it.annotation_id, notes, user=self.user_name)
        except KinemarkError as e:
            self.background.show_error(e)
            return
        self._signed_off(it, ch, f"sent back with {len(notes)} note{'s' if len(notes) != 1 else ''}")

    def ask_yes_no(self, text: str) -> bool:
        """Ask before a batch decision (a modal question; tests replace it)."""
        return QMessageBox.question(self, "Kinemark", text) == QMessageBox.Yes

    def signoff_accept_clean(self):
        if self.project is None or not self._on_signoff_page("Accept all without QA flags"):
            return
        listed = [it for it in self.signoff_list.items if not it.flags]
        if not self._signoff_dirty and not listed:
            self.statusBar().showMessage("no frame in review is free of QA flags", 5000)
            return
        n = f"the {len(listed)} frame(s)" if not self._signoff_dirty else "every frame"
        if not self.ask_yes_no(f"Accept {n} in review with no QA flag? Frames that {self.user_name} "
                               "labelled or handed in are skipped: someone else signs those off."):
            return
        user = self.user_name

        def work(project, progress, cancel):
            return review.accept_batch(project, user=user, without_flags=True)

        def done(ch):
            own = sum(1 for _, why in ch.details.get("skipped", ()) if "their own work" in why)
            msg = ch.message + (f" ({own} of them your own work)" if own else "")
            touched = tuple(self.project.store.annotation_by_id(a).frame_id for a in ch.annotations)
            for fid in touched:
                self._hand_in_flags.pop(fid, None)
            self.after_change(Changes(frames=touched, annotations=ch.annotations, message=msg))
            self.statusBar().showMessage(msg, 10000)
            self.refresh_signoff()

        self.background.run("Accepting the frames without QA flags", work, root=self.project.root,
                            on_done=done)

    def refresh_overview(self):
        from ..core import overview as figures
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
        user = self.user_name

        def work(project, progress, cancel):
            return ops.add_media(project, [Path(p) for p in paths], sampling=sampling,
                                 participant=participant, session=session, progress=progress,
                                 strict=False, user=user)

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


def run(root=None, *, screenshot: str | None = None, size=(1440, 900), user: str | None = None) -> int:
    """Start the workspace on a project (or the welcome page). With ``screenshot``, render the
    main window offscreen, save it as PNG and exit (no question asked, no pre-fill started).

    A folder holding the demo clips but no project yet (``sample_project`` on a fresh clone) is
    built first, with progress on the terminal; the workspace then pre-fills it in the background.
    """
    if screenshot:
        os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
    if root is not None:
        from ..core.demo import build_sample_project, sample_needs_building
        from ..core.project import Project
        if sample_needs_building(root):
            from ..core.cli import ProgressBar
            print(f"Building the sample project in {root} from its clips (first open)…", file=sys.stderr)
            build_sample_project(root, progress=ProgressBar())
        p = Project.open(root)              # a clear one-line error before any window appears
        try:
            if user:
                p.user(user)
        finally:
            p.close()
    app = make_app()
    w = MainWindow()
    w.resize(*size)
    if root is not None:
        w.open_project(root, user=user, ask_user=not screenshot, auto_prefill=not screenshot)
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
