"""Up next: the ranked frames worth labelling, with thumbnails and reasons in plain words,
and the project's progress against its target."""
from __future__ import annotations

from dataclasses import dataclass

from PySide6.QtCore import QRect, QSize, Qt, Signal
from PySide6.QtGui import QColor, QFont, QIcon, QImage, QPainter, QPixmap
from PySide6.QtWidgets import (QAbstractItemView, QHBoxLayout, QLabel, QListWidget, QListWidgetItem,
                               QProgressBar, QPushButton, QStyle, QStyledItemDelegate, QVBoxLayout, QWidget)

from ...core.model import ACCEPTED, IN_REVIEW
from .. import theme

DEFAULT_TARGET = 200
THUMB_H = 54


@dataclass(frozen=True)
class Entry:
    """What the panel needs of a queue entry (core.ranking.QueueEntry has these and more)."""

    frame_id: int
    media_id: int
    frame_index: int
    score: float
    reasons: tuple[str, ...]


def load_queue(project, batch: int = 50) -> tuple[list, str]:
    """The ranked queue, or, when ranking is not available, unlabelled frames in media order.

    Returns (entries, note); the note says in plain words when the fallback was used.
    """
    why = ""
    try:
        from ...core import ranking
        rank = ranking.rank_queue
    except Exception as e:   # noqa: BLE001 - any failure to import means: fall back, and say so
        rank, why = None, f"ranking is not available here ({type(e).__name__}: {e})"
    if rank is not None:
        try:
            return list(rank(project, batch)), ""
        except Exception as e:   # noqa: BLE001 - a ranking failure must not stop labelling
            why = f"ranking failed ({type(e).__name__}: {e})"
    states = project.store.annotation_states()
    out = []
    for f in project.store.frames():
        if states.get(f.id) in (ACCEPTED, IN_REVIEW):
            continue
        out.append(Entry(f.id, f.media_id, f.frame_index, 0.0, ("not labelled yet",)))
        if len(out) >= batch:
            break
    return out, f"{why}; showing frames not labelled yet, in media order"


def load_live_queue(project, batch: int = 50):
    """Like :func:`load_queue`, but also returns the core LiveQueue (or None on the fallback),
    so the window can fold new labels in incrementally instead of re-ranking from scratch."""
    try:
        from ...core.ranking import LiveQueue
        live = LiveQueue(project)
        return live, list(live.next(batch)), ""
    except Exception:   # noqa: BLE001 - fall back exactly as load_queue does, with its note
        entries, note = load_queue(project, batch)
        return None, entries, note


TITLE, REASONS, DONE = Qt.UserRole + 1, Qt.UserRole + 2, Qt.UserRole + 3


