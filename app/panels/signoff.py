"""The Sign-off page's two side panels.

Left, "Waiting for sign-off": the frames handed in, riskiest first (core.review.review_queue),
each with the reasons it is where it is. Right, the frame's file: who labelled it, its QA flags
with the keypoints they name, earlier notes, and the reviewer's two decisions. The frame itself
is shown in the middle by the workspace's one frame view.
"""
from __future__ import annotations

import html

from PySide6.QtCore import Qt, Signal
from PySide6.QtGui import QImage
from PySide6.QtWidgets import QHBoxLayout, QLabel, QListWidgetItem, QPushButton, QScrollArea, QVBoxLayout, QWidget

from .. import theme
from .common import entry_list, fill_entries, list_panel_head, select_entry, thumbnail_icon


def flag_text(flag, names) -> str:
    """A QA flag in words, led by the keypoints it is about (unless its message already is)."""
    kp = [names[i].replace("_", " ") for i in flag.keypoints if 0 <= i < len(names)]
    msg = flag.message.replace("_", " ")
    if kp and not msg.startswith(kp[0]):
        return f"{', '.join(kp)}: {msg}"
    return msg


def reasons_text(item) -> str:
    """One line for the list: the risk and its reasons in plain words."""
    why = "; ".join(item.reasons) if item.reasons else "nothing unusual found"
    return f"risk {item.risk:.2f} · {why}"


class SignoffList(QWidget):
    chosen = Signal(int)          # annotation id
    refresh = Signal()
    accept_clean = Signal()

    def __init__(self, parent=None):
        super().__init__(parent)
        lay, self.reload = list_panel_head(
            self, "Waiting for sign-off", "Refresh",
            "read the handed-in frames again (someone else may have handed in or signed off)", self.refresh)
        self.count = QLabel("")
        self.count.setObjectName("muted")
        self.count.setWordWrap(True)
        lay.addWidget(self.count)
        self.clean = QPushButton("Accept all without QA flags")
        self.clean.setFocusPolicy(Qt.NoFocus)
        self.clean.clicked.connect(self.accept_clean)
        lay.addWidget(self.clean)
        self.list = entry_list(self.chosen)
        lay.addWidget(self.list, 1)
        self.items: list = []
        self._rows: dict[int, QListWidgetItem] = {}

    def set_items(self, items, describe):
        self.items = list(items)
        fill_entries(self.list, self._rows, self.items, key=lambda it: it.annotation_id, describe=describe,
                     reasons=reasons_text)
        self._count()

    def _count(self):
        n = len(self.items)
        clean = sum(1 for it in self.items if not it.flags)
        if n:
            self.count.setText(f"{n} frame(s) handed in, riskiest first · {clean} without QA flags")
        else:
            self.count.setText("Nothing is waiting: no frame is handed in.")
        self.clean.setEnabled(clean > 0)

    def remove(self, annotation_id: int):
        self.items = [it for it in self.items if it.annotation_id != annotation_id]
        row = self._rows.pop(int(annotation_id), None)
        if row is not None:
            self.list.takeItem(self.list.row(row))
        self._count()

    def item(self, annotation_id: int):
        return next((it for it in self.items if it.annotation_id == annotation_id), None)

    def item_for_frame(self, frame_id: int):
        return next((it for it in self.items if it.frame_id == frame_id), None)

    def after(self, annotation_id: int | None):
        """The item after this one, wrapping round (the first when it is not listed); None when
        no other item is listed."""
        ids = [it.annotation_id for it in self.items]
        if annotation_id not in ids:
            return self.items[0] if self.items else None
        i = ids.index(annotation_id)
        others = self.items[i + 1:] + self.items[:i]
        return others[0] if others else None

    def set_current(self, annotation_id: int | None):
        select_entry(self.list, self._rows.get(annotation_id) if annotation_id is not None else None)

    def set_thumbnail(self, frame_id: int, image: QImage):
        for it in self.items:
            if it.frame_id == frame_id:
                row = self._rows.get(it.annotation_id)
                if row is not None:
                    row.setIcon(thumbnail_icon(image))

    def clear(self):
        self.items = []
        self.list.clear()
        self._rows.clear()
        self.count.setText("")


def _section(title: str) -> QLabel:
    t = QLabel(title)
    t.setObjectName("heading")
    t.setContentsMargins(0, 8, 0, 0)
    return t


def _body() -> QLabel:
    b = QLabel("")
    b.setWordWrap(True)
    b.setTextFormat(Qt.RichText)
    b.setTextInteractionFlags(Qt.TextSelectableByMouse)
    return b


