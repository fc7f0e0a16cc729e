"""The Outlook panel: the next hour of PaO2 (or SpO2), PaCO2, pH, Pplat, driving pressure and VD/VT for
the current settings and every trial together (one colour and line style per trial), the likely range of
the trial being edited as a band, the goals as pale bands, and the re-check time."""

from __future__ import annotations

import math
from html import escape

import numpy as np
import pyqtgraph as pg
from PySide6 import QtCore, QtGui, QtWidgets

from .common import NOW_STYLE, STYLE_GLYPH, TRIAL_STYLE, TRIALS, _axis, fit_y, kpa_from_mmhg

def _pen(colour: str, style, width: float):
    return pg.mkPen(QtGui.QColor(colour), width=width, style=style)


def _array(values) -> np.ndarray:
    return np.array([np.nan if x is None else x for x in values], dtype=float)


class OutlookChart:
    """One Outlook chart: the current settings' course, one course per trial, the likely range of the
    trial being edited as a band in its colour, a limit line (optional) and the re-check marker."""

    def __init__(self, plot: pg.PlotItem, min_span: float):
        self.plot = plot
        self.min_span = min_span  # smallest y span drawn, so solver-size wiggles never fill a chart
        self.now = plot.plot(pen=_pen(NOW_STYLE[0], NOW_STYLE[1], 1))
        self.lines = {t: plot.plot(pen=_pen(c, style, 1)) for t, (c, style) in TRIAL_STYLE.items()}
        # On pressure support: the course of the other bound (drive preserved), thin and dashed in the colour
        # of the trial being edited.
        self.alt = plot.plot(pen=_pen(TRIAL_STYLE["A"][0], QtCore.Qt.DashLine, 1))
        self.active = "A"
        # FillBetweenItem follows PlotCurveItems (a PlotDataItem outside a view never builds its path).
        self.low = pg.PlotCurveItem(pen=pg.mkPen(None))
        self.high = pg.PlotCurveItem(pen=pg.mkPen(None))
        self.band = pg.FillBetweenItem(self.low, self.high, brush=pg.mkBrush(0, 0, 0, 0))
        self.band.setZValue(-10)
        plot.addItem(self.band)
        self.limit = pg.InfiniteLine(angle=0, movable=False, pen=pg.mkPen("#333333", width=1, style=QtCore.Qt.DotLine))
        plot.addItem(self.limit, ignoreBounds=True)
        self.limit.hide()
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

    @property
    def trial(self):
        """The curve of the trial being edited."""
        return self.lines[self.active]

    def set(self, minutes, courses: dict | None = None, active: str = "A", now=None, low=None, high=None,
            recheck=None, limit=None, alt=None):
        """Draw ``courses`` ({trial: values}) over ``minutes``; ``active`` is the trial being edited (drawn
        thicker, with the band ``low``-``high``); ``now`` the current settings; ``limit`` a ceiling;
        ``alt`` the active trial's other bound on pressure support (drive preserved)."""
        courses = courses or {}
        self.active = active
        self.x = np.asarray(minutes, dtype=float)
        ys = []
        if alt is not None:
            self.alt.setPen(_pen(TRIAL_STYLE[active][0], QtCore.Qt.DashLine, 1.2))
            self.alt.setData(self.x, np.asarray(alt, dtype=float))
            ys.append(np.asarray(alt, dtype=float))
        else:
            self.alt.setData([], [])
        for t, line in self.lines.items():
            colour, style = TRIAL_STYLE[t]
            line.setPen(_pen(colour, style, 2.5 if t == active else 1.2))
            line.setZValue(5 if t == active else 1)
            y = courses.get(t)
            if y is None:
                line.setData([], [])
                continue
            y = np.asarray(y, dtype=float)
            line.setData(self.x, y)
            ys.append(y)
        self.y = np.asarray(courses.get(active, []), dtype=float)
        if now is not None:
            self.now.setData(self.x, np.asarray(now, dtype=float))
            ys.append(np.asarray(now, dtype=float))
        else:
            self.now.setData([], [])
        if low is not None and high is not None and np.all(np.isfinite(low)) and np.all(np.isfinite(high)):
            self.low.setData(self.x, np.asarray(low, dtype=float))
            self.high.setData(self.x, np.asarray(high, dtype=float))
            band = QtGui.QColor(TRIAL_STYLE[active][0])
            band.setAlpha(45)
            self.band.setBrush(pg.mkBrush(band))
            self.band.show()
            ys += [np.asarray(low, dtype=float), np.asarray(high, dtype=float)]
        else:
            self.band.hide()
        if recheck is not None and math.isfinite(recheck):
            self.recheck.setValue(recheck)
            self.recheck.show()
        else:
            self.recheck.hide()
        if limit is not None:
            self.limit.setValue(limit)
            self.limit.show()
            ys.append(np.array([limit], dtype=float))
        else:
            self.limit.hide()
        if self.x.size:
            self.plot.setXRange(0, float(self.x[-1]), padding=0.01)
        if ys:
            fit_y(self.plot, np.concatenate([np.ravel(a) for a in ys]), self.min_span)

    def _moved(self, pos):
        vb = self.plot.getViewBox()
        if self.x.size == 0 or self.y.size != self.x.size or not self.plot.sceneBoundingRect().contains(pos):
            self.hover.hide()
            return
        p = vb.mapSceneToView(pos)
        i = int(np.argmin(np.abs(self.x - p.x())))  # the nearest sample to the pointer
        self.hover.setText(f"Trial {self.active}, {self.x[i]:.1f} min: {self.y[i]:.3g}")
        self.hover.setPos(self.x[i], self.y[i])
        self.hover.show()


