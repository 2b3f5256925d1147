"""The trial file: Trialdesk's own storage for one trial, an SQLite database ending in ``.trial``.

Every edit is one transaction, committed (and flushed to the disk) before the call returns, and
recorded in an append-only change journal; undo and redo are worked out from that journal, so they
survive closing the program. The file holds plain tables of text and numbers that any SQLite tool
can read; its tables, version history and journal rules are documented in DEVELOPERS.md.

One program at a time may edit a trial: opening for editing takes an operating-system lock on a
side file ``<name>.trial.lock``, which the system drops when the program ends, however it ends.
Opening read-only needs no lock.

Examples
--------
>>> import pathlib, tempfile
>>> folder = tempfile.TemporaryDirectory()
>>> path = pathlib.Path(folder.name) / "wheat-2026.trial"
>>> trial = TrialFile.create(path, name="Wheat advanced 2026", facts={"design": "rcbd"})
>>> trial.load_plots(
...     entries=pd.DataFrame({"code": ["E1", "C1"], "role": ["test", "check"]}),
...     plots=pd.DataFrame({"plot": ["101", "102"], "block": ["1", "1"], "entry": ["E1", "C1"]}),
...     traits=pd.DataFrame({"name": ["grain_yield"], "unit": ["t/ha"]}),
...     values=pd.DataFrame({"grain_yield": [4.2, None]}, index=["101", "102"]))
>>> trial.set_value("102", "grain_yield", 3.9)
>>> trial.close()
>>> with TrialFile.open(path) as trial:  # another day: the edit is there, and can be undone
...     print(trial.values()["grain_yield"].tolist(), trial.undo(),
...           trial.values()["grain_yield"].tolist())
[4.2, 3.9] True [4.2, nan]
>>> folder.cleanup()
"""

from __future__ import annotations

import contextlib
import datetime as dt
import getpass
import itertools
import json
import math
import numbers
import os
import socket
import sqlite3
import sys
import tempfile
import weakref
from collections.abc import Iterable, Iterator, Mapping
from pathlib import Path
from types import EllipsisType
from typing import Any

import numpy as np
import pandas as pd

from trialdesk.core.errors import TrialInputError
from trialdesk.core.version import VERSION

if sys.platform == "win32":
    import msvcrt
else:
    import fcntl

__all__ = ["DESIGNS", "FACTS", "SCHEMA_VERSION", "TRAIT_FIELDS", "TrialFile", "TrialLockedError"]

#: The value of the ``format`` key in ``trial_meta`` that marks an SQLite file as a trial.
FORMAT = "trialdesk trial"

#: Facts about the trial, each a column of the one-row ``trial`` table, and what each holds.
FACTS: dict[str, str] = {
    "name": "text",
    "station": "text",
    "season": "text",
    "crop": "text",
    "design": "design",
    "sowing_date": "date",
    "harvest_date": "date",
    "plot_length_m": "positive",
    "plot_width_m": "positive",
    "harvested_area_m2": "positive",
    "standard_moisture_pct": "percent",
    "test_weight": "positive",  # the bushel weight (lb per bushel) for converting yield to bu/ac
    "notes": "text",
    "layout_seed": "integer",
}

#: Field designs a trial can record.
DESIGNS = ("rcbd", "crd", "alpha")

#: What a trait holds besides its name, and the value a new trait starts with.
TRAIT_FIELDS: dict[str, object] = {
    "unit": None,
    "decimals": None,
    "low": None,
    "high": None,
    "higher_is_better": True,
    "derivation": None,
}

_ROLES = ("test", "check")
_PLOT_FIELDS = ("entry", "block", "incomplete_block", "row", "column")
_SQLITE_MAGIC = b"SQLite format 3\x00"
_BUSY_SECONDS = 5.0  # another SQLite tool writing at the same moment: wait this long, then refuse
_LOCK_ATTEMPTS = 20
_WINDOWS_LOCK_BYTE = 1 << 20  # locked byte, beyond the holder text so others can read that
_BINARY = getattr(os, "O_BINARY", 0)  # Windows opens in text mode without it
_SQLITE_INTEGER = 2**63  # SQLite integers are 64-bit signed
_EXISTS = "a file of this name already exists: open it, or choose another name"

# The first layout of the trial file. Each later version is a list of statements in _MIGRATIONS;
# a new file is built by running this and then every migration, so new and updated files agree.
_BASE_SCHEMA = (
    "CREATE TABLE trial_meta (key TEXT PRIMARY KEY NOT NULL, value TEXT NOT NULL)",
    """CREATE TABLE trial (
        id INTEGER PRIMARY KEY CHECK (id = 1),
        name TEXT NOT NULL CHECK (name <> ''),
        station TEXT, season TEXT, crop TEXT, design TEXT,
        sowing_date TEXT, harvest_date TEXT,
        plot_length_m REAL, plot_width_m REAL, harvested_area_m2 REAL,
        standard_moisture_pct REAL, test_weight REAL,
        notes TEXT, layout_seed INTEGER)""",
    """CREATE TABLE entries (
        code TEXT PRIMARY KEY NOT NULL CHECK (code <> ''),
        name TEXT,
        role TEXT NOT NULL DEFAULT 'test' CHECK (role IN ('test', 'check')),
        origin TEXT,
        position INTEGER NOT NULL UNIQUE)""",
    """CREATE TABLE plots (
        plot TEXT PRIMARY KEY NOT NULL CHECK (plot <> ''),
        block TEXT, incomplete_block TEXT,
        field_row INTEGER, field_column INTEGER,
        entry TEXT NOT NULL REFERENCES entries (code),
        position INTEGER NOT NULL UNIQUE)""",
    "CREATE INDEX plots_entry ON plots (entry)",
    """CREATE TABLE traits (
        name TEXT PRIMARY KEY NOT NULL CHECK (name <> ''),
        unit TEXT,
        decimals INTEGER CHECK (decimals >= 0),
        low REAL, high REAL,
        higher_is_better INTEGER NOT NULL DEFAULT 1 CHECK (higher_is_better IN (0, 1)),
        position INTEGER NOT NULL UNIQUE)""",
    """CREATE TABLE plot_values (
        plot TEXT NOT NULL REFERENCES plots (plot),
        trait TEXT NOT NULL REFERENCES traits (name),
        value REAL, note TEXT,
        PRIMARY KEY (plot, trait))""",
    "CREATE INDEX plot_values_trait ON plot_values (trait)",
    """CREATE TABLE journal (
        id INTEGER PRIMARY KEY,
        group_id INTEGER NOT NULL,
        timestamp TEXT NOT NULL,
        kind TEXT NOT NULL,
        target TEXT NOT NULL,
        old TEXT NOT NULL,
        new TEXT NOT NULL,
        who TEXT NOT NULL)""",
    "CREATE INDEX journal_group ON journal (group_id)",
    """CREATE TRIGGER journal_no_update BEFORE UPDATE ON journal
        BEGIN SELECT RAISE(ABORT, 'the change journal is append-only'); END""",
    """CREATE TRIGGER journal_no_delete BEFORE DELETE ON journal
        BEGIN SELECT RAISE(ABORT, 'the change journal is append-only'); END""",
)

# _MIGRATIONS[n] takes a file from schema n to n + 1.
_MIGRATIONS: tuple[tuple[str, ...], ...] = (
    (  # 1: a derived trait keeps its recipe; named analysis settings are kept in the file
        "ALTER TABLE traits ADD COLUMN derivation TEXT",
        "CREATE TABLE settings (name TEXT PRIMARY KEY NOT NULL, document TEXT NOT NULL)",
    ),
)

