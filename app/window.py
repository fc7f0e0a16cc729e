"""The Ventcast window: Bedside, Trial settings, Outlook, Limits and Lung fit.

Widgets write to plain data (the case dict and the trial settings dicts); every change is
debounced, frozen into a request and computed on a worker (:mod:`app.worker`); the newest result
wins and is drawn by updating plot items created once. Nothing here computes physiology.
"""

from __future__ import annotations

import copy
import hashlib
import itertools
import json
import math
import os
import re
import sys
from dataclasses import dataclass
from html import escape
from pathlib import Path

import numpy as np
import pyqtgraph as pg
from PySide6 import QtCore, QtGui, QtWidgets

from ventcast.physiology.forecast import predict

from . import CAUTION, MMHG_PER_KPA, version
from .casefile import (CaseError, check_settings, load, load_demo, parse_json, read_text, validate,
                       write_atomic)
from .engine import (PARAMETER_LABELS, RECHECK_NOTE, apply_sets, fit_case, forecast_fitted, limit_checks, model_assumptions,
                     now_block, plan_case, sample_fit, settings_dict, settings_text, steady_block, to_settings, wean_case)
from .report import SOURCES
from .worker import EngineRunner

APP_NAME = "Ventcast"
ORG_NAME = "Ventcast"
DEBOUNCE_MS = 50
AUTOSAVE_MS = 30_000
TRIALS = ("A", "B", "C")

#: Okabe & Ito 2008 colour-blind-safe palette; one colour per quantity in every chart.
OKABE_ITO = {"black": "#000000", "orange": "#E69F00", "sky": "#56B4E9", "green": "#009E73",
             "yellow": "#F0E442", "blue": "#0072B2", "vermillion": "#D55E00", "purple": "#CC79A7"}
COLOUR = {"pao2": OKABE_ITO["blue"], "sao2": OKABE_ITO["blue"], "paco2": OKABE_ITO["vermillion"],
          "ph": OKABE_ITO["green"], "pplat": OKABE_ITO["purple"], "dp": OKABE_ITO["orange"],
          "vd_vt": OKABE_ITO["sky"], "ventilation": OKABE_ITO["sky"], "perfusion": OKABE_ITO["vermillion"]}
#: Symbols for Limits lines, so that status never rests on colour alone.
STATUS_SYMBOL = {"ok": "\u2713 ok", "info": "i note", "caution": "\u26a0 caution", "danger": "\u2716 danger"}

#: The trial-setting controls: key, label, unit, minimum, maximum, step, decimals.
CONTROLS = (
    ("fio2", "FiO2", "", 0.21, 1.0, 0.05, 2),
    ("peep_cmh2o", "PEEP", "cmH2O", 0.0, 30.0, 1.0, 0),
    ("vt_ml", "VT", "mL", 100.0, 1200.0, 10.0, 0),
    ("inspiratory_pressure_cmh2o", "Inspiratory pressure", "cmH2O", 1.0, 50.0, 1.0, 0),
    ("rr_per_min", "RR", "/min", 4.0, 60.0, 1.0, 0),
    ("inspiratory_time_s", "Ti", "s", 0.3, 3.0, 0.05, 2),
)

SHORTCUTS = (
    ("Ctrl+O", "open a case file"), ("Ctrl+S", "save the case (trials and goals included)"),
    ("Ctrl+Shift+S", "save as"), ("Ctrl+Z / Ctrl+Shift+Z", "undo / redo a trial change"),
    ("Ctrl+1 / 2 / 3", "edit Trial A / B / C"), ("Ctrl+R", "reset the trial to the current settings"),
    ("Ctrl+K", "switch mmHg / kPa"), ("Ctrl+Shift+O", "switch the oxygen chart PaO2 / SaO2"),
    ("F1", "this list"), ("Ctrl+Q", "quit"),
)

def kpa_from_mmhg(x):
    return x / MMHG_PER_KPA


def data_dir() -> Path:
    """Where recovery files live (``VENTCAST_DATA_DIR`` overrides, for tests)."""
    env = os.environ.get("VENTCAST_DATA_DIR")
    if env:
        return Path(env)
    loc = QtCore.QStandardPaths.writableLocation(QtCore.QStandardPaths.AppDataLocation)
    return Path(loc or Path.home() / ".ventcast")


RECOVERY_GLOB = "recovery-*.ventcast.json"
_window_serial = itertools.count(1)


def _slug(text: str) -> str:
    """A file-name-safe short form of a case's name (letters, digits, '-', '_', '.')."""
    return re.sub(r"[^A-Za-z0-9_.-]+", "-", text).strip("-.")[:40] or "untitled"


def new_recovery_path(case_name: str) -> Path:
    """A recovery file of one window: named after its case, with this process and window, so that two
    windows (or two processes) never share one and a clean close removes only its own."""
    return data_dir() / f"recovery-{_slug(case_name)}-{os.getpid()}-{next(_window_serial)}.ventcast.json"


def _process_alive(pid) -> bool:
    if not isinstance(pid, int) or isinstance(pid, bool) or pid <= 0:
        return False
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # alive, owned by another user
        pass
    return True


def file_stamp(path) -> str | None:
    """SHA-256 of a file's bytes (None when it cannot be read): what a save compares to find a file
    that another window or program changed since this window read or wrote it."""
    try:
        return hashlib.sha256(Path(path).read_bytes()).hexdigest()
    except OSError:
        return None


@dataclass
class TrialState:
    """Plain-data state of the window: the case, the trials (A always set), the active trial."""

    case: dict
    trials: dict
    active: str = "A"
    path: str | None = None


class TrialChange(QtGui.QUndoCommand):
    """One trial-setting change (merged while the same control keeps moving)."""

    def __init__(self, window: "MainWindow", trial: str, before: dict, after: dict, key: str):
        super().__init__(f"Trial {trial}: {key}")
        self.window, self.trial, self.before, self.after, self.key = window, trial, before, after, key

    def id(self):
        return 1

    def mergeWith(self, other):
        if other.trial != self.trial or other.key != self.key:
            return False
        self.after = other.after
        return True

    def redo(self):
        self.window._apply_trial(self.trial, self.after)

    def undo(self):
        self.window._apply_trial(self.trial, self.before)


def _axis(plot: pg.PlotItem, left: str, bottom: str = "minutes after the change [min]"):
    plot.setLabel("left", left)
    plot.setLabel("bottom", bottom)
    for name in ("left", "bottom"):
        plot.getAxis(name).enableAutoSIPrefix(False)
    plot.showGrid(x=True, y=True, alpha=0.15)
    plot.setMouseEnabled(x=False, y=False)
    plot.hideButtons()


class OutlookChart:
    """One Outlook chart: current course (dashed), trial course (solid), likely-range band, re-check marker."""

    def __init__(self, plot: pg.PlotItem, colour: str, min_span: float):
        self.plot = plot
        self.min_span = min_span  # smallest y span drawn, so solver-size wiggles never fill a chart
        c = QtGui.QColor(colour)
        self.now = plot.plot(pen=pg.mkPen(c, width=1, style=QtCore.Qt.DashLine), name="current settings")
        self.trial = plot.plot(pen=pg.mkPen(c, width=1), name="trial")
        band_colour = QtGui.QColor(c)
        band_colour.setAlpha(50)
        # FillBetweenItem follows PlotCurveItems (a PlotDataItem outside a view never builds its path).
        self.low = pg.PlotCurveItem(pen=pg.mkPen(None))
        self.high = pg.PlotCurveItem(pen=pg.mkPen(None))
        self.band = pg.FillBetweenItem(self.low, self.high, brush=pg.mkBrush(band_colour))
        plot.addItem(self.band)
        self.recheck = pg.InfiniteLine(angle=90, movable=False, pen=pg.mkPen("#555555", width=1,
                                                                           style=QtCore.Qt.DotLine),
                                       label="re-check", labelOpts={"position": 0.92, "color": "#333333"})
        plot.addItem(self.recheck)
        self.recheck.hide()
        self.hover = pg.TextItem(color="#222222", anchor=(0, 1))
        plot.addItem(self.hover, ignoreBounds=True)
        self.hover.hide()
        self.x = np.array([])
        self.y = np.array([])
        plot.scene().sigMouseMoved.connect(self._moved)

    def set(self, minutes, trial, now=None, low=None, high=None, recheck=None):
        self.x = np.asarray(minutes, dtype=float)
        self.y = np.asarray(trial, dtype=float)
        self.trial.setData(self.x, self.y)
        if now is not None:
            self.now.setData(self.x, np.asarray(now, dtype=float))
        if low is not None and high is not None and np.all(np.isfinite(low)) and np.all(np.isfinite(high)):
            self.low.setData(self.x, np.asarray(low, dtype=float))
            self.high.setData(self.x, np.asarray(high, dtype=float))
            self.band.show()
        else:
            self.band.hide()
        if recheck is not None and math.isfinite(recheck):
            self.recheck.setValue(recheck)
            self.recheck.show()
        else:
            self.recheck.hide()
        if self.x.size:
            self.plot.setXRange(0, float(self.x[-1]), padding=0.01)
        ys = [self.y, np.asarray(now, dtype=float) if now is not None else self.y]
        if low is not None and high is not None:
            ys += [np.asarray(low, dtype=float), np.asarray(high, dtype=float)]
        finite = np.concatenate([a[np.isfinite(a)] for a in ys]) if ys else np.array([])
        if finite.size:
            lo, hi = float(finite.min()), float(finite.max())
            if hi - lo < self.min_span:
                mid = 0.5 * (hi + lo)
                lo, hi = mid - 0.5 * self.min_span, mid + 0.5 * self.min_span
            pad = 0.08 * (hi - lo)
            self.plot.setYRange(lo - pad, hi + pad, padding=0)

    def _moved(self, pos):
        vb = self.plot.getViewBox()
        if self.x.size == 0 or not self.plot.sceneBoundingRect().contains(pos):
            self.hover.hide()
            return
        p = vb.mapSceneToView(pos)
        i = int(np.clip(np.searchsorted(self.x, p.x()), 0, self.x.size - 1))
        self.hover.setText(f"{self.x[i]:.1f} min: {self.y[i]:.3g}")
        self.hover.setPos(self.x[i], self.y[i])
        self.hover.show()


