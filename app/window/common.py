"""What every part of the window shares: names, colours, controls, unit conversion, the plain-data
state of the trials and its undo command, recovery-file names, and the chart-axis helper."""

from __future__ import annotations

import hashlib
import itertools
import math
import os
import re
import sys
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyqtgraph as pg
from PySide6 import QtCore, QtGui, QtWidgets

from .. import MMHG_PER_KPA
from ..casefile import SETTING_RANGES

APP_NAME = "Ventcast"
ORG_NAME = "Ventcast"
DEBOUNCE_MS = 50
AUTOSAVE_MS = 30_000
TRIALS = ("A", "B", "C")

#: Okabe & Ito 2008 colour-blind-safe palette.
OKABE_ITO = {"black": "#000000", "orange": "#E69F00", "sky": "#56B4E9", "green": "#009E73",
             "yellow": "#F0E442", "blue": "#0072B2", "vermillion": "#D55E00", "purple": "#CC79A7"}
#: One colour per quantity where a chart shows quantities (the walkthrough's, the V/Q distribution).
COLOUR = {"pao2": OKABE_ITO["blue"], "paco2": OKABE_ITO["vermillion"], "ventilation": OKABE_ITO["sky"],
          "perfusion": OKABE_ITO["vermillion"]}
#: One colour and line style per trial (never colour alone: the styles differ too), and the current
#: settings in grey, dashed. The Okabe & Ito palette is colour-blind safe.
TRIAL_STYLE = {"A": (OKABE_ITO["blue"], QtCore.Qt.SolidLine), "B": (OKABE_ITO["vermillion"], QtCore.Qt.DashDotLine),
               "C": (OKABE_ITO["purple"], QtCore.Qt.DotLine)}
#: The same in words (the trial tabs' tooltips).
STYLE_NAME = {"A": "blue, solid", "B": "vermillion, dash-dot", "C": "purple, dotted"}
NOW_STYLE = ("#5a5a5a", QtCore.Qt.DashLine)
#: The key's drawing of each style, as text.
STYLE_GLYPH = {QtCore.Qt.SolidLine: "\u2501\u2501", QtCore.Qt.DashDotLine: "\u2501\u00b7\u2501",
               QtCore.Qt.DotLine: "\u00b7\u00b7\u00b7\u00b7", QtCore.Qt.DashLine: "\u2501 \u2501"}
#: Symbols for Limits lines, so that status never rests on colour alone.
STATUS_SYMBOL = {"ok": "\u2713 ok", "info": "i note", "caution": "\u26a0 caution", "danger": "\u2716 danger"}

#: The trial-setting controls: key, label, unit, minimum, maximum, step, decimals. The ranges are the
#: engine's accepted ranges (``casefile.SETTING_RANGES``); VT's is set per case (2-20 mL/kg PBW).
CONTROLS = (
    ("fio2", "FiO2", "", 0.21, 1.0, 0.05, 2),
    ("peep_cmh2o", "PEEP", "cmH2O", *SETTING_RANGES["peep_cmh2o"][:2], 1.0, 0),
    ("vt_ml", "VT", "mL", 100.0, 1200.0, 10.0, 0),
    ("inspiratory_pressure_cmh2o", "Inspiratory pressure", "cmH2O", *SETTING_RANGES["inspiratory_pressure_cmh2o"][:2],
     1.0, 0),
    ("pressure_support_cmh2o", "Pressure support", "cmH2O", *SETTING_RANGES["pressure_support_cmh2o"][:2], 1.0, 0),
    ("rr_per_min", "RR", "/min", *SETTING_RANGES["rr_per_min"][:2], 1.0, 0),
    ("inspiratory_time_s", "Ti", "s", *SETTING_RANGES["inspiratory_time_s"][:2], 0.05, 2),
)
#: The modes in the order of the Mode list, and their names on screen.
MODES = (("volume", "volume control"), ("pressure", "pressure control"), ("pressure-support", "pressure support"),
         ("cpap", "CPAP"))
