"""Trialdesk's own colours and marks, in one place for every view."""

from PySide6.QtGui import QColor

ERROR_BG = QColor("#f6d5d1")  # a value that cannot be used as typed
ERROR_FG = QColor("#7a1f12")
WARNING_BG = QColor("#fbeec9")  # suspicious but kept
OUTLIER_BG = QColor("#e3dcf3")  # flagged by the last analysis (large studentized residual)
CHECK_BG = QColor("#e8f0e2")  # rows of check varieties
STALE_FG = QColor("#8a8a8a")  # results that no longer match the data
ABOVE = QColor("#2d6a2d")  # significantly above the checks
BELOW = QColor("#8a2b2b")  # significantly below the checks
ACCENT = QColor("#3a5f7d")  # headers, selected chart series
CHECK_PEN = QColor("#c07a12")  # checks in charts
ENTRY_PEN = QColor("#3a5f7d")

ABOVE_MARK = "\u25b2"  # up-pointing triangle
BELOW_MARK = "\u25bc"  # down-pointing triangle
