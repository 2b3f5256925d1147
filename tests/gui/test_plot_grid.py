"""The plot-data grid, driven with keys and the clipboard, checked on its model and the file."""

from __future__ import annotations

import math

import pandas as pd
import pytest
from PySide6.QtCore import QItemSelection, QItemSelectionModel, Qt
from PySide6.QtWidgets import QAbstractItemView, QApplication

from trialdesk.core.analysis import analyze
from trialdesk.core.trialfile import TrialFile
from trialdesk.desktop.palette import CHECK_BG, ERROR_BG, OUTLIER_BG, WARNING_BG
from trialdesk.desktop.plot_grid import PlotGrid
from trialdesk.desktop.session import TrialSession

ROLE = Qt.ItemDataRole


@pytest.fixture
def grid(session, qtbot):
    widget = PlotGrid(session)
    qtbot.addWidget(widget)
    widget.resize(900, 600)
    widget.show()
    qtbot.waitExposed(widget)
    widget.activateWindow()
    return widget


def source_index(grid, plot, trait):
    model = grid.model
    return model.index(model.row_of_plot(plot), model.trait_column(trait))


def view_index(grid, plot, trait):
    return grid.proxy.mapFromSource(source_index(grid, plot, trait))


def type_in(qtbot, grid, editor_of, text):
    """Type on the current cell, as a user does: the first key opens the editor."""
    qtbot.keyClick(grid.view, text[0])
    editor = editor_of(grid.view)
    qtbot.keyClicks(editor, text[1:])
    return editor


def stored(session, plot, trait):
    return session.trial.values().at[plot, trait]


def test_columns_roles_and_check_rows(grid, session):
    model = grid.model
    headers = [model.headerData(c, Qt.Orientation.Horizontal) for c in range(model.columnCount())]
    assert headers == ["Plot", "Block", "Entry", "grain_yield (t/ha)", "heading_days (days)",
                       "plant_height (cm)", "test_weight (kg/hl)"]
    assert model.rowCount() == 100
    index = source_index(grid, "101", "grain_yield")  # 5.2 in the demo field book
    assert index.data(ROLE.DisplayRole) == "5.20"  # two decimals for grain_yield
    assert index.data(ROLE.EditRole) == "5.2"
    assert index.data(ROLE.UserRole) == 5.2
    assert index.data(ROLE.TextAlignmentRole) & Qt.AlignmentFlag.AlignRight
    assert index.flags() & Qt.ItemFlag.ItemIsEditable
    assert not model.index(0, 0).flags() & Qt.ItemFlag.ItemIsEditable
    assert source_index(grid, "101", "heading_days").data() == "59"
    check_row = list(session.plots["entry"]).index("CHK-2")
    assert model.index(check_row, 2).data(ROLE.BackgroundRole) == CHECK_BG
    assert model.index(check_row, 4).data(ROLE.BackgroundRole) is None
    missing = [p for p in session.values.index if math.isnan(session.values.at[p, "grain_yield"])]
    assert missing and source_index(grid, missing[0], "grain_yield").data() == ""
    assert source_index(grid, missing[0], "grain_yield").data(ROLE.UserRole) is None


def test_typing_overwrites_writes_and_enter_moves_down(grid, session, qtbot, editor_of):
    assert grid.select_plot("101", "grain_yield")
    editor = type_in(qtbot, grid, editor_of, "6.5")
    assert editor.text() == "6.5"  # the old 5.2 was replaced, not added to
    qtbot.keyClick(editor, Qt.Key.Key_Return)
    assert stored(session, "101", "grain_yield") == 6.5
    assert grid.current_cell() == ("102", "grain_yield")
    assert source_index(grid, "101", "grain_yield").data() == "6.50"
    # Enter without editing goes down too.
    qtbot.keyClick(grid.view, Qt.Key.Key_Return)
    assert grid.current_cell() == ("103", "grain_yield")


def test_tab_moves_right_and_shift_tab_left(grid, session, qtbot, editor_of):
    grid.select_plot("104", "heading_days")
    editor = type_in(qtbot, grid, editor_of, "66")
    qtbot.keyClick(editor, Qt.Key.Key_Tab)
    assert stored(session, "104", "heading_days") == 66
    assert grid.current_cell() == ("104", "plant_height")
    editor = type_in(qtbot, grid, editor_of, "91")
    qtbot.keyClick(editor, Qt.Key.Key_Backtab)
    assert stored(session, "104", "plant_height") == 91
    assert grid.current_cell() == ("104", "heading_days")


