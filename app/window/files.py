"""Case files of the main window: open, save (atomic, with a check for changes made on disk meanwhile),
recent files, FHIR import, report/CSV/chart export, and the autosave recovery file.

A mixin of :class:`app.window.main.MainWindow`: it reads and writes the window's state, never the engine.
"""

from __future__ import annotations

import copy
import json
import math
import os
from pathlib import Path

from PySide6 import QtCore, QtGui, QtWidgets

from ..casefile import CaseError, load, load_demo, read_text, write_atomic
from .common import APP_NAME, TRIALS, file_stamp
from .dialogs import ask_plain


class CaseFiles:
    """File, export and recovery actions of the main window."""

    def ask_unsaved(self, doing: str) -> str:
        """Ask what to do with unsaved work before ``doing`` ('close the window', 'open another case'):
        'save', 'discard' or 'cancel'. Tests replace this method."""
        return ask_plain(self, QtWidgets.QMessageBox.Warning, "Unsaved changes",
                         f"{self.case_name()} has changes that are not saved (trials, goals or an imported case). "
                         f"Save them before you {doing}?",
                         [("Save", QtWidgets.QMessageBox.AcceptRole, "save"),
                          ("Discard changes", QtWidgets.QMessageBox.DestructiveRole, "discard"),
                          ("Cancel", QtWidgets.QMessageBox.RejectRole, "cancel")])

    def may_leave_case(self, doing: str) -> bool:
        """True when the current case may be left: no unsaved work, or the user saved or discarded it.
        Cancel (or a save that fails) keeps the window and its recovery file as they are."""
        if not self.has_unsaved_work():
            return True
        answer = self.ask_unsaved(doing)
        if answer == "save":
            return bool(self.save())
        return answer == "discard"

    def open_dialog(self):
        if not self.may_leave_case("open another case"):
            return
        path, _ = QtWidgets.QFileDialog.getOpenFileName(self, "Open case", "", "Ventcast case (*.ventcast.json)")
        if path:
            self.open_path(path, asked=True)

    def open_demo(self, name: str) -> bool:
        if not self.may_leave_case("open another case"):
            return False
        self.load_case(load_demo(name), None)
        return True

    def open_path(self, path: str, asked: bool = False):
        if not asked and not self.may_leave_case("open another case"):
            return False
        try:
            case = load(path)
        except CaseError as exc:
            self._on_failure(None, str(exc))
            return False
        self.load_case(case, str(path))
        return True

    def save(self):
        if not self.state.path:
            return self.save_as()
        return self._save_to(self.state.path)

    def save_as(self):
        path, _ = QtWidgets.QFileDialog.getSaveFileName(self, "Save case as", "", "Ventcast case (*.ventcast.json)")
        if not path:
            return False
        if not path.endswith(".ventcast.json"):
            path += ".ventcast.json"
        return self._save_to(path)

    def ask_overwrite_changed(self, path) -> bool:
        """The case file changed on disk since this window read or wrote it (another window or program
        saved it): True to replace it anyway. Tests replace this method."""
        return ask_plain(self, QtWidgets.QMessageBox.Warning, "Case file changed on disk",
                         f"{path} was changed by another window or program since this window opened or saved it. "
                         f"Saving replaces those changes with this window's case. Use Save as to keep both.",
                         [("Replace the file", QtWidgets.QMessageBox.DestructiveRole, True),
                          ("Cancel", QtWidgets.QMessageBox.RejectRole, False)])

    def _save_to(self, path):
        from ..casefile import save
        same_file = self.state.path is not None and Path(path).resolve() == Path(self.state.path).resolve()
        if same_file and self.disk_stamp is not None and file_stamp(path) != self.disk_stamp:
            if not self.ask_overwrite_changed(path):
                self.status.setText(f"not saved: {path} changed on disk; use Save as to keep both")
                return False
        try:
            save(path, {**self.state.case, "trials": self.state.trials})  # trials and goals are saved with the case
        except (CaseError, OSError) as exc:
            self._on_failure(None, f"not saved: {exc}")
            return False
        self.state.path = str(path)
        self.disk_stamp = file_stamp(path)
        self.case_unsaved = False
        self.undo_stack.setClean()
        self._remember_recent(str(path))
        self._update_title()
        self.status.setText(f"saved {path}")
        return True

    def _remember_recent(self, path):
        recent = [p for p in (self.settings_store.value("recent", []) or []) if p != path]
        recent.insert(0, path)
        self.settings_store.setValue("recent", recent[:8])
        self._refresh_recent()

    def _refresh_recent(self):
        if not hasattr(self, "recent_menu"):
            return
        self.recent_menu.clear()
        recent = self.settings_store.value("recent", []) or []
        if isinstance(recent, str):
            recent = [recent]
        for p in recent:
            self.recent_menu.addAction(p).triggered.connect(lambda _c=False, p=p: self.open_path(p))
        self.recent_menu.setEnabled(bool(recent))

    def _on_clean_changed(self, _clean):
        self._update_title()

    def _update_title(self):
        name = Path(self.state.path).name if self.state.path else "unsaved case"
        dirty = " *" if self.has_unsaved_work() else ""
        self.setWindowTitle(f"{APP_NAME} \u2014 {name}{dirty}")

    # --- exports and import --------------------------------------------------------------------------
    def _trial_settings(self) -> dict:
        return {t: dict(v) for t, v in self.state.trials.items() if v is not None}

    def export_report(self, path: str, csv_dir: str | None = None):
        """Forecast every trial on the worker, then lay out the PDF (and CSVs) here; emits ``exported``."""
        if self.fit_result is None:
            self._on_failure(None, "the lung model is not fitted yet: nothing to report")
            return
        if not self.fit_result.sampled:
            self._on_failure(None, "the fit's likely ranges are still being computed: export when they are shown")
            return
        from ..casefile import check_output_file, check_output_files
        try:  # every output path is checked before any work, so that nothing is half-written
            if path:
                check_output_file("report", path)
            if csv_dir:
                check_output_files("CSV folder", csv_dir, ("course.csv", "observations.csv"))
        except CaseError as exc:
            self._on_failure(None, f"not exported: {exc}")
            return
        from ..report import compute_forecasts
        case, result, trials = copy.deepcopy(self.state.case), self.fit_result, self._trial_settings()
        self._pending_export = {"pdf": path, "csv": csv_dir, "case": case}
        self._start_busy(cancellable=True, kind="export")
        self.runner.submit("export", lambda: compute_forecasts(case, trials, result))

    def export_csv(self, folder: str):
        self.export_report(None, folder)

    def _finish_export(self, forecasts):
        from ..report import course_csv, observations_csv, render_report
        job = self._pending_export
        try:
            if job["pdf"]:
                res = render_report(job["case"], forecasts, job["pdf"], job["csv"])
                written = [res["pdf"]] + res["csv"]
            else:
                folder = Path(job["csv"])
                folder.mkdir(exist_ok=True)
                written = []
                for name, text in (("course.csv", course_csv(forecasts)), ("observations.csv", observations_csv(job["case"]))):
                    write_atomic(folder / name, text)
                    written.append(str(folder / name))
        except (OSError, ValueError) as exc:
            self._on_failure(None, f"not exported: {exc}")
            return
        self.status.setText("exported " + ", ".join(written))
        self.exported.emit(written)

    def export_charts(self, folder: str) -> list:
        """PNG and SVG of each Outlook chart into ``folder``."""
        from PySide6 import QtSvg

        from ..casefile import check_output_files
        try:
            out = check_output_files("chart folder", folder, [f"outlook-{k}.{e}" for k in self.plots for e in ("png", "svg")])
        except CaseError as exc:
            self._on_failure(None, f"not exported: {exc}")
            return []
        out.mkdir(exist_ok=True)
        written = []
        for key, plot in self.plots.items():
            rect = plot.sceneBoundingRect()
            # The Outlook's key (which line is which trial) above each chart: a chart alone is read too.
            doc = QtGui.QTextDocument()
            doc.setHtml(self.outlook.key.text())
            doc.setTextWidth(rect.width())
            top = int(math.ceil(doc.size().height())) if self.outlook.key.text() else 0
            size = QtCore.QSize(int(rect.width()), int(rect.height()) + top)

            def paint(device):
                painter = QtGui.QPainter(device)
                painter.fillRect(QtCore.QRectF(0, 0, size.width(), size.height()), QtGui.QColor("#ffffff"))
                if top:
                    doc.drawContents(painter)
                plot.scene().render(painter, QtCore.QRectF(0, top, rect.width(), rect.height()), rect)
                painter.end()

            image = QtGui.QImage(size, QtGui.QImage.Format_ARGB32)
            paint(image)
            png, svg = out / f"outlook-{key}.png", out / f"outlook-{key}.svg"
            data = QtCore.QByteArray()
            buffer = QtCore.QBuffer(data)
            buffer.open(QtCore.QIODevice.WriteOnly)
            image.save(buffer, "PNG")
            # QSvgGenerator, not pyqtgraph's SVG exporter (it fails on the filled likely-range band).
            svg_data = QtCore.QByteArray()
            svg_buffer = QtCore.QBuffer(svg_data)
            svg_buffer.open(QtCore.QIODevice.WriteOnly)
            gen = QtSvg.QSvgGenerator()
            gen.setOutputDevice(svg_buffer)
            gen.setSize(size)
            gen.setViewBox(QtCore.QRect(0, 0, size.width(), size.height()))
            gen.setTitle(f"Ventcast Outlook: {key}")
            paint(gen)
            try:
                write_atomic(png, bytes(data))
                write_atomic(svg, bytes(svg_data))
            except OSError as exc:
                self._on_failure(None, f"not exported: {exc}")
                return written
            written += [str(png), str(svg)]
        self.status.setText(f"exported {len(written)} chart files to {out}")
        return written

    def import_fhir(self, path: str):
        """Blood gases from a FHIR bundle, added to a copy of the current case (the file on disk is untouched)."""
        from ..fhir import import_bundle
        try:
            case, report = import_bundle(read_text(path, "bundle", max_bytes=10_000_000), into=self.state.case)
        except CaseError as exc:
            self._on_failure(None, f"not imported: {exc}")
            return None
        self.load_case(case, None, trials=self.state.trials)  # the trials stay: the settings did not change
        self.case_unsaved = True
        self._update_title()
        self.status.setText(f"imported {len(report['imported'])} value(s), skipped {len(report['skipped'])}; "
                            f"the case is unsaved")
        return report

    def export_report_dialog(self):
        path, _ = QtWidgets.QFileDialog.getSaveFileName(self, "Export report", "", "PDF (*.pdf)")
        if path:
            self.export_report(path if path.lower().endswith(".pdf") else path + ".pdf")

    def export_csv_dialog(self):
        folder = QtWidgets.QFileDialog.getExistingDirectory(self, "Export CSV into folder")
        if folder:
            self.export_csv(folder)

    def export_charts_dialog(self):
        folder = QtWidgets.QFileDialog.getExistingDirectory(self, "Export charts into folder")
        if folder:
            self.export_charts(folder)

    def import_fhir_dialog(self):
        path, _ = QtWidgets.QFileDialog.getOpenFileName(self, "Import FHIR bundle", "", "FHIR JSON (*.json)")
        if path:
            report = self.import_fhir(path)
            if report is not None:
                lines = [f"imported LOINC {i['code']} -> {i['into']}" for i in report["imported"]]
                lines += [f"skipped {('LOINC ' + s['code']) if s['code'] else ''} {s['what']}: {s['why']}"
                          for s in report["skipped"]]
                lines += [f"note: {w}" for w in report.get("warnings", [])]
                QtWidgets.QMessageBox.information(self, "FHIR import", "\n".join(lines))

    # --- recovery -----------------------------------------------------------------------------------
    def recovery_document(self) -> dict:
        return {"format": "ventcast.recovery", "version": 1, "pid": os.getpid(), "name": self.case_name(),
                "saved_at": QtCore.QDateTime.currentDateTime().toString(QtCore.Qt.ISODate),
                "path": self.state.path, "case": self.state.case,
                "trials": self.state.trials, "active": self.state.active}

    def has_unsaved_work(self) -> bool:
        """Trial or goal changes since the last save or open, or a case that came from an import or a recovery."""
        return self.case_unsaved or not self.undo_stack.isClean()

    def write_recovery(self):
        """Autosave: the case and every trial as on screen, atomically, to this window's own recovery
        file — only when there is unsaved work (a case opened and left as it was needs no recovery)."""
        if not self.has_unsaved_work() or self.recovery_file is None:
            return
        try:
            self.recovery_file.parent.mkdir(parents=True, exist_ok=True)
            write_atomic(self.recovery_file, json.dumps(self.recovery_document(), indent=1), mode=0o600)
        except OSError as exc:
            self.status.setText(f"\u26a0 autosave failed: {exc}")

    def _drop_recovery(self):
        """Remove this window's own recovery file (never another window's)."""
        if self.recovery_file is not None:
            try:
                self.recovery_file.unlink()
            except OSError:
                pass

    def restore(self, doc: dict):
        self.load_case(doc["case"], doc.get("path"), trials=doc["trials"])
        self.case_unsaved = True  # recovered work is not in any file until it is saved
        self._update_title()
        self.trial_tabs.setCurrentIndex(TRIALS.index(doc.get("active", "A")))
        self.write_recovery()  # under this window's name at once: the orphan it came from is removed next
