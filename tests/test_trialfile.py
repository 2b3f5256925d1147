"""The trial file: round trips, schema versions, refusing foreign files, the lock, undo and redo,
and the append-only journal. The kill test (power cut in the middle of edits) is in
test_trialfile_kill.py."""

from __future__ import annotations

import datetime as dt
import getpass
import json
import os
import signal
import socket
import sqlite3
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from pandas.testing import assert_frame_equal

from trialdesk.core.errors import TrialInputError
from trialdesk.core.trialfile import FACTS, SCHEMA_VERSION, TrialFile, TrialLockedError
from trialdesk.core.version import VERSION

# An invented trial: three test entries and a check in two blocks of four plots.
YIELD_RECIPE = {"kind": "grain_yield", "weight": "plot_weight", "weight_unit": "kg",
                "moisture": "moisture", "unit": "t/ha"}
ENTRIES = pd.DataFrame({
    "code": pd.Series(["E1", "E2", "E3", "C1"], dtype="str"),
    "name": pd.Series(["Line one", "Line two", None, "Standard"], dtype="str"),
    "role": pd.Series(["test", "test", "test", "check"], dtype="str"),
    "origin": pd.Series(["A/B", None, "C/D//E", "released variety"], dtype="str"),
})
PLOTS = pd.DataFrame({
    "plot": pd.Series(["101", "102", "103", "104", "201", "202", "203", "204"], dtype="str"),
    "block": pd.Series(["1"] * 4 + ["2"] * 4, dtype="str"),
    "incomplete_block": pd.Series([None] * 8, dtype="str"),
    "row": pd.array([1, 1, 1, 1, 2, 2, 2, 2], dtype="Int64"),
    "column": pd.array([1, 2, 3, 4, 4, 3, 2, None], dtype="Int64"),
    "entry": pd.Series(["E1", "E2", "E3", "C1", "C1", "E3", "E2", "E1"], dtype="str"),
})
TRAITS = pd.DataFrame({
    "name": pd.Series(["plot_weight", "moisture", "grain_yield"], dtype="str"),
    "unit": pd.Series(["kg", "%", "t/ha"], dtype="str"),
    "decimals": pd.array([3, 1, 2], dtype="Int64"),
    "low": [0.0, 5.0, np.nan],
    "high": [20.0, 40.0, np.nan],
    "higher_is_better": [True, False, True],
    "derivation": pd.Series([None, None, YIELD_RECIPE], dtype=object),
})
VALUES = pd.DataFrame(
    {"plot_weight": [4.125, 3.9, np.nan, 4.4, 4.0, 3.75, 4.05, 4.2],
     "moisture": [13.2, 13.9, 14.1, np.nan, 12.8, 13.0, 13.5, 13.3],
     "grain_yield": [np.nan] * 8},
    index=pd.Index(PLOTS["plot"], dtype="str", name="plot"),
)
VALUES.columns = pd.Index(VALUES.columns, dtype="str")


@pytest.fixture(autouse=True)
def _trial_files_intact(tmp_path):
    """After every test, each trial file it left behind passes SQLite's integrity check."""
    yield
    for path in tmp_path.glob("*.trial"):
        if not path.read_bytes().startswith(b"SQLite format 3\x00"):
            continue  # a test's deliberately foreign file
        with sqlite3.connect(f"{path.as_uri()}?mode=ro", uri=True) as raw:
            if raw.execute("SELECT name FROM sqlite_master WHERE name = 'trial_meta'").fetchone():
                assert raw.execute("PRAGMA integrity_check").fetchall() == [("ok",)], path
        raw.close()


def _loaded(path: Path) -> TrialFile:
    trial = TrialFile.create(path, name="Wheat advanced 2026", facts={"design": "rcbd"})
    trial.load_plots(entries=ENTRIES, plots=PLOTS, traits=TRAITS, values=VALUES,
                     source="wheat-2026.xlsx")
    return trial


@pytest.fixture
def trial(tmp_path):
    with _loaded(tmp_path / "wheat.trial") as handle:
        yield handle


def _raw(path: Path) -> sqlite3.Connection:
    return sqlite3.connect(path, isolation_level=None)


# -- creating, schema, pragmas -----------------------------------------------------------------


def test_new_file_records_its_schema_in_header_and_table(tmp_path):
    path = tmp_path / "new.trial"
    TrialFile.create(path, name="N").close()
    raw = _raw(path)
    meta = dict(raw.execute("SELECT key, value FROM trial_meta"))
    assert raw.execute("PRAGMA user_version").fetchone()[0] == SCHEMA_VERSION == 1
    assert meta["format"] == "trialdesk trial"
    assert meta["schema_version"] == "1"
    assert meta["created_with"] == VERSION
    assert dt.datetime.fromisoformat(meta["created_at"]).utcoffset() == dt.timedelta(0)
    assert raw.execute("PRAGMA journal_mode").fetchone()[0] == "wal"  # kept in the file
    tables = {name for (name,) in raw.execute("SELECT name FROM sqlite_master WHERE type='table'")}
    assert tables == {"trial_meta", "trial", "entries", "plots", "traits", "plot_values",
                      "settings", "journal"}
    raw.close()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["new.trial"]  # nothing left beside it


