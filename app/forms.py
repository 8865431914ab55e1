"""Dialogs that ask for the details of a decision: who is working, the notes that go with
sending a frame back, and what an export writes.

They only collect answers; the caller hands them to core, which checks and applies them.
"""
from __future__ import annotations

import math

import numpy as np
from PySide6.QtCore import QPointF, QRectF, Qt, Signal
from PySide6.QtGui import QColor, QPainter, QPen
from PySide6.QtWidgets import (QAbstractItemView, QCheckBox, QComboBox, QDialog, QDoubleSpinBox, QFormLayout,
                               QGridLayout, QHBoxLayout, QLabel, QLineEdit, QListWidget, QListWidgetItem,
                               QPushButton, QSpinBox, QVBoxLayout, QWidget)

from . import theme
from .dialogs import CAUTION, add_ok_cancel, folder_row, muted_note

WHOLE_POSE = "whole pose"


# ---- who is working --------------------------------------------------------------------------

class WhoDialog(QDialog):
    """The project's people and their roles; the person picks who they are."""

    def __init__(self, users, current: str | None, project_name: str, parent=None):
        super().__init__(parent)
        self.setWindowTitle("Who is working?")
        lay = QVBoxLayout(self)
        head = QLabel(f"<b>{project_name}</b> has more than one person. Choose who you are: every change "
                      "you make is recorded under this name, and a reviewer never signs off their own work.")
        head.setWordWrap(True)
        lay.addWidget(head)
        self.list = QListWidget()
        self.list.setSelectionMode(QAbstractItemView.SingleSelection)
        for u in users:
            it = QListWidgetItem(f"{u.name}  ·  {u.role}")
            it.setData(Qt.UserRole, u.name)
            self.list.addItem(it)
            if u.name == current:
                self.list.setCurrentItem(it)
        if self.list.currentItem() is None and self.list.count():
            self.list.setCurrentRow(0)
        self.list.itemDoubleClicked.connect(lambda *_: self.accept())
        lay.addWidget(self.list)
        lay.addWidget(muted_note("Kinemark remembers the choice for this project on this computer; change it "
                                 "with Project ▸ Who is working…"))
        add_ok_cancel(self, lay, "That's me")
        self.resize(440, 320)

    def chosen(self) -> str | None:
        it = self.list.currentItem()
        return None if it is None else str(it.data(Qt.UserRole))


# ---- notes for sending a frame back --------------------------------------------------------

class PosePicker(QWidget):
    """The frame's pose drawn small: click a keypoint to pin a note to it."""

    picked = Signal(int)

    def __init__(self, names, edges, keypoints, parent=None):
        super().__init__(parent)
        self.names = tuple(names)
        self.edges = tuple(edges)
        self.kps = np.asarray(keypoints, float).reshape(-1, 3)
        self.current: int | None = None
        self.marked: set[int] = set()
        self.setMinimumSize(220, 260)
        self.setToolTip("click a keypoint to pin the note to it")

    def _layout(self):
        shown = self.kps[:, 2] > 0
        if not shown.any():
            return None
        xy = self.kps[shown, :2]
        lo, hi = xy.min(axis=0), xy.max(axis=0)
        span = np.maximum(hi - lo, 1.0)
        r = QRectF(self.rect()).adjusted(18, 18, -18, -18)
        s = min(r.width() / span[0], r.height() / span[1])
        off = np.array([r.left() + (r.width() - s * span[0]) / 2, r.top() + (r.height() - s * span[1]) / 2])
        return lambda p: QPointF(*(off + (np.asarray(p, float) - lo) * s))

    def paintEvent(self, e):
        p = QPainter(self)
        p.setRenderHint(QPainter.Antialiasing)
        p.fillRect(self.rect(), QColor(theme.BASE))
        to = self._layout()
        if to is None:
            p.setPen(QColor(theme.MUTED))
            p.drawText(self.rect(), Qt.AlignCenter | Qt.TextWordWrap, "no keypoints placed:\nnotes go to the whole pose")
            p.end()
            return
        pen = QPen(theme.qcolor("#ffffff", 110), 1.5)
        p.setPen(pen)
        for a, b in self.edges:
            if self.kps[a, 2] > 0 and self.kps[b, 2] > 0:
                p.drawLine(to(self.kps[a, :2]), to(self.kps[b, :2]))
        for i, n in enumerate(self.names):
            if self.kps[i, 2] <= 0:
                continue
            c = to(self.kps[i, :2])
            if i == self.current:
                p.setPen(QPen(QColor("#ffffff"), 2.0))
                p.setBrush(Qt.NoBrush)
                p.drawEllipse(c, 9, 9)
            p.setPen(QPen(QColor(theme.BLACK), 1.2))
            p.setBrush(QColor(theme.SIDE_COLOURS[theme.side_of(n)]))
            p.drawEllipse(c, 5, 5)
            if i in self.marked:
                p.setBrush(QColor(theme.VERMILLION))
                p.drawRect(QRectF(c.x() + 5, c.y() - 10, 5.5, 5.5))
        p.end()

    def index_at(self, pos: QPointF) -> int | None:
        to = self._layout()
        if to is None:
            return None
        best, best_d = None, 14.0
        for i in range(len(self.names)):
            if self.kps[i, 2] <= 0:
                continue
            q = to(self.kps[i, :2])
            d = math.hypot(q.x() - pos.x(), q.y() - pos.y())
            if d < best_d:
                best, best_d = i, d
        return best

    def point_of(self, index: int) -> QPointF | None:
        to = self._layout()
        return None if to is None or self.kps[index, 2] <= 0 else to(self.kps[index, :2])

    def mousePressEvent(self, e):
        i = self.index_at(e.position())
        if i is not None:
            self.picked.emit(i)

    def set_current(self, index: int | None):
        self.current = index
        self.update()


