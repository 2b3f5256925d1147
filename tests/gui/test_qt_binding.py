"""The Qt binding itself: a PySide6 release that loses references on signal emits would crash the
program after some thousands of edits, so the installed one is checked."""

from __future__ import annotations

import sys

from PySide6.QtCore import QObject, Signal


class _Emitter(QObject):
    signal = Signal()


def test_signal_emits_keep_the_reference_count_of_true():
    # PySide6 6.12.0 on Python 3.11 returned True from SignalInstance.emit() without a reference,
    # taking one off True per emit until Python aborted ("bool_dealloc"); pyproject.toml excludes
    # that release. Seen here by running the loop below under 6.12.0 (drop of 1,000) and 6.11.3
    # (drop of 0).
    emitter = _Emitter()
    before = sys.getrefcount(True)
    for _ in range(1000):
        emitter.signal.emit()
    assert sys.getrefcount(True) >= before