def test_editing_connection_is_durable_and_checks_references(trial):
    # SQLite's PRAGMA synchronous: 2 is FULL. These are per connection, so read them from ours.
    assert trial._conn.execute("PRAGMA synchronous").fetchone()[0] == 2
    assert trial._conn.execute("PRAGMA foreign_keys").fetchone()[0] == 1
    assert trial._conn.execute("PRAGMA journal_mode").fetchone()[0] == "wal"


def test_create_refuses_an_existing_path_and_leaves_it_alone(tmp_path):
    path = tmp_path / "taken.trial"
    path.write_bytes(b"someone's notes")
    with pytest.raises(TrialInputError, match="already exists"):
        TrialFile.create(path, name="N")
    assert path.read_bytes() == b"someone's notes"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["taken.trial"]  # no lock, no leftover


@pytest.mark.parametrize("name, message", [
    ("trial.sqlite", "must end in .trial"),
    ("missing/trial.trial", "folder .* does not exist"),
], ids=["wrong extension", "no folder"])
def test_create_refuses_a_bad_path(tmp_path, name, message):
    with pytest.raises(TrialInputError, match=message):
        TrialFile.create(tmp_path / name, name="N")


# -- round trips --------------------------------------------------------------------------------


def test_facts_round_trip(tmp_path):
    path = tmp_path / "facts.trial"
    given = {"station": "North farm", "season": "2026", "crop": "wheat", "design": "crd",
             "sowing_date": dt.date(2026, 4, 2), "harvest_date": "2026-08-20",
             "plot_length_m": 5.0, "plot_width_m": 1.2, "harvested_area_m2": 4.8,
             "standard_moisture_pct": 13.5, "test_weight": 60, "notes": "late frost in May",
             "layout_seed": 20260402}
    TrialFile.create(path, name="Facts", facts=given).close()
    with TrialFile.open(path) as trial:
        facts = trial.facts()
        assert list(facts) == list(FACTS)
        assert facts == {**given, "name": "Facts", "sowing_date": "2026-04-02",
                         "test_weight": 60.0}
        trial.set_facts(notes=None, design="rcbd", plot_width_m=1.25)
    with TrialFile.open(path, read_only=True) as trial:
        assert trial.facts()["notes"] is None
        assert trial.facts()["design"] == "rcbd"
        assert trial.facts()["plot_width_m"] == 1.25


def test_unset_facts_are_none(tmp_path):
    with TrialFile.create(tmp_path / "bare.trial", name="Bare") as trial:
        assert trial.facts() == {**dict.fromkeys(FACTS), "name": "Bare"}


@pytest.mark.parametrize("facts, message", [
    ({"design": "lattice"}, "design is one of rcbd, crd, alpha"),
    ({"sowing_date": "2 April"}, "must be a date"),
    ({"sowing_date": dt.datetime(2026, 4, 2, 8, 0)}, "must be a date"),
    ({"harvested_area_m2": 0}, "must be above 0"),
    ({"standard_moisture_pct": 100}, "percentage"),
    ({"layout_seed": 1.5}, "whole number"),
    ({"plot_length_m": "5"}, "must be a number"),
    ({"yield_unit": "t/ha"}, "no fact 'yield_unit'"),
    ({"name": ""}, "non-empty text"),
], ids=["design", "date text", "date and time", "area", "moisture", "seed", "length text",
        "unknown", "empty name"])
def test_bad_facts_are_refused(trial, facts, message):
    before = trial.facts()
    with pytest.raises(TrialInputError, match=message):
        trial.set_facts(**facts)
    assert trial.facts() == before


def test_tables_round_trip_through_an_import(trial, tmp_path):
    assert_frame_equal(trial.entries(), ENTRIES)
    assert_frame_equal(trial.plots(), PLOTS)
    assert_frame_equal(trial.traits(), TRAITS)
    assert_frame_equal(trial.values(), VALUES)
    assert trial.traits()["derivation"][2] == YIELD_RECIPE
    trial.close()
    with TrialFile.open(trial.path, read_only=True) as again:  # and from another handle
        assert_frame_equal(again.values(), VALUES)
        copy = TrialFile.create(tmp_path / "copy.trial", name="Copy")
        copy.load_plots(entries=again.entries(), plots=again.plots(), traits=again.traits(),
                        values=again.values())
    with copy:
        assert_frame_equal(copy.plots(), PLOTS)
        assert_frame_equal(copy.traits(), TRAITS)
        assert_frame_equal(copy.values(), VALUES)


def test_import_is_one_journal_record(trial):
    journal = trial.journal()
    assert len(journal) == 1
    record = journal.iloc[0]
    assert record["kind"] == "import"
    assert record["target"] == {"source": "wheat-2026.xlsx"}
    assert record["new"] == {"entries": 4, "plots": 8, "traits": 3, "values": 14}
    assert record["who"] == getpass.getuser()