def test_bad_text_is_refused_kept_and_not_written(grid, session, qtbot, editor_of):
    grid.select_plot("101", "grain_yield")
    editor = type_in(qtbot, grid, editor_of, "6,2t")
    qtbot.keyClick(editor, Qt.Key.Key_Return)
    assert stored(session, "101", "grain_yield") == 5.2  # not written
    assert grid.view.state() == QAbstractItemView.State.EditingState
    assert editor_of(grid.view).text() == "6,2t"  # what was typed is still there
    assert "plot 101, grain_yield" in grid.status.text() and "'6,2t'" in grid.status.text()
    qtbot.keyClick(editor, Qt.Key.Key_Escape)
    assert source_index(grid, "101", "grain_yield").data() == "5.20"

    # Leaving the cell another way keeps the refused text in it, marked, still not written.
    type_in(qtbot, grid, editor_of, "4..1")
    grid.view.setCurrentIndex(view_index(grid, "110", "plant_height"))
    assert stored(session, "101", "grain_yield") == 5.2
    assert source_index(grid, "101", "grain_yield").data() == "4..1"
    assert grid.model.draft(grid.model.row_of_plot("101"),
                            grid.model.trait_column("grain_yield")) == "4..1"

    # Refused when the editor closes another way (the model keeps the text, marked).
    index = source_index(grid, "102", "grain_yield")
    with qtbot.waitSignal(grid.model.edit_refused) as refused:
        assert not grid.model.setData(index, "seven")
    assert "plot 102, grain_yield" in refused.args[0]
    assert stored(session, "102", "grain_yield") == 7.25
    assert index.data() == "seven" and index.data(ROLE.EditRole) == "seven"
    assert index.data(ROLE.BackgroundRole) == ERROR_BG
    assert "Not saved" in index.data(ROLE.ToolTipRole)
    grid.select_plot("102", "grain_yield")
    qtbot.keyClick(grid.view, Qt.Key.Key_Escape)  # drop it: the stored value shows again
    assert index.data() == "7.25"
    assert grid.model.setData(index, "NA")  # a missing marker is a value: missing
    assert math.isnan(stored(session, "102", "grain_yield"))


def test_paste_of_a_block_is_one_undoable_edit(grid, session, qtbot):
    before = session.trial.values()
    QApplication.clipboard().setText("6.01\t70\n6.02\t71\n6.03\t72\n")  # 3 plots x 2 traits
    grid.select_plot("101", "grain_yield")
    qtbot.keyClick(grid.view, Qt.Key.Key_V, Qt.KeyboardModifier.ControlModifier)
    after = session.trial.values()
    assert [after.at[p, "grain_yield"] for p in ("101", "102", "103")] == [6.01, 6.02, 6.03]
    assert [after.at[p, "heading_days"] for p in ("101", "102", "103")] == [70, 71, 72]
    assert "Pasted 6 values" in grid.status.text()
    journal = session.trial.journal()
    assert (journal["group_id"] == journal["group_id"].iloc[-1]).sum() == 6  # one action
    assert session.undo()  # one step takes back all six
    restored = session.trial.values()
    for plot in ("101", "102", "103"):
        for trait in ("grain_yield", "heading_days"):
            assert restored.at[plot, trait] == before.at[plot, trait]
    assert source_index(grid, "101", "grain_yield").data() == "5.20"


def test_paste_with_a_bad_cell_writes_nothing(grid, session, qtbot):
    before = session.trial.values()
    QApplication.clipboard().setText("6.01\t60\n6.02\tsixty\n")
    grid.select_plot("101", "grain_yield")
    assert not grid.paste()
    assert session.trial.values().equals(before)
    assert "plot 102, heading_days" in grid.status.text()
    assert "'sixty'" in grid.status.text()
    grid.select_plot("101", "plant_height")  # two columns from plant_height: one too many
    QApplication.clipboard().setText("90\t77\t1\n")
    assert not grid.paste() and "room for" in grid.status.text()
    grid.select_plot("101", "test_weight")
    QApplication.clipboard().setText("1\t2\n")
    assert not grid.paste()
    assert session.trial.values().equals(before)


def test_one_value_pasted_fills_the_selection_and_copy(grid, session, qtbot):
    view = grid.view
    view.setCurrentIndex(view_index(grid, "101", "heading_days"))
    view.selectionModel().select(
        QItemSelection(view_index(grid, "101", "heading_days"),
                       view_index(grid, "103", "plant_height")),
        QItemSelectionModel.SelectionFlag.ClearAndSelect)
    qtbot.keyClick(view, Qt.Key.Key_C, Qt.KeyboardModifier.ControlModifier)
    assert QApplication.clipboard().text() == "59\t99\n63\t90\n62\t88"
    QApplication.clipboard().setText("70\n")
    assert grid.paste()
    values = session.trial.values()
    assert {values.at[p, t] for p in ("101", "102", "103")
            for t in ("heading_days", "plant_height")} == {70.0}


