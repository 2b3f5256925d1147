"""The "New trial layout" dialog (desktop/layout_dialog.py), filled in as a breeder would.

The layouts themselves are trialdesk.core.layouts' (its own tests check the designs); here the
point is that the dialog asks for what it says, writes the trial file that layout makes (and the
field books), shows the live line and the problems with the field named, and loses nothing
typed. Pictures of the dialog are saved under tests/output/screenshots/.
"""

from __future__ import annotations

import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

import shutil  # noqa: E402
import subprocess  # noqa: E402
import threading  # noqa: E402
from pathlib import Path  # noqa: E402

import pandas as pd  # noqa: E402
import pytest  # noqa: E402
from openpyxl import load_workbook  # noqa: E402
from PySide6.QtCore import QSettings, QStandardPaths, Qt  # noqa: E402
from PySide6.QtGui import QPalette  # noqa: E402
from PySide6.QtWidgets import QApplication, QLineEdit  # noqa: E402

from trialdesk.core.layouts import make_layout, numbered_entries  # noqa: E402
from trialdesk.core.trialfile import TrialFile  # noqa: E402
from trialdesk.desktop import layout_dialog  # noqa: E402
from trialdesk.desktop.layout_dialog import LayoutDialog  # noqa: E402
from trialdesk.desktop.main_window import MainWindow  # noqa: E402
from trialdesk.desktop.palette import ERROR_BG, STALE_FG  # noqa: E402

DESIGN_INDEX = {"rcbd": 0, "crd": 1, "alpha": 2}
WAIT_MS = 60_000  # a generous bound for the background work of one layout, never a measure


@pytest.fixture
def dialog(qtbot):
    box = LayoutDialog()
    qtbot.addWidget(box)
    box.show()
    yield box
    box.wait()


def settle(qtbot, box: LayoutDialog) -> None:
    """Wait until the live line and any writing are done."""
    qtbot.waitUntil(lambda: not box.is_working(), timeout=WAIT_MS)


def type_into(qtbot, edit: QLineEdit, text: str) -> None:
    edit.clear()
    qtbot.keyClicks(edit, text)


def fill(qtbot, box: LayoutDialog, folder: Path, *, name: str = "rcbd", count: int = 25,
         checks: str = "E001, E002", design: str = "rcbd", reps: int = 4,
         block_size: int | None = None, rows: int = 10, columns: int = 10,
         serpentine: bool = True, seed: str = "20270311", books: bool = True) -> None:
    """Fill the dialog as a breeder would, the files in ``folder`` named after ``name``."""
    type_into(qtbot, box.name, f"Harrow Flats {name.upper()} 2027")
    type_into(qtbot, box.station, "Harrow Flats Research Farm")
    type_into(qtbot, box.season, "2027")
    box.by_count.setChecked(True)
    box.count.setValue(count)
    type_into(qtbot, box.checks, checks)
    box.design.setCurrentIndex(DESIGN_INDEX[design])
    box.reps.setValue(reps)
    if block_size is not None:
        box.block_size.setValue(block_size)
    box.rows.setValue(rows)
    box.columns.setValue(columns)
    box.serpentine.setChecked(serpentine)
    type_into(qtbot, box.seed, seed)
    type_into(qtbot, box.traits, "grain_yield, plant_height")
    type_into(qtbot, box.trial_file, str(folder / f"{name}.trial"))
    type_into(qtbot, box.xlsx, str(folder / f"{name} field book.xlsx") if books else "")
    type_into(qtbot, box.pdf, str(folder / f"{name} field book.pdf") if books else "")
    settle(qtbot, box)


def create(qtbot, box: LayoutDialog) -> None:
    qtbot.mouseClick(box.create_button, Qt.MouseButton.LeftButton)
    settle(qtbot, box)


def trial_plots(path: Path) -> pd.DataFrame:
    with TrialFile.open(path, read_only=True) as trial:
        return trial.plots()


def marked(widget) -> bool:
    return widget.palette().color(QPalette.ColorRole.Base) == ERROR_BG


