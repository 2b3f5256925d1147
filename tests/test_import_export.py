"""Field book -> trial file -> field book, re-imports, blank field books, and analysing a trial.

The references here are the input files themselves (a round trip must give back exactly the values
that went in) and the analysis of the same data read straight from the field book.
"""

from __future__ import annotations

import hashlib
import json
import shutil

import numpy as np
import openpyxl
import pandas as pd
import pytest
from numpy.testing import assert_allclose, assert_array_equal

from trialdesk.core import DEMO_SETTINGS, analyze, demo_fieldbook_path, read_fieldbook
from trialdesk.core.exporter import export_fieldbook
from trialdesk.core.trial_fieldbook import fieldbook_from_trial
from trialdesk.core.trialfile import TrialFile
from trialdesk.desktop.launcher import main


def fingerprint(path):
    return hashlib.sha256(path.read_bytes()).hexdigest(), path.stat().st_mtime_ns


def same_books(a, b):
    assert list(a.plots["plot"]) == list(b.plots["plot"])
    assert list(a.plots["entry"]) == list(b.plots["entry"])
    assert list(a.plots["block"]) == list(b.plots["block"])
    assert a.traits == b.traits
    for trait in a.traits:
        # Exactly the same numbers: no tolerance.
        assert_array_equal(a.values[trait].to_numpy(), b.values[trait].to_numpy())


@pytest.fixture
def demo_csv(tmp_path):
    path = tmp_path / "demo.csv"
    shutil.copy(demo_fieldbook_path(), path)
    return path


def demo_xlsx(tmp_path):
    frame = pd.read_csv(demo_fieldbook_path())
    path = tmp_path / "demo.xlsx"
    frame.to_excel(path, index=False, sheet_name="AYT")
    return path


def test_csv_round_trip_and_source_untouched(tmp_path, demo_csv, capsys):
    before = fingerprint(demo_csv)
    trial = tmp_path / "demo.trial"
    assert main(["import", str(demo_csv), "--output", str(trial), "--check", "CHK-1",
                 "--check", "CHK-2", "--lower-is-better", "heading_days"]) == 0
    report = capsys.readouterr().out
    assert "100 plots, 25 entries, 4 blocks, 4 traits" in report
    assert "grain_yield: 2 missing" in report
    assert fingerprint(demo_csv) == before
    out = tmp_path / "back.csv"
    assert main(["export", str(trial), "--output", str(out)]) == 0
    same_books(read_fieldbook(demo_csv), read_fieldbook(out))
    # The demo's values are written in their shortest form, so here even the text comes back
    # cell for cell (the block column is written under the name "block").
    exported = pd.read_csv(out, dtype=str)
    original = pd.read_csv(demo_csv, dtype=str).rename(columns={"rep": "block"})
    assert exported.equals(original[exported.columns])


def test_xlsx_round_trip(tmp_path):
    source = demo_xlsx(tmp_path)
    before = fingerprint(source)
    trial = tmp_path / "x.trial"
    assert main(["import", str(source), "--sheet", "AYT", "--output", str(trial)]) == 0
    out = tmp_path / "back.xlsx"
    assert main(["export", str(trial), "--output", str(out)]) == 0
    same_books(read_fieldbook(source, sheet="AYT"), read_fieldbook(out))
    assert fingerprint(source) == before
    sheet = openpyxl.load_workbook(out).active
    assert sheet.print_title_rows == "$1:$1" and sheet.freeze_panes == "A2"


