"""Batch sub-commands of the ``trialdesk`` command (no Qt here).

``trialdesk analyze FILE ...`` analyses a field book or a trial file and prints a readable summary
(or JSON), and with ``--workbook``/``--pdf`` writes the results workbook and the printable trial
summary. A field book with ``--location`` (and ``--season``), or several trial files, is analysed
as a series over environments. ``trialdesk demo`` analyses the bundled demo trial; ``trialdesk
import`` makes a trial file from a field book (or shows what a re-import would change);
``trialdesk export`` writes a trial's plots as a field book, filled in or blank; ``trialdesk
layout`` randomizes entries to plots before sowing and writes the new trial file (and a blank field
book).
Exit status: 0 on success, 2 on bad input, with the message on standard error and no traceback.
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Callable, Sequence
from typing import Any

from trialdesk.core.errors import TrialInputError
from trialdesk.core.results import DESIGNS, SPATIAL_METHODS
from trialdesk.core.separation import CHECK_DIRECTIONS, METHODS

EXIT_OK = 0
EXIT_BAD_INPUT = 2

#: Papers of the PDF summary.
PAPERS = ("A4", "Letter")

#: Draws the PDF summary: ``(report, path, paper)``; for ``layout``, the field map of the layout.
PdfWriter = Callable[[Any, str, str], Any]

#: The ``layout`` option that gives each setting of trialdesk.core.layouts.make_layout.
_LAYOUT_OPTIONS = {"entries": "--entries", "checks": "--checks", "design": "--design",
                   "reps": "--reps", "block_size": "--block-size", "rows": "--rows",
                   "columns": "--columns", "serpentine": "--serpentine", "seed": "--seed"}


def _add_role_options(parser: argparse.ArgumentParser) -> None:
    roles = parser.add_argument_group("columns (found by common names when not given)")
    roles.add_argument("--sheet", help="worksheet of an XLSX field book (default: the first)")
    roles.add_argument("--entry", metavar="COL", help="column of entry codes")
    roles.add_argument("--block", metavar="COL", help="column of blocks (replicates)")
    roles.add_argument("--plot", metavar="COL", help="column of plot numbers")
    roles.add_argument("--row", metavar="COL", help="column of field rows")
    roles.add_argument("--column", metavar="COL", help="column of field columns")
    roles.add_argument("--incomplete-block", metavar="COL",
                       help="column of incomplete blocks within replicates (alpha designs)")
    roles.add_argument("--trait", metavar="COL", action="append", default=[],
                       help="trait to analyse (repeat for several; default: every numeric column)")
    roles.add_argument("--decimal-comma", action="store_true",
                       help="read 4,25 as 4.25 (for field books written with a decimal comma)")
    roles.add_argument("--check", metavar="ENTRY", action="append", default=None,
                       help="a check variety (repeat for several)")
    roles.add_argument("--lower-is-better", metavar="TRAIT", action="append", default=None,
                       help="trait whose lowest mean ranks first (e.g. days to heading)")


def _add_analysis_options(parser: argparse.ArgumentParser) -> None:
    _add_role_options(parser)
    analysis = parser.add_argument_group(
        "analysis (for a trial file, the settings saved in it unless given here)")
    analysis.add_argument("--design", choices=DESIGNS,
                          help="rcbd: randomized complete blocks (default); crd: no blocks; "
                          "alpha: incomplete blocks within replicates (REML)")
    analysis.add_argument("--spatial", choices=SPATIAL_METHODS,
                          help="field-trend adjustment from each plot's row and column: rowcol "
                          "(rows and columns random) or papadakis (neighbour covariate); "
                          "default none")
    analysis.add_argument("--entries-random", action="store_true", default=None,
                          help="rank entries by BLUPs (entries random; no mean separation)")
    analysis.add_argument("--method", choices=METHODS,
                          help="mean separation method (default: tukey)")
    analysis.add_argument("--alpha", type=float, help="significance level (default 0.05)")
    analysis.add_argument("--check-direction", choices=CHECK_DIRECTIONS,
                          help="Dunnett: both sides, or one-sided 'above' or 'below' the checks")
    _add_report_options(parser)
    parser.add_argument("--json", metavar="PATH", help="write the JSON result to PATH ('-': "
                        "standard output, instead of the readable summary)")


def _add_series_options(parser: argparse.ArgumentParser) -> None:
    series = parser.add_argument_group(
        "series over environments (a field book with a location column, or several trial files)")
    series.add_argument("--location", metavar="COL",
                        help="column of locations: analyse the field book as a series")
    series.add_argument("--season", metavar="COL",
                        help="column of seasons; an environment is a location in a season")
    # The choices are trialdesk.core.series.COMPONENT_METHODS, written out so that building the
    # parser does not load the analysis modules.
    series.add_argument("--variance-components", choices=("auto", "reml"), default="auto",
                        help="auto: from the ANOVA mean squares when the series is balanced, by "
                        "REML otherwise (default); reml: always by REML")


def _add_report_options(parser: argparse.ArgumentParser) -> None:
    reports = parser.add_argument_group("reports")
    reports.add_argument("--workbook", metavar="PATH",
                         help="write the results workbook (.xlsx) to PATH")
    reports.add_argument("--pdf", metavar="PATH",
                         help="write the printable trial summary (PDF) to PATH")
    reports.add_argument("--paper", choices=PAPERS, default="A4",
                         help="paper of the PDF summary (default A4)")


def _add_import_options(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--output", "-o", metavar="TRIAL", required=True,
                        help="the trial file to make (.trial), or an existing one to update")
    parser.add_argument("--layout", choices=("long", "wide"), default="long",
                        help="long: one row per plot (default); wide: entries as rows and one "
                        "column per replicate, holding the trait named by --trait")
    _add_role_options(parser)
    facts = parser.add_argument_group("trial facts")
    facts.add_argument("--name", help="trial name (default: the field book's file name)")
    facts.add_argument("--station", help="station or location")
    facts.add_argument("--season", help="season, e.g. 2026 main")
    facts.add_argument("--crop", help="crop; also picks the default standard moisture")
    facts.add_argument("--design", choices=DESIGNS, default="rcbd")
    facts.add_argument("--plot-area", metavar="M2", type=float,
                       help="harvested area of a plot in square metres")
    facts.add_argument("--standard-moisture", metavar="PCT", type=float,
                       help="moisture to adjust grain yield to (default: the crop's usual one)")
    derived = parser.add_argument_group("grain yield from plot weight")
    derived.add_argument("--yield-from", metavar="COL",
                         help="plot weight column to compute grain yield from")
    derived.add_argument("--weight-unit", choices=("kg", "g"), default="kg")
    derived.add_argument("--moisture", metavar="COL",
                         help="grain moisture column (%%), to adjust yield to standard moisture")
    derived.add_argument("--yield-unit", choices=("t/ha", "kg/ha", "bu/ac"), default="t/ha")
    derived.add_argument("--yield-name", default="grain_yield",
                         help="name of the computed trait (default grain_yield)")
    parser.add_argument("--apply", action="store_true",
                        help="re-import: make the changes shown (without it, nothing changes)")


def _add_layout_options(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--entries", metavar="FILE|N", required=True,
                        help="a number N (entries E001 ... are made up), or a CSV or text file "
                        "of entry codes: one a line, or a column 'entry' or 'code' (and 'name')")
    parser.add_argument("--checks", metavar="CODE", nargs="+", default=[],
                        help="check entries; those not in the entry list are added to it")
    parser.add_argument("--design", choices=("rcbd", "crd", "alpha"), required=True,
                        help="rcbd: complete blocks; crd: no blocks; alpha: incomplete blocks "
                        "within each replicate")
    parser.add_argument("--reps", metavar="R", type=int, required=True,
                        help="replicates (crd: plots of each entry)")
    parser.add_argument("--block-size", metavar="K", type=int,
                        help="plots per incomplete block (alpha); it must divide the entries")
    field = parser.add_argument_group("the field (plots fill it replicate by replicate, along "
                                      "the rows)")
    field.add_argument("--rows", metavar="N", type=int, help="rows of plots in the field")
    field.add_argument("--columns", metavar="N", type=int, help="plots in each row")
    field.add_argument("--serpentine", action="store_true",
                       help="turn every other row back, so plot numbers run on in the field")
    parser.add_argument("--seed", metavar="S", type=int, required=True,
                        help="seed of the randomization: the same seed gives the same layout")
    parser.add_argument("--output", "-o", metavar="TRIAL", required=True,
                        help="the trial file to make (.trial); it must not exist")
    parser.add_argument("--fieldbook", metavar="FIELD", help="also write the blank field book "
                        "for sowing and notes (.xlsx or .csv); it must not exist")
    parser.add_argument("--trait", metavar="NAME", action="append", default=None,
                        help="trait to record (repeat for several; default grain_yield)")
    facts = parser.add_argument_group("trial facts")
    facts.add_argument("--name", help="trial name (default: the trial file's name)")
    facts.add_argument("--station", help="station or location")
    facts.add_argument("--season", help="season, e.g. 2026 main")
    facts.add_argument("--crop", help="crop")
    reports = parser.add_argument_group("field map")
    reports.add_argument("--pdf", metavar="PATH", help="write the printable field map (PDF)")
    reports.add_argument("--paper", choices=PAPERS, default="A4",
                         help="paper of the field map (default A4)")


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of the batch sub-commands."""
    parser = argparse.ArgumentParser(
        prog="trialdesk",
        description="Analyse replicated variety trials. Without a sub-command, opens the program.",
    )
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    analyze = sub.add_parser("analyze", help="analyse a field book or a trial file",
                             description="Analyse a trial and print the trial summary.")
    analyze.add_argument("fieldbook", metavar="FILE", nargs="+",
                         help="trial file (.trial) or field book: CSV (, ; or tab) or XLSX; "
                         "several trial files are analysed as a series, one environment each")
    _add_analysis_options(analyze)
    _add_series_options(analyze)
    demo = sub.add_parser("demo", help="open the demo trial; with --print, analyse it and print "
                          "the summary instead")
    demo.add_argument("--print", action="store_true",
                      help="print the demo trial's summary (no window)")
    demo.add_argument("--json", metavar="PATH", help="write the JSON result to PATH or '-'")
    _add_report_options(demo)
    imp = sub.add_parser("import", help="make a trial file from a field book",
                         description="Make a trial file from a field book, or show (and with "
                         "--apply make) the changes a re-import into an existing trial brings.")
    imp.add_argument("fieldbook", metavar="FIELDBOOK", help="CSV or XLSX field book")
    _add_import_options(imp)
    exp = sub.add_parser("export", help="write a trial's plots as a field book",
                         description="Write the plot data of a trial file as a long field book.")
    exp.add_argument("trial", metavar="TRIAL", help="the trial file (.trial)")
    exp.add_argument("--output", "-o", metavar="FILE", required=True,
                     help="the field book to write: .csv or .xlsx")
    exp.add_argument("--blank", action="store_true",
                     help="leave the trait columns empty: a field book to fill in")
    exp.add_argument("--trait", metavar="NAME", action="append", default=None,
                     help="only these traits (repeat for several)")
    lay = sub.add_parser("layout", help="randomize entries to plots before sowing",
                         description="Randomize entries to plots, number the plots in field "
                         "order and make the trial file, with a blank field book.")
    _add_layout_options(lay)
    return parser


