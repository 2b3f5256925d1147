"""The problems list, the entries table and the trial facts form, checked on models and file."""

from __future__ import annotations

import pytest
from PySide6.QtCore import QDate, Qt
from PySide6.QtWidgets import QComboBox

from trialdesk.core.analysis import analyze
from trialdesk.core.trialfile import TrialFile
from trialdesk.desktop.entries_panel import COLUMNS, EntriesPanel
from trialdesk.desktop.facts_panel import FactsPanel
from trialdesk.desktop.palette import CHECK_BG, ERROR_BG, ERROR_FG, OUTLIER_BG, WARNING_BG
from trialdesk.desktop.plot_grid import PlotGrid
from trialdesk.desktop.problems_panel import ProblemsPanel
from trialdesk.desktop.session import TrialSession

ROLE = Qt.ItemDataRole


def shown(widget, qtbot, width=520, height=520):
    qtbot.addWidget(widget)
    widget.resize(width, height)
    with qtbot.waitActive(widget):
        widget.show()
        widget.activateWindow()
    return widget


@pytest.fixture
def invented(make_trial, qapp):
    """A session on a small invented trial with weight and moisture traits (they have errors)."""
    session = TrialSession()
    session.open(make_trial(6, 3))
    yield session
    session.close()


# --- problems -----------------------------------------------------------------------------------


def test_problems_list_a_value_out_of_range_and_a_click_shows_its_plot(session, qtbot):
    panel = shown(ProblemsPanel(session), qtbot)
    assert panel.header.text() == "No problems found"
    session.set_value("105", "plant_height", 175.0)  # the demo range is 40 to 150 cm
    assert panel.header.text() == "1 problem: 1 warning"
    index = panel.model.index(0)
    assert index.data().startswith("plot 105, plant_height: 175 is outside the range")
    assert index.data(ROLE.BackgroundRole) == WARNING_BG
    with qtbot.waitSignal(panel.problem_activated) as chosen:
        qtbot.mouseClick(panel.list.viewport(), Qt.MouseButton.LeftButton,
                         pos=panel.list.visualRect(index).center())
    assert chosen.args == ["105", "plant_height"]
    panel.list.setCurrentIndex(index)
    with qtbot.waitSignal(panel.problem_activated) as chosen:
        qtbot.keyClick(panel.list, Qt.Key.Key_Return)
    assert chosen.args == ["105", "plant_height"]
    session.set_value("105", "plant_height", 92.0)
    assert panel.header.text() == "No problems found" and panel.model.rowCount() == 0


def test_a_chosen_problem_selects_its_plot_in_the_grid(session, qtbot):
    grid = shown(PlotGrid(session), qtbot)
    panel = ProblemsPanel(session)
    qtbot.addWidget(panel)
    panel.problem_activated.connect(grid.select_plot)
    session.set_value("412", "test_weight", 95.0)  # above the demo range, 60 to 88 kg/hl
    panel._chosen(panel.model.index(0))
    assert grid.current_cell() == ("412", "test_weight")


def test_errors_come_first_and_outliers_are_marked(invented, session, qtbot, shoot):
    # The checks list plant_height (a warning) before plot_weight (an error); the list turns
    # that round. The session refuses the negative weight: it is written into the file directly
    # here, as an import could have brought it in, and the trial opened again.
    path = invented.path
    invented.close()
    with TrialFile.open(path) as trial:
        trial.set_values([("1001", "plant_height", 175.0),  # above its range (40 to 150 cm)
                          ("1002", "plot_weight", -1.0)])  # a weight cannot be negative
    invented.open(path)
    assert [p.severity for p in invented.problems] == ["warning", "error"]
    panel = shown(ProblemsPanel(invented), qtbot)
    assert panel.header.text() == "2 problems: 1 error, 1 warning"
    first, second = panel.model.problems()
    assert first.severity == "error" and first.plot == "1002"
    assert second.severity == "warning" and second.plot == "1001"
    assert panel.model.index(0).data(ROLE.BackgroundRole) == ERROR_BG
    assert panel.model.index(0).data(ROLE.ForegroundRole) == ERROR_FG

    # The demo's keying slips, flagged by an analysis, show in their own colour.
    demo = shown(ProblemsPanel(session), qtbot, 440, 380)
    session.set_value("105", "plant_height", 175.0)
    session.set_results(analyze(session.fieldbook(), session.settings()))
    kinds = [demo.model.index(r).data(ROLE.BackgroundRole) for r in range(demo.model.rowCount())]
    assert WARNING_BG in kinds and OUTLIER_BG in kinds
    assert "studentized residual" in demo.model.index(kinds.index(OUTLIER_BG)).data()
    flagged = kinds.count(OUTLIER_BG)
    assert demo.header.text() == (f"{len(kinds)} problems: {len(kinds)} warnings ({flagged} "
                                  "from the last analysis)")
    shoot(demo, "problems-panel")
    shoot(panel, "problems-panel-errors")


