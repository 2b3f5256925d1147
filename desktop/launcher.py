"""Entry point of the ``trialdesk`` command.

Batch sub-commands (``analyze``, ``demo``) run in trialdesk.core without loading Qt, so the command
line stays quick and works on machines with no display.
"""

from __future__ import annotations

import sys
from collections.abc import Sequence


def main(argv: Sequence[str] | None = None) -> int:
    """Run the ``trialdesk`` command; returns the exit status."""
    from trialdesk.core.cli import main as batch_main

    args = list(sys.argv[1:] if argv is None else argv)
    return batch_main(args or ["--help"])


if __name__ == "__main__":
    sys.exit(main())