class _EntryDelegate(QStyledItemDelegate):
    """Thumbnail on the left; the frame in bright text, the reasons below it in muted text."""

    def sizeHint(self, option, index):
        return QSize(option.rect.width() or 240, THUMB_H + 22)

    def paint(self, p: QPainter, option, index):
        p.save()
        r = option.rect
        if option.state & QStyle.State_Selected:
            p.fillRect(r, QColor(theme.RAISED))
            p.fillRect(QRect(r.left(), r.top(), 3, r.height()), QColor(theme.SKY_BLUE))
        icon = index.data(Qt.DecorationRole)
        tw = int(THUMB_H * 16 / 9)
        if icon is not None:
            pm = icon.pixmap(QSize(tw, THUMB_H))
            x = r.left() + 8 + (tw - pm.width()) // 2
            p.drawPixmap(x, r.top() + 6, pm)
        done = bool(index.data(DONE))
        left = r.left() + tw + 16
        text_r = QRect(left, r.top() + 5, r.right() - left - 6, r.height() - 10)
        f = QFont(option.font)
        p.setFont(f)
        p.setPen(QColor(theme.FAINT if done else theme.TEXT))
        fm = p.fontMetrics()
        title = fm.elidedText(index.data(TITLE) or "", Qt.ElideRight, text_r.width())
        p.drawText(text_r.adjusted(0, 0, 0, -(text_r.height() - fm.height())), Qt.AlignLeft, title)
        f2 = QFont(f)
        f2.setPointSizeF(max(f.pointSizeF() - 1, 7))
        p.setFont(f2)
        p.setPen(QColor(theme.FAINT if done else theme.MUTED))
        body = text_r.adjusted(0, fm.height() + 2, 0, 0)
        step = p.fontMetrics().lineSpacing()
        body.setHeight(max(1, body.height() // step) * step)
        p.setClipRect(body)                  # whole lines only; the tooltip has it all
        p.drawText(body, Qt.AlignLeft | Qt.TextWordWrap, "handed in" if done else (index.data(REASONS) or ""))
        p.restore()


def _placeholder(w: int, h: int) -> QIcon:
    pm = QPixmap(w, h)
    pm.fill(QColor(theme.RAISED))
    return QIcon(pm)


class QueuePanel(QWidget):
    chosen = Signal(int)          # frame id
    rerank = Signal()

    def __init__(self, parent=None):
        super().__init__(parent)
        lay = QVBoxLayout(self)
        lay.setContentsMargins(8, 8, 8, 8)
        lay.setSpacing(6)
        head = QHBoxLayout()
        title = QLabel("Up next")
        title.setObjectName("heading")
        head.addWidget(title)
        head.addStretch(1)
        self.button = QPushButton("Re-rank")
        self.button.setToolTip("rank the frames again with everything labelled so far")
        self.button.setFocusPolicy(Qt.NoFocus)
        self.button.clicked.connect(self.rerank)
        head.addWidget(self.button)
        lay.addLayout(head)
        self.progress_text = QLabel("")
        self.progress_text.setObjectName("muted")
        lay.addWidget(self.progress_text)
        self.bar = QProgressBar()
        self.bar.setTextVisible(False)
        self.bar.setFixedHeight(8)
        lay.addWidget(self.bar)
        self.note = QLabel("")
        self.note.setObjectName("muted")
        self.note.setWordWrap(True)
        self.note.setVisible(False)
        lay.addWidget(self.note)
        self.list = QListWidget()
        self.list.setIconSize(QSize(int(THUMB_H * 16 / 9), THUMB_H))
        self.list.setItemDelegate(_EntryDelegate(self.list))
        self.list.setUniformItemSizes(True)
        self.list.setFocusPolicy(Qt.NoFocus)
        self.list.setSelectionMode(QAbstractItemView.SingleSelection)
        self.list.setVerticalScrollMode(QAbstractItemView.ScrollPerPixel)
        self.list.itemClicked.connect(lambda it: self.chosen.emit(int(it.data(Qt.UserRole))))
        lay.addWidget(self.list, 1)
        self.entries: list = []
        self._items: dict[int, QListWidgetItem] = {}
        self._done: set[int] = set()

    def set_progress(self, accepted: int, in_review: int, target: int):
        target = max(int(target), 1)
        self.bar.setMaximum(target)
        self.bar.setValue(min(accepted, target))
        self.progress_text.setText(f"{accepted} of {target} frames accepted · {in_review} in review")
        self.progress_text.setToolTip(f"the project's target is {target} accepted frames "
                                      "(project setting target_frames)")

    def set_entries(self, entries, describe, note: str = "", states: dict | None = None):
        self.entries = list(entries)
        self.list.clear()
        self._items.clear()
        self.note.setText(note)
        self.note.setVisible(bool(note))
        ph = _placeholder(int(THUMB_H * 16 / 9), THUMB_H)
        for n, e in enumerate(self.entries, start=1):
            reasons = "; ".join(e.reasons) if e.reasons else ""
            title = f"{n}. {describe(e)}"
            it = QListWidgetItem(ph, title)
            it.setData(Qt.UserRole, int(e.frame_id))
            it.setData(TITLE, title)
            it.setData(REASONS, reasons)
            it.setToolTip(f"{title}\n{reasons}")
            self.list.addItem(it)
            self._items[int(e.frame_id)] = it
        self.mark(states or {})
        if not self.entries:
            self.note.setText((note + "\n" if note else "") + "Nothing waiting: every frame is labelled.")
            self.note.setVisible(True)

    def clear(self):
        self.entries = []
        self.list.clear()
        self._items.clear()
        self.note.setVisible(False)

    def mark(self, states: dict):
        """Dim the entries whose frame is handed in or accepted."""
        self._done = {fid for fid, st in states.items() if st in (IN_REVIEW, ACCEPTED)}
        for fid, it in self._items.items():
            it.setData(DONE, fid in self._done)

    def set_current(self, frame_id: int | None):
        it = self._items.get(frame_id) if frame_id is not None else None
        self.list.blockSignals(True)
        if it is None:
            self.list.clearSelection()
        else:
            self.list.setCurrentItem(it)
            self.list.scrollToItem(it)
        self.list.blockSignals(False)

    def set_thumbnail(self, frame_id: int, image: QImage):
        it = self._items.get(frame_id)
        if it is not None:
            it.setIcon(QIcon(QPixmap.fromImage(image)))

    def next_after(self, frame_id: int | None) -> int | None:
        """The next entry not yet handed in, after ``frame_id`` (wrapping round)."""
        ids = [int(e.frame_id) for e in self.entries]
        if not ids:
            return None
        start = ids.index(frame_id) + 1 if frame_id in ids else 0
        for fid in ids[start:] + ids[:start]:
            if fid not in self._done and fid != frame_id:
                return fid
        return None

    def item_for(self, frame_id: int) -> QListWidgetItem | None:
        return self._items.get(frame_id)
