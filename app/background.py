"""The one helper that runs long work off the GUI thread.

Proposals, ranking, adding media, carrying points forward, exports: each runs
as ``fn(project, progress, cancel)`` on a thread of a QThreadPool, with its
*own* :class:`Project` opened in that thread (the store holds one SQLite
connection, which is not shared between threads). ``progress(done, total,
message)`` feeds a progress dialog; pressing Cancel sets ``cancel`` (a
``threading.Event``) and makes the next ``progress`` call raise
:class:`Cancelled`, so operations that only report progress stop too.

When the work ends, ``on_done(result)`` runs on the GUI thread (typically to
refresh views from a returned Changes record). A :class:`KinemarkError` is
shown in a message box as it is; any other exception is shown as an internal
error with the traceback in the details.
"""
from __future__ import annotations

import threading
import traceback
from pathlib import Path
from typing import Any, Callable

from PySide6.QtCore import QObject, QRunnable, Qt, QThreadPool, Signal
from PySide6.QtWidgets import QMessageBox, QProgressDialog, QWidget

from ..core.errors import KinemarkError


class Cancelled(Exception):
    """The person pressed Cancel."""


class _Signals(QObject):
    progress = Signal(int, int, str)
    done = Signal(object)
    failed = Signal(object, str)      # exception, traceback text


class _Job(QRunnable):
    def __init__(self, root: Path | None, fn, cancel: threading.Event, signals: _Signals):
        super().__init__()
        self.setAutoDelete(True)
        self.root, self.fn, self.cancel, self.signals = root, fn, cancel, signals

    def run(self):
        project = None
        try:
            def progress(done, total, message=""):
                if self.cancel.is_set():
                    raise Cancelled()
                try:
                    self.signals.progress.emit(int(done), int(total), str(message))
                except RuntimeError:        # the window went away: nobody to tell, so stop
                    self.cancel.set()
                    raise Cancelled() from None

            if self.root is not None:
                from ..core.project import Project
                project = Project.open(self.root)
            result = self.fn(project, progress, self.cancel)
            if self.cancel.is_set():
                raise Cancelled()
        except BaseException as e:  # noqa: BLE001 - everything is reported to the GUI thread
            self._tell(self.signals.failed, e, traceback.format_exc())
        else:
            self._tell(self.signals.done, result)
        finally:
            if project is not None:
                project.close()


    @staticmethod
    def _tell(signal, *args):
        try:
            signal.emit(*args)
        except RuntimeError:            # the receiving window was closed meanwhile
            pass


