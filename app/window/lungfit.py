"""The Lung fit panel: the fitted parameters with their likely ranges, what the data cannot tell apart,
data-quality notes, the model's assumptions, the next best measurement and the V/Q distribution."""

from __future__ import annotations

from html import escape

import numpy as np
import pyqtgraph as pg
from PySide6 import QtCore, QtWidgets

from ..engine import PARAMETER_LABELS, model_assumptions
from .common import COLOUR, _axis, fit_rows, wrapped_table


class LungFitPanel(QtWidgets.QWidget):
    """Shows a FitResult (read only) and the V/Q distribution of a Prediction."""

    def __init__(self, parent=None):
        super().__init__(parent)
        fl = QtWidgets.QVBoxLayout(self)
        self.message = QtWidgets.QLabel("fitting...")
        self.message.setWordWrap(True)
        fl.addWidget(self.message)
        # Both columns share the width and wrap, so that neither is cut off in a narrow panel.
        # The whole table is shown (the panel scrolls instead), so no scroll bar narrows its columns.
        self.table = wrapped_table(["parameter", "estimate (90 % range)"])
        self.table.horizontalHeader().setSectionResizeMode(0, QtWidgets.QHeaderView.Stretch)  # names wrap
        self.table.horizontalHeader().setSectionResizeMode(1, QtWidgets.QHeaderView.ResizeToContents)  # never cut
        self.table.setVerticalScrollBarPolicy(QtCore.Qt.ScrollBarAlwaysOff)
        self.table.setHorizontalScrollBarPolicy(QtCore.Qt.ScrollBarAlwaysOff)
        fl.addWidget(self.table)
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

    def show_fit(self, f):
        """Parameters, message, identifiability, warnings and assumptions of the fit ``f``; a fit shown
        before its posterior draws says its ranges are being computed."""
        rows = list(f.free) + ["vco2"]
        self.table.setRowCount(len(rows))
        for i, n in enumerate(rows):
            label, unit, d = PARAMETER_LABELS[n]
            if n in f.ranges:
                lo, hi = f.ranges[n]
                value = f"{f.estimates[n]:.{d}f} ({lo:.{d}f}\u2013{hi:.{d}f}) {unit}"
            else:
                value = f"{f.estimates[n]:.{d}f} {unit} (range: computing...)"
            for j, text in enumerate((label, value.strip())):
                self.table.setItem(i, j, QtWidgets.QTableWidgetItem(text))
        fit_rows(self.table)
        symbol = "\u2713" if f.success else "\u2716"
        pending = "" if f.sampled else " (likely ranges: computing the posterior draws...)"
        self.message.setText(f"{symbol} {escape(f.message)}{pending}")
        parts = []
        if f.identifiability:
            parts.append("<b>What the data cannot tell apart:</b><br>" + "<br>".join(
                "\u2022 " + escape(m) for m in f.identifiability))
        if f.warnings:
            parts.append("<b>Data-quality notes:</b><br>" + "<br>".join("\u26a0 " + escape(m) for m in f.warnings))
        parts.append("<b>Model assumptions:</b><br>" + "<br>".join(
            "\u2022 " + escape(m) for m in model_assumptions(f.patient.condition)))
        self.ident_label.setText("<br>".join(parts))

    def show_next(self, ranked: list):
        """The next best measurements, best first (plain data from the band stage)."""
        self.next_label.setText("<b>Next best measurement:</b><br>" + "<br>".join(
            f"{i + 1}. {escape(c['probe'])}: {escape(c['why'])}" for i, c in enumerate(ranked)) if ranked else
            "<b>Next best measurement:</b> none could be ranked")

    def show_vq(self, pred):
        """Ventilation and perfusion of each lung unit against its V/Q, at the current settings."""
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
