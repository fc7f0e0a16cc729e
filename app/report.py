"""Trial reports (PDF through Qt's QTextDocument and QPdfWriter) and CSV exports.

The report is plain HTML laid out by ``QTextDocument`` with the Outlook charts embedded as images
drawn offscreen by pyqtgraph; it carries the case summary, the observations, the fitted lung with
likely ranges, the trials compared (now -> trial, with ranges), the charts, the Limits, the plan if
one was made, the model's assumptions and sources, the caution, the date and the Ventcast version.
Files are written atomically (a temporary file in the same folder, then a rename).
"""

from __future__ import annotations

import csv
import io
import os
from datetime import datetime, timezone
from html import escape
from pathlib import Path

from . import CAUTION, version
from .casefile import write_atomic
from .engine import PARAMETER_LABELS, recheck_sentence, settings_text
from .precision import sao2_text

#: Course columns of the CSV export: (key in the forecast's course, header with its unit).
COURSE_COLUMNS = (("minutes", "minutes [min]"), ("pao2_mmhg", "PaO2 [mmHg]"), ("pao2_low", "PaO2 likely low [mmHg]"),
                  ("pao2_high", "PaO2 likely high [mmHg]"), ("paco2_mmhg", "PaCO2 [mmHg]"),
                  ("paco2_low", "PaCO2 likely low [mmHg]"), ("paco2_high", "PaCO2 likely high [mmHg]"),
                  ("ph", "pH [pH units]"), ("sao2", "SaO2 [fraction]"))
OBSERVATION_COLUMNS = (("taken_at", "taken at [ISO 8601]"), ("fio2", "FiO2 [fraction]"), ("peep_cmh2o", "PEEP [cmH2O]"),
                       ("pao2_mmhg", "PaO2 [mmHg]"), ("paco2_mmhg", "PaCO2 [mmHg]"), ("ph", "pH [pH units]"),
                       ("sao2", "SaO2 [fraction]"), ("hco3_mmol_l", "HCO3 [mmol/L]"), ("petco2_mmhg", "PetCO2 [mmHg]"),
                       ("pplat_cmh2o", "Pplat [cmH2O]"), ("ppeak_cmh2o", "Ppeak [cmH2O]"), ("vte_ml", "VTe [mL]"),
                       ("ve_l_min", "VE [L/min]"))
SOURCES = (
    "O2 dissociation: Severinghaus 1979 with Kelman 1966 corrections; CO2 content: Kelman 1967.",
    "V/Q lung: shunt, log-normal V/Q distribution and dead space after West 1969; Bohr-Enghoff dead space; "
    "Berggren shunt equation.",
    "Mechanics: equation of motion; mechanical power Gattinoni 2016 / Becher 2019; recruitment after Crotti 2001 and "
    "Venegas 1998; venous return after Guyton.",
    "Time course: per-unit lung gas stores, body CO2 stores after Farhi & Rahn 1955 and Cherniack 1966.",
    "Limits and tables: ARDS Network 2000; Brower 2004; driving pressure Amato 2015; Berlin definition 2012; "
    "readiness Boles 2007, MacIntyre 2001, Yang & Tobin 1991.",
    "Fit: maximum a posteriori with population priors; likely ranges (90 %) from 200 posterior draws of a "
    "likelihood-tempered sequential Monte Carlo sampler.",
)


def minute_rows(course: dict):
    """The course on the whole-minute grid (the forecast has a point every 15 s)."""
    minutes = course["minutes"]
    keep = [i for i, m in enumerate(minutes) if abs(m - round(m)) < 1e-6]
    return [[course[key][i] if key in course else None for key, _h in COURSE_COLUMNS] for i in keep]


def course_csv(forecasts: dict) -> str:
    """CSV of each trial's course on the minute grid: a ``trial`` column, units in every header."""
    out = io.StringIO()
    w = csv.writer(out, lineterminator="\n")
    w.writerow(["trial"] + [h for _k, h in COURSE_COLUMNS])
    for trial, f in forecasts.items():
        for row in minute_rows(f["course"]):
            w.writerow([trial] + ["" if v is None else v for v in row])
    return out.getvalue()


