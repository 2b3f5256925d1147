"""Trial file out to a long field book (CSV or XLSX), and blank field books for data collection.

Values are written so that reading the file back gives exactly the stored numbers: the shortest
text that reads back as the same number, whole numbers without a decimal point for traits
recorded in whole numbers. Every file is
written atomically. In workbooks, text is always stored as text, so an entry code such as
``=A1`` or ``-12`` can never turn into a formula.
"""

from __future__ import annotations

import csv
import io
from collections.abc import Sequence
from pathlib import Path

import pandas as pd

from trialdesk.core.atomic import write_atomic
from trialdesk.core.errors import TrialInputError
from trialdesk.core.trial_fieldbook import trial_values
from trialdesk.core.trialfile import TrialFile

LABELS = ("plot", "block", "incomplete_block", "row", "column", "entry")


def format_value(value: float | None, decimals: int | None) -> str:
    """A value as text that reads back as exactly the same number; "" for missing.

    >>> format_value(5.2, 2), format_value(59.0, 0), format_value(77.0, 1), format_value(None, 1)
    ('5.2', '59', '77.0', '')
    """
    if value is None or pd.isna(value):
        return ""
    value = float(value)
    if decimals == 0 and value.is_integer():
        return str(int(value))
    return repr(value)


def _table(trial: TrialFile, traits: Sequence[str] | None, blank: bool) -> tuple[list, list]:
    plots = trial.plots()
    trait_table = trial.traits().set_index("name")
    names = list(trait_table.index) if traits is None else list(traits)
    unknown = [t for t in names if t not in trait_table.index]
    if unknown:
        raise TrialInputError(f"there is no trait {', '.join(map(repr, unknown))}; the traits "
                              f"are: {', '.join(trait_table.index)}", file=str(trial.path))
    labels = [c for c in LABELS if c in ("plot", "entry") or plots[c].notna().any()]
    header = labels + names + (["notes"] if blank else [])
    values = None if blank else trial_values(trial)
    rows = []
    for i, plot in enumerate(plots.itertuples(index=False)):
        row = [_label(getattr(plot, c)) for c in labels]
        if blank:
            row += [""] * (len(names) + 1)
        else:
            row += [format_value(values.iat[i, values.columns.get_loc(t)],
                                 _decimals(trait_table.at[t, "decimals"])) for t in names]
        rows.append(row)
    return header, rows


def _label(value) -> str:
    if value is None or pd.isna(value):
        return ""
    return str(int(value)) if isinstance(value, float) and value.is_integer() else str(value)


def _decimals(value) -> int | None:
    return None if value is None or pd.isna(value) else int(value)


def _csv_bytes(header: list, rows: list) -> bytes:
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(header)
    writer.writerows(rows)
    return buffer.getvalue().encode("utf-8")


def _xlsx_bytes(header: list, rows: list, title: str, *, blank: bool) -> bytes:
    from openpyxl import Workbook
    from openpyxl.styles import Border, Font, Side
    from openpyxl.utils import get_column_letter

    book = Workbook()
    sheet = book.active
    sheet.title = "plots"
    thin = Side(style="thin", color="808080")
    box = Border(left=thin, right=thin, top=thin, bottom=thin)
    for c, name in enumerate(header, start=1):
        cell = sheet.cell(row=1, column=c)
        cell.value, cell.data_type = str(name), "s"
        cell.font = Font(bold=True)
    for r, row in enumerate(rows, start=2):
        for c, text in enumerate(row, start=1):
            cell = sheet.cell(row=r, column=c)
            if text == "":
                continue
            if header[c - 1] in ("plot", "block", "incomplete_block", "entry"):
                cell.value, cell.data_type = text, "s"  # text stays text, never a formula
            else:
                cell.value = int(text) if text.lstrip("-").isdigit() else float(text)
        if blank:  # ruled boxes to write in
            for c in range(1, len(header) + 1):
                sheet.cell(row=r, column=c).border = box
    for c, name in enumerate(header, start=1):
        width = max([len(str(name))] + [len(row[c - 1]) for row in rows[:500]]) + 2
        sheet.column_dimensions[get_column_letter(c)].width = max(8, min(width, 40))
    sheet.freeze_panes = "A2"
    sheet.print_title_rows = "1:1"
    sheet.page_setup.fitToWidth = 1
    sheet.page_setup.fitToHeight = 0
    sheet.sheet_properties.pageSetUpPr.fitToPage = True
    sheet.oddHeader.center.text = title
    sheet.oddFooter.center.text = "Page &P of &N"
    buffer = io.BytesIO()
    book.save(buffer)
    return buffer.getvalue()


def export_fieldbook(trial: TrialFile, output: str | Path, *, traits: Sequence[str] | None = None,
                     blank: bool = False) -> int:
    """Write the trial's plots as a long field book; returns the number of plot rows written.

    ``output`` ends in ``.csv`` or ``.xlsx``. With ``blank``, the trait columns are left empty
    (and a notes column added) for recording on paper or a tablet, plots in field order.
    """
    output = Path(output)
    suffix = output.suffix.lower()
    if suffix not in (".csv", ".xlsx"):
        raise TrialInputError("the output must end in .csv or .xlsx", file=str(output))
    header, rows = _table(trial, traits, blank)
    if suffix == ".csv":
        data = _csv_bytes(header, rows)
    else:
        name = trial.facts().get("name") or trial.path.stem
        data = _xlsx_bytes(header, rows, f"{name} - field book" if blank else name, blank=blank)
    try:
        write_atomic(output, data)
    except OSError as exc:
        raise TrialInputError(f"cannot write the field book: {exc.strerror}",
                              file=str(output)) from None
    return len(rows)