def _settings_from(args: argparse.Namespace, saved: dict):
    """Options given on the command line win over the settings saved in a trial file."""
    from trialdesk.core.results import AnalysisSettings

    given = {
        "design": args.design,
        "method": args.method,
        "alpha": args.alpha,
        "checks": args.check,
        "check_direction": args.check_direction,
        "traits": args.trait or None,
        "lower_is_better": args.lower_is_better,
        "spatial": getattr(args, "spatial", None),
        "entries_random": getattr(args, "entries_random", None),
    }
    merged = {**saved, **{k: v for k, v in given.items() if v is not None}}
    return AnalysisSettings.from_dict(merged)


def _read_book(args: argparse.Namespace):
    from trialdesk.core.fieldbook import read_fieldbook

    if getattr(args, "layout", "long") == "wide":
        from trialdesk.core.wide_fieldbook import read_wide_fieldbook

        if not args.trait or len(args.trait) != 1:
            raise TrialInputError("a wide field book holds one trait: name it with --trait")
        return read_wide_fieldbook(args.fieldbook, trait=args.trait[0], entry=args.entry,
                                   sheet=args.sheet, decimal_comma=args.decimal_comma)
    return read_fieldbook(
        args.fieldbook, sheet=args.sheet, entry=args.entry, block=args.block,
        plot=args.plot, row=args.row, column=args.column,
        incomplete_block=args.incomplete_block,
        traits=args.trait or None, decimal_comma=args.decimal_comma,
    )