def observations_csv(case: dict) -> str:
    out = io.StringIO()
    w = csv.writer(out, lineterminator="\n")
    w.writerow([h for _k, h in OBSERVATION_COLUMNS])
    for o in case["observations"]:
        s = o.get("settings") or case["settings"]
        row = []
        for key, _h in OBSERVATION_COLUMNS:
            v = s.get(key) if key in ("fio2", "peep_cmh2o") else o.get(key)
            row.append("" if v is None else v)
        w.writerow(row)
    return out.getvalue()


def read_csv(text: str) -> tuple[list, list]:
    """Header and rows (numbers as floats where they parse) of an exported CSV."""
    rows = list(csv.reader(io.StringIO(text)))

    def num(x):
        try:
            return float(x)
        except ValueError:
            return None if x == "" else x

    return rows[0], [[num(x) for x in r] for r in rows[1:]]


def chart_images(forecasts: dict, width: int = 900, height: int = 300, marks=(),
                 xlabel: str = "minutes after the change [min]") -> dict:
    """PNG images (QImage) of the PaO2, PaCO2 and pH courses of every trial, drawn offscreen; ``marks``
    ((minute, label) pairs, e.g. a walkthrough learner's actions) are drawn as labelled vertical lines."""
    import numpy as np
    import pyqtgraph as pg
    from PySide6 import QtCore, QtGui

    colours = ("#0072B2", "#D55E00", "#009E73")  # Okabe & Ito 2008
    images = {}
    for key, label, band in (("pao2_mmhg", "PaO2 [mmHg]", "pao2"), ("paco2_mmhg", "PaCO2 [mmHg]", "paco2"),
                             ("ph", "pH", None)):
        w = pg.PlotWidget(background="w")
        w.resize(width, height)
        p = w.getPlotItem()
        p.addLegend(offset=(10, 10))
        p.setLabel("left", label)
        p.setLabel("bottom", xlabel)
        for axis in ("left", "bottom"):
            p.getAxis(axis).enableAutoSIPrefix(False)
            p.getAxis(axis).setPen("k")
            p.getAxis(axis).setTextPen("k")
        for (trial, f), colour in zip(forecasts.items(), colours * 3):
            c = f["course"]
            x = np.asarray(c["minutes"], dtype=float)
            y = np.array([np.nan if v is None else v for v in c[key]], dtype=float)
            if band and c.get(f"{band}_low") and None not in c[f"{band}_low"]:
                lo = pg.PlotCurveItem(x, np.asarray(c[f"{band}_low"], dtype=float), pen=pg.mkPen(None))
                hi = pg.PlotCurveItem(x, np.asarray(c[f"{band}_high"], dtype=float), pen=pg.mkPen(None))
                fill = QtGui.QColor(colour)
                fill.setAlpha(45)
                p.addItem(pg.FillBetweenItem(lo, hi, brush=pg.mkBrush(fill)))
            p.plot(x, y, pen=pg.mkPen(colour, width=2), name=f"Trial {trial}" if len(trial) == 1 else trial)
        for i, (minute, text) in enumerate(marks):
            line = pg.InfiniteLine(pos=float(minute), angle=90, pen=pg.mkPen("#444444", style=QtCore.Qt.DashLine),
                                   label=text, labelOpts={"position": 0.95 - 0.12 * (i % 4), "color": "#222222"})
            p.addItem(line)
        images[key] = w.grab().toImage().copy()
        w.deleteLater()
    QtCore.QCoreApplication.sendPostedEvents(None, QtCore.QEvent.DeferredDelete)
    return images


def _f(v, d):
    return "-" if v is None else f"{v:.{d}f}"