class Background(QObject):
    """Runs jobs, shows their progress, reports their errors."""

    idle = Signal()

    def __init__(self, parent: QWidget, *, max_threads: int = 2):
        super().__init__(parent)
        self.parent_widget = parent
        self.pool = QThreadPool(self)
        self.pool.setMaxThreadCount(max_threads)
        self._active: dict[int, tuple] = {}
        self._next_id = 0
        self.last_error: BaseException | None = None
        self.boxes: list[QMessageBox] = []

    @property
    def busy(self) -> bool:
        return bool(self._active)

    def run(self, title: str, fn: Callable[[Any, Callable, threading.Event], Any], *,
            root: Path | None, on_done: Callable[[Any], None] | None = None,
            on_error: Callable[[BaseException], None] | None = None, quiet: bool = False,
            cancellable: bool = True, on_progress: Callable[[int, int, str], None] | None = None,
            on_cancelled: Callable[[], None] | None = None) -> threading.Event:
        """Start ``fn``; returns its cancel event.

        ``root``: the project folder to open in the worker (None: no project).
        ``quiet``: no progress dialog and no message box on error (``on_error``
        still runs); for background refreshes the person did not ask for.
        ``on_progress(done, total, message)``: also told of progress, on the GUI
        thread (e.g. a progress line in the status bar for a quiet job that the
        person can follow and cancel while they go on working).
        ``on_cancelled()``: runs on the GUI thread when the job ended by Cancel
        (work that stores as it goes may have kept its finished part).
        """
        job_id = self._next_id
        self._next_id += 1
        cancel = threading.Event()
        # parented to this object, so it lives and dies on the GUI thread: unparented, Python
        # owned it, and the slots' closures hold it in a reference cycle that the garbage
        # collector may break on any thread (a worker, the decode-ahead thread), deleting a
        # QObject from a thread it does not belong to while its queued signals are delivered
        signals = _Signals(self)
        dialog = None
        if not quiet:
            dialog = QProgressDialog(title, "Cancel" if cancellable else "", 0, 0, self.parent_widget)
            dialog.setWindowTitle("Kinemark")
            dialog.setWindowModality(Qt.WindowModal)
            dialog.setMinimumDuration(400)
            dialog.setAutoClose(False)
            dialog.setAutoReset(False)
            if not cancellable:
                dialog.setCancelButton(None)
            else:
                # closing the dialog also emits canceled: work that cannot stop part-way (and
                # stores its result at the end) must not be reported as cancelled once it ran
                dialog.canceled.connect(cancel.set)
            dialog.setValue(0)

        def on_progress_(done, total, message):
            if on_progress is not None:
                on_progress(done, total, message)
            if dialog is not None:
                dialog.setMaximum(max(total, 1))
                dialog.setValue(min(done, max(total, 1)))
                dialog.setLabelText(f"{title}\n{message}" if message else title)

        def finish():
            self._active.pop(job_id, None)
            if dialog is not None:
                dialog.close()
                dialog.deleteLater()
            signals.deleteLater()
            if not self._active:
                self.idle.emit()

        def on_success(result):
            finish()
            if on_done is not None:
                on_done(result)

        def on_failure(exc, tb):
            finish()
            if isinstance(exc, Cancelled):
                self.status(f"{title}: cancelled; nothing was changed by the unfinished part")
                if on_cancelled is not None:
                    on_cancelled()
                return
            self.last_error = exc
            if on_error is not None:
                on_error(exc)
            if not quiet:
                self.show_error(exc, tb, title)

        signals.progress.connect(on_progress_, Qt.QueuedConnection)
        signals.done.connect(on_success, Qt.QueuedConnection)
        signals.failed.connect(on_failure, Qt.QueuedConnection)
        self._active[job_id] = (title, cancel, signals, dialog)
        self.pool.start(_Job(Path(root) if root is not None else None, fn, cancel, signals))
        return cancel

    # ---- reporting --------------------------------------------------------------------

    def status(self, text: str):
        win = self.parent_widget
        if hasattr(win, "statusBar"):
            win.statusBar().showMessage(text, 8000)

    def show_error(self, exc: BaseException, tb: str = "", title: str = ""):
        """A KinemarkError as it is; anything else as an internal error with details."""
        box = QMessageBox(self.parent_widget)
        box.setWindowTitle("Kinemark")
        if isinstance(exc, KinemarkError):
            box.setIcon(QMessageBox.Warning)
            box.setText(str(exc))
        else:
            box.setIcon(QMessageBox.Critical)
            box.setText(f"Internal error{' while ' + title.lower() if title else ''}: "
                        f"{type(exc).__name__}: {exc}\n\nThis is a bug in Kinemark; please report it "
                        "with the details below. Your saved work is not affected.")
            box.setDetailedText(tb or "".join(traceback.format_exception(exc)))
        box.setAttribute(Qt.WA_DeleteOnClose)
        box.finished.connect(lambda *_: self.boxes.remove(box) if box in self.boxes else None)
        self.boxes.append(box)
        box.open()          # non-blocking: the event loop (and the other views) keep running
        return box

    def cancel_all(self):
        for _, cancel, _, _ in list(self._active.values()):
            cancel.set()

    def wait(self, ms: int = 30000) -> bool:
        """Wait for every job (tests, screenshots, closing). True when all finished."""
        from PySide6.QtCore import QCoreApplication, QElapsedTimer
        t = QElapsedTimer()
        t.start()
        while self._active and t.elapsed() < ms:
            self.pool.waitForDone(20)
            QCoreApplication.processEvents()
        return not self._active
