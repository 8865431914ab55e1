"""Kinemark's commands, their default keys, and the key sheet.

Every command has an id (stable, used in settings), a name of our own, its
default keys and one line of help. Keys are configurable in the key sheet and
saved with QSettings (group ``keys``).
"""
from __future__ import annotations

from dataclasses import dataclass

from PySide6.QtCore import QSettings, Qt, Signal
from PySide6.QtGui import QAction, QKeySequence
from PySide6.QtWidgets import (QAbstractItemView, QDialog, QDialogButtonBox, QHBoxLayout, QHeaderView,
                               QKeySequenceEdit, QLabel, QPushButton, QTableWidget, QTableWidgetItem,
                               QVBoxLayout)


@dataclass(frozen=True)
class Command:
    id: str
    name: str
    keys: tuple[str, ...]
    help: str
    group: str


COMMANDS: tuple[Command, ...] = (
    Command("frame.next", "Next frame", ("Right", "."), "show the next sampled frame", "Frames"),
    Command("frame.prev", "Previous frame", ("Left", ","), "show the previous sampled frame", "Frames"),
    Command("queue.next", "Next in line", ("N",),
            "jump to the next frame waiting in Up next (on the Sign-off page: the next one to sign off)",
            "Frames"),
    Command("frame.hand_in", "Hand in", ("Ctrl+Return",), "hand this frame in for review", "Frames"),
    Command("frame.take_back", "Take back from review", ("Ctrl+Backspace",),
            "take a frame you handed in back to drafting, before anyone signs it off", "Frames"),
    Command("point.next", "Next keypoint", ("Down",), "make the next keypoint current", "Keypoints"),
    Command("point.prev", "Previous keypoint", ("Up",), "make the previous keypoint current", "Keypoints"),
    Command("point.put", "Put here", ("S",),
            "put the current keypoint under the pointer, then go to the next keypoint", "Keypoints"),
    *(Command(f"point.nudge_{d}{far}", f"Nudge {d}{' far' if far else ''}", (f"{mod}{d.capitalize()}",),
              f"move the current keypoint {'ten screen pixels' if far else 'one screen pixel'} {d}",
              "Keypoints")
      for far, mod in (("", "Shift+"), ("_far", "Ctrl+Shift+")) for d in ("left", "right", "up", "down")),
    Command("point.visibility", "Cycle visibility", ("V",),
            "visible → occluded → not in frame → visible", "Keypoints"),
    Command("point.confirm", "Confirm point", ("C",),
            "vouch for the model's or tracker's point for the current keypoint", "Keypoints"),
    Command("point.confirm_all", "Confirm all points", ("Shift+C",),
            "vouch for every model or tracker point on this frame", "Keypoints"),
    Command("edit.undo", "Undo", ("Ctrl+Z",), "take back the last change (on any frame)", "Edit"),
    Command("edit.redo", "Redo", ("Ctrl+Shift+Z", "Ctrl+Y"), "make the undone change again", "Edit"),
    Command("assist.carry", "Carry forward", ("P",),
            "track this frame's points into the following sampled frames", "Assist"),
    Command("assist.carry_reach", "Carry-forward reach…", ("Shift+P",),
            "how many following sampled frames Carry forward fills (kept on this computer)", "Assist"),
    Command("assist.fill", "Fill from keyframe", ("I",),
            "fill the frames between the previous keyframe and this one in a straight line", "Assist"),
    Command("assist.model", "Ask the model", ("M",), "pre-fill this frame with the pose model", "Assist"),
    Command("assist.model_points", "Ask the model about this person", ("Shift+M",),
            "the model looks only at the person around the points you placed (two will do); "
            "with the mouse, Shift+drag a box around them", "Assist"),
    Command("assist.follow", "Follow this person", ("Shift+F",),
            "propose the rest of this video again, each frame from the pose before it, starting "
            "from this frame's points; stops where the model loses the person", "Assist"),
    Command("view.fit", "Fit frame", ("F", "0"), "show the whole frame", "View"),
    Command("view.zoom_in", "Zoom in", ("+", "="), "zoom in about the pointer", "View"),
    Command("view.zoom_out", "Zoom out", ("-",), "zoom out about the pointer", "View"),
    Command("view.label", "Label page", ("Ctrl+1",), "the frame, its keypoints and Up next", "View"),
    Command("view.overview", "Overview page", ("Ctrl+2",), "pose map and keypoint charts", "View"),
    Command("view.signoff", "Sign-off page", ("Ctrl+3",),
            "frames handed in, riskiest first, for a reviewer to accept or send back", "View"),
    Command("signoff.accept", "Accept frame", ("A",),
            "on the Sign-off page: accept the frame shown (a reviewer; never one's own work)", "Sign-off"),
    Command("signoff.send_back", "Send back with notes…", ("B",),
            "on the Sign-off page: return the frame to its annotator with notes pinned to keypoints",
            "Sign-off"),
    Command("signoff.accept_clean", "Accept all without QA flags", ("Shift+A",),
            "accept every handed-in frame that has no QA flag (one's own work is skipped)", "Sign-off"),
    Command("batch.prefill", "Pre-fill unlabelled frames", ("Ctrl+Shift+M",),
            "run the pose model over every frame nobody has labelled yet, in the background", "Assist"),
    Command("batch.learn", "Learn from accepted labels", ("Ctrl+Shift+L",),
            "refit the project's correction of the model from accepted and handed-in labels", "Assist"),
    Command("batch.tune", "Tune the model on accepted labels", ("Ctrl+Shift+U",),
            "re-train the model's heatmap layers on accepted and handed-in labels (needs PyTorch; "
            "kept only if it does better on participants it was not trained on), then pre-fill "
            "untouched frames again", "Assist"),
    Command("batch.export", "Export accepted labels…", ("Ctrl+E",),
            "write accepted labels as COCO keypoints, optionally split by participant and de-identified",
            "Project"),
    Command("project.target", "Study target…", ("Ctrl+Shift+T",),
            "how many accepted frames the study needs (a reviewer or admin sets it)", "Project"),
    Command("help.keys", "Key sheet", ("?", "F1"), "this sheet: every command and its keys", "Help"),
)
BY_ID = {c.id: c for c in COMMANDS}


