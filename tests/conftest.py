"""Test configuration: Qt runs offscreen, set before any Qt import; one BLAS thread per test worker."""

import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
# pytest -n auto already runs one worker per core: a multi-threaded BLAS in each would oversubscribe the
# cores (measured on this 2-core machine: two concurrent fitting loops about 12 % faster with one thread).
for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import sys
from pathlib import Path

# The reference solver and the benchmark harness live in tests/benchmarks.
sys.path.insert(0, str(Path(__file__).resolve().parent / "benchmarks"))


def pytest_collection_modifyitems(config, items):
    """The long statistical checks (marked ``slow``) run first, so that with ``-n auto`` each worker starts
    one at once and the short tests fill in around them (started last, a two-minute check left one core
    idle at the end of the run). Otherwise the collected order is kept."""
    items.sort(key=lambda item: item.get_closest_marker("slow") is None)