#: The schema version this Trialdesk writes, and the newest it reads.
SCHEMA_VERSION = len(_MIGRATIONS)


class TrialLockedError(TrialInputError):
    """The trial is open for editing in another program, or in another window of this one.

    Attributes
    ----------
    holder : str
        Who holds it, e.g. ``"ana on station-pc (process 1234) since 2026-12-01 10:02 UTC"``.
    """

    def __init__(self, *, holder: str, file: str | None = None) -> None:
        self.holder = holder
        super().__init__(
            f"this trial is open for editing by {holder}; close it there, or open it read-only",
            file=file,
        )


class TrialFile:
    """One trial's file: facts, entries, plots, traits, values, saved settings and the journal.

    Make one with :meth:`create` or :meth:`open`, never directly. Use it as a context manager, or
    call :meth:`close`, to release the lock. A handle belongs to the thread that opened it.

    Attributes
    ----------
    path : pathlib.Path
        The trial file.
    read_only : bool
        True when opened read-only: every write is refused, and nothing can be undone.

    Notes
    -----
    Readers always query the database, so two handles on one file agree. Every write method is
    one transaction and one journal group, committed before it returns; a write that changes
    nothing commits nothing and leaves undo and redo as they were. Values are stored as given
    (a number, or None for missing): plausibility checks live elsewhere.
    """

    def __init__(self, path: Path, connection: sqlite3.Connection, lock: _Lock | None) -> None:
        self.path = path
        self.read_only = lock is None
        self._conn: sqlite3.Connection | None = connection
        self._who = _user_name()
        self._undo: list[int] = []
        self._redo: list[int] = []
        self._closer = weakref.finalize(self, _close, connection, lock)
        if lock is not None:
            self._replay_journal()

    # -- opening and closing ------------------------------------------------------------------

    @classmethod
    def create(
        cls, path: str | os.PathLike[str], *, name: str, facts: Mapping[str, object] | None = None
    ) -> TrialFile:
        """Create a new trial file, open for editing; an existing file is never touched.

        Parameters
        ----------
        path : str or path-like
            The new file; its name must end in ``.trial``.
        name : str
            The trial's name.
        facts : mapping, optional
            Other facts (keys of :data:`FACTS` except ``name``).

        Raises
        ------
        TrialInputError
            When the path exists, its folder does not, or a fact is not acceptable.
        """
        target = Path(path)
        where = str(target)
        if target.suffix != ".trial":
            raise TrialInputError("a trial file's name must end in .trial", file=where)
        facts = dict(facts or {})
        if "name" in facts:
            raise TrialInputError("give the trial's name once, as name=, not among the facts",
                                  file=where)
        row = {key: _fact(key, value, where) for key, value in {"name": name, **facts}.items()}
        if not target.parent.is_dir():
            raise TrialInputError("the folder for the new trial file does not exist", file=where)
        if os.path.lexists(target):
            raise TrialInputError(_EXISTS, file=where)
        lock = _Lock.acquire(target)
        try:
            if os.path.lexists(target):  # checked under the lock: no Trialdesk can race us here
                raise TrialInputError(_EXISTS, file=where)
            _build(target, row)
            return cls._open_for_editing(target, lock)
        except BaseException:
            lock.release()
            raise

    @classmethod
    def open(cls, path: str | os.PathLike[str], *, read_only: bool = False) -> TrialFile:
        """Open a trial file, updating an older schema; for editing unless ``read_only``.

        Raises
        ------
        TrialLockedError
            When another program has the trial open for editing (never when ``read_only``).
        TrialInputError
            When the file is missing, is not a trial file, was written by a newer Trialdesk, or
            (read-only) still has an older schema.
        """
        target = Path(path)
        _require_sqlite_file(target)
        if read_only:
            return cls(target, _connect_read_only(target), None)
        lock = _Lock.acquire(target)
        try:
            return cls._open_for_editing(target, lock)
        except BaseException:
            lock.release()
            raise

    @classmethod
    def _open_for_editing(cls, path: Path, lock: _Lock) -> TrialFile:
        connection = _connect(path, path)
        try:
            version = _schema_version(connection, path)
            _set_writing_pragmas(connection, path)
            if version < SCHEMA_VERSION:
                _migrate(connection, version, path)
            return cls(path, connection, lock)
        except BaseException:
            connection.close()
            raise

    def close(self) -> None:
        """Close the database and release the lock; closing twice is harmless."""
        self._conn = None
        self._closer()

    def __enter__(self) -> TrialFile:
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()

    def __repr__(self) -> str:
        state = "closed" if self._conn is None else "read-only" if self.read_only else "editing"
        return f"TrialFile({str(self.path)!r}, {state})"

    # -- reading ------------------------------------------------------------------------------

    def facts(self) -> dict[str, object]:
        """Every fact of :data:`FACTS`, None where unset; dates as ISO text ("2026-04-02")."""
        row = self._connection().execute(f"SELECT {', '.join(FACTS)} FROM trial").fetchone()
        return dict(zip(FACTS, row, strict=True))

    def entries(self) -> pd.DataFrame:
        """Entries in their order: ``code``, ``name``, ``role``, ``origin`` (text, NaN unset)."""
        rows = self._connection().execute(
            "SELECT code, name, role, origin FROM entries ORDER BY position").fetchall()
        return _text_frame(rows, ("code", "name", "role", "origin"))

    def plots(self) -> pd.DataFrame:
        """Plots in field order: ``plot``, ``block``, ``incomplete_block``, ``entry`` (text, NaN
        unset) and the field position ``row``, ``column`` (Int64, ``<NA>`` unknown)."""
        rows = self._connection().execute(
            "SELECT plot, block, incomplete_block, field_row, field_column, entry FROM plots "
            "ORDER BY position").fetchall()
        columns = list(zip(*rows, strict=True)) if rows else [()] * 6
        return pd.DataFrame({
            "plot": pd.Series(columns[0], dtype="str"),
            "block": pd.Series(columns[1], dtype="str"),
            "incomplete_block": pd.Series(columns[2], dtype="str"),
            "row": pd.array(columns[3], dtype="Int64"),
            "column": pd.array(columns[4], dtype="Int64"),
            "entry": pd.Series(columns[5], dtype="str"),
        })

    def traits(self) -> pd.DataFrame:
        """Traits in their order: ``name``, ``unit`` (text), ``decimals`` (Int64), ``low``,
        ``high`` (float, NaN unset), ``higher_is_better`` (bool), ``derivation`` (dict or None)."""
        rows = self._connection().execute(
            "SELECT name, unit, decimals, low, high, higher_is_better, derivation FROM traits "
            "ORDER BY position").fetchall()
        columns = list(zip(*rows, strict=True)) if rows else [()] * 7
        return pd.DataFrame({
            "name": pd.Series(columns[0], dtype="str"),
            "unit": pd.Series(columns[1], dtype="str"),
            "decimals": pd.array(columns[2], dtype="Int64"),
            "low": np.array(columns[3], dtype=np.float64),
            "high": np.array(columns[4], dtype=np.float64),
            "higher_is_better": np.array(columns[5], dtype=bool),
            "derivation": pd.Series([_load(d) if d is not None else None for d in columns[6]],
                                    dtype=object),
        })

    def values(self) -> pd.DataFrame:
        """Trait values: index ``plot`` in field order, one float64 column per trait in trait
        order, NaN where missing."""
        connection = self._connection()
        with _read_snapshot(connection):
            plots = [p for (p,) in connection.execute("SELECT plot FROM plots ORDER BY position")]
            traits = [t for (t,) in connection.execute("SELECT name FROM traits ORDER BY position")]
            cells = connection.execute(
                "SELECT plot, trait, value FROM plot_values WHERE value IS NOT NULL").fetchall()
        row_of = {plot: i for i, plot in enumerate(plots)}
        column_of = {trait: j for j, trait in enumerate(traits)}
        count = len(cells)
        data = np.full((len(plots), len(traits)), np.nan)
        data[np.fromiter((row_of[p] for p, _, _ in cells), dtype=np.intp, count=count),
             np.fromiter((column_of[t] for _, t, _ in cells), dtype=np.intp, count=count)] = (
            np.fromiter((v for _, _, v in cells), dtype=np.float64, count=count))
        return pd.DataFrame(data, index=pd.Index(plots, dtype="str", name="plot"),
                            columns=pd.Index(traits, dtype="str"))

    def notes(self) -> dict[tuple[str, str], str]:
        """Notes on values, keyed by (plot, trait), in field order then trait order."""
        rows = self._connection().execute(
            "SELECT v.plot, v.trait, v.note FROM plot_values v "
            "JOIN plots p ON p.plot = v.plot JOIN traits t ON t.name = v.trait "
            "WHERE v.note IS NOT NULL ORDER BY p.position, t.position").fetchall()
        return {(plot, trait): note for plot, trait, note in rows}

    def settings(self, name: str = "default") -> dict | None:
        """The analysis settings saved under ``name``, or None when there are none."""
        row = self._connection().execute(
            "SELECT document FROM settings WHERE name = ?", (name,)).fetchone()
        return None if row is None else _load(row[0])

    def journal(self, limit: int | None = None) -> pd.DataFrame:
        """The change journal, oldest first; with ``limit``, only the latest ``limit`` records.

        Columns: ``id``, ``group_id`` (one user action), ``timestamp`` (UTC, ISO 8601),
        ``kind``, ``target``, ``old``, ``new`` (decoded JSON) and ``who``.
        """
        if limit is not None and (isinstance(limit, bool) or not isinstance(limit, int)
                                  or limit < 0):
            raise TrialInputError(f"the journal limit must be a whole number >= 0, not {limit!r}",
                                  file=str(self.path))
        rows = self._connection().execute(
            "SELECT id, group_id, timestamp, kind, target, old, new, who FROM journal "
            "ORDER BY id DESC LIMIT ?", (-1 if limit is None else limit,)).fetchall()
        rows.reverse()
        columns = list(zip(*rows, strict=True)) if rows else [()] * 8
        return pd.DataFrame({
            "id": np.array(columns[0], dtype=np.int64),
            "group_id": np.array(columns[1], dtype=np.int64),
            "timestamp": pd.Series(columns[2], dtype="str"),
            "kind": pd.Series(columns[3], dtype="str"),
            "target": pd.Series([_load(x) for x in columns[4]], dtype=object),
            "old": pd.Series([_load(x) for x in columns[5]], dtype=object),
            "new": pd.Series([_load(x) for x in columns[6]], dtype=object),
            "who": pd.Series(columns[7], dtype="str"),
        })

    # -- writing ------------------------------------------------------------------------------

    def set_value(
        self, plot: str, trait: str, value: float | None, *, note: str | None | EllipsisType = ...
    ) -> None:
        """Set one plot's value of one trait (None: missing); ``note`` replaces its note when given
        (None clears it)."""
        with self._edit() as changes:
            self._set_cell(changes, plot, trait, value, note)

    def set_values(self, changes: Iterable[tuple[str, str, float | None]]) -> None:
        """Set many values at once, as one action (a paste): all are saved, or none."""
        with self._edit() as recorded:
            for change in changes:
                if not isinstance(change, tuple | list) or len(change) != 3:
                    raise TrialInputError(f"each change is (plot, trait, value), not {change!r}",
                                          file=str(self.path))
                self._set_cell(recorded, *change, ...)

    def set_facts(self, **facts: object) -> None:
        """Set facts of the trial (keys of :data:`FACTS`); None clears one (except ``name``)."""
        where = str(self.path)
        clean = {key: _fact(key, value, where) for key, value in facts.items()}
        with self._edit() as changes:
            old = self.facts()
            for key, value in clean.items():
                if value != old[key]:
                    self._put_fact({"fact": key}, value)
                    changes.append(("fact", {"fact": key}, old[key], value))

    def upsert_entry(
        self, code: str, *, name: str | None = None, role: str | None = None,
        origin: str | None = None,
    ) -> None:
        """Add an entry, or change one; None leaves a field as it is, "" clears name or origin.

        A new entry goes last, with role "test" unless given.
        """
        where = str(self.path)
        code = _label(code, "an entry code", where)
        with self._edit() as changes:
            old = self._entry_state(code)
            new = dict(old) if old is not None else {
                "name": None, "role": "test", "origin": None,
                "position": self._next_position("entries")}
            if name is not None:
                new["name"] = _optional_text(name, "the entry name", where)
            if role is not None:
                if role not in _ROLES:
                    raise TrialInputError(f"an entry's role is 'test' or 'check', not {role!r}",
                                          file=where)
                new["role"] = role
            if origin is not None:
                new["origin"] = _optional_text(origin, "the entry origin", where)
            if new != old:
                self._put_entry({"entry": code}, new)
                changes.append(("entry", {"entry": code}, old, new))

    def upsert_trait(self, name: str, **fields: object) -> None:
        """Add a trait, or change one: ``fields`` among :data:`TRAIT_FIELDS` (None clears one).

        ``unit`` text; ``decimals`` a whole number >= 0 (for display); ``low``, ``high`` the
        plausible range; ``higher_is_better`` bool; ``derivation`` a dict describing how the trait
        is computed from others (stored and returned as given). A new trait goes last.
        """
        where = str(self.path)
        name = _label(name, "a trait name", where)
        given = _trait_fields(fields, name, where)
        with self._edit() as changes:
            old = self._trait_state(name)
            base = old if old is not None else {
                **TRAIT_FIELDS, "position": self._next_position("traits")}
            new = _complete_trait(base, given, name, where)
            if new != old:
                self._put_trait({"trait": name}, new)
                changes.append(("trait", {"trait": name}, old, new))

    def update_plot(self, plot: str, **fields: object) -> None:
        """Correct a plot: ``entry``, ``block``, ``incomplete_block`` (text), ``row``,
        ``column`` (whole numbers); None clears any but ``entry``."""
        where = str(self.path)
        unknown = sorted(set(fields) - set(_PLOT_FIELDS))
        if unknown:
            raise TrialInputError(f"a plot has no field '{unknown[0]}'; its fields are "
                                  f"{', '.join(_PLOT_FIELDS)}", file=where)
        with self._edit() as changes:
            old = self._plot_state(plot)
            new = dict(old)
            for key, value in fields.items():
                if key == "entry":
                    new[key] = self._require_entry(value)
                elif key in ("row", "column"):
                    new[key] = _whole_number(value, f"the field {key}", where, plot)
                else:
                    new[key] = _optional_text(value, f"the {key.replace('_', ' ')}", where)
            if new != old:
                self._put_plot({"plot": plot}, new)
                changes.append(("plot", {"plot": plot}, old, new))

    def save_settings(self, settings: Mapping[str, Any], name: str = "default") -> None:
        """Save analysis settings (a JSON-compatible mapping) under ``name``, replacing any."""
        where = str(self.path)
        if not isinstance(settings, Mapping):
            raise TrialInputError("analysis settings must be a mapping of names to values",
                                  file=where)
        name = _label(name, "a settings name", where)
        document = _load(_dump(dict(settings), where, "the analysis settings"))
        with self._edit() as changes:
            old = self.settings(name)
            if document != old:
                self._put_settings({"settings": name}, document)
                changes.append(("settings", {"settings": name}, old, document))

    def load_plots(
        self, *, entries: pd.DataFrame, plots: pd.DataFrame, traits: pd.DataFrame,
        values: pd.DataFrame, source: str | None = None,
    ) -> None:
        """Load a whole trial's entries, plots, traits and values at once (an import).

        The frames have the shapes the readers return: ``entries`` with ``code`` and optionally
        ``name``, ``role``, ``origin``; ``plots`` with ``plot``, ``entry`` and optionally
        ``block``, ``incomplete_block``, ``row``, ``column`` (in field order); ``traits`` with
        ``name`` and optionally the :data:`TRAIT_FIELDS`; ``values`` indexed by plot with one
        column per trait (NaN missing; plots or traits left out are missing).

        Raises
        ------
        TrialInputError
            When the trial already has entries, plots or traits (an import fills an empty
            trial, and never overwrites), or the frames are inconsistent.

        Notes
        -----
        The journal records the import as one "import" record with the counts loaded, not one
        record per value. An import cannot be undone, and edits before it can no longer be.
        """
        where = str(self.path)
        entry_rows = _entry_rows(entries, where)
        plot_rows = _plot_rows(plots, {row[0] for row in entry_rows}, where)
        trait_rows = _trait_rows(traits, where)
        value_rows = _value_rows(values, {row[0] for row in plot_rows},
                                 {row[0] for row in trait_rows}, where)
        with self._edit() as changes:
            conn = self._conn
            held = [table for table in ("entries", "plots", "traits")
                    if conn.execute(f"SELECT EXISTS (SELECT 1 FROM {table})").fetchone()[0]]
            if held:
                raise TrialInputError(f"this trial already has {held[0]}; an import fills a "
                                      "new, empty trial", file=where)
            conn.executemany("INSERT INTO entries (code, name, role, origin, position) "
                             "VALUES (?, ?, ?, ?, ?)", entry_rows)
            conn.executemany("INSERT INTO plots (plot, block, incomplete_block, field_row, "
                             "field_column, entry, position) VALUES (?, ?, ?, ?, ?, ?, ?)",
                             plot_rows)
            conn.executemany("INSERT INTO traits (name, unit, decimals, low, high, "
                             "higher_is_better, derivation, position) "
                             "VALUES (?, ?, ?, ?, ?, ?, ?, ?)", trait_rows)
            conn.executemany("INSERT INTO plot_values (plot, trait, value) VALUES (?, ?, ?)",
                             value_rows)
            changes.append(("import", {"source": source}, None, {
                "entries": len(entry_rows), "plots": len(plot_rows), "traits": len(trait_rows),
                "values": len(value_rows)}))

    # -- undo and redo ------------------------------------------------------------------------

    def can_undo(self) -> bool:
        """True when there is an action to undo (never on a read-only or closed handle)."""
        return self._conn is not None and not self.read_only and bool(self._undo)

    def can_redo(self) -> bool:
        """True when there is an undone action to redo (never on a read-only or closed handle)."""
        return self._conn is not None and not self.read_only and bool(self._redo)

    def undo(self) -> bool:
        """Undo the latest action not yet undone; False when there is none.

        Imports cannot be undone, nor anything before the latest import.
        """
        self._writable()
        if not self._undo:
            return False
        group = self._undo[-1]
        with self._edit() as changes:
            for kind, target, old, _new in reversed(self._group_changes(group)):
                self._apply(kind, target, old)
            changes.append(("undo", {"group": group}, None, None))
        return True

    def redo(self) -> bool:
        """Redo the action undone most recently; False when there is none (a new edit after an
        undo leaves nothing to redo)."""
        self._writable()
        if not self._redo:
            return False
        group = self._redo[-1]
        with self._edit() as changes:
            for kind, target, _old, new in self._group_changes(group):
                self._apply(kind, target, new)
            changes.append(("redo", {"group": group}, None, None))
        return True

    # -- private: connection, transactions, journal -------------------------------------------

    def _connection(self) -> sqlite3.Connection:
        if self._conn is None:
            raise TrialInputError("this trial file has been closed; open it again",
                                  file=str(self.path))
        return self._conn

    def _writable(self) -> sqlite3.Connection:
        connection = self._connection()
        if self.read_only:
            raise TrialInputError("this trial was opened read-only; open it for editing to "
                                  "change it", file=str(self.path))
        return connection

    @contextlib.contextmanager
    def _edit(self) -> Iterator[list[tuple[str, dict, Any, Any]]]:
        """One transaction and one journal group: yields the list the caller adds changes to."""
        connection = self._writable()
        changes: list[tuple[str, dict, Any, Any]] = []
        try:
            connection.execute("BEGIN IMMEDIATE")
            yield changes
            group = self._record(changes) if changes else None
            connection.execute("COMMIT")
        except BaseException as error:
            if connection.in_transaction:
                with contextlib.suppress(sqlite3.Error):
                    connection.execute("ROLLBACK")
            if isinstance(error, sqlite3.Error):
                raise TrialInputError(f"the change was not saved ({error}); the trial file is "
                                      "as it was before", file=str(self.path)) from error
            raise
        if group is not None:
            kind, target, _old, _new = changes[0]
            _step(self._undo, self._redo, group, kind, target)

    def _record(self, changes: list[tuple[str, dict, Any, Any]]) -> int:
        where = str(self.path)
        group = self._conn.execute(
            "SELECT COALESCE(MAX(group_id), 0) + 1 FROM journal").fetchone()[0]
        now = _utc_now()
        self._conn.executemany(
            "INSERT INTO journal (group_id, timestamp, kind, target, old, new, who) "
            "VALUES (?, ?, ?, ?, ?, ?, ?)",
            [(group, now, kind, _dump(target, where, "a journal target"),
              _dump(old, where, "an old value"), _dump(new, where, "a new value"), self._who)
             for kind, target, old, new in changes])
        return group

    def _replay_journal(self) -> None:
        # SQLite takes the bare columns from the row holding MIN(id): each group's first record.
        rows = self._conn.execute("SELECT group_id, kind, target, MIN(id) FROM journal "
                                  "GROUP BY group_id ORDER BY group_id")
        for group, kind, target, _first in rows:
            _step(self._undo, self._redo, group, kind, _load(target))

    def _group_changes(self, group: int) -> list[tuple[str, dict, Any, Any]]:
        rows = self._conn.execute("SELECT kind, target, old, new FROM journal WHERE group_id = ? "
                                  "ORDER BY id", (group,)).fetchall()
        return [(kind, _load(target), _load(old), _load(new)) for kind, target, old, new in rows]

    def _apply(self, kind: str, target: dict, state: Any) -> None:
        put = {"value": self._put_value, "fact": self._put_fact, "entry": self._put_entry,
               "trait": self._put_trait, "plot": self._put_plot,
               "settings": self._put_settings}[kind]
        put(target, state)

    # -- private: one cell ---------------------------------------------------------------------

    def _set_cell(self, changes: list, plot: object, trait: object, value: object,
                  note: object) -> None:
        where = str(self.path)
        self._require_plot(plot)
        self._require_trait(trait)
        number = _value(value, where, plot, trait)
        row = self._conn.execute("SELECT value, note FROM plot_values WHERE plot = ? AND "
                                 "trait = ?", (plot, trait)).fetchone()
        old = {"value": None, "note": None} if row is None else {"value": row[0], "note": row[1]}
        new = {"value": number,
               "note": old["note"] if note is ... else _optional_text(note, "a note", where)}
        if new != old:
            target = {"plot": plot, "trait": trait}
            self._put_value(target, new)
            changes.append(("value", target, old, new))

    # -- private: current state of one thing, and writing a state ------------------------------

    def _require_plot(self, plot: object) -> str:
        if isinstance(plot, str) and self._conn.execute(
                "SELECT 1 FROM plots WHERE plot = ?", (plot,)).fetchone():
            return plot
        raise TrialInputError(f"there is no plot {plot!r} in this trial", file=str(self.path))

    def _require_trait(self, trait: object) -> str:
        if isinstance(trait, str) and self._conn.execute(
                "SELECT 1 FROM traits WHERE name = ?", (trait,)).fetchone():
            return trait
        raise TrialInputError(f"there is no trait {trait!r} in this trial", file=str(self.path))

    def _require_entry(self, code: object) -> str:
        if isinstance(code, str) and self._conn.execute(
                "SELECT 1 FROM entries WHERE code = ?", (code,)).fetchone():
            return code
        raise TrialInputError(f"there is no entry {code!r} in this trial", file=str(self.path))

    def _next_position(self, table: str) -> int:
        return self._conn.execute(
            f"SELECT COALESCE(MAX(position), -1) + 1 FROM {table}").fetchone()[0]

    def _entry_state(self, code: str) -> dict | None:
        row = self._conn.execute("SELECT name, role, origin, position FROM entries "
                                 "WHERE code = ?", (code,)).fetchone()
        return None if row is None else dict(zip(("name", "role", "origin", "position"), row,
                                                 strict=True))

    def _trait_state(self, name: str) -> dict | None:
        row = self._conn.execute("SELECT unit, decimals, low, high, higher_is_better, "
                                 "derivation, position FROM traits WHERE name = ?",
                                 (name,)).fetchone()
        if row is None:
            return None
        unit, decimals, low, high, higher, derivation, position = row
        return {"unit": unit, "decimals": decimals, "low": low, "high": high,
                "higher_is_better": bool(higher),
                "derivation": None if derivation is None else _load(derivation),
                "position": position}

    def _plot_state(self, plot: object) -> dict:
        self._require_plot(plot)
        row = self._conn.execute("SELECT entry, block, incomplete_block, field_row, "
                                 "field_column FROM plots WHERE plot = ?", (plot,)).fetchone()
        return dict(zip(_PLOT_FIELDS, row, strict=True))

    def _put_value(self, target: dict, state: dict) -> None:
        key = (target["plot"], target["trait"])
        if state["value"] is None and state["note"] is None:  # missing: no row at all
            self._conn.execute("DELETE FROM plot_values WHERE plot = ? AND trait = ?", key)
        else:
            self._conn.execute(
                "INSERT INTO plot_values (plot, trait, value, note) VALUES (?, ?, ?, ?) "
                "ON CONFLICT (plot, trait) DO UPDATE SET value = excluded.value, "
                "note = excluded.note", (*key, state["value"], state["note"]))

    def _put_fact(self, target: dict, value: object) -> None:
        column = target["fact"]
        if column not in FACTS:  # the name becomes SQL: only a known column may pass
            raise TrialInputError(f"a trial has no fact '{column}'", file=str(self.path))
        self._conn.execute(f"UPDATE trial SET {column} = ?", (value,))

    def _put_entry(self, target: dict, state: dict | None) -> None:
        if state is None:
            self._conn.execute("DELETE FROM entries WHERE code = ?", (target["entry"],))
            return
        self._conn.execute(
            "INSERT INTO entries (code, name, role, origin, position) VALUES (?, ?, ?, ?, ?) "
            "ON CONFLICT (code) DO UPDATE SET name = excluded.name, role = excluded.role, "
            "origin = excluded.origin, position = excluded.position",
            (target["entry"], state["name"], state["role"], state["origin"], state["position"]))

    def _put_trait(self, target: dict, state: dict | None) -> None:
        if state is None:
            self._conn.execute("DELETE FROM traits WHERE name = ?", (target["trait"],))
            return
        derivation = state["derivation"]
        self._conn.execute(
            "INSERT INTO traits (name, unit, decimals, low, high, higher_is_better, derivation, "
            "position) VALUES (?, ?, ?, ?, ?, ?, ?, ?) ON CONFLICT (name) DO UPDATE SET "
            "unit = excluded.unit, decimals = excluded.decimals, low = excluded.low, "
            "high = excluded.high, higher_is_better = excluded.higher_is_better, "
            "derivation = excluded.derivation, position = excluded.position",
            (target["trait"], state["unit"], state["decimals"], state["low"], state["high"],
             int(state["higher_is_better"]),
             None if derivation is None else _dump(derivation, str(self.path), "a derivation"),
             state["position"]))

    def _put_plot(self, target: dict, state: dict) -> None:
        self._conn.execute(
            "UPDATE plots SET entry = ?, block = ?, incomplete_block = ?, field_row = ?, "
            "field_column = ? WHERE plot = ?",
            (state["entry"], state["block"], state["incomplete_block"], state["row"],
             state["column"], target["plot"]))

    def _put_settings(self, target: dict, document: dict | None) -> None:
        if document is None:
            self._conn.execute("DELETE FROM settings WHERE name = ?", (target["settings"],))
            return
        self._conn.execute(
            "INSERT INTO settings (name, document) VALUES (?, ?) ON CONFLICT (name) DO UPDATE "
            "SET document = excluded.document",
            (target["settings"], _dump(document, str(self.path), "the analysis settings")))


