"""Starting the window (``ventcast open``): a screen or an offscreen screenshot, recovery offers, clean disposal."""

from __future__ import annotations

import os
import sys

from PySide6 import QtCore, QtWidgets

from ..casefile import CaseError, load, load_demo, write_atomic
from ..engine import apply_sets
from .common import APP_NAME, ORG_NAME, _icon, _quiet_offscreen_warnings
from .dialogs import ask_recovery, read_recoveries
from .main import MainWindow
from .walkthrough_window import WalkthroughWindow


def offer_recovery(window: MainWindow, ask=None) -> bool:
    """Offer each case whose window did not close cleanly, naming it; the first one recovered goes into
    ``window`` and the others into windows of their own. True when something was restored."""
    ask = ask or ask_recovery
    found = read_recoveries()
    restored = False
    for i, (path, doc) in enumerate(found):
        answer = ask(window, doc, len(found) - i - 1)
        if answer == "later":
            continue
        if answer == "recover":
            target = window
            if restored:
                target = MainWindow(doc["case"], path=doc.get("path"), synchronous=window.runner.synchronous)
                target.show()
            target.restore(doc)
            restored = True
        try:
            path.unlink()
        except OSError:
            pass
    return restored


def run(case_path: str | None = None, demo: str | None = None, screenshot: str | None = None,
        size: tuple[int, int] = (1600, 1000), quit_after_ms: int | None = None, ask_recovery: bool = True,
        sets=(), tab: str | None = None, walkthrough=None, case: dict | None = None, editor: str | None = None) -> int:
    """Start the window (``ventcast open``). With ``screenshot``, render offscreen to a PNG and exit.

    ``sets`` (KEY=VALUE, as in ``predict --set``) make Trial A; ``tab`` picks the right-hand panel
    ('limits', 'lung-fit', 'options', 'step-down' or 'forecast-check'; with a screenshot options and step-down are computed first).
    ``case`` is an already loaded case (the command line has read and checked it); ``walkthrough`` a
    (script, folder) pair opens the Walkthrough window instead; ``editor`` (a new script's path) the
    walkthrough script editor.
    """
    if screenshot:
        os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
    elif not (os.environ.get("QT_QPA_PLATFORM") or os.environ.get("DISPLAY") or os.environ.get("WAYLAND_DISPLAY")):
        # Without a screen Qt would abort the process; say what to do instead.
        raise CaseError("(display)", "no screen to open the window on (DISPLAY is not set): use --screenshot FILE.png, "
                                     "or the predict command, or set QT_QPA_PLATFORM=offscreen")
    QtCore.qInstallMessageHandler(_quiet_offscreen_warnings)
    app = QtWidgets.QApplication.instance() or QtWidgets.QApplication([APP_NAME])
    app.setOrganizationName(ORG_NAME)
    app.setApplicationName(APP_NAME)
    app.setDesktopFileName("ventcast")  # matches the menu entry of `ventcast desktop-entry`
    app.setWindowIcon(_icon())
    if editor is not None:
        from .script_editor import ScriptEditor
        return _run_until_closed(app, ScriptEditor(path=editor), quit_after_ms)
    if walkthrough is not None:
        script, folder = walkthrough
        return _run_until_closed(app, WalkthroughWindow(script, folder), quit_after_ms)
    if case is None:
        case = load(case_path) if case_path else load_demo(demo or "ards-moderate")
    trials = {"A": apply_sets(case, sets), "B": None, "C": None} if sets else None
    window = MainWindow(case, path=case_path, synchronous=bool(screenshot), trials=trials)
    if tab == "lung-fit":
        window.right_tabs.setCurrentIndex(1)
    elif tab == "options":
        window.right_tabs.setCurrentIndex(2)
        if screenshot:
            window.find_options()
    elif tab == "step-down":
        window.right_tabs.setCurrentIndex(3)
        if screenshot:
            window.plan_step_down()
    elif tab == "forecast-check":
        window.right_tabs.setCurrentIndex(4)
    if screenshot:
        window.resize(*size)
        window.show()
        for _ in range(10):  # layout passes and deferred row fitting (zero-time timers) settle
            app.processEvents()
        if window.fit_result is None:
            print(f"ventcast open: the case could not be fitted: {window.status.text()}", file=sys.stderr)
        image = window.grab()
        if image.size().width() != size[0] or image.size().height() != size[1]:
            # Never a shrunken picture of a larger window: that would hide what does not fit.
            hint = window.minimumSizeHint()
            least = (max(hint.width(), image.size().width()), max(hint.height(), image.size().height()))
            window.close()
            _dispose(window, app)
            raise CaseError("--size", f"value {size[0]}x{size[1]} is smaller than this case's window can be drawn; "
                                      f"the accepted range is at least {least[0]}x{least[1]}")
        data = QtCore.QByteArray()
        buffer = QtCore.QBuffer(data)
        buffer.open(QtCore.QIODevice.WriteOnly)
        if not image.save(buffer, "PNG"):
            raise OSError(f"could not encode the screenshot for {screenshot}")
        write_atomic(screenshot, bytes(data))  # whole or not at all; no temporary file left behind
        window.close()
        _dispose(window, app)
        return 0
    window.show()
    if ask_recovery:
        offer_recovery(window)  # over the window, once it is on screen
    if quit_after_ms is not None:
        QtCore.QTimer.singleShot(quit_after_ms, window.close)
    code = app.exec()
    _dispose(window, app)
    return code


def _run_until_closed(app, window, quit_after_ms: int | None) -> int:
    """Show ``window`` and run the event loop until it closes (or after ``quit_after_ms``, for tests)."""
    window.show()
    if quit_after_ms is not None:
        QtCore.QTimer.singleShot(quit_after_ms, window.close)
    code = app.exec()
    _dispose(window, app)
    return code


def _dispose(window, app):
    """Delete the window's C++ objects while Python still holds the interpreter: left to interpreter
    shutdown, pyqtgraph's scene items can be destroyed after their views, which crashes."""
    window.deleteLater()
    app.sendPostedEvents(None, QtCore.QEvent.DeferredDelete)
    app.processEvents()