def test_an_import_fills_only_an_empty_trial(trial):
    with pytest.raises(TrialInputError, match="already has entries"):
        trial.load_plots(entries=ENTRIES, plots=PLOTS, traits=TRAITS, values=VALUES)


@pytest.mark.parametrize("change, message", [
    (lambda e, p, t, v: (e.assign(code=["E1", "E1", "E3", "C1"]), p, t, v),
     "entry code 'E1' appears more than once"),
    (lambda e, p, t, v: (e, p.assign(entry=["E9"] + p["entry"].tolist()[1:]), t, v),
     "plot 101: the entry 'E9' is not among the entries"),
    (lambda e, p, t, v: (e, p.assign(plot=["101"] * 8), t, v), "plot '101' appears more"),
    (lambda e, p, t, v: (e, p, t, v.rename(index={"204": "999"})), "plot '999'"),
    (lambda e, p, t, v: (e, p, t, v.assign(height=1.0)), "column 'height'"),
    (lambda e, p, t, v: (e, p, t, v.assign(moisture="wet")), "'wet' is not a number"),
    (lambda e, p, t, v: (e, p, t, v.assign(moisture=np.inf)), "finite"),
    (lambda e, p, t, v: (e.assign(role="control"), p, t, v), "role is 'test' or 'check'"),
    (lambda e, p, t, v: (e.rename(columns={"origin": "orgin"}), p, t, v), "column 'orgin'"),
    (lambda e, p, t, v: (e, p.assign(row=1.5), t, v), "field row must be a whole number"),
    (lambda e, p, t, v: (e, p, t.assign(low=[30.0, 5.0, None]), v), "low .* is above high"),
    (lambda e, p, t, v: (e, p, t.assign(decimals=[-1, 1, 2]), v), "0 or more"),
], ids=["duplicate entry", "unknown entry", "duplicate plot", "values for unknown plot",
        "values for unknown trait", "text value", "infinite value", "bad role",
        "misspelt column", "fractional row", "inverted range", "negative decimals"])
def test_inconsistent_import_is_refused_and_nothing_is_loaded(tmp_path, change, message):
    with TrialFile.create(tmp_path / "bad.trial", name="Bad") as trial:
        entries, plots, traits, values = change(ENTRIES.copy(), PLOTS.copy(), TRAITS.copy(),
                                                VALUES.copy())
        with pytest.raises(TrialInputError, match=message):
            trial.load_plots(entries=entries, plots=plots, traits=traits, values=values)
        assert trial.entries().empty and trial.plots().empty and trial.journal().empty


def test_values_are_stored_as_given_and_nan_is_missing(trial):
    trial.set_value("101", "grain_yield", 6.123456789012345)
    trial.set_value("102", "grain_yield", np.float32(2.5))
    trial.set_value("103", "grain_yield", 7)
    trial.set_value("101", "moisture", float("nan"))
    values = trial.values()
    assert values.loc["101", "grain_yield"] == 6.123456789012345  # full precision, not rounded
    assert values.loc["102", "grain_yield"] == 2.5
    assert values.loc["103", "grain_yield"] == 7.0
    assert np.isnan(values.loc["101", "moisture"])
    assert values.dtypes.tolist() == [np.float64] * 3
    assert values.loc["104", "moisture"] != values.loc["104", "moisture"]  # still missing


def test_notes_round_trip_and_survive_value_edits(trial):
    trial.set_value("101", "plot_weight", 4.2, note="bird damage")
    trial.set_value("101", "plot_weight", 4.3)  # the note stays
    trial.set_value("203", "moisture", None, note="sample lost")
    assert trial.notes() == {("101", "plot_weight"): "bird damage",
                             ("203", "moisture"): "sample lost"}
    trial.set_value("101", "plot_weight", 4.3, note=None)
    assert trial.notes() == {("203", "moisture"): "sample lost"}
    assert np.isnan(trial.values().loc["203", "moisture"])


def test_entries_and_traits_upsert_round_trip(trial):
    trial.upsert_entry("C2", name="Second standard", role="check", origin="released variety")
    trial.upsert_entry("E2", origin="F/G")
    trial.upsert_entry("E1", name="")  # an empty string clears a name
    entries = trial.entries()
    assert entries["code"].tolist() == ["E1", "E2", "E3", "C1", "C2"]
    assert entries.loc[4].tolist() == ["C2", "Second standard", "check", "released variety"]
    assert entries.loc[1, "origin"] == "F/G" and entries.loc[1, "name"] == "Line two"
    assert pd.isna(entries.loc[0, "name"])

    trial.upsert_trait("height", unit="cm", decimals=0, low=30, high=150)
    trial.upsert_trait("moisture", higher_is_better=True, low=None)
    traits = trial.traits().set_index("name")
    assert traits.index.tolist() == ["plot_weight", "moisture", "grain_yield", "height"]
    assert traits.loc["height", "low"] == 30.0 and traits.loc["height", "decimals"] == 0
    assert bool(traits.loc["height", "higher_is_better"])  # a new trait's default
    assert np.isnan(traits.loc["moisture", "low"]) and traits.loc["moisture", "high"] == 40.0
    assert bool(traits.loc["moisture", "higher_is_better"])
    assert trial.values()["height"].isna().all()