def _is_trial(path: str) -> bool:
    return path.lower().endswith(".trial")


def _book_and_settings(args: argparse.Namespace):
    if args.command == "demo":
        from trialdesk.core.demo import DEMO_SETTINGS, demo_fieldbook_path
        from trialdesk.core.fieldbook import read_fieldbook

        return read_fieldbook(demo_fieldbook_path()), DEMO_SETTINGS, []
    if _is_trial(args.fieldbook):
        from trialdesk.core.trial_fieldbook import (
            derivation_notes,
            fieldbook_from_trial,
            trial_settings,
        )
        from trialdesk.core.trialfile import TrialFile

        with TrialFile.open(args.fieldbook, read_only=True) as trial:
            return (fieldbook_from_trial(trial), _settings_from(args, trial_settings(trial)),
                    derivation_notes(trial))
    return _read_book(args), _settings_from(args, {}), []


def _run_import(args: argparse.Namespace) -> int:
    from pathlib import Path

    from trialdesk.core.importer import (
        YieldRecipe,
        apply_reimport,
        import_fieldbook,
        plan_reimport,
    )
    from trialdesk.core.trialfile import TrialFile

    book = _read_book(args)
    if Path(args.output).exists():
        with TrialFile.open(args.output, read_only=not args.apply) as trial:
            plan = plan_reimport(trial, book)
            print(plan.text())
            if args.apply and not plan.is_empty:
                apply_reimport(trial, book, plan)
                print(f"Applied to {args.output}.")
            elif not plan.is_empty:
                print("Nothing was changed; run again with --apply to make these changes.")
        return EXIT_OK
    facts = {"name": args.name, "station": args.station, "season": args.season,
             "crop": args.crop, "design": args.design, "harvested_area_m2": args.plot_area,
             "standard_moisture_pct": args.standard_moisture}
    recipe = None
    if args.yield_from:
        recipe = YieldRecipe(name=args.yield_name, weight=args.yield_from,
                             weight_unit=args.weight_unit, moisture=args.moisture,
                             unit=args.yield_unit)
        if args.plot_area is None:
            raise TrialInputError("grain yield from plot weight needs the harvested area of a "
                                  "plot: give --plot-area in square metres")
    report = import_fieldbook(book, args.output,
                              facts={k: v for k, v in facts.items() if v is not None},
                              checks=tuple(args.check or ()),
                              lower_is_better=tuple(args.lower_is_better or ()), recipe=recipe)
    print(report.text())
    return EXIT_OK