def report_html(case: dict, forecasts: dict, plan: dict | None = None, generated: datetime | None = None) -> str:
    """The report as HTML; charts referenced as ``chart://<key>`` resources."""
    generated = generated or datetime.now(timezone.utc)
    first = next(iter(forecasts.values()))
    p = case["patient"]
    h = [f"<h1>Ventcast trial report</h1><p><b>{escape(CAUTION)}</b></p>",
         f"<p>{escape(case.get('label', ''))}<br>Generated {generated.strftime('%Y-%m-%d %H:%M UTC')} by Ventcast "
         f"{escape(version())}.</p>",
         "<h2>Patient and current settings</h2>",
         f"<p>{escape(p['sex'])}, height {p['height_cm']:g} cm, weight {p['weight_kg']:g} kg, PBW "
         f"{first['now']['pbw_kg']:.1f} kg, temperature {p['temperature_c']:g} &deg;C, Hb {p['hb_g_dl']:g} g/dL.<br>"
         f"Settings: {escape(settings_text(case['settings']))}.</p>",
         "<h2>Observations</h2><table border='1' cellspacing='0' cellpadding='3'><tr>"
         + "".join(f"<th>{escape(hd.replace('[fraction]', '[%]'))}</th>" for _k, hd in OBSERVATION_COLUMNS[:7])
         + "</tr>"]
    for o in case["observations"]:
        s = o.get("settings") or case["settings"]
        cells = [o["taken_at"], f"{s['fio2']:.2f}", f"{s['peep_cmh2o']:g}", f"{o['pao2_mmhg']:g}", f"{o['paco2_mmhg']:g}",
                 f"{o['ph']:.2f}", sao2_text(o.get("sao2")).replace(" %", "")]
        h.append("<tr>" + "".join(f"<td>{escape(c)}</td>" for c in cells) + "</tr>")
    h.append("</table>")
    fit = first["fit"]
    h.append("<h2>Lung fit</h2>")
    h.append(f"<p>{escape(fit['message'])}</p><table border='1' cellspacing='0' cellpadding='3'>"
             "<tr><th>parameter</th><th>estimate</th><th>likely range (90 %)</th></tr>")
    estimates = first.get("estimates") or {}
    for key, (lo, hi) in fit["likely_range"].items():
        est = estimates.get(key)
        label, unit, _d = PARAMETER_LABELS[key]
        name = f"{label} [{unit}]" if unit else label
        h.append(f"<tr><td>{escape(name)}</td><td>{_f(est, 3)}</td><td>{lo:.3g} to {hi:.3g}</td></tr>")
    h.append("</table>")
    if fit["identifiability"]:
        h.append("<p>What the data cannot tell apart:</p><ul>" + "".join(f"<li>{escape(m)}</li>"
                                                                          for m in fit["identifiability"]) + "</ul>")
    if fit.get("assumptions"):
        h.append("<p>Model assumptions:</p><ul>" + "".join(f"<li>{escape(m)}</li>" for m in fit["assumptions"])
                 + "</ul>")
    h.append("<h2>Trials compared</h2><table border='1' cellspacing='0' cellpadding='3'><tr><th>quantity</th>"
             "<th>now (model)</th>" + "".join(f"<th>Trial {escape(t)}</th>" for t in forecasts) + "</tr>")
    h.append("<tr><td>settings</td><td>" + escape(settings_text(case["settings"])) + "</td>"
             + "".join(f"<td>{escape(settings_text(f['settings']))}</td>" for f in forecasts.values()) + "</tr>")
    for label, key, d in (("PaO2 [mmHg]", "pao2_mmhg", 0), ("PaCO2 [mmHg]", "paco2_mmhg", 1), ("pH", "ph", 2),
                          ("SaO2 [%]", "sao2", 0), ("VD/VT", "vd_vt", 2), ("Pplat [cmH2O]", "pplat_cmh2o", 1),
                          ("driving pressure, Pplat - total PEEP [cmH2O]", "driving_pressure_cmh2o", 1),
                          ("mechanical power [J/min]", "mechanical_power_j_min", 1),
                          ("VT [mL/kg PBW]", "vt_ml_per_kg_pbw", 1), ("cardiac output [L/min]", "cardiac_output_l_min", 1)):
        k = 100.0 if key == "sao2" else 1.0  # SaO2 in whole per cent (app.precision)

        def scaled(x):
            return None if x is None else k * x

        now = first.get("now_steady", {}).get(key)
        cells = [_f(scaled(now), d)]
        for f in forecasts.values():
            v = f["steady"].get(key)
            rng = f["likely_range"].get(key)
            cells.append(_f(scaled(v), d) + (f" ({k * rng[0]:.{d}f} to {k * rng[1]:.{d}f})" if rng else ""))
        h.append(f"<tr><td>{escape(label)}</td>" + "".join(f"<td>{c}</td>" for c in cells) + "</tr>")
    h.append("</table>")
    for t, f in forecasts.items():
        sp = f.get("spontaneous")
        if not sp:
            continue
        # On pressure support or CPAP: both bounds of the patient's answer, side by side.
        e = sp["effort_now"]
        h.append(f"<p><b>Trial {escape(t)} on support: two bounds.</b> Now VT {e['vt_ml']:.0f} mL at "
                 f"{e['rr_per_min']:.0f}/min (RSBI {e['rsbi']:.0f}); effort Pmus {e['pmus_cmh2o']:.1f} cmH2O "
                 f"({escape(e['pmus_basis'])}). The rows above are the {escape(sp['drawn'].replace('_', '-'))} bound"
                 + ("" if sp["drawn"] == "effort_unchanged" else ": with the effort unchanged there is no steady state")
                 + ".</p>")
        h.append("<table border='1' cellspacing='0' cellpadding='3'><tr><th>quantity</th><th>effort unchanged</th>"
                 "<th>drive preserved</th></tr>")
        b1, b2 = sp["bounds"]["effort_unchanged"], sp["bounds"]["drive_preserved"]
        for label, key, d in (("VT [mL]", "vt_ml", 0), ("rate [/min]", "rr_per_min", 0), ("RSBI [/min/L]", "rsbi", 0),
                              ("Pmus [cmH2O]", "pmus_cmh2o", 1), ("PaCO2 [mmHg]", "paco2_mmhg", 1), ("pH", "ph", 2),
                              ("PaO2 [mmHg]", "pao2_mmhg", 0)):
            h.append(f"<tr><td>{escape(label)}</td><td>{_f(b1[key], d)}</td><td>{_f(b2[key], d)}</td></tr>")
        h.append("</table>")
        h.append("<ul>" + "".join(f"<li>{escape(words)}: {escape(sp['meaning'][name])}</li>" for name, words in
                                  (("effort_unchanged", "effort unchanged"), ("drive_preserved", "drive preserved")))
                 + "</ul>")
    for t, f in forecasts.items():
        r = f.get("recheck_after_min")
        if r is not None:
            h.append(f"<p>Trial {escape(t)}: {escape(recheck_sentence(r))}</p>")
    h.append("<h2>Outlook (next 60 min; band: likely range 90 %)</h2>")
    for key in ("pao2_mmhg", "paco2_mmhg", "ph"):
        h.append(f"<p><img src='chart://{key}' width='640'></p>")
    h.append("<h2>Limits</h2>")
    for t, f in forecasts.items():
        h.append(f"<p><b>Trial {escape(t)}</b></p><ul>")
        if not f["alerts"]:
            h.append("<li>(ok) every limit and goal is met</li>")
        for a in f["alerts"]:
            sym = {"danger": "(!!) ", "caution": "(!) ", "info": "(i) "}[a["severity"]]
            h.append(f"<li>{sym}{escape(a['message'])}</li>")
        h.append("</ul>")
    if plan:
        h.append("<h2>Options</h2><ol>")
        for o in plan["options"]:
            h.append(f"<li>{escape(settings_text(o['settings']))}: probability {100 * o['probability_all_goals']:.0f} %; "
                     f"{escape(', '.join(o['changes']) or 'no change')}</li>")
        h.append("</ol>")
    h.append("<h2>Model assumptions and sources</h2><ul>" + "".join(f"<li>{escape(s)}</li>" for s in SOURCES) + "</ul>")
    h.append(f"<p><b>{escape(CAUTION)}</b></p>")
    return "\n".join(h)