#: The breath-size controls each mode does not use (hidden while it is chosen).
HIDDEN_IN_MODE = {"volume": {"inspiratory_pressure_cmh2o", "pressure_support_cmh2o"},
                  "pressure": {"vt_ml", "pressure_support_cmh2o"},
                  "pressure-support": {"vt_ml", "inspiratory_pressure_cmh2o"},
                  "cpap": {"vt_ml", "inspiratory_pressure_cmh2o", "pressure_support_cmh2o"}}
#: What each settings key is called on screen.
SETTING_LABELS = {"mode": "Mode", **{key: label for key, label, *_ in CONTROLS},
                  "apparatus_dead_space_ml": "apparatus dead space"}


#: Patient and observation fields in the words on screen (settings: SETTING_LABELS).
FIELD_WORDS = {"pao2_mmhg": "PaO2", "paco2_mmhg": "PaCO2", "ph": "pH", "sao2": "SaO2", "hco3_mmol_l": "HCO3",
               "petco2_mmhg": "PetCO2", "pplat_cmh2o": "Pplat", "ppeak_cmh2o": "Ppeak", "vte_ml": "exhaled VT",
               "ve_l_min": "minute ventilation", "hb_g_dl": "Hb", "taken_at": "time taken", "height_cm": "height",
               "weight_kg": "weight", "age_years": "age", "temperature_c": "temperature",
               "barometric_mmhg": "barometric pressure", "sex": "sex", "patient": "patient", "settings": "settings",
               "spontaneous_rr_per_min": "own rate", "p01_cmh2o": "P0.1", "delta_pocc_cmh2o": "\u0394Pocc",
               "cycle_off_fraction": "cycling criterion"}


def field_in_words(field: str) -> str:
    """A case-file path in the words on screen: 'Trial A.vt_ml' -> 'Trial A, VT'; 'blood gas: pao2_mmhg'
    -> 'blood gas, PaO2'; 'patient.height_cm' -> 'patient, height'."""
    head, _, key = field.replace(": ", ".").rpartition(".")
    words = SETTING_LABELS.get(key) or FIELD_WORDS.get(key) or key.replace("_", " ")
    return f"{head}, {words}" if head else words

SHORTCUTS = (
    ("Ctrl+N", "new case"), ("Ctrl+O", "open a case file"),
    ("Ctrl+S", "save the case (trials, goals, gases and applied changes included)"),
    ("Ctrl+G", "add a blood gas (typed or pasted)"), ("Ctrl+Shift+A", "apply the trial to the patient"),
    ("Ctrl+Shift+S", "save as"), ("Ctrl+Z / Ctrl+Shift+Z", "undo / redo a trial or data change"),
    ("Ctrl+1 / 2 / 3", "edit Trial A / B / C"), ("Ctrl+R", "reset the trial to the current settings"),
    ("Ctrl+K", "switch mmHg / kPa"), ("Ctrl+Shift+O", "switch the oxygen chart PaO2 / SpO2 (%)"),
    ("F1", "this list"), ("Ctrl+Q", "quit"),
)

def kpa_from_mmhg(x):
    return x / MMHG_PER_KPA


def gas_text(mmhg, units: str, digits: int = 0) -> str:
    """A gas pressure in the window's unit ('mmHg' or 'kPa', at least one decimal in kPa); '-' if missing."""
    if mmhg is None or not math.isfinite(mmhg):
        return "-"
    if units == "kPa":
        return f"{kpa_from_mmhg(mmhg):.{max(digits, 1)}f} kPa"
    return f"{mmhg:.{digits}f} mmHg"