# --- entries ------------------------------------------------------------------------------------


def test_entries_count_and_a_role_changed_to_check_is_written(session, demo_path, qtbot, shoot,
                                                                editor_of):
    panel = shown(EntriesPanel(session), qtbot, 560, 520)
    assert panel.count.text() == "25 entries, 2 checks"
    model, view = panel.model, panel.view
    row = next(r for r in range(model.rowCount()) if model.code_of_row(r) == "TC26-101")
    check = panel.proxy.mapFromSource(model.index(row, COLUMNS.index("check")))
    assert check.data(ROLE.CheckStateRole) == Qt.CheckState.Unchecked
    view.setCurrentIndex(check)
    qtbot.keyClick(view, Qt.Key.Key_Space)  # ticks the check box
    assert session.trial.entries().set_index("code").at["TC26-101", "role"] == "check"
    assert panel.count.text() == "25 entries, 3 checks"
    assert check.data(ROLE.BackgroundRole) == CHECK_BG

    name = panel.proxy.mapFromSource(model.index(row, COLUMNS.index("name")))
    view.setCurrentIndex(name)
    qtbot.keyClick(view, "B")
    editor = editor_of(view)
    qtbot.keyClicks(editor, "ay Hollow")
    qtbot.keyClick(editor, Qt.Key.Key_Return)  # the editor writes on the next loop turn
    qtbot.waitUntil(lambda: session.trial.entries().set_index("code").at["TC26-101", "name"]
                    == "Bay Hollow")
    assert model.setData(model.index(row, COLUMNS.index("origin")), "TC19-4 / Marl")
    assert not model.flags(model.index(row, 0)) & Qt.ItemFlag.ItemIsEditable  # the code
    shoot(panel, "entries-panel")
    session.close()
    with TrialFile.open(demo_path, read_only=True) as trial:
        entry = trial.entries().set_index("code").loc["TC26-101"]
    assert (entry["role"], entry["name"], entry["origin"]) == ("check", "Bay Hollow",
                                                               "TC19-4 / Marl")


# --- trial facts and traits ---------------------------------------------------------------------


def test_fact_edits_are_written_at_once(session, demo_path, qtbot, shoot):
    panel = shown(FactsPanel(session), qtbot, 760, 720)
    station = panel.fields["station"]
    assert station.text() == "Tallow Creek Field Station"
    station.selectAll()
    qtbot.keyClicks(station, "Marl Flats Station")
    qtbot.keyClick(station, Qt.Key.Key_Return)
    assert session.trial.facts()["station"] == "Marl Flats Station"

    length = panel.fields["plot_length_m"]
    length.selectAll()
    qtbot.keyClicks(length, "-4")
    qtbot.keyClick(length, Qt.Key.Key_Return)
    assert session.trial.facts()["plot_length_m"] == 5.0  # refused, not written
    assert length.text() == "-4" and "Plot length must be above 0" in panel.message.text()
    length.selectAll()
    qtbot.keyClicks(length, "5.5")
    qtbot.keyClick(length, Qt.Key.Key_Return)
    assert session.trial.facts()["plot_length_m"] == 5.5 and not panel.message.text()

    sowing = panel.fields["sowing_date"]
    assert sowing.text() == "not set"
    sowing.setDate(QDate(2026, 4, 2))
    sowing.editingFinished.emit()
    assert session.trial.facts()["sowing_date"] == "2026-04-02"

    design = panel.fields["design"]
    design.setCurrentIndex(design.findData("crd"))
    design.activated.emit(design.currentIndex())
    assert session.trial.facts()["design"] == "crd"
    notes = panel.fields["notes"]
    notes.setFocus()
    notes.setPlainText("Hail on 2026-06-20 in block 3.")
    station.setFocus()  # leaving the notes writes them
    qtbot.waitUntil(lambda: session.trial.facts()["notes"] is not None)
    shoot(panel, "facts-panel")

    session.close()
    with TrialFile.open(demo_path, read_only=True) as trial:
        facts = trial.facts()
    assert facts["station"] == "Marl Flats Station" and facts["sowing_date"] == "2026-04-02"
    assert facts["plot_length_m"] == 5.5 and facts["design"] == "crd"
    assert facts["notes"] == "Hail on 2026-06-20 in block 3."


def test_a_date_can_be_cleared(session, qtbot):
    session.set_facts(harvest_date="2026-08-14")
    panel = shown(FactsPanel(session), qtbot)
    harvest = panel.fields["harvest_date"]
    assert harvest.date() == QDate(2026, 8, 14)
    panel._clear_date("harvest_date")
    assert session.trial.facts()["harvest_date"] is None and harvest.text() == "not set"


