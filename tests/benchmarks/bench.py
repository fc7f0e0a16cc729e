"""Ventcast benchmark harness: ``python tests/benchmarks/bench.py --json``.

Each entry warms up, repeats, and reports the median in milliseconds; the
result is one flat JSON object. A capability that has not been built has no
key. Not part of the pytest run: the machines are shared and noisy, so speed
targets are read from medians here, never asserted in timed tests.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import statistics
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parents[1]
# The package is imported by its one installed name (`ventcast`, editable install); only the
# helpers beside this file are put on the path.
if str(HERE) not in sys.path:
    sys.path.insert(0, str(HERE))


def median_ms(fn, repeats: int = 7, warmup: int = 1, min_seconds: float = 0.0) -> float:
    """Median wall time of ``fn()`` in milliseconds after ``warmup`` calls."""
    for _ in range(warmup):
        fn()
    times = []
    start = time.perf_counter()
    while len(times) < repeats or (time.perf_counter() - start) < min_seconds:
        t0 = time.perf_counter()
        fn()
        times.append((time.perf_counter() - t0) * 1000.0)
        if len(times) >= 200:
            break
    median_ms.last_spread = max(times) / min(times)
    return statistics.median(times)


def timed(results: dict, key: str, fn, **options) -> None:
    """``results[key]`` = the median of ``fn`` [ms], and ``results[key + '_spread']`` = the slowest repeat
    over the fastest: a noisy figure shows itself (the machines are shared)."""
    results[key] = median_ms(fn, **options)
    results[f"{key}_spread"] = median_ms.last_spread


def bench_steady(results: dict) -> None:
    import numpy as np

    from ventcast.physiology.gasexchange.compartments import LungParameters, solve_steady_state
    from reference_solver import solve_reference

    one = LungParameters(shunt=0.15, log_sd=1.0, alveolar_ventilation=5.0, cardiac_output=5.0, fio2=0.5)
    timed(results, "steady_single_ms", lambda: solve_steady_state(one), repeats=51, warmup=3)

    rng = np.random.default_rng(7)
    n = 10_000
    batch = LungParameters(
        shunt=rng.uniform(0.0, 0.4, n), log_sd=rng.uniform(0.3, 1.5, n),
        alveolar_ventilation=rng.uniform(3.0, 10.0, n), cardiac_output=rng.uniform(3.5, 7.0, n),
        fio2=rng.uniform(0.25, 1.0, n), dead_space_fraction=rng.uniform(0.0, 0.3, n),
    )
    timed(results, "steady_batch_10000_ms", lambda: solve_steady_state(batch), repeats=5, warmup=1)

    # Speed ratio on the same 20 cases: the reference solves them one by one; the engine as it is
    # used (one batched call), and also one call per case (reported separately).
    m = 20
    same = dict(shunt=rng.uniform(0, 0.4, m), log_sd=rng.uniform(0.3, 1.3, m),
                alveolar_ventilation=rng.uniform(3, 10, m), cardiac_output=rng.uniform(3.5, 7, m),
                fio2=rng.uniform(0.25, 1.0, m))
    singles = [LungParameters(**{k: float(v[i]) for k, v in same.items()}) for i in range(m)]
    t0 = time.perf_counter()
    for c in singles:
        solve_reference(c)
    ref_total = (time.perf_counter() - t0) * 1000.0
    fast_batch = median_ms(lambda: solve_steady_state(LungParameters(**same)), repeats=15, warmup=2)
    fast_single = median_ms(lambda: [solve_steady_state(c) for c in singles], repeats=5, warmup=1)
    results["reference_speed_ratio"] = ref_total / fast_batch
    results["reference_speed_ratio_one_call_per_case"] = ref_total / fast_single


def bench_prediction(results: dict) -> None:
    """Mechanics + V/Q lung: one trial setting, and 10,000 candidate settings in one batch."""
    import numpy as np

    from ventcast.physiology.forecast import PatientModel, predict
    from ventcast.physiology.mechanics.ventilator import Mechanics, Settings

    patient = PatientModel(pbw_kg=57, shunt_fixed=0.08, log_sd=0.9, dead_space_fraction=0.25, hb=10.5,
                           mechanics=Mechanics(resistance=15, c_max=35, recruitable=0.35))
    one = Settings(mode="volume", fio2=0.6, peep=12.0, vt_ml=400.0, rr=22.0, ti=0.9)
    timed(results, "prediction_single_ms", lambda: predict(patient, one), repeats=51, warmup=3)
    rng = np.random.default_rng(3)
    n = 10_000
    many = Settings(mode="volume", fio2=rng.choice(np.arange(0.3, 1.0001, 0.05), n), peep=rng.integers(5, 21, n) * 1.0,
                    vt_ml=rng.uniform(300, 480, n), rr=rng.integers(14, 33, n) * 1.0, ti=0.8)
    timed(results, "prediction_batch_10000_ms", lambda: predict(patient, many), repeats=3, warmup=1)


def bench_course(results: dict) -> None:
    """60-minute course after an FiO2/PEEP/rate change: one case, and 200 parameter draws in one batch."""
    import numpy as np

    from ventcast.physiology.dynamics.course import simulate
    from ventcast.physiology.forecast import PatientModel
    from ventcast.physiology.mechanics.ventilator import Mechanics, Settings

    patient = PatientModel(pbw_kg=70, shunt_fixed=0.08, log_sd=0.6, dead_space_fraction=0.15, hb=12,
                           mechanics=Mechanics(resistance=10, c_max=50))
    now = Settings(mode="pressure", fio2=0.35, peep=6, inspiratory_pressure=10, rr=12, ti=1.0)
    trial = Settings(mode="pressure", fio2=0.55, peep=8, inspiratory_pressure=10, rr=14, ti=1.0)
    timed(results, "course_60min_ms", lambda: simulate(patient, now, trial), repeats=11, warmup=2)
    rng = np.random.default_rng(1)
    b = 200
    draws = PatientModel(pbw_kg=70, shunt_fixed=rng.uniform(0.03, 0.15, b), log_sd=rng.uniform(0.4, 0.9, b),
                         dead_space_fraction=rng.uniform(0.1, 0.2, b), hb=12,
                         mechanics=Mechanics(resistance=10, c_max=rng.uniform(40, 60, b)))
    timed(results, "course_draws_200_ms", lambda: simulate(draws, now, trial), repeats=3, warmup=1)


def bench_fit(results: dict) -> None:
    """Fit from one and from six observations; a likely range from 400 draws at a trial setting."""
    from ventcast.physiology.fitting.fit import Observation, Patient, build_model, fit, likely_range
    from ventcast.physiology.forecast import predict
    from ventcast.physiology.mechanics.ventilator import Settings

    pt = Patient(sex="female", height_cm=165, weight_kg=78, hb_g_dl=10.5)
    true = {"shunt_fixed": 0.18, "recruitable": 0.12, "log_sd": 1.0, "dead_space_fraction": 0.25, "vco2": 210.0,
            "vo2": 260.0, "cardiac_output_ref": 5.5, "c_max": 35.0, "resistance": 14.0, "base_excess": -2.0}
    model = build_model(pt, true, 10.0)

    def obs(fio2, peep):
        s = Settings(mode="volume", fio2=fio2, peep=peep, vt_ml=400, rr=20, ti=0.9, apparatus_dead_space_ml=50)
        p = predict(model, s)
        return Observation(settings=s, pao2=float(p.gas.pao2), paco2=float(p.gas.paco2), ph=float(p.gas.ph),
                           petco2=float(p.gas.petco2), pplat=float(p.breathing.pplat), ppeak=float(p.breathing.ppeak))

    one = [obs(0.6, 10)]
    six = [obs(f, pe) for f, pe in ((0.4, 8), (0.5, 8), (0.6, 10), (0.7, 10), (0.6, 12), (0.5, 12))]
    timed(results, "fit_one_ms", lambda: fit(pt, one), repeats=5, warmup=1)
    timed(results, "fit_six_ms", lambda: fit(pt, six), repeats=5, warmup=1)
    f = fit(pt, one)
    trial = Settings(mode="volume", fio2=0.5, peep=14, vt_ml=400, rr=22, ti=0.9, apparatus_dead_space_ml=50)
    timed(results, "range_draws_200_ms", lambda: likely_range(f, trial), repeats=7, warmup=1)


def bench_planning(results: dict) -> None:
    """Goal search (every candidate of the grid screened, the best 50 against 200 parameter draws) and a
    step-down plan, on the fitted ards-moderate demo case."""
    from ventcast.app.casefile import load_demo
    from ventcast.app.engine import fit_case, to_settings
    from ventcast.physiology.planning.search import Goals, search
    from ventcast.physiology.planning.stepdown import step_down

    case = load_demo("ards-moderate")
    patient, _obs, fitted = fit_case(case)
    goals = Goals.from_case(case["goals"])
    now = to_settings(case["settings"])
    screened = {}

    def run_search():
        res = search(fitted.model, fitted.draws, now, goals, patient.pbw_kg)
        screened["n"] = res.screened

    timed(results, "plan_search_ms", run_search, repeats=3, warmup=1)
    results["plan_candidates_screened"] = screened["n"]
    # A step-down plan with several steps: an invented patient with a modest shunt, fitted from one blood
    # gas at FiO2 0.7 and PEEP 14 (the demo case stops after one step: its SpO2 is near the goal).
    from ventcast.physiology.fitting.fit import Observation, Patient, build_model, fit
    from ventcast.physiology.forecast import predict
    from ventcast.physiology.mechanics.ventilator import Settings

    pt = Patient(sex="male", height_cm=178, weight_kg=84, hb_g_dl=12.0)
    truth = build_model(pt, {"shunt_fixed": 0.08, "recruitable": 0.1, "log_sd": 0.7, "dead_space_fraction": 0.2,
                             "vco2": 200.0, "vo2": 250.0, "cardiac_output_ref": 5.5, "c_max": 45.0,
                             "resistance": 12.0, "base_excess": 0.0}, 10.0)
    start = Settings(mode="volume", fio2=0.7, peep=14.0, vt_ml=450.0, rr=18.0, ti=0.9, apparatus_dead_space_ml=50.0)
    p = predict(truth, start)
    obs = Observation(settings=start, pao2=float(p.gas.pao2), paco2=float(p.gas.paco2), ph=float(p.gas.ph),
                      pplat=float(p.breathing.pplat), ppeak=float(p.breathing.ppeak))
    f2 = fit(pt, [obs])
    plan = {}

    def run_wean():
        plan["steps"] = len(step_down(f2.model, f2.draws, start, Goals()).steps)

    timed(results, "wean_plan_ms", run_wean, repeats=5, warmup=1)
    results["wean_plan_steps"] = plan["steps"]


WINDOW_PROBE = r"""
import os, sys, time
os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
from PySide6 import QtWidgets
from ventcast.app.casefile import load_demo
from ventcast.app.window import MainWindow
app = QtWidgets.QApplication([])
w = MainWindow(load_demo("ards-moderate"))
first, done = [], []
w.forecast_shown.connect(lambda _r: first.append(time.time()) if not first else None)
w.band_shown.connect(lambda _r: done.append(time.time()))
w.show()
app.processEvents()
shown = time.time()
while not done:
    app.processEvents()
    time.sleep(0.005)
