"""The Keypoints panel: every keypoint of the current frame, its visibility, confidence and source."""
from __future__ import annotations

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
        for c in (0, 1, 2):
            hh.setSectionResizeMode(c, QHeaderView.ResizeToContents)
        hh.setSectionResizeMode(3, QHeaderView.Stretch)
        self.table.cellClicked.connect(lambda r, c: self.picked.emit(r))
        lay.addWidget(self.table, 1)
        self.legend = QLabel("●  a person's point\n◆  model or tracker, not yet confirmed\n"
                             "filled: visible · ring: occluded")
        self.legend.setObjectName("muted")
        self.legend.setWordWrap(True)
        lay.addWidget(self.legend)
        self.hint = QLabel("")
        self.hint.setObjectName("hint")
        self.hint.setWordWrap(True)
        lay.addWidget(self.hint)
        self._names: tuple[str, ...] = ()
        self._rows: dict = {}
        self._faint, self._text = QColor(theme.FAINT), QColor(theme.TEXT)

    def set_skeleton(self, names):
        self._names = tuple(names)
        self._rows = {}
        self.table.setRowCount(len(names))
        for r, n in enumerate(names):
            for c in range(4):
                self.table.setItem(r, c, QTableWidgetItem(""))
            self.table.item(r, 0).setText(n.replace("_", " "))
            self.table.item(r, 2).setTextAlignment(Qt.AlignRight | Qt.AlignVCenter)

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

    def set_current(self, index: int):
        if 0 <= index < self.table.rowCount() and self.table.currentRow() != index:
            self.table.selectRow(index)
            self.table.scrollToItem(self.table.item(index, 0))

    def current_row(self) -> int:
        return self.table.currentRow()

    def row_text(self, row: int) -> tuple[str, str, str, str]:
        return tuple(self.table.item(row, c).text() for c in range(4))