# -- undo bookkeeping ---------------------------------------------------------------------------


def _step(undo: list[int], redo: list[int], group: int, kind: str, target: dict) -> None:
    """Advance the undo and redo stacks past one journal group, as an editor's would move."""
    if kind == "import":
        undo.clear()
        redo.clear()
    elif kind == "undo":
        if undo and undo[-1] == target.get("group"):
            redo.append(undo.pop())
    elif kind == "redo":
        if redo and redo[-1] == target.get("group"):
            undo.append(redo.pop())
    else:
        undo.append(group)
        redo.clear()


# -- opening the database -----------------------------------------------------------------------


def _require_sqlite_file(path: Path) -> None:
    where = str(path)
    try:
        with open(path, "rb") as handle:
            head = handle.read(len(_SQLITE_MAGIC))
    except FileNotFoundError:
        raise TrialInputError("there is no trial file here", file=where) from None
    except IsADirectoryError:
        raise TrialInputError("this is a folder, not a trial file", file=where) from None
    except OSError as error:
        raise TrialInputError(f"cannot be read ({error.strerror})", file=where) from None
    if head != _SQLITE_MAGIC:
        raise TrialInputError("is not a Trialdesk trial file (it is not an SQLite database)",
                              file=where)


def _connect(target: Path | str, where: Path, *, uri: bool = False) -> sqlite3.Connection:
    try:
        connection = sqlite3.connect(target, uri=uri, isolation_level=None,
                                     timeout=_BUSY_SECONDS)
    except sqlite3.Error as error:
        raise TrialInputError(f"cannot be opened ({error})", file=str(where)) from error
    connection.execute("PRAGMA foreign_keys = ON")
    return connection


