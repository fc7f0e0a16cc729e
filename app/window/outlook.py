"""The Outlook panel: the next hour of PaO2 (or SaO2), PaCO2, pH and the pressures, current settings
dashed, the trial solid, the likely range as a band, and the re-check time."""

from __future__ import annotations

import math

import numpy as np
import pyqtgraph as pg
from PySide6 import QtCore, QtGui, QtWidgets

from .common import COLOUR, _axis, kpa_from_mmhg


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
        i = int(np.argmin(np.abs(self.x - p.x())))  # the nearest sample to the pointer
        self.hover.setText(f"{self.x[i]:.1f} min: {self.y[i]:.3g}")
        self.hover.setPos(self.x[i], self.y[i])
        self.hover.show()


class OutlookPanel(QtWidgets.QGroupBox):
    """Five charts drawn from a forecast (plain data); it computes nothing."""

    TITLE = "Outlook (next 60 min; dashed: current settings, solid: trial, band: likely range 90 %, green: goal)"

    def __init__(self, parent=None):
        super().__init__("Outlook: no forecast yet (fitting the lung model...)", parent)
        lay = QtWidgets.QVBoxLayout(self)
        self.graphics = pg.GraphicsLayoutWidget()
        self.plots = {}
        # Gases on top; below, the pressures (two columns wide) and VD/VT on a chart of its own, so that
        # a fraction is never read against a pressure axis.
        for key, row, col, span in (("oxygen", 0, 0, 1), ("paco2", 0, 1, 1), ("ph", 0, 2, 1),
                                    ("pressure", 1, 0, 2), ("vd_vt", 1, 2, 1)):
            self.plots[key] = self.graphics.addPlot(row=row, col=col, colspan=span)
        self.charts = {"oxygen": OutlookChart(self.plots["oxygen"], COLOUR["pao2"], 10.0),
                       "paco2": OutlookChart(self.plots["paco2"], COLOUR["paco2"], 5.0),
                       "ph": OutlookChart(self.plots["ph"], COLOUR["ph"], 0.05),
                       "vd_vt": OutlookChart(self.plots["vd_vt"], COLOUR["vd_vt"], 0.05)}
        _axis(self.plots["ph"], "pH")
        _axis(self.plots["vd_vt"], "VD/VT [fraction]")
        pp = self.plots["pressure"]
        _axis(pp, "pressure [cmH2O]")
        # The key as the chart's title, above the plot area: a legend inside it covered the lines.
        pp.setTitle(f"<span style='color:{COLOUR['pplat']}'>\u2014 Pplat</span> &nbsp; "
                    f"<span style='color:{COLOUR['dp']}'>\u2014 driving pressure</span> &nbsp; "
                    f"<span style='color:#333333'>\u00b7\u00b7\u00b7 Pplat limit</span>", size="9pt")
        self.pressure_items = {
            "pplat_now": pp.plot(pen=pg.mkPen(COLOUR["pplat"], width=1, style=QtCore.Qt.DashLine)),
            "pplat": pp.plot(pen=pg.mkPen(COLOUR["pplat"], width=1)),
            "dp_now": pp.plot(pen=pg.mkPen(COLOUR["dp"], width=1, style=QtCore.Qt.DashLine)),
            "dp": pp.plot(pen=pg.mkPen(COLOUR["dp"], width=1)),
        }
        self.pplat_limit = pg.InfiniteLine(angle=0, pos=30, movable=False,
                                           pen=pg.mkPen("#333333", width=1, style=QtCore.Qt.DotLine))
        pp.addItem(self.pplat_limit)
        # The goal of each gas as a pale horizontal band behind its curves (the case's goals, else the
        # published defaults), so that a forecast is read against what the team aims for.
        self.goal_bands = {}
        for key in ("oxygen", "paco2", "ph"):
            band = pg.LinearRegionItem(orientation="horizontal", movable=False, brush=pg.mkBrush(0, 120, 60, 28),
                                       pen=pg.mkPen(None))
            band.setZValue(-20)
            self.plots[key].addItem(band, ignoreBounds=True)
            band.hide()
            self.goal_bands[key] = band
        lay.addWidget(self.graphics)

    def clear(self):
        """Remove every curve computed from the trial (a refused or failed trial shows none)."""
        for chart in self.charts.values():
            chart.set([], [])
        for key in ("pplat", "dp"):
            self.pressure_items[key].setData([], [])
        self.setTitle("Outlook: no forecast for this trial (see the message by the controls)")

    def label_axes(self, units: str, oxygen_view: str):
        """Axis titles in the unit of the window; the oxygen chart shows PaO2 or SaO2."""
        u = "kPa" if units == "kPa" else "mmHg"
        self.charts["oxygen"].min_span = 0.05 if oxygen_view == "sao2" else (10.0 / 7.5 if units == "kPa" else 10.0)
        self.charts["paco2"].min_span = 5.0 / 7.5 if units == "kPa" else 5.0
        _axis(self.plots["oxygen"], "SaO2 [fraction]" if oxygen_view == "sao2" else f"PaO2 [{u}]")
        _axis(self.plots["paco2"], f"PaCO2 [{u}]")

    def show_goals(self, goals: dict, units: str, oxygen_view: str):
        """Goal bands: PaO2 (or SpO2 in the SaO2 view), PaCO2 and pH, in the window's unit."""
        conv = kpa_from_mmhg if units == "kPa" else (lambda x: x)
        ranges = {"oxygen": goals.get("spo2") if oxygen_view == "sao2" else
                  (None if goals.get("pao2_mmhg") is None else [conv(x) for x in goals["pao2_mmhg"]]),
                  "paco2": None if goals.get("paco2_mmhg") is None else [conv(x) for x in goals["paco2_mmhg"]],
                  "ph": goals.get("ph")}
        for key, rng in ranges.items():
            band = self.goal_bands[key]
            if rng is None:
                band.hide()
            else:
                band.setRegion((float(rng[0]), float(rng[1])))
                band.show()

    def draw(self, out: dict, now, units: str, oxygen_view: str, pplat_max: float, band: dict | None = None):
        """Draw a forecast's course (``out``, from :func:`app.engine.forecast_fitted`) against the current
        state ``now`` (a Prediction at the current settings), with the band's likely range if given."""
        c = out["course"]
        m = np.asarray(c["minutes"], dtype=float)

        def arr(key):
            return np.array([np.nan if x is None else x for x in c[key]], dtype=float)

        g = now.gas
        steady = out["steady"]
        conv = kpa_from_mmhg if units == "kPa" else (lambda x: x)
        lr = (band or {}).get("course") if band else None

        def band_of(key):
            if lr is None:
                return None, None
            return (np.array([np.nan if x is None else x for x in lr[f"{key}_low"]], dtype=float),
                    np.array([np.nan if x is None else x for x in lr[f"{key}_high"]], dtype=float))

        flat = np.ones_like(m)
        recheck = None if out["settings"] == out["current_settings"] else out.get("recheck_after_min")
        if oxygen_view == "sao2":
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
        self.pplat_limit.setValue(pplat_max)
        pp = self.plots["pressure"]
        pp.setXRange(0, float(m[-1]), padding=0.01)
        ys = [float(b.pplat), float(b.driving_pressure), steady["pplat_cmh2o"] or 0, steady["driving_pressure_cmh2o"] or 0, 30]
        pp.setYRange(0, max(ys + [pplat_max]) * 1.15, padding=0)
        vd = arr("vd_vt") if "vd_vt" in c else flat * (steady["vd_vt"] or np.nan)
        self.charts["vd_vt"].set(m, vd, flat * float(g.vd_vt), recheck=recheck)
        self.setTitle(self.TITLE)
