"""Up next: the ranked frames worth labelling, with thumbnails and reasons in plain words,
and the project's progress against its target."""
from __future__ import annotations

from dataclasses import dataclass

from PySide6.QtCore import Signal
from PySide6.QtGui import QImage
from PySide6.QtWidgets import QLabel, QListWidgetItem, QProgressBar, QWidget

from ...core.model import ACCEPTED, IN_REVIEW
from .common import DONE, entry_list, fill_entries, list_panel_head, select_entry, thumbnail_icon


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


class QueuePanel(QWidget):
    chosen = Signal(int)          # frame id
    rerank = Signal()

    def __init__(self, parent=None):
        super().__init__(parent)
        lay, self.button = list_panel_head(self, "Up next", "Re-rank",
                                           "rank the frames again with everything labelled so far", self.rerank)
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
        # when to tune the model (core.tuning.suggestion), apart from the ranking's own note
        self.hint = QLabel("")
        self.hint.setObjectName("tuneHint")
        self.hint.setWordWrap(True)
        self.hint.setVisible(False)
        lay.addWidget(self.hint)
        self.list = entry_list(self.chosen)
        lay.addWidget(self.list, 1)
        self.entries: list = []
        self._items: dict[int, QListWidgetItem] = {}
        self._done: set[int] = set()
        self._current: int | None = None
        self._followers: tuple[int, list[int]] | None = None   # (frame, entries after it before a re-rank)

    def set_progress(self, accepted: int, in_review: int, target: int):
        target = max(int(target), 1)
        self.bar.setMaximum(target)
        self.bar.setValue(min(accepted, target))
        self.progress_text.setText(f"{accepted} of {target} frames accepted · {in_review} in review")
        self.progress_text.setToolTip(f"the project's target is {target} accepted frames "
                                      "(project setting target_frames)")

    def set_entries(self, entries, describe, note: str = "", states: dict | None = None,
                    empty: str = "Nothing waiting: every frame is labelled."):
        """``empty``: what an empty list means (the window knows whether the project has frames)."""
        old = [int(e.frame_id) for e in self.entries]
        if self._current in old:
            # where the current frame stood, for Next in line once a re-rank drops it
            self._followers = (self._current, old[old.index(self._current) + 1:])
        self.entries = list(entries)
        fill_entries(self.list, self._items, self.entries, key=lambda e: e.frame_id, describe=describe,
                     reasons=lambda e: "; ".join(e.reasons) if e.reasons else "")
        self.note.setText(note)
        self.note.setVisible(bool(note))
        self.mark(states or {})
        if not self.entries:
            self.note.setText((note + "\n" if note else "") + empty)
            self.note.setVisible(True)

    def set_hint(self, text: str):
        """Show (or, with "", hide) the suggestion to tune the model."""
        self.hint.setText(text)
        self.hint.setVisible(bool(text))

    def clear(self):
        self.entries = []
        self._followers = None
        self.list.clear()
        self._items.clear()
        self.note.setVisible(False)
        self.set_hint("")

    def mark(self, states: dict):
        """Dim the entries whose frame is handed in or accepted."""
        self._done = {fid for fid, st in states.items() if st in (IN_REVIEW, ACCEPTED)}
        for fid, it in self._items.items():
            it.setData(DONE, fid in self._done)

    def set_current(self, frame_id: int | None):
        self._current = frame_id
        select_entry(self.list, self._items.get(frame_id) if frame_id is not None else None)

    def set_thumbnail(self, frame_id: int, image: QImage):
        it = self._items.get(frame_id)
        if it is not None:
            it.setIcon(thumbnail_icon(image))

    def next_after(self, frame_id: int | None) -> int | None:
        """The next entry not yet handed in, after ``frame_id`` (wrapping round).

        When ``frame_id`` has left the list (labelled, so re-ranked away), "after" is where it
        stood before: the first of the entries that followed it then and are still listed, so
        frames one skipped on the way are not offered again first.
        """
        ids = [int(e.frame_id) for e in self.entries]
        if not ids:
            return None
        start = 0
        if frame_id in ids:
            start = ids.index(frame_id) + 1
        elif self._followers is not None and self._followers[0] == frame_id:
            listed = set(ids)
            start = next((ids.index(f) for f in self._followers[1] if f in listed), 0)
        for fid in ids[start:] + ids[:start]:
            if fid not in self._done and fid != frame_id:
                return fid
        return None

    def item_for(self, frame_id: int) -> QListWidgetItem | None:
        return self._items.get(frame_id)