class OutlookPanel(QtWidgets.QGroupBox):
    """Six charts drawn from forecasts (plain data); it computes nothing."""

    TITLE = "Outlook: the next 60 min"

    def __init__(self, parent=None):
        super().__init__("Outlook: no forecast yet (fitting the lung model...)", parent)
        lay = QtWidgets.QVBoxLayout(self)
        lay.setContentsMargins(4, 4, 4, 4)
        # The key sits above the charts, outside every plot area, so it never covers a line.
        self.key = QtWidgets.QLabel("")
        self.key.setTextFormat(QtCore.Qt.RichText)
        self.key.setWordWrap(True)
        lay.addWidget(self.key)
        self.graphics = pg.GraphicsLayoutWidget()
        self.plots = {}
        # Gases on top; below, Pplat, driving pressure and VD/VT each on a chart of its own, so that a
        # fraction is never read against a pressure axis.
        for key, row, col in (("oxygen", 0, 0), ("paco2", 0, 1), ("ph", 0, 2),
                              ("pplat", 1, 0), ("driving_pressure", 1, 1), ("vd_vt", 1, 2)):
            self.plots[key] = self.graphics.addPlot(row=row, col=col)
        spans = {"oxygen": 10.0, "paco2": 5.0, "ph": 0.05, "pplat": 5.0, "driving_pressure": 5.0, "vd_vt": 0.05}
        self.charts = {key: OutlookChart(self.plots[key], span) for key, span in spans.items()}
        _axis(self.plots["ph"], "pH")
        _axis(self.plots["pplat"], "Pplat [cmH2O]")
        _axis(self.plots["driving_pressure"], "\u0394P = Pplat \u2212 PEEPtot [cmH2O]")
        _axis(self.plots["vd_vt"], "VD/VT [fraction]")
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
        lay.addWidget(self.graphics, 1)
        # Until a forecast is drawn the charts are hidden (empty axes read as a flat line at zero) and this
        # says why.
        self.placeholder = QtWidgets.QLabel("No forecast yet: fitting the lung model...")
        self.placeholder.setAlignment(QtCore.Qt.AlignCenter)
        self.placeholder.setWordWrap(True)
        self.placeholder.setStyleSheet("QLabel { color: #555555; font-size: 14px; }")
        lay.addWidget(self.placeholder, 1)
        self.graphics.hide()
        self.oxygen_view = "pao2"

    def clear(self):
        """Remove every curve computed from the trials (a refused or failed trial shows none)."""
        for chart in self.charts.values():
            chart.set([], {})
        self.key.setText("")
        self.show_placeholder("No forecast for this trial: see the message by the controls.")

    def show_placeholder(self, text: str):
        """Hide the charts and say why there is nothing to draw."""
        self.setTitle("Outlook: no forecast")
        self.graphics.hide()
        self.placeholder.setText(text)
        self.placeholder.show()

    def label_axes(self, units: str, oxygen_view: str):
        """Axis titles in the unit of the window; the oxygen chart shows PaO2 or SpO2 (as SaO2, in %)."""
        u = "kPa" if units == "kPa" else "mmHg"
        self.oxygen_view = oxygen_view
        self.charts["oxygen"].min_span = 5.0 if oxygen_view == "sao2" else (10.0 / 7.5 if units == "kPa" else 10.0)
        self.charts["paco2"].min_span = 5.0 / 7.5 if units == "kPa" else 5.0
        _axis(self.plots["oxygen"], "SpO2 (model SaO2) [%]" if oxygen_view == "sao2" else f"PaO2 [{u}]")
        _axis(self.plots["paco2"], f"PaCO2 [{u}]")

    def show_goals(self, goals: dict, units: str, oxygen_view: str):
        """Goal bands: PaO2 (or SpO2 in %), PaCO2 and pH, in the window's unit."""
        conv = kpa_from_mmhg if units == "kPa" else (lambda x: x)
        spo2 = goals.get("spo2")
        ranges = {"oxygen": (None if spo2 is None else [100.0 * x for x in spo2]) if oxygen_view == "sao2" else
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

    def draw(self, out: dict, now, units: str, oxygen_view: str, goals: dict, band: dict | None = None,
             others: dict | None = None):
        """Draw the forecast ``out`` of the trial being edited (from :func:`app.engine.forecast_fitted`),
        the courses ``others`` ({trial: course block or a reason there is none}) of the other trials, and
        the current state ``now`` (a Prediction at the current settings), with the band's likely range."""
        active = out["active"]
        c = out["course"]
        m = np.asarray(c["minutes"], dtype=float)
        flat = np.ones_like(m)
        conv = kpa_from_mmhg if units == "kPa" else (lambda x: x)
        courses = {active: c}
        missing = {}
        for t, other in (others or {}).items():
            if isinstance(other, dict) and len(other.get("minutes", [])) == m.size:
                courses[t] = other
            elif isinstance(other, str):
                missing[t] = other
        compare = out.get("compare") or {}
        lr = (band or {}).get("course") if band else None

        def band_of(key, scale):
            if lr is None or f"{key}_low" not in lr:
                return None, None
            return scale(_array(lr[f"{key}_low"])), scale(_array(lr[f"{key}_high"]))

        g, b = now.gas, now.breathing
        recheck = None if out["settings"] == out["current_settings"] else out.get("recheck_advised_min")
        if oxygen_view == "sao2":
            def pct(a):
                return 100.0 * a
            key, now_value, scale = "sao2", 100.0 * float(g.sao2), pct
        else:
            key, now_value, scale = "pao2_mmhg", conv(float(g.pao2)), conv
        alt = out.get("course_drive_preserved")  # on pressure support: the other bound's course
        if alt is not None and len(alt.get("minutes", [])) != m.size:
            alt = None

        def other(k, f=lambda a: a):
            return None if alt is None else f(_array(alt[k]))

        lo, hi = band_of("sao2" if oxygen_view == "sao2" else "pao2", scale)
        self.charts["oxygen"].set(m, {t: scale(_array(v[key])) for t, v in courses.items()}, active,
                                  flat * now_value, lo, hi, recheck, alt=other(key, scale))
        lo, hi = band_of("paco2", conv)
        self.charts["paco2"].set(m, {t: conv(_array(v["paco2_mmhg"])) for t, v in courses.items()}, active,
                                 flat * conv(float(g.paco2)), lo, hi, recheck, alt=other("paco2_mmhg", conv))
        lo, hi = band_of("ph", lambda a: a)
        self.charts["ph"].set(m, {t: _array(v["ph"]) for t, v in courses.items()}, active, flat * float(g.ph),
                              lo, hi, recheck=recheck, alt=other("ph"))
        self.charts["vd_vt"].set(m, {t: _array(v["vd_vt"]) for t, v in courses.items() if "vd_vt" in v}, active,
                                 flat * float(g.vd_vt), recheck=recheck, alt=other("vd_vt"))
        # Pressures follow a setting change at once (recruitment adds a small drift not drawn here): each
        # trial's steady-state value, from the comparison of every trial.
        for chart, key, now_p, ceiling in (("pplat", "pplat_cmh2o", float(b.pplat), goals.get("pplat_max_cmh2o")),
                                           ("driving_pressure", "driving_pressure_cmh2o", float(b.driving_pressure),
                                            goals.get("driving_pressure_max_cmh2o"))):
            values = {t: flat * float(s[key]) for t, s in compare.items()
                      if s is not None and s.get(key) is not None and t in courses}
            self.charts[chart].set(m, values, active, flat * now_p, limit=ceiling)
        self._show_key(active, courses, missing, band is not None, units, oxygen_view, alt is not None)
        self.setTitle(self.TITLE)
        self.placeholder.hide()
        self.graphics.show()

    def _show_key(self, active, courses, missing, with_band, units, oxygen_view, with_alt=False):
        def item(colour, style, text, bold=False):
            body = f"<b>{escape(text)}</b>" if bold else escape(text)
            return f"<span style='color:{colour}'><b>{STYLE_GLYPH[style]}</b></span>&nbsp;{body}"

        parts = [item(NOW_STYLE[0], NOW_STYLE[1], "current settings")]
        for t in TRIALS:
            colour, style = TRIAL_STYLE[t]
            if t in courses:
                extra = (" (editing; band: likely range 90 %)" if with_band else " (editing)") if t == active else ""
                if t == active and with_alt:
                    extra = extra.replace("(editing", "(editing, effort unchanged")
                parts.append(item(colour, style, f"Trial {t}{extra}", bold=t == active))
                if t == active and with_alt:
                    parts.append(item(colour, QtCore.Qt.DashLine, f"Trial {t}, drive preserved"))
            elif t in missing:
                parts.append(f"<span style='color:#666666'>Trial {t}: {escape(missing[t])}</span>")
        parts.append("<span style='background:#d6ebe0'>&nbsp;goal&nbsp;</span>")
        parts.append("<span style='color:#333333'>\u00b7\u00b7\u00b7\u00b7</span>&nbsp;limit")
        self.key.setText(" &nbsp;&nbsp; ".join(parts))