def test_update_plot_round_trip(trial):
    trial.update_plot("203", entry="E1", incomplete_block="3", column=None)
    row = trial.plots().set_index("plot").loc["203"]
    assert row["entry"] == "E1" and row["incomplete_block"] == "3" and pd.isna(row["column"])
    with pytest.raises(TrialInputError, match="no entry 'E7'"):
        trial.update_plot("203", entry="E7")
    with pytest.raises(TrialInputError, match="no field 'rep'"):
        trial.update_plot("203", rep="1")


def test_settings_round_trip(trial):
    assert trial.settings() is None
    settings = {"alpha": 0.05, "method": "tukey", "traits": ["plot_weight"], "checks": ("C1",)}
    trial.save_settings(settings)
    trial.save_settings({"alpha": 0.01}, name="strict")
    assert trial.settings() == {**settings, "checks": ["C1"]}  # JSON: a tuple comes back a list
    assert trial.settings("strict") == {"alpha": 0.01}
    with pytest.raises(TrialInputError, match="cannot be kept"):
        trial.save_settings({"alpha": float("nan")})
    with pytest.raises(TrialInputError, match="cannot be kept"):
        trial.save_settings({"when": dt.date(2026, 1, 1)})


def test_journal_records_who_what_and_when(trial):
    trial.set_value("101", "plot_weight", 4.5)
    trial.set_facts(station="South farm")
    trial.upsert_entry("E4", name="Line four")
    journal = trial.journal()
    assert journal["kind"].tolist() == ["import", "value", "fact", "entry"]
    assert journal["group_id"].tolist() == [1, 2, 3, 4]
    value = journal.iloc[1]
    assert value["target"] == {"plot": "101", "trait": "plot_weight"}
    assert value["old"] == {"value": 4.125, "note": None}
    assert value["new"] == {"value": 4.5, "note": None}
    assert journal.iloc[2][["target", "old", "new"]].tolist() == [
        {"fact": "station"}, None, "South farm"]
    assert journal.iloc[3]["old"] is None
    assert journal.iloc[3]["new"] == {"name": "Line four", "role": "test", "origin": None,
                                      "position": 4}
    stamp = dt.datetime.fromisoformat(journal.iloc[1]["timestamp"])
    assert stamp.utcoffset() == dt.timedelta(0)
    assert abs(dt.datetime.now(dt.UTC) - stamp) < dt.timedelta(minutes=5)
    assert trial.journal(limit=2)["kind"].tolist() == ["fact", "entry"]
    assert trial.journal(limit=0).empty


def test_an_edit_that_changes_nothing_is_not_journalled(trial):
    trial.set_value("101", "plot_weight", 4.125)
    trial.set_facts(design="rcbd")
    trial.upsert_entry("E1", name="Line one")
    trial.set_values([])
    assert len(trial.journal()) == 1


# -- validation of writes -----------------------------------------------------------------------


@pytest.mark.parametrize("call, message", [
    (lambda t: t.set_value("999", "plot_weight", 1.0), "no plot '999'"),
    (lambda t: t.set_value(101, "plot_weight", 1.0), "no plot 101"),
    (lambda t: t.set_value("101", "yield", 1.0), "no trait 'yield'"),
    (lambda t: t.set_value("101", "moisture", "13,2"), "'13,2' is not a number"),
    (lambda t: t.set_value("101", "moisture", True), "True is not a number"),
    (lambda t: t.set_value("101", "moisture", float("inf")), "not a finite number"),
    (lambda t: t.set_values([("101", "moisture", 1.0), ("102", "mosture", 2.0)]),
     "no trait 'mosture'"),
    (lambda t: t.set_values([("101", "moisture")]), r"each change is \(plot, trait, value\)"),
    (lambda t: t.update_plot("999", block="1"), "no plot '999'"),
    (lambda t: t.upsert_entry("E1", role="standard"), "'test' or 'check'"),
    (lambda t: t.upsert_entry(""), "entry code must be non-empty"),
    (lambda t: t.upsert_trait("height", colour="red"), "no field 'colour'"),
    (lambda t: t.upsert_trait("height", derivation="sum"), "must be a dict"),
    (lambda t: t.upsert_trait("height", higher_is_better=1), "True or False"),
    (lambda t: t.upsert_trait("moisture", high=1.0), "low .* is above high"),
    (lambda t: t.journal(limit=-1), "limit"),
], ids=["unknown plot", "plot as a number", "unknown trait", "text value", "bool value",
        "infinite value", "paste with a bad trait", "paste of pairs", "update unknown plot",
        "bad role", "empty code", "unknown trait field", "derivation text", "flag as number",
        "inverted range", "negative limit"])
