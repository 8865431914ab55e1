"""What the two frame lists share (Up next on the Label page, Waiting for sign-off on the
Sign-off page): the heading row with its one button, the list of thumbnail entries and the
delegate that draws them, and filling, selecting and decorating that list."""
from __future__ import annotations

from PySide6.QtCore import QRect, QSize, Qt
from PySide6.QtGui import QColor, QFont, QIcon, QImage, QPainter, QPixmap
from PySide6.QtWidgets import (QAbstractItemView, QHBoxLayout, QLabel, QListWidget, QListWidgetItem,
                               QPushButton, QStyle, QStyledItemDelegate, QVBoxLayout, QWidget)

from .. import theme

THUMB_H = 54
THUMB_W = int(THUMB_H * 16 / 9)

TITLE, REASONS, DONE = Qt.UserRole + 1, Qt.UserRole + 2, Qt.UserRole + 3


class EntryDelegate(QStyledItemDelegate):
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
        if icon is not None:
            pm = icon.pixmap(QSize(THUMB_W, THUMB_H))
            x = r.left() + 8 + (THUMB_W - pm.width()) // 2
            p.drawPixmap(x, r.top() + 6, pm)
        done = bool(index.data(DONE))
        left = r.left() + THUMB_W + 16
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


def placeholder_icon(w: int, h: int) -> QIcon:
    pm = QPixmap(w, h)
    pm.fill(QColor(theme.RAISED))
    return QIcon(pm)


def thumbnail_icon(image: QImage) -> QIcon:
    return QIcon(QPixmap.fromImage(image))


def list_panel_head(panel: QWidget, title: str, button_text: str, tooltip: str,
                    clicked) -> tuple[QVBoxLayout, QPushButton]:
    """The panel's column and its heading row: the title, and on the right one button (never
    taking the keyboard focus) that fires ``clicked``. Returns (column, button)."""
    lay = QVBoxLayout(panel)
    lay.setContentsMargins(8, 8, 8, 8)
    lay.setSpacing(6)
    head = QHBoxLayout()
    heading = QLabel(title)
    heading.setObjectName("heading")
    head.addWidget(heading)
    head.addStretch(1)
    button = QPushButton(button_text)
    button.setToolTip(tooltip)
    button.setFocusPolicy(Qt.NoFocus)
    button.clicked.connect(clicked)
    head.addWidget(button)
    lay.addLayout(head)
    return lay, button


def entry_list(chosen) -> QListWidget:
    """A list of thumbnail entries; a click emits ``chosen`` with the entry's key (Qt.UserRole)."""
    lst = QListWidget()
    lst.setIconSize(QSize(THUMB_W, THUMB_H))
    lst.setItemDelegate(EntryDelegate(lst))
    lst.setUniformItemSizes(True)
    lst.setFocusPolicy(Qt.NoFocus)
    lst.setSelectionMode(QAbstractItemView.SingleSelection)
    lst.setVerticalScrollMode(QAbstractItemView.ScrollPerPixel)
    lst.itemClicked.connect(lambda it: chosen.emit(int(it.data(Qt.UserRole))))
    return lst


def fill_entries(lst: QListWidget, rows: dict[int, QListWidgetItem], items, *, key, describe, reasons):
    """Empty ``lst`` and ``rows``, then list ``items`` in order, numbered from 1: the title is
    "n. describe(item)", the muted line ``reasons(item)``, the key ``key(item)`` (by which
    ``rows`` holds each list item). Every entry starts with a blank thumbnail."""
    lst.clear()
    rows.clear()
    ph = placeholder_icon(THUMB_W, THUMB_H)
    for n, item in enumerate(items, start=1):
        title = f"{n}. {describe(item)}"
        why = reasons(item)
        k = int(key(item))
        row = QListWidgetItem(ph, title)
        row.setData(Qt.UserRole, k)
        row.setData(TITLE, title)
        row.setData(REASONS, why)
        row.setToolTip(f"{title}\n{why}")
        lst.addItem(row)
        rows[k] = row


def select_entry(lst: QListWidget, row: QListWidgetItem | None):
    """Select and scroll to ``row`` (None: select nothing) without emitting the list's signals."""
    lst.blockSignals(True)
    if row is None:
        lst.clearSelection()
    else:
        lst.setCurrentItem(row)
        lst.scrollToItem(row)
    lst.blockSignals(False)
