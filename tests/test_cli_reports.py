"""``trialdesk analyze ... --workbook/--pdf``: the reports from the command line.

What the workbook and the PDF hold is checked in tests/test_workbook.py and
tests/gui/test_report_pdf.py; here: the options, the messages, and that inputs stay untouched.
"""

from __future__ import annotations

import hashlib
import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

from trialdesk.core.cli import main as core_main
from trialdesk.desktop.session import make_demo_trial


def script() -> list[str]:
    exe = Path(sys.executable).with_name("trialdesk")
    return [str(exe)] if exe.exists() else [sys.executable, "-m", "trialdesk.desktop.launcher"]


def digest(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


@pytest.fixture(scope="module")
def demo_trial(tmp_path_factory):
    path = tmp_path_factory.mktemp("trial") / "demo.trial"
    make_demo_trial(path)
    return path


def test_a_trial_file_gives_workbook_and_pdf_and_stays_as_it_was(demo_trial, tmp_path):
    before = digest(demo_trial)
    workbook, pdf = tmp_path / "out.xlsx", tmp_path / "out.pdf"
    done = subprocess.run([*script(), "analyze", str(demo_trial), "--workbook", str(workbook),
                           "--pdf", str(pdf), "--paper", "Letter"],
                          capture_output=True, text=True, timeout=180)
    assert done.returncode == 0, done.stderr
    assert f"Wrote the results workbook to {workbook}." in done.stdout
    assert f"Wrote the trial summary to {pdf}." in done.stdout
    assert zipfile.is_zipfile(workbook)
    assert pdf.read_bytes().startswith(b"%PDF")
    assert digest(demo_trial) == before  # an input file is never modified
    assert not list(tmp_path.glob(".*"))  # no temporary file left beside the outputs


def test_demo_writes_reports_and_json_to_stdout_keeps_stdout_clean(tmp_path):
    workbook = tmp_path / "demo.xlsx"
    done = subprocess.run([*script(), "demo", "--json", "-", "--workbook", str(workbook)],
                          capture_output=True, text=True, timeout=180)
    assert done.returncode == 0, done.stderr
    assert done.stdout.lstrip().startswith("{")  # only the JSON on standard output
    assert "Wrote the results workbook" in done.stderr
    assert workbook.exists()


def test_pdf_without_the_desktop_part_is_refused_clearly(demo_trial, tmp_path, capsys):
    status = core_main(["analyze", str(demo_trial), "--pdf", str(tmp_path / "x.pdf")])
    assert status == 2
    assert "desktop part" in capsys.readouterr().err
    assert not (tmp_path / "x.pdf").exists()


def test_an_unwritable_workbook_path_is_a_message_not_a_traceback(demo_trial, tmp_path):
    target = tmp_path / "no-such-folder" / "out.xlsx"
    done = subprocess.run([*script(), "analyze", str(demo_trial), "--workbook", str(target)],
                          capture_output=True, text=True, timeout=180)
    assert done.returncode == 2
    assert "out.xlsx" in done.stderr and "Traceback" not in done.stderr
