"""Running the analysis of a trial off the GUI thread, one trait at a time.

The field book is taken from the session on the GUI thread when a run starts (the trial file
belongs to that thread); the traits are then analysed in a worker thread by
trialdesk.core.analysis, exactly as :func:`trialdesk.core.analysis.analyze` does it: the same
checks of the settings first, the same handling of a trait that cannot be analysed, the same
result. A cancel takes effect between traits.

:class:`Background` runs the smaller pieces of work of the views (a read-out with a simulated
Dunnett critical value, the residuals of a large trial) in a thread pool.
"""

from __future__ import annotations

import threading
import traceback
from collections.abc import Callable
from typing import Any

from PySide6.QtCore import QObject, QRunnable, QThread, QThreadPool, Signal, Slot

from trialdesk.core.analysis import AnalysisCancelled, analyze
from trialdesk.core.errors import TrialInputError
from trialdesk.core.fieldbook import FieldBook
from trialdesk.core.results import AnalysisSettings, TrialAnalysis
from trialdesk.core.trial_fieldbook import derivation_notes
from trialdesk.desktop.session import TrialSession

# A least-squares fit of up to this many plots takes a few tens of milliseconds: the views do
# it on the GUI thread; larger trials go to the background.
QUICK_PLOTS = 2000


class _Worker(QObject):
    """Analyses the traits of one run; lives in the run's thread."""

    progress = Signal(int, int, str)
    finished = Signal(object)
    failed = Signal(str)
    cancelled = Signal()

    def __init__(self, book: FieldBook, settings: AnalysisSettings, notes: list[str],
                 stop: threading.Event) -> None:
        super().__init__()
        self._book, self._settings, self._notes, self._stop = book, settings, notes, stop

    @Slot()
    def run(self) -> None:
        try:
            outcome = self._analyse()
        except TrialInputError as error:
            self.failed.emit(str(error))
        except Exception as error:  # a fault of the program: say so rather than hang the run
            traceback.print_exc()
            self.failed.emit(f"the analysis stopped on an unexpected error ({error!r}); "
                             "please report it with the trial file")
        else:
            if outcome is None:
                self.cancelled.emit()
            else:
                self.finished.emit(outcome)

    def _analyse(self) -> TrialAnalysis | None:
        try:
            return analyze(self._book, self._settings, notes=self._notes,
                           progress=self.progress.emit, should_stop=self._stop.is_set)
        except AnalysisCancelled:
            return None


class AnalysisRunner(QObject):
    """Runs the analysis of the session's trial in a worker thread.

    Signals
    -------
    progress(int done, int total, str trait) : before each trait (``trait`` is the one about to be
        analysed, ``done`` how many are finished) and once at the end with ``done == total``.
    finished(TrialAnalysis) : the run completed; the main window passes it to
        ``session.set_results``.
    failed(str) : the run stopped on a problem with the data or the settings (the message of the
        TrialInputError, naming file, plot or column).
    cancelled() : the run was cancelled; nothing was produced.
    """

    progress = Signal(int, int, str)
    finished = Signal(object)
    failed = Signal(str)
    cancelled = Signal()

    def __init__(self, session: TrialSession, parent: QObject | None = None) -> None:
        super().__init__(parent)
        self._session = session
        self._thread: QThread | None = None
        self._worker: _Worker | None = None
        self._stop = threading.Event()
        self._ending: list[tuple[QThread, _Worker]] = []  # runs whose thread is stopping

    def is_running(self) -> bool:
        """Whether a run is under way (from ``start`` until one of the end signals)."""
        return self._worker is not None

    def start(self, settings: AnalysisSettings) -> None:
        """Start analysing the session's trial with ``settings``.

        Raises
        ------
        RuntimeError
            If a run is already under way (cancel it first).
        TrialInputError
            If no trial is open.
        """
        if self.is_running():
            raise RuntimeError("an analysis is already running")
        session = self._session
        if session.trial is None:
            raise TrialInputError("no trial is open")
        book = session.fieldbook()
        notes = derivation_notes(session.trial)
        self._stop = threading.Event()
        thread = QThread(self)
        worker = _Worker(book, settings, notes, self._stop)
        worker.moveToThread(thread)
        thread.started.connect(worker.run)
        worker.progress.connect(self.progress)
        worker.finished.connect(self._on_finished)
        worker.failed.connect(self._on_failed)
        worker.cancelled.connect(self._on_cancelled)
        self._thread, self._worker = thread, worker
        thread.start()

    def cancel(self) -> None:
        """Ask the run to stop; it stops before the next trait and emits ``cancelled``."""
        if self.is_running():
            self._stop.set()

    def shutdown(self) -> None:
        """Cancel any run and wait for its thread (when the window closes)."""
        self.cancel()
        threads = [t for t, _ in self._ending] + ([self._thread] if self._thread else [])
        for thread in threads:
            thread.quit()
            thread.wait()

    def _end(self) -> None:
        thread, worker = self._thread, self._worker
        self._thread = self._worker = None
        # The worker is kept referenced until its thread has stopped, then both are deleted.
        self._ending.append((thread, worker))
        thread.finished.connect(self._reap)
        thread.quit()

    @Slot()
    def _reap(self) -> None:
        for thread, worker in [pair for pair in self._ending if pair[0].isFinished()]:
            self._ending.remove((thread, worker))
            worker.deleteLater()
            thread.deleteLater()

    @Slot(object)
    def _on_finished(self, analysis: TrialAnalysis) -> None:
        self._end()
        self.finished.emit(analysis)

    @Slot(str)
    def _on_failed(self, message: str) -> None:
        self._end()
        self.failed.emit(message)

    @Slot()
    def _on_cancelled(self) -> None:
        self._end()
        self.cancelled.emit()


class _Job(QRunnable):
    def __init__(self, work: Callable[[], None]) -> None:
        super().__init__()
        self._work = work

    def run(self) -> None:
        self._work()


class Background(QObject):
    """Runs small pieces of work in a thread pool and hands back the latest result of each kind.

    ``submit(key, work, done)`` runs ``work()`` in the pool and then calls ``done(outcome)`` on
    the GUI thread, where ``outcome`` is the result or the TrialInputError raised; a result is
    dropped when newer work of the same ``key`` was submitted meanwhile.
    """

    _finished = Signal(str, int, object)

    def __init__(self, parent: QObject | None = None) -> None:
        super().__init__(parent)
        self._pool = QThreadPool(self)
        self._pool.setMaxThreadCount(1)
        self._latest: dict[str, int] = {}
        self._done: dict[str, Callable[[Any], None]] = {}
        self._finished.connect(self._deliver)

    def submit(self, key: str, work: Callable[[], Any], done: Callable[[Any], None]) -> None:
        token = self._latest.get(key, 0) + 1
        self._latest[key], self._done[key] = token, done

        def run() -> None:
            try:
                outcome = work()
            except TrialInputError as error:
                outcome = error
            try:
                self._finished.emit(key, token, outcome)
            except RuntimeError:  # the window closed while this ran: nobody wants the outcome
                pass

        self._pool.start(_Job(run))

    def forget(self, key: str) -> None:
        """Drop the result of any work of ``key`` still running."""
        self._latest[key] = self._latest.get(key, 0) + 1

    def wait(self) -> None:
        """Wait for the work under way (when the window closes, and in tests)."""
        self._pool.waitForDone()

    @Slot(str, int, object)
    def _deliver(self, key: str, token: int, outcome: Any) -> None:
        if self._latest.get(key) == token:
            self._done[key](outcome)
