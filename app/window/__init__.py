"""The Ventcast window, one module per panel:

- :mod:`.main` — the main window, which wires the panels to the case, the trials and the engine;
- :mod:`.bedside`, :mod:`.trial`, :mod:`.outlook`, :mod:`.limits`, :mod:`.lungfit`, :mod:`.plans` — the panels;
- :mod:`.files` — open, save, import, export and recovery of the main window;
- :mod:`.dialogs` — the goals dialog and the questions; :mod:`.walkthrough_window` — walkthrough mode;
- :mod:`.common` — names, colours, controls, units and the trial state; :mod:`.run` — ``ventcast open``.
"""

from .. import MMHG_PER_KPA
from ..worker import EngineRunner
from .common import RECOVERY_GLOB, STATUS_SYMBOL, _slug, data_dir, kpa_from_mmhg
from .dialogs import GoalsDialog, ask_plain, ask_recovery, read_recoveries
from .main import MainWindow
from .run import offer_recovery, run
from .walkthrough_window import WalkthroughWindow

__all__ = ["MainWindow", "WalkthroughWindow", "GoalsDialog", "run", "offer_recovery", "read_recoveries", "ask_plain",
           "ask_recovery", "data_dir", "kpa_from_mmhg", "RECOVERY_GLOB", "STATUS_SYMBOL", "EngineRunner",
           "MMHG_PER_KPA", "_slug"]