def test_filters_by_block_and_entry(grid, session):
    combo = grid.block_filter
    combo.setCurrentIndex(combo.findData("2"))
    combo.activated.emit(combo.currentIndex())
    shown = [grid.proxy.index(r, 1).data() for r in range(grid.proxy.rowCount())]
    assert len(shown) == 25 and set(shown) == {"2"}
    grid.set_filters(None, "CHK-1")
    entries = {grid.proxy.index(r, 2).data() for r in range(grid.proxy.rowCount())}
    assert entries == {"CHK-1"} and grid.proxy.rowCount() == 4
    grid.set_filters("3", "CHK-1")
    assert grid.proxy.rowCount() == 1
    assert grid.select_plot("101")  # hidden by the filters: they are cleared
    assert grid.proxy.rowCount() == 100 and grid.current_cell() == ("101", None)


def test_find_selects_the_plot(grid, session, qtbot):
    assert grid.find("215")
    assert grid.selected_plots() == ["215"]
    first = next(p for p, e in zip(session.plots["plot"], session.plots["entry"], strict=True)
                 if e == "CHK-1")
    assert grid.find("chk-1")  # an entry code, in any case
    assert grid.current_cell() == (first, None)
    second = [p for p, e in zip(session.plots["plot"], session.plots["entry"], strict=True)
              if e == "CHK-1"][1]
    assert grid.find("chk-1") and grid.current_cell()[0] == second  # again: the next one
    assert not grid.find("no such plot") and "No plot or entry" in grid.status.text()
    grid.view.setFocus()
    qtbot.keyClick(grid.view, Qt.Key.Key_F, Qt.KeyboardModifier.ControlModifier)
    assert grid.find_field.hasFocus()
    qtbot.keyClicks(grid.find_field, "310")
    qtbot.keyClick(grid.find_field, Qt.Key.Key_Return)
    assert grid.selected_plots() == ["310"]


def test_sorting_by_a_trait_and_back_to_field_order(grid, session, qtbot, editor_of):
    column = grid.model.trait_column("grain_yield")
    grid.select_plot("104", "grain_yield")
    for order in (Qt.SortOrder.DescendingOrder, Qt.SortOrder.AscendingOrder):
        grid.view.sortByColumn(column, order)
        shown = [grid.proxy.index(r, column).data(ROLE.UserRole) for r in range(100)]
        numbers = [v for v in shown if v is not None]
        assert numbers == sorted(numbers, reverse=order == Qt.SortOrder.DescendingOrder)
        assert shown[len(numbers):] == [None] * (100 - len(numbers))  # missing ones last
        assert grid.current_cell() == ("104", "grain_yield")  # the selection follows its plot
    # Typing in a sorted grid writes the plot shown, and the rows stay where they are.
    row = grid.view.currentIndex().row()
    editor = type_in(qtbot, grid, editor_of, "9.9")
    qtbot.keyClick(editor, Qt.Key.Key_Return)
    assert stored(session, "104", "grain_yield") == 9.9
    assert grid.proxy.index(row, 0).data() == "104"
    grid.set_filters("2", None)
    grid.view.sortByColumn(0, Qt.SortOrder.DescendingOrder)
    assert grid.proxy.index(0, 0).data() == "225"
    grid.set_filters(None, None)
    grid.view.sortByColumn(-1, Qt.SortOrder.AscendingOrder)
    assert [grid.proxy.index(r, 0).data() for r in range(3)] == ["101", "102", "103"]


def test_an_edit_in_the_sorted_column_offers_to_sort_again(grid, session, qtbot):
    column = grid.model.trait_column("grain_yield")
    grid.view.sortByColumn(column, Qt.SortOrder.DescendingOrder)
    assert not grid.model.order_stale and grid.resort_button.isHidden()
    last = grid.proxy.index(grid.proxy.rowCount() - 1, 0).data()  # a missing yield: shown last
    session.set_value("104", "heading_days", 61.0)  # another column: the order still holds
    assert not grid.model.order_stale
    session.set_value(last, "grain_yield", 99.0)
    assert grid.proxy.index(grid.proxy.rowCount() - 1, 0).data() == last  # the row stays put
    assert grid.model.order_stale and not grid.resort_button.isHidden()
    qtbot.mouseClick(grid.resort_button, Qt.MouseButton.LeftButton)
    assert grid.proxy.index(0, 0).data() == last  # now the largest yield, at the top
    assert not grid.model.order_stale and grid.resort_button.isHidden()


