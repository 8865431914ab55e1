"""The frame view: the picture, the skeleton, and one draggable handle per keypoint.

Scene coordinates are the stored frame-pixel coordinates, with OpenCV's
pixel-centre convention (pixel (0, 0) covers -0.5..0.5): the picture item
sits at (-0.5, -0.5). Handles ignore the view's transformation, so they keep
their size on screen while zooming; positions are kept as floats.

Mouse: drag a handle to move it; drag elsewhere (or with the middle button)
to pan; the wheel zooms about the pointer; double-click places the current
keypoint there; Shift+drag draws a box around one person, for the model to look at
(``personBoxed``). A read-only view (``set_editable(False)``, the Sign-off page
when the person may not correct the frame) still picks keypoints, pans and
zooms, but moves nothing.

A keypoint with a reviewer's open note carries a small badge beside its handle,
and the note as its tooltip.
"""
from __future__ import annotations

import math

import numpy as np
from PySide6.QtCore import QPointF, QRectF, Qt, Signal
from PySide6.QtGui import (QBrush, QColor, QFont, QFontMetricsF, QPainter, QPainterPath, QPen, QPixmap,
                           QPolygonF, QTransform)
from PySide6.QtWidgets import (QGraphicsItem, QGraphicsLineItem, QGraphicsPixmapItem, QGraphicsRectItem,
                               QGraphicsScene, QGraphicsView)

from . import theme

RADIUS = 6.0          # handle radius in screen pixels
PICK = 12.0           # a press this close (screen pixels) to a handle grabs it
MACHINE = ("model", "adapted", "propagated")


class Handle(QGraphicsItem):
    """One keypoint. Circle: a person's point; diamond: a machine's (model, tracker) not yet confirmed,
    with a white pip at its centre when the project's correction adapted it (core.adapt).
    Filled: visible; ring: occluded. Not drawn when not in frame. A small square badge at the
    upper left: a reviewer left a note on this keypoint (the note is the tooltip)."""

    def __init__(self, index: int, colour: str):
        super().__init__()
        self.index = index
        self.colour = QColor(colour)
        self.v = 0
        self.machine = False
        self.adapted = False
        self.current = False
        self.note = ""
        self.setFlag(QGraphicsItem.ItemIgnoresTransformations, True)
        self.setZValue(10)
        self.setAcceptHoverEvents(False)

    def boundingRect(self) -> QRectF:
        r = RADIUS + 6
        return QRectF(-r, -r, 2 * r, 2 * r)

    def _shape_path(self, r: float) -> QPainterPath:
        path = QPainterPath()
        if self.machine:
            path.addPolygon(QPolygonF([QPointF(0, -r * 1.25), QPointF(r * 1.25, 0), QPointF(0, r * 1.25),
                                       QPointF(-r * 1.25, 0), QPointF(0, -r * 1.25)]))
        else:
            path.addEllipse(QPointF(0, 0), r, r)
        return path

    def paint(self, painter: QPainter, option, widget=None):
        painter.setRenderHint(QPainter.Antialiasing, True)
        path = self._shape_path(RADIUS)
        if self.current:
            painter.setPen(QPen(QColor("#ffffff"), 2.0))
            painter.setBrush(Qt.NoBrush)
            painter.drawEllipse(QPointF(0, 0), RADIUS + 4.5, RADIUS + 4.5)
        if self.v == 2:
            painter.setPen(QPen(QColor(theme.BLACK), 1.5))
            painter.setBrush(QBrush(self.colour))
            painter.drawPath(path)
        else:   # occluded: a ring in the keypoint's colour, with a dark edge for contrast
            painter.setBrush(Qt.NoBrush)
            painter.setPen(QPen(QColor(theme.BLACK), 4.5))
            painter.drawPath(path)
            painter.setPen(QPen(self.colour, 2.5))
            painter.drawPath(path)
        if self.adapted:    # the correction moved it: a white pip, dark-edged, at the centre
            painter.setPen(QPen(QColor(theme.BLACK), 1.0))
            painter.setBrush(QBrush(QColor("#ffffff")))
            painter.drawEllipse(QPointF(0, 0), 2.2, 2.2)
        if self.note:
            painter.setPen(QPen(QColor(theme.BLACK), 1.2))
            painter.setBrush(QBrush(QColor(theme.VERMILLION)))
            painter.drawRect(QRectF(-RADIUS - 5.5, -RADIUS - 5.5, 7.0, 7.0))