def _as_list(value) -> list[str]:
    if value is None:
        return []
    if isinstance(value, str):
        return [v for v in value.split("\t") if v] if value else []
    return [str(v) for v in value if str(v)]


class Keys:
    """The key bindings in force: defaults overridden by saved settings."""

    GROUP = "keys"

    def __init__(self, settings: QSettings):
        self.settings = settings
        self.actions: dict[str, QAction] = {}

    def keys(self, cid: str) -> list[str]:
        self.settings.beginGroup(self.GROUP)
        try:
            if self.settings.contains(cid):
                return _as_list(self.settings.value(cid))
        finally:
            self.settings.endGroup()
        return list(BY_ID[cid].keys)

    def set_keys(self, cid: str, keys: list[str]):
        self.settings.beginGroup(self.GROUP)
        # stored tab-separated: a single portable string works the same in every QSettings format
        self.settings.setValue(cid, "\t".join(keys))
        self.settings.endGroup()
        self.settings.sync()
        self.apply(cid)

    def reset(self):
        self.settings.beginGroup(self.GROUP)
        self.settings.remove("")
        self.settings.endGroup()
        self.settings.sync()
        for cid in self.actions:
            self.apply(cid)

    def owner(self, key: str, but: str | None = None) -> str | None:
        """Which command a key belongs to (other than ``but``)."""
        want = QKeySequence(key).toString(QKeySequence.PortableText)
        for c in COMMANDS:
            if c.id == but:
                continue
            if want in (QKeySequence(k).toString(QKeySequence.PortableText) for k in self.keys(c.id)):
                return c.id
        return None

    def bind(self, cid: str, action: QAction):
        self.actions[cid] = action
        action.setShortcutContext(Qt.WindowShortcut)
        self.apply(cid)

    def apply(self, cid: str):
        a = self.actions.get(cid)
        if a is not None:
            a.setShortcuts([QKeySequence(k) for k in self.keys(cid)])
            c = BY_ID[cid]
            a.setToolTip(f"{c.name}: {c.help}")

    def text(self, cid: str) -> str:
        return "  ".join(QKeySequence(k).toString(QKeySequence.NativeText) for k in self.keys(cid))