def _run_export(args: argparse.Namespace) -> int:
    from trialdesk.core.exporter import export_fieldbook
    from trialdesk.core.trialfile import TrialFile

    with TrialFile.open(args.trial, read_only=True) as trial:
        n = export_fieldbook(trial, args.output, traits=args.trait, blank=args.blank)
    print(f"Wrote {n} plots to {args.output}.")
    return EXIT_OK


def _layout_entries(value: str):
    """The entry codes (and names) of ``--entries``: a number, or a file."""
    from trialdesk.core.layouts import EntryList, numbered_entries, read_entry_list

    if value.strip().isdecimal():
        count = int(value)
        if count < 1:
            raise TrialInputError(f"--entries: give 1 or more entries, not {value}")
        return EntryList(codes=numbered_entries(count), names=())
    return read_entry_list(value)


def _run_layout(args: argparse.Namespace, pdf_writer: PdfWriter | None) -> int:
    """``trialdesk layout``: randomize, write the trial file, the field book and the field map."""
    import os

    from trialdesk.core.layouts import LayoutSettingError, make_layout, write_layout

    if args.pdf and pdf_writer is None:
        raise TrialInputError("the PDF field map is drawn by the desktop part of Trialdesk: "
                              "run it through the trialdesk command", file=args.pdf)
    for path, option in ((args.output, "--output"), (args.fieldbook, "--fieldbook")):
        if path and os.path.lexists(path):
            raise TrialInputError(f"the file named by {option} exists already; a layout never "
                                  "writes over a file: choose a new name", file=path)
    if args.fieldbook and not args.fieldbook.lower().endswith((".xlsx", ".csv")):
        raise TrialInputError("--fieldbook: the field book's name must end in .xlsx or .csv",
                              file=args.fieldbook)
    if args.fieldbook and not os.path.isdir(os.path.dirname(os.path.abspath(args.fieldbook))):
        raise TrialInputError("--fieldbook: the folder for the field book does not exist",
                              file=args.fieldbook)
    entries = _layout_entries(args.entries)
    try:
        layout = make_layout(entries.codes, checks=args.checks, design=args.design,
                             reps=args.reps, block_size=args.block_size, rows=args.rows,
                             columns=args.columns, serpentine=args.serpentine, seed=args.seed)
    except LayoutSettingError as exc:
        raise TrialInputError(f"{_LAYOUT_OPTIONS[exc.setting]}: {exc.message}") from None
    facts = {"name": args.name, "station": args.station, "season": args.season,
             "crop": args.crop}
    write_layout(layout, args.output, facts={k: v for k, v in facts.items() if v is not None},
                 traits=args.trait or ("grain_yield",), names=entries.name_map())
    print(layout.text())
    print(f"Same seed, same layout: rerun with --seed {layout.seed} to get this layout again.")
    print(f"Wrote {args.output}.")
    if args.fieldbook:
        from trialdesk.core.exporter import export_fieldbook
        from trialdesk.core.trialfile import TrialFile

        with TrialFile.open(args.output) as trial:  # for editing: closing leaves no side files
            export_fieldbook(trial, args.fieldbook, blank=True)
        print(f"Wrote the field book to {args.fieldbook}.")
    if args.pdf:
        pdf_writer(layout, args.pdf, args.paper)
        print(f"Wrote the field map to {args.pdf}.")
    return EXIT_OK


