"""The Keypoints panel: every keypoint of the current frame, its visibility, confidence and source.

Above the table, when there are any: the reviewer's open notes on this frame (each pinned to a
keypoint or to the whole pose), and the QA checks' findings from the last hand-in of this frame.
Both are prompts for the annotator, never verdicts."""
from __future__ import annotations

import html

import numpy as np
from PySide6.QtCore import QPointF, QRectF, QSize, Qt, Signal
from PySide6.QtGui import QBrush, QColor, QIcon, QPainter, QPixmap, QPolygonF
from PySide6.QtWidgets import (QAbstractItemView, QHeaderView, QLabel, QTableWidget, QTableWidgetItem,
                               QVBoxLayout, QWidget)

from .. import theme

VIS_WORDS = {2: "visible", 1: "occluded", 0: "not in frame"}
MACHINE = ("model", "adapted", "propagated")


_ICONS: dict = {}


def _swatch(colour: str, machine: bool, v: int) -> QIcon:
    key = (colour, machine, v)
    icon = _ICONS.get(key)
    if icon is None:
        icon = _ICONS[key] = _draw_swatch(colour, machine, v)
    return icon


def _draw_swatch(colour: str, machine: bool, v: int) -> QIcon:
    pm = QPixmap(16, 16)
    pm.fill(Qt.transparent)
    p = QPainter(pm)
    p.setRenderHint(QPainter.Antialiasing)
    c = QColor(colour)
    if v == 0:
        c.setAlpha(90)
    p.setPen(QColor(theme.BLACK))
    p.setBrush(QBrush(c) if v == 2 else Qt.NoBrush)
    if v != 2:
        pen = p.pen()
        pen.setColor(c)
        pen.setWidthF(2.0)
        p.setPen(pen)
    r = QRectF(3, 3, 10, 10)
    if machine:
        p.drawPolygon(QPolygonF([QPointF(8, 1.5), QPointF(14.5, 8), QPointF(8, 14.5), QPointF(1.5, 8)]))
    else:
        p.drawEllipse(r)
    p.end()
    return QIcon(pm)