def test_create_writes_the_trial_and_its_field_books(dialog, qtbot, tmp_path, shoot):
    fill(qtbot, dialog, tmp_path)
    assert dialog.summary.text().startswith(
        "100 plots: 25 entries (2 of them checks) in 4 replicates, each a complete block. "
        "Field of 10 x 10, every place used.")
    with qtbot.waitSignal(dialog.created, timeout=WAIT_MS) as created:
        create(qtbot, dialog)
    path = tmp_path / "rcbd.trial"
    assert created.args == [str(path)]
    assert path.exists()
    # Closed cleanly: no log, shared-memory or lock file beside it (read-only opens below make
    # SQLite's side files, so this is looked at first).
    assert not list(tmp_path.glob("*.trial-*")) and not list(tmp_path.glob("*.lock"))
    # The trial holds the layout make_layout draws from the same settings and seed.
    expected = make_layout(numbered_entries(25), checks=("E001", "E002"), design="rcbd", reps=4,
                           rows=10, columns=10, serpentine=True, seed=20270311).to_frame()
    plots = trial_plots(path)
    assert plots["plot"].tolist() == expected["plot"].tolist()
    assert plots["entry"].tolist() == expected["entry"].tolist()
    assert plots["block"].tolist() == [str(r) for r in expected["rep"]]
    assert plots["row"].tolist() == expected["row"].tolist()
    assert plots["column"].tolist() == expected["column"].tolist()
    with TrialFile.open(path, read_only=True) as trial:
        facts = trial.facts()
        entries = trial.entries()
        traits = trial.traits()["name"].tolist()
    assert facts["layout_seed"] == 20270311 and facts["design"] == "rcbd"
    assert facts["name"] == "Harrow Flats RCBD 2027" and facts["season"] == "2027"
    assert entries.loc[entries["role"] == "check", "code"].tolist() == ["E001", "E002"]
    assert traits == ["grain_yield", "plant_height"]
    # The blank field book: a row per plot, the traits and notes empty to fill in.
    sheet = load_workbook(tmp_path / "rcbd field book.xlsx").active
    header = [cell.value for cell in sheet[1]]
    assert header[:5] == ["plot", "block", "row", "column", "entry"]
    assert header[-3:] == ["grain_yield", "plant_height", "notes"]
    assert [row[0] for row in sheet.iter_rows(min_row=2, values_only=True)] == \
        expected["plot"].tolist()
    book = tmp_path / "rcbd field book.pdf"
    assert book.read_bytes().startswith(b"%PDF-")
    if shutil.which("pdftotext"):  # poppler-utils: the printed book carries the trial's facts
        printed = subprocess.run(["pdftotext", str(book), "-"], check=True, capture_output=True,
                                 text=True).stdout
        assert "Harrow Flats RCBD 2027" in printed and "20270311" in printed
        assert "plant_height" in printed
    assert "Wrote" in dialog.message.text() and dialog.open_button.isVisible()
    shoot(dialog, "layout-dialog")
    with qtbot.waitSignal(dialog.open_requested) as opened:
        qtbot.mouseClick(dialog.open_button, Qt.MouseButton.LeftButton)
    assert opened.args == [str(path)]
    assert not dialog.isVisible()


def test_the_same_seed_gives_the_same_layout(dialog, qtbot, tmp_path):
    fill(qtbot, dialog, tmp_path, name="first", books=False)
    create(qtbot, dialog)
    type_into(qtbot, dialog.trial_file, str(tmp_path / "second.trial"))
    create(qtbot, dialog)
    first, second = trial_plots(tmp_path / "first.trial"), trial_plots(tmp_path / "second.trial")
    pd.testing.assert_frame_equal(first, second)
    # A new seed is drawn and shown, and gives another layout.
    old = dialog.seed.text()
    qtbot.mouseClick(dialog.new_seed_button, Qt.MouseButton.LeftButton)
    assert dialog.seed.text() != old and dialog.seed.text().isdigit()
    type_into(qtbot, dialog.trial_file, str(tmp_path / "third.trial"))
    settle(qtbot, dialog)
    create(qtbot, dialog)
    third = trial_plots(tmp_path / "third.trial")
    assert third["plot"].tolist() == first["plot"].tolist()
    assert third["entry"].tolist() != first["entry"].tolist()