def write_pdf(path, html: str, images: dict) -> int:
    """Lay out ``html`` (with ``chart://`` images) on A4 pages into ``path`` atomically; returns the page count."""
    from PySide6 import QtCore, QtGui

    path = Path(path)
    doc = QtGui.QTextDocument()
    for key, image in images.items():
        doc.addResource(QtGui.QTextDocument.ImageResource, QtCore.QUrl(f"chart://{key}"), image)
    doc.setHtml(html)
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    try:
        writer = QtGui.QPdfWriter(str(tmp))
        writer.setPageSize(QtGui.QPageSize(QtGui.QPageSize.A4))
        writer.setPageMargins(QtCore.QMarginsF(15, 15, 15, 15), QtGui.QPageLayout.Millimeter)
        writer.setResolution(120)
        writer.setTitle("Ventcast trial report")
        writer.setCreator(f"Ventcast {version()}")
        # Lay out on the writer's page (device pixels) so that pageCount() counts the printed pages.
        doc.setPageSize(QtCore.QSizeF(writer.width(), writer.height()))
        doc.print_(writer)
        pages = doc.pageCount()
        del writer  # flush and close the file
        with open(tmp, "rb") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        try:
            tmp.unlink()
        except OSError:
            pass
        raise
    return pages


def build_report(case: dict, trials: dict, out, csv_dir=None, with_plan: bool = False, result=None) -> dict:
    """Fit the case (unless ``result`` is given), forecast each trial (name -> KEY=VALUE list), and write
    the PDF to ``out`` (and the course and observation CSVs into ``csv_dir``). Needs a QApplication.

    Returns {"pages", "pdf", "csv": [paths], "forecasts"}.
    """
    from .engine import fit_case, plan_case

    result = result if result is not None else fit_case(case)[2]
    forecasts = compute_forecasts(case, trials, result)
    plan = plan_case(case, result) if with_plan else None
    return render_report(case, forecasts, out, csv_dir, plan)


