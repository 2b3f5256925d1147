"""Starting the desktop program: the application object, the main window, the first trial."""

from __future__ import annotations

import sys
from collections.abc import Sequence

from PySide6.QtCore import QTimer
from PySide6.QtWidgets import QApplication

ORGANIZATION = "Trialdesk"
APPLICATION = "Trialdesk"


def make_application(argv: Sequence[str] = ()) -> QApplication:
    """The QApplication, created once, with the names QSettings and the data folder use."""
    app = QApplication.instance()
    if app is None:
        app = QApplication([sys.argv[0], *argv])
    app.setOrganizationName(ORGANIZATION)
    app.setApplicationName(APPLICATION)
    app.setApplicationDisplayName(APPLICATION)
    return app


def run(args: Sequence[str]) -> int:
    """Open the program: ``demo`` opens the demo trial, a path opens that file, nothing opens the
    trial used last (or nothing)."""
    app = make_application()
    from trialdesk.desktop.main_window import MainWindow

    window = MainWindow()
    window.show()
    if args and args[0] == "demo":
        QTimer.singleShot(0, window.open_demo)
    elif args:
        QTimer.singleShot(0, lambda: window.open_path(args[0]))
    else:
        QTimer.singleShot(0, window.open_last)
    return app.exec()
