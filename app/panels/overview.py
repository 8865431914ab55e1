"""Overview: pictures of where the labelling stands.

* Pose map: every pose in one picture (PCA of normalised poses), labelled frames
  against the pool of proposed ones and the frames queued next, so gaps show.
* Keypoint chart: per keypoint, how often the model's proposal needed a move on
  accepted labels, and how many labelled points sit in each state.
* Frame strip: all frames by state.
"""
from __future__ import annotations

import numpy as np
from PySide6.QtCore import QPointF, QRectF, Qt
from PySide6.QtGui import QColor, QFont, QPainter, QPen
from PySide6.QtWidgets import QHBoxLayout, QLabel, QSizePolicy, QVBoxLayout, QWidget

from .. import theme
from ...core.overview import Coverage, KeypointFigures

GROUPS = (("pool", "proposed, not labelled", theme.FAINT),
          ("queued", "queued in Up next", theme.ORANGE),
          ("labelled", "labelled by a person", theme.BLUISH_GREEN))


def _small(widget, delta=-1.0) -> QFont:
    f = QFont(widget.font())
    f.setPointSizeF(max(f.pointSizeF() + delta, 7))
    return f


class FrameStrip(QWidget):
    def __init__(self, parent=None):
        super().__init__(parent)
        self.counts: dict = {}
        self.setFixedHeight(46)

    def set_counts(self, counts: dict):
        self.counts = {s: int(counts.get(s, 0)) for s in theme.STATE_ORDER}
        self.update()

    def paintEvent(self, e):
        p = QPainter(self)
        p.setRenderHint(QPainter.Antialiasing)
        total = sum(self.counts.values())
        r = QRectF(8, 6, self.width() - 16, 12)
        p.setPen(Qt.NoPen)
        p.setBrush(QColor(theme.BASE))
        p.drawRoundedRect(r, 4, 4)
        x = r.left()
        for s in theme.STATE_ORDER:
            n = self.counts.get(s, 0)
            if not n or not total:
                continue
            w = r.width() * n / total
            p.setBrush(QColor(theme.STATE_COLOURS[s]))
            p.drawRect(QRectF(x, r.top(), w, r.height()))
            x += w
        p.setFont(_small(self))
        x = 8.0
        for s in theme.STATE_ORDER:
            word = f"{theme.STATE_WORDS[s]} {self.counts.get(s, 0)}"
            p.setPen(Qt.NoPen)
            p.setBrush(QColor(theme.STATE_COLOURS[s]))
            p.drawRect(QRectF(x, 28, 9, 9))
            p.setPen(QColor(theme.MUTED))
            p.drawText(QPointF(x + 13, 37), word)
            x += 13 + p.fontMetrics().horizontalAdvance(word) + 16
        p.end()


class _Figure(QWidget):
    """One of the page's two pictures: its data, a growing size, and a titled background."""

    def __init__(self, data, min_w: int, min_h: int, parent=None):
        super().__init__(parent)
        self.data = data
        self.setMinimumSize(min_w, min_h)
        self.setSizePolicy(QSizePolicy.Expanding, QSizePolicy.Expanding)

    def set_data(self, data):
        self.data = data
        self.update()

    def _begin(self, title: str) -> QPainter:
        """A painter on the widget, the background filled and ``title`` drawn at the top left."""
        p = QPainter(self)
        p.setRenderHint(QPainter.Antialiasing)
        p.fillRect(self.rect(), QColor(theme.BASE))
        p.setPen(QColor(theme.TEXT))
        p.setFont(_small(self, 0.5))
        p.drawText(QRectF(14, 8, self.width() - 28, 20), Qt.AlignLeft, title)
        return p