def test_bad_writes_are_refused_and_change_nothing(trial, call, message):
    before = (trial.values(), trial.entries(), trial.traits(), trial.plots(), trial.journal())
    with pytest.raises(TrialInputError, match=message):
        call(trial)
    after = (trial.values(), trial.entries(), trial.traits(), trial.plots(), trial.journal())
    for old, new in zip(before, after, strict=True):
        assert_frame_equal(old, new)


def test_a_read_only_handle_reads_but_never_writes(trial):
    with TrialFile.open(trial.path, read_only=True) as reader:
        assert_frame_equal(reader.values(), trial.values())
        trial.set_value("101", "plot_weight", 9.5)  # the other handle sees it at once
        assert reader.values().loc["101", "plot_weight"] == 9.5
        assert not reader.can_undo() and not reader.can_redo()
        for write in (lambda: reader.set_value("101", "plot_weight", 1.0),
                      lambda: reader.set_facts(station="x"), reader.undo,
                      lambda: reader.save_settings({})):
            with pytest.raises(TrialInputError, match="opened read-only"):
                write()


def test_a_closed_handle_refuses_everything(trial):
    trial.close()
    trial.close()  # twice is harmless
    for call in (trial.values, trial.facts, lambda: trial.set_value("101", "moisture", 1.0)):
        with pytest.raises(TrialInputError, match="has been closed"):
            call()
    assert not trial.can_undo()


# -- schema versions and foreign files ----------------------------------------------------------

# The layout of schema version 0, written out by hand: traits have no derivation column and
# there is no settings table. Everything else is as in version 1.
VERSION_0 = [
    "CREATE TABLE trial_meta (key TEXT PRIMARY KEY NOT NULL, value TEXT NOT NULL)",
    """CREATE TABLE trial (id INTEGER PRIMARY KEY CHECK (id = 1),
        name TEXT NOT NULL CHECK (name <> ''), station TEXT, season TEXT, crop TEXT,
        design TEXT, sowing_date TEXT, harvest_date TEXT, plot_length_m REAL,
        plot_width_m REAL, harvested_area_m2 REAL, standard_moisture_pct REAL,
        test_weight REAL, notes TEXT, layout_seed INTEGER)""",
    """CREATE TABLE entries (code TEXT PRIMARY KEY NOT NULL CHECK (code <> ''), name TEXT,
        role TEXT NOT NULL DEFAULT 'test' CHECK (role IN ('test', 'check')), origin TEXT,
        position INTEGER NOT NULL UNIQUE)""",
    """CREATE TABLE plots (plot TEXT PRIMARY KEY NOT NULL CHECK (plot <> ''), block TEXT,
        incomplete_block TEXT, field_row INTEGER, field_column INTEGER,
        entry TEXT NOT NULL REFERENCES entries (code), position INTEGER NOT NULL UNIQUE)""",
    "CREATE INDEX plots_entry ON plots (entry)",
    """CREATE TABLE traits (name TEXT PRIMARY KEY NOT NULL CHECK (name <> ''), unit TEXT,
        decimals INTEGER CHECK (decimals >= 0), low REAL, high REAL,
        higher_is_better INTEGER NOT NULL DEFAULT 1 CHECK (higher_is_better IN (0, 1)),
        position INTEGER NOT NULL UNIQUE)""",
    """CREATE TABLE plot_values (plot TEXT NOT NULL REFERENCES plots (plot),
        trait TEXT NOT NULL REFERENCES traits (name), value REAL, note TEXT,
        PRIMARY KEY (plot, trait))""",
    "CREATE INDEX plot_values_trait ON plot_values (trait)",
    """CREATE TABLE journal (id INTEGER PRIMARY KEY, group_id INTEGER NOT NULL,
        timestamp TEXT NOT NULL, kind TEXT NOT NULL, target TEXT NOT NULL, old TEXT NOT NULL,
        new TEXT NOT NULL, who TEXT NOT NULL)""",
    "CREATE INDEX journal_group ON journal (group_id)",
    """CREATE TRIGGER journal_no_update BEFORE UPDATE ON journal
        BEGIN SELECT RAISE(ABORT, 'the change journal is append-only'); END""",
    """CREATE TRIGGER journal_no_delete BEFORE DELETE ON journal
        BEGIN SELECT RAISE(ABORT, 'the change journal is append-only'); END""",
    "INSERT INTO trial_meta VALUES ('format', 'trialdesk trial'), ('schema_version', '0'), "
    "('created_with', '0.0.1'), ('created_at', '2025-05-01T08:00:00.000+00:00')",
    "INSERT INTO trial (id, name, station) VALUES (1, 'Barley 2025', 'Hill station')",
    "INSERT INTO entries VALUES ('B1', 'Barley one', 'test', NULL, 0), "
    "('B2', NULL, 'check', 'old standard', 1)",
    "INSERT INTO plots VALUES ('1', 'I', NULL, 1, 1, 'B1', 0), ('2', 'I', NULL, 1, 2, 'B2', 1)",
    "INSERT INTO traits VALUES ('yield', 't/ha', 2, 0, 12, 1, 0)",
    "INSERT INTO plot_values VALUES ('1', 'yield', 5.25, NULL), ('2', 'yield', 4.5, 'lodged')",
    "INSERT INTO journal VALUES (1, 1, '2025-06-01T09:00:00.000+00:00', 'value', "
    "'{\"plot\": \"2\", \"trait\": \"yield\"}', '{\"value\": 4.0, \"note\": \"lodged\"}', "
    "'{\"value\": 4.5, \"note\": \"lodged\"}', 'ana')",
]