# VmHWM, not ru_maxrss: Linux carries ru_maxrss over from the forking parent across exec.
hwm = next(line for line in open("/proc/self/status") if line.startswith("VmHWM:"))
print(shown, float(hwm.split()[1]) / 1024.0, first[0], done[0])
w.close()
os._exit(0)
"""


def bench_window(results: dict) -> None:
    """Trial change -> steady numbers on screen, and -> course drawn (after the debounce; forced repaint);
    cold start of a process to the window shown, to the first forecast drawn (the course from the fitted
    estimate, before the posterior draws) and to its likely range drawn; peak resident memory of a window that has fitted the
    demo case and drawn a forecast with its likely range."""
    import subprocess

    os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
    from PySide6 import QtWidgets

    from ventcast.app.casefile import load_demo
    from ventcast.app.window import MainWindow

    app = QtWidgets.QApplication.instance() or QtWidgets.QApplication([])
    w = MainWindow(load_demo("ards-moderate"), synchronous=True)
    w.resize(1600, 1000)
    w.show()
    app.processEvents()
    marks = {}

    def mark(name):
        def slot(_result):
            w.repaint()
            marks.setdefault(name, time.perf_counter())
        return slot

    w.steady_shown.connect(mark("steady"))
    w.forecast_shown.connect(mark("course"))
    steady, course = [], []
    for i in range(9):
        w.state.trials["A"]["peep_cmh2o"] = 10.0 + (i % 5)
        marks.clear()
        t0 = time.perf_counter()
        w._request_forecast()
        if i:  # the first is warm-up
            steady.append((marks["steady"] - t0) * 1000.0)
            course.append((marks["course"] - t0) * 1000.0)
    results["window_update_ms"] = statistics.median(steady)
    results["window_update_ms_spread"] = max(steady) / min(steady)
    results["window_course_ms"] = statistics.median(course)
    results["window_course_ms_spread"] = max(course) / min(course)
    w.close()
    w.deleteLater()
    app.processEvents()
    gaps = [_event_loop_gap_ms(app) for _ in range(3)]
    results["window_event_gap_ms"] = statistics.median(gaps)
    results["window_event_gap_ms_spread"] = max(gaps) / min(gaps)
    starts, rss, firsts, bands = [], [], [], []
    for _ in range(3):
        t0 = time.time()
        out = subprocess.run([sys.executable, "-c", WINDOW_PROBE], cwd=ROOT, capture_output=True, text=True,
                             check=True).stdout.split()
        starts.append((float(out[0]) - t0) * 1000.0)  # process start to the window shown
        rss.append(float(out[1]))
        firsts.append((float(out[2]) - t0) * 1000.0)  # process start to the first forecast drawn (course)
        bands.append((float(out[3]) - t0) * 1000.0)   # ... to the course's likely range drawn
    for key, values in (("cold_start_ms", starts), ("first_forecast_ms", firsts), ("first_band_ms", bands)):
        results[key] = statistics.median(values)
        results[f"{key}_spread"] = max(values) / min(values)
    results["window_rss_mb"] = statistics.median(rss)


def _event_loop_gap_ms(app) -> float:
    """Longest gap between the ticks of a 10 ms QTimer while 200 rapid PEEP changes are forecast on the
    worker thread (steady, course and likely range drawn for the last): how long the window stops
    answering. Target: under 100 ms (the architecture's "nothing blocks the event loop")."""
    from heartbeat import rapid_peep_values, start_heartbeat
    from PySide6 import QtCore

    from ventcast.app.casefile import load_demo
    from ventcast.app.window import MainWindow

    def wait(ms):
        # A QEventLoop, as pytest-qt waits: QTest.qWait keeps the GIL while it sleeps and starves the worker.
        loop = QtCore.QEventLoop()
        QtCore.QTimer.singleShot(ms, loop.quit)
        loop.exec()

    w = MainWindow(load_demo("ards-moderate"))
    w.resize(1400, 900)
    w.show()
    deadline = time.perf_counter() + 120.0
    while w.last_band is None:
        if time.perf_counter() > deadline:
            raise RuntimeError("the window did not show its first likely range within 120 s")
        wait(20)
    heartbeat, gaps = start_heartbeat()
    for v in rapid_peep_values():
        w.set_trial_value("peep_cmh2o", v)
        wait(3)
    deadline = time.perf_counter() + 120.0
    while (w.last_band is None or w.last_forecast["trial_settings"]["peep_cmh2o"] != 13.0
           or w.runner.pool.activeThreadCount()):
        if time.perf_counter() > deadline:
            raise RuntimeError("the window did not show the last forecast within 120 s")
        wait(20)
    heartbeat.stop()
    w.ask_unsaved = lambda doing: "discard"  # the trial changes are the benchmark's own
    w.close()
    w.deleteLater()
    app.processEvents()
    return max(gaps) * 1000.0


BENCHES = [bench_steady, bench_prediction, bench_course, bench_fit, bench_planning, bench_window]


def _available(bench) -> bool:
    try:
        bench_probe = {"bench_steady": "ventcast.physiology.gasexchange.compartments",
                       "bench_prediction": "ventcast.physiology.forecast",
                       "bench_course": "ventcast.physiology.dynamics.course",
                       "bench_fit": "ventcast.physiology.fitting.fit",
                       "bench_planning": "ventcast.physiology.planning.search",
                       "bench_window": "ventcast.app.window"}[bench.__name__]
        __import__(bench_probe)
        return True
    except ImportError:
        return False


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--json", action="store_true", help="print one flat JSON object")
    args = parser.parse_args(argv)
    results: dict = {}
    for bench in BENCHES:
        if _available(bench):
            bench(results)
    # rss_mb: peak resident memory of the window process (fit, forecast and band drawn) when the window
    # was benchmarked; bench_process_rss_mb: this harness's own peak (10,000-case batches included).
    results["bench_process_rss_mb"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    if "window_rss_mb" in results:
        results["rss_mb"] = results.pop("window_rss_mb")
    results = {k: round(v, 3) for k, v in results.items()}
    if args.json:
        print(json.dumps(results))
    else:
        for k, v in results.items():
            print(f"{k:>28}  {v}")
    return 0


if __name__ == "__main__":
    os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
    sys.exit(main())