def test_alpha_design_shows_its_efficiency(dialog, qtbot, tmp_path, shoot):
    fill(qtbot, dialog, tmp_path, name="alpha", count=60, design="alpha", reps=3,
         block_size=6, rows=12, columns=15, serpentine=False, seed="4417")
    expected = make_layout(numbered_entries(60), checks=("E001", "E002"), design="alpha",
                           reps=3, block_size=6, rows=12, columns=15, seed=4417)
    factor, bound = expected.efficiency.factor, expected.efficiency.upper_bound
    text = dialog.summary.text()
    assert text.startswith("180 plots: 60 entries (2 of them checks) in 3 replicates, each of "
                           "10 incomplete blocks of 6 (30 blocks in all).")
    assert f"Efficiency factor {factor:.4f} against an upper bound of {bound:.4f}" in text
    assert dialog.block_size.isEnabled()
    shoot(dialog, "layout-dialog-alpha")
    create(qtbot, dialog)
    plots = trial_plots(tmp_path / "alpha.trial")
    assert plots["incomplete_block"].tolist() == [
        str(b) for b in expected.to_frame()["incomplete_block"]]
    assert plots["entry"].tolist() == expected.to_frame()["entry"].tolist()


def test_a_block_size_that_does_not_divide_is_named_and_nothing_is_lost(dialog, qtbot,
                                                                          tmp_path, shoot):
    fill(qtbot, dialog, tmp_path, name="bad", count=60, design="alpha", reps=3, block_size=7,
         rows=12, columns=15)
    assert dialog.summary.text().startswith("Block size: a block size of 7 does not divide the "
                                            "60 entries")
    assert marked(dialog.block_size) and not marked(dialog.count)
    create(qtbot, dialog)
    assert dialog.message.isVisible()  # said once, in the line under the form
    assert dialog.message.text() == "Nothing was written: see the problem above."
    assert dialog.summary.text().startswith("Block size: a block size of 7 does not divide")
    assert dialog.block_size.hasFocus()
    assert not (tmp_path / "bad.trial").exists()
    shoot(dialog, "layout-dialog-error")
    # What was typed is all still there.
    assert (dialog.count.value(), dialog.block_size.value(), dialog.reps.value()) == (60, 7, 3)
    assert dialog.checks.text() == "E001, E002" and dialog.seed.text() == "20270311"
    assert dialog.trial_file.text() == str(tmp_path / "bad.trial")
    # Mended, the line clears and Create works.
    dialog.block_size.setValue(6)
    settle(qtbot, dialog)
    assert not marked(dialog.block_size)
    assert "Efficiency factor" in dialog.summary.text()
    create(qtbot, dialog)
    assert (tmp_path / "bad.trial").exists()


def test_an_existing_trial_file_is_never_written_over(dialog, qtbot, tmp_path):
    target = tmp_path / "taken.trial"
    target.write_bytes(b"someone else's trial")
    fill(qtbot, dialog, tmp_path, name="taken")
    create(qtbot, dialog)
    assert dialog.message.text().startswith("Trial file: ")
    assert "exists already" in dialog.message.text()
    assert marked(dialog.trial_file)
    assert target.read_bytes() == b"someone else's trial"
    assert not (tmp_path / "taken field book.xlsx").exists()
    assert dialog.trial_file.text() == str(target) and dialog.count.value() == 25
    assert not dialog.open_button.isVisible()


def test_fields_that_cannot_be_read_are_named(dialog, qtbot, tmp_path):
    fill(qtbot, dialog, tmp_path, name="fields", books=False)
    type_into(qtbot, dialog.seed, "12a")
    settle(qtbot, dialog)
    assert dialog.summary.text().startswith("Seed: a seed is a whole number")
    assert marked(dialog.seed)
    type_into(qtbot, dialog.seed, "77")
    type_into(qtbot, dialog.traits, "grain_yield, Grain_Yield")
    create(qtbot, dialog)
    assert dialog.message.text() == "Traits to record: 'Grain_Yield' is given twice"
    type_into(qtbot, dialog.traits, "entry")
    create(qtbot, dialog)
    assert dialog.message.text().startswith("Traits to record: 'entry' is a column")
    type_into(qtbot, dialog.traits, "grain_yield")
    dialog.rows.setValue(0)  # columns given without rows
    settle(qtbot, dialog)
    assert dialog.summary.text() == "Field rows: give the field's rows and columns together"
    assert not dialog.serpentine.isEnabled()
    dialog.columns.setValue(0)
    type_into(qtbot, dialog.xlsx, str(tmp_path / "book.csv"))
    create(qtbot, dialog)
    assert dialog.message.text().startswith("Field book (XLSX): ")
    assert "must end in .xlsx" in dialog.message.text()
    assert not (tmp_path / "fields.trial").exists()