class SignoffPanel(QWidget):
    """The frame on show: why it is listed, its QA flags, earlier notes, and the decisions."""

    accept = Signal()
    send_back = Signal()

    def __init__(self, parent=None):
        super().__init__(parent)
        outer = QVBoxLayout(self)
        outer.setContentsMargins(8, 8, 8, 8)
        outer.setSpacing(6)
        title = QLabel("Sign-off")
        title.setObjectName("heading")
        outer.addWidget(title)
        self.who = QLabel("")
        self.who.setObjectName("muted")
        self.who.setWordWrap(True)
        outer.addWidget(self.who)
        scroll = QScrollArea()
        scroll.setWidgetResizable(True)
        scroll.setFrameShape(QScrollArea.NoFrame)
        inner = QWidget()
        inner.setObjectName("page")
        lay = QVBoxLayout(inner)
        lay.setContentsMargins(0, 0, 4, 0)
        lay.setSpacing(4)
        self.sections = [_section("Why it is listed"), _section("QA flags"), _section("Earlier notes")]
        self.reasons, self.flags, self.notes = _body(), _body(), _body()
        for head, body in zip(self.sections, (self.reasons, self.flags, self.notes)):
            lay.addWidget(head)
            lay.addWidget(body)
        lay.addStretch(1)
        scroll.setWidget(inner)
        outer.addWidget(scroll, 1)
        self.may = QLabel("")
        self.may.setObjectName("muted")
        self.may.setWordWrap(True)
        outer.addWidget(self.may)
        row = QHBoxLayout()
        self.accept_button = QPushButton("Accept")
        self.accept_button.setFocusPolicy(Qt.NoFocus)
        self.accept_button.clicked.connect(self.accept)
        self.back_button = QPushButton("Send back with notes…")
        self.back_button.setFocusPolicy(Qt.NoFocus)
        self.back_button.clicked.connect(self.send_back)
        row.addWidget(self.accept_button, 1)
        row.addWidget(self.back_button, 1)
        outer.addLayout(row)
        self.keys = QLabel("")
        self.keys.setObjectName("hint")
        self.keys.setWordWrap(True)
        outer.addWidget(self.keys)
        self.show_item(None)

    def show_item(self, item, *, names=(), users=None, notes=(), may: str = "", state: str | None = None,
                  can_decide: bool = True):
        """``item``: a core.review.QueueItem (None: nothing chosen). ``notes``: FrameNote list.
        ``can_decide``: the person working may accept or send back this frame (``may`` says why not)."""
        on = item is not None
        self.accept_button.setEnabled(on and can_decide)
        self.back_button.setEnabled(on and can_decide)
        for head in self.sections:          # no empty headings when no frame is chosen
            head.setVisible(on)
        if not on:
            self.who.setText("Choose a frame on the left." if state is None else
                             f"This frame is {theme.STATE_WORDS.get(state, state)}, not waiting for sign-off.")
            for b in (self.reasons, self.flags, self.notes):
                b.setText("")
            self.may.setText("")
            return
        users = users or {}
        who = users.get(item.author_id, "nobody") if item.author_id is not None else "the model only"
        bits = [f"labelled by {who}"]
        if item.seconds is not None:
            bits.append(f"{item.seconds:.0f} s of labelling in the last round")
        if item.model_disagreement is not None:
            bits.append(f"OKS against the model's proposal {1 - item.model_disagreement:.2f}")
        self.who.setText(" · ".join(bits))
        self.reasons.setText(html.escape("; ".join(item.reasons)) if item.reasons else
                             f"<span style='color:{theme.MUTED}'>nothing unusual found (risk {item.risk:.2f})</span>")
        if item.flags:
            colour = {"error": theme.VERMILLION, "warning": theme.YELLOW}
            lines = []
            for fl in item.flags:
                lines.append(f"<span style='color:{colour.get(fl.severity, theme.MUTED)}'>{fl.severity}</span> "
                             + html.escape(flag_text(fl, names)))
            self.flags.setText("<br>".join(lines))
        else:
            self.flags.setText(f"<span style='color:{theme.MUTED}'>none</span>")
        if notes:
            lines = []
            for n in notes:
                where = "whole pose" if n.keypoint_name is None else n.keypoint_name.replace("_", " ")
                state_ = "open" if n.open else "addressed by resubmitting"
                lines.append(f"<b>{html.escape(where)}</b>: {html.escape(n.note.text)} "
                             f"<span style='color:{theme.FAINT}'>({html.escape(n.author_name or '?')}, {state_})</span>")
            self.notes.setText("<br>".join(lines))
        else:
            self.notes.setText(f"<span style='color:{theme.MUTED}'>none</span>")
        self.may.setText(may)