class PoseMap(_Figure):
    data: Coverage

    def __init__(self, parent=None):
        super().__init__(Coverage(), 320, 300, parent)

    def paintEvent(self, e):
        p = self._begin("Pose map")
        p.setFont(_small(self))
        p.setPen(QColor(theme.MUTED))
        d = self.data
        sub = "one dot per frame: its pose centred, scaled and turned upright, as Up next compares poses"
        p.drawText(QRectF(14, 28, self.width() - 28, 18), Qt.AlignLeft, sub)
        plot = QRectF(24, 58, self.width() - 48, self.height() - 58 - 48)
        p.setPen(QPen(QColor(theme.LINE), 1))
        p.setBrush(Qt.NoBrush)
        p.drawRoundedRect(plot, 6, 6)
        if len(d.xy) == 0:
            p.setPen(QColor(theme.MUTED))
            p.drawText(plot, Qt.AlignCenter | Qt.TextWordWrap,
                       "No poses yet: label a frame or ask the model to pre-fill frames.")
        else:
            lo, hi = d.xy.min(axis=0), d.xy.max(axis=0)
            span = np.where(hi - lo > 1e-9, hi - lo, 1.0)
            inner = plot.adjusted(14, 14, -14, -14)

            def at(xy):
                return QPointF(inner.left() + (xy[0] - lo[0]) / span[0] * inner.width(),
                               inner.bottom() - (xy[1] - lo[1]) / span[1] * inner.height())

            for g, _, colour in GROUPS:
                pts = d.xy[d.group == g]
                c = QColor(colour)
                if g == "pool":
                    c.setAlpha(150)
                    p.setPen(Qt.NoPen)
                    p.setBrush(c)
                    for xy in pts:
                        p.drawEllipse(at(xy), 2.2, 2.2)
                elif g == "queued":       # rings
                    p.setPen(QPen(c, 1.6))
                    p.setBrush(Qt.NoBrush)
                    for xy in pts:
                        p.drawEllipse(at(xy), 4.0, 4.0)
                else:                     # filled squares
                    p.setPen(QPen(QColor(theme.BLACK), 0.8))
                    p.setBrush(c)
                    for xy in pts:
                        q = at(xy)
                        p.drawRect(QRectF(q.x() - 3.5, q.y() - 3.5, 7, 7))
            p.setPen(QColor(theme.FAINT))
            p.drawText(QRectF(plot.left(), plot.bottom() + 2, plot.width(), 16), Qt.AlignCenter,
                       f"first principal direction ({100 * d.share[0]:.0f}% of the variation)")
            p.save()
            p.translate(plot.left() - 4, plot.center().y())
            p.rotate(-90)
            p.drawText(QRectF(-plot.height() / 2, -14, plot.height(), 14), Qt.AlignCenter,
                       f"second ({100 * d.share[1]:.0f}%)")
            p.restore()
        # legend
        x = 24.0
        y = self.height() - 18
        for g, words, colour in GROUPS:
            n = int((d.group == g).sum()) if len(d.group) else 0
            c = QColor(colour)
            if g == "pool":
                p.setPen(Qt.NoPen); p.setBrush(c); p.drawEllipse(QPointF(x + 4, y - 4), 2.5, 2.5)
            elif g == "queued":
                p.setPen(QPen(c, 1.6)); p.setBrush(Qt.NoBrush); p.drawEllipse(QPointF(x + 4, y - 4), 4, 4)
            else:
                p.setPen(QPen(QColor(theme.BLACK), 0.8)); p.setBrush(c); p.drawRect(QRectF(x, y - 8, 8, 8))
            p.setPen(QColor(theme.MUTED))
            text = f"{words} ({n})"
            p.drawText(QPointF(x + 14, y), text)
            x += 14 + p.fontMetrics().horizontalAdvance(text) + 18
        if d.without_pose:
            p.setPen(QColor(theme.FAINT))
            p.drawText(QPointF(x, y), f"· {d.without_pose} frame(s) have no pose yet")
        p.end()


