"""Engine calls off the window's thread: requests with ids, the newest wins, failures come back as data.

The window freezes its inputs into a request (plain data), a worker runs pure engine functions on
a ``QThreadPool`` thread, and the result is delivered on the main thread by a queued signal. A
result whose id is older than the newest request of its kind is dropped. ``synchronous=True``
runs every request at once on the calling thread (for tests and offscreen screenshots).
"""

from __future__ import annotations

import itertools
import sys
import traceback
from dataclasses import dataclass

from PySide6 import QtCore


@dataclass(frozen=True)
class Request:
    """A frozen unit of work: ``kind`` ('fit', 'forecast', 'band'), an id, and a callable with no arguments
    (a stoppable request's is bound to its stop check)."""

    id: int
    kind: str
    work: object


class _Signals(QtCore.QObject):
    done = QtCore.Signal(object, object)     # request, result
    failed = QtCore.Signal(object, str)      # request, message


class _Task(QtCore.QRunnable):
    def __init__(self, request: Request, signals: _Signals):
        super().__init__()
        self.request = request
        self.signals = signals
        self.setAutoDelete(True)

    def run(self):
        try:
            result = self.request.work()
        except Exception as exc:  # reported to the window as data, never swallowed
            self.signals.failed.emit(self.request, _describe(exc))
            return
        self.signals.done.emit(self.request, result)


def _describe(exc: Exception) -> str:
    text = str(exc) or type(exc).__name__
    if not isinstance(exc, (ValueError, ArithmeticError, RuntimeError)):
        tb = traceback.extract_tb(exc.__traceback__)
        where = f" at {tb[-1].name}" if tb else ""
        text = f"internal error ({type(exc).__name__}{where}: {text})"
    return text


#: Python's GIL switch interval in a process with a window and a worker thread [s].
GIL_SWITCH_INTERVAL_S = 0.001


class EngineRunner(QtCore.QObject):
    """Runs requests on a thread pool; emits ``finished`` / ``failed`` only for the newest of each kind."""

    finished = QtCore.Signal(object, object)   # request, result
    failed = QtCore.Signal(object, str)        # request, message

    def __init__(self, parent=None, synchronous: bool = False):
        super().__init__(parent)
        self.synchronous = synchronous
        self.pool = QtCore.QThreadPool(self)
        self.pool.setMaxThreadCount(1)  # engine calls are CPU-bound and share the GIL: one at a time
        if not synchronous:
            # The GUI thread gives up the GIL around every Qt call and must win it back from the busy
            # worker: at the default 5 ms switch interval a repaint of many Qt calls could wait
            # 100-150 ms on a loaded machine (measured). A waiting thread is served within 1 ms;
            # the interval only matters while another thread waits, so the engine loses little.
            sys.setswitchinterval(min(sys.getswitchinterval(), GIL_SWITCH_INTERVAL_S))
        self._ids = itertools.count(1)
        self._latest: dict[str, int] = {}
        self._cancelled: set[str] = set()
        self._signals = _Signals()
        self._signals.done.connect(self._on_done, QtCore.Qt.QueuedConnection)
        self._signals.failed.connect(self._on_failed, QtCore.Qt.QueuedConnection)

    def submit(self, kind: str, work, stoppable: bool = False) -> Request:
        """Run ``work()``; with ``stoppable``, ``work(stop)``, where ``stop()`` turns True once the request
        is no longer the newest of its kind or was cancelled: long work checks it between its parts and
        gives up (raising), so a stale computation stops instead of running on for nothing."""
        request = Request(next(self._ids), kind, work)
        self._latest[kind] = request.id
        self._cancelled.discard(kind)
        if stoppable:
            request = Request(request.id, kind, lambda: work(lambda: not self.is_current(request)))
        if self.synchronous:
            try:
                result = request.work()
            except Exception as exc:
                self.failed.emit(request, _describe(exc))
            else:
                self.finished.emit(request, result)
            return request
        self.pool.start(_Task(request, self._signals))
        return request

    def cancel(self, kind: str) -> None:
        """Forget the newest request of ``kind``: its result, when it comes, is dropped.

        A computation already running is not interrupted midway (numpy cannot be); a stoppable one gives
        up at its next check, any other finishes in the background and its result is discarded.
        """
        self._cancelled.add(kind)

    def cancel_all(self) -> None:
        """Cancel every kind and drop the requests still queued (closing the window): a stoppable computation
        already running stops at its next check."""
        self._cancelled.update(self._latest)
        self.pool.clear()

    def is_current(self, request: Request) -> bool:
        return self._latest.get(request.kind) == request.id and request.kind not in self._cancelled

    def _on_done(self, request, result):
        if self.is_current(request):
            self.finished.emit(request, result)

    def _on_failed(self, request, message):
        if self.is_current(request):
            self.failed.emit(request, message)

    def wait(self, msecs: int = 30000) -> bool:
        """Block until the pool is idle (tests and shutdown)."""
        return self.pool.waitForDone(msecs)