class NotesDialog(QDialog):
    """Send a frame back: one or more notes, each about a keypoint or about the whole pose."""

    def __init__(self, names, edges, keypoints, current: int | None = None, frame_text: str = "", parent=None):
        super().__init__(parent)
        self.setWindowTitle("Send back with notes")
        self.names = tuple(names)
        self._notes: list[tuple[int | None, str]] = []
        lay = QHBoxLayout(self)
        self.picker = PosePicker(names, edges, keypoints)
        self.picker.picked.connect(self._pick)
        lay.addWidget(self.picker, 2)
        right = QVBoxLayout()
        head = QLabel(f"Sending back {frame_text}" if frame_text else "Sending this frame back")
        head.setWordWrap(True)
        right.addWidget(head)
        form = QFormLayout()
        self.about = QComboBox()
        self.about.addItem(WHOLE_POSE, None)
        for i, n in enumerate(self.names):
            self.about.addItem(n.replace("_", " "), i)
        self.about.currentIndexChanged.connect(lambda _i: self.picker.set_current(self.about.currentData()))
        form.addRow("About", self.about)
        self.text = QLineEdit()
        self.text.setPlaceholderText("what to look at, e.g. the wrist is on the sleeve edge")
        self.text.returnPressed.connect(self.add_note)
        form.addRow("Note", self.text)
        right.addLayout(form)
        row = QHBoxLayout()
        self.add_button = QPushButton("Add this note")
        self.add_button.setAutoDefault(False)
        self.add_button.clicked.connect(self.add_note)
        row.addStretch(1)
        row.addWidget(self.add_button)
        right.addLayout(row)
        right.addWidget(QLabel("Notes to send"))
        self.list = QListWidget()
        right.addWidget(self.list, 1)
        rm = QPushButton("Remove the selected note")
        rm.setAutoDefault(False)
        rm.clicked.connect(self._remove)
        right.addWidget(rm)
        right.addWidget(muted_note("Pick a keypoint in the picture or the list, type a note and press Enter "
                                   "to add it; add as many as needed, then Ctrl+Enter sends the frame back. "
                                   "The annotator sees each note on its keypoint."))
        self.buttons = add_ok_cancel(self, right, "Send back", self._finish)
        lay.addLayout(right, 3)
        if current is not None and 0 <= current < len(self.names):
            self.about.setCurrentIndex(current + 1)
        self.picker.set_current(self.about.currentData())
        self.text.setFocus()
        self.resize(720, 420)
        self._update()

    def keyPressEvent(self, event):
        # Enter adds the typed note (the text field's returnPressed) and never sends the frame
        # back, as the dialog's default button would; Ctrl+Enter sends
        if event.key() in (Qt.Key_Return, Qt.Key_Enter):
            event.accept()
            if event.modifiers() & Qt.ControlModifier:
                self._finish()
            return
        super().keyPressEvent(event)

    def _pick(self, i: int):
        self.about.setCurrentIndex(i + 1)
        self.text.setFocus()

    def add_note(self, *_):
        text = self.text.text().strip()
        if not text:
            return
        idx = self.about.currentData()
        self._notes.append((idx, text))
        where = WHOLE_POSE if idx is None else self.names[idx].replace("_", " ")
        self.list.addItem(f"{where}: {text}")
        self.text.clear()
        self._update()

    def _remove(self):
        r = self.list.currentRow()
        if 0 <= r < len(self._notes):
            self._notes.pop(r)
            self.list.takeItem(r)
            self._update()

    def _update(self):
        self.picker.marked = {i for i, _ in self._notes if i is not None}
        self.picker.update()

    def _finish(self):
        self.add_note()                 # a note typed but not yet added goes too
        if not self._notes:
            self.text.setPlaceholderText("a frame goes back with at least one note")
            self.text.setFocus()
            return
        self.accept()

    def notes(self) -> list[tuple[int | None, str]]:
        return list(self._notes)