class KeypointChart(_Figure):
    STATES = ("prefilled", "drafting", "in_review", "accepted", "returned")
    data: KeypointFigures | None

    def __init__(self, parent=None):
        super().__init__(None, 420, 300, parent)

    def paintEvent(self, e):
        p = self._begin("Keypoints")
        d = self.data
        if d is None:
            p.end()
            return
        f = _small(self)
        p.setFont(f)
        fm = p.fontMetrics()
        K = len(d.names)
        top, bottom = 62, self.height() - 34
        row = max(min((bottom - top) / max(K, 1), 24), 10)
        name_w = max(fm.horizontalAdvance(n.replace("_", " ")) for n in d.names) + 12
        left = 26 + name_w
        avail = self.width() - left - 14
        col1 = avail * 0.45
        gap = 24
        col2x = left + col1 + gap
        col2 = avail - col1 - gap
        p.setPen(QColor(theme.MUTED))
        p.drawText(QRectF(left, 30, col1, 30), Qt.AlignLeft | Qt.TextWordWrap,
                   "proposal needed a move, on accepted labels (share; median distance)")
        p.drawText(QRectF(col2x, 30, col2, 30), Qt.AlignLeft | Qt.TextWordWrap,
                   "labelled points by state")
        most = max(1, max(int(sum(d.by_state.get(s, np.zeros(K))[k] for s in self.STATES)) for k in range(K)))
        for k, name in enumerate(d.names):
            y = top + k * row
            side = theme.SIDE_COLOURS[theme.side_of(name)]
            p.setPen(Qt.NoPen)
            p.setBrush(QColor(side))
            p.drawEllipse(QPointF(18, y + row / 2), 3, 3)
            p.setPen(QColor(theme.TEXT))
            p.drawText(QRectF(26, y, name_w, row), Qt.AlignLeft | Qt.AlignVCenter, name.replace("_", " "))
            bar_h = max(row - 8, 4)
            by = y + (row - bar_h) / 2
            # column 1: share needing a move
            p.setPen(Qt.NoPen)
            p.setBrush(QColor(theme.RAISED))
            track = col1 - 92
            p.drawRect(QRectF(left, by, track, bar_h))
            share = d.needs_move[k]
            if np.isfinite(share):
                p.setBrush(QColor(theme.VERMILLION))
                p.drawRect(QRectF(left, by, track * float(share), bar_h))
                med = d.median_px[k]
                text = f"{100 * share:.0f}%" + (f"  {med:.1f} px" if np.isfinite(med) else "")
                p.setPen(QColor(theme.MUTED))
            else:
                text = "no data"
                p.setPen(QColor(theme.FAINT))
            p.drawText(QRectF(left + track + 6, y, 86, row), Qt.AlignLeft | Qt.AlignVCenter, text)
            # column 2: stacked counts by state
            x = col2x
            total = 0
            for s in self.STATES:
                n = int(d.by_state.get(s, np.zeros(K, int))[k])
                if not n:
                    continue
                w = (col2 - 40) * n / most
                p.setPen(Qt.NoPen)
                p.setBrush(QColor(theme.STATE_COLOURS[s]))
                p.drawRect(QRectF(x, by, w, bar_h))
                x += w
                total += n
            p.setPen(QColor(theme.MUTED))
            p.drawText(QRectF(x + 6, y, 40, row), Qt.AlignLeft | Qt.AlignVCenter, str(total))
        # legend for column 2 (moved left when the column is too narrow for it)
        words = [theme.STATE_WORDS[s] for s in self.STATES]
        need = sum(11 + fm.horizontalAdvance(w_) + 12 for w_ in words)
        x = min(col2x, self.width() - 14 - need)
        y = self.height() - 14
        for s in self.STATES:
            word = theme.STATE_WORDS[s]
            p.setPen(Qt.NoPen)
            p.setBrush(QColor(theme.STATE_COLOURS[s]))
            p.drawRect(QRectF(x, y - 8, 8, 8))
            p.setPen(QColor(theme.MUTED))
            p.drawText(QPointF(x + 11, y), word)
            x += 11 + fm.horizontalAdvance(word) + 12
        p.setPen(QColor(theme.FAINT))
        p.drawText(QRectF(left, y - 30, col1, 16), Qt.AlignLeft,
                   "needs a move: per-keypoint OKS < 0.5")
        p.end()


class OverviewPage(QWidget):
    def __init__(self, parent=None):
        super().__init__(parent)
        self.setObjectName("page")
        lay = QVBoxLayout(self)
        lay.setContentsMargins(12, 10, 12, 10)
        self.caption = QLabel("")
        self.caption.setObjectName("muted")
        lay.addWidget(self.caption)
        self.strip = FrameStrip()
        lay.addWidget(self.strip)
        row = QHBoxLayout()
        self.map = PoseMap()
        self.chart = KeypointChart()
        row.addWidget(self.map, 5)
        row.addWidget(self.chart, 6)
        lay.addLayout(row, 1)

    def set_data(self, coverage: Coverage, figures: KeypointFigures):
        self.map.set_data(coverage)
        self.chart.set_data(figures)
        counts = dict(figures.frames_by_state)
        self.strip.set_counts(counts)
        total = sum(int(v) for v in counts.values())
        self.caption.setText(f"{total} frames in the project")