def _run(args: argparse.Namespace, pdf_writer: PdfWriter | None = None) -> int:
    if args.command == "layout":
        return _run_layout(args, pdf_writer)
    if args.command == "import":
        return _run_import(args)
    if args.command == "export":
        return _run_export(args)
    if args.command == "analyze" and _is_series(args):
        return _run_series(args, pdf_writer)
    from trialdesk.core.analysis import analyze
    from trialdesk.core.json_output import analysis_to_json
    from trialdesk.core.summary_text import analysis_text

    if args.command == "analyze":
        args.fieldbook = args.fieldbook[0]
    book, settings, notes = _book_and_settings(args)
    result = analyze(book, settings, notes=notes)
    written = _write_reports(args, result, book, pdf_writer)
    return _print_result(args, analysis_to_json(result), analysis_text(result), written)


def _print_result(args: argparse.Namespace, json_text: str, summary: str,
                  written: list[str]) -> int:
    """The JSON to standard output (``--json -``) or to a file beside the summary."""
    from trialdesk.core.atomic import write_atomic

    if args.json == "-":
        sys.stdout.write(json_text + "\n")
        for line in written:
            print(line, file=sys.stderr)
        return EXIT_OK
    if args.json:
        try:
            write_atomic(args.json, json_text + "\n")
        except OSError as exc:
            raise TrialInputError(f"cannot write the JSON result: {exc.strerror}",
                                  file=args.json) from None
    sys.stdout.write(summary)
    for line in written:
        print(line)
    return EXIT_OK


def _is_series(args: argparse.Namespace) -> bool:
    if args.season and not args.location:
        raise TrialInputError("--season names the season column of a series: give the location "
                              "column with --location too", file=args.fieldbook[0])
    return bool(args.location) or len(args.fieldbook) > 1