def _connect_read_only(path: Path) -> sqlite3.Connection:
    connection = _connect(f"{path.resolve().as_uri()}?mode=ro", path, uri=True)
    try:
        version = _schema_version(connection, path)
        if version < SCHEMA_VERSION:
            raise TrialInputError(
                f"this trial file has the older schema {version} and must be updated to schema "
                f"{SCHEMA_VERSION} before it can be read: open it for editing once",
                file=str(path))
        connection.execute("PRAGMA query_only = ON")
        return connection
    except BaseException:
        connection.close()
        raise


def _schema_version(connection: sqlite3.Connection, path: Path) -> int:
    """Check that the database is a trial this program reads, and return its schema version."""
    where = str(path)
    try:
        has_meta = connection.execute("SELECT EXISTS (SELECT 1 FROM sqlite_master WHERE "
                                      "type = 'table' AND name = 'trial_meta')").fetchone()[0]
        meta = dict(connection.execute("SELECT key, value FROM trial_meta")) if has_meta else {}
        stored = connection.execute("PRAGMA user_version").fetchone()[0]
    except sqlite3.Error as error:
        raise TrialInputError(f"cannot be read as a database ({error}); the file may be "
                              "damaged", file=where) from error
    if meta.get("format") != FORMAT:
        raise TrialInputError("is an SQLite database, but not a Trialdesk trial file",
                              file=where)
    if stored > SCHEMA_VERSION:
        raise TrialInputError(
            f"this trial was written by a newer Trialdesk (schema {stored}); this one reads up to "
            f"{SCHEMA_VERSION}: update Trialdesk", file=where)
    if meta.get("schema_version") != str(stored):
        raise TrialInputError(
            f"is damaged: it records two different schema versions ({stored} in the header, "
            f"{meta.get('schema_version')} in trial_meta)", file=where)
    return stored


