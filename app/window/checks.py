"""The Forecast check panel: each stored forecast against the blood gas measured after its change,
with the running tally for this patient (plain data from :func:`app.entry.forecast_check`)."""

from __future__ import annotations

import numpy as np
import pyqtgraph as pg
from PySide6 import QtCore, QtGui, QtWidgets

from ..entry import CHECKED, band_key, tally_text
from .common import TRIAL_STYLE, _axis, kpa_from_mmhg, wrapped_table


NAMES = {key: name for key, name, _unit, _d in CHECKED}


class ForecastCheckPanel(QtWidgets.QWidget):
    """Measured, forecast at that minute of the stored course, 90 % likely range, inside or outside."""

    def __init__(self, parent=None):
        super().__init__(parent)
        lay = QtWidgets.QVBoxLayout(self)
        self.tally = QtWidgets.QLabel("")
        self.tally.setWordWrap(True)
        self.tally.setTextFormat(QtCore.Qt.PlainText)
        lay.addWidget(self.tally)
        self.table = wrapped_table(["gas taken"] + [name for _k, name, _u, _d in CHECKED])
        lay.addWidget(self.table, 1)
        # The stored course of the selected row's change, its band, and the gases measured after it.
        self.graphics = pg.GraphicsLayoutWidget()
        self.graphics.setMinimumHeight(180)
        self.plots = {key: self.graphics.addPlot(row=0, col=i) for i, key in enumerate(("pao2_mmhg", "paco2_mmhg"))}
        colour = QtGui.QColor(TRIAL_STYLE["A"][0])
        band = QtGui.QColor(colour)
        band.setAlpha(45)
        self.items = {}
        for key, plot in self.plots.items():
            low, high = pg.PlotCurveItem(pen=pg.mkPen(None)), pg.PlotCurveItem(pen=pg.mkPen(None))
            plot.addItem(pg.FillBetweenItem(low, high, brush=pg.mkBrush(band)))
            line = plot.plot(pen=pg.mkPen(colour, width=2))
            points = plot.plot(pen=None, symbol="o", symbolSize=8, symbolBrush="#222222")
            self.items[key] = (low, high, line, points)
        self.graphics.hide()
        lay.addWidget(self.graphics)
        self.table.currentCellChanged.connect(lambda row, *_: self._draw(row))
        self.check, self.case, self.units = None, None, "mmHg"
        note = QtWidgets.QLabel("Each gas taken after an applied change, at its settings, against the forecast "
                                "stored when the change was applied (at that minute of its course; the steady "
                                "state after the last minute). Stored forecasts are never changed. The chart shows the selected "
                                "row's stored course with its 90 % band and the gases measured after that change "
                                "(a gas taken after the course's last minute is drawn at its end).")
        note.setWordWrap(True)
        lay.addWidget(note)

    def show_check(self, check: dict, units: str, case: dict | None = None):
        self.check, self.case, self.units = check, case, units
        self.tally.setText(tally_text(check))
        self.table.setRowCount(len(check["pairs"]))
        for i, p in enumerate(check["pairs"]):
            taken = p["gas_taken_at"][5:16].replace("T", " ")
            self.table.setItem(i, 0, QtWidgets.QTableWidgetItem(f"{taken}\n{p['minutes_after_change']:g} min after "
                                                                f"the change"))
            for j, (key, _name, unit, d) in enumerate(CHECKED, start=1):
                kpa = unit == "mmHg" and units == "kPa"
                conv = kpa_from_mmhg if kpa else (lambda x: x)
                dd = max(d, 1) if kpa else d
                lo, hi = p["likely_range"][key]
                inside = p["inside"][key]
                verdict = "\u2713 inside" if inside else "\u2716 outside"
                item = QtWidgets.QTableWidgetItem(
                    f"{conv(p['measured'][key]):.{dd}f} measured\n{conv(p['forecast'][key]):.{dd}f} forecast "
                    f"({conv(lo):.{dd}f}\u2013{conv(hi):.{dd}f})\n{verdict}")
                if not inside:
                    item.setForeground(QtGui.QColor("#8a1c00"))
                self.table.setItem(i, j, item)
        self._draw(len(check["pairs"]) - 1)

    def _draw(self, row: int):
        """The stored forecast (course and band) of the change of ``row``'s gas, with every gas measured
        after that change as a point: the forecast as it was made, against what was measured."""
        if self.check is None or self.case is None or not 0 <= row < len(self.check["pairs"]):
            self.graphics.hide()
            return
        pair = self.check["pairs"][row]
        change = next(c for c in self.case.get("settings_history") or [] if c["applied_at"] == pair["applied_at"])
        course = change["forecast"]["course"]
        m = np.asarray(course["minutes"], dtype=float)
        same = [p for p in self.check["pairs"] if p["applied_at"] == pair["applied_at"]]
        unit = "kPa" if self.units == "kPa" else "mmHg"
        for key, plot in self.plots.items():
            conv = kpa_from_mmhg if unit == "kPa" else (lambda x: x)
            low, high, line, points = self.items[key]
            low.setData(m, conv(np.asarray(course[band_key(key, "low")], dtype=float)))
            high.setData(m, conv(np.asarray(course[band_key(key, "high")], dtype=float)))
            line.setData(m, conv(np.asarray(course[key], dtype=float)))
            points.setData([min(p["minutes_after_change"], float(m[-1])) for p in same],
                           [conv(float(p["measured"][key])) for p in same])
            _axis(plot, f"{NAMES[key]} [{unit}]", "after the change [min]")
        self.graphics.show()