class KeypointPanel(QWidget):
    picked = Signal(int)

    def __init__(self, parent=None):
        super().__init__(parent)
        lay = QVBoxLayout(self)
        lay.setContentsMargins(8, 8, 8, 8)
        lay.setSpacing(6)
        title = QLabel("Keypoints")
        title.setObjectName("heading")
        lay.addWidget(title)
        self.summary = QLabel("")
        self.summary.setObjectName("muted")
        self.summary.setWordWrap(True)
        lay.addWidget(self.summary)
        self.notes_box = QLabel("")
        self.notes_box.setObjectName("notes")
        self.notes_box.setWordWrap(True)
        self.notes_box.setTextFormat(Qt.RichText)
        self.notes_box.setVisible(False)
        lay.addWidget(self.notes_box)
        self.checks_box = QLabel("")
        self.checks_box.setObjectName("checks")
        self.checks_box.setWordWrap(True)
        self.checks_box.setTextFormat(Qt.RichText)
        self.checks_box.setVisible(False)
        lay.addWidget(self.checks_box)
        self.table = QTableWidget(0, 4)
        self.table.setHorizontalHeaderLabels(["Keypoint", "Visibility", "Conf.", "Source"])
        self.table.verticalHeader().setVisible(False)
        self.table.verticalHeader().setDefaultSectionSize(22)
        self.table.setSelectionBehavior(QAbstractItemView.SelectRows)
        self.table.setSelectionMode(QAbstractItemView.SingleSelection)
        self.table.setEditTriggers(QAbstractItemView.NoEditTriggers)
        self.table.setFocusPolicy(Qt.NoFocus)      # keys stay with the workspace
        self.table.setIconSize(QSize(16, 16))
        self.table.setShowGrid(False)
        hh = self.table.horizontalHeader()
        # column widths are set once per skeleton (see set_skeleton): resizing to contents
        # on every change cost ~17 ms per frame switch, measured in the workspace benchmark
        for c in (0, 1, 2):
            hh.setSectionResizeMode(c, QHeaderView.Fixed)
        hh.setSectionResizeMode(3, QHeaderView.Stretch)
        self.table.cellClicked.connect(lambda r, c: self.picked.emit(r))
        lay.addWidget(self.table, 1)
        self.legend = QLabel("●  a person's point\n◆  model or tracker, not yet confirmed\n"
                             "◈  adapted by the project's correction (white centre)\n"
                             "filled: visible · ring: occluded · ■ a reviewer's note (point at it to read)")
        self.legend.setObjectName("muted")
        self.legend.setWordWrap(True)
        lay.addWidget(self.legend)
        self.hint = QLabel("")
        self.hint.setObjectName("hint")
        self.hint.setWordWrap(True)
        lay.addWidget(self.hint)
        self._names: tuple[str, ...] = ()
        self._rows: dict = {}
        self._noted: dict[int, str] = {}
        self._faint, self._text = QColor(theme.FAINT), QColor(theme.TEXT)

    def set_skeleton(self, names):
        self._names = tuple(names)
        self._rows = {}
        self._noted = {}
        self.table.setRowCount(len(names))
        for r, n in enumerate(names):
            for c in range(4):
                self.table.setItem(r, c, QTableWidgetItem(""))
            self.table.item(r, 0).setText(n.replace("_", " "))
            self.table.item(r, 0).setIcon(_swatch(theme.SIDE_COLOURS[theme.side_of(n)], False, 2))
            self.table.item(r, 2).setTextAlignment(Qt.AlignRight | Qt.AlignVCenter)
        self._fit_columns()

    def _fit_columns(self):
        """Size the fixed columns once, for the widest text each will hold (Qt measures)."""
        if not self._names:
            return
        samples = {1: max(VIS_WORDS.values(), key=len), 2: "0.00", 3: "propagated"}
        keep = {c: self.table.item(0, c).text() for c in samples}
        for c, text in samples.items():
            self.table.item(0, c).setText(text)
        hh = self.table.horizontalHeader()
        for c in (0, 1, 2):
            self.table.resizeColumnToContents(c)
        for c, text in keep.items():
            self.table.item(0, c).setText(text)
        hh.setSectionResizeMode(3, QHeaderView.Stretch)

    def set_points(self, kps: np.ndarray, sources, confidence, current: int):
        for r, name in enumerate(self._names):
            v = int(kps[r, 2])
            src = sources[r]
            conf = "—" if confidence is None or not np.isfinite(confidence[r]) else f"{confidence[r]:.2f}"
            row = (v, src, conf)
            if self._rows.get(r) == row:          # unchanged: leave the cells alone (cheaper)
                continue
            self._rows[r] = row
            colour = theme.SIDE_COLOURS[theme.side_of(name)]
            self.table.item(r, 0).setIcon(_swatch(colour, src in MACHINE, v))
            self.table.item(r, 1).setText(VIS_WORDS[v])
            self.table.item(r, 2).setText(conf)
            self.table.item(r, 3).setText(src)
            fg = self._faint if v == 0 else self._text
            for c in range(4):
                self.table.item(r, c).setForeground(fg)
        self.set_current(current)

    def _label(self, r: int) -> str:
        return self._names[r].replace("_", " ")

    def set_notes(self, notes):
        """The reviewer's open notes: (keypoint index or None, text, author name or None) triples."""
        notes = list(notes)
        by_kp: dict[int, list[str]] = {}
        lines = []
        for idx, text, author in notes:
            where = "whole pose" if idx is None else self._label(idx)
            who = f" <span style='color:{theme.FAINT}'>({html.escape(author)})</span>" if author else ""
            lines.append(f"<span style='color:{theme.VERMILLION}'>■</span> <b>{html.escape(where)}</b>: "
                         f"{html.escape(text)}{who}")
            if idx is not None:
                by_kp.setdefault(idx, []).append(text)
        if lines:
            self.notes_box.setText(f"<span style='color:{theme.TEXT}'>Reviewer's notes</span><br>"
                                   + "<br>".join(lines))
        self.notes_box.setVisible(bool(lines))
        noted = {i: "Reviewer's note: " + " · ".join(t) for i, t in by_kp.items()}
        for r in set(self._noted) | set(noted):
            if r >= self.table.rowCount():
                continue
            item = self.table.item(r, 0)
            item.setText(self._label(r) + ("  ■" if r in noted else ""))
            for c in range(4):
                self.table.item(r, c).setToolTip(noted.get(r, ""))
        self._noted = noted

    def notes_text(self) -> str:
        return self.notes_box.text() if self.notes_box.isVisible() else ""

    def set_checks(self, flags, title: str = "Checks at the last hand-in"):
        """QA findings: (severity, message) pairs; None or empty hides the box."""
        flags = list(flags or ())
        if not flags:
            self.checks_box.setVisible(False)
            self.checks_box.setText("")
            return
        colour = {"error": theme.VERMILLION, "warning": theme.YELLOW}
        lines = [f"<span style='color:{colour.get(sev, theme.MUTED)}'>{html.escape(sev)}</span> "
                 f"{html.escape(msg)}" for sev, msg in flags]
        self.checks_box.setText(f"<span style='color:{theme.TEXT}'>{html.escape(title)}</span> "
                                f"<span style='color:{theme.FAINT}'>· prompts to look, not verdicts</span><br>"
                                + "<br>".join(lines))
        self.checks_box.setVisible(True)

    def checks_text(self) -> str:
        return self.checks_box.text() if self.checks_box.isVisible() else ""

    def set_current(self, index: int):
        if 0 <= index < self.table.rowCount() and self.table.currentRow() != index:
            self.table.selectRow(index)
            self.table.scrollToItem(self.table.item(index, 0))

    def current_row(self) -> int:
        return self.table.currentRow()

    def row_text(self, row: int) -> tuple[str, str, str, str]:
        return tuple(self.table.item(row, c).text() for c in range(4))
