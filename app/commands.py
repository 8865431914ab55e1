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
        if not self.window.restore_frames(self.after, expect=self.before, action="redo", what=self.text()):
            self.setObsolete(True)

    def undo(self):
        if not self.window.restore_frames(self.before, expect=self.after, action="undo", what=self.text()):
            self.setObsolete(True)


class NudgeCommand(SnapshotCommand):
    """A nudge of one keypoint by the keyboard. Nudges of the same keypoint on the same frame
    in a row undo as one step, so holding a key down is not dozens of undos."""

    ID = 1001

    def __init__(self, window, text: str, before: dict, after: dict, key):
        super().__init__(window, text, before, after)
        self.key = key

    def id(self) -> int:
        return self.ID

    def mergeWith(self, other) -> bool:
        if not isinstance(other, NudgeCommand) or other.key != self.key:
            return False
        self.after = dict(other.after)      # from the first nudge's before to the last one's after
        return True
