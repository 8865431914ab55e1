"""Small dialogs: how to sample added videos, a new project, About."""
from __future__ import annotations

from PySide6.QtWidgets import (QButtonGroup, QComboBox, QDialog, QDialogButtonBox, QDoubleSpinBox,
                               QFileDialog, QFormLayout, QGridLayout, QHBoxLayout, QLabel, QLineEdit,
                               QMessageBox, QPushButton, QRadioButton, QSpinBox, QVBoxLayout)

from ..core.media import Sampling
from ..core.skeleton import BUILTIN

CAUTION = ("Labels and model output made with Kinemark are research data, not a diagnosis, and not fit "
           "for clinical decisions about a patient. The study's protocol, its ethics approval and local "
           "privacy law always come first.")
CAUTION_SHORT = "Research data, not a diagnosis · the study protocol, ethics approval and privacy law come first"


def add_ok_cancel(dialog: QDialog, lay, ok_text: str, on_ok=None) -> QDialogButtonBox:
    """OK and Cancel at the foot of ``lay``: OK reads ``ok_text`` and calls ``on_ok`` (by default the
    dialog's accept), Cancel rejects the dialog."""
    bb = QDialogButtonBox(QDialogButtonBox.Ok | QDialogButtonBox.Cancel)
    bb.button(QDialogButtonBox.Ok).setText(ok_text)
    bb.accepted.connect(on_ok if on_ok is not None else dialog.accept)
    bb.rejected.connect(dialog.reject)
    lay.addWidget(bb)
    return bb


def muted_note(text: str) -> QLabel:
    """A wrapped line of secondary text."""
    note = QLabel(text)
    note.setObjectName("muted")
    note.setWordWrap(True)
    return note


def folder_row(dialog: QDialog, edit: QLineEdit, caption: str) -> QHBoxLayout:
    """``edit`` with a Choose… button beside it that asks for a folder (``caption`` on the
    chooser) and puts it in ``edit``."""
    row = QHBoxLayout()
    pick = QPushButton("Choose…")
    pick.clicked.connect(lambda *_: _choose_folder(dialog, edit, caption))
    row.addWidget(edit, 1)
    row.addWidget(pick)
    return row


def _choose_folder(dialog: QDialog, edit: QLineEdit, caption: str):
    d = QFileDialog.getExistingDirectory(dialog, caption)
    if d:
        edit.setText(d)


class SamplingDialog(QDialog):
    """Which frames of the dropped videos to keep, and whose videos they are."""

    def __init__(self, names: list[str], has_video: bool, parent=None):
        super().__init__(parent)
        self.setWindowTitle("Add to the project")
        lay = QVBoxLayout(self)
        shown = ", ".join(names[:4]) + (f" and {len(names) - 4} more" if len(names) > 4 else "")
        head = QLabel(f"Adding {shown}.")
        head.setWordWrap(True)
        lay.addWidget(head)
        grid = QGridLayout()
        self.group = QButtonGroup(self)
        self.r_every, self.r_seconds, self.r_count = (QRadioButton("one frame in every"),
                                                      QRadioButton("one frame every"),
                                                      QRadioButton("in all"))
        self.every = QSpinBox(); self.every.setRange(1, 100000); self.every.setValue(5)
        self.seconds = QDoubleSpinBox(); self.seconds.setRange(0.1, 3600); self.seconds.setValue(0.5)
        self.seconds.setDecimals(2)
        self.count = QSpinBox(); self.count.setRange(1, 1000000); self.count.setValue(50)
        for r, (radio, box, unit) in enumerate(((self.r_every, self.every, "frames"),
                                                (self.r_seconds, self.seconds, "seconds"),
                                                (self.r_count, self.count, "frames, evenly spaced"))):
            self.group.addButton(radio, r)
            grid.addWidget(radio, r, 0)
            grid.addWidget(box, r, 1)
            grid.addWidget(QLabel(unit), r, 2)
        self.r_every.setChecked(True)
        if has_video:
            lay.addWidget(QLabel("Keep, from each video:"))
            lay.addLayout(grid)
        form = QFormLayout()
        self.participant = QLineEdit()
        self.participant.setPlaceholderText("pseudonymous code, e.g. QB-07 (optional)")
        self.session = QSpinBox(); self.session.setRange(1, 999)
        form.addRow("Participant", self.participant)
        form.addRow("Session", self.session)
        lay.addLayout(form)
        add_ok_cancel(self, lay, "Add")

    def sampling(self) -> Sampling:
        b = self.group.checkedId()
        if b == 0:
            return Sampling(every=self.every.value())
        if b == 1:
            return Sampling(seconds=self.seconds.value())
        return Sampling(count=self.count.value())

    def who(self) -> tuple[str | None, int | None]:
        code = self.participant.text().strip() or None
        return code, (self.session.value() if code else None)


class NewProjectDialog(QDialog):
    def __init__(self, parent=None):
        super().__init__(parent)
        self.setWindowTitle("New project")
        lay = QVBoxLayout(self)
        form = QFormLayout()
        self.folder = QLineEdit()
        self.folder.setPlaceholderText("an empty folder for the project")
        form.addRow("Folder", folder_row(self, self.folder, "Project folder"))
        self.skeleton = QComboBox()
        for name in BUILTIN:
            self.skeleton.addItem(f"{name} (built in)", name)
        self.skeleton.addItem("a skeleton file (JSON)…", "")
        self.skeleton.activated.connect(self._maybe_file)
        form.addRow("Skeleton", self.skeleton)
        lay.addLayout(form)
        lay.addWidget(muted_note(CAUTION))
        add_ok_cancel(self, lay, "Create")
        self.skeleton_file = None

    def _maybe_file(self, i):
        if self.skeleton.itemData(i) == "":
            f, _ = QFileDialog.getOpenFileName(self, "Skeleton file", "", "Skeleton (*.json)")
            if f:
                self.skeleton_file = f
                self.skeleton.setItemText(i, f)
            else:
                self.skeleton.setCurrentIndex(0)

    def skeleton_spec(self) -> str:
        data = self.skeleton.currentData()
        return data if data else (self.skeleton_file or "coco17")


def about(parent):
    box = QMessageBox(parent)
    box.setWindowTitle("About Kinemark")
    box.setText("<b>Kinemark</b> — keypoint labelling for clinical movement research.")
    box.setInformativeText(CAUTION + "\n\nEvery change is saved the moment you make it.")
    box.open()
    return box