def _set_writing_pragmas(connection: sqlite3.Connection, path: Path) -> None:
    # Durability over speed: in WAL mode, synchronous=FULL flushes the log at every commit, so
    # an acknowledged edit survives a power cut (SQLite documentation, "PRAGMA synchronous").
    mode = connection.execute("PRAGMA journal_mode = WAL").fetchone()[0]
    if mode != "wal":
        raise TrialInputError("cannot be opened for editing here: SQLite could not keep its "
                              "write-ahead log beside it (a network folder?); copy it to a "
                              "local disk, or open it read-only", file=str(path))
    connection.execute("PRAGMA synchronous = FULL")
    connection.execute("PRAGMA fullfsync = ON")  # macOS: flush the drive's cache too


def _upgrade_schema(connection: sqlite3.Connection, version: int) -> None:
    """Run the migrations from ``version`` to the current one, inside the caller's transaction."""
    for statements in _MIGRATIONS[version:]:
        for statement in statements:
            connection.execute(statement)
    connection.execute(f"PRAGMA user_version = {SCHEMA_VERSION}")
    connection.execute("UPDATE trial_meta SET value = ? WHERE key = 'schema_version'",
                       (str(SCHEMA_VERSION),))


def _migrate(connection: sqlite3.Connection, version: int, path: Path) -> None:
    try:
        connection.execute("BEGIN IMMEDIATE")
        _upgrade_schema(connection, version)
        connection.executemany("INSERT OR REPLACE INTO trial_meta (key, value) VALUES (?, ?)",
                               [("migrated_with", VERSION), ("migrated_at", _utc_now())])
        connection.execute("COMMIT")
    except sqlite3.Error as error:
        if connection.in_transaction:
            connection.execute("ROLLBACK")
        raise TrialInputError(f"could not update the trial file from schema {version} to "
                              f"{SCHEMA_VERSION} ({error}); the file is unchanged",
                              file=str(path)) from error