class Label(QGraphicsItem):
    """The current keypoint's name beside its handle (screen-sized)."""

    def __init__(self):
        super().__init__()
        self.text = ""
        self.font = QFont()
        self.font.setPointSizeF(9.5)
        self.setFlag(QGraphicsItem.ItemIgnoresTransformations, True)
        self.setZValue(11)

    def set_text(self, text: str):
        self.prepareGeometryChange()
        self.text = text

    def boundingRect(self) -> QRectF:
        fm = QFontMetricsF(self.font)
        return QRectF(12, -26, fm.horizontalAdvance(self.text) + 12, fm.height() + 6)

    def paint(self, painter: QPainter, option, widget=None):
        if not self.text:
            return
        r = self.boundingRect()
        painter.setRenderHint(QPainter.Antialiasing, True)
        painter.setPen(Qt.NoPen)
        painter.setBrush(theme.qcolor(theme.BASE, 215))
        painter.drawRoundedRect(r, 4, 4)
        painter.setPen(QColor(theme.TEXT))
        painter.setFont(self.font)
        painter.drawText(r.adjusted(6, 3, -6, -3), Qt.AlignLeft | Qt.AlignVCenter, self.text)


class FrameCanvas(QGraphicsView):
    pointMoved = Signal(int, float, float)      # keypoint index, x, y (frame pixels), on release
    keypointPicked = Signal(int)                 # a handle was pressed
    placeRequested = Signal(float, float)        # double-click on the picture
    personBoxed = Signal(float, float, float, float)   # Shift+drag: x0, y0, x1, y1 (frame pixels)
    zoomChanged = Signal(float)

    def __init__(self, parent=None):
        super().__init__(parent)
        self.setScene(QGraphicsScene(self))
        self.setBackgroundBrush(QColor(theme.BASE))
        self.setRenderHint(QPainter.Antialiasing, False)
        self.setViewportUpdateMode(QGraphicsView.SmartViewportUpdate)
        self.setTransformationAnchor(QGraphicsView.NoAnchor)
        self.setResizeAnchor(QGraphicsView.AnchorViewCenter)
        self.setHorizontalScrollBarPolicy(Qt.ScrollBarAlwaysOff)
        self.setVerticalScrollBarPolicy(Qt.ScrollBarAlwaysOff)
        self.setFrameShape(QGraphicsView.NoFrame)
        self.setMouseTracking(True)
        self.setFocusPolicy(Qt.StrongFocus)
        self._pixmap = QGraphicsPixmapItem()
        self._pixmap.setOffset(-0.5, -0.5)
        self._pixmap.setShapeMode(QGraphicsPixmapItem.BoundingRectShape)
        self.scene().addItem(self._pixmap)
        self._size = (0, 0)
        self._full: QPixmap | None = None
        self._fitted_pm: QPixmap | None = None
        self._handles: list[Handle] = []
        self._edges: list[tuple[int, int, QGraphicsLineItem]] = []
        self._by_point: dict[int, list[int]] = {}
        self._label = Label()
        self.scene().addItem(self._label)
        self._names: tuple[str, ...] = ()
        self.current = 0
        self._drag = None          # (index, offset QPointF, moved: bool)
        self._pan = None           # last viewport QPointF while panning
        self._box = None           # (scene start QPointF, QGraphicsRectItem) while Shift+dragging
        self._cursor: QPointF | None = None
        self._fitted = True
        self._message = None
        self.editable = True

    def set_editable(self, on: bool):
        """False: handles can be picked but not dragged, and double-click places nothing."""
        self.editable = bool(on)
        if not on:
            self._drag = None

    def set_notes(self, notes: dict[int, str]):
        """Mark the keypoints that carry a reviewer's note (index -> the note's text)."""
        for i, h in enumerate(self._handles):
            text = notes.get(i, "")
            if text != h.note:
                h.note = text
                h.setToolTip(text)
                # a noted keypoint is drawn above its neighbours, so its badge is never hidden
                # under another handle (the name label stays on top at 11)
                h.setZValue(10.5 if text else 10)
                h.update()

    def note_of(self, index: int) -> str:
        return self._handles[index].note

    # ---- content ----------------------------------------------------------------------

    def set_skeleton(self, names, edges):
        for h in self._handles:
            self.scene().removeItem(h)
        for _, _, line in self._edges:
            self.scene().removeItem(line)
        self._names = tuple(names)
        self._handles = []
        for i, n in enumerate(names):
            h = Handle(i, theme.SIDE_COLOURS[theme.side_of(n)])
            h.setVisible(False)
            self.scene().addItem(h)
            self._handles.append(h)
        self._edges = []
        self._by_point = {}
        for a, b in edges:
            line = QGraphicsLineItem()
            line.setZValue(5)
            line.setVisible(False)
            self.scene().addItem(line)
            self._by_point.setdefault(a, []).append(len(self._edges))
            self._by_point.setdefault(b, []).append(len(self._edges))
            self._edges.append((a, b, line))

    def set_image(self, image, message: str | None = None):
        """Show a frame (a ShownFrame, QImage or QPixmap), or with ``image`` None a message instead."""
        if self._message is not None:
            self.scene().removeItem(self._message)
            self._message = None
        if image is None:
            self._full = self._fitted_pm = None
            self._pixmap.setPixmap(QPixmap())
            if message:
                self._message = self.scene().addSimpleText(message)
                self._message.setBrush(QColor(theme.MUTED))
                self._message.setFlag(QGraphicsItem.ItemIgnoresTransformations, True)
            return
        fitted = getattr(image, "fitted", None)
        full = getattr(image, "full", image)
        self._full = full if isinstance(full, QPixmap) else QPixmap.fromImage(full)
        self._fitted_pm = QPixmap.fromImage(fitted) if fitted is not None else None
        new_size = (self._full.width(), self._full.height())
        if new_size != self._size:
            self._size = new_size
            w, h = new_size
            self.scene().setSceneRect(QRectF(-0.5 - w, -0.5 - h, 3 * w, 3 * h))
            self.fit()
        elif self._fitted:
            self.fit()
        else:
            self._choose_pixmap()

    def _choose_pixmap(self):
        """Draw the pre-scaled copy while the view is at (or below) its scale; else full resolution."""
        if self._full is None:
            return
        w, h = self._size
        small = self._fitted_pm
        use_small = small is not None and self.scale_factor() <= 1.02 * small.width() / w
        pm = small if use_small else self._full
        if self._pixmap.pixmap().cacheKey() != pm.cacheKey():
            self._pixmap.setPixmap(pm)
        kx, ky = w / pm.width(), h / pm.height()
        self._pixmap.setTransform(QTransform.fromScale(kx, ky))
        self._pixmap.setOffset(-0.5 / kx, -0.5 / ky)
        if use_small:
            mode = Qt.FastTransformation        # drawn at about 1:1
        elif self.scale_factor() < 3.0:
            mode = Qt.SmoothTransformation
        else:
            mode = Qt.FastTransformation        # close up: whole pixels, for placing points precisely
        self._pixmap.setTransformationMode(mode)

    def fitted_size(self) -> tuple[int, int]:
        """The viewport size frames should be pre-scaled to."""
        return self.viewport().width(), self.viewport().height()

    @property
    def frame_size(self) -> tuple[int, int]:
        return self._size

    def set_points(self, kps: np.ndarray, sources, current: int | None = None):
        if current is not None:
            self.current = current
        for i, h in enumerate(self._handles):
            x, y, v = (float(kps[i, 0]), float(kps[i, 1]), int(kps[i, 2]))
            h.v = v
            h.machine = sources[i] in MACHINE
            h.adapted = sources[i] == "adapted"
            h.current = i == self.current
            h.setPos(x, y)
            h.setVisible(v > 0)
            h.update()
        self._update_edges(range(len(self._edges)))
        self._update_label()

    def set_current(self, index: int):
        old = self.current
        self.current = index
        for i in (old, index):
            if 0 <= i < len(self._handles):
                self._handles[i].current = i == index
                self._handles[i].update()
        self._update_label()

    def handle_pos(self, index: int) -> QPointF:
        return self._handles[index].pos()

    def handle_visible(self, index: int) -> bool:
        return self._handles[index].isVisible()

    def _update_label(self):
        if not self._handles:
            return
        h = self._handles[self.current]
        self._label.setVisible(h.isVisible())
        self._label.set_text(self._names[self.current].replace("_", " "))
        self._label.setPos(h.pos())

    def _update_edges(self, which):
        for k in which:
            a, b, line = self._edges[k]
            ha, hb = self._handles[a], self._handles[b]
            show = ha.isVisible() and hb.isVisible()
            line.setVisible(show)
            if show:
                pen = QPen(theme.qcolor("#ffffff", 150), 2.0)
                pen.setCosmetic(True)
                if ha.machine or hb.machine:
                    pen.setStyle(Qt.DashLine)
                line.setPen(pen)
                line.setLine(ha.pos().x(), ha.pos().y(), hb.pos().x(), hb.pos().y())

    # ---- geometry -------------------------------------------------------------------------

    def to_scene(self, p: QPointF) -> QPointF:
        """Viewport pixel position -> frame pixels, keeping the fraction."""
        inv, ok = self.viewportTransform().inverted()
        return inv.map(QPointF(p))

    def to_view(self, p: QPointF) -> QPointF:
        return self.viewportTransform().map(QPointF(p))

    def cursor_position(self) -> tuple[float, float] | None:
        """Where the pointer last was over the picture, in frame pixels (None if not over it)."""
        if self._cursor is None or not self._size[0]:
            return None
        s = self.to_scene(self._cursor)
        w, h = self._size
        if -0.5 <= s.x() <= w - 0.5 and -0.5 <= s.y() <= h - 0.5:
            return float(s.x()), float(s.y())
        return None

    def scale_factor(self) -> float:
        return self.transform().m11()

    def fit(self):
        if not self._size[0]:
            return
        w, h = self._size
        self.resetTransform()
        self.fitInView(QRectF(-0.5, -0.5, w, h), Qt.KeepAspectRatio)
        self._fitted = True
        self._smooth()
        self.zoomChanged.emit(self.scale_factor())

    def zoom(self, factor: float, anchor: QPointF | None = None):
        """Zoom by ``factor`` keeping the frame point under ``anchor`` (viewport pixels) in place."""
        s = self.scale_factor() * factor
        if not (0.02 <= s <= 64):
            return
        if anchor is None:
            anchor = QPointF(self.viewport().width() / 2, self.viewport().height() / 2)
        before = self.to_scene(anchor)
        self.scale(factor, factor)
        self._scroll_by(self.to_view(before) - anchor)
        self._fitted = False
        self._smooth()
        self.zoomChanged.emit(self.scale_factor())

    def _scroll_by(self, d: QPointF):
        hb, vb = self.horizontalScrollBar(), self.verticalScrollBar()
        hb.setValue(hb.value() + round(d.x()))
        vb.setValue(vb.value() + round(d.y()))

    def _smooth(self):
        self._choose_pixmap()

    resized = Signal(int, int)

    def resizeEvent(self, e):
        super().resizeEvent(e)
        if self._fitted:
            self.fit()
        self.resized.emit(self.viewport().width(), self.viewport().height())

    # ---- mouse ------------------------------------------------------------------------------

    def _nearest(self, vp: QPointF) -> int | None:
        best, best_d = None, PICK
        for h in self._handles:
            if not h.isVisible():
                continue
            q = self.to_view(h.pos())
            d = math.hypot(q.x() - vp.x(), q.y() - vp.y())
            if d < best_d or (d == best_d and h.index == self.current):
                best, best_d = h.index, d
        return best

    def _clamp(self, p: QPointF) -> QPointF:
        w, h = self._size
        return QPointF(min(max(p.x(), -0.5), w - 0.5), min(max(p.y(), -0.5), h - 0.5))

    def mousePressEvent(self, e):
        pos = e.position()
        self._cursor = pos
        if (e.button() == Qt.LeftButton and e.modifiers() & Qt.ShiftModifier and self.editable
                and self._size[0] > 0):
            start = self._clamp(self.to_scene(pos))
            rect = QGraphicsRectItem(QRectF(start, start))
            pen = QPen(QColor(theme.TEXT), 1.5, Qt.DashLine)
            pen.setCosmetic(True)             # the same width at every zoom
            rect.setPen(pen)
            rect.setZValue(5)
            self.scene().addItem(rect)
            self._box = (start, rect)
            e.accept()
            return
        if e.button() == Qt.LeftButton:
            idx = self._nearest(pos)
            if idx is not None and not self.editable:
                if idx != self.current:
                    self.keypointPicked.emit(idx)
                idx = None                     # read-only: pick it, then pan as on empty picture
            if idx is not None:
                offset = self._handles[idx].pos() - self.to_scene(pos)
                self._drag = (idx, offset, False)
                if idx != self.current:
                    self.keypointPicked.emit(idx)
                e.accept()
                return
        if e.button() in (Qt.LeftButton, Qt.MiddleButton):
            self._pan = pos
            self.viewport().setCursor(Qt.ClosedHandCursor)
            e.accept()
            return
        super().mousePressEvent(e)

    def mouseMoveEvent(self, e):
        pos = e.position()
        self._cursor = pos
        if self._box is not None:
            start, rect = self._box
            rect.setRect(QRectF(start, self._clamp(self.to_scene(pos))).normalized())
            e.accept()
            return
        if self._drag is not None:
            idx, offset, _ = self._drag
            p = self._clamp(self.to_scene(pos) + offset)
            h = self._handles[idx]
            h.setPos(p)
            self._update_edges(self._by_point.get(idx, ()))
            if idx == self.current:
                self._label.setPos(p)
            self._drag = (idx, offset, True)
            e.accept()
            return
        if self._pan is not None:
            d = pos - self._pan
            self._pan = pos
            self._scroll_by(-d)
            self._fitted = False
            e.accept()
            return
        super().mouseMoveEvent(e)

    def mouseReleaseEvent(self, e):
        if self._box is not None and e.button() == Qt.LeftButton:
            start, rect = self._box
            self._box = None
            r = QRectF(start, self._clamp(self.to_scene(e.position()))).normalized()
            self.scene().removeItem(rect)
            if r.width() > 1 and r.height() > 1:       # not a Shift+click
                self.personBoxed.emit(float(r.left()), float(r.top()), float(r.right()), float(r.bottom()))
            e.accept()
            return
        if self._drag is not None and e.button() == Qt.LeftButton:
            idx, _, moved = self._drag
            self._drag = None
            if moved:
                p = self._handles[idx].pos()
                self.pointMoved.emit(idx, float(p.x()), float(p.y()))
            e.accept()
            return
        if self._pan is not None:
            self._pan = None
            self.viewport().unsetCursor()
            e.accept()
            return
        super().mouseReleaseEvent(e)

    def mouseDoubleClickEvent(self, e):
        if self.editable and e.button() == Qt.LeftButton and self._nearest(e.position()) is None:
            s = self.to_scene(e.position())
            w, h = self._size
            if -0.5 <= s.x() <= w - 0.5 and -0.5 <= s.y() <= h - 0.5:
                self.placeRequested.emit(float(s.x()), float(s.y()))
                e.accept()
                return
        super().mouseDoubleClickEvent(e)

    def leaveEvent(self, e):
        self._cursor = None
        super().leaveEvent(e)

    def wheelEvent(self, e):
        steps = e.angleDelta().y() / 120.0
        if steps:
            self.zoom(1.25 ** steps, e.position())
        e.accept()

    @property
    def dragging(self) -> bool:
        """A handle is being dragged right now."""
        return self._drag is not None

    def cancel_drag(self):
        """Put a handle that is being dragged back (e.g. the frame changed under it); drop a box
        being drawn."""
        self._drag = None
        if self._box is not None:
            self.scene().removeItem(self._box[1])
            self._box = None