def test_trait_edits_are_written_and_shown_in_the_grid(session, qtbot):
    panel = shown(FactsPanel(session), qtbot)
    grid = PlotGrid(session)
    qtbot.addWidget(grid)
    model = panel.traits_model
    row = next(r for r in range(model.rowCount()) if model.name_of_row(r) == "grain_yield")
    decimals = model.index(row, 2)
    assert decimals.data() == "2"
    assert model.setData(decimals, "3")
    assert session.trial.traits().set_index("name").at["grain_yield", "decimals"] == 3
    cell = grid.model.index(grid.model.row_of_plot("101"), grid.model.trait_column("grain_yield"))
    assert cell.data() == "5.200"

    with qtbot.waitSignal(model.edit_refused) as refused:
        assert not model.setData(model.index(row, 3), "13")  # low above high (12)
    assert "grain_yield" in refused.args[0]
    assert session.trial.traits().set_index("name").at["grain_yield", "low"] == 1.0

    direction = model.index(row, 5)
    assert direction.data() == "higher is better"
    panel.traits_view.setCurrentIndex(direction)
    panel.traits_view.edit(direction)
    combo = panel.traits_view.viewport().findChild(QComboBox)
    combo.setCurrentIndex(combo.findText("lower is better"))
    combo.activated.emit(combo.currentIndex())
    assert not session.trial.traits().set_index("name").at["grain_yield", "higher_is_better"]
    assert model.index(row, 5).data() == "lower is better"


def test_harvested_area_recomputes_derived_yield(invented, qtbot):
    panel = shown(FactsPanel(invented), qtbot)
    grid = PlotGrid(invented)
    qtbot.addWidget(grid)
    cell = grid.model.index(0, grid.model.trait_column("grain_yield"))
    before = cell.data(ROLE.UserRole)
    area = panel.fields["harvested_area_m2"]
    area.selectAll()
    qtbot.keyClicks(area, "12")
    qtbot.keyClick(area, Qt.Key.Key_Return)
    assert invented.trial.facts()["harvested_area_m2"] == 12.0
    assert cell.data(ROLE.UserRole) == pytest.approx(before / 2, rel=1e-12)  # twice the area,
    # half the yield per hectare; rel=1e-12 allows only float rounding


def test_an_entry_is_added_and_a_repeated_code_refused(session, qtbot):
    panel = shown(EntriesPanel(session), qtbot, 560, 520)
    qtbot.keyClicks(panel.new_code, "TC26-150")
    qtbot.keyClicks(panel.new_name, "Reserve line")
    panel.new_is_check.setChecked(True)
    qtbot.mouseClick(panel.add_button, Qt.MouseButton.LeftButton)
    entries = session.trial.entries().set_index("code")
    assert (entries.at["TC26-150", "name"], entries.at["TC26-150", "role"]) == (
        "Reserve line", "check")
    assert panel.count.text() == "26 entries, 3 checks"
    assert panel.new_code.text() == "" and "added" in panel.message.text()
    assert panel.model.row_of("TC26-150") == 25  # new entries go last
    qtbot.keyClicks(panel.new_code, "tc26-101")  # the same code in other letter case
    qtbot.keyClick(panel.new_code, Qt.Key.Key_Return)
    assert "already lists entry TC26-101" in panel.message.text()
    assert panel.new_code.text() == "tc26-101"  # what was typed stays, to be corrected
    assert len(session.trial.entries()) == 26
    session.undo()
    assert panel.count.text() == "25 entries, 2 checks"


def test_a_trait_is_added_as_a_new_column_of_missing_values(session, qtbot):
    panel = shown(FactsPanel(session), qtbot)
    grid = PlotGrid(session)
    qtbot.addWidget(grid)
    qtbot.keyClicks(panel.new_trait, "lodging_score")
    qtbot.keyClicks(panel.new_unit, "1-9")
    panel.new_direction.setCurrentText("lower is better")
    qtbot.mouseClick(panel.add_trait_button, Qt.MouseButton.LeftButton)
    traits = session.trial.traits().set_index("name")
    assert traits.at["lodging_score", "unit"] == "1-9"
    assert not traits.at["lodging_score", "higher_is_better"]
    assert "lodging_score" in session.settings().lower_is_better
    column = grid.model.trait_column("lodging_score")
    assert grid.model.headerData(column, Qt.Orientation.Horizontal).startswith("lodging_score")
    assert grid.model.index(0, column).data() == ""
    session.set_value("101", "lodging_score", 3.0)
    assert session.trial.values().at["101", "lodging_score"] == 3.0
    for name, words in (("plot", "a plot field"), ("Grain_Yield", "a trait"), ("  ", "name")):
        panel.new_trait.setText(name)
        qtbot.keyClick(panel.new_trait, Qt.Key.Key_Return)
        assert words in panel.message.text()
    assert len(session.trial.traits()) == len(traits)