def _build(path: Path, facts: dict[str, object]) -> None:
    """Write a complete new trial beside ``path``, then move it into place."""
    descriptor, temporary = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".creating",
                                             dir=path.parent)
    os.close(descriptor)
    try:
        connection = _connect(temporary, path)
        try:
            _set_writing_pragmas(connection, path)
            connection.execute("BEGIN IMMEDIATE")
            for statement in _BASE_SCHEMA:
                connection.execute(statement)
            connection.executemany("INSERT INTO trial_meta (key, value) VALUES (?, ?)", [
                ("format", FORMAT), ("schema_version", "0"), ("created_with", VERSION),
                ("created_at", _utc_now())])
            connection.execute(f"INSERT INTO trial (id, {', '.join(facts)}) VALUES "
                               f"(1, {', '.join('?' * len(facts))})", tuple(facts.values()))
            _upgrade_schema(connection, 0)
            connection.execute("COMMIT")
        finally:
            connection.close()
        os.replace(temporary, path)
    except BaseException:
        for leftover in ("", "-wal", "-shm"):
            Path(temporary + leftover).unlink(missing_ok=True)
        raise
    _sync_folder(path.parent)


def _sync_folder(folder: Path) -> None:
    """Flush a folder's entries to disk, so a new file's name survives a power cut (POSIX)."""
    if sys.platform == "win32":
        return
    descriptor = os.open(folder, os.O_RDONLY)
    try:
        os.fsync(descriptor)
    finally:
        os.close(descriptor)


def _close(connection: sqlite3.Connection, lock: _Lock | None) -> None:
    connection.close()  # the last connection to close folds the write-ahead log into the file
    if lock is not None:
        lock.release()


@contextlib.contextmanager
def _read_snapshot(connection: sqlite3.Connection) -> Iterator[None]:
    """Several queries that see one committed state of the file."""
    connection.execute("BEGIN")
    try:
        yield
    finally:
        connection.execute("COMMIT")


# -- the lock -----------------------------------------------------------------------------------


class _Lock:
    """An exclusive OS lock on ``<trial>.lock``, holding who took it; the OS drops it with the
    process, so a crashed program never leaves the trial locked."""

    def __init__(self, path: Path, descriptor: int) -> None:
        self._path = path
        self._descriptor: int | None = descriptor

    @classmethod
    def acquire(cls, trial: Path) -> _Lock:
        path = trial.with_name(trial.name + ".lock")
        where = str(trial)
        for _ in range(_LOCK_ATTEMPTS):
            try:
                descriptor = os.open(path, os.O_RDWR | os.O_CREAT | _BINARY, 0o644)
            except OSError as error:
                raise TrialInputError(f"cannot create the lock file {path.name} "
                                      f"({error.strerror}); open the trial read-only",
                                      file=where) from None
            try:
                locked = _try_lock(descriptor)
            except OSError as error:
                os.close(descriptor)
                raise TrialInputError(f"cannot lock the trial ({error.strerror}); open it "
                                      "read-only", file=where) from None
            if not locked:
                holder = _holder_text(descriptor)
                os.close(descriptor)
                raise TrialLockedError(holder=holder, file=where)
            if _still_named(descriptor, path):
                try:
                    _write_holder(descriptor)
                except OSError as error:
                    os.close(descriptor)
                    raise TrialInputError(f"cannot write the lock file {path.name} "
                                          f"({error.strerror})", file=where) from None
                return cls(path, descriptor)
            # The previous holder removed this lock file just as we locked it: take the new one.
            os.close(descriptor)
        raise TrialInputError("cannot take the lock on this trial; try again", file=where)

    def release(self) -> None:
        if self._descriptor is None:
            return
        if sys.platform != "win32":
            # Remove the file while still holding it, so nobody locks a file that is gone.
            with contextlib.suppress(OSError):
                self._path.unlink()
        _unlock(self._descriptor)
        os.close(self._descriptor)
        self._descriptor = None