class KeySheet(QDialog):
    """Every command with its keys. Double-click a row's keys to change them."""

    changed = Signal()

    def __init__(self, keys: Keys, parent=None):
        super().__init__(parent)
        self.keys_ = keys
        self.setWindowTitle("Key sheet")
        self.resize(940, 680)
        lay = QVBoxLayout(self)
        intro = QLabel("Kinemark is meant to be used from the keyboard. To change a command's keys, "
                       "choose its row and press Enter (or double-click it), then press the new key; "
                       "changes are kept for next time.")
        intro.setObjectName("muted")
        intro.setWordWrap(True)
        lay.addWidget(intro)
        self.table = QTableWidget(len(COMMANDS), 3)
        self.table.setHorizontalHeaderLabels(["Command", "Keys", "What it does"])
        self.table.verticalHeader().setVisible(False)
        self.table.setSelectionBehavior(QAbstractItemView.SelectRows)
        self.table.setEditTriggers(QAbstractItemView.NoEditTriggers)
        self.table.horizontalHeader().setSectionResizeMode(2, QHeaderView.Stretch)
        self.table.verticalHeader().setDefaultSectionSize(26)
        self.table.setWordWrap(True)
        self.table.cellDoubleClicked.connect(self._edit_row)
        self.table.installEventFilter(self)      # Enter on a row starts changing its keys
        lay.addWidget(self.table)
        row = QHBoxLayout()
        self.editor = QKeySequenceEdit()
        self.editor.setMaximumSequenceLength(1)
        self.editor.setEnabled(False)
        self.editor.editingFinished.connect(self._commit)
        self.note = QLabel("")
        self.note.setObjectName("muted")
        row.addWidget(QLabel("New key:"))
        row.addWidget(self.editor)
        row.addWidget(self.note, 1)
        reset = QPushButton("Back to the default keys")
        reset.clicked.connect(self._reset)
        row.addWidget(reset)
        lay.addLayout(row)
        bb = QDialogButtonBox(QDialogButtonBox.Close)
        bb.rejected.connect(self.close)
        lay.addWidget(bb)
        self._row = None
        self.fill()

    def fill(self):
        for r, c in enumerate(COMMANDS):
            self.table.setItem(r, 0, QTableWidgetItem(c.name))
            self.table.setItem(r, 1, QTableWidgetItem(self.keys_.text(c.id)))
            self.table.setItem(r, 2, QTableWidgetItem(c.help))
        self.table.resizeColumnToContents(0)
        self.table.resizeColumnToContents(1)
        self.table.resizeRowsToContents()        # long help lines wrap instead of being cut off

    def showEvent(self, event):
        super().showEvent(event)
        self.table.resizeRowsToContents()        # now that the help column has its width

    def eventFilter(self, obj, event):
        from PySide6.QtCore import QEvent
        if obj is self.table and event.type() == QEvent.KeyPress and \
                event.key() in (Qt.Key_Return, Qt.Key_Enter) and self.table.currentRow() >= 0:
            self._edit_row(self.table.currentRow(), 0)
            return True
        return super().eventFilter(obj, event)

    def _edit_row(self, row, _col):
        self._row = row
        self.editor.setEnabled(True)
        self.editor.clear()
        self.editor.setFocus()
        self.note.setText(f"press the new key for “{COMMANDS[row].name}”")

    def _commit(self):
        if self._row is None:
            return
        seq = self.editor.keySequence().toString(QKeySequence.PortableText)
        if not seq:
            return
        self.assign(COMMANDS[self._row].id, seq)

    def assign(self, cid: str, key: str) -> bool:
        other = self.keys_.owner(key, but=cid)
        if other is not None:
            self.note.setText(f"{key} already belongs to “{BY_ID[other].name}”; change that one first")
            return False
        self.keys_.set_keys(cid, [key])
        self.note.setText(f"“{BY_ID[cid].name}” is now {key}")
        self.editor.setEnabled(False)
        self._row = None
        self.fill()
        self.changed.emit()
        return True

    def _reset(self):
        self.keys_.reset()
        self.fill()
        self.note.setText("default keys restored")
        self.changed.emit()