def test_analysing_a_trial_equals_analysing_its_field_book(tmp_path, demo_csv, capsys):
    trial = tmp_path / "demo.trial"
    main(["import", str(demo_csv), "--output", str(trial), "--check", "CHK-1", "--check",
          "CHK-2", "--lower-is-better", "heading_days"])
    capsys.readouterr()
    # The checks and directions saved in the trial are used without naming them again.
    assert main(["analyze", str(trial), "--json", "-"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["checks"] == ["CHK-1", "CHK-2"]
    reference = analyze(read_fieldbook(demo_csv), DEMO_SETTINGS)
    for ours, ref in zip(doc["traits"], reference.traits, strict=True):
        assert ours["trait"] == ref.trait
        assert_allclose(ours["lsd"], ref.lsd, rtol=1e-12)
        assert [e["entry"] for e in ours["entries"]] == [e.entry for e in ref.entries]
        assert [e["letters"] for e in ours["entries"]] == [e.letters for e in ref.entries]
    # An option on the command line wins over the saved settings.
    assert main(["analyze", str(trial), "--method", "holm", "--json", "-"]) == 0
    assert json.loads(capsys.readouterr().out)["method"] == "holm"


def test_reimport_shows_changes_first_and_applies_them_as_one_undoable_edit(
        tmp_path, demo_csv, capsys):
    trial_path = tmp_path / "demo.trial"
    main(["import", str(demo_csv), "--output", str(trial_path)])
    frame = pd.read_csv(demo_csv)
    frame.loc[frame["plot"] == 101, "grain_yield"] = 5.55
    frame.loc[frame["plot"] == 102, "test_weight"] = 70.1
    corrected = tmp_path / "corrected.csv"
    frame.to_csv(corrected, index=False)
    capsys.readouterr()
    assert main(["import", str(corrected), "--output", str(trial_path)]) == 0
    shown = capsys.readouterr().out
    assert "2 values would change" in shown and "plot 101, grain_yield: 5.2 -> 5.55" in shown
    assert "Nothing was changed" in shown
    with TrialFile.open(trial_path, read_only=True) as trial:
        assert trial.values().at["101", "grain_yield"] == 5.2
    assert main(["import", str(corrected), "--output", str(trial_path), "--apply"]) == 0
    with TrialFile.open(trial_path) as trial:
        assert trial.values().at["101", "grain_yield"] == 5.55
        assert trial.values().at["102", "test_weight"] == 70.1
        assert trial.undo()
        assert trial.values().at["101", "grain_yield"] == 5.2
        assert trial.values().at["102", "test_weight"] == 76.2


def test_reimport_refuses_a_changed_layout(tmp_path, demo_csv, capsys):
    trial_path = tmp_path / "demo.trial"
    main(["import", str(demo_csv), "--output", str(trial_path)])
    frame = pd.read_csv(demo_csv)
    frame.loc[0, "entry"] = "TC26-999"
    other = tmp_path / "other.csv"
    frame.to_csv(other, index=False)
    assert main(["import", str(other), "--output", str(trial_path)]) == 2
    assert "plot 101 holds entry 'TC26-999'" in capsys.readouterr().err


def test_blank_field_book_for_data_collection(tmp_path, demo_csv):
    trial_path = tmp_path / "demo.trial"
    main(["import", str(demo_csv), "--output", str(trial_path)])
    out = tmp_path / "blank.xlsx"
    assert main(["export", str(trial_path), "--output", str(out), "--blank"]) == 0
    sheet = openpyxl.load_workbook(out).active
    rows = list(sheet.iter_rows(values_only=True))
    assert rows[0][:6] == ("plot", "block", "row", "column", "entry", "grain_yield")
    assert rows[0][-1] == "notes"
    source = pd.read_csv(demo_csv)
    assert [str(r[0]) for r in rows[1:]] == source["plot"].astype(str).tolist()  # field order
    assert [r[4] for r in rows[1:]] == source["entry"].tolist()
    assert all(v is None for r in rows[1:] for v in r[5:])
    assert sheet.print_title_rows == "$1:$1"


def test_formula_looking_entry_codes_stay_text(tmp_path):
    rows = [{"rep": b, "entry": e, "y": v}
            for b in (1, 2) for e, v in (("=1+2", 5.0), ("-12", 6.0), ("@x", 5.5))]
    source = tmp_path / "odd.csv"
    pd.DataFrame(rows).to_csv(source, index=False)
    trial = tmp_path / "odd.trial"
    assert main(["import", str(source), "--output", str(trial)]) == 0
    out = tmp_path / "odd.xlsx"
    assert main(["export", str(trial), "--output", str(out)]) == 0
    sheet = openpyxl.load_workbook(out).active
    cells = [row[2] for row in sheet.iter_rows(min_row=2)]
    assert [c.value for c in cells] == ["=1+2", "-12", "@x"] * 2
    assert all(c.data_type == "s" for c in cells)


def test_grain_yield_from_plot_weight_and_moisture(tmp_path, capsys):
    # Hand-computed (common practice; Y_std = Y_obs (100 - M_obs) / (100 - M_std)):
    # 5.40 kg on 6.0 m2 is 0.9 kg/m2 = 9.0 t/ha; at 18 % moisture to 13.5 %: 9.0 x 82 / 86.5.
    rows = [{"rep": b, "entry": e, "plot_weight": w, "moisture": m}
            for b, (w, m) in enumerate([(5.40, 18.0), (4.80, 14.0), (5.10, 13.5), (4.95, 16.0)])
            for e in ("A", "B")]
    rows[3]["plot_weight"] += 0.3
    source = tmp_path / "weights.csv"
    pd.DataFrame(rows).to_csv(source, index=False)
    trial_path = tmp_path / "w.trial"
    assert main(["import", str(source), "--output", str(trial_path), "--plot-area", "6",
                 "--standard-moisture", "13.5", "--yield-from", "plot_weight", "--moisture",
                 "moisture"]) == 0
    with TrialFile.open(trial_path, read_only=True) as trial:
        book = fieldbook_from_trial(trial)
    y = book.values["grain_yield"].to_numpy()
    assert_allclose(y[0], 9.0 * 82 / 86.5, rtol=1e-12)
    expected = [w / 6 * 10 * (100 - m) / 86.5 for w, m in
                zip([r["plot_weight"] for r in rows], [r["moisture"] for r in rows], strict=True)]
    assert_allclose(y, expected, rtol=1e-12)
    capsys.readouterr()
    assert main(["analyze", str(trial_path), "--trait", "grain_yield", "--json", "-"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert_allclose(doc["traits"][0]["grand_mean"], np.mean(expected), rtol=1e-12)
    # The report says which conversion was used.
    assert "adjusted to 13.5% moisture" in doc["notes"][0]
    assert "harvested area of 6 m2" in doc["notes"][0]


def test_crop_defaults_are_stored_with_the_trial(tmp_path, capsys):
    rows = [{"rep": b, "entry": e, "plot_weight": 4.0 + b * 0.1 + (e == "B") * 0.3,
             "moisture": 20.0} for b in (1, 2, 3) for e in ("A", "B")]
    source = tmp_path / "maize.csv"
    pd.DataFrame(rows).to_csv(source, index=False)
    trial_path = tmp_path / "m.trial"
    assert main(["import", str(source), "--output", str(trial_path), "--crop", "maize",
                 "--plot-area", "7.5", "--yield-from", "plot_weight", "--moisture", "moisture",
                 "--yield-unit", "bu/ac"]) == 0
    with TrialFile.open(trial_path, read_only=True) as trial:
        facts = trial.facts()
        # Maize defaults (common practice): 15.5 % standard moisture, 56 lb per bushel.
        assert facts["standard_moisture_pct"] == 15.5 and facts["test_weight"] == 56
        y = fieldbook_from_trial(trial).values["grain_yield"].to_numpy()
    # 4.1 kg / 7.5 m2 = 0.54667 kg/m2 = 5466.7 kg/ha; / (56 x 0.45359237) kg/bu x 0.40468564
    # ha/ac (1 acre = 4046.8564224 m2 exactly) = 87.09 bu/ac; x (100 - 20) / (100 - 15.5).
    kg_ha = 4.1 / 7.5 * 10_000
    assert_allclose(y[0], kg_ha / (56 * 0.45359237) * 0.40468564224 * 80 / 84.5, rtol=1e-12)


def test_import_never_leaves_half_a_trial(tmp_path, capsys):
    source = tmp_path / "bad.csv"
    source.write_text("entry,rep,y\nA,1,5\nB,1,x7\n", encoding="utf-8")
    trial = tmp_path / "bad.trial"
    assert main(["import", str(source), "--output", str(trial)]) == 2
    assert "x7" in capsys.readouterr().err
    assert not trial.exists()


def test_export_of_the_trial_analysed_matches_the_checksum(tmp_path, demo_csv):
    trial_path = tmp_path / "demo.trial"
    main(["import", str(demo_csv), "--output", str(trial_path)])
    with TrialFile.open(trial_path, read_only=True) as trial:
        first = fieldbook_from_trial(trial).sha256
        assert fieldbook_from_trial(trial).sha256 == first  # stable
    with TrialFile.open(trial_path) as trial:
        trial.set_value("101", "grain_yield", 5.3)
        assert fieldbook_from_trial(trial).sha256 != first
        export_fieldbook(trial, tmp_path / "after.csv")
    assert pd.read_csv(tmp_path / "after.csv").loc[0, "grain_yield"] == 5.3


def test_import_reports_suspicious_values(tmp_path, capsys):
    # A negative plot weight cannot be right, and 52 % grain moisture is outside the usual 5-40 %
    # (common practice): the import report says so, naming plot and trait, and keeps the values.
    rows = [{"plot": 10 * b + i, "rep": b, "entry": e, "plot_weight": 4.0, "moisture": 14.0}
            for b in (1, 2) for i, e in enumerate(("A", "B", "C"))]
    rows[1]["plot_weight"] = -4.1
    rows[4]["moisture"] = 52.0
    source = tmp_path / "odd_values.csv"
    pd.DataFrame(rows).to_csv(source, index=False)
    trial = tmp_path / "odd.trial"
    assert main(["import", str(source), "--output", str(trial), "--plot-area", "6",
                 "--yield-from", "plot_weight", "--moisture", "moisture"]) == 0
    out = capsys.readouterr().out
    assert "error: plot 11, plot_weight" in out
    assert "warning: plot 21, moisture" in out
    with TrialFile.open(trial, read_only=True) as opened:
        assert opened.values().at["11", "plot_weight"] == -4.1