def mmhg_text_in(text: str, units: str) -> str:
    """Every "<number> mmHg" and "<low>-<high> mmHg" of a text in the window's unit (kPa: one decimal)."""
    if units != "kPa":
        return text

    def one(x):
        return f"{kpa_from_mmhg(float(x)):.1f}"

    text = re.sub(r"(\d+(?:\.\d+)?)-(\d+(?:\.\d+)?) mmHg", lambda m: f"{one(m[1])}-{one(m[2])} kPa", text)
    return re.sub(r"(\d+(?:\.\d+)?) mmHg", lambda m: f"{one(m[1])} kPa", text)


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

    def __init__(self, window, trial: str, before: dict, after: dict, key: str):
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


def no_si_prefix(axis: pg.AxisItem) -> None:
    """Axis numbers as they are, never scaled by an SI prefix. pyqtgraph computes a prefix scale even
    while turning the prefix off (x1000 for an axis then showing 0-1, such as SaO2) and keeps it: a
    PaO2 axis labelled after an SaO2 one read 65000-80000 mmHg. The scale is set back to 1 here."""
    axis.enableAutoSIPrefix(False)
    axis.autoSIPrefixScale = 1.0
    axis.labelUnitPrefix = ""
    axis.picture = None  # the tick strings are drawn again
    axis.update()


def fit_y(plot: pg.PlotItem, values, span: float):
    """Y range of ``plot`` around the finite ``values``, at least ``span`` wide (so that noise or
    solver-size wiggles never fill a chart), with 8 % padding."""
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v)]
    if not v.size:
        return
    lo, hi = float(v.min()), float(v.max())
    if hi - lo < span:
        mid = 0.5 * (lo + hi)
        lo, hi = mid - 0.5 * span, mid + 0.5 * span
    pad = 0.08 * (hi - lo)
    plot.setYRange(lo - pad, hi + pad, padding=0)


def _axis(plot: pg.PlotItem, left: str, bottom: str = "after the change [min]"):
    plot.setLabel("left", left)
    plot.setLabel("bottom", bottom)
    for name in ("left", "bottom"):
        no_si_prefix(plot.getAxis(name))
    plot.showGrid(x=True, y=True, alpha=0.15)
    plot.setMouseEnabled(x=False, y=False)
    plot.hideButtons()


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


def fit_rows(table: QtWidgets.QTableWidget) -> None:
    """Row heights to the wrapped text; a table without a vertical scroll bar is made tall enough to show
    every row (its panel scrolls instead), so that no row is ever hidden."""
    table.resizeRowsToContents()
    if table.verticalScrollBarPolicy() == QtCore.Qt.ScrollBarAlwaysOff:
        rows = sum(table.rowHeight(r) for r in range(table.rowCount()))
        table.setFixedHeight(table.horizontalHeader().height() + rows + 2 * table.frameWidth())


class _RowFitter(QtCore.QObject):
    """Fits a table's rows to its wrapped text whenever its width changes (stretched columns are resized
    without a sectionResized signal)."""

    def __init__(self, table):
        super().__init__(table)
        self.table, self.width = table, -1

    def eventFilter(self, obj, event):
        if event.type() == QtCore.QEvent.Resize and obj.width() != self.width:
            self.width = obj.width()
            QtCore.QTimer.singleShot(0, self.table, lambda: fit_rows(self.table))  # never after deletion
        return False


def wrapped_table(columns: list) -> QtWidgets.QTableWidget:
    """A read-only table whose text columns share the width and wrap (nothing cut off on a small screen)."""
    t = QtWidgets.QTableWidget(0, len(columns))
    t.setHorizontalHeaderLabels(columns)
    t.verticalHeader().hide()
    t.setEditTriggers(QtWidgets.QAbstractItemView.NoEditTriggers)
    t.setWordWrap(True)
    t.setTextElideMode(QtCore.Qt.ElideNone)
    header = t.horizontalHeader()
    header.setSectionResizeMode(QtWidgets.QHeaderView.Stretch)
    header.setSectionResizeMode(0, QtWidgets.QHeaderView.ResizeToContents)
    header.sectionResized.connect(lambda *_: fit_rows(t))
    t.viewport().installEventFilter(_RowFitter(t))
    return t