def _run_series(args: argparse.Namespace, pdf_writer: PdfWriter | None) -> int:
    """``trialdesk analyze`` of a series: one field book with --location, or several trials."""
    from trialdesk.core.json_output import series_to_json
    from trialdesk.core.series import analyze_series, read_series, series_from_trials
    from trialdesk.core.series_text import series_text

    files = args.fieldbook
    for option, name in ((args.row, "--row"), (args.column, "--column")):
        if option:
            raise TrialInputError(f"{name} is not used in a series analysis: leave it out")
    trials = [f for f in files if _is_trial(f)]
    if args.location:
        if len(files) > 1 or trials:
            raise TrialInputError("--location reads the environments of one field book (CSV or "
                                  "XLSX); trial files are one environment each: give several "
                                  "without --location", file=(trials or files[1:])[0])
        data = read_series(files[0], entry=args.entry, location=args.location,
                           season=args.season, block=args.block, plot=args.plot,
                           traits=args.trait or None, sheet=args.sheet,
                           decimal_comma=args.decimal_comma)
    else:
        other = next((f for f in files if not _is_trial(f)), None)
        if other is not None:
            raise TrialInputError("several files make a series only as trial files (.trial), one "
                                  "environment each; a field book holding several environments "
                                  "is given alone, with --location", file=other)
        data = series_from_trials(files)
    result = analyze_series(data, _settings_from(args, data.saved_settings),
                            components=args.variance_components)
    written = _write_series_reports(args, result, data, trials, pdf_writer)
    return _print_result(args, series_to_json(result), series_text(result), written)


def _write_series_reports(args: argparse.Namespace, analysis, data, trials: list[str],
                          pdf_writer: PdfWriter | None) -> list[str]:
    """Write the series workbook and PDF summary asked for; the lines saying what was written.

    Trait units come from the trial files (the first that records a trait's unit)."""
    if not (args.workbook or args.pdf):
        return []
    from trialdesk.core.report import trial_context
    from trialdesk.core.series_report import build_series_report

    units: dict[str, str] = {}
    for path in trials:
        traits = trial_context(path)["traits"]
        for row in traits.itertuples(index=False):
            if isinstance(row.unit, str) and row.unit:
                units.setdefault(str(row.name), row.unit)
    report = build_series_report(analysis, units=units)
    written = []
    if args.pdf:
        if pdf_writer is None:
            raise TrialInputError("the PDF summary is drawn by the desktop part of Trialdesk: "
                                  "run it through the trialdesk command", file=args.pdf)
        pdf_writer(report, args.pdf, args.paper)
        written.append(f"Wrote the series summary to {args.pdf}.")
    if args.workbook:
        from trialdesk.core.series_workbook import write_series_workbook

        write_series_workbook(report, args.workbook, data=data,
                              components=args.variance_components)
        written.append(f"Wrote the results workbook to {args.workbook}.")
    return written


def _write_reports(args: argparse.Namespace, analysis, book, pdf_writer: PdfWriter | None
                   ) -> list[str]:
    """Write the workbook and the PDF summary asked for; the lines saying what was written."""
    if not (args.workbook or args.pdf):
        return []
    from trialdesk.core.report import build_report, trial_context

    if args.command == "demo":
        import pandas as pd

        from trialdesk.core.demo import DEMO_FACTS, DEMO_TRAITS

        traits = pd.DataFrame([{"name": name, "unit": fields["unit"], "decimals": None}
                               for name, fields in DEMO_TRAITS.items()])
        context = {"facts": DEMO_FACTS, "traits": traits}
    else:
        context = trial_context(args.fieldbook)
    report = build_report(analysis, book, **context)
    written = []
    if args.pdf:
        if pdf_writer is None:
            raise TrialInputError("the PDF summary is drawn by the desktop part of Trialdesk: "
                                  "run it through the trialdesk command", file=args.pdf)
        pdf_writer(report, args.pdf, args.paper)
        written.append(f"Wrote the trial summary to {args.pdf}.")
    if args.workbook:
        from trialdesk.core.workbook import write_workbook

        write_workbook(report, args.workbook, book=book)
        written.append(f"Wrote the results workbook to {args.workbook}.")
    return written


def main(argv: Sequence[str] | None = None, *, pdf_writer: PdfWriter | None = None) -> int:
    """Run a batch sub-command; returns the exit status.

    ``pdf_writer(report, path, paper)`` draws the PDF summary (for ``layout``, the field map of
    the :class:`~trialdesk.core.layouts.Layout`). The core never loads Qt, so the ``trialdesk``
    command passes the desktop part's writer; without one, ``--pdf`` is refused.
    """
    args = build_parser().parse_args(argv)
    try:
        return _run(args, pdf_writer)
    except TrialInputError as exc:
        print(f"trialdesk: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
