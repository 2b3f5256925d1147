"""``trialdesk analyze`` of a series with ``--workbook``/``--pdf``: the reports from the command
line.

What the series workbook and PDF hold is checked in tests/test_series_workbook.py and
tests/gui/test_series_pdf.py; here: the options, the messages, that inputs stay untouched, and
that the command line writes exactly the report of the core's analysis.

Data: MASS ``immer`` (Immer, Hayes & Powers 1934, J. Am. Soc. Agron. 26:403-419;
tests/data/immer.csv, source in tests/data/README.md), and an invented plot-level series built
below (fixed random seed), as trial files.
"""

from __future__ import annotations

import hashlib
import json
import subprocess
import sys
import zipfile
from pathlib import Path

import numpy as np
import openpyxl
import pandas as pd

from trialdesk.core.cli import main as core_main
from trialdesk.core.fieldbook import read_fieldbook
from trialdesk.core.importer import import_fieldbook
from trialdesk.desktop.launcher import main

DATA = Path(__file__).parent / "data"


def script() -> list[str]:
    exe = Path(sys.executable).with_name("trialdesk")
    return [str(exe)] if exe.exists() else [sys.executable, "-m", "trialdesk.desktop.launcher"]


def digest(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def immer_csv(folder: Path) -> Path:
    """MASS immer in long form: one row per variety (Var), location (Loc) and year (Year)."""
    wide = pd.read_csv(DATA / "immer.csv")
    long = wide.melt(id_vars=["Loc", "Var"], value_vars=["Y1", "Y2"], var_name="Year",
                     value_name="yield")
    long["Year"] = long["Year"].map({"Y1": "1931", "Y2": "1932"})
    path = folder / "immer_long.csv"
    long.to_csv(path, index=False)
    return path


def trial_files(folder: Path) -> list[Path]:
    """An invented series of 6 entries in three environments, 3 blocks, as one trial file per
    environment (station and season set, yield in t/ha, E1 the check)."""
    rng = np.random.default_rng(20261203)
    entries = rng.normal(0.0, 0.8, 6)
    paths = []
    for station, season in (("North", "2025"), ("South", "2025"), ("North", "2026")):
        shift = rng.normal(0.0, 1.5)
        rows = [{"plot": 100 * block + k, "block": block, "entry": f"E{k}",
                 "yield": round(5.0 + shift + entries[k - 1] + rng.normal(0.0, 0.4), 2)}
                for block in (1, 2, 3) for k in range(1, 7)]
        csv = folder / f"{station}{season}.csv"
        pd.DataFrame(rows).to_csv(csv, index=False)
        path = folder / f"{station}{season}.trial"
        import_fieldbook(read_fieldbook(csv), path, facts={"station": station, "season": season},
                         checks=("E1",), trait_fields={"yield": {"unit": "t/ha"}})
        paths.append(path)
    return paths


def test_a_field_book_series_gives_workbook_and_pdf_and_stays_as_it_was(tmp_path):
    source = immer_csv(tmp_path)
    before = digest(source)
    workbook, pdf = tmp_path / "out.xlsx", tmp_path / "out.pdf"
    done = subprocess.run([*script(), "analyze", str(source), "--entry", "Var", "--location",
                           "Loc", "--season", "Year", "--workbook", str(workbook), "--pdf",
                           str(pdf)], capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    assert f"Wrote the results workbook to {workbook}." in done.stdout
    assert f"Wrote the series summary to {pdf}." in done.stdout
    assert "series summary" in done.stdout  # the printed summary as well
    assert zipfile.is_zipfile(workbook)
    assert openpyxl.load_workbook(workbook).sheetnames[0] == "Series summary"
    assert pdf.read_bytes().startswith(b"%PDF")
    assert digest(source) == before  # an input file is never modified
    assert not list(tmp_path.glob(".*"))  # no temporary file left beside the outputs


def test_the_workbook_is_the_cores_analysis(tmp_path, capsys):
    source = immer_csv(tmp_path)
    workbook, doc = tmp_path / "out.xlsx", tmp_path / "out.json"
    code = main(["analyze", str(source), "--entry", "Var", "--location", "Loc", "--season",
                 "Year", "--check", "M", "--workbook", str(workbook), "--json", str(doc)])
    assert code == 0, capsys.readouterr().err
    trait = json.loads(doc.read_text(encoding="utf-8"))["traits"][0]
    ws = openpyxl.load_workbook(workbook)["Series summary"]
    head = next(r for r in range(1, ws.max_row + 1) if ws.cell(row=r, column=1).value == "Entry")
    n = len(trait["environment_table"])
    for i, entry in enumerate(trait["entries"]):
        assert ws.cell(row=head + 1 + i, column=1).value == entry["entry"]
        assert ws.cell(row=head + 1 + i, column=2 + n).value == entry["mean"]  # full precision


def test_trial_files_give_the_units_they_record(tmp_path, capsys):
    paths = trial_files(tmp_path)
    before = [digest(p) for p in paths]
    workbook, pdf = tmp_path / "trials.xlsx", tmp_path / "trials.pdf"
    code = main(["analyze", *map(str, paths), "--workbook", str(workbook), "--pdf", str(pdf)])
    out = capsys.readouterr()
    assert code == 0, out.err
    wb = openpyxl.load_workbook(workbook)
    assert wb["Series summary"]["A1"].value == "Series of 3 trials"
    titles = [c.value for row in wb["Series summary"].iter_rows() for c in row]
    assert "yield (t/ha)" in titles
    assert pdf.read_bytes().startswith(b"%PDF")
    assert [digest(p) for p in paths] == before


def test_json_to_stdout_keeps_stdout_clean(tmp_path):
    source = immer_csv(tmp_path)
    workbook = tmp_path / "series.xlsx"
    done = subprocess.run([*script(), "analyze", str(source), "--entry", "Var", "--location",
                           "Loc", "--season", "Year", "--json", "-", "--workbook", str(workbook)],
                          capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    assert json.loads(done.stdout)["kind"] == "series"  # only the JSON on standard output
    assert "Wrote the results workbook" in done.stderr
    assert workbook.exists()


def test_pdf_without_the_desktop_part_is_refused_clearly(tmp_path, capsys):
    source = immer_csv(tmp_path)
    status = core_main(["analyze", str(source), "--entry", "Var", "--location", "Loc",
                        "--season", "Year", "--pdf", str(tmp_path / "x.pdf"), "--workbook",
                        str(tmp_path / "x.xlsx")])
    assert status == 2
    assert "desktop part" in capsys.readouterr().err
    assert not (tmp_path / "x.pdf").exists() and not (tmp_path / "x.xlsx").exists()


def test_an_unwritable_workbook_path_is_a_message_not_a_traceback(tmp_path):
    source = immer_csv(tmp_path)
    target = tmp_path / "no-such-folder" / "out.xlsx"
    done = subprocess.run([*script(), "analyze", str(source), "--entry", "Var", "--location",
                           "Loc", "--season", "Year", "--workbook", str(target)],
                          capture_output=True, text=True, timeout=300)
    assert done.returncode == 2
    assert "out.xlsx" in done.stderr and "Traceback" not in done.stderr
