"""The clip strip: the current video as a line, one mark per sampled frame coloured and sized by
its state, and the current frame; click or drag along it to go to a sampled frame."""
from __future__ import annotations

import bisect

from PySide6.QtCore import QPointF, QRectF, Qt, Signal
from PySide6.QtGui import QColor, QFont, QPainter, QPen, QPixmap, QPolygonF
from PySide6.QtWidgets import QSizePolicy, QWidget

from .. import theme

PAD = 14


class ClipStrip(QWidget):
    chosen = Signal(int)          # frame id

    def __init__(self, parent=None):
        super().__init__(parent)
        self.setMinimumHeight(54)
        self.setMaximumHeight(54)
        self.setSizePolicy(QSizePolicy.Expanding, QSizePolicy.Fixed)
        self.setMouseTracking(True)
        self.frame_count = 0
        self.fps = None
        self.marks: list[tuple[int, int]] = []     # (frame index, frame id), sorted
        self.states: dict[int, str] = {}
        self.current: int | None = None            # frame id
        self._hover: int | None = None
        self._drag = False
        self.title = ""
        self._index_of: dict = {}
        self._cache = None

    def set_media(self, frame_count: int, fps, frames, states: dict, title: str = ""):
        self.frame_count = max(int(frame_count), 1)
        self.fps = fps
        self.marks = sorted((f.frame_index, f.id) for f in frames)
        self._index_of = {fid: idx for idx, fid in self.marks}
        self.states = dict(states)
        self.title = title
        self.update()

    def set_states(self, states: dict):
        self.states.update(states)
        self.update()

    def set_current(self, frame_id):
        self.current = frame_id
        self.update()

    def _x(self, index: int) -> float:
        w = self.width() - 2 * PAD
        return PAD + (index / max(self.frame_count - 1, 1)) * w

    def nearest(self, x: float) -> int | None:
        if not self.marks:
            return None
        w = self.width() - 2 * PAD
        idx = (x - PAD) / max(w, 1) * max(self.frame_count - 1, 1)
        keys = [m[0] for m in self.marks]
        i = bisect.bisect_left(keys, idx)
        cands = [j for j in (i - 1, i) if 0 <= j < len(keys)]
        j = min(cands, key=lambda j: abs(keys[j] - idx))
        return self.marks[j][1]

    def _marks_picture(self) -> QPixmap:
        """The line and the marks, drawn once per change of media, states or size."""
        key = (self.width(), self.height(), id(self.marks), tuple(sorted(self.states.items())))
        if self._cache is not None and self._cache[0] == key:
            return self._cache[1]
        pm = QPixmap(self.size())
        pm.fill(QColor(theme.PANEL))
        p = QPainter(pm)
        p.setRenderHint(QPainter.Antialiasing)
        y = 30
        p.setPen(QPen(QColor(theme.LINE), 2))
        p.drawLine(QPointF(PAD, y), QPointF(self.width() - PAD, y))
        pens = {st: QPen(QColor(c), 2) for st, c in theme.STATE_COLOURS.items()}
        for index, fid in self.marks:
            st = self.states.get(fid, "blank")
            x = self._x(index)
            tall = 6 if st == "blank" else 11
            p.setPen(pens.get(st, pens["blank"]))
            p.drawLine(QPointF(x, y - tall), QPointF(x, y + tall))
        p.end()
        self._cache = (key, pm)
        return pm

    def paintEvent(self, e):
        p = QPainter(self)
        p.drawPixmap(0, 0, self._marks_picture())
        p.setRenderHint(QPainter.Antialiasing)
        y = 30
        cur_index = self._index_of.get(self.current)
        if cur_index is not None:
            x = self._x(cur_index)
            p.setPen(Qt.NoPen)
            p.setBrush(QColor("#ffffff"))
            p.drawPolygon(QPolygonF([QPointF(x - 6, y + 22), QPointF(x + 6, y + 22), QPointF(x, y + 13)]))
        f = QFont(self.font())
        f.setPointSizeF(max(f.pointSizeF() - 1, 7))
        p.setFont(f)
        fm = p.fontMetrics()
        # legend on the right, the clip and frame on the left (elided to the room left)
        x = self.width() - PAD
        legend_left = x
        items = []
        for s in reversed(theme.STATE_ORDER):
            word = theme.STATE_WORDS[s]
            legend_left -= fm.horizontalAdvance(word) + 20
            items.append((s, word, legend_left))
        text = self.title
        if cur_index is not None:
            t = f" · {cur_index / self.fps:.2f} s" if self.fps else ""
            text += f"  ·  frame {cur_index} of {self.frame_count}{t}"
        room = legend_left - PAD - 16
        if room < 160:                       # too narrow for both: the frame wins
            room, items = self.width() - 2 * PAD, []
        p.setPen(QColor(theme.MUTED))
        p.drawText(QRectF(PAD, 2, room, 16), Qt.AlignLeft | Qt.AlignVCenter,
                   fm.elidedText(text, Qt.ElideMiddle, int(room)))
        for s, word, lx in items:
            p.setPen(QPen(QColor(theme.STATE_COLOURS[s]), 3))
            p.drawLine(QPointF(lx + 4, 6), QPointF(lx + 4, 14))
            p.setPen(QColor(theme.MUTED))
            p.drawText(QPointF(lx + 12, 14), word)
        p.end()

    def mousePressEvent(self, e):
        if e.button() == Qt.LeftButton:
            self._drag = True
            self._hover = None          # a new press always goes, even to the frame of the last one
            self._scrub_to(e.position().x())

    def mouseMoveEvent(self, e):
        if self._drag:                  # scrubbing: the frame follows the pointer
            self._scrub_to(e.position().x())

    def mouseReleaseEvent(self, e):
        if self._drag and e.button() == Qt.LeftButton:
            self._drag = False
            self._scrub_to(e.position().x())

    def _scrub_to(self, x: float):
        fid = self.nearest(x)
        if fid is not None and fid != self._hover:
            self._hover = fid
            self.update()
            self.chosen.emit(fid)
