"""Batch sub-commands of the ``trialdesk`` command (no Qt here).

``trialdesk analyze FIELDBOOK ...`` analyses a field book and prints a readable summary (or JSON);
``trialdesk demo`` analyses the bundled demo trial. Exit status: 0 on success, 2 on bad input, with
the message on standard error and no traceback.
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Sequence

from trialdesk.core.errors import TrialInputError
from trialdesk.core.separation import CHECK_DIRECTIONS, METHODS

EXIT_OK = 0
EXIT_BAD_INPUT = 2


def _add_analysis_options(parser: argparse.ArgumentParser) -> None:
    roles = parser.add_argument_group("columns (found by common names when not given)")
    roles.add_argument("--sheet", help="worksheet of an XLSX field book (default: the first)")
    roles.add_argument("--entry", metavar="COL", help="column of entry codes")
    roles.add_argument("--block", metavar="COL", help="column of blocks (replicates)")
    roles.add_argument("--plot", metavar="COL", help="column of plot numbers")
    roles.add_argument("--row", metavar="COL", help="column of field rows")
    roles.add_argument("--column", metavar="COL", help="column of field columns")
    roles.add_argument("--trait", metavar="COL", action="append", default=[],
                       help="trait to analyse (repeat for several; default: every numeric column)")
    roles.add_argument("--decimal-comma", action="store_true",
                       help="read 4,25 as 4.25 (for field books written with a decimal comma)")
    analysis = parser.add_argument_group("analysis")
    analysis.add_argument("--design", choices=("rcbd", "crd"), default="rcbd",
                          help="rcbd: randomized complete blocks (default); crd: no blocks")
    analysis.add_argument("--method", choices=METHODS, default="tukey",
                          help="mean separation method (default: tukey)")
    analysis.add_argument("--alpha", type=float, default=0.05, help="significance level (0.05)")
    analysis.add_argument("--check", metavar="ENTRY", action="append", default=[],
                          help="a check variety (repeat for several)")
    analysis.add_argument("--check-direction", choices=CHECK_DIRECTIONS, default="both",
                          help="Dunnett: both sides, or one-sided 'above' or 'below' the checks")
    analysis.add_argument("--lower-is-better", metavar="TRAIT", action="append", default=[],
                          help="trait whose lowest mean ranks first (e.g. days to heading)")
    parser.add_argument("--json", metavar="PATH", help="write the JSON result to PATH ('-': "
                        "standard output, instead of the readable summary)")


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of the batch sub-commands."""
    parser = argparse.ArgumentParser(
        prog="trialdesk",
        description="Analyse replicated variety trials. Without a sub-command, opens the program.",
    )
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    analyze = sub.add_parser("analyze", help="analyse a field book (CSV or XLSX)",
                             description="Analyse a field book and print the trial summary.")
    analyze.add_argument("fieldbook", help="field book file: CSV (, ; or tab) or XLSX")
    _add_analysis_options(analyze)
    demo = sub.add_parser("demo", help="analyse the bundled demo trial and print the summary")
    demo.add_argument("--json", metavar="PATH", help="write the JSON result to PATH or '-'")
    return parser


def _settings_from(args: argparse.Namespace):
    from trialdesk.core.results import AnalysisSettings

    return AnalysisSettings(
        design=args.design,
        method=args.method,
        alpha=args.alpha,
        checks=tuple(args.check),
        check_direction=args.check_direction,
        traits=tuple(args.trait),
        lower_is_better=tuple(args.lower_is_better),
    )


def _run(args: argparse.Namespace) -> int:
    from trialdesk.core.analysis import analyze
    from trialdesk.core.atomic import write_atomic
    from trialdesk.core.demo import DEMO_SETTINGS, demo_fieldbook_path
    from trialdesk.core.fieldbook import read_fieldbook
    from trialdesk.core.json_output import analysis_to_json
    from trialdesk.core.summary_text import analysis_text

    if args.command == "demo":
        book = read_fieldbook(demo_fieldbook_path())
        settings = DEMO_SETTINGS
    else:
        book = read_fieldbook(
            args.fieldbook, sheet=args.sheet, entry=args.entry, block=args.block,
            plot=args.plot, row=args.row, column=args.column,
            traits=args.trait or None, decimal_comma=args.decimal_comma,
        )
        settings = _settings_from(args)
    result = analyze(book, settings)
    if args.json == "-":
        sys.stdout.write(analysis_to_json(result) + "\n")
        return EXIT_OK
    if args.json:
        try:
            write_atomic(args.json, analysis_to_json(result) + "\n")
        except OSError as exc:
            raise TrialInputError(f"cannot write the JSON result: {exc.strerror}",
                                  file=args.json) from None
    sys.stdout.write(analysis_text(result))
    return EXIT_OK


def main(argv: Sequence[str] | None = None) -> int:
    """Run a batch sub-command; returns the exit status."""
    args = build_parser().parse_args(argv)
    try:
        return _run(args)
    except TrialInputError as exc:
        print(f"trialdesk: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