class MainWindow(QtWidgets.QMainWindow):
    """The window. ``synchronous=True`` computes on the calling thread (tests, screenshots)."""

    steady_shown = QtCore.Signal(object)     # stage 1: steady states and Limits on screen
    forecast_shown = QtCore.Signal(object)   # stage 2: the course drawn
    band_shown = QtCore.Signal(object)
    plan_shown = QtCore.Signal(object)
    exported = QtCore.Signal(object)         # list of files written
    wean_shown = QtCore.Signal(object)
    fit_shown = QtCore.Signal(object)
    failure_shown = QtCore.Signal(str)

    def __init__(self, case: dict, path: str | None = None, synchronous: bool = False, trials: dict | None = None,
                 parent=None):
        super().__init__(parent)
        self.setWindowTitle(APP_NAME)
        self.settings_store = QtCore.QSettings(ORG_NAME, APP_NAME)
        self.units = self.settings_store.value("units", "mmHg")
        self.oxygen_view = self.settings_store.value("oxygen_view", "pao2")
        self.runner = EngineRunner(self, synchronous=synchronous)
        self.runner.finished.connect(self._on_result)
        self.runner.failed.connect(self._on_failure)
        self.undo_stack = QtGui.QUndoStack(self)
        self.case_unsaved = False  # an imported or recovered case that was never saved
        self.recovery_file: Path | None = None  # this window's own autosave file (named after its case)
        self.disk_stamp: str | None = None  # hash of the case file as this window last read or wrote it
        self.undo_stack.cleanChanged.connect(self._on_clean_changed)
        self.fit_result = None
        self.last_steady = None
        self.last_forecast = None
        self.last_band = None
        self.now_prediction = None
        self._loading = False
        self.state = TrialState(case=case, trials={"A": dict(case["settings"]), "B": None, "C": None}, path=path)
        self.debounce = QtCore.QTimer(self)
        self.debounce.setSingleShot(True)
        self.debounce.setInterval(DEBOUNCE_MS)
        self.debounce.timeout.connect(self._request_forecast)
        self.autosave = QtCore.QTimer(self)
        self.autosave.setInterval(int(os.environ.get("VENTCAST_AUTOSAVE_MS", AUTOSAVE_MS)))
        self.autosave.timeout.connect(self.write_recovery)
        self._build()
        self._build_menus()
        self.resize(1500, 940)
        self.load_case(case, path, trials=trials)
        self.autosave.start()

    # --- layout -------------------------------------------------------------------------------------
    def _build(self):
        pg.setConfigOptions(antialias=False, background="#fafafa", foreground="#222222")
        central = QtWidgets.QWidget()
        outer = QtWidgets.QVBoxLayout(central)
        outer.setContentsMargins(6, 6, 6, 2)
        split = QtWidgets.QSplitter(QtCore.Qt.Horizontal)
        split.addWidget(self._build_bedside())
        middle = QtWidgets.QWidget()
        mid = QtWidgets.QVBoxLayout(middle)
        mid.setContentsMargins(0, 0, 0, 0)
        mid.addWidget(self._build_trial())
        mid.addWidget(self._build_outlook(), 1)
        split.addWidget(middle)
        split.addWidget(self._build_right())
        split.setStretchFactor(0, 0)
        split.setStretchFactor(1, 3)
        split.setStretchFactor(2, 1)
        split.setSizes([280, 900, 420])
        outer.addWidget(split, 1)
        self.caution_label = QtWidgets.QLabel(CAUTION)
        self.caution_label.setWordWrap(True)
        self.caution_label.setObjectName("caution")
        self.caution_label.setStyleSheet("QLabel#caution { background: #fff4dc; border: 1px solid #b07d00; "
                                         "padding: 4px; font-weight: bold; color: #3a2a00; }")
        outer.addWidget(self.caution_label)
        self.setCentralWidget(central)
        self.status = QtWidgets.QLabel("")
        self.status.setTextFormat(QtCore.Qt.PlainText)  # messages quote file text: never rich text
        self.progress = QtWidgets.QProgressBar()
        self.progress.setRange(0, 0)
        self.progress.setMaximumWidth(160)
        self.progress.hide()
        self.cancel_button = QtWidgets.QPushButton("Cancel")
        self.cancel_button.hide()
        self.cancel_button.clicked.connect(self.cancel_fit)
        self.statusBar().addWidget(self.status, 1)
        self.statusBar().addPermanentWidget(self.progress)
        self.statusBar().addPermanentWidget(self.cancel_button)

    def _build_bedside(self):
        box = QtWidgets.QGroupBox("Bedside")
        lay = QtWidgets.QVBoxLayout(box)
        self.case_label = QtWidgets.QLabel("")
        self.case_label.setWordWrap(True)
        lay.addWidget(self.case_label)
        form = QtWidgets.QFormLayout()
        self.bedside_values = {}
        for key, label in (("pao2", "PaO2"), ("paco2", "PaCO2"), ("ph", "pH"), ("sao2", "SaO2"),
                           ("settings", "Settings"), ("pf_ratio_mmhg", "P/F ratio"),
                           ("aa_gradient_mmhg", "A\u2013a gradient"), ("vd_vt", "VD/VT (model)"),
                           ("driving_pressure_cmh2o", "Driving pressure\n(Pplat \u2212 set PEEP)"), ("compliance_ml_per_cmh2o", "Crs"),
                           ("pbw_kg", "PBW"), ("vt_ml_per_kg_pbw", "VT"), ("mechanical_power_j_min", "Mechanical power"),
                           ("ventilatory_ratio", "Ventilatory ratio"), ("oxygenation_index", "Oxygenation index"),
                           ("berlin_category", "Berlin category"), ("base_excess_mmol_l", "Base excess")):
            w = QtWidgets.QLabel("-")
            w.setTextInteractionFlags(QtCore.Qt.TextSelectableByMouse)
            w.setWordWrap(True)
            self.bedside_values[key] = w
            form.addRow(label, w)
        lay.addLayout(form)
        lay.addWidget(QtWidgets.QLabel("Past observations"))
        self.history = QtWidgets.QTableWidget(0, 5)
        self.history.setHorizontalHeaderLabels(["taken", "FiO2", "PEEP", "PaO2", "PaCO2"])
        self.history.verticalHeader().hide()
        self.history.setEditTriggers(QtWidgets.QAbstractItemView.NoEditTriggers)
        self.history.horizontalHeader().setSectionResizeMode(QtWidgets.QHeaderView.ResizeToContents)
        lay.addWidget(self.history, 1)
        box.setMinimumWidth(270)
        return box

    def _build_trial(self):
        box = QtWidgets.QGroupBox("Trial settings")
        lay = QtWidgets.QGridLayout(box)
        self.trial_tabs = QtWidgets.QTabBar()
        for t in TRIALS:
            self.trial_tabs.addTab(f"Trial {t}")
        self.trial_tabs.currentChanged.connect(self._on_trial_tab)
        lay.addWidget(self.trial_tabs, 0, 0, 1, 3)
        self.mode = QtWidgets.QComboBox()
        self.mode.addItems(["volume control", "pressure control"])
        self.mode.currentIndexChanged.connect(lambda _i: self._control_changed("mode"))
        lay.addWidget(QtWidgets.QLabel("Mode"), 1, 0)
        lay.addWidget(self.mode, 1, 1)
        self.reset_button = QtWidgets.QPushButton("Reset to current")
        self.reset_button.clicked.connect(self.reset_trial)
        lay.addWidget(self.reset_button, 1, 2)
        self.spins, self.sliders, self.rows = {}, {}, {}
        for row, (key, label, unit, lo, hi, step, dec) in enumerate(CONTROLS, start=2):
            spin = QtWidgets.QDoubleSpinBox()
            spin.setRange(lo, hi)
            spin.setSingleStep(step)
            spin.setDecimals(dec)
            spin.setSuffix(f" {unit}" if unit else "")
            spin.setKeyboardTracking(False)
            spin.setAccessibleName(label)
            slider = QtWidgets.QSlider(QtCore.Qt.Horizontal)
            slider.setRange(0, int(round((hi - lo) / step)))
            slider.setPageStep(5)
            slider.setMaximumWidth(150)
            spin.valueChanged.connect(lambda _v, k=key: self._control_changed(k))
            slider.valueChanged.connect(lambda i, k=key, lo=lo, step=step: self._slider_moved(k, lo + i * step))
            name = QtWidgets.QLabel(label)
            lay.addWidget(name, row, 0)
            lay.addWidget(spin, row, 1)
            lay.addWidget(slider, row, 2)
            self.spins[key], self.sliders[key], self.rows[key] = spin, slider, (name, spin, slider)
        self.vt_per_kg = QtWidgets.QLabel("")
        lay.addWidget(self.vt_per_kg, 2 + len(CONTROLS), 1, 1, 2)
        self.compare = QtWidgets.QTableWidget(0, 4)
        self.compare.setHorizontalHeaderLabels(["now (model)", "Trial A", "Trial B", "Trial C"])
        self.compare.setEditTriggers(QtWidgets.QAbstractItemView.NoEditTriggers)
        self.compare.horizontalHeader().setStretchLastSection(True)
        self.compare.verticalHeader().setDefaultSectionSize(20)
        self.compare.setMinimumHeight(236)
        self.compare.setMinimumWidth(520)
        lay.addWidget(self.compare, 0, 3, 3 + len(CONTROLS), 1)
        lay.setColumnStretch(3, 1)
        return box

    def _build_outlook(self):
        box = QtWidgets.QGroupBox("Outlook (next 60 min; dashed: current settings, solid: trial, band: likely range 90 %)")
        lay = QtWidgets.QVBoxLayout(box)
        self.graphics = pg.GraphicsLayoutWidget()
        self.plots = {}
        for i, key in enumerate(("oxygen", "paco2", "ph", "pressure")):
            p = self.graphics.addPlot(row=i // 2, col=i % 2)
            self.plots[key] = p
        self.charts = {"oxygen": OutlookChart(self.plots["oxygen"], COLOUR["pao2"], 10.0),
                       "paco2": OutlookChart(self.plots["paco2"], COLOUR["paco2"], 5.0),
                       "ph": OutlookChart(self.plots["ph"], COLOUR["ph"], 0.05)}
        _axis(self.plots["ph"], "pH")
        pp = self.plots["pressure"]
        _axis(pp, "pressure [cmH2O]")
        pp.addLegend(offset=(10, -10))  # bottom left, below the pressure lines
        self.pressure_items = {
            "pplat_now": pp.plot(pen=pg.mkPen(COLOUR["pplat"], width=1, style=QtCore.Qt.DashLine)),
            "pplat": pp.plot(pen=pg.mkPen(COLOUR["pplat"], width=1), name="Pplat"),
            "dp_now": pp.plot(pen=pg.mkPen(COLOUR["dp"], width=1, style=QtCore.Qt.DashLine)),
            "dp": pp.plot(pen=pg.mkPen(COLOUR["dp"], width=1), name="driving pressure"),
        }
        self.pplat_limit = pg.InfiniteLine(angle=0, pos=30, movable=False,
                                           pen=pg.mkPen("#555555", width=1, style=QtCore.Qt.DotLine),
                                           label="Pplat limit", labelOpts={"position": 0.1})
        pp.addItem(self.pplat_limit)
        # VD/VT on its own right-hand axis of the pressure chart.
        self.vdvt_view = pg.ViewBox()
        pp.showAxis("right")
        pp.scene().addItem(self.vdvt_view)
        pp.getAxis("right").linkToView(self.vdvt_view)
        pp.getAxis("right").setLabel("VD/VT [fraction]")
        pp.getAxis("right").enableAutoSIPrefix(False)
        self.vdvt_view.setXLink(pp)
        self.vdvt_now = pg.PlotDataItem(pen=pg.mkPen(COLOUR["vd_vt"], width=1, style=QtCore.Qt.DashLine))
        self.vdvt = pg.PlotDataItem(pen=pg.mkPen(COLOUR["vd_vt"], width=1))
        self.vdvt_view.addItem(self.vdvt_now)
        self.vdvt_view.addItem(self.vdvt)
        pp.legend.addItem(self.vdvt, "VD/VT (right axis)")
        pp.vb.sigResized.connect(lambda: self.vdvt_view.setGeometry(pp.vb.sceneBoundingRect()))
        self._label_axes()
        lay.addWidget(self.graphics)
        return box

    def _build_right(self):
        tabs = QtWidgets.QTabWidget()
        limits = QtWidgets.QWidget()
        ll = QtWidgets.QVBoxLayout(limits)
        self.limits_title = QtWidgets.QLabel("Limits of Trial A")
        ll.addWidget(self.limits_title)
        self.limits = QtWidgets.QTableWidget(0, 2)
        self.limits.setHorizontalHeaderLabels(["status", "check: value, limit, why (source)"])
        self.limits.verticalHeader().hide()
        self.limits.setEditTriggers(QtWidgets.QAbstractItemView.NoEditTriggers)
        self.limits.setWordWrap(True)
        self.limits.horizontalHeader().setSectionResizeMode(QtWidgets.QHeaderView.ResizeToContents)
        self.limits.horizontalHeader().setStretchLastSection(True)
        ll.addWidget(self.limits, 1)
        self.goals_button = QtWidgets.QPushButton("Edit goals and limits of this case...")
        self.goals_button.clicked.connect(self.edit_goals)
        ll.addWidget(self.goals_button)
        self.recheck_label = QtWidgets.QLabel("")
        self.recheck_label.setWordWrap(True)
        ll.addWidget(self.recheck_label)
        tabs.addTab(limits, "Limits")
        fitw = QtWidgets.QWidget()
        fl = QtWidgets.QVBoxLayout(fitw)
        self.fit_message = QtWidgets.QLabel("fitting...")
        self.fit_message.setWordWrap(True)
        fl.addWidget(self.fit_message)
        self.fit_table = QtWidgets.QTableWidget(0, 2)
        self.fit_table.setHorizontalHeaderLabels(["parameter", "estimate (likely range 90 %)"])
        self.fit_table.verticalHeader().hide()
        self.fit_table.setEditTriggers(QtWidgets.QAbstractItemView.NoEditTriggers)
        self.fit_table.horizontalHeader().setSectionResizeMode(QtWidgets.QHeaderView.ResizeToContents)
        self.fit_table.horizontalHeader().setStretchLastSection(True)
        self.fit_table.setMinimumHeight(250)
        self.fit_table.verticalHeader().setDefaultSectionSize(22)
        fl.addWidget(self.fit_table, 1)
        self.ident_label = QtWidgets.QLabel("")
        self.ident_label.setWordWrap(True)
        fl.addWidget(self.ident_label)
        self.next_label = QtWidgets.QLabel("")
        self.next_label.setWordWrap(True)
        fl.addWidget(self.next_label)
        self.vq_widget = pg.PlotWidget()
        vq = self.vq_widget.getPlotItem()
        _axis(vq, "flow [L/min]", "V/Q of each lung unit [ratio, log scale]")
        vq.setLogMode(x=True, y=False)
        vq.addLegend(offset=(-10, 10))
        self.vq_vent = vq.plot(pen=pg.mkPen(COLOUR["ventilation"], width=1), symbol="o", symbolSize=4,
                               symbolBrush=COLOUR["ventilation"], name="ventilation")
        self.vq_perf = vq.plot(pen=pg.mkPen(COLOUR["perfusion"], width=1), symbol="t", symbolSize=4,
                               symbolBrush=COLOUR["perfusion"], name="perfusion")
        vq.getAxis("bottom").setTicks([[(k, f"{10.0 ** k:g}") for k in (-2, -1, 0, 1, 2)], []])
        self.vq_widget.setMinimumHeight(200)
        fl.addWidget(self.vq_widget)
        self.vq_text = QtWidgets.QLabel("")
        self.vq_text.setWordWrap(True)
        fl.addWidget(self.vq_text)
        tabs.addTab(fitw, "Lung fit")
        tabs.addTab(self._build_options(), "Options")
        tabs.addTab(self._build_stepdown(), "Step-down plan")
        tabs.setMinimumWidth(380)
        self.right_tabs = tabs
        return tabs

    def _build_options(self):
        w = QtWidgets.QWidget()
        lay = QtWidgets.QVBoxLayout(w)
        self.options_button = QtWidgets.QPushButton("Find settings that meet the goals")
        self.options_button.clicked.connect(self.find_options)
        lay.addWidget(self.options_button)
        self.options_message = QtWidgets.QLabel("Searches tens of thousands of settings within the Limits, then checks "
                                                "the best 50 against the fit's parameter draws.")
        self.options_message.setWordWrap(True)
        lay.addWidget(self.options_message)
        self.options_table = QtWidgets.QTableWidget(0, 3)
        self.options_table.setHorizontalHeaderLabels(["probability", "changes from now", "forecast"])
        self.options_table.verticalHeader().hide()
        self.options_table.setEditTriggers(QtWidgets.QAbstractItemView.NoEditTriggers)
        self.options_table.setSelectionBehavior(QtWidgets.QAbstractItemView.SelectRows)
        self.options_table.setWordWrap(True)
        self.options_table.horizontalHeader().setSectionResizeMode(QtWidgets.QHeaderView.ResizeToContents)
        self.options_table.horizontalHeader().setStretchLastSection(True)
        self.options_table.cellDoubleClicked.connect(lambda row, _col: self.use_option(row))
        lay.addWidget(self.options_table, 1)
        self.use_option_button = QtWidgets.QPushButton("Try the selected option in the current trial")
        self.use_option_button.clicked.connect(lambda: self.use_option(self.options_table.currentRow()))
        lay.addWidget(self.use_option_button)
        self.last_plan = None
        return w

    def _build_stepdown(self):
        w = QtWidgets.QWidget()
        lay = QtWidgets.QVBoxLayout(w)
        form = QtWidgets.QFormLayout()
        self.wean_table_choice = QtWidgets.QComboBox()
        self.wean_table_choice.addItems(["model-driven", "ARDS Network lower-PEEP table", "ARDS Network higher-PEEP table"])
        form.addRow("Steps", self.wean_table_choice)
        self.wean_fio2 = QtWidgets.QDoubleSpinBox()
        self.wean_fio2.setRange(0.21, 1.0)
        self.wean_fio2.setSingleStep(0.05)
        self.wean_fio2.setValue(0.4)
        form.addRow("Target FiO2 at most", self.wean_fio2)
        self.wean_peep = QtWidgets.QDoubleSpinBox()
        self.wean_peep.setRange(0, 30)
        self.wean_peep.setDecimals(0)
        self.wean_peep.setValue(8)
        self.wean_peep.setSuffix(" cmH2O")
        form.addRow("Target PEEP at most", self.wean_peep)
        self.spont_rr = QtWidgets.QDoubleSpinBox()
        self.spont_rr.setRange(0, 80)
        self.spont_rr.setDecimals(0)
        self.spont_rr.setSpecialValueText("not entered")
        self.spont_rr.setSuffix(" /min")
        form.addRow("Spontaneous rate (for RSBI)", self.spont_rr)
        self.spont_vt = QtWidgets.QDoubleSpinBox()
        self.spont_vt.setRange(0, 2000)
        self.spont_vt.setDecimals(0)
        self.spont_vt.setSingleStep(10)
        self.spont_vt.setSpecialValueText("not entered")
        self.spont_vt.setSuffix(" mL")
        form.addRow("Spontaneous VT (for RSBI)", self.spont_vt)
        lay.addLayout(form)
        self.wean_button = QtWidgets.QPushButton("Plan the step-down")
        self.wean_button.clicked.connect(self.plan_step_down)
        lay.addWidget(self.wean_button)
        self.wean_message = QtWidgets.QLabel("")
        self.wean_message.setWordWrap(True)
        lay.addWidget(self.wean_message)
        self.wean_steps = QtWidgets.QTableWidget(0, 3)
        self.wean_steps.setHorizontalHeaderLabels(["step", "forecast (likely range 90 %)", "hold"])
        self.wean_steps.verticalHeader().hide()
        self.wean_steps.setEditTriggers(QtWidgets.QAbstractItemView.NoEditTriggers)
        self.wean_steps.setWordWrap(True)
        self.wean_steps.horizontalHeader().setSectionResizeMode(QtWidgets.QHeaderView.ResizeToContents)
        self.wean_steps.horizontalHeader().setStretchLastSection(True)
        lay.addWidget(self.wean_steps, 1)
        self.wean_readiness = QtWidgets.QLabel("")
        self.wean_readiness.setWordWrap(True)
        lay.addWidget(self.wean_readiness)
        self.last_wean = None
        return w

    def find_options(self):
        result = self._fitted_for("search for options")
        if result is None:
            return
        case = copy.deepcopy(self.state.case)
        self.options_message.setText("searching...")
        self._start_busy(cancellable=True, kind="plan")
        self.runner.submit("plan", lambda: plan_case(case, result))

    def plan_step_down(self):
        result = self._fitted_for("plan a step-down")
        if result is None:
            return
        case = copy.deepcopy(self.state.case)
        table = (None, "lower-peep", "higher-peep")[self.wean_table_choice.currentIndex()]
        fio2, peep = float(self.wean_fio2.value()), float(self.wean_peep.value())
        rr = float(self.spont_rr.value()) or None
        vt = float(self.spont_vt.value()) or None
        self.wean_message.setText("planning...")
        self._start_busy(cancellable=True, kind="wean")
        self.runner.submit("wean", lambda: wean_case(case, result, table=table, target_fio2=fio2, target_peep=peep,
                                                     spontaneous_rr=rr, spontaneous_vt_ml=vt))

    def _show_plan(self, out):
        self.last_plan = out
        head = f"\u2713 {out['message']}" if out["met"] else f"\u26a0 {out['message']}"
        self.options_message.setText(f"{escape(head)}<br>Screened {out['screened']} settings. Double-click an option "
                                     f"to try it in the current trial.")
        self.options_table.setRowCount(len(out["options"]))
        for i, o in enumerate(out["options"]):
            st = o["steady"]
            forecast = (f"{self._gas(st['pao2_mmhg'])}, SaO2 {st['sao2']:.2f}, PaCO2 {self._gas(st['paco2_mmhg'], 1)}, "
                        f"pH {st['ph']:.2f}, Pplat {st['pplat_cmh2o']:.0f}, \u0394P {st['driving_pressure_cmh2o']:.0f} cmH2O")
            for j, text in enumerate((f"{100 * o['probability_all_goals']:.0f} %", "\n".join(o["changes"]) or "none",
                                      forecast)):
                self.options_table.setItem(i, j, QtWidgets.QTableWidgetItem(text))
        self.options_table.resizeRowsToContents()

    def _show_wean(self, out):
        self.last_wean = out
        head = "\u2713" if out["reached_target"] else "\u26a0"
        self.wean_message.setText(f"{head} {escape(out['message'])}")
        self.wean_steps.setRowCount(len(out["steps"]))
        for i, st in enumerate(out["steps"]):
            v, r = st["steady"], st["likely_range"]
            forecast = (f"SaO2 {v['sao2']:.3f} ({r['sao2'][0]:.3f}\u2013{r['sao2'][1]:.3f}), {self._gas(v['pao2_mmhg'])}, "
                        f"PaCO2 {self._gas(v['paco2_mmhg'], 1)}, pH {v['ph']:.2f}\n{st['stop_if']}")
            hold = "-" if st["hold_min"] is None else f"{st['hold_min']:.0f} min\n({st.get('hold_basis', '')})"
            for j, text in enumerate((f"{i + 1}. {st['change']}\n({st['why']})", forecast, hold)):
                self.wean_steps.setItem(i, j, QtWidgets.QTableWidgetItem(text))
        self.wean_steps.resizeRowsToContents()
        marks = {True: "\u2713", False: "\u2716", None: "?"}
        self.wean_readiness.setText("<b>Readiness at the last step:</b><br>" + "<br>".join(
            f"{marks[c['met']]} {escape(c['criterion'])} ({escape(c['source'])})" for c in out["readiness"]))

    def use_option(self, row):
        """Put an option's settings into the current trial (undoable)."""
        if self.last_plan is None or not 0 <= row < len(self.last_plan["options"]):
            return
        before = dict(self.trial)
        after = dict(self.last_plan["options"][row]["settings"])
        if after != before:
            self.undo_stack.push(TrialChange(self, self.state.active, before, after, f"option {row + 1}"))

    def _build_menus(self):
        bar = self.menuBar()
        m = bar.addMenu("&File")
        self.recent_menu = QtWidgets.QMenu("Open recent", self)
        for text, seq, slot in (("&Open...", QtGui.QKeySequence.Open, self.open_dialog),
                                ("&Save", QtGui.QKeySequence.Save, self.save),
                                ("Save &as...", QtGui.QKeySequence("Ctrl+Shift+S"), self.save_as)):
            a = m.addAction(text)
            a.setShortcut(seq)
            a.triggered.connect(slot)
        m.addMenu(self.recent_menu)
        m.addSeparator()
        m.addAction("Import blood gases from FHIR...").triggered.connect(self.import_fhir_dialog)
        m.addAction("Export report (PDF)...").triggered.connect(self.export_report_dialog)
        m.addAction("Export courses and observations (CSV)...").triggered.connect(self.export_csv_dialog)
        m.addAction("Export charts (PNG and SVG)...").triggered.connect(self.export_charts_dialog)
        demos = m.addMenu("Open demo case")
        from .casefile import DEMO_NAMES
        for name in DEMO_NAMES:
            demos.addAction(name).triggered.connect(lambda _c=False, n=name: self.open_demo(n))
        m.addSeparator()
        q = m.addAction("&Quit")
        q.setShortcut(QtGui.QKeySequence("Ctrl+Q"))
        q.triggered.connect(self.close)
        e = bar.addMenu("&Edit")
        u = self.undo_stack.createUndoAction(self, "Undo")
        u.setShortcut(QtGui.QKeySequence("Ctrl+Z"))
        r = self.undo_stack.createRedoAction(self, "Redo")
        r.setShortcut(QtGui.QKeySequence("Ctrl+Shift+Z"))
        e.addAction(u)
        e.addAction(r)
        reset = e.addAction("Reset trial to current")
        reset.setShortcut(QtGui.QKeySequence("Ctrl+R"))
        reset.triggered.connect(self.reset_trial)
        for i, t in enumerate(TRIALS):
            a = e.addAction(f"Edit Trial {t}")
            a.setShortcut(QtGui.QKeySequence(f"Ctrl+{i + 1}"))
            a.triggered.connect(lambda _c=False, i=i: self.trial_tabs.setCurrentIndex(i))
        v = bar.addMenu("&View")
        self.kpa_action = v.addAction("Pressures of gases in kPa")
        self.kpa_action.setCheckable(True)
        self.kpa_action.setChecked(self.units == "kPa")
        self.kpa_action.setShortcut(QtGui.QKeySequence("Ctrl+K"))
        self.kpa_action.toggled.connect(lambda on: self.set_units("kPa" if on else "mmHg"))
        self.sao2_action = v.addAction("Oxygen chart shows SaO2")
        self.sao2_action.setCheckable(True)
        self.sao2_action.setChecked(self.oxygen_view == "sao2")
        self.sao2_action.setShortcut(QtGui.QKeySequence("Ctrl+Shift+O"))
        self.sao2_action.toggled.connect(lambda on: self.set_oxygen_view("sao2" if on else "pao2"))
        h = bar.addMenu("&Help")
        keys = h.addAction("Keyboard shortcuts")
        keys.setShortcut(QtGui.QKeySequence("F1"))
        keys.triggered.connect(self.show_shortcuts)
        h.addAction("About Ventcast").triggered.connect(self.show_about)
        self._refresh_recent()

    # --- case ---------------------------------------------------------------------------------------
    def case_name(self) -> str:
        """What the user calls this case: its file name, else its label."""
        if self.state.path:
            return Path(self.state.path).name
        return self.state.case.get("label") or "unsaved case"

    def load_case(self, case: dict, path: str | None, trials: dict | None = None):
        self._drop_recovery()
        self.case_unsaved = False
        self.disk_stamp = file_stamp(path) if path else None
        self.state = TrialState(case=case, trials=trials or {"A": dict(case["settings"]), "B": None, "C": None},
                                path=path)
        self.undo_stack.clear()
        self.fit_result = None
        self.last_steady = None
        self.last_forecast = None
        self.last_band = None
        self._fill_bedside()
        self._loading = True
        self.trial_tabs.setCurrentIndex(0)
        self._loading = False
        self._show_trial_controls()
        self._update_title()
        self.recovery_file = new_recovery_path(self.case_name())
        if path:
            self._remember_recent(path)
        self.status.setText("fitting the lung model to the observations...")
        self._start_busy(cancellable=True)
        case_copy = copy.deepcopy(case)
        self.runner.submit("fit", lambda: self._fit_work(case_copy))

    @staticmethod
    def _fit_work(case):
        # The estimate alone first (a tenth of the time): its forecast is shown while the posterior
        # draws, which give every likely range, are computed in a second job ("draws").
        _patient, _obs, result = fit_case(case, sample=False)
        now = predict(result.model, to_settings(case["settings"]))
        return {"result": result, "now": now}

    def _fitted_for(self, doing: str):
        """The complete fit (with its draws) for ``doing``, or None after saying why there is none yet."""
        if self.fit_result is None:
            self.status.setText(f"\u2716 the lung model is not fitted yet: cannot {doing}")
            return None
        if not self.fit_result.sampled:
            self.status.setText(f"\u2716 the fit's likely ranges are still being computed (a few seconds): "
                                f"{doing} when they are shown")
            return None
        return self.fit_result

    def _fill_bedside(self):
        case = self.state.case
        self.case_label.setText(f"<b>{escape(case.get('label', ''))}</b>")
        obs = case["observations"][-1]
        s = obs["settings"]
        idx = now_block(case)
        self.bedside_values["pao2"].setText(self._gas(obs["pao2_mmhg"]))
        self.bedside_values["paco2"].setText(self._gas(obs["paco2_mmhg"], 1))
        self.bedside_values["ph"].setText(f"{obs['ph']:.2f}")
        self.bedside_values["sao2"].setText("-" if obs.get("sao2") is None else f"{obs['sao2']:.2f}")
        self.bedside_values["settings"].setText(settings_text(s))
        fmt = {"pf_ratio_mmhg": (0, "mmHg"), "aa_gradient_mmhg": (0, "mmHg"), "driving_pressure_cmh2o": (0, "cmH2O"),
               "compliance_ml_per_cmh2o": (0, "mL/cmH2O"), "pbw_kg": (1, "kg"), "vt_ml_per_kg_pbw": (1, "mL/kg PBW"),
               "mechanical_power_j_min": (1, "J/min"), "ventilatory_ratio": (2, ""), "oxygenation_index": (1, ""),
               "base_excess_mmol_l": (1, "mmol/L")}
        for key, (d, unit) in fmt.items():
            v = idx.get(key)
            if key in ("pf_ratio_mmhg", "aa_gradient_mmhg") and v is not None:
                self.bedside_values[key].setText(self._gas(v, d))
            else:
                self.bedside_values[key].setText("-" if v is None else f"{v:.{d}f} {unit}".strip())
        self.bedside_values["berlin_category"].setText(str(idx.get("berlin_category") or "-"))
        self.bedside_values["vd_vt"].setText("after the fit")
        rows = case["observations"]
        self.history.setRowCount(len(rows))
        for i, o in enumerate(reversed(rows)):
            os_ = o["settings"]
            for j, text in enumerate((o.get("taken_at", "")[5:16].replace("T", " "), f"{os_['fio2']:.2f}",
                                      f"{os_['peep_cmh2o']:g}", self._gas(o["pao2_mmhg"]),
                                      self._gas(o["paco2_mmhg"], 1))):
                self.history.setItem(i, j, QtWidgets.QTableWidgetItem(text))

    def _gas(self, mmhg, digits=0):
        if mmhg is None or not math.isfinite(mmhg):
            return "-"
        if self.units == "kPa":
            return f"{kpa_from_mmhg(mmhg):.{max(digits, 1)}f} kPa"
        return f"{mmhg:.{digits}f} mmHg"

    # --- trial controls -----------------------------------------------------------------------------
    @property
    def trial(self) -> dict:
        return self.state.trials[self.state.active]

    def _on_trial_tab(self, index):
        if self._loading:
            return
        t = TRIALS[index]
        if self.state.trials[t] is None:
            self.state.trials[t] = dict(self.state.trials["A"])
        self.state.active = t
        self._show_trial_controls()
        self.debounce.start()

    def _show_trial_controls(self):
        s = self.trial
        self._loading = True
        try:
            self.mode.setCurrentIndex(0 if s["mode"] == "volume" else 1)
            # The size of the breath is VT in volume control, the inspiratory pressure in pressure control.
            hidden = "inspiratory_pressure_cmh2o" if s["mode"] == "volume" else "vt_ml"
            for key, _label, _unit, lo, _hi, step, _dec in CONTROLS:
                v = s.get(key)
                for w in self.rows[key]:
                    w.setVisible(key != hidden)
                if v is not None:
                    self.spins[key].setValue(float(v))
                    self.sliders[key].setValue(int(round((float(v) - lo) / step)))
        finally:
            self._loading = False
        self.limits_title.setText(f"Limits of Trial {self.state.active}")
        self._update_vt_per_kg()

    def _slider_moved(self, key, value):
        if self._loading:
            return
        self.spins[key].setValue(value)

    def _control_changed(self, key):
        if self._loading:
            return
        before = dict(self.trial)
        after = dict(before)
        if key == "mode":
            mode = "volume" if self.mode.currentIndex() == 0 else "pressure"
            after["mode"] = mode
            if mode == "pressure" and after.get("inspiratory_pressure_cmh2o") is None:
                after["inspiratory_pressure_cmh2o"] = self._pressure_for_volume(after)
            if mode == "volume" and after.get("vt_ml") is None:
                after["vt_ml"] = float(self.state.case["settings"].get("vt_ml") or 6.0 * self._pbw())
        else:
            after[key] = round(float(self.spins[key].value()), 2)
        if after == before:
            return
        self.undo_stack.push(TrialChange(self, self.state.active, before, after, key))

    def _pressure_for_volume(self, s):
        """Inspiratory pressure that would deliver the trial VT with the fitted compliance [cmH2O]."""
        c = 35.0
        if self.fit_result is not None:
            c = float(self.fit_result.estimates["c_max"])
        vt = float(s.get("vt_ml") or 6.0 * self._pbw())
        return float(np.clip(round(vt / max(c, 5.0)), 5, 40))

    def _pbw(self):
        from ventcast.physiology.indices import predicted_body_weight
        p = self.state.case["patient"]
        return float(predicted_body_weight(p["height_cm"], p["sex"]))

    def _apply_trial(self, trial: str, settings: dict):
        """Set a trial's settings (from the undo stack) and ask for a new forecast."""
        self.state.trials[trial] = dict(settings)
        if trial != self.state.active:
            self.trial_tabs.setCurrentIndex(TRIALS.index(trial))
        self._show_trial_controls()
        self.debounce.start()

    def reset_trial(self):
        before = dict(self.trial)
        after = dict(self.state.case["settings"])
        if before != after:
            self.undo_stack.push(TrialChange(self, self.state.active, before, after, "reset"))

    def set_trial_value(self, key: str, value):
        """Programmatic control change (tests, walkthroughs): as if the user had typed it."""
        if key == "mode":
            self.mode.setCurrentIndex(0 if value == "volume" else 1)
        else:
            self.spins[key].setValue(float(value))

    def _update_vt_per_kg(self):
        s = self.trial
        pbw = self._pbw()
        if s["mode"] == "volume" and s.get("vt_ml"):
            self.vt_per_kg.setText(f"VT {s['vt_ml'] / pbw:.1f} mL/kg PBW (PBW {pbw:.1f} kg)")
        else:
            self.vt_per_kg.setText(f"PBW {pbw:.1f} kg; VT follows from the inspiratory pressure")

    # --- requests -----------------------------------------------------------------------------------
    def _checked_trials(self):
        pbw = self._pbw()
        out = {}
        for t in TRIALS:
            s = self.state.trials[t]
            if s is not None:
                out[t] = check_settings(f"Trial {t}", dict(s), pbw)
        return out

    def _request_forecast(self):
        """Stage 1 of a forecast: steady states of every trial and the Limits (fast); stages 2 (course and
        likely range) and 3 (band of the course, next best measurement) follow as each result lands."""
        if self.fit_result is None:
            return
        try:
            trials = self._checked_trials()
        except CaseError as exc:
            self._on_failure(None, str(exc))
            self._submit_draws()  # no forecast for a refused trial: the draws are still needed
            return
        case, result, active = copy.deepcopy(self.state.case), self.fit_result, self.state.active
        self.status.setText(f"forecasting Trial {active}...")
        self.runner.cancel("course")
        self.runner.cancel("band")
        self.runner.submit("steady", lambda: self._steady_work(case, result, trials, active))

    @staticmethod
    def _steady_work(case, result, trials, active):
        compare, reasons = {}, {}
        for t, s in trials.items():
            p = predict(result.model, to_settings(s))
            compare[t] = steady_block(p) if bool(np.all(p.success)) else None
            reasons[t] = p.message
        if compare[active] is None:
            raise ArithmeticError(f"Trial {active}: the model has no steady state at these settings ({reasons[active]})")
        return {"active": active, "trial_settings": trials[active], "compare": compare, "steady": compare[active],
                "limit_lines": limit_checks(compare[active], case.get("goals"), fio2=float(trials[active]["fio2"])),
                "case": case}

    def _request_course(self, steady):
        case, result, trial = steady["case"], self.fit_result, steady["trial_settings"]

        def work():
            out = forecast_fitted(case, result, trial, with_band=False, with_next=False)
            out.update(active=steady["active"], trial_settings=trial, compare=steady["compare"],
                       limit_lines=steady["limit_lines"])
            return out

        self.runner.submit("course", work)

    def _request_band(self, forecast):
        case, result = copy.deepcopy(self.state.case), self.fit_result
        trial = forecast["trial_settings"]
        self.runner.submit("band", lambda: forecast_fitted(case, result, trial, with_band=True, with_next=True))

    # --- results ------------------------------------------------------------------------------------
    def _on_result(self, request, result):
        if request.kind == "fit":
            self.fit_result = result["result"]
            self.now_prediction = result["now"]
            self._show_fit()
            # The draws start once the first forecast is on screen (they would slow it down); see
            # _submit_draws.
            self._draws_for = self.fit_result
            self._request_forecast()
        elif request.kind == "draws":
            if result["estimate"] is not self.fit_result:
                return  # draws of a fit that has since been replaced (another case, changed data)
            self._stop_busy()
            self.fit_result = result["result"]
            self._show_fit()
            self.fit_shown.emit(self.fit_result)
            self._request_forecast()
        elif request.kind == "steady":
            self.last_steady = result
            self._show_steady(result)
            self.status.setText(f"Trial {result['active']}: steady state shown; computing the course...")
            self.steady_shown.emit(result)
            self._request_course(result)
        elif request.kind == "course":
            self.last_forecast = result
            self.last_band = None
            self._show_forecast(result)
            self.forecast_shown.emit(result)
            self._submit_draws()
            if self.fit_result is not None and self.fit_result.sampled:
                self.status.setText(f"Trial {result['active']}: course shown; computing its likely range...")
                self._request_band(result)
            else:
                self.status.setText(f"Trial {result['active']}: forecast from the fitted estimate shown; computing "
                                    f"the likely ranges (posterior draws)...")
        elif request.kind == "export":
            self._stop_busy()
            self._finish_export(result)
        elif request.kind == "plan":
            self._stop_busy()
            self._show_plan(result)
            self.status.setText("options shown")
            self.plan_shown.emit(result)
        elif request.kind == "wean":
            self._stop_busy()
            self._show_wean(result)
            self.status.setText("step-down plan shown")
            self.wean_shown.emit(result)
        elif request.kind == "band":
            self.last_band = result
            self._show_band(result)
            self.status.setText("forecast and likely range shown")
            self.band_shown.emit(result)

    def _submit_draws(self):
        """Start the posterior draws of the estimate shown (once), after its first forecast."""
        estimate, self._draws_for = getattr(self, "_draws_for", None), None
        if estimate is not None and estimate is self.fit_result:
            self.runner.submit("draws", lambda: {"estimate": estimate, "result": sample_fit(estimate)})

    def _on_failure(self, request, message):
        if request is not None and request.kind in ("steady", "course"):
            self._submit_draws()  # no first forecast at this trial: the draws are still needed
        if request is not None and request.kind in ("fit", "draws", "plan", "wean", "export"):
            self._stop_busy()
        if request is not None and request.kind == "plan":
            self.options_message.setText(f"\u2716 {escape(message)}")
        if request is not None and request.kind == "wean":
            self.wean_message.setText(f"\u2716 {escape(message)}")
        if request is not None and request.kind == "fit":
            self.fit_message.setText(f"<b>The model could not be fitted:</b> {escape(message)}")
        if request is not None and request.kind == "draws":
            self.fit_message.setText(f"<b>No likely ranges:</b> {escape(message)}. The forecast shown is the fitted "
                                     f"estimate alone; do not act on it without a range.")
        self.status.setText(f"\u2716 {message}")
        self.failure_shown.emit(message)

    def _show_fit(self):
        f = self.fit_result
        rows = list(f.free) + ["vco2"]
        self.fit_table.setRowCount(len(rows))
        for i, n in enumerate(rows):
            label, unit, d = PARAMETER_LABELS[n]
            if n in f.ranges:
                lo, hi = f.ranges[n]
                value = f"{f.estimates[n]:.{d}f} ({lo:.{d}f}\u2013{hi:.{d}f}) {unit}"
            else:
                value = f"{f.estimates[n]:.{d}f} {unit} (range: computing...)"
            for j, text in enumerate((label, value.strip())):
                self.fit_table.setItem(i, j, QtWidgets.QTableWidgetItem(text))
        symbol = "\u2713" if f.success else "\u2716"
        pending = "" if f.sampled else " (likely ranges: computing the posterior draws...)"
        self.fit_message.setText(f"{symbol} {escape(f.message)}{pending}")
        parts = []
        if f.identifiability:
            parts.append("<b>What the data cannot tell apart:</b><br>" + "<br>".join(
                "\u2022 " + escape(m) for m in f.identifiability))
        if f.warnings:
            parts.append("<b>Data-quality notes:</b><br>" + "<br>".join("\u26a0 " + escape(m) for m in f.warnings))
        parts.append("<b>Model assumptions:</b><br>" + "<br>".join(
            "\u2022 " + escape(m) for m in model_assumptions(f.patient.condition)))
        self.ident_label.setText("<br>".join(parts))
        now = self.now_prediction
        if now is not None and bool(np.all(now.success)):
            g = now.gas
            self.bedside_values["vd_vt"].setText(f"{float(g.vd_vt):.2f} (model, current settings)")
            self._show_vq(now)

    def _show_vq(self, pred):
        g = pred.gas
        vq = np.asarray(g.unit_vq, dtype=float).ravel()
        q = np.asarray(g.unit_perfusion, dtype=float).ravel()
        v = np.asarray(g.unit_ventilation, dtype=float).ravel()
        keep = np.isfinite(vq) & (vq > 0)
        order = np.argsort(vq[keep])
        self.vq_vent.setData(vq[keep][order], v[keep][order])
        self.vq_perf.setData(vq[keep][order], q[keep][order])
        shunt = float(pred.shunt)
        ads = float(pred.alveolar_dead_space)
        co = float(pred.cardiac_output)
        self.vq_text.setText(f"Not on the V/Q axis: shunt (V/Q 0) {shunt:.2f} of cardiac output ({shunt * co:.1f} L/min); "
                             f"alveolar dead space (V/Q \u221e) {ads:.2f} of alveolar ventilation "
                             f"(at the current settings).")

    def _show_steady(self, out):
        self._fill_compare(out["compare"])
        self._fill_limits(out["limit_lines"])

    def _show_forecast(self, out):
        self._draw_course(out)
        self._fill_compare(out["compare"], out["likely_range"], out["active"])
        self._fill_limits(out["limit_lines"])
        r = out.get("recheck_after_min")
        unchanged = out["settings"] == out["current_settings"]
        self.recheck_label.setText(
            "The trial equals the current settings: no change is expected." if unchanged else
            "" if r is None else f"Re-check a blood gas after about {max(r, 1):.0f} min at the earliest "
                                 f"({RECHECK_NOTE}).")

    def _draw_course(self, out, band=None):
        c = out["course"]
        m = np.asarray(c["minutes"], dtype=float)

        def arr(key):
            return np.array([np.nan if x is None else x for x in c[key]], dtype=float)

        now = self.now_prediction
        g = now.gas
        steady = out["steady"]
        conv = kpa_from_mmhg if self.units == "kPa" else (lambda x: x)
        lr = (band or {}).get("course") if band else None

        def band_of(key):
            if lr is None:
                return None, None
            return (np.array([np.nan if x is None else x for x in lr[f"{key}_low"]], dtype=float),
                    np.array([np.nan if x is None else x for x in lr[f"{key}_high"]], dtype=float))

        flat = np.ones_like(m)
        recheck = None if out["settings"] == out["current_settings"] else out.get("recheck_after_min")
        if self.oxygen_view == "sao2":
            self.charts["oxygen"].set(m, arr("sao2"), flat * float(g.sao2), recheck=recheck)
        else:
            lo, hi = band_of("pao2")
            self.charts["oxygen"].set(m, conv(arr("pao2_mmhg")), flat * conv(float(g.pao2)),
                                      None if lo is None else conv(lo), None if hi is None else conv(hi), recheck)
        lo, hi = band_of("paco2")
        self.charts["paco2"].set(m, conv(arr("paco2_mmhg")), flat * conv(float(g.paco2)),
                                 None if lo is None else conv(lo), None if hi is None else conv(hi), recheck)
        self.charts["ph"].set(m, arr("ph"), flat * float(g.ph), recheck=recheck)
        b = now.breathing
        # Pressures follow a setting change at once (recruitment adds a small drift not drawn here).
        self.pressure_items["pplat_now"].setData(m, flat * float(b.pplat))
        self.pressure_items["pplat"].setData(m, flat * (steady["pplat_cmh2o"] or np.nan))
        self.pressure_items["dp_now"].setData(m, flat * float(b.driving_pressure))
        self.pressure_items["dp"].setData(m, flat * (steady["driving_pressure_cmh2o"] or np.nan))
        self.pplat_limit.setValue((self.state.case.get("goals") or {}).get("pplat_max_cmh2o", 30))
        pp = self.plots["pressure"]
        pp.setXRange(0, float(m[-1]), padding=0.01)
        ys = [float(b.pplat), float(b.driving_pressure), steady["pplat_cmh2o"] or 0, steady["driving_pressure_cmh2o"] or 0, 30]
        pp.setYRange(0, max(ys) * 1.15, padding=0)
        vd = arr("vd_vt") if "vd_vt" in c else flat * (steady["vd_vt"] or np.nan)
        self.vdvt.setData(m, vd)
        self.vdvt_now.setData(m, flat * float(g.vd_vt))
        allv = np.concatenate([vd[np.isfinite(vd)], [float(g.vd_vt)]])
        self.vdvt_view.setYRange(max(0.0, allv.min() - 0.1), min(1.0, allv.max() + 0.1), padding=0)

    def _show_band(self, out):
        if self.last_forecast is None:
            return
        self._draw_course(self.last_forecast, band=out)
        nb = out.get("next_best_measurement") or []
        self.next_label.setText("<b>Next best measurement:</b><br>" + "<br>".join(
            f"{i + 1}. {escape(c['probe'])}: {escape(c['why'])}" for i, c in enumerate(nb)) if nb else
            "<b>Next best measurement:</b> none could be ranked")
        self._fill_compare(self.last_forecast["compare"], out["likely_range"], self.last_forecast["active"])
        for line in out.get("alerts", []):
            if line["code"] in ("band_unavailable", "range_incomplete"):
                self.status.setText(f"\u26a0 {line['message']}")

    COMPARE_ROWS = (("PaO2", "pao2_mmhg", "gas", 0), ("PaCO2", "paco2_mmhg", "gas", 1), ("pH", "ph", "", 2),
                    ("SaO2", "sao2", "", 3), ("VD/VT", "vd_vt", "", 2), ("Pplat", "pplat_cmh2o", "cmH2O", 1),
                    ("Driving pressure (Pplat \u2212 total PEEP)", "driving_pressure_cmh2o", "cmH2O", 1),
                    ("Mechanical power", "mechanical_power_j_min", "J/min", 1),
                    ("VT", "vt_ml_per_kg_pbw", "mL/kg PBW", 1), ("Cardiac output", "cardiac_output_l_min", "L/min", 1))
    RANGE_KEYS = {"pao2_mmhg", "paco2_mmhg", "ph", "sao2"}

    def _compare_value(self, v, unit, digits):
        if v is None or not math.isfinite(float(v)):
            return "-"
        if unit == "gas" and self.units == "kPa":
            return f"{kpa_from_mmhg(v):.{max(digits, 1)}f}"
        return f"{v:.{digits}f}"

    def _fill_compare(self, compare, ranges=None, ranges_trial=None):
        now = steady_block(self.now_prediction) if self.now_prediction is not None else None
        gas_unit = "kPa" if self.units == "kPa" else "mmHg"
        self.compare.setRowCount(len(self.COMPARE_ROWS))
        self.compare.setVerticalHeaderLabels(
            [f"{name} [{gas_unit if unit == 'gas' else unit}]" if unit else name for name, _k, unit, _d in self.COMPARE_ROWS])
        for r, (_name, key, unit, digits) in enumerate(self.COMPARE_ROWS):
            for col, (label, block) in enumerate([("now", now)] + [(t, compare.get(t)) for t in TRIALS]):
                text = "-" if block is None else self._compare_value(block.get(key), unit, digits)
                if ranges and label == ranges_trial and key in self.RANGE_KEYS and text != "-":
                    lo, hi = ranges[key]
                    text += f" ({self._compare_value(lo, unit, digits)}–{self._compare_value(hi, unit, digits)})"
                self.compare.setItem(r, col, QtWidgets.QTableWidgetItem(text))
        self.compare.resizeColumnsToContents()

    def _fill_limits(self, lines):
        self.limits.setRowCount(len(lines))
        for i, line in enumerate(lines):
            value = line["value"]
            if self.units == "kPa" and value.endswith(" mmHg"):
                value = self._gas(float(value.split()[0]))
            limit = line["limit"].replace("<=", "\u2264")
            check = f"{line['what']} {value}, limit {limit}\nwhy: {line['source']}"
            for j, text in enumerate((STATUS_SYMBOL[line["status"]], check)):
                item = QtWidgets.QTableWidgetItem(text)
                item.setToolTip(line["message"])
                self.limits.setItem(i, j, item)
        self.limits.resizeRowsToContents()

    def edit_goals(self):
        dialog = GoalsDialog(self.state.case.get("goals") or {}, self)
        dialog.accepted.connect(lambda: self.set_goals(dialog.goals()))
        dialog.open()
        return dialog

    def set_goals(self, goals: dict):
        """New goals for this case (kept in the case file on Save); the Limits are checked again."""
        if goals == (self.state.case.get("goals") or {}):
            return
        self.state.case["goals"] = goals
        self.undo_stack.resetClean()
        self._update_title()
        self.debounce.start()

    # --- units and views ----------------------------------------------------------------------------
    def _label_axes(self):
        u = "kPa" if self.units == "kPa" else "mmHg"
        if self.oxygen_view == "sao2":
            _axis(self.plots["oxygen"], "SaO2 [fraction]")
        else:
            _axis(self.plots["oxygen"], f"PaO2 [{u}]")
        _axis(self.plots["paco2"], f"PaCO2 [{u}]")

    def set_units(self, units: str):
        self.units = units
        self.settings_store.setValue("units", units)
        self._label_axes()
        self._fill_bedside()
        if self.fit_result is not None:
            self._show_fit()
        self._redraw()

    def set_oxygen_view(self, view: str):
        self.oxygen_view = view
        self.charts["oxygen"].min_span = 0.05 if view == "sao2" else 10.0
        self.settings_store.setValue("oxygen_view", view)
        self._label_axes()
        self._redraw()

    def _redraw(self):
        if self.last_forecast is None and self.last_steady is not None:
            self._show_steady(self.last_steady)
        if self.last_forecast is not None:
            self._show_forecast(self.last_forecast)
            if self.last_band is not None:
                self._show_band(self.last_band)

    # --- busy ---------------------------------------------------------------------------------------
    def _start_busy(self, cancellable, kind="fit"):
        self.busy_kind = kind
        self.progress.show()
        self.cancel_button.setVisible(cancellable)

    def _stop_busy(self):
        self.progress.hide()
        self.cancel_button.hide()

    def cancel_fit(self):
        """Cancel the long work under way (fit, options or step-down plan): its result is discarded."""
        kind = getattr(self, "busy_kind", "fit")
        self.runner.cancel(kind)
        self._stop_busy()
        if kind == "fit":
            self.runner.cancel("draws")
            if self.fit_result is None:
                self.fit_message.setText("\u2716 fit cancelled: no forecast is shown. Open the case again to fit it.")
            else:
                self.fit_message.setText("\u2716 likely ranges cancelled: the forecast shown is the fitted estimate "
                                         "alone, with no range. Open the case again to compute them.")
        elif kind == "plan":
            self.options_message.setText("\u2716 search cancelled")
        elif kind == "wean":
            self.wean_message.setText("\u2716 planning cancelled")
        self.status.setText(f"{ {'fit': 'fit', 'plan': 'search', 'wean': 'step-down planning', 'export': 'export'}[kind]} "
                            f"cancelled")

    # --- files --------------------------------------------------------------------------------------
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
        from .casefile import save
        same_file = self.state.path is not None and Path(path).resolve() == Path(self.state.path).resolve()
        if same_file and self.disk_stamp is not None and file_stamp(path) != self.disk_stamp:
            if not self.ask_overwrite_changed(path):
                self.status.setText(f"not saved: {path} changed on disk; use Save as to keep both")
                return False
        try:
            save(path, self.state.case)  # trials are not part of a case file; the recovery file keeps them
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
        from .casefile import check_output_file, check_output_files
        try:  # every output path is checked before any work, so that nothing is half-written
            if path:
                check_output_file("report", path)
            if csv_dir:
                check_output_files("CSV folder", csv_dir, ("course.csv", "observations.csv"))
        except CaseError as exc:
            self._on_failure(None, f"not exported: {exc}")
            return
        from .report import compute_forecasts
        case, result, trials = copy.deepcopy(self.state.case), self.fit_result, self._trial_settings()
        self._pending_export = {"pdf": path, "csv": csv_dir, "case": case}
        self._start_busy(cancellable=True, kind="export")
        self.runner.submit("export", lambda: compute_forecasts(case, trials, result))

    def export_csv(self, folder: str):
        self.export_report(None, folder)

    def _finish_export(self, forecasts):
        from .report import course_csv, observations_csv, render_report
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

        from .casefile import check_output_files
        try:
            out = check_output_files("chart folder", folder, [f"outlook-{k}.{e}" for k in self.plots for e in ("png", "svg")])
        except CaseError as exc:
            self._on_failure(None, f"not exported: {exc}")
            return []
        out.mkdir(exist_ok=True)
        written = []
        for key, plot in self.plots.items():
            rect = plot.sceneBoundingRect()
            size = rect.size().toSize()
            image = QtGui.QImage(size, QtGui.QImage.Format_ARGB32)
            image.fill(QtGui.QColor("#ffffff"))
            painter = QtGui.QPainter(image)
            plot.scene().render(painter, QtCore.QRectF(image.rect()), rect)
            painter.end()
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
            painter = QtGui.QPainter(gen)
            plot.scene().render(painter, QtCore.QRectF(0, 0, size.width(), size.height()), rect)
            painter.end()
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
        from .fhir import import_bundle
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

    def closeEvent(self, event):
        if not self.may_leave_case("close the window"):
            event.ignore()
            return
        self.autosave.stop()
        self.debounce.stop()
        self.undo_stack.cleanChanged.disconnect(self._on_clean_changed)  # it fires while being destroyed
        self._drop_recovery()
        self.runner.cancel("fit")
        self.runner.cancel("draws")
        self.runner.wait(60000)
        super().closeEvent(event)

    # --- help ---------------------------------------------------------------------------------------
    def show_shortcuts(self):
        text = "\n".join(f"{k:24s} {v}" for k, v in SHORTCUTS)
        box = QtWidgets.QMessageBox(QtWidgets.QMessageBox.Information, "Keyboard shortcuts", text, parent=self)
        box.setFont(QtGui.QFontDatabase.systemFont(QtGui.QFontDatabase.FixedFont))
        box.open()

    def show_about(self):
        QtWidgets.QMessageBox.about(self, "About Ventcast", f"<b>Ventcast {escape(version())}</b><p>{escape(CAUTION)}</p><p>Model sources:</p><ul>"
                                    + "".join(f"<li>{escape(s)}</li>" for s in SOURCES) + "</ul>")


#: Goals the dialog edits: key, label, unit, default (low, high) or maximum, minimum, maximum, step, decimals.
GOAL_FIELDS = (
    ("pao2_mmhg", "PaO2 goal", "mmHg", (55.0, 80.0), 40.0, 150.0, 1.0, 0),
    ("spo2", "SpO2 goal", "fraction", (0.88, 0.95), 0.80, 1.0, 0.01, 2),
    ("paco2_mmhg", "PaCO2 goal", "mmHg", (35.0, 60.0), 25.0, 90.0, 1.0, 0),
    ("ph", "pH goal", "", (7.30, 7.45), 7.10, 7.60, 0.01, 2),
    ("vt_ml_per_kg_pbw", "VT", "mL/kg PBW", (4.0, 8.0), 3.0, 12.0, 0.5, 1),
    ("pplat_max_cmh2o", "Pplat at most", "cmH2O", 30.0, 15.0, 40.0, 1.0, 0),
    ("driving_pressure_max_cmh2o", "Driving pressure at most", "cmH2O", 15.0, 5.0, 25.0, 1.0, 0),
    ("intrinsic_peep_max_cmh2o", "Intrinsic PEEP at most", "cmH2O", 5.0, 0.0, 10.0, 0.5, 1),
    ("mechanical_power_max_j_min", "Mechanical power at most", "J/min", 17.0, 5.0, 40.0, 1.0, 0),
    ("fio2_max", "FiO2 at most", "", 1.0, 0.21, 1.0, 0.05, 2),
)


class GoalsDialog(QtWidgets.QDialog):
    """Per-case goals and limits (the case file's ``goals``); defaults are the published ones."""

    def __init__(self, goals: dict, parent=None):
        super().__init__(parent)
        self.setWindowTitle("Goals and limits of this case")
        form = QtWidgets.QFormLayout(self)
        self.fields = {}
        self.original = dict(goals)
        self.defaults = {}
        for key, label, unit, default, lo, hi, step, dec in GOAL_FIELDS:
            self.defaults[key] = list(default) if isinstance(default, tuple) else default
            value = goals.get(key, default)
            spins = []
            for v in (value if isinstance(default, tuple) else (value,)):
                sp = QtWidgets.QDoubleSpinBox()
                sp.setRange(lo, hi)
                sp.setSingleStep(step)
                sp.setDecimals(dec)
                sp.setValue(float(v))
                sp.setSuffix(f" {unit}" if unit and unit != "fraction" else "")
                spins.append(sp)
            row = QtWidgets.QHBoxLayout()
            for i, sp in enumerate(spins):
                if i:
                    row.addWidget(QtWidgets.QLabel("to"))
                row.addWidget(sp)
            form.addRow(label, row)
            self.fields[key] = spins
        buttons = QtWidgets.QDialogButtonBox(QtWidgets.QDialogButtonBox.Ok | QtWidgets.QDialogButtonBox.Cancel)
        buttons.accepted.connect(self._accept)
        buttons.rejected.connect(self.reject)
        self.error = QtWidgets.QLabel("")
        form.addRow(self.error)
        form.addRow(buttons)

    def goals(self) -> dict:
        """The case's goals after the dialog: a goal the case had, or one the user moved from its
        default. Pressing OK without editing leaves the goals exactly as they were."""
        out = dict(self.original)
        for key, spins in self.fields.items():
            vals = [round(sp.value(), 4) for sp in spins]
            value = vals if len(vals) == 2 else vals[0]
            if key in self.original or value != self.defaults[key]:
                out[key] = value
        return out

    def _accept(self):
        for key, label, *_ in GOAL_FIELDS:
            spins = self.fields[key]
            if len(spins) == 2 and spins[0].value() >= spins[1].value():
                self.error.setText(f"\u2716 {label}: the low end {spins[0].value():g} must be below the high end "
                                   f"{spins[1].value():g}")
                return
        self.accept()


def read_recoveries() -> list[tuple[Path, dict]]:
    """Recovery files left by windows that did not close cleanly (their process is gone), newest first,
    each with its document (case checked again). Files of windows still running are not offered."""
    found = []
    for p in sorted(data_dir().glob(RECOVERY_GLOB), key=lambda q: q.stat().st_mtime, reverse=True):
        try:
            doc = parse_json(read_text(p, str(p)), str(p))
            if not isinstance(doc, dict) or doc.get("format") != "ventcast.recovery" or _process_alive(doc.get("pid")):
                continue
            doc["case"] = validate(doc["case"])
            if not isinstance(doc.get("trials"), dict) or doc.get("active", "A") not in TRIALS:
                continue
            found.append((p, doc))
        except (OSError, ValueError, KeyError, TypeError):
            continue
    return found


def _icon() -> QtGui.QIcon:
    """The Ventcast mark (resources/icons/ventcast.svg) as the windows' icon."""
    from importlib import resources
    data = resources.files("ventcast.resources.icons").joinpath("ventcast.svg").read_bytes()
    pixmap = QtGui.QPixmap()
    pixmap.loadFromData(data, "SVG")
    return QtGui.QIcon(pixmap)


def _quiet_offscreen_warnings(mode, context, message):
    # The offscreen platform warns that it cannot size windows to their hints; that is expected there.
    if "propagateSizeHints" in message:
        return
    print(message, file=sys.stderr)


def ask_recovery(window, doc: dict, more: int) -> str:
    """'recover', 'discard' or 'later' for one recovery document, naming its case. Tests replace this."""
    text = (f"Ventcast did not close cleanly while {doc.get('name') or 'a case'} had unsaved work "
            f"(autosaved {doc.get('saved_at') or 'earlier'}). Recover that case and its trials as they were on "
            f"screen?")
    if more:
        text += f" ({more} more unsaved case(s) will be offered next.)"
    return ask_plain(window, QtWidgets.QMessageBox.Question, "Recover unsaved work?", text,
                     [("Recover", QtWidgets.QMessageBox.AcceptRole, "recover"),
                      ("Discard it", QtWidgets.QMessageBox.DestructiveRole, "discard"),
                      ("Ask me next time", QtWidgets.QMessageBox.RejectRole, "later")])


def ask_plain(parent, icon, title: str, text: str, buttons):
    """A modal question in plain text (it may quote file names and case labels: never rich text);
    ``buttons`` are (label, role, answer); the answer of the button pressed (the last one if none)."""
    box = QtWidgets.QMessageBox(icon, title, text, parent=parent)
    box.setTextFormat(QtCore.Qt.PlainText)
    made = [(box.addButton(label, role), answer) for label, role, answer in buttons]
    box.exec()
    return next((answer for button, answer in made if box.clickedButton() is button), made[-1][1])


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
        sets=(), tab: str | None = None, walkthrough=None, case: dict | None = None) -> int:
    """Start the window (``ventcast open``). With ``screenshot``, render offscreen to a PNG and exit.

    ``sets`` (KEY=VALUE, as in ``predict --set``) make Trial A; ``tab`` picks the right-hand panel
    ('limits', 'lung-fit', 'options' or 'step-down'; with a screenshot the last two are computed first).
    ``case`` is an already loaded case (the command line has read and checked it); ``walkthrough`` a
    (script, folder) pair opens the Walkthrough window instead.
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
    if walkthrough is not None:
        script, folder = walkthrough
        wk = WalkthroughWindow(script, folder)
        wk.show()
        if quit_after_ms is not None:
            QtCore.QTimer.singleShot(quit_after_ms, wk.close)
        code = app.exec()
        _dispose(wk, app)
        return code
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
    if screenshot:
        window.resize(*size)
        window.show()
        app.processEvents()
        if window.fit_result is None:
            print(f"ventcast open: the case could not be fitted: {window.status.text()}", file=sys.stderr)
        image = window.grab()
        if image.size().width() != size[0] or image.size().height() != size[1]:
            image = image.scaled(size[0], size[1])
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


def _dispose(window, app):
    """Delete the window's C++ objects while Python still holds the interpreter: left to interpreter
    shutdown, pyqtgraph's scene items can be destroyed after their views, which crashes."""
    window.deleteLater()
    app.sendPostedEvents(None, QtCore.QEvent.DeferredDelete)
    app.processEvents()