# ---- export -----------------------------------------------------------------------------------

class ExportDialog(QDialog):
    """Where accepted labels go and how: one COCO file, or a bundle split by participant."""

    def __init__(self, default_folder: str = "", deid_caution: str = "", parent=None):
        super().__init__(parent)
        self.setWindowTitle("Export accepted labels")
        lay = QVBoxLayout(self)
        form = QFormLayout()
        self.folder = QLineEdit(default_folder)
        self.folder.setPlaceholderText("a new or empty folder")
        form.addRow("Folder", folder_row(self, self.folder, "Export folder"))
        lay.addLayout(form)

        self.split = QCheckBox("Split by participant (each participant in exactly one part)")
        lay.addWidget(self.split)
        grid = QGridLayout()
        grid.setContentsMargins(24, 0, 0, 0)
        self.ratios = []
        for c, (name, value) in enumerate((("training", 0.70), ("validation", 0.15), ("test", 0.15))):
            box = QDoubleSpinBox()
            box.setRange(0.0, 1.0)
            box.setSingleStep(0.05)
            box.setDecimals(2)
            box.setValue(value)
            grid.addWidget(QLabel(name), 0, c)
            grid.addWidget(box, 1, c)
            self.ratios.append(box)
        self.seed = QSpinBox()
        self.seed.setRange(0, 2**31 - 1)
        grid.addWidget(QLabel("seed"), 0, 3)
        grid.addWidget(self.seed, 1, 3)
        self.split_box = QWidget()
        self.split_box.setLayout(grid)
        lay.addWidget(self.split_box)

        self.deid = QCheckBox("De-identify: blur faces, pseudonymous names, no file names, folders or dates")
        lay.addWidget(self.deid)
        self.deid_note = muted_note(deid_caution)
        self.deid_note.setContentsMargins(24, 0, 0, 0)
        lay.addWidget(self.deid_note)

        self.what = QLabel("")
        self.what.setWordWrap(True)
        lay.addWidget(self.what)
        lay.addWidget(muted_note(CAUTION))
        add_ok_cancel(self, lay, "Export", self._finish)
        self.split.toggled.connect(self._update)
        self.deid.toggled.connect(self._update)
        self._update()
        self.setMinimumWidth(640)
        self.adjustSize()

    @property
    def bundle(self) -> bool:
        return self.split.isChecked() or self.deid.isChecked()

    def _update(self, *_):
        self.split_box.setEnabled(self.split.isChecked())
        if self.bundle:
            self.what.setText("Writes a bundle into the folder (which must be new or empty): a COCO keypoints "
                              "file per part with its frames, tables and a manifest with checksums.")
        else:
            self.what.setText("Writes one COCO keypoints file, accepted.coco.json, into the folder "
                              "(labels only, no frames).")

    def _finish(self):
        if not self.folder.text().strip():
            self.folder.setPlaceholderText("choose a folder first")
            self.folder.setFocus()
            return
        self.accept()

    def settings(self) -> dict:
        """What to export: folder, bundle (bool), ratios (3 floats), seed, deidentify."""
        ratios = tuple(b.value() for b in self.ratios) if self.split.isChecked() else (1.0, 0.0, 0.0)
        return {"folder": self.folder.text().strip(), "bundle": self.bundle, "ratios": ratios,
                "seed": self.seed.value(), "deidentify": self.deid.isChecked()}
