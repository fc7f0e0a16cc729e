"""Test configuration: Qt runs offscreen, set before any Qt import."""

import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

import sys
from pathlib import Path

# The reference solver and the benchmark harness live in tests/benchmarks.
sys.path.insert(0, str(Path(__file__).resolve().parent / "benchmarks"))
