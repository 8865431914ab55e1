"""Undo and redo: each command holds the before and after snapshots of the frames an edit
touched, and undoes or redoes by calling core.edit.restore, so the result is stored at
once like every other edit, works after moving to other frames, and is refused (with a
message) when someone changed the frame in the meantime."""
from __future__ import annotations

from PySide6.QtGui import QUndoCommand


class SnapshotCommand(QUndoCommand):
    def __init__(self, window, text: str, before: dict, after: dict):
        super().__init__(text)
        self.window = window
        self.before = dict(before)
        self.after = dict(after)
        self._first = True

    @property
    def frames(self) -> tuple[int, ...]:
        return tuple(self.before)

    def redo(self):
        if self._first:          # the edit itself was already made (and stored) before the push
            self._first = False
            return
        if not self.window.restore_frames(self.after, expect=self.before, action="redo"):
            self.setObsolete(True)

    def undo(self):
        if not self.window.restore_frames(self.before, expect=self.after, action="undo"):
            self.setObsolete(True)