def test_value_outside_the_range_is_marked(grid, session, shoot):
    session.set_value("105", "plant_height", 175.0)  # the demo range is 40 to 150 cm
    index = source_index(grid, "105", "plant_height")
    assert index.data(ROLE.BackgroundRole) == WARNING_BG
    assert "outside the range" in index.data(ROLE.ToolTipRole)
    assert index.data() == "175"
    session.set_value("105", "plant_height", 92.0)
    assert index.data(ROLE.BackgroundRole) is None and index.data(ROLE.ToolTipRole) is None


def test_outliers_of_the_last_analysis_are_marked(grid, session, shoot):
    # The demo holds one keying slip in grain_yield for the residual check to find.
    analysis = analyze(session.fieldbook(), session.settings())
    flagged = [(f.plot, r.trait) for r in analysis.traits for f in r.diagnostics.flagged]
    assert flagged
    session.set_results(analysis)
    plot, trait = flagged[0]
    index = source_index(grid, plot, trait)
    assert index.data(ROLE.BackgroundRole) == OUTLIER_BG
    assert "last analysis" in index.data(ROLE.ToolTipRole)
    session.set_value("105", "plant_height", 175.0)  # results out of date: the mark goes
    assert index.data(ROLE.BackgroundRole) is None
    session.set_results(analyze(session.fieldbook(), session.settings()))
    assert index.data(ROLE.BackgroundRole) == OUTLIER_BG
    # One of each mark for the picture: a refused text, a value out of range, an outlier.
    grid.model.setData(source_index(grid, "106", "plant_height"), "9O")
    grid.resize(1000, 560)
    grid.select_plot(plot, trait)
    grid.select_plot("110", "heading_days")
    shoot(grid, "plot-grid-problems")


def test_large_trial_builds_scrolls_and_keeps_computed_traits_read_only(large_trial, qtbot):
    session = TrialSession()
    session.open(large_trial)
    try:
        grid = PlotGrid(session)
        qtbot.addWidget(grid)
        grid.resize(1000, 700)
        grid.show()
        qtbot.waitExposed(grid)
        model = grid.model
        assert model.rowCount() == 10_000
        column = model.trait_column("grain_yield")
        assert not model.index(0, column).flags() & Qt.ItemFlag.ItemIsEditable
        assert "Computed from" in model.headerData(column, Qt.Orientation.Horizontal,
                                                   ROLE.ToolTipRole)
        grid.view.scrollToBottom()
        QApplication.processEvents()
        assert grid.select_plot("20500", "plot_weight")
        assert grid.view.rowAt(grid.view.viewport().height() // 2) >= 9_000
        yield_before = model.index(model.row_of_plot("20500"), column).data(ROLE.UserRole)
        assert model.setData(model.index(model.row_of_plot("20500"),
                                         model.trait_column("plot_weight")), "4.8")
        after = session.values.at["20500", "grain_yield"]
        assert model.index(model.row_of_plot("20500"), column).data(ROLE.UserRole) == after
        assert after != yield_before
        assert not model.setData(model.index(0, column), "7.1")  # a computed trait
        weight = model.index(1, model.trait_column("plot_weight"))
        held = weight.data(ROLE.UserRole)
        with qtbot.waitSignal(model.edit_refused) as refused:
            assert not model.setData(weight, "-2")  # a weight cannot be negative: refused
        assert "negative" in refused.args[0]
        assert session.trial.values().at[model.plot_of_row(1), "plot_weight"] == held
        grid.set_filters("20", None)
        assert grid.proxy.rowCount() == 500
        grid.view.sortByColumn(model.trait_column("plant_height"), Qt.SortOrder.AscendingOrder)
        grid.view.scrollToBottom()
        QApplication.processEvents()
    finally:
        session.close()
    assert TrialFile.open(large_trial, read_only=True).values().at["20500", "plot_weight"] == 4.8


def test_delete_marks_the_selected_cells_missing_as_one_edit(grid, session, qtbot):
    grid.select_plot("101", "grain_yield")
    qtbot.keyClick(grid.view, Qt.Key.Key_Delete)
    assert pd.isna(session.trial.values().at["101", "grain_yield"])
    session.undo()
    assert session.trial.values().at["101", "grain_yield"] == 5.2
