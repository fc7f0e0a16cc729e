"""How long the Qt event loop goes without answering while the window is driven hard: shared by the
window test (a loose bound) and the benchmark (``window_event_gap_ms``)."""

import time

import numpy as np
from PySide6 import QtCore


def start_heartbeat(interval_ms: int = 10):
    """Start a timer that records the gap between its ticks [s]; returns (timer, gaps). Stop the timer."""
    gaps, last = [], [time.perf_counter()]

    def beat():
        t = time.perf_counter()
        gaps.append(t - last[0])
        last[0] = t

    timer = QtCore.QTimer()
    timer.setInterval(interval_ms)
    timer.timeout.connect(beat)
    timer.start()
    return timer, gaps


def rapid_peep_values(n: int = 200, last: float = 13.0) -> np.ndarray:
    """PEEP values [cmH2O] for ``n`` rapid changes (fixed seed), ending at ``last``."""
    values = np.random.default_rng(0).integers(6, 16, n).astype(float)
    values[-1] = last
    return values