def _write_version_0(path: Path) -> None:
    raw = _raw(path)
    raw.execute("PRAGMA journal_mode = WAL")
    for statement in VERSION_0:
        raw.execute(statement)
    raw.close()


def _layout(path: Path) -> dict:
    """Every table's columns (name, type, not null, default, key) and every index and trigger."""
    raw = _raw(path)
    objects = raw.execute("SELECT type, name FROM sqlite_master ORDER BY name").fetchall()
    columns = {name: raw.execute(f"PRAGMA table_info({name})").fetchall()
               for kind, name in objects if kind == "table"}
    raw.close()
    return {"objects": objects, "columns": columns}


def test_a_version_0_file_is_migrated_keeping_its_data(tmp_path):
    old = tmp_path / "barley.trial"
    _write_version_0(old)
    with TrialFile.open(old) as trial:
        assert trial.facts()["name"] == "Barley 2025"
        assert trial.facts()["station"] == "Hill station"
        assert trial.entries()["code"].tolist() == ["B1", "B2"]
        assert trial.values()["yield"].tolist() == [5.25, 4.5]
        assert trial.notes() == {("2", "yield"): "lodged"}
        assert trial.traits()["derivation"].tolist() == [None]  # the column added in version 1
        assert trial.settings() is None  # the table added in version 1
        trial.save_settings({"alpha": 0.05})
        assert trial.undo()  # the journal of version 0 still drives undo
        assert trial.undo()
        assert trial.values()["yield"].tolist() == [5.25, 4.0]
    raw = _raw(old)
    assert raw.execute("PRAGMA user_version").fetchone()[0] == 1
    meta = dict(raw.execute("SELECT key, value FROM trial_meta"))
    assert meta["schema_version"] == "1" and meta["created_with"] == "0.0.1"
    assert meta["migrated_with"] == VERSION
    raw.close()
    fresh = tmp_path / "fresh.trial"
    TrialFile.create(fresh, name="Fresh").close()
    assert _layout(old) == _layout(fresh)  # an updated file is laid out as a new one


def test_a_version_0_file_cannot_be_read_only_opened(tmp_path):
    old = tmp_path / "barley.trial"
    _write_version_0(old)
    with pytest.raises(TrialInputError, match="older schema 0 .* open it for editing once"):
        TrialFile.open(old, read_only=True)


@pytest.mark.parametrize("read_only", [False, True], ids=["editing", "read-only"])
def test_a_newer_schema_is_refused(tmp_path, read_only):
    path = tmp_path / "future.trial"
    TrialFile.create(path, name="Future").close()
    raw = _raw(path)
    raw.execute("PRAGMA user_version = 3")
    raw.execute("UPDATE trial_meta SET value = '3' WHERE key = 'schema_version'")
    raw.close()
    with pytest.raises(TrialInputError) as caught:
        TrialFile.open(path, read_only=read_only)
    assert str(caught.value) == (f"{path}: this trial was written by a newer Trialdesk (schema "
                                 "3); this one reads up to 1: update Trialdesk")
    assert not (tmp_path / "future.trial.lock").exists()


def test_disagreeing_schema_records_are_reported_as_damage(tmp_path):
    path = tmp_path / "odd.trial"
    TrialFile.create(path, name="Odd").close()
    raw = _raw(path)
    raw.execute("UPDATE trial_meta SET value = '0' WHERE key = 'schema_version'")
    raw.close()
    with pytest.raises(TrialInputError, match="damaged: it records two different schema"):
        TrialFile.open(path)


@pytest.mark.parametrize("content", [b"", b"plot,entry\n101,E1\n", b"PK\x03\x04" + bytes(100)],
                         ids=["empty", "csv", "zip"])
def test_a_file_that_is_not_sqlite_is_refused(tmp_path, content):
    path = tmp_path / "notes.trial"
    path.write_bytes(content)
    for read_only in (False, True):
        with pytest.raises(TrialInputError, match="not a Trialdesk trial file .*not an SQLite"):
            TrialFile.open(path, read_only=read_only)
    assert path.read_bytes() == content