def compute_forecasts(case: dict, trials: dict, result=None) -> dict:
    """Forecasts (the predict JSON, with the course band) of each trial: name -> KEY=VALUE list or a
    settings dict. Engine work only (safe on a worker thread)."""
    from ventcast.physiology.forecast import predict

    from .casefile import check_settings
    from .engine import apply_sets, current_settings, fit_case, forecast_fitted, is_spontaneous, steady_block

    if result is None:
        result = fit_case(case)[2]
    now_steady = steady_block(predict(result.model, current_settings(case)), spontaneous=is_spontaneous(case["settings"]))
    forecasts = {}
    for name, sets in trials.items():
        settings = (check_settings(f"Trial {name}", dict(sets), float(result.patient.pbw_kg)) if isinstance(sets, dict)
                    else apply_sets(case, sets))
        f = forecast_fitted(case, result, settings)
        f["now_steady"] = now_steady
        f["estimates"] = dict(result.estimates)
        forecasts[name] = f
    return forecasts


def render_report(case: dict, forecasts: dict, out, csv_dir=None, plan: dict | None = None) -> dict:
    """Charts, PDF and CSVs from computed forecasts (Qt work: the GUI thread, with a QApplication)."""
    images = chart_images(forecasts)
    pages = write_pdf(out, report_html(case, forecasts, plan), images)
    written = []
    if csv_dir is not None:
        folder = Path(csv_dir)
        folder.mkdir(exist_ok=True)  # its parent was checked before any work (check_output_folder)
        for name, text in (("course.csv", course_csv(forecasts)), ("observations.csv", observations_csv(case))):
            write_atomic(folder / name, text)
            written.append(str(folder / name))
    return {"pages": pages, "pdf": str(out), "csv": written, "forecasts": forecasts}
