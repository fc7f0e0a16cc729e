"""The Limits panel: each lung-protective limit and goal of the active trial with its status, value,
limit and source; the goals button; the re-check time."""

from __future__ import annotations

from PySide6 import QtCore, QtWidgets

from .common import STATUS_SYMBOL, _RowFitter, mmhg_text_in


class LimitsPanel(QtWidgets.QWidget):
    """Limit lines (plain data from :func:`app.engine.limit_checks`) in the window's unit."""

    goals_requested = QtCore.Signal()

    def __init__(self, parent=None):
        super().__init__(parent)
        ll = QtWidgets.QVBoxLayout(self)
        self.title = QtWidgets.QLabel("Limits of Trial A")
        ll.addWidget(self.title)
        self.table = QtWidgets.QTableWidget(0, 2)
        self.table.setHorizontalHeaderLabels(["status", "check: value, limit, why (source)"])
        self.table.verticalHeader().hide()
        self.table.setEditTriggers(QtWidgets.QAbstractItemView.NoEditTriggers)
        self.table.setWordWrap(True)
        self.table.horizontalHeader().setSectionResizeMode(QtWidgets.QHeaderView.ResizeToContents)
        self.table.horizontalHeader().setStretchLastSection(True)
        self.table.setTextElideMode(QtCore.Qt.ElideNone)
        # Rows grow to their wrapped text whenever the column width changes (nothing cut off with "...").
        self.table.horizontalHeader().sectionResized.connect(lambda *_: self.table.resizeRowsToContents())
        # ... and when the stretched column narrows without that signal (a vertical scroll bar appearing
        # once the lines outgrow the panel, e.g. the effort checks of a trial on pressure support).
        self.table.viewport().installEventFilter(_RowFitter(self.table))
        ll.addWidget(self.table, 1)
        self.goals_button = QtWidgets.QPushButton("Edit goals and limits of this case...")
        self.goals_button.clicked.connect(self.goals_requested.emit)
        ll.addWidget(self.goals_button)
        self.recheck_label = QtWidgets.QLabel("")
        self.recheck_label.setWordWrap(True)
        ll.addWidget(self.recheck_label)

    def set_trial(self, trial: str):
        self.title.setText(f"Limits of Trial {trial}")
        self.title.setWordWrap(False)

    def clear(self, trial: str, why: str):
        """No limit lines: the trial has no forecast (``why``)."""
        self.table.setRowCount(0)
        self.title.setText(f"Limits of Trial {trial}: not checked ({why})")
        self.title.setWordWrap(True)
        self.recheck_label.clear()

    def fill(self, lines: list, units: str):
        self.table.setRowCount(len(lines))
        for i, line in enumerate(lines):
            value = mmhg_text_in(line["value"], units)
            limit = mmhg_text_in(line["limit"], units).replace("<=", "\u2264").replace(">=", "\u2265")
            check = f"{line['what']} {value}, limit {limit}\nwhy: {line['source']}"
            for j, text in enumerate((STATUS_SYMBOL[line["status"]], check)):
                item = QtWidgets.QTableWidgetItem(text)
                item.setToolTip(mmhg_text_in(line["message"], units))
                self.table.setItem(i, j, item)
        self.table.resizeRowsToContents()
