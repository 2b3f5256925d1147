"""Entry point of the ``trialdesk`` command.

Without a sub-command (or with a trial file or field book to open) it starts the desktop program;
``trialdesk demo`` opens it on the demo trial. The batch sub-commands (``analyze``, ``import``,
``export``, and ``demo --print``) run in trialdesk.core without loading Qt, so the command line
stays quick and works on machines with no display; only ``--pdf`` loads Qt, offscreen, to draw
the printable summary.
"""

from __future__ import annotations

import sys
from collections.abc import Sequence

BATCH_COMMANDS = ("analyze", "import", "export", "layout")


def _is_batch(args: list[str]) -> bool:
    if not args:
        return False
    first = args[0]
    if first in BATCH_COMMANDS or first in ("-h", "--help"):
        return True
    return first == "demo" and any(a.split("=")[0] in ("--print", "--json", "--workbook", "--pdf")
                                   for a in args[1:])


def _write_pdf(report, path: str, paper: str) -> None:
    """The PDF for the batch commands, drawn by Qt offscreen (loaded only when asked): the
    field book of a layout, the series summary for the report of a series, else the trial
    summary."""
    from trialdesk.core.layouts import Layout
    from trialdesk.core.series_report import SeriesReport

    if isinstance(report, Layout):
        from trialdesk.desktop.layout_pdf import write_layout_pdf

        write_layout_pdf(report, path, paper=paper)
        return
    if isinstance(report, SeriesReport):
        from trialdesk.desktop.series_pdf import write_series_pdf

        write_series_pdf(report, path, paper=paper)
        return
    from trialdesk.desktop.report_pdf import write_pdf

    write_pdf(report, path, paper=paper)


def main(argv: Sequence[str] | None = None) -> int:
    """Run the ``trialdesk`` command; returns the exit status."""
    args = list(sys.argv[1:] if argv is None else argv)
    if _is_batch(args):
        from trialdesk.core.cli import main as batch_main

        return batch_main(args, pdf_writer=_write_pdf)
    from trialdesk.desktop.app import run

    return run(args)


if __name__ == "__main__":
    sys.exit(main())