@pytest.mark.parametrize("setup", [
    ["CREATE TABLE orders (id INTEGER, item TEXT)", "INSERT INTO orders VALUES (1, 'seed')"],
    ["CREATE TABLE trial_meta (key TEXT, value TEXT)",
     "INSERT INTO trial_meta VALUES ('format', 'inventory')"],
], ids=["other tables", "other format"])
def test_a_foreign_sqlite_file_is_refused_and_untouched(tmp_path, setup):
    path = tmp_path / "inventory.trial"
    raw = _raw(path)
    for statement in setup:
        raw.execute(statement)
    raw.close()
    before = path.read_bytes()
    for read_only in (False, True):
        with pytest.raises(TrialInputError, match="SQLite database, but not a Trialdesk trial"):
            TrialFile.open(path, read_only=read_only)
    assert path.read_bytes() == before  # not even switched to WAL
    assert sorted(p.name for p in tmp_path.iterdir()) == ["inventory.trial"]


def test_a_missing_file_is_reported(tmp_path):
    with pytest.raises(TrialInputError, match="there is no trial file here"):
        TrialFile.open(tmp_path / "nowhere.trial")


# -- the lock -----------------------------------------------------------------------------------

HOLD = textwrap.dedent("""
    import sys, time
    from trialdesk.core.trialfile import TrialFile
    trial = TrialFile.open(sys.argv[1])
    print("holding", flush=True)
    time.sleep(120)
""")

TRY_OPEN = textwrap.dedent("""
    import json, sys
    from trialdesk.core.trialfile import TrialFile, TrialLockedError
    try:
        TrialFile.open(sys.argv[1]).close()
    except TrialLockedError as error:
        print(json.dumps({"holder": error.holder, "message": str(error)}))
    else:
        print(json.dumps(None))
""")


def _python(script: str, *args: object, **kwargs) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-c", script, *map(str, args)], text=True,
                            stdout=subprocess.PIPE, **kwargs)


def test_another_process_is_told_who_holds_the_trial(trial):
    child = _python(TRY_OPEN, trial.path)
    output, _ = child.communicate(timeout=60)
    refused = json.loads(output)
    assert refused is not None
    assert f"(process {os.getpid()})" in refused["holder"]
    assert refused["holder"].startswith(f"{getpass.getuser()} on {socket.gethostname()} ")
    assert refused["holder"].endswith(" UTC")
    assert "open for editing by" in refused["message"] and "read-only" in refused["message"]


def test_a_killed_holder_leaves_no_lock_behind(tmp_path):
    path = tmp_path / "held.trial"
    _loaded(path).close()
    holder = _python(HOLD, path)
    try:
        assert holder.stdout.readline().strip() == "holding"
        with pytest.raises(TrialLockedError) as caught:
            TrialFile.open(path)
        assert f"(process {holder.pid}) since " in caught.value.holder
        since = caught.value.holder.split(" since ")[1]
        assert dt.datetime.strptime(since, "%Y-%m-%d %H:%M UTC")
        with TrialFile.open(path, read_only=True) as reader:  # reading needs no lock
            assert reader.facts()["name"] == "Wheat advanced 2026"
    finally:
        holder.send_signal(signal.SIGKILL)
        holder.wait(timeout=30)
    with TrialFile.open(path) as trial:  # the system dropped the lock with the process
        trial.set_value("101", "moisture", 14.0)


def test_a_second_handle_in_the_same_process_is_refused(trial):
    with pytest.raises(TrialLockedError, match=f"process {os.getpid()}"):
        TrialFile.open(trial.path)
    trial.close()
    assert not Path(f"{trial.path}.lock").exists()  # a clean close removes the lock file
    TrialFile.open(trial.path).close()


# -- undo and redo ------------------------------------------------------------------------------


def _weights(trial: TrialFile) -> list[float]:
    return trial.values()["plot_weight"].fillna(-1.0).tolist()


def test_undo_and_redo_walk_back_and_forth(trial):
    start = _weights(trial)
    assert not trial.can_undo() and not trial.undo()  # an import cannot be undone
    trial.set_value("101", "plot_weight", 5.0)
    trial.set_values([("102", "plot_weight", 5.1), ("103", "plot_weight", 5.2),
                      ("102", "plot_weight", 5.3)])  # a paste that sets 102 twice
    pasted = _weights(trial)
    assert pasted[:3] == [5.0, 5.3, 5.2]
    assert trial.undo()  # the whole paste at once
    assert _weights(trial) == [5.0, *start[1:]]
    assert trial.undo()
    assert _weights(trial) == start
    assert not trial.can_undo() and trial.can_redo()
    assert trial.redo() and trial.redo()
    assert _weights(trial) == pasted
    assert not trial.can_redo() and not trial.redo()