def test_entries_from_a_file_keep_their_names(dialog, qtbot, tmp_path):
    listing = tmp_path / "entries.csv"
    listing.write_text("entry,name\nHF-101,Kestrel\nHF-102,Merlin\nHF-103,Harrier\n"
                       "HF-104,Osprey\nHF-105,Hobby\nHF-106,Peregrine\n", encoding="utf-8")
    fill(qtbot, dialog, tmp_path, name="listed", checks="HF-101", design="crd", reps=3, rows=0,
         columns=0, serpentine=False, books=False)
    assert dialog.reps_label.text() == "Plots per entry"
    assert not dialog.block_size.isEnabled()
    dialog.by_file.setChecked(True)
    type_into(qtbot, dialog.entry_file, str(listing))
    settle(qtbot, dialog)
    assert dialog.summary.text() == "18 plots: 6 entries (1 of them checks), 3 plots each, in no " \
                                    "blocks."
    create(qtbot, dialog)
    with TrialFile.open(tmp_path / "listed.trial", read_only=True) as trial:
        entries = trial.entries().set_index("code")
        plots = trial.plots()
    assert entries.loc["HF-103", "name"] == "Harrier"
    assert entries.loc["HF-101", "role"] == "check"
    assert plots["entry"].value_counts().tolist() == [3] * 6
    assert plots["row"].isna().all()
    # A missing file is named in the dialog.
    type_into(qtbot, dialog.entry_file, str(tmp_path / "missing.csv"))
    settle(qtbot, dialog)
    assert dialog.summary.text().startswith("Entry file: ")
    assert marked(dialog.entry_file)


def test_the_live_line_is_worked_out_off_the_gui_thread(dialog, qtbot, tmp_path, monkeypatch):
    fill(qtbot, dialog, tmp_path, name="slow", books=False)
    release = threading.Event()
    threads: list[threading.Thread] = []
    real = layout_dialog._draw

    def held(request):  # a layout that takes as long as the test wants
        threads.append(threading.current_thread())
        release.wait(WAIT_MS / 1000)
        return real(request)

    monkeypatch.setattr(layout_dialog, "_draw", held)
    dialog.reps.setValue(3)
    qtbot.waitUntil(lambda: bool(threads), timeout=WAIT_MS)
    assert threads[0] is not threading.main_thread()
    # Meanwhile the dialog answers: the old line is shown faded, typing goes on.
    assert dialog.is_working()
    assert dialog.summary.styleSheet() == f"color: {STALE_FG.name()};"
    type_into(qtbot, dialog.station, "Harrow Flats North")
    assert dialog.station.text() == "Harrow Flats North"
    release.set()
    settle(qtbot, dialog)
    assert dialog.summary.text().startswith("75 plots: 25 entries (2 of them checks) in 3 "
                                            "replicates")
    assert dialog.summary.styleSheet() == ""


@pytest.fixture
def window(qtbot, tmp_path):
    QStandardPaths.setTestModeEnabled(True)
    QSettings.setDefaultFormat(QSettings.Format.IniFormat)
    QSettings.setPath(QSettings.Format.IniFormat, QSettings.Scope.UserScope, str(tmp_path / "ini"))
    app = QApplication.instance()
    app.setOrganizationName("TrialdeskTests")
    app.setApplicationName("TrialdeskTests")
    win = MainWindow()
    qtbot.addWidget(win)
    win.show()
    qtbot.waitUntil(lambda: win.session is not None, timeout=20_000)
    yield win
    win.close()


def layout_action(window: MainWindow):
    trial_menu = window.menuBar().actions()[0].menu()
    [action] = [a for a in trial_menu.actions() if a.text() == "New trial &layout..."]
    return action


def test_the_trial_menu_opens_the_dialog_and_keeps_what_was_typed(window, qtbot, tmp_path):
    action = layout_action(window)
    action.trigger()
    box = window.layout_dialog
    assert box.isVisible() and box.windowTitle() == "New trial layout"
    fill(qtbot, box, tmp_path, name="menu", count=30, books=False)
    box.reject()
    action.trigger()
    assert window.layout_dialog is box and box.isVisible()
    assert box.count.value() == 30 and box.trial_file.text() == str(tmp_path / "menu.trial")
    box.reject()


def test_the_new_trial_opens_in_the_window(window, qtbot, tmp_path):
    layout_action(window).trigger()
    box = window.layout_dialog
    fill(qtbot, box, tmp_path, name="opened", books=False)
    create(qtbot, box)
    qtbot.mouseClick(box.open_button, Qt.MouseButton.LeftButton)
    qtbot.waitUntil(lambda: window.session.trial is not None)
    assert window.session.path == tmp_path / "opened.trial"
    assert len(window.session.plots) == 100
