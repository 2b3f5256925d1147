"""The results workbook and the PDF trial summary of a large trial: time and size.

The trial: 300 entries (two of them checks) in 3 complete blocks, 8 traits, Tukey letters
(invented data). Peers, measured in the same run on the same analysis:

- workbook: pandas ``DataFrame.to_excel`` (openpyxl engine) writing the same tables (the
  all-traits table, each trait's entries and pairs, the plot data) with no formatting. Target:
  at most 3x its time (formats, borders and print set-up cost something).
- PDF: Qt printing the plain-text summary of the same analysis (``QTextDocument.print_`` to a
  ``QPdfWriter``). Target: at most 2x its time.

Sizes are reported beside the peers' sizes; the target there is only that both files are made.
"""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd

from tests.benchmarks.common import Row, best_time

N_ENTRIES, N_BLOCKS, N_TRAITS = 300, 3, 8


def _fieldbook(folder: Path) -> Path:
    rng = np.random.default_rng(300)
    codes = ["CHK-A", "CHK-B"] + [f"BX{i:03d}" for i in range(N_ENTRIES - 2)]
    rows = [(f"{b + 1}{i + 1:03d}", b + 1, code) for b in range(N_BLOCKS)
            for i, code in enumerate(rng.permutation(codes))]
    frame = pd.DataFrame(rows, columns=["plot", "block", "entry"])
    effects = {code: rng.normal(0, 1) for code in codes}
    for k in range(N_TRAITS):
        base, spread = 10.0 * (k + 1), 1.0 + k / 4
        frame[f"trait_{k + 1}"] = np.round(
            base + spread * frame["entry"].map(effects) + rng.normal(0, spread / 2, len(frame)),
            2)
    path = folder / "large.csv"
    frame.to_csv(path, index=False)
    return path


def _plain_workbook(analysis, book, path: Path) -> None:
    with pd.ExcelWriter(path, engine="openpyxl") as writer:
        analysis.to_frame().to_excel(writer, sheet_name="Summary")
        for result in analysis.traits:
            result.to_frame().to_excel(writer, sheet_name=f"{result.trait} entries")
            result.comparisons_frame().to_excel(writer, sheet_name=f"{result.trait} pairs")
        pd.concat([book.plots, book.values], axis=1).to_excel(writer, sheet_name="Data")


def _plain_pdf(analysis, path: Path) -> None:
    from PySide6.QtGui import QPageSize, QPdfWriter, QTextDocument

    from trialdesk.core.summary_text import analysis_text

    writer = QPdfWriter(str(path))
    writer.setPageSize(QPageSize(QPageSize.PageSizeId.A4))
    document = QTextDocument()
    document.setPlainText(analysis_text(analysis))
    document.print_(writer)


def run() -> list[Row]:
    os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
    from PySide6.QtGui import QGuiApplication

    from trialdesk.core.analysis import analyze
    from trialdesk.core.fieldbook import read_fieldbook
    from trialdesk.core.report import build_report
    from trialdesk.core.results import AnalysisSettings
    from trialdesk.core.workbook import write_workbook
    from trialdesk.desktop.report_pdf import write_pdf

    _app = QGuiApplication.instance() or QGuiApplication([])
    with tempfile.TemporaryDirectory() as name:
        folder = Path(name)
        book = read_fieldbook(_fieldbook(folder))
        analysis = analyze(book, AnalysisSettings(method="tukey", checks=("CHK-A", "CHK-B")))
        report = build_report(analysis, book)
        ours_xlsx, peer_xlsx = folder / "ours.xlsx", folder / "peer.xlsx"
        ours_pdf, peer_pdf = folder / "ours.pdf", folder / "peer.pdf"
        t_xlsx = best_time(lambda: write_workbook(report, ours_xlsx, book=book), repeat=1)
        t_peer_xlsx = best_time(lambda: _plain_workbook(analysis, book, peer_xlsx), repeat=1)
        t_pdf = best_time(lambda: write_pdf(report, ours_pdf), repeat=3)
        t_peer_pdf = best_time(lambda: _plain_pdf(analysis, peer_pdf), repeat=3)
        mb = 1024 * 1024
        sizes = [p.stat().st_size / mb for p in (ours_xlsx, peer_xlsx, ours_pdf, peer_pdf)]
    what = f"{N_ENTRIES} entries x {N_TRAITS} traits"
    return [
        Row(benchmark=f"results workbook, {what}", ours=t_xlsx,
            peer="pandas to_excel of the same tables, unformatted", peer_value=t_peer_xlsx,
            target="at most 3x the peer", met=t_xlsx <= 3 * t_peer_xlsx),
        Row(benchmark="results workbook size", ours=sizes[0], peer="the unformatted workbook",
            peer_value=sizes[1], target="made", met=sizes[0] > 0, unit="MB"),
        Row(benchmark=f"PDF trial summary, {what}", ours=t_pdf,
            peer="Qt printing the plain-text summary", peer_value=t_peer_pdf,
            target="at most 2x the peer", met=t_pdf <= 2 * t_peer_pdf),
        Row(benchmark="PDF trial summary size", ours=sizes[2], peer="the plain-text PDF",
            peer_value=sizes[3], target="made", met=sizes[2] > 0, unit="MB"),
    ]