def test_undo_and_redo_survive_closing_the_file(tmp_path):
    path = tmp_path / "season.trial"
    trial = _loaded(path)
    start = _weights(trial)
    trial.set_value("101", "plot_weight", 5.0)
    trial.set_value("102", "plot_weight", 5.1)
    trial.close()
    with TrialFile.open(path) as trial:
        assert trial.can_undo() and not trial.can_redo()
        assert trial.undo()
        assert _weights(trial)[:2] == [5.0, start[1]]
    with TrialFile.open(path) as trial:
        assert trial.can_redo()
        assert trial.undo()
        assert _weights(trial) == start
    with TrialFile.open(path) as trial:
        assert trial.redo()  # the most recently undone first
        assert _weights(trial)[:2] == [5.0, start[1]]
    with TrialFile.open(path) as trial:
        assert trial.redo()
        assert not trial.can_redo()
        assert _weights(trial)[:2] == [5.0, 5.1]
        kinds = trial.journal()["kind"].tolist()
        assert kinds == ["import", "value", "value", "undo", "undo", "redo", "redo"]
        assert [t["group"] for t in trial.journal()["target"][3:]] == [3, 2, 2, 3]


def test_a_new_edit_after_undo_clears_the_redo_chain(tmp_path):
    path = tmp_path / "chain.trial"
    trial = _loaded(path)
    trial.set_value("101", "plot_weight", 5.0)
    trial.set_value("102", "plot_weight", 5.1)
    trial.undo()
    trial.undo()
    trial.set_value("103", "plot_weight", 5.2)
    assert not trial.can_redo() and not trial.redo()
    trial.close()
    with TrialFile.open(path) as trial:  # the same after a restart
        assert not trial.can_redo()
        assert trial.undo()
        assert not trial.can_undo()  # the two undone edits are gone for good
        assert trial.can_redo()


def test_every_kind_of_edit_undoes(trial):
    before = (trial.facts(), trial.entries(), trial.traits(), trial.plots(), trial.values(),
              trial.notes(), trial.settings())
    trial.set_facts(station="South farm", harvest_date="2026-08-01")
    trial.upsert_entry("E4", name="Line four")
    trial.upsert_entry("C1", role="test", origin="")
    trial.upsert_trait("height", unit="cm", derivation={"kind": "mean", "of": ["h1", "h2"]})
    trial.upsert_trait("plot_weight", unit="g", higher_is_better=False)
    trial.update_plot("204", entry="E4", row=9)
    trial.set_value("204", "height", 95.0, note="measured twice")
    trial.save_settings({"alpha": 0.1})
    trial.save_settings({"alpha": 0.05})
    after = (trial.facts(), trial.entries(), trial.traits(), trial.plots(), trial.values(),
             trial.notes(), trial.settings())
    while trial.undo():
        pass
    _assert_same(before, (trial.facts(), trial.entries(), trial.traits(), trial.plots(),
                          trial.values(), trial.notes(), trial.settings()))
    while trial.redo():
        pass
    _assert_same(after, (trial.facts(), trial.entries(), trial.traits(), trial.plots(),
                         trial.values(), trial.notes(), trial.settings()))


def _assert_same(expected: tuple, actual: tuple) -> None:
    for old, new in zip(expected, actual, strict=True):
        if isinstance(old, pd.DataFrame):
            assert_frame_equal(old, new)
        else:
            assert old == new


def test_nothing_before_an_import_can_be_undone(tmp_path):
    with TrialFile.create(tmp_path / "late.trial", name="Late") as trial:
        trial.set_facts(station="North farm")
        assert trial.can_undo()
        trial.load_plots(entries=ENTRIES, plots=PLOTS, traits=TRAITS, values=VALUES)
        assert not trial.can_undo() and not trial.undo()
        assert trial.facts()["station"] == "North farm"


# -- the journal is append-only -----------------------------------------------------------------


def _journal_rows(path: Path) -> list[tuple]:
    with sqlite3.connect(f"{path.as_uri()}?mode=ro", uri=True) as raw:
        rows = raw.execute("SELECT * FROM journal ORDER BY id").fetchall()
    raw.close()
    return rows


def test_the_journal_only_ever_grows(trial):
    trial.set_value("101", "plot_weight", 5.0)
    trial.set_values([("102", "moisture", 14.0), ("103", "moisture", 14.5)])
    before = _journal_rows(trial.path)
    trial.undo()
    trial.redo()
    trial.undo()
    trial.set_facts(crop="durum wheat")
    trial.save_settings({"alpha": 0.05})
    after = _journal_rows(trial.path)
    assert after[:len(before)] == before  # no row changed, none removed
    assert [row[3] for row in after[len(before):]] == ["undo", "redo", "undo", "fact",
                                                       "settings"]


@pytest.mark.parametrize("statement", [
    "UPDATE journal SET who = 'someone else'", "DELETE FROM journal",
], ids=["update", "delete"])
def test_the_database_itself_refuses_to_rewrite_the_journal(trial, statement):
    trial.set_value("101", "plot_weight", 5.0)
    before = _journal_rows(trial.path)
    raw = _raw(trial.path)
    with pytest.raises(sqlite3.IntegrityError, match="append-only"):
        raw.execute(statement)
    raw.close()
    assert _journal_rows(trial.path) == before