if sys.platform == "win32":

    def _try_lock(descriptor: int) -> bool:
        os.lseek(descriptor, _WINDOWS_LOCK_BYTE, os.SEEK_SET)
        try:
            msvcrt.locking(descriptor, msvcrt.LK_NBLCK, 1)
        except OSError:  # held by another process (EACCES or EDEADLOCK)
            return False
        return True

    def _unlock(descriptor: int) -> None:
        os.lseek(descriptor, _WINDOWS_LOCK_BYTE, os.SEEK_SET)
        with contextlib.suppress(OSError):
            msvcrt.locking(descriptor, msvcrt.LK_UNLCK, 1)

else:

    def _try_lock(descriptor: int) -> bool:
        try:
            fcntl.flock(descriptor, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            return False
        return True

    def _unlock(descriptor: int) -> None:
        fcntl.flock(descriptor, fcntl.LOCK_UN)


def _still_named(descriptor: int, path: Path) -> bool:
    try:
        named = os.stat(path)
    except FileNotFoundError:
        return False
    held = os.fstat(descriptor)
    return (named.st_dev, named.st_ino) == (held.st_dev, held.st_ino)


def _write_holder(descriptor: int) -> None:
    holder = {"user": _user_name(), "host": socket.gethostname(), "pid": os.getpid(),
              "since": _utc_now()}
    os.ftruncate(descriptor, 0)
    os.lseek(descriptor, 0, os.SEEK_SET)
    os.write(descriptor, json.dumps(holder).encode("utf-8"))


def _holder_text(descriptor: int) -> str:
    """Who holds the lock, in words, from the lock file's contents."""
    os.lseek(descriptor, 0, os.SEEK_SET)
    try:
        holder = json.loads(os.read(descriptor, 4096).decode("utf-8"))
        since = dt.datetime.fromisoformat(holder["since"]).astimezone(dt.UTC)
        return (f"{holder['user']} on {holder['host']} (process {holder['pid']}) since "
                f"{since:%Y-%m-%d %H:%M} UTC")
    except (ValueError, KeyError, TypeError, AttributeError):  # taken a moment ago: not written
        return "another Trialdesk program (it has only just opened the trial)"


# -- checking what the caller gives --------------------------------------------------------------


def _label(value: object, what: str, where: str) -> str:
    if not isinstance(value, str) or not value.strip():
        raise TrialInputError(f"{what} must be non-empty text, not {value!r}", file=where)
    return value


def _optional_text(value: object, what: str, where: str) -> str | None:
    if value is None or value == "":
        return None
    if not isinstance(value, str):
        raise TrialInputError(f"{what} must be text, not {value!r}", file=where)
    return value


def _number(value: object, what: str, where: str) -> float | None:
    if value is None:
        return None
    if isinstance(value, bool | np.bool_) or not isinstance(value, numbers.Real):
        raise TrialInputError(f"{what} must be a number, not {value!r}", file=where)
    number = float(value)
    if not math.isfinite(number):
        raise TrialInputError(f"{what} must be a finite number, not {value!r}", file=where)
    return number


def _whole_number(value: object, what: str, where: str, plot: object = None) -> int | None:
    if value is None or value is pd.NA:
        return None
    whole = (isinstance(value, numbers.Integral)
             or (isinstance(value, numbers.Real) and float(value).is_integer()))
    if isinstance(value, bool | np.bool_) or not whole or not (
            -_SQLITE_INTEGER <= int(value) < _SQLITE_INTEGER):
        raise TrialInputError(f"{what} must be a whole number, not {value!r}", file=where,
                              plot=None if plot is None else str(plot))
    return int(value)


def _value(value: object, where: str, plot: str, trait: str) -> float | None:
    """A trait value as stored: a float, or None for missing (NaN counts as missing)."""
    if value is None:
        return None
    if isinstance(value, bool | np.bool_) or not isinstance(value, numbers.Real):
        raise TrialInputError(f"the value {value!r} is not a number", file=where, plot=plot,
                              column=trait)
    number = float(value)
    if math.isnan(number):
        return None
    if math.isinf(number):
        raise TrialInputError(f"the value {value!r} is not a finite number", file=where,
                              plot=plot, column=trait)
    return number


def _fact(key: str, value: object, where: str) -> object:
    """A fact's value as stored, checked against what the fact holds."""
    kind = FACTS.get(key)
    if kind is None:
        raise TrialInputError(f"a trial has no fact '{key}'; its facts are "
                              f"{', '.join(FACTS)}", file=where)
    what = f"the fact '{key}'"
    if key == "name":
        return _label(value, "the trial's name", where)
    if kind == "text":
        return _optional_text(value, what, where)
    if value is None:
        return None
    if kind == "design":
        if value not in DESIGNS:
            raise TrialInputError(f"the design is one of {', '.join(DESIGNS)}, not {value!r}",
                                  file=where)
        return value
    if kind == "date":
        return _date(value, what, where)
    if kind == "integer":
        return _whole_number(value, what, where)
    number = _number(value, what, where)
    if kind == "percent" and not 0 <= number < 100:
        raise TrialInputError(f"{what} is a percentage from 0 up to 100, not {value!r}",
                              file=where)
    if kind == "positive" and number <= 0:
        raise TrialInputError(f"{what} must be above 0, not {value!r}", file=where)
    return number


def _date(value: object, what: str, where: str) -> str:
    if isinstance(value, dt.datetime) or not isinstance(value, dt.date | str):
        raise TrialInputError(f"{what} must be a date (2026-04-02), not {value!r}", file=where)
    if isinstance(value, str):
        try:
            value = dt.date.fromisoformat(value)
        except ValueError:
            raise TrialInputError(f"{what} must be a date written 2026-04-02, not {value!r}",
                                  file=where) from None
    return value.isoformat()


def _trait_fields(fields: Mapping[str, object], name: str, where: str) -> dict[str, object]:
    """The given trait fields, checked, as stored."""
    clean: dict[str, object] = {}
    for key, value in fields.items():
        what = f"trait '{name}': {key}"
        if key not in TRAIT_FIELDS:
            raise TrialInputError(f"a trait has no field '{key}'; its fields are "
                                  f"{', '.join(TRAIT_FIELDS)}", file=where)
        if key == "unit":
            clean[key] = _optional_text(value, what, where)
        elif key == "decimals":
            decimals = _whole_number(value, what, where)
            if decimals is not None and decimals < 0:
                raise TrialInputError(f"{what} must be 0 or more, not {value!r}", file=where)
            clean[key] = decimals
        elif key in ("low", "high"):
            clean[key] = _number(value, what, where)
        elif key == "higher_is_better":
            if not isinstance(value, bool | np.bool_):
                raise TrialInputError(f"{what} must be True or False, not {value!r}",
                                      file=where)
            clean[key] = bool(value)
        else:
            if value is not None and not isinstance(value, Mapping):
                raise TrialInputError(f"{what} must be a dict (or None), not {value!r}",
                                      file=where)
            clean[key] = None if value is None else _load(_dump(dict(value), where, what))
    return clean


def _complete_trait(base: Mapping[str, object], given: Mapping[str, object], name: str,
                    where: str) -> dict[str, object]:
    """A trait's fields after a change, checked as a whole: the plausible range in order."""
    trait = {**base, **given}
    if trait["low"] is not None and trait["high"] is not None and trait["low"] > trait["high"]:
        raise TrialInputError(f"trait '{name}': low ({trait['low']}) is above high "
                              f"({trait['high']})", file=where)
    return trait


# -- the frames of an import ---------------------------------------------------------------------


def _columns(frame: object, what: str, required: tuple[str, ...], optional: tuple[str, ...],
             where: str) -> None:
    if not isinstance(frame, pd.DataFrame):
        raise TrialInputError(f"the {what} must be a table (DataFrame)", file=where)
    allowed = required + optional
    for name in frame.columns:
        if name not in allowed:
            raise TrialInputError(f"the {what} have a column '{name}' that a trial file does not "
                                  f"keep; the columns are {', '.join(allowed)}", file=where)
    for name in required:
        if name not in frame.columns:
            raise TrialInputError(f"the {what} need a column '{name}'", file=where)


def _column_cells(frame: pd.DataFrame, name: str) -> list:
    """A column's cells as plain Python values, None where missing (or absent)."""
    if name not in frame.columns:
        return [None] * len(frame)
    column = frame[name].astype(object)
    return column.where(column.notna(), None).tolist()


def _unique(labels: list, what: str, where: str) -> None:
    seen: set = set()
    for label in labels:
        if label in seen:
            raise TrialInputError(f"{what} {label!r} appears more than once", file=where)
        seen.add(label)


def _entry_rows(entries: object, where: str) -> list[tuple]:
    _columns(entries, "entries", ("code",), ("name", "role", "origin"), where)
    codes = [_label(code, "an entry code", where) for code in _column_cells(entries, "code")]
    _unique(codes, "the entry code", where)
    rows = []
    cells = zip(codes, *(_column_cells(entries, c) for c in ("name", "role", "origin")),
                strict=True)
    for position, (code, name, role, origin) in enumerate(cells):
        role = "test" if role is None else role
        if role not in _ROLES:
            raise TrialInputError(f"entry {code}: the role is 'test' or 'check', not {role!r}",
                                  file=where)
        rows.append((code, _optional_text(name, f"entry {code}: the name", where), role,
                     _optional_text(origin, f"entry {code}: the origin", where), position))
    return rows


def _plot_rows(plots: object, codes: set[str], where: str) -> list[tuple]:
    _columns(plots, "plots", ("plot", "entry"),
             ("block", "incomplete_block", "row", "column"), where)
    labels = [_label(plot, "a plot label", where) for plot in _column_cells(plots, "plot")]
    _unique(labels, "the plot", where)
    rows = []
    cells = zip(labels, *(_column_cells(plots, c) for c in ("block", "incomplete_block", "entry")),
                _whole_column(plots, "row", labels, where),
                _whole_column(plots, "column", labels, where), strict=True)
    for position, (plot, block, incomplete, entry, row, column) in enumerate(cells):
        if entry not in codes:
            raise TrialInputError(f"the entry {entry!r} is not among the entries", file=where,
                                  plot=plot)
        rows.append((plot, _optional_text(block, "the block", where),
                     _optional_text(incomplete, "the incomplete block", where), row, column,
                     entry, position))
    return rows


def _whole_column(plots: pd.DataFrame, name: str, labels: list[str], where: str) -> list:
    """A field row or column as Python ints and None, converted at once where that works."""
    if name not in plots.columns:
        return [None] * len(plots)
    if not pd.api.types.is_bool_dtype(plots[name]):
        with contextlib.suppress(TypeError, ValueError, OverflowError):
            whole = pd.array(plots[name], dtype="Int64")
            return whole.to_numpy(dtype=object, na_value=None).tolist()
    # Something in it is not a whole number: find it, to say which plot.
    return [_whole_number(cell, f"the field {name}", where, plot)
            for cell, plot in zip(_column_cells(plots, name), labels, strict=True)]


def _trait_rows(traits: object, where: str) -> list[tuple]:
    _columns(traits, "traits", ("name",), tuple(TRAIT_FIELDS), where)
    names = [_label(name, "a trait name", where) for name in _column_cells(traits, "name")]
    _unique(names, "the trait", where)
    given = [c for c in TRAIT_FIELDS if c in traits.columns]
    rows = []
    for position, (name, *cells) in enumerate(
            zip(names, *(_column_cells(traits, c) for c in given), strict=True)):
        present = {key: value for key, value in zip(given, cells, strict=True)
                   if value is not None}  # a missing cell takes the default
        fields = _complete_trait(TRAIT_FIELDS, _trait_fields(present, name, where), name, where)
        derivation = fields["derivation"]
        rows.append((name, fields["unit"], fields["decimals"], fields["low"], fields["high"],
                     int(fields["higher_is_better"]),
                     None if derivation is None else _dump(derivation, where, "a derivation"),
                     position))
    return rows


def _value_rows(values: object, plots: set[str], traits: set[str], where: str) -> list[tuple]:
    if not isinstance(values, pd.DataFrame):
        raise TrialInputError("the values must be a table (DataFrame) indexed by plot",
                              file=where)
    labels = values.index.tolist()
    _unique(labels, "the plot", where)
    _unique(values.columns.tolist(), "the trait", where)
    for label in labels:
        if label not in plots:
            raise TrialInputError(f"the values have a row for plot {label!r}, which is not "
                                  "among the plots", file=where)
    index = np.array(labels, dtype=object)
    rows: list[tuple] = []
    for trait in values.columns:
        if trait not in traits:
            raise TrialInputError(f"the values have a column '{trait}', which is not among the "
                                  "traits", file=where)
        numbers_ = _numeric_column(values[trait], trait, where)
        if np.isinf(numbers_).any():
            raise TrialInputError("the values must be finite numbers", file=where,
                                  plot=str(index[np.isinf(numbers_)][0]), column=str(trait))
        present = ~np.isnan(numbers_)
        rows.extend(zip(index[present].tolist(), itertools.repeat(trait),
                        numbers_[present].tolist()))
    return rows


def _numeric_column(column: pd.Series, trait: str, where: str) -> np.ndarray:
    if pd.api.types.is_bool_dtype(column) or not pd.api.types.is_numeric_dtype(column):
        bad = next((x for x in column.tolist() if not (
            x is None or (isinstance(x, numbers.Real) and not isinstance(x, bool | np.bool_))
            or pd.isna(x))), None)
        if bad is not None:
            raise TrialInputError(f"the value {bad!r} is not a number", file=where,
                                  column=str(trait))
    return column.to_numpy(dtype=np.float64, na_value=np.nan)


# -- small helpers -------------------------------------------------------------------------------


def _text_frame(rows: list[tuple], names: tuple[str, ...]) -> pd.DataFrame:
    columns = list(zip(*rows, strict=True)) if rows else [()] * len(names)
    return pd.DataFrame({name: pd.Series(column, dtype="str")
                         for name, column in zip(names, columns, strict=True)})


def _dump(value: object, where: str, what: str) -> str:
    try:
        return json.dumps(value, ensure_ascii=False, allow_nan=False)
    except (TypeError, ValueError) as error:
        raise TrialInputError(f"{what} cannot be kept in the trial file ({error})",
                              file=where) from None


def _load(text: str) -> Any:
    return json.loads(text)


def _utc_now() -> str:
    return dt.datetime.now(dt.UTC).isoformat(timespec="milliseconds")


def _user_name() -> str:
    try:
        return getpass.getuser()
    except (OSError, KeyError, ImportError):  # no login name in this environment
        return "unknown user"