class WalkthroughWindow(QtWidgets.QMainWindow):
    """Walkthrough mode: a patient that evolves on a running clock (1x-60x), learner settings, instructor
    events, blood-gas draws with a result delay, and a debrief exported as PDF and CSV.

    The clock only moves the reading position along the course (:class:`app.walkthrough.Run`); a new
    event or setting recomputes the course on the worker, so nothing blocks the window.
    """

    ticked = QtCore.Signal(float)           # the clock [min]
    course_ready = QtCore.Signal()
    result_shown = QtCore.Signal(object)    # a draw's result
    finished = QtCore.Signal(object)        # the debrief

    TICK_MS = 100

    def __init__(self, script: dict, folder=None, synchronous: bool = False, parent=None):
        super().__init__(parent)
        from .walkthrough import Run
        self.setWindowTitle(f"{APP_NAME} walkthrough \u2014 {script['title']}")
        self.run = Run(script, folder)
        self.minute = 0.0
        self.running = False
        self.runner = EngineRunner(self, synchronous=synchronous)
        self.runner.finished.connect(self._on_result)
        self.runner.failed.connect(lambda _r, m: self.status.setText(f"\u2716 {m}"))
        self.timer = QtCore.QTimer(self)
        self.timer.setInterval(self.TICK_MS)
        self.timer.timeout.connect(self._tick)
        self._build()
        self._recompute()

    def _build(self):
        pg.setConfigOptions(antialias=False, background="#fafafa", foreground="#222222")
        central = QtWidgets.QWidget()
        lay = QtWidgets.QGridLayout(central)
        self.clock = QtWidgets.QLabel("")
        self.clock.setStyleSheet("font-size: 18px; font-weight: bold;")
        lay.addWidget(self.clock, 0, 0, 1, 2)
        controls = QtWidgets.QHBoxLayout()
        self.start_button = QtWidgets.QPushButton("Start")
        self.start_button.clicked.connect(self.toggle)
        self.speed = QtWidgets.QSpinBox()
        self.speed.setRange(1, 60)
        self.speed.setValue(int(self.run.speed))
        self.speed.setSuffix("\u00d7 real time")
        self.jump_button = QtWidgets.QPushButton("Jump 5 min")
        self.jump_button.clicked.connect(lambda: self.advance(5.0))
        self.draw_button = QtWidgets.QPushButton("Draw a blood gas")
        self.draw_button.clicked.connect(self.draw)
        self.finish_button = QtWidgets.QPushButton("Finish and debrief")
        self.finish_button.clicked.connect(self.finish)
        for w in (self.start_button, self.speed, self.jump_button, self.draw_button, self.finish_button):
            controls.addWidget(w)
        lay.addLayout(controls, 1, 0, 1, 2)
        learner = QtWidgets.QGroupBox("Learner: settings")
        form = QtWidgets.QFormLayout(learner)
        self.learner_spins = {}
        now = settings_dict(self.run.timeline.settings)
        for key, label, unit, lo, hi, step, dec in CONTROLS:
            if now.get(key) is None:
                continue
            sp = QtWidgets.QDoubleSpinBox()
            sp.setRange(lo, hi)
            sp.setSingleStep(step)
            sp.setDecimals(dec)
            sp.setSuffix(f" {unit}" if unit else "")
            sp.setValue(float(now[key]))
            form.addRow(label, sp)
            self.learner_spins[key] = sp
        apply_button = QtWidgets.QPushButton("Apply settings now")
        apply_button.clicked.connect(self.apply_settings)
        form.addRow(apply_button)
        lay.addWidget(learner, 2, 0)
        instructor = QtWidgets.QGroupBox("Instructor: inject an event")
        iform = QtWidgets.QFormLayout(instructor)
        self.event_kind = QtWidgets.QComboBox()
        from ventcast.physiology.scenario import EVENT_KINDS
        for kind, (name, (lo, hi), what) in EVENT_KINDS.items():
            self.event_kind.addItem(f"{kind} ({name} {lo:g}-{hi:g}): {what}", kind)
        self.event_value = QtWidgets.QDoubleSpinBox()
        self.event_value.setRange(0, 50)
        self.event_value.setDecimals(2)
        self.event_value.setValue(0.1)
        inject = QtWidgets.QPushButton("Inject now")
        inject.clicked.connect(self.inject)
        iform.addRow("Event", self.event_kind)
        iform.addRow("Value", self.event_value)
        iform.addRow(inject)
        lay.addWidget(instructor, 3, 0)
        self.chart = pg.GraphicsLayoutWidget()
        self.plots = {}
        self.curves = {}
        for i, (key, label, colour) in enumerate((("pao2", "PaO2 [mmHg]", COLOUR["pao2"]),
                                                   ("paco2", "PaCO2 [mmHg]", COLOUR["paco2"]))):
            p = self.chart.addPlot(row=i, col=0)
            _axis(p, label, "minutes of the walkthrough [min]")
            self.plots[key] = p
            self.curves[key] = p.plot(pen=pg.mkPen(colour, width=1))
            self.plots[key].setXRange(0, self.run.duration, padding=0.01)
        lay.addWidget(self.chart, 2, 1, 3, 1)
        self.log = QtWidgets.QListWidget()
        lay.addWidget(self.log, 4, 0)
        self.prompt = QtWidgets.QLabel(self.run.script.get("summary", ""))
        self.prompt.setTextFormat(QtCore.Qt.PlainText)  # script text is shown as written, never as HTML
        self.prompt.setWordWrap(True)
        lay.addWidget(self.prompt, 5, 0, 1, 2)
        caution = QtWidgets.QLabel(CAUTION)
        caution.setWordWrap(True)
        caution.setStyleSheet("background: #fff4dc; border: 1px solid #b07d00; padding: 4px; font-weight: bold;")
        lay.addWidget(caution, 6, 0, 1, 2)
        lay.setColumnStretch(1, 1)
        self.setCentralWidget(central)
        self.status = QtWidgets.QLabel("")
        self.status.setTextFormat(QtCore.Qt.PlainText)  # messages quote file text: never rich text
        self.statusBar().addWidget(self.status, 1)
        self.resize(1300, 850)
        self._show_clock()

    # -- clock ----------------------------------------------------------------------------------------
    def toggle(self):
        self.running = not self.running
        self.start_button.setText("Pause" if self.running else "Resume")
        if self.running:
            self.timer.start()
        else:
            self.timer.stop()

    def _tick(self):
        self.advance(self.TICK_MS / 1000.0 * self.speed.value() / 60.0)

    def advance(self, minutes: float):
        """Move the clock (pause, resume and jump all come here); reveals what falls due."""
        if self.run._course is None:
            return  # the course is being recomputed: the clock waits for it
        start, end = self.minute, min(self.minute + minutes, self.run.duration)
        due = self.run.due(start, end)
        for e in due["events"]:
            self.log.addItem(f"{e.minute:5.1f} min  \u26a0 event: {e.kind} {e.value:g} \u2014 {e.note}")
        for c in due["checkpoints"]:
            self.log.addItem(f"{c['minute']:5.1f} min  ? {c['prompt']}")
            self.prompt.setText(c["prompt"])
        for d in due["results"]:
            v = d.values
            self.log.addItem(f"{d.ready_at:5.1f} min  blood gas drawn at {d.minute:.1f} min: PaO2 {v['pao2']:.0f} mmHg, "
                             f"PaCO2 {v['paco2']:.1f} mmHg, pH {v['ph']:.2f}, SaO2 {v['sao2']:.2f}")
            self.result_shown.emit(d)
        self.minute = end
        self._show_clock()
        self.ticked.emit(self.minute)
        if self.minute >= self.run.duration - 1e-9 and self.running:
            self.toggle()

    def _show_clock(self):
        c = self.run._course
        if c is not None:
            keep = c.minutes <= self.minute + 1e-9
            for key, curve in self.curves.items():
                curve.setData(c.minutes[keep], getattr(c, key)[keep])
        self.clock.setText(f"Minute {self.minute:5.1f} of {self.run.duration:g}")

    # -- learner and instructor -----------------------------------------------------------------------
    def apply_settings(self):
        sets = {k: round(sp.value(), 2) for k, sp in self.learner_spins.items()}
        try:
            self.run.act(self.minute, sets)
        except (CaseError, ValueError) as exc:
            self.status.setText(f"\u2716 {exc}")
            return
        self.log.addItem(f"{self.minute:5.1f} min  learner: " + ", ".join(f"{k} {v:g}" for k, v in sets.items()))
        self._recompute()

    def inject(self, kind: str | None = None, value: float | None = None):
        kind = kind or self.event_kind.currentData()
        value = float(self.event_value.value()) if value is None else float(value)
        try:
            self.run.inject(self.minute, kind, value)
        except (CaseError, ValueError) as exc:
            self.status.setText(f"\u2716 {exc}")
            return
        self._recompute()

    def draw(self):
        if self.run._course is None:
            return
        d = self.run.draw(self.minute)
        self.log.addItem(f"{self.minute:5.1f} min  blood gas drawn; result at {d['ready_at']:.1f} min")

    def _recompute(self):
        """Recompute the course on the worker from a frozen copy of the timeline (the window may add events
        or actions meanwhile; only the newest request's course is used)."""
        from ventcast.physiology.scenario import Timeline
        self.run._course = None
        tl = self.run.timeline
        frozen = Timeline(tl.patient, tl.settings, list(tl.events), list(tl.actions), [], tl.seed)
        duration = self.run.duration

        def work():
            c = frozen.course(duration)
            if not bool(np.all(c.success)):
                raise ArithmeticError(f"the walkthrough patient cannot be followed: {c.message}")
            return c

        self.status.setText("computing the patient's course...")
        self.runner.submit("walk", work)

    def _on_result(self, request, result):
        if request.kind == "walk":
            self.run._course = result
            self.status.setText("")
            self._show_clock()
            self.course_ready.emit()

    # -- debrief --------------------------------------------------------------------------------------
    def finish(self):
        if self.running:
            self.toggle()
        if self.run._course is None:
            return None
        out = self.run.debrief(self.minute if self.minute > 0 else None)
        self.log.addItem(f"Debrief: score {out['score']['met']} of {out['score']['of']}")
        for s in out["score"]["items"]:
            mark = "\u2713" if s["met"] else "\u2716"
            self.log.addItem(f"   [{mark}] {s['expected']} \u2014 {s['why']}")
        self.debrief = out
        self.finished.emit(out)
        return out

    def export_debrief(self, folder: str) -> list:
        """The debrief as CSV (timeline and course) and PDF (timeline, score, charts) into ``folder``."""
        import csv
        import io
        from .report import chart_images, write_pdf
        from .casefile import check_output_files
        try:
            folder = check_output_files("debrief folder", folder,
                                        ("debrief-timeline.csv", "debrief-course.csv", "debrief.pdf"))
        except CaseError as exc:
            self.status.setText(f"\u2716 not exported: {exc}")
            return []
        out = getattr(self, "debrief", None) or self.finish()
        folder.mkdir(exist_ok=True)
        timeline = io.StringIO()
        w = csv.writer(timeline, lineterminator="\n")
        w.writerow(["minute [min]", "what", "detail"])
        rows = [(e["minute"], f"event ({e['source']})", f"{e['kind']} {e['value']:g}: {e['note']}") for e in out["events"]]
        rows += [(a["minute"], "learner", ", ".join(a["changed"])) for a in out["actions"]]
        rows += [(d["minute"], "blood gas", f"PaO2 {d['pao2']:.1f} mmHg, PaCO2 {d['paco2']:.1f} mmHg, pH {d['ph']:.3f}, "
                                           f"SaO2 {d['sao2']:.3f}; result at {d['ready_at']:g} min") for d in out["draws"]]
        for r in sorted(rows, key=lambda r: r[0]):
            w.writerow(r)
        course = io.StringIO()
        w = csv.writer(course, lineterminator="\n")
        c = out["course"]
        w.writerow(["minutes [min]", "PaO2 [mmHg]", "PaCO2 [mmHg]", "pH [pH units]", "SaO2 [fraction]"])
        for row in zip(c["minutes"], c["pao2_mmhg"], c["paco2_mmhg"], c["ph"], c["sao2"]):
            w.writerow(row)
        write_atomic(folder / "debrief-timeline.csv", timeline.getvalue())
        write_atomic(folder / "debrief-course.csv", course.getvalue())
        html = [f"<h1>Walkthrough debrief: {escape(out['title'])}</h1><p><b>{escape(CAUTION)}</b></p>",
                f"<p>Score {out['score']['met']} of {out['score']['of']}</p><ul>"]
        html += [f"<li>{'(ok)' if s['met'] else '(missed)'} {escape(s['expected'])} \u2014 {escape(s['why'])}</li>"
                 for s in out["score"]["items"]]
        html.append("</ul><h2>Timeline</h2><ul>")
        html += [f"<li>{m:.1f} min: {escape(what)} \u2014 {escape(detail)}</li>" for m, what, detail in sorted(rows)]
        html.append("</ul><h2>Course</h2><p><img src='chart://pao2_mmhg' width='640'></p>"
                    "<p><img src='chart://paco2_mmhg' width='640'></p>"
                    f"<p><b>{escape(CAUTION)}</b></p>")
        course_for_chart = {"course": {"minutes": c["minutes"], "pao2_mmhg": c["pao2_mmhg"], "paco2_mmhg": c["paco2_mmhg"],
                                       "ph": c["ph"]}}
        images = chart_images({"run": course_for_chart})
        write_pdf(folder / "debrief.pdf", "\n".join(html), images)
        files = [str(folder / n) for n in ("debrief-timeline.csv", "debrief-course.csv", "debrief.pdf")]
        self.status.setText("exported " + ", ".join(files))
        return files

    def closeEvent(self, event):
        self.timer.stop()
        self.runner.wait(60000)
        super().closeEvent(event)
